//! Kill -9: a child process appends continuously while this test kills it at random moments.
//! After every kill the archive reopens, every record reported durable before the kill is there
//! and intact, nothing corrupt is returned, and sequence numbers continue.

use std::io::{BufRead, BufReader};
use std::path::Path;
use std::process::{Command, Stdio};
use std::sync::{
    Arc,
    atomic::{AtomicU64, Ordering},
};
use std::time::{Duration, Instant};

use linewarden::archive::reader::{self, Filter, Reader};
use linewarden::archive::record::Record;
use linewarden::archive::writer::{self, Writer, WriterConfig};

fn config(dir: &Path) -> WriterConfig {
    let mut c = WriterConfig::new(dir);
    c.flush_interval_ms = 2;
    c.max_segment_bytes = 48 * 1024; // rotate often, so kills land in seals and new segments too
    c
}

/// The child: appends readings numbered 1, 2, 3, ... across all runs (the value, the source key
/// and the characteristic all derive from the number, so a damaged record shows), and prints
/// each new durable sequence number. Run only by the test below.
#[test]
#[ignore = "helper process for kill_nine_at_random_moments_loses_nothing_durable"]
fn child_appender() {
    let Ok(dir) = std::env::var("LW_CHILD_DIR") else {
        return;
    };
    let (w, _) = Writer::open(config(Path::new(&dir))).expect("the archive opens");
    let mut next = last_number(Path::new(&dir)) + 1;
    let (handle, _join) = writer::spawn(w, || 1_780_000_000_000);
    let mut status = handle.status();
    std::thread::spawn(move || {
        let rt = tokio::runtime::Builder::new_current_thread()
            .build()
            .unwrap();
        rt.block_on(async {
            let mut last = 0;
            loop {
                let d = status.borrow_and_update().durable_seq;
                if d != last {
                    println!("durable {d}");
                    last = d;
                }
                if status.changed().await.is_err() {
                    break;
                }
            }
        });
    });
    loop {
        let batch: Vec<Record> = (0..20)
            .map(|i| Record::ReadingAccepted {
                source: "child".into(),
                characteristic: format!("c{}", (next + i) % 7),
                value: (next + i) as f64,
                unit: None,
                source_time_ms: None,
                source_time_ignored: false,
                arrival_ms: 0,
                part: None,
                source_key: Some(format!("k{}", next + i)),
                word: None,
                inspected: None,
            })
            .collect();
        handle.append_blocking(batch).expect("append");
        next += 20;
    }
}

/// The number of the last reading in the archive (0 when empty).
fn last_number(dir: &Path) -> u64 {
    let r = Reader::open(dir).unwrap();
    r.iter(&Filter::default())
        .filter_map(|e| match e.unwrap().record {
            Record::ReadingAccepted { value, .. } => Some(value as u64),
            _ => None,
        })
        .last()
        .unwrap_or(0)
}

#[test]
fn kill_nine_at_random_moments_loses_nothing_durable() {
    let dir = tempfile::tempdir().unwrap();
    let exe = std::env::current_exe().unwrap();
    let mut rng_state = 0x9e3779b97f4a7c15u64;
    let mut rand = move || {
        rng_state ^= rng_state << 13;
        rng_state ^= rng_state >> 7;
        rng_state ^= rng_state << 17;
        rng_state
    };
    let mut total_quarantined = 0;
    let mut last_seq_seen = 0;
    for round in 0..60 {
        let mut child = Command::new(&exe)
            .args([
                "--exact",
                "child_appender",
                "--ignored",
                "--nocapture",
                "--test-threads=1",
            ])
            .env("LW_CHILD_DIR", dir.path())
            .stdout(Stdio::piped())
            .stderr(Stdio::null())
            .spawn()
            .unwrap();
        let durable = Arc::new(AtomicU64::new(0));
        let out = child.stdout.take().unwrap();
        let d = durable.clone();
        let reader_thread = std::thread::spawn(move || {
            for line in BufReader::new(out).lines().map_while(Result::ok) {
                if let Some(n) = line
                    .strip_prefix("durable ")
                    .and_then(|n| n.parse::<u64>().ok())
                {
                    d.fetch_max(n, Ordering::SeqCst);
                }
            }
        });
        // Wait until this round has made something durable, then kill at a random moment.
        let start = Instant::now();
        while durable.load(Ordering::SeqCst) <= last_seq_seen
            && start.elapsed() < Duration::from_secs(20)
        {
            std::thread::sleep(Duration::from_millis(1));
        }
        std::thread::sleep(Duration::from_micros(rand() % 40_000));
        // The last durable number the child reported before it died.
        let promised = durable.load(Ordering::SeqCst);
        child.kill().unwrap(); // SIGKILL
        child.wait().unwrap();
        reader_thread.join().unwrap();
        assert!(
            promised > last_seq_seen,
            "round {round}: the child made no progress"
        );

        let (w, report) = Writer::open(config(dir.path()))
            .unwrap_or_else(|e| panic!("round {round}: the archive does not reopen: {e}"));
        total_quarantined += report.quarantined.len();
        let next = w.next_seq();
        drop(w);
        assert!(
            next > promised,
            "round {round}: durable up to {promised} was reported, but the archive ends at {}",
            next - 1
        );
        let r = Reader::open(dir.path()).unwrap();
        let mut expected = 1;
        let mut number = 0u64;
        for e in r.iter(&Filter::default()) {
            let e = e.unwrap_or_else(|err| panic!("round {round}: corrupt data returned: {err}"));
            assert_eq!(
                e.seq, expected,
                "round {round}: sequence numbers are gap-free"
            );
            match e.record {
                Record::ReadingAccepted {
                    value,
                    characteristic,
                    source_key,
                    ..
                } => {
                    let n = value as u64;
                    assert_eq!(
                        n,
                        number + 1,
                        "round {round}: readings continue without a gap"
                    );
                    assert_eq!(
                        characteristic,
                        format!("c{}", n % 7),
                        "round {round}: record {} intact",
                        e.seq
                    );
                    assert_eq!(
                        source_key,
                        Some(format!("k{n}")),
                        "round {round}: record {} intact",
                        e.seq
                    );
                    number = n;
                }
                Record::Checkpoint { .. } => {}
                other => panic!("round {round}: unexpected record {other:?}"),
            }
            expected += 1;
        }
        assert_eq!(expected, next, "round {round}");
        let v = reader::verify(dir.path()).unwrap();
        assert!(v.problems.is_empty(), "round {round}: {:?}", v.problems);
        last_seq_seen = next - 1;
    }
    eprintln!(
        "60 kills; {last_seq_seen} records; {total_quarantined} torn tails cut and quarantined"
    );
}
