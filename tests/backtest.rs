//! Backtest on the demo's own archive: the running configuration reproduces exactly the
//! signals in the record; a candidate with other rules shows what it keeps, adds and drops.

use std::path::Path;

use linewarden::archive::reader::Reader;

mod common;
use common::peers::cli;

#[test]
fn the_running_configuration_reproduces_the_record_exactly() {
    let dir = tempfile::tempdir().unwrap();
    let cfg = common::demo_config(dir.path());
    common::run_daemon(cfg.clone());
    let reader = Reader::open(&dir.path().join("archive")).unwrap();
    let bt = linewarden::backtest::run(&cfg, &reader, &[], None, None).unwrap();
    assert_eq!(bt.characteristics.len(), 3);
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
    }
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
            "characteristic,rule,subgroup,first_reading_seq,time,in_record,in_candidate"
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
