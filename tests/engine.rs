//! The engine of a cell, driven as the daemon drives it: readings archived then accepted,
//! ticks, learning, and a restart rebuilt from the archive's tail.

use std::path::Path;

use linewarden::archive::record::{Envelope, Record, Tail};
use linewarden::config;
use linewarden::engine::{Engine, Incoming, Output};

mod common;

const T0: i64 = 1_796_112_000_000;

/// A tiny stand-in for the archive: numbers records and keeps the tail.
struct Log {
    seq: u64,
    tail: Tail,
    records: Vec<Envelope>,
}

impl Log {
    fn new() -> Self {
        Log {
            seq: 0,
            tail: Tail::new(30),
            records: Vec::new(),
        }
    }
    fn append(&mut self, r: Record) -> u64 {
        self.seq += 1;
        let e = Envelope {
            v: 1,
            seq: self.seq,
            time_ms: T0,
            record: r,
        };
        self.tail.apply(&e);
        self.records.push(e);
        self.seq
    }
}

/// Feeds one reading through check, archive and engine; returns the violations' rule ids.
fn feed(engine: &mut Engine, log: &mut Log, c: &str, v: f64, t: i64) -> Vec<String> {
    let inc = Incoming {
        source: "test".into(),
        characteristic: c.into(),
        value: v,
        unit: Some("mm".into()),
        source_time_ms: Some(t),
        source_time_ignored: false,
        arrival_ms: t,
        part: None,
        source_key: None,
    };
    if let Err(reason) = engine.check(&inc) {
        log.append(Record::ReadingRejected {
            source: inc.source.clone(),
            characteristic: Some(c.into()),
            raw: v.to_string(),
            reason,
            arrival_ms: t,
            source_key: None,
        });
        return vec!["rejected".into()];
    }
    let seq = log.append(inc.record());
    let mut fired = Vec::new();
    for o in engine.accept(seq, &inc) {
        match o {
            Output::Record(r) => {
                log.append(r);
            }
            Output::Violation { violation, .. } => fired.push(violation.rule),
            _ => {}
        }
    }
    fired
}

fn config_with_limits(dir: &Path) -> config::Config {
    std::fs::write(dir.join("bore.toml"), common::BORE_LIMITS).unwrap();
    let text = r#"
[daemon]
archive_dir = "archive"

[[characteristic]]
id = "bore"
unit = "mm"
limits = "bore.toml"
valid_min = 11.0
valid_max = 13.0
subgroup = { size = 4 }
spec = { lsl = 11.985, usl = 12.015 }
[characteristic.rules]
preset = "western-electric"
[[characteristic.rules.rule]]
kind = "outside-spec"
"#;
    let path = dir.join("cell.toml");
    std::fs::write(&path, text).unwrap();
    config::load(&path).unwrap()
}

#[test]
fn readings_form_subgroups_and_rules_fire() {
    let dir = tempfile::tempdir().unwrap();
    let cfg = config_with_limits(dir.path());
    let mut e = Engine::new(&cfg, T0);
    let mut log = Log::new();
    assert_eq!(feed(&mut e, &mut log, "bore", 20.0, T0), ["rejected"]);
    assert_eq!(feed(&mut e, &mut log, "nope", 12.0, T0), ["rejected"]);
    // A bad part is flagged at once.
    assert_eq!(feed(&mut e, &mut log, "bore", 12.016, T0), ["outside-spec"]);
    for i in 1..4 {
        feed(&mut e, &mut log, "bore", 12.0, T0 + i);
    }
    // One subgroup far above the UCL: the mean of 4 readings at 12.008.
    let mut fired = Vec::new();
    for i in 0..4 {
        fired.extend(feed(&mut e, &mut log, "bore", 12.008, T0 + 10 + i));
    }
    assert_eq!(fired, ["beyond-limits"]);
    let results: Vec<&Envelope> = log
        .records
        .iter()
        .filter(|r| matches!(r.record, Record::SubgroupResult { .. }))
        .collect();
    assert_eq!(results.len(), 2);
    if let Record::SubgroupResult {
        readings,
        violations,
        subgroup,
        ..
    } = &results[1].record
    {
        assert_eq!(readings.len(), 4);
        assert_eq!(subgroup.number, 2);
        assert!(
            violations[0].message.starts_with(
                "subgroup mean 12.0080 mm is above the upper control limit 12.0060 mm"
            ),
            "{}",
            violations[0].message
        );
    }
}

