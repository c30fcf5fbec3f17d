//! The daemon: sources → reading checks → archive → engine → outputs, over bounded channels.
//!
//! * Sources are tasks that send [`SourceEvent`](sources::SourceEvent)s into one channel of
//!   [`SOURCE_QUEUE`](sources::SOURCE_QUEUE) events; a source that can wait (replay, files,
//!   MQTT before its ack) waits when it is full.
//! * The engine task (`engine_task`) owns the [`Engine`]: it rejects or archives each reading, then hands it to
//!   the engine and carries out its outputs. Archive appends wait when the writer's queue is
//!   full: nothing is lost.
//! * Shutdown flows downstream: only sources watch the shutdown signal; the engine task ends
//!   when every source has ended or dropped its sender, saves the engine state, and drops its
//!   archive handle, so the writer flushes last.
//!
//! * [`sources`] — where readings come from (replay, folder, serial, MQTT), one module each,
//!   all sending the one [`SourceEvent`](sources::SourceEvent) type.
//! * [`outputs`] — where alerts go (stack light, MQTT, email).
//! * [`control`] — the control socket (status, acknowledgements, approvals); [`hub`] — the
//!   views the engine loop publishes to outputs and control.
//! * [`web`] — the HTTP endpoint (plain or TLS): metrics for the plant's monitoring, health
//!   checks; [`page`] — the live page; [`access`] — logins, sessions and the checks on every
//!   form that acknowledges from the page.
//! * [`notify`] — systemd readiness, watchdog and status notifications; [`clock`] — the one
//!   clock.

pub mod access;
pub mod clock;
pub mod control;
mod engine_task;
pub mod hub;
pub mod notify;
pub mod outputs;
pub mod page;
pub mod sources;
pub mod web;

pub use clock::now_ms;
use engine_task::EngineTask;
use sources::SOURCE_QUEUE;

use std::sync::Arc;
use std::time::Duration;

use tokio::sync::{mpsc, watch};

use crate::archive::writer::{self, ArchiveHandle, Writer, WriterConfig};
use crate::archive::{ArchiveError, Record};
use crate::config::Config;
use crate::engine::{Engine, Incoming, Level, Output};
use crate::format::num;

/// Why the daemon stopped with an error.
#[derive(Debug, thiserror::Error)]
pub enum DaemonError {
    #[error(transparent)]
    Archive(#[from] ArchiveError),
    #[error("the archive writer did not finish within {0:?}")]
    LateWriter(Duration),
    #[error("[web]: {0}")]
    Web(String),
}

/// What a run did, for the caller and the tests.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct Summary {
    pub accepted: u64,
    pub rejected: u64,
    pub subgroups: u64,
    pub violations: u64,
    pub last_seq: u64,
}

/// What one turn of the engine loop changed, for the outputs.
#[derive(Default)]
struct Effects {
    alerts_changed: bool,
    /// Characteristics whose retained state may have changed.
    dirty: std::collections::BTreeSet<String>,
    /// Characteristics whose alerts changed.
    alert_chars: std::collections::BTreeSet<String>,
    /// What the journal has said of each alert: when a repeat was last logged, and whether
    /// its condition was last said to be gone.
    journal: std::collections::HashMap<String, Journal>,
    /// Each characteristic's decimals, as its latest checked subgroup gave them.
    decimals: std::collections::HashMap<String, usize>,
    /// Subgroups checked and violations, for the metrics.
    subgroups: std::collections::BTreeMap<String, u64>,
    violations: std::collections::BTreeMap<(String, String, crate::rules::Severity), u64>,
}

/// What the journal has said of one alert.
#[derive(Default)]
struct Journal {
    repeat_logged_ms: i64,
    gone: bool,
}

/// What asked the daemon to stop ("SIGTERM"), set once by the command line before it turns the
/// shutdown signal on; the `daemon-stopped` record says it.
pub static STOP_CAUSE: std::sync::OnceLock<&'static str> = std::sync::OnceLock::new();

