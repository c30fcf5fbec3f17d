//! Numbers a device may send that a double holds but arithmetic on them does not: readings of
//! 1e308, counts in 1e-300 units, alternating ±f64::MAX. What broke: a subgroup whose sum
//! overflowed was archived with `"mean": null`, which passed its CRC and then stopped every
//! reader and the daemon's next start for good; learning on such data wrote `inf` into a
//! limits file. Here every chart kind meets them through the whole daemon, and the record
//! stays readable by every reader, the daemon starts again on it, and no limits file is
//! written that would not load. An archive already holding such a record (from an older
//! build) is read past, by every reader alike, and the daemon goes on writing after it.

use std::path::Path;

use linewarden::archive::reader::{self, Filter, Reader};
use linewarden::archive::record::{Record, SubgroupSummary};
use linewarden::archive::writer::{Writer, WriterConfig};
use linewarden::archive::{ArchiveError, segment};

mod common;
use common::peers::cli;
use common::run_daemon;

const CELL: &str = r#"[daemon]
archive_dir = "archive"
flush_interval_ms = 2

[[characteristic]]
id = "leak"
chart = "p"
subgroup = { size = 2 }
learning = { subgroups = 5 }
limits = "limits/leak.toml"
[characteristic.rules]
[[characteristic.rules.rule]]
kind = "beyond-limits"

[[characteristic]]
id = "blemish"
chart = "u"
subgroup = { size = 2 }
learning = { subgroups = 5 }
limits = "limits/blemish.toml"
[characteristic.rules]
[[characteristic.rules.rule]]
kind = "beyond-limits"

[[characteristic]]
id = "bore"
subgroup = { size = 3 }
learning = { subgroups = 5 }
limits = "limits/bore.toml"

[[characteristic]]
id = "face"
subgroup = { size = 1 }
learning = { subgroups = 8 }
limits = "limits/face.toml"
[characteristic.rules]
preset = "nelson"
[[characteristic.rules.rule]]
kind = "ewma"
lambda = 0.2
width = 2.962
[[characteristic.rules.rule]]
kind = "cusum"
k = 0.5
h = 4.77

[[characteristic]]
id = "huge"
subgroup = { size = 2 }
learning = { subgroups = 4 }
limits = "limits/huge.toml"

[[source]]
id = "station"
kind = "replay"
file = "feed.jsonl"
speed = 0
"#;

/// The numbers that broke it, and their neighbours at the edge of a double.
const EDGES: [f64; 8] = [
    1e308,
    -1e308,
    f64::MAX,
    -f64::MAX,
    1.7e308,
    1e300,
    -1e300,
    8.98846567431158e307, // half of f64::MAX: two of them overflow, one does not
];

