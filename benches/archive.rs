//! Archive throughput next to the disk's own limit, in one run on one disk:
//!
//! 1. the disk: a plain loop of `write` + `fdatasync` of a record-sized buffer;
//! 2. per-record durability (`flush_interval_ms = 0`) through the writer task;
//! 3. group commit (`flush_interval_ms = 20`) through the writer task, records sent in batches.
//!
//! `cargo bench --bench archive` (directory: LINEWARDEN_BENCH_DIR, default target/bench-archive;
//! seconds per measurement: LINEWARDEN_BENCH_SECONDS, default 3).

use std::fs::OpenOptions;
use std::io::Write;
use std::path::PathBuf;
use std::time::{Duration, Instant};

use linewarden::archive::record::Record;
use linewarden::archive::writer::{self, Writer, WriterConfig};

fn record(i: u64) -> Record {
    Record::ReadingAccepted {
        source: "mqtt:cell4/gauges".into(),
        characteristic: format!("char-{}", i % 100),
        value: 12.0 + (i % 97) as f64 * 1e-4,
        unit: Some("mm".into()),
        source_time_ms: Some(1_796_112_000_000 + i as i64),
        source_time_ignored: false,
        arrival_ms: 1_796_112_000_000 + i as i64,
        part: None,
        source_key: Some(format!("cell4/gauges/{i}")),
        word: None,
        inspected: None,
    }
}

fn main() {
    let base = std::env::var("LINEWARDEN_BENCH_DIR")
        .map(PathBuf::from)
        .unwrap_or_else(|_| PathBuf::from("target/bench-archive"));
    let secs: f64 = std::env::var("LINEWARDEN_BENCH_SECONDS")
        .ok()
        .and_then(|s| s.parse().ok())
        .unwrap_or(3.0);
    let budget = Duration::from_secs_f64(secs);
    let _ = std::fs::remove_dir_all(&base);
    std::fs::create_dir_all(&base).unwrap();
    let size = serde_json::to_vec(&record(1)).unwrap().len() + 9;
    println!(
        "archive benchmark in {} ({} s each; record frame {size} bytes)",
        base.display(),
        secs
    );

    // 1. The disk's own limit.
    let path = base.join("plain.bin");
    let mut f = OpenOptions::new()
        .create(true)
        .write(true)
        .truncate(true)
        .open(&path)
        .unwrap();
    let buf = vec![b'x'; size];
    let start = Instant::now();
    let mut n = 0u64;
    while start.elapsed() < budget {
        f.write_all(&buf).unwrap();
        f.sync_data().unwrap();
        n += 1;
    }
    let plain = n as f64 / start.elapsed().as_secs_f64();
    println!("  plain write + fdatasync loop      {plain:>12.0} writes/s");

    // 2. Per-record durability through the writer task.
    let per_record = run(&base.join("per-record"), 0, budget, 1);
    println!(
        "  writer, fdatasync per record      {per_record:>12.0} records/s  ({:.0}% of the plain loop)",
        100.0 * per_record / plain
    );

    // 3. Group commit.
    let group = run(&base.join("group"), 20, budget, 200);
    println!("  writer, group commit 20 ms        {group:>12.0} records/s");
    let _ = std::fs::remove_dir_all(&base);
}

/// Sends records in batches of `batch` for `budget`, then waits until all are durable; returns
/// durable records per second.
fn run(dir: &std::path::Path, flush_ms: u64, budget: Duration, batch: u64) -> f64 {
    let mut cfg = WriterConfig::new(dir);
    cfg.flush_interval_ms = flush_ms;
    let (w, _) = Writer::open(cfg).unwrap();
    let (handle, join) = writer::spawn(w, || 1_796_112_000_000);
    let start = Instant::now();
    let mut i = 0u64;
    while start.elapsed() < budget {
        let records: Vec<Record> = (i..i + batch).map(record).collect();
        i += batch;
        if batch == 1 {
            handle.append_blocking(records).unwrap();
        } else {
            handle.send_blocking(records).unwrap();
        }
    }
    // Everything queued before this is appended before it: its answer is the last number.
    let last = handle.append_blocking(Vec::new()).unwrap();
    let mut status = handle.status();
    while status.borrow_and_update().durable_seq < last {
        std::thread::sleep(Duration::from_micros(200));
    }
    let rate = last as f64 / start.elapsed().as_secs_f64();
    drop(handle);
    join.join().unwrap().unwrap();
    rate
}