/// Runs the daemon until `shutdown` turns true or every source has ended. Each message on
/// `reload` rereads the config file: a valid file is swapped in (characteristics whose
/// configuration did not change keep their state), an invalid one is rejected whole and the
/// running config kept.
///
/// The stages, in order: open the archive and read it back; build the engine and record the
/// start; start the outputs and the control socket; start the sources; tell systemd; run the
/// engine loop ([`engine_task`]); then shut down downstream-first (the engine's last state, the
/// outputs winding down, the archive writer last).
pub async fn run(
    cfg: Config,
    shutdown: watch::Receiver<bool>,
    reload: mpsc::Receiver<()>,
) -> Result<Summary, DaemonError> {
    let started_ms = now_ms();
    let (archive, writer_thread, tail) = open_archive(&cfg)?;
    let mut engine = Engine::new(&cfg, now_ms());
    let mut summary = Summary::default();
    record_start(&archive, &cfg, &mut engine, &tail, &mut summary).await?;
    drop(tail);
    crate::fsutil::release_memory();

    let progress = Arc::new(std::sync::atomic::AtomicI64::new(now_ms()));
    let (publish, outputs, mut inbox) =
        start_outputs(&cfg, &progress, reload, archive.status()).await?;
    let (tx, rx) = mpsc::channel(SOURCE_QUEUE);
    let health = sources::start(&cfg.sources, &cfg.archive_dir, tx, &shutdown).await;
    let notifier = Arc::new(notify::Notifier::from_env());
    start_watchdog(&notifier, &progress, archive.status());
    let announce = format!(
        "monitoring {} characteristic(s) from {} source(s)",
        cfg.characteristics.len(),
        health.len()
    );
    notifier.send(&format!("READY=1\nSTATUS={announce}"));
    tracing::info!(
        component = "daemon",
        "{announce}; archive {}",
        cfg.archive_dir.display()
    );

    let mut task = EngineTask::new(cfg, engine, archive, summary, health, publish, started_ms);
    let reason = match task.serve(rx, &mut inbox, &progress).await {
        // The sources end when asked to stop, too: the reason is the request, not their end.
        Ok(_) if *shutdown.borrow() => match STOP_CAUSE.get() {
            Some(cause) => format!("stopped by {cause}"),
            None => "asked to stop".to_string(),
        },
        Ok(reason) => reason,
        Err(e) => {
            // Said in the archive if it can still take a record (it cannot when it failed).
            let _ = task.record_stop(format!("stopped by an error: {e}")).await;
            return Err(e);
        }
    };

    tracing::info!(component = "daemon", "stopping: {reason}");
    notifier.send(&format!("STOPPING=1\nSTATUS=stopping: {reason}"));
    task.closing();
    outputs.wind_down(&mut task, &mut inbox.delivered).await;
    task.record_stop(reason).await?;
    let EngineTask {
        archive, summary, ..
    } = task;
    drop(archive);
    join_writer(writer_thread).await?;
    Ok(summary)
}

/// The archive writer's thread; it ends once every handle is dropped and all is flushed.
type WriterThread = std::thread::JoinHandle<Result<(), ArchiveError>>;

/// Opens the archive (cutting away damage, which is logged), starts its writer thread and
/// gives the tail the engine is rebuilt from.
fn open_archive(
    cfg: &Config,
) -> Result<(ArchiveHandle, WriterThread, crate::archive::record::Tail), DaemonError> {
    let mut wc = WriterConfig::new(&cfg.archive_dir);
    wc.flush_interval_ms = cfg.flush_interval_ms;
    wc.max_segment_bytes = cfg.max_segment_bytes;
    let (writer, report) = Writer::open(wc)?;
    for q in &report.quarantined {
        tracing::warn!(
            component = "archive",
            "recovered: cut {} damaged bytes at offset {} of {} into {}",
            q.bytes,
            q.offset,
            q.segment.display(),
            q.quarantine.display()
        );
    }
    let tail = writer.tail().clone();
    let (archive, join) = writer::spawn(writer, now_ms);
    Ok((archive, join, tail))
}