#[test]
fn a_run_that_starts_before_a_restart_fires_after_it() {
    let dir = tempfile::tempdir().unwrap();
    let cfg = config_with_limits(dir.path());
    let mut e = Engine::new(&cfg, T0);
    let mut log = Log::new();
    // 7 subgroups a little above the centre (inside all other rules), then a restart.
    let mut t = T0;
    for _ in 0..7 {
        for v in [12.0005, 12.0010, 12.0008, 12.0003] {
            t += 1000;
            assert!(feed(&mut e, &mut log, "bore", v, t).is_empty());
        }
    }
    // Two readings of the 8th subgroup arrive before the restart.
    feed(&mut e, &mut log, "bore", 12.0006, t + 1);
    feed(&mut e, &mut log, "bore", 12.0009, t + 2);
    drop(e);
    let mut e = Engine::new(&cfg, t + 10);
    let logs = e.restore(&log.tail);
    assert!(logs.iter().any(|o| matches!(o, Output::Log { message, .. } if message.contains("resumed at subgroup 7 with 2 reading(s) waiting"))), "{logs:?}");
    feed(&mut e, &mut log, "bore", 12.0004, t + 20);
    let fired = feed(&mut e, &mut log, "bore", 12.0007, t + 21);
    assert_eq!(fired, ["one-side-run"], "8 in a row across the restart");
}

#[test]
fn a_characteristic_without_limits_learns_them() {
    let dir = tempfile::tempdir().unwrap();
    let text = r#"
[daemon]
archive_dir = "archive"
[[characteristic]]
id = "face"
unit = "mm"
limits = "face.toml"
subgroup = { size = 3 }
learning = { subgroups = 20 }
[characteristic.rules]
preset = "nelson"
"#;
    let path = dir.path().join("cell.toml");
    std::fs::write(&path, text).unwrap();
    let cfg = config::load(&path).unwrap();
    let mut e = Engine::new(&cfg, T0);
    assert_eq!(e.characteristics(), [("face".to_string(), true)]);
    let mut log = Log::new();
    let mut outputs = Vec::new();
    let mut x = 0.37f64;
    for i in 0..60 {
        x = (x * 3.7 + 0.11).fract(); // deterministic spread
        let inc = Incoming {
            source: "t".into(),
            characteristic: "face".into(),
            value: 5.0 + x * 0.01,
            unit: None,
            source_time_ms: Some(T0 + i),
            source_time_ignored: false,
            arrival_ms: T0 + i,
            part: None,
            source_key: None,
        };
        let seq = log.append(inc.record());
        outputs.extend(e.accept(seq, &inc));
    }
    let learned = outputs.iter().find_map(|o| match o {
        Output::WriteLimits { path, limits } => Some((path.clone(), limits.clone())),
        _ => None,
    });
    let (p, limits) = learned.expect("limits are learned after 20 subgroups");
    assert_eq!(p, dir.path().join("face.toml"));
    assert_eq!(limits.provenance.source, "learning");
    assert_eq!(limits.provenance.subgroups_total, 20);
    assert!(
        outputs
            .iter()
            .any(|o| matches!(o, Output::Record(Record::LimitsInstalled { .. })))
    );
    assert_eq!(e.characteristics(), [("face".to_string(), false)]);

    // The limits file was never written (as when its directory is read-only): a restart
    // installs the learned limits from the archive instead of learning again, and tries to
    // write the file once more.
    for o in &outputs {
        if let Output::Record(r) = o {
            log.append(r.clone());
        }
    }
    assert!(!dir.path().join("face.toml").exists());
    let mut again = Engine::new(&cfg, T0 + 1000);
    assert_eq!(again.characteristics(), [("face".to_string(), true)]);
    let restored = again.restore(&log.tail);
    assert_eq!(again.characteristics(), [("face".to_string(), false)]);
    assert!(
        restored
            .iter()
            .any(|o| matches!(o, Output::WriteLimits { .. }))
    );
    assert!(
        restored
            .iter()
            .any(|o| matches!(o, Output::Log { message, .. }
        if message.contains("from the archive") && message.contains("face.toml")))
    );
    // Pointed at a new file name, the characteristic learns afresh.
    std::fs::write(&path, text.replace("face.toml", "face-2.toml")).unwrap();
    let renamed = config::load(&path).unwrap();
    let mut fresh = Engine::new(&renamed, T0 + 2000);
    fresh.restore(&log.tail);
    assert_eq!(fresh.characteristics(), [("face".to_string(), true)]);
}
