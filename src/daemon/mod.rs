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
//! * [`replay`] — plays a recorded feed file.
//! * [`folder`] — CSV reports dropped into a watched folder.
//! * [`serial`] — gauges on serial ports, reopened when unplugged.
//! * [`notify`] — systemd readiness, watchdog and status notifications.

pub mod folder;
pub mod mqtt;
pub mod notify;
pub mod replay;
pub mod serial;

use std::time::Duration;

use tokio::sync::{mpsc, watch};
use tracing::Instrument;

use crate::archive::writer::{self, ArchiveHandle, Writer, WriterConfig};
use crate::archive::{ArchiveError, Record};
use crate::config::{Config, Source};
use crate::engine::{Engine, Incoming, Level, Output};
use crate::format::num;

/// Events from sources, in the order they happened.
#[derive(Debug)]
pub enum SourceEvent {
    Reading(Incoming),
    /// Something arrived that is not a reading.
    Unreadable {
        source: String,
        characteristic: Option<String>,
        raw: String,
        reason: String,
    },
    /// The source has nothing more to send (a replay that finished).
    Ended {
        source: String,
    },
    /// Answered once everything sent before it is durable in the archive (a folder source
    /// moves a report to done/ only then).
    Barrier(tokio::sync::oneshot::Sender<()>),
}

/// The queue from all sources to the engine.
pub const SOURCE_QUEUE: usize = 1024;

/// Milliseconds since the Unix epoch, now. The daemon's one clock.
pub fn now_ms() -> i64 {
    std::time::SystemTime::now()
        .duration_since(std::time::UNIX_EPOCH)
        .map(|d| d.as_millis() as i64)
        .unwrap_or(0)
}