/// Records the start and the config, restores the engine from the tail and records the limits
/// in force.
async fn record_start(
    archive: &ArchiveHandle,
    cfg: &Config,
    engine: &mut Engine,
    tail: &crate::archive::record::Tail,
    summary: &mut Summary,
) -> Result<(), DaemonError> {
    let text = std::fs::read(&cfg.path).unwrap_or_default();
    archive
        .append(vec![
            Record::DaemonStarted {
                version: env!("CARGO_PKG_VERSION").to_string(),
            },
            Record::ConfigLoaded {
                path: cfg.path.display().to_string(),
                sha256: crate::archive::segment::sha256_hex(&text),
            },
        ])
        .await?;
    let mut restored = engine.restore(tail);
    restored.extend(engine.limits_records(tail));
    // What the restore says is archived and logged; the outputs hear of it from the first
    // publication, so the effects are not kept.
    carry_out(archive, cfg, restored, summary, &mut Effects::default()).await
}

/// The output tasks and the control socket, which outlive the sources so that the last light
/// state ("off") and the last status ("stopped") still go out.
struct OutputTasks {
    stop: watch::Sender<bool>,
    tasks: Vec<tokio::task::JoinHandle<()>>,
}

impl OutputTasks {
    /// Stops the outputs and waits (up to 5 s) for them, archiving the deliveries that finish
    /// meanwhile.
    async fn wind_down(self, task: &mut EngineTask, delivered: &mut mpsc::Receiver<hub::Delivery>) {
        let _ = self.stop.send(true);
        let tasks = self.tasks;
        let wind_down = async {
            for t in tasks {
                let _ = t.await;
            }
        };
        let drain = async {
            while let Some(d) = delivered.recv().await {
                if let Some(Output::Record(r)) =
                    task.engine.delivered(&d.output, &d.alert_id, d.version)
                {
                    let _ = task.archive.append(vec![r]).await;
                }
            }
        };
        let _ = tokio::time::timeout(Duration::from_secs(5), async {
            tokio::join!(wind_down, drain)
        })
        .await;
    }
}

