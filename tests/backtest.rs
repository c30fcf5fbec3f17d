//! Backtest on the demo's own archive: the running configuration reproduces exactly the
//! signals in the record; a candidate with other rules shows what it keeps, adds and drops.

use std::path::Path;

use linewarden::archive::reader::Reader;
use linewarden::archive::record::Record;
use linewarden::archive::writer::{Writer, WriterConfig};
use linewarden::backtest::SignalLevel;
use linewarden::engine::{Engine, Incoming, Output};

mod common;
use common::peers::cli;

#[test]
fn the_running_configuration_reproduces_the_record_exactly() {
    let dir = tempfile::tempdir().unwrap();
    let cfg = common::demo_config(dir.path());
    common::run_daemon(cfg.clone());
    let reader = Reader::open(&dir.path().join("archive")).unwrap();
    let bt = linewarden::backtest::run(&cfg, &reader, &[], None, None).unwrap();
    assert_eq!(bt.characteristics.len(), 4);
    let mut signals = 0;
    for c in &bt.characteristics {
        assert!(c.subgroups > 0, "{}", c.id);
        assert_eq!(c.subgroups, c.record_subgroups, "{}", c.id);
        assert_eq!(c.rejected_by_candidate, 0, "{}", c.id);
        for r in &c.rules {
            assert_eq!(
                (r.candidate_signals, r.new, r.gone),
                (r.record_signals, 0, 0),
                "{} {}",
                c.id,
                r.rule
            );
            signals += r.record_signals;
        }
        assert_eq!(c.alerts.record, c.alerts.candidate, "{}", c.id);
    }
    assert_eq!(bt.alerts.record, bt.alerts.candidate);
    assert!(bt.alerts.record.stops > 0, "{:?}", bt.alerts);
    let bore = &bt.characteristics[0];
    assert!(
        bore.rules
            .iter()
            .any(|r| r.rule == "outside-spec" && r.level == SignalLevel::Reading),
        "the bore's reading rules are compared too"
    );
    assert!(signals > 50, "the demo's bore signals: {signals}");
    assert!(bt.signals.iter().all(|s| s.in_record && s.in_candidate));
}