fn line(t: &mut i64, c: &str, value: f64, inspected: Option<f64>) -> String {
    *t += 1000;
    // `{:e}` writes every double exactly and as JSON accepts it.
    match inspected {
        Some(n) => format!(
            r#"{{"t_ms": {t}, "characteristic": "{c}", "value": {value:e}, "inspected": {n:e}}}"#
        ),
        None => format!(r#"{{"t_ms": {t}, "characteristic": "{c}", "value": {value:e}}}"#),
    }
}

/// Ordinary readings to learn from, then every edge on every characteristic, then ordinary
/// readings again.
fn hostile_feed() -> Vec<String> {
    let mut t = 0;
    let mut out = Vec::new();
    let ordinary = |t: &mut i64, out: &mut Vec<String>, rounds: usize| {
        for i in 0..rounds {
            let w = (i % 5) as f64;
            out.push(line(t, "bore", 12.0 + 0.001 * w, None));
            out.push(line(t, "face", 38.2 + 0.002 * w, None));
            out.push(line(t, "leak", (i % 3 == 0) as u8 as f64, None));
            out.push(line(t, "blemish", (i % 4) as f64, Some(2.0)));
        }
    };
    ordinary(&mut t, &mut out, 30);
    for v in EDGES {
        for _ in 0..3 {
            out.push(line(&mut t, "bore", v, None));
            out.push(line(&mut t, "face", v, None));
            out.push(line(&mut t, "huge", v, None));
        }
        // A count of 1e308 (beyond any exact count) and one kept exactly, in absurd units.
        out.push(line(&mut t, "leak", 1e308, Some(1e308)));
        out.push(line(&mut t, "leak", 9e15, Some(9e15)));
        out.push(line(&mut t, "blemish", 1e15, Some(1e-300)));
        out.push(line(&mut t, "blemish", 3.0, Some(5e-324)));
        out.push(line(&mut t, "blemish", 1e300, Some(1e300)));
    }
    ordinary(&mut t, &mut out, 30);
    out
}

fn cell(dir: &Path, feed: &[String]) -> linewarden::config::Config {
    std::fs::write(dir.join("feed.jsonl"), feed.join("\n") + "\n").unwrap();
    std::fs::write(dir.join("cell.toml"), CELL).unwrap();
    linewarden::config::load(&dir.join("cell.toml")).unwrap()
}

/// Every reader on the archive: the iterator, the tail, verify, and the CLI's export, stats,
/// limits, chart and backtest. None calls it damaged.
fn every_reader_reads(dir: &Path) {
    let archive = dir.join("archive");
    let r = Reader::open(&archive).unwrap();
    for e in r.iter(&Filter::default()) {
        e.unwrap();
    }
    r.tail(20).unwrap();
    let v = reader::verify(&archive).unwrap();
    assert!(v.problems.is_empty(), "{:?}", v.problems);
    let a = archive.to_str().unwrap();
    let cfg = dir.join("cell.toml");
    let svg = dir.join("bore.svg");
    for args in [
        vec!["archive", "verify", a],
        vec!["archive", "stats", a],
        vec!["archive", "export", a],
        vec!["limits", "--archive", a, "--characteristic", "bore"],
        vec![
            "chart",
            "--archive",
            a,
            "--characteristic",
            "bore",
            "-o",
            svg.to_str().unwrap(),
        ],
        vec![
            "backtest",
            "--archive",
            a,
            "--config",
            cfg.to_str().unwrap(),
            "--characteristic",
            "bore",
        ],
    ] {
        let (ok, out, err) = cli(&args);
        assert!(ok, "{args:?} failed:\n{out}\n{err}");
        // Export prints records as stored; verify names an unreadable record's `null`.
        if !["export", "verify"].contains(&args[1]) {
            assert!(!out.contains("null"), "{args:?} printed a null: {out}");
        }
    }
}

/// What broke: two batches of 1e308 on a p chart, a u chart's count in 1e-300 units, or
/// readings of 1e308 on a measured characteristic wrote a subgroup record with a null figure,
/// and nothing could read the archive after it.
#[test]
fn overflowing_figures_never_reach_the_record() {
    let dir = tempfile::tempdir().unwrap();
    let summary = run_daemon(cell(dir.path(), &hostile_feed()));
    assert!(summary.accepted > 0);
    every_reader_reads(dir.path());

    let r = Reader::open(&dir.path().join("archive")).unwrap();
    let mut discarded = std::collections::BTreeMap::<String, usize>::new();
    let mut rejected = Vec::new();
    let mut last_discard = 0;
    let mut bore_results = Vec::new();
    for e in r.iter(&Filter::default()) {
        let e = e.unwrap();
        match e.record {
            Record::SubgroupDiscarded {
                characteristic,
                reason,
                ..
            } if reason.contains("not a finite number") => {
                if characteristic == "bore" {
                    last_discard = e.seq;
                }
                *discarded.entry(characteristic).or_default() += 1;
            }
            Record::ReadingRejected { raw, reason, .. } => rejected.push((raw, reason)),
            Record::SubgroupResult {
                characteristic,
                subgroup,
                location,
                violations,
                ..
            } => {
                // Every figure is a number (it parsed), and finite.
                assert!(subgroup.mean.is_finite(), "{characteristic}: {subgroup:?}");
                for l in location.iter() {
                    assert!(l.center.is_finite() && l.ucl.is_finite() && l.lcl.is_finite());
                }
                for v in &violations {
                    assert!(v.statistic.is_finite() && v.limit.is_finite(), "{v:?}");
                }
                if characteristic == "bore" {
                    bore_results.push(e.seq);
                }
            }
            _ => {}
        }
    }
    // Sums that overflow: the measured subgroups of the largest edges, a u chart's count over
    // 1e-300 units; each discarded with the reason, its readings kept as accepted.
    for c in ["bore", "face", "huge", "blemish"] {
        assert!(
            discarded.get(c).copied().unwrap_or(0) > 0,
            "{c}: {discarded:?}"
        );
    }
    // A count beyond 2^53 is no count: rejected as a reading, with the number as sent.
    assert!(
        rejected
            .iter()
            .any(|(raw, why)| raw.contains("1e308") && why.contains("largest count kept exactly")),
        "{rejected:?}"
    );
    // The ordinary readings after the edges still form subgroups and are judged.
    assert!(
        bore_results.iter().filter(|s| **s > last_discard).count() >= 10,
        "{bore_results:?} after {last_discard}"
    );
    // No limits file was written that would not load.
    for f in std::fs::read_dir(dir.path().join("limits")).unwrap() {
        let p = f.unwrap().path();
        linewarden::limits_file::StoredLimits::load(&p)
            .unwrap_or_else(|e| panic!("{}: {e}", p.display()));
    }

    // The daemon starts again on the same archive and goes on.
    let mut t = 10_000_000;
    let more: Vec<String> = (0..9)
        .map(|i| line(&mut t, "bore", 12.0 + 0.001 * (i % 3) as f64, None))
        .collect();
    std::fs::write(dir.path().join("feed.jsonl"), more.join("\n") + "\n").unwrap();
    let again = run_daemon(linewarden::config::load(&dir.path().join("cell.toml")).unwrap());
    assert_eq!(again.accepted, 9);
    every_reader_reads(dir.path());
}

/// The writer is the last line: a record with a figure JSON cannot hold is not written (the
/// error says which), and the records around it are.
#[test]
fn the_writer_refuses_a_record_that_would_not_read_back() {
    let dir = tempfile::tempdir().unwrap();
    let mut c = WriterConfig::new(dir.path());
    c.flush_interval_ms = 0;
    let (mut w, _) = Writer::open(c).unwrap();
    let bad_summary = |mean: f64, dispersion: Option<f64>| Record::SubgroupResult {
        characteristic: "bore".into(),
        subgroup: SubgroupSummary {
            number: 1,
            time_ms: 0,
            n: 3,
            mean,
            dispersion,
            found: None,
            inspected: None,
        },
        readings: vec![],
        partial: false,
        location: None,
        dispersion: None,
        violations: vec![],
    };
    let fine = Record::DaemonStarted {
        version: "test".into(),
    };
    assert_eq!(w.append(&fine, 0).unwrap(), 1);
    for bad in [
        bad_summary(f64::INFINITY, None),
        bad_summary(f64::NAN, None),
        bad_summary(12.0, Some(f64::INFINITY)),
        Record::ReadingAccepted {
            source: "s".into(),
            characteristic: "bore".into(),
            value: f64::NEG_INFINITY,
            unit: None,
            source_time_ms: None,
            source_time_ignored: false,
            arrival_ms: 0,
            part: None,
            source_key: None,
            word: None,
            inspected: None,
        },
    ] {
        match w.append(&bad, 0) {
            Err(ArchiveError::Unwritable { kind, reason }) => {
                assert_eq!(kind, bad.kind());
                assert!(!reason.is_empty());
            }
            other => panic!("{bad:?} gave {other:?}"),
        }
    }
    assert_eq!(w.append(&fine, 0).unwrap(), 2);
    w.flush().unwrap();
    drop(w);
    let r = Reader::open(dir.path()).unwrap();
    let seqs: Vec<u64> = r.iter(&Filter::default()).map(|e| e.unwrap().seq).collect();
    assert_eq!(seqs, [1, 2]);
}

/// An archive written by an older build, holding a subgroup record with `"mean": null` behind
/// a good CRC. What broke: `run` refused to start, and verify, export, stats and the desk
/// commands all called it damaged. Now the record is kept as written and every reader skips
/// it alike, naming it; the daemon starts and writes after it; the chain still holds once the
/// segment is sealed.
#[test]
fn a_record_with_a_good_crc_that_does_not_parse_is_read_past_by_everyone() {
    let dir = tempfile::tempdir().unwrap();
    let mut t = 0;
    let feed: Vec<String> = (0..60)
        .map(|i| line(&mut t, "bore", 12.0 + 0.001 * (i % 4) as f64, None))
        .collect();
    run_daemon(cell(dir.path(), &feed));
    let archive = dir.path().join("archive");
    let (_, _, newest) = segment::list(&archive).unwrap().pop().unwrap();
    let last = reader::verify(&archive).unwrap().last_seq;
    let poisoned = format!(
        r#"{{"v":1,"seq":{},"time_ms":1,"kind":"subgroup-result","characteristic":"bore","subgroup":{{"number":999,"time_ms":1,"n":3,"mean":null,"dispersion":null}},"readings":[],"partial":false,"violations":[]}}"#,
        last + 1
    );
    let mut frame = Vec::new();
    segment::encode(segment::TYPE_RECORD, poisoned.as_bytes(), &mut frame);
    use std::io::Write;
    std::fs::OpenOptions::new()
        .append(true)
        .open(&newest)
        .unwrap()
        .write_all(&frame)
        .unwrap();

    // Every reader: no problem, one unreadable record named.
    let v = reader::verify(&archive).unwrap();
    assert!(v.problems.is_empty(), "{:?}", v.problems);
    assert_eq!(v.unreadable.len(), 1, "{:?}", v.unreadable);
    assert!(v.unreadable[0].contains(&format!("record {}", last + 1)));
    let r = Reader::open(&archive).unwrap();
    let n = r
        .iter(&Filter::default())
        .inspect(|e| assert!(e.is_ok()))
        .count() as u64;
    assert_eq!(n, last);
    assert_eq!(r.unreadable(), [last + 1]);
    let (ok, out, err) = cli(&["archive", "verify", archive.to_str().unwrap()]);
    assert!(ok, "{out}{err}");
    assert!(
        out.contains("UNREADABLE") && out.contains("verified: no problems"),
        "{out}"
    );
    let (ok, out, err) = cli(&["archive", "export", archive.to_str().unwrap()]);
    assert!(ok, "{err}");
    assert_eq!(out.lines().count() as u64, last);
    assert!(err.contains("cannot read were skipped"), "{err}");

    // The daemon starts on it and writes after it; the records after it run on from it.
    let more: Vec<String> = (0..6)
        .map(|i| line(&mut t, "bore", 12.0 + 0.001 * (i % 3) as f64, None))
        .collect();
    std::fs::write(dir.path().join("feed.jsonl"), more.join("\n") + "\n").unwrap();
    let again = run_daemon(linewarden::config::load(&dir.path().join("cell.toml")).unwrap());
    assert_eq!(again.accepted, 6);
    assert!(again.last_seq > last + 1);
    let r = Reader::open(&archive).unwrap();
    let seqs: Vec<u64> = r.iter(&Filter::default()).map(|e| e.unwrap().seq).collect();
    assert!(!seqs.contains(&(last + 1)));
    assert_eq!(seqs.len() as u64, again.last_seq - 1);
    every_reader_reads(dir.path());
}

/// What was found while closing the above: the JSON reader rounded some doubles one unit in
/// the last place (12.001666666666663 read back as ...665), so the record did not hold exactly
/// what the gauge said. Every finite double, of every magnitude, reads back bit for bit,
/// through the reading decoder and through the general one.
#[test]
fn every_double_reads_back_from_the_archive_bit_for_bit() {
    use rand::{RngExt, SeedableRng};
    let dir = tempfile::tempdir().unwrap();
    let mut c = WriterConfig::new(dir.path());
    c.flush_interval_ms = 0;
    let (mut w, _) = Writer::open(c).unwrap();
    let mut rng = rand::rngs::StdRng::seed_from_u64(20261204);
    let mut sent = Vec::new();
    while sent.len() < 20_000 {
        let v = f64::from_bits(rng.random::<u64>());
        if !v.is_finite() {
            continue;
        }
        // Alternate any bit pattern with gauge-like decimals.
        let v = if sent.len() % 2 == 0 {
            v
        } else {
            12.0 + rng.random_range(-500_000..500_000) as f64 / 3e7
        };
        let record = Record::ReadingAccepted {
            source: "s".into(),
            characteristic: "bore".into(),
            value: v,
            unit: None,
            source_time_ms: None,
            source_time_ignored: false,
            arrival_ms: 0,
            part: None,
            source_key: None,
            word: None,
            inspected: Some(v.abs()),
        };
        w.append(&record, 0).unwrap();
        sent.push(v);
    }
    w.flush().unwrap();
    drop(w);
    let got: Vec<(f64, Option<f64>)> = Reader::open(dir.path())
        .unwrap()
        .iter(&Filter::default())
        .map(|e| match e.unwrap().record {
            Record::ReadingAccepted {
                value, inspected, ..
            } => (value, inspected),
            other => panic!("{other:?}"),
        })
        .collect();
    assert_eq!(got.len(), sent.len());
    for (v, (g, n)) in sent.iter().zip(&got) {
        assert_eq!(v.to_bits(), g.to_bits(), "{v:e} read back as {g:e}");
        assert_eq!(v.abs().to_bits(), n.unwrap().to_bits());
    }
}