/// Starts every configured output and the control socket, with the channels between them and
/// the engine loop.
async fn start_outputs(
    cfg: &Config,
    progress: &Arc<std::sync::atomic::AtomicI64>,
    reload: mpsc::Receiver<()>,
    archive_status: watch::Receiver<crate::archive::writer::Status>,
) -> Result<(engine_task::Publishers, OutputTasks, engine_task::Inbox), DaemonError> {
    let (stop, stop_rx) = watch::channel(false);
    let (alerts_tx, alerts_rx) = watch::channel(Arc::new(hub::AlertsView::default()));
    let (light_tx, light_rx) = watch::channel(hub::Light::Off);
    let (states_tx, states_rx) = watch::channel::<hub::States>(Default::default());
    let (req_tx, req_rx) = mpsc::channel::<hub::Request>(64);
    let (deliv_tx, deliv_rx) = mpsc::channel::<hub::Delivery>(1024);
    let (counts_tx, counts_rx) = watch::channel(Arc::new(hub::Counts::default()));
    let (views_tx, views_rx) = watch::channel::<hub::Views>(Default::default());
    let mut tasks = Vec::new();
    let mut failures = Vec::new();
    for o in &cfg.outputs {
        let failed = Arc::new(std::sync::atomic::AtomicU64::new(0));
        failures.push((o.id.clone(), failed.clone()));
        let t = outputs::spawn(
            o.clone(),
            outputs::Feeds {
                alerts: alerts_rx.clone(),
                light: light_rx.clone(),
                states: states_rx.clone(),
                delivered: deliv_tx.clone(),
                requests: req_tx.clone(),
                shutdown: stop_rx.clone(),
                progress: progress.clone(),
                timezone: cfg.tz(),
                failures: failed,
            },
        );
        tracing::info!(component = "output", output = %o.id, "alerts go to {}", o.describe());
        tasks.push(t);
    }
    if let Some(c) = &cfg.control {
        match control::bind(c) {
            Ok(l) => {
                tracing::info!(
                    component = "control",
                    "status and acknowledgements on {}",
                    c.socket.display()
                );
                tasks.push(tokio::spawn(control::serve(
                    l,
                    c.socket.clone(),
                    req_tx.clone(),
                    stop_rx.clone(),
                )));
            }
            Err(e) => tracing::error!(
                component = "control",
                "cannot open the control socket {}: {e}; linewarden status and ack will not work",
                c.socket.display()
            ),
        }
    }
    if let Some(w) = &cfg.web {
        // A port that cannot be opened stops the start: the plant's monitoring expects it.
        let listener = tokio::net::TcpListener::bind(w.listen)
            .await
            .map_err(|e| DaemonError::Web(format!("cannot listen on {}: {e}", w.listen)))?;
        let tls = match &w.tls {
            Some(t) => Some(t.load().map_err(DaemonError::Web)?),
            None => None,
        };
        tracing::info!(
            component = "web",
            "live page on {}://{}/ (cell monitor on /monitor), metrics on /metrics, health on /healthz and /readyz",
            if tls.is_some() { "https" } else { "http" },
            listener.local_addr().map_or(w.listen, |a| a)
        );
        for warning in w.warnings() {
            tracing::warn!(component = "web", "{warning}");
        }
        let access = w.users.as_ref().map(|_| {
            match w.acknowledging() {
                Ok(()) => tracing::info!(
                    component = "web",
                    "acknowledging from the page: people of {} may log in",
                    w.users
                        .as_ref()
                        .map_or(String::new(), |p| p.display().to_string())
                ),
                Err(e) => tracing::warn!(component = "web", "{e}"),
            }
            Arc::new(access::Access::new(w.clone(), req_tx.clone()))
        });
        let state = web::WebState {
            alerts: alerts_rx.clone(),
            counts: counts_rx,
            archive: archive_status,
            progress: progress.clone(),
            failures: Arc::new(failures),
            archive_dir: cfg.archive_dir.clone(),
            views: views_rx,
            light: light_rx.clone(),
            cell: cfg.cell.clone().unwrap_or_else(|| "linewarden".to_string()),
            timezone: cfg.tz(),
            reaction_plans: Arc::new(
                cfg.characteristics
                    .iter()
                    .filter_map(|c| Some((c.id.clone(), c.reaction_plan.clone()?)))
                    .collect(),
            ),
            charts: Default::default(),
            web: Arc::new(w.clone()),
            access,
        };
        tasks.push(tokio::spawn(web::serve(
            listener,
            tls,
            state,
            stop_rx.clone(),
        )));
    }
    Ok((
        engine_task::Publishers {
            alerts: alerts_tx,
            light: light_tx,
            states: states_tx,
            counts: counts_tx,
            views: views_tx,
        },
        OutputTasks { stop, tasks },
        engine_task::Inbox {
            requests: req_rx,
            delivered: deliv_rx,
            reload,
        },
    ))
}

/// Pings systemd's watchdog only while the engine loop turns (it stamps `progress` at every
/// reading and every 1 s tick), or while the archive reports a full disk (a known, reported
/// condition that a restart would not cure).
fn start_watchdog(
    notifier: &Arc<notify::Notifier>,
    progress: &Arc<std::sync::atomic::AtomicI64>,
    status: watch::Receiver<crate::archive::writer::Status>,
) {
    let Some(interval) = notify::Notifier::watchdog() else {
        return;
    };
    let (n, p) = (notifier.clone(), progress.clone());
    tokio::spawn(async move {
        let mut t = tokio::time::interval(interval / 2);
        loop {
            t.tick().await;
            let fresh = now_ms() - p.load(std::sync::atomic::Ordering::Relaxed)
                < interval.as_millis() as i64;
            let disk_full = matches!(
                status.borrow().state,
                crate::archive::writer::WriterState::Held { .. }
            );
            if fresh || disk_full {
                n.send("WATCHDOG=1");
            }
        }
    });
}