#[test]
fn a_candidate_is_compared_with_the_record_rule_by_rule() {
    let dir = tempfile::tempdir().unwrap();
    common::run_daemon(common::demo_config(dir.path()));
    let root = Path::new(env!("CARGO_MANIFEST_DIR"));
    let archive = dir.path().join("archive");
    let candidate = root.join("config/demo-candidate.toml");
    let csv = dir.path().join("signals.csv");
    let (ok, out, err) = cli(&[
        "backtest",
        "--archive",
        archive.to_str().unwrap(),
        "--config",
        candidate.to_str().unwrap(),
        "--characteristic",
        "vb210-bore",
        "--json",
        "--signals",
        csv.to_str().unwrap(),
    ]);
    assert!(ok, "{err}");
    let v: serde_json::Value = serde_json::from_str(&out).unwrap();
    let c = &v["characteristics"][0];
    assert_eq!(c["id"], "vb210-bore");
    assert_eq!(
        c["rejected_in_record"], 2,
        "the two unreadable gauge outputs stay rejected"
    );
    let rule = |id: &str| {
        c["rules"]
            .as_array()
            .unwrap()
            .iter()
            .find(|r| r["rule"] == id)
            .unwrap_or_else(|| panic!("no rule {id} in {c}"))
            .clone()
    };
    // The same stored limits: beyond-limits signals on the same subgroups.
    let b = rule("beyond-limits");
    assert_eq!(b["candidate_signals"], b["record_signals"]);
    assert_eq!((b["new"].as_u64(), b["gone"].as_u64()), (Some(0), Some(0)));
    // The EWMA is new: every one of its signals is new, and it has a theoretical rate.
    let e = rule("ewma");
    assert_eq!(e["record_signals"], 0);
    assert!(e["new"].as_u64().unwrap() > 0);
    let theory = e["theoretical_per_1000"].as_f64().unwrap();
    assert!(
        (1.0..4.0).contains(&theory),
        "EWMA λ 0.2, L 2.962: ARL0 about 500 → {theory}"
    );
    for key in [
        "record_signals",
        "candidate_signals",
        "kept",
        "new",
        "gone",
        "per_1000_subgroups",
    ] {
        assert!(e.get(key).is_some(), "{key}");
    }
    let rows = std::fs::read_to_string(&csv).unwrap();
    assert!(
        rows.starts_with(
            "characteristic,rule,level,subgroup,reading_seq,time,in_record,in_candidate"
        )
    );
    assert!(
        rows.lines()
            .any(|l| l.starts_with("vb210-bore,ewma,") && l.ends_with(",false,true"))
    );

    // Bad requests: a characteristic the candidate lacks, an empty window, a bad config.
    for (args, want) in [
        (
            vec!["--characteristic", "vb210-bor"],
            "--characteristic \"vb210-bor\" is not in the candidate config",
        ),
        (
            vec!["--since", "2100-01-01T00:00:00Z"],
            "no accepted readings of",
        ),
    ] {
        let mut all = vec![
            "backtest",
            "--archive",
            archive.to_str().unwrap(),
            "--config",
            candidate.to_str().unwrap(),
        ];
        all.extend(args.iter().copied());
        let (ok, _, err) = cli(&all);
        assert!(!ok && err.contains(want), "{args:?}: {err}");
    }
    let bad = dir.path().join("bad.toml");
    std::fs::write(&bad, "[daemon]\narchive_dir = \"a\"\nflush_ms = 3\n").unwrap();
    let (ok, _, err) = cli(&[
        "backtest",
        "--archive",
        archive.to_str().unwrap(),
        "--config",
        bad.to_str().unwrap(),
    ]);
    assert!(
        !ok && err.contains("unknown field `flush_ms`") && err.contains("no [[characteristic]]"),
        "{err}"
    );
}

/// One step of a recorded feed: a reading arriving, or a technician acknowledging.
enum Step {
    Reading(i64, f64),
    Ack(i64),
}

/// Records `feed` as the daemon does: each reading archived, then handed to the engine, whose
/// records are archived after it; the one-second tick on the readings' clock; acknowledgements
/// through the engine.
fn record(cfg: &linewarden::config::Config, feed: &[Step]) {
    let (mut w, _) = Writer::open(WriterConfig::new(&cfg.archive_dir)).unwrap();
    let mut engine = Engine::new(cfg, 0);
    let mut next_tick = i64::MIN;
    let put = |w: &mut Writer, outs: Vec<Output>, t: i64| {
        for o in outs {
            if let Output::Record(r) = o {
                w.append(&r, t).unwrap();
            }
        }
    };
    for step in feed {
        match *step {
            Step::Reading(t, value) => {
                if t >= next_tick {
                    let outs = engine.tick(t);
                    put(&mut w, outs, t);
                    next_tick = t + 1000;
                }
                let inc = Incoming {
                    source: "bench-gauge".into(),
                    characteristic: "bore".into(),
                    value,
                    unit: Some("mm".into()),
                    source_time_ms: None,
                    source_time_ignored: false,
                    arrival_ms: t,
                    part: None,
                    source_key: None,
                    word: None,
                    inspected: None,
                    sent: None,
                };
                engine.check(&inc).unwrap();
                let seq = w.append(&inc.record(), t).unwrap();
                let outs = engine.accept(seq, &inc);
                put(&mut w, outs, t);
            }
            Step::Ack(t) => {
                let (_, outs) = engine
                    .acknowledge("bore", "Rhea Tamsin (test)", Some("insert changed"), t)
                    .unwrap();
                put(&mut w, outs, t);
            }
        }
    }
    w.flush().unwrap();
}

const BORE_CONFIG: &str = r#"
[daemon]
archive_dir = "archive"

