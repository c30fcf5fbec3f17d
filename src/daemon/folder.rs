//! The watched-folder source: CSV reports dropped by a measuring machine.
//!
//! A file is taken once its size and modification time have not changed for `settle_ms`
//! (a machine still writing it is left alone; only files ending in .csv are looked at, so a
//! machine that writes under another name and renames is never read half-written). It is first moved into `processing/`, then read; its readings go to
//! the engine, and a barrier makes the archive durable before the file is moved to `done/`. A
//! file that cannot be read as a report goes to `rejected/` with a `.error` file saying why.
//! Files found in `processing/` at start were cut short by a crash: they are read again, and
//! readings the archive already holds (by content hash and row, in their source key) are
//! skipped, so nothing is archived twice.

use std::collections::{HashMap, HashSet};
use std::path::{Path, PathBuf};
use std::time::Duration;

use tokio::sync::{mpsc, oneshot, watch};

use super::{SourceEvent, now_ms};
use crate::config::ReportRows;
use crate::engine::Incoming;

/// A folder source's settings.
#[derive(Debug, Clone)]
pub struct FolderSource {
    pub id: String,
    pub path: PathBuf,
    pub rows: ReportRows,
    pub part_column: Option<String>,
    pub settle_ms: u64,
    /// Source keys already archived for files that were being processed at a crash.
    pub already: HashSet<String>,
}

/// The subfolders a folder source keeps.
pub fn processing_dir(path: &Path) -> PathBuf {
    path.join("processing")
}

/// Runs until shutdown.
pub async fn run(
    src: FolderSource,
    tx: mpsc::Sender<SourceEvent>,
    mut shutdown: watch::Receiver<bool>,
) {
    let name = format!("folder:{}", src.id);
    for sub in ["processing", "done", "rejected"] {
        if let Err(e) = std::fs::create_dir_all(src.path.join(sub)) {
            tracing::error!("cannot create {}/{sub}: {e}", src.path.display());
        }
    }
    tracing::info!("watching {} for CSV reports", src.path.display());
    // Files cut short by a crash first.
    let leftovers = list_csv(&processing_dir(&src.path));
    for f in leftovers {
        if !process(&src, &name, &f, &tx).await {
            return;
        }
    }
    let mut seen: HashMap<PathBuf, (u64, std::time::SystemTime, tokio::time::Instant)> =
        HashMap::new();
    let mut tick =
        tokio::time::interval(Duration::from_millis((src.settle_ms / 2).clamp(20, 1000)));
    loop {
        tokio::select! {
            _ = tick.tick() => {}
            _ = shutdown.changed() => break,
        }
        for f in list_csv(&src.path) {
            let Ok(meta) = std::fs::metadata(&f) else {
                continue;
            };
            let stamp = (meta.len(), meta.modified().unwrap_or(std::time::UNIX_EPOCH));
            let now = tokio::time::Instant::now();
            let entry = seen.entry(f.clone()).or_insert((stamp.0, stamp.1, now));
            if (entry.0, entry.1) != stamp {
                *entry = (stamp.0, stamp.1, now);
                continue;
            }
            if now.duration_since(entry.2) < Duration::from_millis(src.settle_ms) {
                continue;
            }
            seen.remove(&f);
            let Some(file_name) = f.file_name() else {
                continue;
            };
            let taken = processing_dir(&src.path).join(file_name);
            if let Err(e) =
                std::fs::rename(&f, &taken).and_then(|_| crate::fsutil::sync_dir(&src.path))
            {
                tracing::error!("cannot move {} into processing/: {e}", f.display());
                continue;
            }
            if !process(&src, &name, &taken, &tx).await {
                return;
            }
        }
    }
    let _ = tx.send(SourceEvent::Ended { source: name }).await;
}

fn list_csv(dir: &Path) -> Vec<PathBuf> {
    let mut v: Vec<PathBuf> = std::fs::read_dir(dir)
        .map(|rd| {
            rd.flatten()
                .map(|e| e.path())
                .filter(|p| {
                    p.is_file()
                        && p.extension()
                            .and_then(|e| e.to_str())
                            .is_some_and(|e| e.eq_ignore_ascii_case("csv"))
                })
                .collect()
        })
        .unwrap_or_default();
    v.sort();
    v
}