/// Waits (up to 30 s) for the archive writer to flush and end.
async fn join_writer(join: WriterThread) -> Result<(), DaemonError> {
    let deadline = Duration::from_secs(30);
    let joined =
        tokio::time::timeout(deadline, tokio::task::spawn_blocking(move || join.join())).await;
    match joined {
        Ok(Ok(Ok(result))) => Ok(result?),
        Ok(_) => Err(DaemonError::Archive(ArchiveError::Stopped(
            "the writer thread panicked".into(),
        ))),
        Err(_) => Err(DaemonError::LateWriter(deadline)),
    }
}

/// Events taken from the source queue in one turn of the engine loop at most.
const BATCH: usize = 512;

/// Archives `accepted` readings with one append, then hands each to the engine with its
/// sequence number and carries out what it decides.
async fn take_readings(
    archive: &ArchiveHandle,
    cfg: &Config,
    engine: &mut Engine,
    accepted: &mut Vec<Incoming>,
    health: &mut std::collections::BTreeMap<String, hub::SourceHealth>,
    summary: &mut Summary,
    fx: &mut Effects,
) -> Result<(), DaemonError> {
    if accepted.is_empty() {
        return Ok(());
    }
    let records = accepted.iter().map(Incoming::record).collect();
    let last = archive.append_seq(records).await?;
    let first = last + 1 - accepted.len() as u64;
    let mut out = Vec::new();
    for (k, inc) in accepted.drain(..).enumerate() {
        summary.accepted += 1;
        if let Some(h) = health.get_mut(&inc.source) {
            h.readings += 1;
            h.last_reading_ms = Some(inc.arrival_ms);
            h.clock_skewed += u64::from(inc.source_time_ignored);
        }
        out.extend(engine.accept(first + k as u64, &inc));
    }
    carry_out(archive, cfg, out, summary, fx).await
}

/// Logs a rejected reading: the first ten, then one in a hundred (a noisy gauge must not flood
/// the journal); every one is archived and counted.
fn reject(logged: &mut u64, source: &str, raw: &str, reason: &str) {
    *logged += 1;
    if *logged <= 10 || logged.is_multiple_of(100) {
        tracing::warn!(
            component = "checks",
            source,
            "rejected reading {raw:?}: {reason} ({} so far)",
            logged
        );
    }
}

