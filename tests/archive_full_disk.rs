//! A full disk: the writer stops cleanly, applies backpressure, loses no confirmed record, and
//! resumes when space is freed. Runs on a small tmpfs the test mounts (as root) or that CI
//! provides in LINEWARDEN_SMALL_FS.

use std::sync::Arc;
use std::sync::atomic::{AtomicBool, AtomicU64, Ordering};
use std::time::{Duration, Instant};

use linewarden::archive::reader::{self, Filter, Reader};
use linewarden::archive::record::Record;
use linewarden::archive::writer::{self, Writer, WriterConfig, WriterState};

mod common;
use common::small_fs_or_skip;

fn reading(n: u64) -> Record {
    Record::ReadingAccepted {
        source: "filler".into(),
        characteristic: "bore".into(),
        value: n as f64,
        unit: Some("mm".into()),
        source_time_ms: None,
        source_time_ignored: false,
        arrival_ms: 0,
        part: Some(format!("part-{n:08}")),
        source_key: Some(format!("key-{n}")),
        word: None,
        inspected: None,
    }
}

#[test]
fn the_writer_pauses_on_a_full_disk_and_resumes_without_loss() {
    let base = tempfile::tempdir().unwrap();
    let Some((root, _mount)) = small_fs_or_skip(base.path(), "2m") else {
        return;
    };
    // Ballast to free later.
    let ballast = root.join("ballast");
    std::fs::write(&ballast, vec![0u8; 1536 * 1024]).unwrap();
    let dir = root.join("archive");
    let mut cfg = WriterConfig::new(&dir);
    cfg.flush_interval_ms = 5;
    cfg.retry_ms = 20;
    let (w, _) = Writer::open(cfg.clone()).unwrap();
    let (handle, join) = writer::spawn(w, || 1_780_000_000_000);

    let appended = Arc::new(AtomicU64::new(0)); // readings whose append returned
    let stop = Arc::new(AtomicBool::new(false));
    let h = handle.clone();
    let (a, s) = (appended.clone(), stop.clone());
    let producer = std::thread::spawn(move || {
        let mut n = 0u64;
        while !s.load(Ordering::SeqCst) {
            n += 1;
            h.append_blocking(vec![reading(n)])
                .expect("appends wait, they do not fail");
            a.store(n, Ordering::SeqCst);
        }
    });

    let mut status = handle.status();
    let deadline = Instant::now() + Duration::from_secs(60);
    while !matches!(status.borrow().state, WriterState::Held { .. }) {
        assert!(Instant::now() < deadline, "the disk never filled");
        std::thread::sleep(Duration::from_millis(5));
    }
    let durable_when_full = status.borrow().durable_seq;
    // Backpressure: the writer keeps taking appends into memory only up to its bound
    // (writer::MAX_BUFFERED_WHILE_FULL), then the producer is held. Wait for it to be held
    // (however slow the machine), then check that nothing more is taken.
    let mut held = appended.load(Ordering::SeqCst);
    let deadline = Instant::now() + Duration::from_secs(30);
    loop {
        std::thread::sleep(Duration::from_millis(300));
        let now = appended.load(Ordering::SeqCst);
        if now == held {
            break;
        }
        assert!(Instant::now() < deadline, "the producer was never held");
        held = now;
    }
    std::thread::sleep(Duration::from_millis(300));
    assert_eq!(
        appended.load(Ordering::SeqCst),
        held,
        "the producer waits while the disk is full"
    );
    // What was taken meanwhile is bounded: each reading record is well over 64 bytes.
    assert!(
        held - durable_when_full <= (writer::MAX_BUFFERED_WHILE_FULL / 64) as u64,
        "{} records taken into memory while the disk was full",
        held - durable_when_full
    );
    assert!(matches!(
        status.borrow_and_update().state,
        WriterState::Held { .. }
    ));

    // Free space: the writer resumes by itself, and takes what waited in the queue.
    stop.store(true, Ordering::SeqCst);
    std::fs::remove_file(&ballast).unwrap();
    producer.join().unwrap();
    let confirmed = appended.load(Ordering::SeqCst);
    assert!(confirmed > held, "the producer went on once space was back");
    let deadline = Instant::now() + Duration::from_secs(30);
    loop {
        let s = status.borrow().clone();
        if s.state == WriterState::Running && s.durable_seq >= confirmed {
            break;
        }
        assert!(
            Instant::now() < deadline,
            "the writer did not resume: {s:?}"
        );
        std::thread::sleep(Duration::from_millis(5));
    }
    drop(handle);
    drop(status);
    join.join().unwrap().unwrap();

    // Everything confirmed is there, once, intact; nothing half-written was left as valid.
    let (w, report) = Writer::open(cfg).unwrap();
    assert!(report.quarantined.is_empty(), "{:?}", report.quarantined);
    drop(w);
    let r = Reader::open(&dir).unwrap();
    let mut n = 0u64;
    for e in r.iter(&Filter::default()) {
        if let Record::ReadingAccepted { value, .. } = e.unwrap().record {
            n += 1;
            assert_eq!(value, n as f64);
        }
    }
    assert_eq!(n, confirmed, "every confirmed reading, once");
    let v = reader::verify(&dir).unwrap();
    assert!(v.problems.is_empty(), "{:?}", v.problems);
    eprintln!(
        "disk filled at record {durable_when_full}; {confirmed} readings confirmed and archived"
    );
}