[[characteristic]]
id = "bore"
unit = "mm"
limits = "bore-limits.toml"
subgroup = { size = 4 }
spec = { lsl = 11.985, usl = 12.015 }

[characteristic.rules]
preset = "western-electric"

[[characteristic.rules.rule]]
kind = "outside-spec"

[[characteristic.rules.rule]]
kind = "stuck-gauge"
repeats = 6
"#;

/// In control, then the bore shifts up (a stop alert), a technician acknowledges and corrects
/// it, a gauge sticks, and one reading is outside the specification.
fn bore_feed() -> (Vec<Step>, [i64; 2]) {
    let mut feed = Vec::new();
    let mut t = 1_800_000_000_000i64;
    // A fixed in-control pattern within ±0.003 mm of the centre.
    let wobble = [
        0.0012, -0.0021, 0.0004, -0.0008, 0.0025, -0.0013, 0.0, 0.0017, -0.0027, 0.0009,
    ];
    for i in 0..40 {
        feed.push(Step::Reading(t, 12.0 + wobble[i % 10]));
        t += 30_000;
    }
    for i in 0..8 {
        feed.push(Step::Reading(t, 12.009 + wobble[i % 10] / 3.0));
        t += 30_000;
    }
    let ack = t + 600_000;
    feed.push(Step::Ack(ack));
    t = ack + 60_000;
    for i in 0..40 {
        let v = match i {
            12..=17 => 12.0011, // the gauge sticks
            25 => 12.0162,      // one part outside the specification
            _ => 12.0 + wobble[i % 10],
        };
        feed.push(Step::Reading(t, v));
        t += 30_000;
    }
    let second = t + 120_000;
    feed.push(Step::Ack(second));
    feed.push(Step::Reading(second + 30_000, 12.0));
    (feed, [ack, second])
}

#[test]
fn acknowledgements_in_the_record_are_replayed_for_the_candidate() {
    let dir = tempfile::tempdir().unwrap();
    std::fs::write(dir.path().join("bore-limits.toml"), common::BORE_LIMITS).unwrap();
    let path = dir.path().join("bore.toml");
    std::fs::write(&path, BORE_CONFIG).unwrap();
    let cfg = linewarden::config::load(&path).unwrap();
    let (feed, ack) = bore_feed();
    record(&cfg, &feed);
    let reader = Reader::open(&cfg.archive_dir).unwrap();

    // The record's story, read back: two stop alerts (the shift, the part outside the
    // specification), each acknowledged.
    let raised = reader
        .iter(&Default::default())
        .filter_map(|e| match e.unwrap().record {
            Record::Alert {
                event:
                    linewarden::alerts::AlertEvent::Raised {
                        severity: linewarden::rules::Severity::Stop,
                        at_ms,
                        ..
                    },
                ..
            } => Some(at_ms),
            _ => None,
        })
        .collect::<Vec<_>>();
    assert_eq!(raised.len(), 2, "two stop alerts in the record: {raised:?}");

    // The same configuration: the same signals at both levels, and the same red time, each
    // stretch ending with an acknowledgement.
    let bt = linewarden::backtest::run(&cfg, &reader, &[], None, None).unwrap();
    let c = &bt.characteristics[0];
    for r in &c.rules {
        assert_eq!((r.new, r.gone), (0, 0), "{}", r.rule);
    }
    let signals = |rule: &str| c.rules.iter().find(|r| r.rule == rule).unwrap().clone();
    assert_eq!(signals("outside-spec").record_signals, 1);
    assert_eq!(signals("outside-spec").level, SignalLevel::Reading);
    assert!(signals("stuck-gauge").record_signals >= 1);
    assert_eq!(c.alerts.record, c.alerts.candidate);
    assert_eq!(c.alerts.record.stops, 2);
    assert_eq!(c.alerts.record.red_episodes, 2);
    assert_eq!(
        c.alerts.record.red_ms,
        (ack[0] - raised[0]) + (ack[1] - raised[1])
    );
    assert!(c.alerts.record.red_share > 0.0 && c.alerts.record.red_share < 0.5);

    // A candidate without the cluster and run rules, whose beyond-limits only warns: the
    // technicians' acknowledgements are still replayed: red only for the part outside the
    // specification, until the second acknowledgement.
    let candidate = BORE_CONFIG.replace(
        "preset = \"western-electric\"",
        "[[characteristic.rules.rule]]\nkind = \"beyond-limits\"\nseverity = \"warn\"",
    );
    let cpath = dir.path().join("candidate.toml");
    std::fs::write(&cpath, candidate).unwrap();
    let ccfg = linewarden::config::load(&cpath).unwrap();
    let bt = linewarden::backtest::run(&ccfg, &reader, &[], None, None).unwrap();
    let c = &bt.characteristics[0];
    assert_eq!(c.alerts.candidate.stops, 1, "{:?}", c.alerts);
    assert!(c.alerts.candidate.warnings >= 1);
    assert_eq!(c.alerts.candidate.red_ms, ack[1] - raised[1]);
    assert_eq!(c.alerts.record.stops, 2);
    assert_eq!(bt.alerts.candidate, c.alerts.candidate);
    let gone: u64 = c.rules.iter().map(|r| r.gone).sum();
    assert!(
        gone > 0,
        "the record's run and cluster signals are gone: {:?}",
        c.rules
    );
    assert_eq!(signals("outside-spec").kept, 1);
}