/// Carries out the engine's outputs: archive records, log checks and the alert lifecycle,
/// write learned limits; notes in `fx` what the outputs need to hear of.
async fn carry_out(
    archive: &ArchiveHandle,
    cfg: &Config,
    outputs: Vec<Output>,
    summary: &mut Summary,
    fx: &mut Effects,
) -> Result<(), DaemonError> {
    let mut records = Vec::new();
    for o in outputs {
        match o {
            Output::Record(r) => {
                if let Record::Alert {
                    alert_id,
                    characteristic,
                    event,
                } = &r
                {
                    let decimals =
                        fx.decimals
                            .get(characteristic.as_str())
                            .copied()
                            .or_else(|| {
                                cfg.characteristics
                                    .iter()
                                    .find(|c| c.id == *characteristic)
                                    .and_then(|c| c.decimals)
                            });
                    log_alert(
                        alert_id,
                        characteristic,
                        event,
                        decimals,
                        cfg,
                        &mut fx.journal,
                    );
                    if !matches!(event, crate::alerts::AlertEvent::Delivered { .. }) {
                        fx.alerts_changed = true;
                        fx.dirty.insert(characteristic.clone());
                        fx.alert_chars.insert(characteristic.clone());
                    }
                }
                records.push(r)
            }
            Output::Violation {
                characteristic,
                violation,
            } => {
                summary.violations += 1;
                *fx.violations
                    .entry((characteristic, violation.rule, violation.severity))
                    .or_default() += 1;
            }
            Output::Checked {
                characteristic,
                subgroup,
                fired,
                learning,
                provisional,
                decimals,
            } => {
                summary.subgroups += 1;
                match fx.subgroups.get_mut(characteristic.as_str()) {
                    Some(n) => *n += 1,
                    None => {
                        fx.subgroups.insert(characteristic.clone(), 1);
                    }
                }
                if fx.decimals.get(characteristic.as_str()) != Some(&decimals) {
                    fx.decimals.insert(characteristic.clone(), decimals);
                }
                let on = if provisional {
                    " on provisional limits"
                } else {
                    ""
                };
                let fixed = |v: f64| crate::format::fixed(v, decimals);
                let line = || {
                    let state = if learning {
                        "learning limits".to_string()
                    } else if fired.is_empty() {
                        format!("in control{on}")
                    } else {
                        format!("fired{on}: {}", fired.join(", "))
                    };
                    match subgroup.attribute_words(decimals) {
                        Some(words) => format!("subgroup {}: {words}, {state}", subgroup.number),
                        None => format!(
                            "subgroup {}: mean {} (n = {}){}, {state}",
                            subgroup.number,
                            fixed(subgroup.mean),
                            subgroup.n,
                            subgroup
                                .dispersion
                                .map(|d| format!(", spread {}", fixed(d)))
                                .unwrap_or_default()
                        ),
                    }
                };
                // A subgroup that fired is worth a line in the journal; the quiet ones (one per
                // subgroup per characteristic, all day) only at debug level.
                if fired.is_empty() {
                    tracing::debug!(component = "engine", characteristic = %characteristic, "{}", line());
                } else {
                    tracing::info!(component = "engine", characteristic = %characteristic, "{}", line());
                }
                fx.dirty.insert(characteristic);
            }
            Output::Log {
                level,
                characteristic,
                message,
            } => match level {
                Level::Info => {
                    tracing::info!(component = "engine", characteristic = %characteristic, "{message}")
                }
                Level::Warn => {
                    tracing::warn!(component = "engine", characteristic = %characteristic, "{message}")
                }
            },
            Output::WriteLimits { path, limits } => {
                let text = limits.to_toml();
                let provisional = limits.is_provisional();
                let id = limits.characteristic.clone();
                let shown = path.display().to_string();
                let result = tokio::task::spawn_blocking(move || {
                    if let Some(dir) = path.parent() {
                        std::fs::create_dir_all(dir)?;
                    }
                    crate::fsutil::write_atomic(&path, text.as_bytes()).map(|_| path)
                })
                .await;
                match result {
                    Ok(Ok(path)) => {
                        let what = if provisional {
                            "provisional limits"
                        } else {
                            "approved limits"
                        };
                        tracing::info!(component = "engine", characteristic = %id, "wrote the {what} to {}", path.display())
                    }
                    Ok(Err(e)) => {
                        tracing::error!(component = "engine", characteristic = %id, "cannot write the learned limits to {shown}: {e}; they are in the archive, and a restart installs them from there")
                    }
                    Err(e) => {
                        tracing::error!(component = "engine", characteristic = %id, "cannot write the learned limits to {shown}: {e}")
                    }
                }
            }
        }
    }
    if !records.is_empty() {
        archive.append(records).await?;
    }
    Ok(())
}

