//! The daemon: sources → reading checks → archive → engine → outputs, over bounded channels.
//!
//! * Sources are tasks that send [`SourceEvent`]s into one channel of [`SOURCE_QUEUE`] events;
//!   a source that can wait (replay, files, MQTT before its ack) waits when it is full.
//! * The engine task owns the [`Engine`]: it rejects or archives each reading, then hands it to
//!   the engine and carries out its outputs. Archive appends wait when the writer's queue is
//!   full: nothing is lost.
//! * Shutdown flows downstream: only sources watch the shutdown signal; the engine task ends
//!   when every source has ended or dropped its sender, saves the engine state, and drops its
//!   archive handle, so the writer flushes last.
//!
//! * [`sources`] — where readings come from (replay, folder, serial, MQTT), one module each,
//!   all sending the one [`SourceEvent`] type.
//! * [`outputs`] — where alerts go (stack light, MQTT, email).
//! * [`control`] — the control socket (status, acknowledgements, approvals); [`hub`] — the
//!   views the engine loop publishes to outputs and control.
//! * [`notify`] — systemd readiness, watchdog and status notifications; [`clock`] — the one
//!   clock.

pub mod clock;
pub mod control;
pub mod hub;
pub mod notify;
pub mod outputs;
pub mod sources;

pub use clock::now_ms;
use sources::{SOURCE_QUEUE, SourceEvent};

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
}

/// What the journal has said of one alert.
#[derive(Default)]
struct Journal {
    repeat_logged_ms: i64,
    gone: bool,
}