#[test]
fn a_named_characteristic_with_no_readings_in_the_window_is_an_error() {
    let dir = tempfile::tempdir().unwrap();
    std::fs::write(dir.path().join("bore-limits.toml"), common::BORE_LIMITS).unwrap();
    let path = dir.path().join("bore.toml");
    let two = format!(
        "{BORE_CONFIG}\n[[characteristic]]\nid = \"face\"\nunit = \"mm\"\nsubgroup = {{ size = 1 }}\nlearning = {{ subgroups = 20 }}\n"
    );
    std::fs::write(&path, two).unwrap();
    let cfg = linewarden::config::load(&path).unwrap();
    record(&cfg, &bore_feed().0);
    let reader = Reader::open(&cfg.archive_dir).unwrap();
    let err = linewarden::backtest::run(&cfg, &reader, &[], None, None)
        .unwrap_err()
        .to_string();
    assert!(
        err.contains("no accepted readings of face") && err.contains("--characteristic"),
        "{err}"
    );
    let bt = linewarden::backtest::run(&cfg, &reader, &["bore".into()], None, None).unwrap();
    assert_eq!(bt.characteristics.len(), 1);
}

#[test]
fn a_damaged_archive_stops_the_backtest_with_the_place_named() {
    let dir = tempfile::tempdir().unwrap();
    std::fs::write(dir.path().join("bore-limits.toml"), common::BORE_LIMITS).unwrap();
    let path = dir.path().join("bore.toml");
    std::fs::write(&path, BORE_CONFIG).unwrap();
    let cfg = linewarden::config::load(&path).unwrap();
    record(&cfg, &bore_feed().0);
    let segment = std::fs::read_dir(&cfg.archive_dir)
        .unwrap()
        .map(|e| e.unwrap().path())
        .find(|p| p.extension().is_some_and(|x| x == "lwseg"))
        .unwrap();
    let mut bytes = std::fs::read(&segment).unwrap();
    let middle = bytes.len() / 2;
    for b in &mut bytes[middle..middle + 8] {
        *b ^= 0x5a;
    }
    std::fs::write(&segment, bytes).unwrap();
    let (ok, out, err) = cli(&[
        "backtest",
        "--archive",
        cfg.archive_dir.to_str().unwrap(),
        "--config",
        path.to_str().unwrap(),
    ]);
    let name = segment.file_name().unwrap().to_str().unwrap();
    assert!(!ok && err.contains(name), "{out}\n{err}");
}