/// The span every log line of a source task carries: its kind and id.
fn source_span(component: &'static str, id: &str) -> tracing::Span {
    tracing::info_span!("source", component, id = %id)
}

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
    carry_out(&archive, &cfg, engine.restore(&tail), &mut summary).await?;

    let (tx, mut rx) = mpsc::channel(SOURCE_QUEUE);
    let mut sources = 0;
    for s in &cfg.sources {
        match s {
            Source::Replay { id, file, speed } => {
                tokio::spawn(
                    replay::run(
                        id.clone(),
                        file.clone(),
                        *speed,
                        tx.clone(),
                        shutdown.clone(),
                    )
                    .instrument(source_span("replay", id)),
                );
            }
            Source::Folder {
                id,
                path,
                rows,
                part_column,
                settle_ms,
            } => {
                let already =
                    already_archived(&cfg.archive_dir, &folder::processing_dir(path)).await;
                let src = folder::FolderSource {
                    id: id.clone(),
                    path: path.clone(),
                    rows: rows.clone(),
                    part_column: part_column.clone(),
                    settle_ms: *settle_ms,
                    already,
                };
                tokio::spawn(
                    folder::run(src, tx.clone(), shutdown.clone())
                        .instrument(source_span("folder", id)),
                );
            }
            Source::Serial(g) => {
                tokio::spawn(
                    serial::run((**g).clone(), tx.clone(), shutdown.clone())
                        .instrument(source_span("serial", &g.id)),
                );
            }
            Source::Mqtt(m) => {
                let (dir, name) = (cfg.archive_dir.clone(), format!("mqtt:{}", m.id));
                let known = tokio::task::spawn_blocking(move || mqtt::recent_keys(&dir, &name))
                    .await
                    .unwrap_or_default();
                tokio::spawn(
                    mqtt::run((**m).clone(), known, tx.clone(), shutdown.clone())
                        .instrument(source_span("mqtt", &m.id)),
                );
            }
        }
        sources += 1;
    }
    drop(tx);
    let notifier = std::sync::Arc::new(notify::Notifier::from_env());
    // Progress: the engine loop stamps the time of every turn (a reading or the 1 s tick). The
    // watchdog is pinged only while the loop turns, or while the archive reports a full disk
    // (a known, reported condition that a restart would not cure).
    let progress = std::sync::Arc::new(std::sync::atomic::AtomicI64::new(now_ms()));
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
    let mut tick = tokio::time::interval(Duration::from_secs(1));
    tick.set_missed_tick_behavior(tokio::time::MissedTickBehavior::Delay);
    let mut ended = 0;
    let mut rejected_logged = 0u64;
    let reason = loop {
        progress.store(now_ms(), std::sync::atomic::Ordering::Relaxed);
        tokio::select! {
            ev = rx.recv() => match ev {
                Some(SourceEvent::Reading(inc)) => match engine.check(&inc) {
                    Ok(()) => {
                        let seq = archive.append_seq(vec![inc.record()]).await?;
                        summary.accepted += 1;
                        let out = engine.accept(seq, &inc);
                        carry_out(&archive, &cfg, out, &mut summary).await?;
                    }
                    Err(reason) => {
                        summary.rejected += 1;
                        reject(&mut rejected_logged, &inc.source, &inc.value.to_string(), &reason);
                        archive.append(vec![Record::ReadingRejected {
                            source: inc.source.clone(),
                            characteristic: Some(inc.characteristic.clone()),
                            raw: inc.value.to_string(),
                            reason,
                            arrival_ms: inc.arrival_ms,
                        }]).await?;
                    }
                },
                Some(SourceEvent::Unreadable { source, characteristic, raw, reason }) => {
                    summary.rejected += 1;
                    reject(&mut rejected_logged, &source, &raw, &reason);
                    archive.append(vec![Record::ReadingRejected { source, characteristic, raw, reason, arrival_ms: now_ms() }]).await?;
                }
                Some(SourceEvent::Barrier(done)) => {
                    archive.flush().await?;
                    let _ = done.send(());
                }
                Some(SourceEvent::Ended { source }) => {
                    ended += 1;
                    tracing::info!(component = "daemon", "source {source} has ended");
                    if ended == sources {
                        break "every source has ended".to_string();
                    }
                }
                None => break "every source has stopped".to_string(),
            },
            Some(()) = reload.recv() => {
                let path = cfg.path.clone();
                let loaded = tokio::task::spawn_blocking(move || crate::config::load(&path)).await;
                match loaded {
                    Ok(Ok(new)) => {
                        if new.sources != cfg.sources {
                            tracing::warn!(component = "daemon", "the sources changed; that takes effect at the next restart");
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
                        let text = std::fs::read(&new.path).unwrap_or_default();
                        archive.append(vec![Record::ConfigLoaded {
                            path: new.path.display().to_string(),
                            sha256: crate::archive::segment::sha256_hex(&text),
                        }]).await?;
                        let keep = (cfg.archive_dir.clone(), cfg.sources.clone());
                        cfg = new;
                        (cfg.archive_dir, cfg.sources) = keep;
                        tracing::info!(component = "daemon", "reloaded {}", cfg.path.display());
                    }
                    Ok(Err(e)) => tracing::error!(component = "daemon", "reload rejected, the running configuration stays:\n{e}"),
                    Err(e) => tracing::error!(component = "daemon", "reload failed: {e}"),
                }
            }
            _ = tick.tick() => {
                let out = engine.tick(now_ms());
                carry_out(&archive, &cfg, out, &mut summary).await?;
            }
        }
    };
    tracing::info!(component = "daemon", "stopping: {reason}");
    notifier.send(&format!("STOPPING=1\nSTATUS=stopping: {reason}"));
    let mut last = engine.snapshot();
    last.push(Record::DaemonStopped { reason });
    summary.last_seq = archive.append_seq(last).await?;
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

/// Source keys the archive already holds for reports left in `processing/` by a crash (their
/// content hash is the key's prefix). Reads the archive only when there are such files.
async fn already_archived(
    archive: &std::path::Path,
    processing: &std::path::Path,
) -> std::collections::HashSet<String> {
    let (archive, processing) = (archive.to_path_buf(), processing.to_path_buf());
    tokio::task::spawn_blocking(move || {
        let mut prefixes = Vec::new();
        for e in std::fs::read_dir(&processing)
            .into_iter()
            .flatten()
            .flatten()
        {
            if let Ok(bytes) = std::fs::read(e.path()) {
                prefixes.push(format!("{}:", crate::archive::segment::sha256_hex(&bytes)));
            }
        }
        let mut keys = std::collections::HashSet::new();
        if prefixes.is_empty() {
            return keys;
        }
        let Ok(r) = crate::archive::reader::Reader::open(&archive) else {
            return keys;
        };
        let filter = crate::archive::reader::Filter {
            kinds: vec!["reading-accepted".into()],
            ..Default::default()
        };
        for e in r.iter(&filter).flatten() {
            if let Record::ReadingAccepted {
                source_key: Some(k),
                ..
            } = e.record
                && prefixes.iter().any(|p| k.starts_with(p.as_str()))
            {
                keys.insert(k);
            }
        }
        keys
    })
    .await
    .unwrap_or_default()
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

/// Carries out the engine's outputs: archive records, log violations and checks, write
/// learned limits.
async fn carry_out(
    archive: &ArchiveHandle,
    cfg: &Config,
    outputs: Vec<Output>,
    summary: &mut Summary,
) -> Result<(), DaemonError> {
    let mut records = Vec::new();
    for o in outputs {
        match o {
            Output::Record(r) => records.push(r),
            Output::Violation {
                characteristic,
                violation,
            } => {
                summary.violations += 1;
                let plan = cfg
                    .characteristics
                    .iter()
                    .find(|c| c.id == characteristic)
                    .and_then(|c| c.reaction_plan.clone())
                    .filter(|_| violation.severity == crate::rules::Severity::Stop);
                tracing::warn!(
                    component = "engine",
                    characteristic = %characteristic,
                    rule = %violation.rule,
                    severity = violation.severity.name(),
                    "ALERT {}: {}{}",
                    violation.severity.name().to_uppercase(),
                    violation.message,
                    plan.map(|p| format!(". Reaction plan: {p}")).unwrap_or_default()
                );
            }
            Output::Checked {
                characteristic,
                subgroup,
                violations,
                learning,
            } => {
                summary.subgroups += 1;
                let state = if learning {
                    "learning limits".to_string()
                } else if violations == 0 {
                    "in control".to_string()
                } else {
                    format!("{violations} rule(s) fired")
                };
                tracing::info!(
                    component = "engine",
                    characteristic = %characteristic,
                    "subgroup {}: mean {} (n = {}){}, {state}",
                    subgroup.number,
                    num(subgroup.mean),
                    subgroup.n,
                    subgroup.dispersion.map(|d| format!(", spread {}", num(d))).unwrap_or_default()
                );
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
                let id = limits.characteristic.clone();
                let result = tokio::task::spawn_blocking(move || {
                    if let Some(dir) = path.parent() {
                        std::fs::create_dir_all(dir)?;
                    }
                    crate::fsutil::write_atomic(&path, text.as_bytes()).map(|_| path)
                })
                .await;
                match result {
                    Ok(Ok(path)) => {
                        tracing::info!(component = "engine", characteristic = %id, "wrote provisional limits to {}", path.display())
                    }
                    Ok(Err(e)) => {
                        tracing::error!(component = "engine", characteristic = %id, "cannot write the learned limits: {e}; they are in the archive")
                    }
                    Err(e) => {
                        tracing::error!(component = "engine", characteristic = %id, "cannot write the learned limits: {e}")
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