/// Runs the daemon until `shutdown` turns true or every source has ended. Each message on
/// `reload` rereads the config file: a valid file is swapped in (characteristics whose
/// configuration did not change keep their state), an invalid one is rejected whole and the
/// running config kept.
pub async fn run(
    cfg: Config,
    shutdown: watch::Receiver<bool>,
    mut reload: mpsc::Receiver<()>,
) -> Result<Summary, DaemonError> {
    let mut cfg = cfg;
    let started_ms = now_ms();
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

    let mut engine = Engine::new(&cfg, now_ms());
    let mut summary = Summary::default();
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
    let mut fx = Effects::default();
    let mut restored = engine.restore(&tail);
    restored.extend(engine.limits_records(&tail));
    carry_out(&archive, &cfg, restored, &mut summary, &mut fx).await?;
    drop(tail);
    crate::fsutil::release_memory();

    let progress = std::sync::Arc::new(std::sync::atomic::AtomicI64::new(now_ms()));
    // The outputs and the control socket: they outlive the sources, so that the last light
    // state ("off") and the last status ("stopped") still go out.
    let (outputs_stop, outputs_stop_rx) = watch::channel(false);
    let (alerts_tx, alerts_rx) = watch::channel(std::sync::Arc::new(hub::AlertsView::default()));
    let (light_tx, light_rx) = watch::channel(hub::Light::Off);
    let (states_tx, states_rx) = watch::channel::<hub::States>(Default::default());
    let (req_tx, mut req_rx) = mpsc::channel::<hub::Request>(64);
    let (deliv_tx, mut deliv_rx) = mpsc::channel::<hub::Delivery>(1024);
    let mut output_tasks = Vec::new();
    for o in &cfg.outputs {
        let t = outputs::spawn(
            o.clone(),
            outputs::Feeds {
                alerts: alerts_rx.clone(),
                light: light_rx.clone(),
                states: states_rx.clone(),
                delivered: deliv_tx.clone(),
                requests: req_tx.clone(),
                shutdown: outputs_stop_rx.clone(),
                progress: progress.clone(),
                timezone: cfg.tz(),
            },
        );
        tracing::info!(component = "output", output = %o.id, "alerts go to {}", o.describe());
        output_tasks.push(t);
    }
    drop(deliv_tx);
    if let Some(c) = &cfg.control {
        match control::bind(c) {
            Ok(l) => {
                tracing::info!(
                    component = "control",
                    "status and acknowledgements on {}",
                    c.socket.display()
                );
                output_tasks.push(tokio::spawn(control::serve(
                    l,
                    c.socket.clone(),
                    req_tx.clone(),
                    outputs_stop_rx.clone(),
                )));
            }
            Err(e) => tracing::error!(
                component = "control",
                "cannot open the control socket {}: {e}; linewarden status and ack will not work",
                c.socket.display()
            ),
        }
    }
    drop(req_tx);

    let (tx, mut rx) = mpsc::channel(SOURCE_QUEUE);
    let mut health = sources::start(&cfg.sources, &cfg.archive_dir, tx, &shutdown).await;
    let sources = health.len();
    let notifier = std::sync::Arc::new(notify::Notifier::from_env());
    // Progress: the engine loop stamps the time of every turn (a reading or the 1 s tick). The
    // watchdog is pinged only while the loop turns, or while the archive reports a full disk
    // (a known, reported condition that a restart would not cure).
    if let Some(interval) = notify::Notifier::watchdog() {
        let (n, p, status) = (notifier.clone(), progress.clone(), archive.status());
        tokio::spawn(async move {
            let mut t = tokio::time::interval(interval / 2);
            loop {
                t.tick().await;
                let fresh = now_ms() - p.load(std::sync::atomic::Ordering::Relaxed)
                    < interval.as_millis() as i64;
                let disk_full = matches!(
                    status.borrow().state,
                    crate::archive::writer::WriterState::DiskFull { .. }
                );
                if fresh || disk_full {
                    n.send("WATCHDOG=1");
                }
            }
        });
    }
    notifier.send(&format!(
        "READY=1\nSTATUS=monitoring {} characteristic(s) from {sources} source(s)",
        cfg.characteristics.len()
    ));
    tracing::info!(
        component = "daemon",
        "monitoring {} characteristic(s) from {sources} source(s); archive {}",
        cfg.characteristics.len(),
        cfg.archive_dir.display()
    );
    let archive_status = archive.status();
    let archive_ok = |s: &watch::Receiver<crate::archive::writer::Status>| {
        matches!(
            s.borrow().state,
            crate::archive::writer::WriterState::Running
        )
    };
    let healthy = |h: &std::collections::BTreeMap<String, hub::SourceHealth>| {
        h.values().all(|s| s.state == "up" || s.state == "ended")
    };
    // The characteristics that have alerts, as they stood when their alerts last changed
    // (for the charts in emails); refreshed only for the ones that changed.
    let mut alert_views: std::collections::BTreeMap<
        String,
        std::sync::Arc<crate::engine::CharView>,
    > = Default::default();
    let mut publish_alerts =
        |engine: &Engine, changed: &mut std::collections::BTreeSet<String>, all: bool| {
            let book = engine.alerts().clone();
            let ids: Vec<String> = if all {
                book.by_characteristic.keys().cloned().collect()
            } else {
                std::mem::take(changed).into_iter().collect()
            };
            changed.clear();
            for c in ids {
                if let Some(v) = engine.view_of(&c) {
                    alert_views.insert(c, std::sync::Arc::new(v));
                }
            }
            std::sync::Arc::new(hub::AlertsView {
                book,
                characteristics: alert_views.clone(),
            })
        };
    alerts_tx.send_replace(publish_alerts(&engine, &mut fx.alert_chars, true));
    light_tx.send_replace(hub::light(
        engine.alerts(),
        healthy(&health),
        archive_ok(&archive_status),
    ));
    let mut states: std::collections::BTreeMap<String, hub::StateView> = engine
        .view()
        .iter()
        .map(|v| (v.id.clone(), hub::StateView::of(v, engine.alerts())))
        .collect();
    states_tx.send_replace(std::sync::Arc::new(states.clone()));
    fx = Effects::default();

    let mut archive_watch = archive.status();
    let mut was_full = false;
    let mut tick = tokio::time::interval(Duration::from_secs(1));
    tick.set_missed_tick_behavior(tokio::time::MissedTickBehavior::Delay);
    let mut ended = 0;
    let mut ticks = 0u64;
    let mut rejected_logged = 0u64;
    let reason = loop {
        progress.store(now_ms(), std::sync::atomic::Ordering::Relaxed);
        let mut health_changed = false;
        // While the archive's disk is full, readings are not taken from the sources: they hold
        // back (MQTT stops acknowledging, the folder stops moving reports, serial gauges count
        // what they must drop), while status, acknowledgements and the light go on. The 1 s
        // tick notices when there is room again.
        let archive_full = matches!(
            archive_watch.borrow_and_update().state,
            crate::archive::writer::WriterState::DiskFull { .. }
        );
        if archive_full != was_full {
            was_full = archive_full;
            health_changed = true;
        }
        tokio::select! {
            // The writer's status changed (a sync, or the disk filling or freeing): the light
            // and the gate above follow at once.
            Ok(()) = archive_watch.changed() => {}
            ev = rx.recv(), if !archive_full => {
                let Some(first) = ev else { break "every source has stopped".to_string() };
                // Take what else is waiting (up to BATCH events) and archive consecutive
                // accepted readings with one append: one round trip to the writer per batch.
                let mut batch = vec![first];
                while batch.len() < BATCH {
                    match rx.try_recv() {
                        Ok(e) => batch.push(e),
                        Err(_) => break,
                    }
                }
                let mut accepted: Vec<Incoming> = Vec::new();
                let mut stop: Option<String> = None;
                for ev in batch {
                    if let SourceEvent::Reading(inc) = &ev
                        && engine.check(inc).is_ok()
                    {
                        let SourceEvent::Reading(inc) = ev else { unreachable!() };
                        accepted.push(inc);
                        continue;
                    }
                    take_readings(&archive, &cfg, &mut engine, &mut accepted, &mut health, &mut summary, &mut fx).await?;
                    match ev {
                        SourceEvent::Reading(inc) => {
                            let reason = engine.check(&inc).err().unwrap_or_default();
                            summary.rejected += 1;
                            if let Some(h) = health.get_mut(&inc.source) {
                                h.rejected += 1;
                            }
                            reject(&mut rejected_logged, &inc.source, &inc.value.to_string(), &reason);
                            archive.append(vec![Record::ReadingRejected {
                                source: inc.source.clone(),
                                characteristic: Some(inc.characteristic.clone()),
                                raw: inc.value.to_string(),
                                reason,
                                arrival_ms: inc.arrival_ms,
                                source_key: inc.source_key.clone(),
                            }]).await?;
                        }
                        SourceEvent::Unreadable { source, characteristic, raw, reason, source_key } => {
                            summary.rejected += 1;
                            if let Some(h) = health.get_mut(&source) {
                                h.rejected += 1;
                            }
                            reject(&mut rejected_logged, &source, &raw, &reason);
                            archive.append(vec![Record::ReadingRejected { source, characteristic, raw, reason, arrival_ms: now_ms(), source_key }]).await?;
                        }
                        SourceEvent::Barrier(done) => {
                            // Answered once everything before it is durable. A full disk delays
                            // the answer (the source waits, and holds back) without holding up
                            // this loop; a failed archive drops it, and the next append stops
                            // the daemon with the archive's error.
                            let archive = archive.clone();
                            tokio::spawn(async move {
                                if archive.flush().await.is_ok() {
                                    let _ = done.send(());
                                }
                            });
                        }
                        SourceEvent::Health { source, up, detail } => {
                            if let Some(h) = health.get_mut(&source) {
                                let state = if up { "up" } else { "down" };
                                if h.state != state {
                                    h.state = state.into();
                                    h.since_ms = now_ms();
                                    health_changed = true;
                                }
                                h.detail = detail;
                            }
                        }
                        SourceEvent::Ended { source } => {
                            ended += 1;
                            if let Some(h) = health.get_mut(&source) {
                                h.state = "ended".into();
                                h.since_ms = now_ms();
                                health_changed = true;
                            }
                            tracing::info!(component = "daemon", "source {source} has ended");
                            if ended == sources {
                                stop = Some("every source has ended".to_string());
                            }
                        }
                    }
                }
                take_readings(&archive, &cfg, &mut engine, &mut accepted, &mut health, &mut summary, &mut fx).await?;
                if let Some(reason) = stop {
                    break reason;
                }
            },
            Some(req) = req_rx.recv() => match req {
                hub::Request::Ack { target, by, note, via, reply } => {
                    let answer = match engine.acknowledge(&target, &by, note.as_deref(), now_ms()) {
                        Ok((ids, out)) => {
                            tracing::info!(component = "alerts", "acknowledgement by {by} via {via}: {}", ids.join(", "));
                            carry_out(&archive, &cfg, out, &mut summary, &mut fx).await?;
                            hub::AckReply { ok: true, acknowledged: ids, error: None }
                        }
                        Err(e) => {
                            tracing::warn!(component = "alerts", "acknowledgement of {target:?} by {by:?} via {via} refused: {e}");
                            hub::AckReply { ok: false, acknowledged: Vec::new(), error: Some(e.to_string()) }
                        }
                    };
                    let _ = reply.send(answer);
                }
                hub::Request::Approve { characteristic, by, note, via, reply } => {
                    let answer = match engine.approve(&characteristic, &by, note.as_deref(), now_ms()) {
                        Ok(out) => {
                            tracing::info!(component = "engine", characteristic = %characteristic, "limits approved by {by} via {via}");
                            carry_out(&archive, &cfg, out, &mut summary, &mut fx).await?;
                            // The retained state says where the limits come from: refresh it now.
                            fx.dirty.insert(characteristic.clone());
                            hub::ApproveReply { ok: true, error: None }
                        }
                        Err(e) => {
                            tracing::warn!(component = "engine", "approval of {characteristic:?} by {by:?} via {via} refused: {e}");
                            hub::ApproveReply { ok: false, error: Some(e.to_string()) }
                        }
                    };
                    let _ = reply.send(answer);
                }
                hub::Request::Status { brief, reply } => {
                    let st = archive_status.borrow().clone();
                    let report = hub::StatusReport {
                        version: env!("CARGO_PKG_VERSION").to_string(),
                        config: cfg.path.display().to_string(),
                        started_ms,
                        now_ms: now_ms(),
                        light: *light_tx.borrow(),
                        archive: hub::ArchiveStatus {
                            dir: cfg.archive_dir.display().to_string(),
                            durable_seq: st.durable_seq,
                            state: match &st.state {
                                crate::archive::writer::WriterState::Running => "running".into(),
                                crate::archive::writer::WriterState::DiskFull { message } => format!("disk-full: {message}"),
                                crate::archive::writer::WriterState::Failed { message } => format!("failed: {message}"),
                                crate::archive::writer::WriterState::Stopped => "stopped".into(),
                            },
                        },
                        sources: health.values().cloned().collect(),
                        characteristics: if brief {
                            Vec::new()
                        } else {
                            engine.view().iter().map(hub::CharStatus::of).collect()
                        },
                        alerts: engine.alerts().all().cloned().collect(),
                    };
                    let _ = reply.send(report);
                }
            },
            Some(d) = deliv_rx.recv() => {
                if let Some(out) = engine.delivered(&d.output, &d.alert_id, d.version) {
                    let mut quiet = Effects::default();
                    carry_out(&archive, &cfg, vec![out], &mut summary, &mut quiet).await?;
                }
            }
            Some(()) = reload.recv() => {
                let path = cfg.path.clone();
                let loaded = tokio::task::spawn_blocking(move || crate::config::load(&path)).await;
                match loaded {
                    Ok(Ok(new)) => {
                        if new.sources != cfg.sources {
                            tracing::warn!(component = "daemon", "the sources changed; that takes effect at the next restart");
                        }
                        if new.outputs != cfg.outputs || new.control != cfg.control {
                            tracing::warn!(component = "daemon", "the outputs or the control socket changed; that takes effect at the next restart");
                        }
                        if new.archive_dir != cfg.archive_dir {
                            tracing::warn!(component = "daemon", "archive_dir changed; that takes effect at the next restart");
                        }
                        let tail = crate::archive::reader::Reader::open(&cfg.archive_dir)
                            .and_then(|r| r.tail(30))
                            .unwrap_or_default();
                        for note in engine.reconfigure(&new, &tail, now_ms()) {
                            tracing::info!(component = "daemon", "reload: {note}");
                        }
                        let changed = engine.limits_records(&tail);
                        carry_out(&archive, &new, changed, &mut summary, &mut fx).await?;
                        let text = std::fs::read(&new.path).unwrap_or_default();
                        archive.append(vec![Record::ConfigLoaded {
                            path: new.path.display().to_string(),
                            sha256: crate::archive::segment::sha256_hex(&text),
                        }]).await?;
                        let keep = (cfg.archive_dir.clone(), cfg.sources.clone(), cfg.outputs.clone(), cfg.control.clone());
                        cfg = new;
                        (cfg.archive_dir, cfg.sources, cfg.outputs, cfg.control) = keep;
                        fx.alerts_changed = true;
                        crate::fsutil::release_memory();
                        tracing::info!(component = "daemon", "reloaded {}", cfg.path.display());
                    }
                    Ok(Err(e)) => tracing::error!(component = "daemon", "reload rejected, the running configuration stays:\n{e}"),
                    Err(e) => tracing::error!(component = "daemon", "reload failed: {e}"),
                }
            }
            _ = tick.tick() => {
                ticks += 1;
                if ticks.is_multiple_of(10) {
                    // Readings churn through short-lived buffers on several threads; hand the
                    // freed pages back so the resident size stays what the cell needs.
                    crate::fsutil::release_memory();
                }
                let out = engine.tick(now_ms());
                carry_out(&archive, &cfg, out, &mut summary, &mut fx).await?;
                // Retained states at most once a second, only the ones that changed.
                if !fx.dirty.is_empty() {
                    for id in std::mem::take(&mut fx.dirty) {
                        if let Some(v) = engine.view_of(&id) {
                            states.insert(id, hub::StateView::of(&v, engine.alerts()));
                        }
                    }
                    states_tx.send_replace(std::sync::Arc::new(states.clone()));
                }
                health_changed = true;
            }
        }
        if fx.alerts_changed {
            fx.alerts_changed = false;
            alerts_tx.send_replace(publish_alerts(&engine, &mut fx.alert_chars, true));
            health_changed = true;
        }
        if health_changed {
            let l = hub::light(
                engine.alerts(),
                healthy(&health),
                archive_ok(&archive_status),
            );
            light_tx.send_if_modified(|old| std::mem::replace(old, l) != l);
        }
    };
    tracing::info!(component = "daemon", "stopping: {reason}");
    // The journal ends with what is still open, so the next shift reads where things stand.
    for a in engine.alerts().active() {
        tracing::warn!(
            component = "alerts",
            characteristic = %a.characteristic,
            "at shutdown, alert {} is {} (fired {}{}): {}",
            a.id,
            a.status.name(),
            if a.count == 1 { "once".to_string() } else { format!("{} times", a.count) },
            if a.gone { ", condition gone" } else { "" },
            a.last_message
        );
    }
    notifier.send(&format!("STOPPING=1\nSTATUS=stopping: {reason}"));
    light_tx.send_replace(hub::Light::Off);
    // The last retained states go out before the outputs stop.
    if !fx.dirty.is_empty() {
        for id in std::mem::take(&mut fx.dirty) {
            if let Some(v) = engine.view_of(&id) {
                states.insert(id, hub::StateView::of(&v, engine.alerts()));
            }
        }
        states_tx.send_replace(std::sync::Arc::new(states.clone()));
    }
    let mut last = engine.snapshot();
    last.push(Record::DaemonStopped { reason });
    summary.last_seq = archive.append_seq(last).await?;
    // Deliveries that finish while the outputs wind down are still archived.
    let _ = outputs_stop.send(true);
    let wind_down = async {
        for t in output_tasks {
            let _ = t.await;
        }
    };
    let drain = async {
        while let Some(d) = deliv_rx.recv().await {
            if let Some(Output::Record(r)) = engine.delivered(&d.output, &d.alert_id, d.version) {
                let _ = archive.append(vec![r]).await;
            }
        }
    };
    let _ = tokio::time::timeout(Duration::from_secs(5), async {
        tokio::join!(wind_down, drain)
    })
    .await;
    drop(archive);
    let deadline = Duration::from_secs(30);
    let joined =
        tokio::time::timeout(deadline, tokio::task::spawn_blocking(move || join.join())).await;
    match joined {
        Ok(Ok(Ok(result))) => result?,
        Ok(_) => {
            return Err(DaemonError::Archive(ArchiveError::Stopped(
                "the writer thread panicked".into(),
            )));
        }
        Err(_) => return Err(DaemonError::LateWriter(deadline)),
    }
    Ok(summary)
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
            Output::Violation { .. } => summary.violations += 1,
            Output::Checked {
                characteristic,
                subgroup,
                fired,
                learning,
                provisional,
                decimals,
            } => {
                summary.subgroups += 1;
                if fx.decimals.get(characteristic.as_str()) != Some(&decimals) {
                    fx.decimals.insert(characteristic.clone(), decimals);
                }
                let on = if provisional {
                    " on provisional limits"
                } else {
                    ""
                };
                let state = if learning {
                    "learning limits".to_string()
                } else if fired.is_empty() {
                    format!("in control{on}")
                } else {
                    format!("fired{on}: {}", fired.join(", "))
                };
                let fixed = |v: f64| crate::format::fixed(v, decimals);
                tracing::info!(
                    component = "engine",
                    characteristic = %characteristic,
                    "subgroup {}: mean {} (n = {}){}, {state}",
                    subgroup.number,
                    fixed(subgroup.mean),
                    subgroup.n,
                    subgroup.dispersion.map(|d| format!(", spread {}", fixed(d))).unwrap_or_default()
                );
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