/// One log line per alert event, in plain words: what, where, which rule, which parts, what to
/// do, and how to acknowledge. The journal tells the story: a repeat is logged the first three
/// times and then at least once a minute with its count, and a condition that comes back after
/// it was gone is always logged.
fn log_alert(
    id: &str,
    characteristic: &str,
    event: &crate::alerts::AlertEvent,
    decimals: Option<usize>,
    cfg: &Config,
    journal: &mut std::collections::HashMap<String, Journal>,
) {
    use crate::alerts::AlertEvent as E;
    let latch = |s: crate::rules::Severity| cfg.alerts.policies.of(s).acknowledge;
    let parts_words = |parts: &[String]| match parts {
        [] => String::new(),
        [one] => format!(" Part: {one}."),
        many => format!(" Parts: {}.", many.join(", ")),
    };
    match event {
        E::Raised {
            rule,
            severity,
            message,
            points,
            reaction_plan,
            parts,
            provisional,
            capped_from,
            ..
        } => {
            journal.insert(id.to_string(), Journal::default());
            let values = points
                .iter()
                .rev()
                .take(8)
                .rev()
                .map(|p| match decimals {
                    Some(d) => crate::format::fixed(p.value, d),
                    None => num(p.value),
                })
                .collect::<Vec<_>>()
                .join(", ");
            tracing::warn!(
                component = "alerts",
                characteristic = %characteristic,
                rule = %rule,
                severity = severity.name(),
                "ALERT {} {id}: {message} (recent values: {values}).{}{}{}{}",
                severity.name().to_uppercase(),
                if *provisional {
                    format!(
                        " On PROVISIONAL limits (learned, not yet approved){}.",
                        capped_from.map(|f| format!("; held at {} (its rule says {})", severity.name(), f.name())).unwrap_or_default()
                    )
                } else {
                    String::new()
                },
                parts_words(parts),
                reaction_plan.as_ref().map(|p| format!(" Reaction plan: {}.", p.trim_end_matches('.'))).unwrap_or_default(),
                if latch(*severity) {
                    format!(" Acknowledge with: linewarden ack {id} --by NAME")
                } else {
                    String::new()
                }
            );
        }
        E::Repeated {
            count,
            message,
            at_ms,
            parts,
            ..
        } => {
            let j = journal.entry(id.to_string()).or_default();
            if std::mem::take(&mut j.gone) {
                j.repeat_logged_ms = *at_ms;
                tracing::warn!(component = "alerts", characteristic = %characteristic, "alert {id}: the condition is back ({count} times in all): {message}.{}", parts_words(parts));
            } else if *count <= 3 || at_ms - j.repeat_logged_ms >= 60_000 {
                j.repeat_logged_ms = *at_ms;
                tracing::info!(component = "alerts", characteristic = %characteristic, "alert {id} again ({count} times in all): {message}.{}", parts_words(parts));
            }
        }
        E::Gone { .. } => {
            journal.entry(id.to_string()).or_default().gone = true;
            tracing::info!(
                component = "alerts",
                characteristic = %characteristic,
                "alert {id}: the condition is gone; the alert stays until someone acknowledges it"
            );
        }
        E::Acknowledged { by, note, .. } => tracing::info!(
            component = "alerts",
            characteristic = %characteristic,
            "alert {id} acknowledged by {by}{}",
            note.as_ref().map(|n| format!(": {n}")).unwrap_or_default()
        ),
        E::Cleared { .. } => {
            journal.remove(id);
            tracing::info!(component = "alerts", characteristic = %characteristic, "alert {id} cleared")
        }
        E::Escalated { .. } => tracing::warn!(
            component = "alerts",
            characteristic = %characteristic,
            "alert {id} escalated: nobody has acknowledged it{}",
            if cfg.alerts.escalate_to.is_empty() {
                String::new()
            } else {
                format!("; telling {}", cfg.alerts.escalate_to.join(", "))
            }
        ),
        E::Delivered { output, version } => tracing::debug!(
            component = "alerts",
            "alert {id} version {version} delivered by {output}"
        ),
    }
}
