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
//!
//! A row whose field count differs from the header's is rejected whole (archived as rejected
//! with the file, line and a hint at the cause), never read by position; so is a row missing a
//! field, including a last row cut short while the file was still being written. A report whose
//! content was read before (the same file dropped again under another name) is recognised by
//! its SHA-256 in the ledger kept beside `done/` and moved to `rejected/` without archiving
//! its readings again.

use std::collections::{HashMap, HashSet};
use std::path::{Path, PathBuf};
use std::time::Duration;

use tokio::sync::{mpsc, oneshot, watch};

use super::SourceEvent;
use crate::config::ReportRows;
use crate::daemon::clock::now_ms;
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
    let mut ledger = read_ledger(&src.path);
    let leftovers = list_csv(&processing_dir(&src.path));
    for (f, _) in leftovers {
        if !process(&src, &name, &f, &tx, &mut ledger, true).await {
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
        for (f, kind) in list_csv(&src.path) {
            if let Some(kind) = kind {
                // Moved aside at once (the link itself, never what it points to), with the
                // reason, so that it is said once and not met again.
                let report = f
                    .file_name()
                    .map(|n| n.to_string_lossy().into_owned())
                    .unwrap_or_default();
                reject_file(&src, &f, &report, &refusal(kind));
                continue;
            }
            let Ok(meta) = std::fs::symlink_metadata(&f) else {
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
            if !process(&src, &name, &taken, &tx, &mut ledger, false).await {
                return;
            }
        }
    }
    let _ = tx.send(SourceEvent::Ended { source: name }).await;
}

/// The `.csv` entries of `dir`, sorted, with what kind of entry each is. The kind comes from
/// the directory entry itself: a symbolic link is never followed.
pub fn list_csv(dir: &Path) -> Vec<(PathBuf, Option<&'static str>)> {
    let mut v: Vec<(PathBuf, Option<&'static str>)> = std::fs::read_dir(dir)
        .map(|rd| {
            rd.flatten()
                .filter(|e| {
                    Path::new(&e.file_name())
                        .extension()
                        .and_then(|x| x.to_str())
                        .is_some_and(|x| x.eq_ignore_ascii_case("csv"))
                })
                .filter_map(|e| Some((e.path(), not_regular(&e.file_type().ok()?))))
                .collect()
        })
        .unwrap_or_default();
    v.sort();
    v
}

/// What an entry is when it is not a regular file (None for a regular file).
fn not_regular(t: &std::fs::FileType) -> Option<&'static str> {
    use std::os::unix::fs::FileTypeExt;
    if t.is_file() {
        None
    } else if t.is_symlink() {
        Some("a symbolic link")
    } else if t.is_dir() {
        Some("a directory")
    } else if t.is_fifo() {
        Some("a named pipe")
    } else if t.is_socket() {
        Some("a socket")
    } else {
        Some("a device file")
    }
}

/// Why an entry in the folder is not read as a report: it is not a regular file of its own.
fn refusal(kind: &str) -> String {
    format!(
        "it is {kind}, not a regular file; only regular files dropped into the folder itself are read (links are never followed), and nothing of what it points to was read"
    )
}

/// Reads a report that must be a regular file of its own in the folder: opened without
/// following a symbolic link and without waiting on a pipe, then checked on the open file, so
/// that swapping the file for a link after it was listed changes nothing. The error is the
/// reason it is refused (for the `.error` file), or an I/O error.
pub fn read_report(file: &Path) -> Result<Vec<u8>, Result<String, std::io::Error>> {
    use std::io::Read;
    use std::os::unix::fs::{MetadataExt, OpenOptionsExt};
    let mut f = match std::fs::OpenOptions::new()
        .read(true)
        .custom_flags(libc::O_NOFOLLOW | libc::O_NONBLOCK)
        .open(file)
    {
        Ok(f) => f,
        Err(e) if e.raw_os_error() == Some(libc::ELOOP) => {
            return Err(Ok(refusal("a symbolic link")));
        }
        Err(e) => return Err(Err(e)),
    };
    let meta = f.metadata().map_err(Err)?;
    if let Some(kind) = not_regular(&meta.file_type()) {
        return Err(Ok(refusal(kind)));
    }
    if meta.nlink() > 1 {
        return Err(Ok(format!(
            "it has {} hard links, so it is also a file elsewhere; a report must be a file of its own, and nothing of it was read",
            meta.nlink()
        )));
    }
    let mut bytes = Vec::with_capacity(meta.len() as usize);
    f.read_to_end(&mut bytes).map_err(Err)?;
    Ok(bytes)
}

/// The ledger of reports read: one line per report, `sha256 file-name time`, appended once the
/// report's readings are durable and before it moves to `done/`. A report whose content is in
/// the ledger is a copy (the same report dropped again under another name) and is not archived
/// a second time.
pub const LEDGER: &str = ".linewarden-reports";

/// Content hashes of the reports already read, with the name each was read under.
pub fn read_ledger(path: &Path) -> HashMap<String, String> {
    std::fs::read_to_string(path.join(LEDGER))
        .unwrap_or_default()
        .lines()
        .filter_map(|l| {
            let mut it = l.splitn(3, ' ');
            let (sha, name) = (it.next()?, it.next()?);
            (sha.len() == 64).then(|| (sha.to_string(), name.to_string()))
        })
        .collect()
}

fn append_ledger(path: &Path, sha: &str, report: &str) -> std::io::Result<()> {
    use std::io::Write;
    let mut f = std::fs::OpenOptions::new()
        .create(true)
        .append(true)
        .open(path.join(LEDGER))?;
    // Names with spaces or line breaks are written with those replaced: the ledger is read by
    // the hash, the name is only for people.
    let name: String = report
        .chars()
        .map(|c| {
            if c.is_whitespace() || c.is_control() {
                '_'
            } else {
                c
            }
        })
        .collect();
    writeln!(f, "{sha} {name} {}", crate::format::utc_ms(now_ms()))?;
    f.sync_data()
}

/// Moves a report that will not be read into `rejected/` with a `.error` file saying why.
fn reject_file(src: &FolderSource, file: &Path, report: &str, reason: &str) {
    tracing::warn!("rejected report {report}: {reason}");
    let to = src.path.join("rejected").join(report);
    let error = src.path.join("rejected").join(format!("{report}.error"));
    if let Err(e) = crate::fsutil::write_atomic(&error, format!("{reason}\n").as_bytes()) {
        tracing::error!("cannot write {}: {e}", error.display());
    }
    if let Err(e) = std::fs::rename(file, &to) {
        tracing::error!("cannot move {report} to rejected/: {e}");
    }
    let _ = crate::fsutil::sync_dir(&src.path.join("rejected"));
}

/// Reads one report from `processing/`, sends its readings and its bad rows, waits until the
/// archive holds them durably, and moves the file on. False when the engine has gone.
async fn process(
    src: &FolderSource,
    name: &str,
    file: &Path,
    tx: &mpsc::Sender<SourceEvent>,
    ledger: &mut HashMap<String, String>,
    leftover: bool,
) -> bool {
    let report = file
        .file_name()
        .map(|n| n.to_string_lossy().into_owned())
        .unwrap_or_default();
    let bytes = match read_report(file) {
        Ok(b) => b,
        Err(Ok(reason)) => {
            reject_file(src, file, &report, &reason);
            return true;
        }
        Err(Err(e)) => {
            tracing::error!("cannot read {}: {e}", file.display());
            return true;
        }
    };
    let sha = crate::archive::segment::sha256_hex(&bytes);
    if leftover && ledger.contains_key(&sha) {
        // Read and archived before a crash cut the move to done/ short: finish the move.
        let to = src.path.join("done").join(&report);
        match std::fs::rename(file, &to)
            .and_then(|_| crate::fsutil::sync_dir(&src.path.join("done")))
        {
            Ok(()) => tracing::info!("{report} was read before the restart; moved to done/"),
            Err(e) => tracing::error!("cannot move {report} to done/: {e}"),
        }
        return true;
    }
    if let Some(first) = ledger.get(&sha) {
        let reason = format!(
            "{report} has the same content (SHA-256 {sha}) as the report read before as {first}; its readings are already archived and are not archived again"
        );
        let ev = SourceEvent::Unreadable {
            source: name.to_string(),
            characteristic: None,
            raw: report.clone(),
            reason: reason.clone(),
            source_key: None,
        };
        if tx.send(ev).await.is_err() {
            return false;
        }
        reject_file(src, file, &report, &reason);
        return true;
    }
    let text = String::from_utf8_lossy(&bytes);
    let parsed = parse(&text, &report, &src.rows, src.part_column.as_deref());
    let (readings, bad) = match parsed {
        Ok(x) => x,
        Err(reason) => {
            reject_file(src, file, &report, &reason);
            return true;
        }
    };
    let arrival = now_ms();
    let mut sent = 0;
    for (key, characteristic, value, part, cell) in readings {
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
            source_time_ignored: false,
            arrival_ms: arrival,
            part,
            source_key: Some(source_key),
            word: None,
            inspected: None,
            sent: Some(crate::format::raw_text(cell.as_bytes())),
        });
        if tx.send(ev).await.is_err() {
            return false;
        }
        sent += 1;
    }
    let bad_rows = bad.len();
    for (key, raw, reason) in bad {
        let source_key = format!("{sha}:{key}");
        if src.already.contains(&source_key) {
            continue;
        }
        let ev = SourceEvent::Unreadable {
            source: name.to_string(),
            characteristic: None,
            raw,
            reason,
            source_key: Some(source_key),
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
    if let Err(e) = append_ledger(&src.path, &sha, &report) {
        tracing::error!(
            "cannot add {report} to the ledger {}: {e}; a copy of it would be archived again",
            src.path.join(LEDGER).display()
        );
    }
    ledger.insert(sha, report.clone());
    let to = src.path.join("done").join(&report);
    match std::fs::rename(file, &to).and_then(|_| crate::fsutil::sync_dir(&src.path.join("done"))) {
        Ok(()) if bad_rows > 0 => tracing::warn!(
            "read {report}: {sent} readings archived, {bad_rows} row(s) or cell(s) rejected (see the archive); moved to done/"
        ),
        Ok(()) => tracing::info!("read {report}: {sent} readings archived; moved to done/"),
        Err(e) => tracing::error!("read {report} but cannot move it to done/: {e}"),
    }
    true
}

/// A reading found in a report: (row:column key, characteristic, value, part, the cell's text
/// as written).
pub type Found = (String, String, f64, Option<String>, String);

/// A row or cell that is not a reading: (key, raw text, reason with file:line[:column]).
pub type Bad = (String, String, String);

/// What a report holds: its readings, and the rows and cells that are not readings.
pub type Parsed = (Vec<Found>, Vec<Bad>);

/// Readings of a report, and its bad rows and cells with the reason for each. An error when
/// the file is not a report of the configured layout at all (no header, a missing column).
///
/// A row is never read by position when its field count differs from the header's: every
/// value would land in the wrong column. Such a row is rejected whole, with a hint at the
/// usual causes (a decimal comma, another delimiter, a row cut short while being written). An
/// empty cell in a row of the right length is a feature not measured on that part.
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
            let hint = match header.as_slice() {
                [only] if only.contains(';') => {
                    " (the fields look separated by ';': reports must use ',')".to_string()
                }
                [only] if only.contains('\t') => {
                    " (the fields look separated by tabs: reports must use ',')".to_string()
                }
                _ => String::new(),
            };
            format!(
                "{file}: no column \"{name}\" (the header has: {}){hint}",
                header.join(", ")
            )
        })
    };
    let part_at = part_column.map(col).transpose()?;
    let mut readings = Vec::new();
    let mut bad: Vec<Bad> = Vec::new();
    let number = |raw: &str, line: u64, column: usize| -> Result<f64, Bad> {
        match raw.parse::<f64>() {
            Ok(v) if v.is_finite() => Ok(v),
            _ => Err((
                format!("{line}:{}", column + 1),
                raw.to_string(),
                format!(
                    "{file}:{line}:{}: \"{raw}\" is not a reading{}",
                    column + 1,
                    if looks_decimal_comma(raw) {
                        " (a decimal comma? reports must use a decimal point)"
                    } else {
                        ""
                    }
                ),
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
    let unterminated = !text.is_empty() && !text.ends_with('\n') && !text.ends_with('\r');
    let mut records = r.records().peekable();
    while let Some(rec) = records.next() {
        let last = records.peek().is_none();
        let rec = match rec {
            Ok(rec) => rec,
            Err(e) => {
                let line = e.position().map_or(0, |p| p.line());
                bad.push((
                    format!("{line}:row"),
                    String::new(),
                    format!("{file}:{line}: the row cannot be read: {e}"),
                ));
                continue;
            }
        };
        let line = rec.position().map_or(0, |p| p.line());
        if rec.len() != header.len() {
            let raw = rec.iter().collect::<Vec<_>>().join(",");
            bad.push((
                format!("{line}:row"),
                raw,
                format!(
                    "{file}:{line}: the row has {} field(s) where the header has {}; none of its values were read{}",
                    rec.len(),
                    header.len(),
                    field_count_hint(&rec, header.len(), last && unterminated)
                ),
            ));
            continue;
        }
        let part = part_at
            .and_then(|i| rec.get(i))
            .filter(|s| !s.is_empty())
            .map(str::to_string);
        match per_reading {
            Some((ci, vi)) => {
                let (c, v) = (rec.get(ci).unwrap_or(""), rec.get(vi).unwrap_or(""));
                if c.is_empty() || v.is_empty() {
                    bad.push((
                        format!("{line}:row"),
                        rec.iter().collect::<Vec<_>>().join(","),
                        format!(
                            "{file}:{line}: the {} is empty",
                            if c.is_empty() {
                                "characteristic"
                            } else {
                                "value"
                            }
                        ),
                    ));
                    continue;
                }
                match number(v, line, vi) {
                    Ok(x) => readings.push((
                        format!("{line}:{}", vi + 1),
                        c.to_string(),
                        x,
                        part,
                        v.to_string(),
                    )),
                    Err(b) => bad.push(b),
                }
            }
            None => {
                for (i, id) in &mapped {
                    match rec.get(*i) {
                        // An empty cell in a whole row: the feature was not measured.
                        None | Some("") => {}
                        Some(v) => match number(v, line, *i) {
                            Ok(x) => readings.push((
                                format!("{line}:{}", i + 1),
                                id.clone(),
                                x,
                                part.clone(),
                                v.to_string(),
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

/// Whether a cell looks like a number written with a decimal comma ("12,003").
fn looks_decimal_comma(raw: &str) -> bool {
    let mut parts = raw.split(',');
    matches!(
        (parts.next(), parts.next(), parts.next()),
        (Some(a), Some(b), None)
            if !a.is_empty() && !b.is_empty()
                && a.trim_start_matches('-').bytes().all(|c| c.is_ascii_digit())
                && b.bytes().all(|c| c.is_ascii_digit())
    )
}

/// The likely cause of a row whose field count is not the header's.
fn field_count_hint(rec: &csv::StringRecord, expected: usize, unterminated_last: bool) -> String {
    let n = rec.len();
    if n < expected && unterminated_last {
        return " (it is the last line and has no line ending: the file was probably still being written when it was taken; send the report again complete)".into();
    }
    if n == 1 && rec.get(0).is_some_and(|f| f.contains(';')) {
        return " (the fields look separated by ';': reports must use ',')".into();
    }
    if n == 1 && rec.get(0).is_some_and(|f| f.contains('\t')) {
        return " (the fields look separated by tabs: reports must use ',')".into();
    }
    if n > expected {
        // Two neighbouring fields of digits, the second not starting a new number, are the
        // mark of a decimal comma: 12,003 read as "12" and "003".
        let digits = |s: &str| {
            !s.is_empty()
                && s.trim_start_matches('-')
                    .bytes()
                    .all(|c| c.is_ascii_digit())
        };
        let pair = rec
            .iter()
            .zip(rec.iter().skip(1))
            .any(|(a, b)| digits(a) && digits(b));
        return if pair {
            " (a decimal comma such as \"12,003\" splits one value into two fields: reports must use a decimal point)".into()
        } else {
            " (a decimal comma or an unquoted ',' inside a field?)".into()
        };
    }
    " (a field is missing)".into()
}

/// Source keys the archive already holds for reports left in `processing/` by a crash (their
/// content hash is the key's prefix). Reads the archive only when there are such files.
pub async fn already_archived(
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
            kinds: vec!["reading-accepted".into(), "reading-rejected".into()],
            ..Default::default()
        };
        for e in r.iter(&filter).flatten() {
            if let crate::archive::Record::ReadingAccepted {
                source_key: Some(k),
                ..
            }
            | crate::archive::Record::ReadingRejected {
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