/// Reads one report from `processing/`, sends its readings, waits until the archive holds them
/// durably, and moves the file on. False when the engine has gone.
async fn process(
    src: &FolderSource,
    name: &str,
    file: &Path,
    tx: &mpsc::Sender<SourceEvent>,
) -> bool {
    let report = file
        .file_name()
        .map(|n| n.to_string_lossy().into_owned())
        .unwrap_or_default();
    let bytes = match std::fs::read(file) {
        Ok(b) => b,
        Err(e) => {
            tracing::error!("cannot read {}: {e}", file.display());
            return true;
        }
    };
    let sha = crate::archive::segment::sha256_hex(&bytes);
    let text = String::from_utf8_lossy(&bytes);
    let parsed = parse(&text, &report, &src.rows, src.part_column.as_deref());
    let (readings, bad) = match parsed {
        Ok(x) => x,
        Err(reason) => {
            tracing::warn!("rejected report {report}: {reason}");
            let to = src.path.join("rejected").join(&report);
            let error = src.path.join("rejected").join(format!("{report}.error"));
            let _ = crate::fsutil::write_atomic(&error, format!("{reason}\n").as_bytes());
            let _ = std::fs::rename(file, &to);
            let _ = crate::fsutil::sync_dir(&src.path.join("rejected"));
            return true;
        }
    };
    let arrival = now_ms();
    let mut sent = 0;
    for (key, characteristic, value, part) in readings {
        let source_key = format!("{sha}:{key}");
        if src.already.contains(&source_key) {
            continue;
        }
        let ev = SourceEvent::Reading(Incoming {
            source: name.to_string(),
            characteristic,
            value,
            unit: None,
            source_time_ms: None,
            arrival_ms: arrival,
            part,
            source_key: Some(source_key),
        });
        if tx.send(ev).await.is_err() {
            return false;
        }
        sent += 1;
    }
    for (raw, reason) in bad {
        let ev = SourceEvent::Unreadable {
            source: name.to_string(),
            characteristic: None,
            raw,
            reason,
        };
        if tx.send(ev).await.is_err() {
            return false;
        }
    }
    // Move the file on only once its readings are durable.
    let (done_tx, done_rx) = oneshot::channel();
    if tx.send(SourceEvent::Barrier(done_tx)).await.is_err() {
        return false;
    }
    if done_rx.await.is_err() {
        return false;
    }
    let to = src.path.join("done").join(&report);
    match std::fs::rename(file, &to).and_then(|_| crate::fsutil::sync_dir(&src.path.join("done"))) {
        Ok(()) => tracing::info!("read {report}: {sent} readings archived; moved to done/"),
        Err(e) => tracing::error!("read {report} but cannot move it to done/: {e}"),
    }
    true
}

type Parsed = (
    Vec<(String, String, f64, Option<String>)>,
    Vec<(String, String)>,
);

/// Readings of a report as (row:column key, characteristic, value, part), and bad cells as
/// (raw, reason). An error when the file is not a report of the configured layout.
pub fn parse(
    text: &str,
    file: &str,
    rows: &ReportRows,
    part_column: Option<&str>,
) -> Result<Parsed, String> {
    let mut r = csv::ReaderBuilder::new()
        .flexible(true)
        .trim(csv::Trim::All)
        .from_reader(text.as_bytes());
    let header: Vec<String> = r
        .headers()
        .map_err(|e| format!("{file}: the header row cannot be read: {e}"))?
        .iter()
        .map(str::to_string)
        .collect();
    let col = |name: &str| {
        header.iter().position(|h| h == name).ok_or_else(|| {
            format!(
                "{file}: no column \"{name}\" (the header has: {})",
                header.join(", ")
            )
        })
    };
    let part_at = part_column.map(col).transpose()?;
    let mut readings = Vec::new();
    let mut bad = Vec::new();
    let number = |raw: &str, line: u64, column: usize| -> Result<f64, (String, String)> {
        match raw.parse::<f64>() {
            Ok(v) if v.is_finite() => Ok(v),
            _ => Err((
                raw.to_string(),
                format!("{file}:{line}:{}: \"{raw}\" is not a reading", column + 1),
            )),
        }
    };
    let mapped: Vec<(usize, String)> = match rows {
        ReportRows::PerPart { columns } => columns
            .iter()
            .map(|(c, id)| col(c).map(|i| (i, id.clone())))
            .collect::<Result<_, _>>()?,
        ReportRows::PerReading { .. } => Vec::new(),
    };
    let per_reading = match rows {
        ReportRows::PerReading {
            characteristic_column,
            value_column,
        } => Some((col(characteristic_column)?, col(value_column)?)),
        ReportRows::PerPart { .. } => None,
    };
    for rec in r.records() {
        let rec = rec.map_err(|e| format!("{file}: {e}"))?;
        let line = rec.position().map_or(0, |p| p.line());
        let part = part_at
            .and_then(|i| rec.get(i))
            .filter(|s| !s.is_empty())
            .map(str::to_string);
        match per_reading {
            Some((ci, vi)) => {
                let (Some(c), Some(v)) = (rec.get(ci), rec.get(vi)) else {
                    bad.push((
                        rec.iter().collect::<Vec<_>>().join(","),
                        format!("{file}:{line}: the row is short"),
                    ));
                    continue;
                };
                match number(v, line, vi) {
                    Ok(x) => readings.push((format!("{line}:{}", vi + 1), c.to_string(), x, part)),
                    Err(b) => bad.push(b),
                }
            }
            None => {
                for (i, id) in &mapped {
                    match rec.get(*i) {
                        // An empty cell: the feature was not measured on this part.
                        None | Some("") => {}
                        Some(v) => match number(v, line, *i) {
                            Ok(x) => readings.push((
                                format!("{line}:{}", i + 1),
                                id.clone(),
                                x,
                                part.clone(),
                            )),
                            Err(b) => bad.push(b),
                        },
                    }
                }
            }
        }
    }
    Ok((readings, bad))
}
