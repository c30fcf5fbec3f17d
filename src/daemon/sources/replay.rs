//! The replay source: plays a recorded feed file (JSON lines) at a speed factor. Used by the
//! demo and the tests; its readings are stamped with the time they are replayed.
//!
//! Each line: `{"t_ms": 2000, "characteristic": "vb210-bore", "value": 12.0031, "part": "VB00001"}`,
//! or `"raw": "..."` instead of `"value"` for output a gauge could not make sense of, or
//! `"result": "NOK"` for the word a pass/fail station sent; `"inspected": 50` with a value makes
//! it a batch's count. `t_ms` is the time since the start of the recording.

use std::path::PathBuf;
use std::time::Duration;

use serde::Deserialize;
use tokio::io::AsyncBufReadExt;
use tokio::sync::{mpsc, watch};

use super::SourceEvent;
use crate::daemon::clock::now_ms;
use crate::engine::Incoming;

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct Line {
    t_ms: i64,
    characteristic: String,
    value: Option<f64>,
    raw: Option<String>,
    result: Option<String>,
    inspected: Option<f64>,
    part: Option<String>,
}

/// Plays `file`; ends at the end of the file or at shutdown.
pub async fn run(
    id: String,
    file: PathBuf,
    speed: f64,
    tx: mpsc::Sender<SourceEvent>,
    mut shutdown: watch::Receiver<bool>,
) {
    let name = format!("replay:{id}");
    let f = match tokio::fs::File::open(&file).await {
        Ok(f) => f,
        Err(e) => {
            tracing::error!("cannot open the feed file {}: {e}", file.display());
            let _ = tx.send(SourceEvent::Ended { source: name }).await;
            return;
        }
    };
    tracing::info!("replaying {} at {speed}x", file.display());
    let mut lines = tokio::io::BufReader::new(f).lines();
    let start = tokio::time::Instant::now();
    let mut first_t: Option<i64> = None;
    let mut line_no = 0u64;
    loop {
        let line = tokio::select! {
            l = lines.next_line() => l,
            _ = shutdown.changed() => break,
        };
        let line = match line {
            Ok(Some(l)) => l,
            Ok(None) => break,
            Err(e) => {
                tracing::error!("reading {} failed: {e}", file.display());
                break;
            }
        };
        line_no += 1;
        if line.trim().is_empty() {
            continue;
        }
        let parsed: Line = match serde_json::from_str(&line) {
            Ok(l) => l,
            Err(e) => {
                let ev = SourceEvent::Unreadable {
                    source: name.clone(),
                    characteristic: None,
                    raw: line.clone(),
                    reason: format!("{}:{line_no}: not a feed line: {e}", file.display()),
                    source_key: Some(format!("{}:{line_no}", file.display())),
                };
                if tx.send(ev).await.is_err() {
                    break;
                }
                continue;
            }
        };
        let t0 = *first_t.get_or_insert(parsed.t_ms);
        if speed > 0.0 {
            let due = start
                + Duration::from_secs_f64(((parsed.t_ms - t0).max(0) as f64 / 1000.0) / speed);
            tokio::select! {
                _ = tokio::time::sleep_until(due) => {}
                _ = shutdown.changed() => break,
            }
        }
        let arrival = now_ms();
        let ev = match (
            parsed.value.or(parsed.result.as_ref().map(|_| f64::NAN)),
            parsed.raw,
        ) {
            (Some(value), None) => SourceEvent::Reading(Incoming {
                source: name.clone(),
                characteristic: parsed.characteristic,
                value,
                unit: None,
                source_time_ms: None,
                source_time_ignored: false,
                arrival_ms: arrival,
                part: parsed.part,
                source_key: Some(format!("{}:{line_no}", file.display())),
                word: parsed.result.map(|r| r.trim().to_string()),
                inspected: parsed.inspected,
                // A line stands for what a device sent: its word or number, as written in
                // the record of a rejection (a number JSON cannot hold fails the whole line).
                sent: None,
            }),
            (_, raw) => SourceEvent::Unreadable {
                source: name.clone(),
                characteristic: Some(parsed.characteristic),
                raw: raw.unwrap_or_default(),
                reason: "the gauge output is not a number".into(),
                source_key: Some(format!("{}:{line_no}", file.display())),
            },
        };
        if tx.send(ev).await.is_err() {
            break;
        }
    }
    tracing::info!("replay finished after {line_no} lines");
    let _ = tx.send(SourceEvent::Ended { source: name }).await;
}
