//! The command line, run as a user runs it: the built binary on real files.

use std::path::Path;
use std::process::{Command, Output};

use linewarden::limits_file::StoredLimits;

fn run(args: &[&str]) -> Output {
    Command::new(env!("CARGO_BIN_EXE_linewarden"))
        .args(args)
        .current_dir(env!("CARGO_MANIFEST_DIR"))
        .output()
        .expect("the binary runs")
}

fn stderr(o: &Output) -> String {
    String::from_utf8_lossy(&o.stderr).into_owned()
}

fn stdout(o: &Output) -> String {
    String::from_utf8_lossy(&o.stdout).into_owned()
}

fn write(dir: &Path, name: &str, text: &str) -> String {
    let p = dir.join(name);
    std::fs::write(&p, text).unwrap();
    p.display().to_string()
}

const DEMO: &str = "demo-feeds/vb210-bore-baseline.csv";

#[test]
fn demo_baseline_report_and_json_keys() {
    let o = run(&[
        "limits",
        "--input",
        DEMO,
        "--lsl",
        "11.985",
        "--usl",
        "12.015",
        "--auto-exclude",
    ]);
    assert!(o.status.success(), "{}", stderr(&o));
    let text = stdout(&o);
    assert!(
        text.contains("Baseline study: X̄-R chart, subgroups of 5"),
        "{text}"
    );
    assert!(
        text.contains("#9"),
        "subgroup 9 (the insert change) is excluded: {text}"
    );

    let o = run(&[
        "limits",
        "--input",
        DEMO,
        "--lsl",
        "11.985",
        "--usl",
        "12.015",
        "--target",
        "12",
        "--auto-exclude",
        "--json",
    ]);
    assert!(o.status.success(), "{}", stderr(&o));
    let v: serde_json::Value = serde_json::from_slice(&o.stdout).unwrap();
    for key in [
        "chart",
        "subgroup_size",
        "subgroups_total",
        "subgroups_used",
        "excluded",
        "sigma_within",
        "sigma_overall",
        "location",
        "dispersion",
        "capability",
    ] {
        assert!(v.get(key).is_some(), "missing key {key}");
    }
    assert_eq!(v["chart"], "xbar-r");
    assert_eq!(v["subgroup_size"], 5);
    assert_eq!(v["subgroups_total"], 25);
    assert_eq!(v["excluded"][0]["subgroup"], 9);
    assert!(
        v["excluded"][0]["reason"]
            .as_str()
            .unwrap()
            .contains("above the upper control limit")
    );
    for key in ["center", "ucl", "lcl"] {
        assert!(v["location"][key].is_f64());
    }
    assert_eq!(v["dispersion"]["kind"], "range");
    let cap = &v["capability"];
    for key in ["cp", "cpk", "pp", "ppk", "cpm", "ppm_below", "ppm_above"] {
        assert!(cap[key].is_f64(), "capability.{key} = {}", cap[key]);
    }
    assert_eq!(cap["cp_ci95"].as_array().unwrap().len(), 2);
    assert_eq!(cap["cpk_ci95"].as_array().unwrap().len(), 2);
    let without_specs = run(&["limits", "--input", DEMO, "--json"]);
    let v: serde_json::Value = serde_json::from_slice(&without_specs.stdout).unwrap();
    assert!(v["capability"].is_null());
}

#[test]
fn write_stores_limits_that_load_back() {
    let dir = tempfile::tempdir().unwrap();
    let out = dir.path().join("bore.toml");
    let o = run(&[
        "limits",
        "--input",
        DEMO,
        "--auto-exclude",
        "--lsl",
        "11.985",
        "--usl",
        "12.015",
        "--write",
        out.to_str().unwrap(),
        "--characteristic",
        "vb210-bore",
        "--unit",
        "mm",
        "--json",
    ]);
    assert!(o.status.success(), "{}", stderr(&o));
    let v: serde_json::Value = serde_json::from_slice(&o.stdout).unwrap();
    let stored = StoredLimits::load(&out).unwrap();
    assert_eq!(stored.characteristic, "vb210-bore");
    assert_eq!(stored.subgroup_size, 5);
    assert_eq!(stored.provenance.subgroups_used, 24);
    assert_eq!(stored.provenance.used, "1-8, 10-25");
    assert_eq!(stored.provenance.excluded[0].subgroup, 9);
    let ucl = v["location"]["ucl"].as_f64().unwrap();
    assert!((stored.location.ucl - ucl).abs() < 1e-9 * ucl);
    assert_eq!(stored.spec.unwrap().usl, Some(12.015));
}

#[test]
fn long_and_single_layouts_give_the_same_study_as_wide() {
    let dir = tempfile::tempdir().unwrap();
    let wide = write(
        dir.path(),
        "w.csv",
        "a,b,c\n1.0,1.2,0.9\n1.1,1.3,1.0\n0.9,1.0,1.2\n",
    );
    let long = write(
        dir.path(),
        "l.csv",
        "part,lot,diameter\np1,L1,1.0\np2,L1,1.2\np3,L1,0.9\np4,L2,1.1\np5,L2,1.3\np6,L2,1.0\np7,L3,0.9\np8,L3,1.0\np9,L3,1.2\n",
    );
    let single = write(
        dir.path(),
        "s.csv",
        "1.0\n1.2\n0.9\n1.1\n1.3\n1.0\n0.9\n1.0\n1.2\n",
    );
    let get = |args: &[&str]| {
        let o = run(args);
        assert!(o.status.success(), "{}", stderr(&o));
        let v: serde_json::Value = serde_json::from_slice(&o.stdout).unwrap();
        v["location"]["ucl"].as_f64().unwrap()
    };
    let a = get(&["limits", "--input", &wide, "--json"]);
    let b = get(&[
        "limits",
        "--input",
        &long,
        "--layout",
        "long",
        "--subgroup-column",
        "lot",
        "--value-column",
        "diameter",
        "--json",
    ]);
    let c = get(&[
        "limits",
        "--input",
        &single,
        "--layout",
        "single",
        "--subgroup-size",
        "3",
        "--json",
    ]);
    assert!(
        (a - b).abs() < 1e-12 && (a - c).abs() < 1e-12,
        "{a} {b} {c}"
    );
}

#[test]
fn few_subgroups_is_a_warning_not_an_error() {
    let dir = tempfile::tempdir().unwrap();
    let f = write(dir.path(), "few.csv", "1.0,1.2\n1.1,1.4\n0.9,1.0\n");
    let o = run(&["limits", "--input", &f]);
    assert!(o.status.success());
    assert!(
        stdout(&o).contains("only 3 subgroups are left"),
        "{}",
        stdout(&o)
    );
}

/// Each bad input names where it came from and what was found, and exits non-zero.
#[test]
fn bad_input_is_named_precisely() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let cases: Vec<(Vec<String>, String)> = vec![
        (
            vec![
                "--input".into(),
                write(d, "text.csv", "r1,r2\n1.0,1.1\n1.2,abc\n"),
            ],
            "text.csv:3:2: \"abc\" is not a number (column \"r2\")".into(),
        ),
        (
            vec!["--input".into(), write(d, "nan.csv", "1.0,1.1\nNaN,1.0\n")],
            "nan.csv:2:1: \"NaN\" is not a finite reading".into(),
        ),
        (
            vec!["--input".into(), write(d, "inf.csv", "1.0,1.1\n1.0,inf\n")],
            "inf.csv:2:2: \"inf\" is not a finite reading".into(),
        ),
        (
            vec!["--input".into(), write(d, "empty.csv", "1.0,1.1\n1.0,\n")],
            "empty.csv:2:2: an empty cell is not a number".into(),
        ),
        (
            vec![
                "--input".into(),
                write(d, "ragged.csv", "1.0,1.1,1.2\n1.0,1.1\n"),
            ],
            "ragged.csv:2: the row has 2 fields but the first row has 3".into(),
        ),
        (
            vec![
                "--input".into(),
                write(
                    d,
                    "one.csv",
                    "subgroup,value\n1,1.0\n1,1.2\n2,1.1\n3,0.9\n3,1.0\n",
                ),
                "--layout".into(),
                "long".into(),
                "--chart".into(),
                "xbar-r".into(),
            ],
            "subgroup 2 has 1 reading(s); the xbar-r chart needs at least 2 per subgroup".into(),
        ),
        (
            vec![
                "--input".into(),
                write(d, "flat.csv", "1.0,1.0\n1.5,1.5\n1.2,1.2\n"),
            ],
            "the gauge resolution is too coarse".into(),
        ),
        (
            vec![
                "--input".into(),
                DEMO.into(),
                "--lsl".into(),
                "12.1".into(),
                "--usl".into(),
                "11.9".into(),
            ],
            "--lsl 12.1 must be below --usl 11.9".into(),
        ),
        (
            vec![
                "--input".into(),
                write(d, "cols.csv", "a,b\n1,2\n"),
                "--value-column".into(),
                "c".into(),
            ],
            "cols.csv: no column named \"c\" (the header has: a, b)".into(),
        ),
        (
            vec![
                "--input".into(),
                DEMO.into(),
                "--exclude".into(),
                "26".into(),
            ],
            "subgroup 26 is not in the data (subgroups are numbered 1 to 25)".into(),
        ),
        (
            vec![
                "--input".into(),
                d.join("missing.csv").display().to_string(),
            ],
            "cannot read input file".into(),
        ),
    ];
    for (args, expected) in cases {
        let mut all = vec!["limits".to_string()];
        all.extend(args);
        let refs: Vec<&str> = all.iter().map(String::as_str).collect();
        let o = run(&refs);
        assert!(!o.status.success(), "{refs:?} should fail");
        let err = stderr(&o);
        assert!(
            err.contains(&expected),
            "{refs:?}\nexpected: {expected}\ngot: {err}"
        );
        assert!(err.starts_with("error: "), "{err}");
    }
}

#[test]
fn capability_command_reports_indices_and_verdict() {
    let o = run(&[
        "capability",
        "--input",
        DEMO,
        "--lsl",
        "11.985",
        "--usl",
        "12.015",
        "--exclude",
        "9",
    ]);
    assert!(o.status.success(), "{}", stderr(&o));
    let text = stdout(&o);
    for needle in [
        "Cp ",
        "Cpk ",
        "Pp ",
        "Ppk ",
        "95% CI",
        "Anderson–Darling",
        "verdict:",
    ] {
        assert!(text.contains(needle), "missing {needle}: {text}");
    }
    let o = run(&["capability", "--input", DEMO, "--usl", "12.015", "--json"]);
    assert!(o.status.success(), "{}", stderr(&o));
    let v: serde_json::Value = serde_json::from_slice(&o.stdout).unwrap();
    assert!(v["cp"].is_null(), "one-sided spec has no Cp");
    assert!(v["cpk"].is_f64() && v["ppm_above"].is_f64() && v["ppm_below"].is_null());
    let o = run(&["capability", "--input", DEMO]);
    assert!(!o.status.success());
    assert!(stderr(&o).contains("capability needs --lsl and/or --usl"));
}

#[test]
fn arl_command_reports_markov_results_and_time_in_words() {
    let o = run(&[
        "arl",
        "--preset",
        "western-electric",
        "--shift",
        "0,1",
        "--interval",
        "1h",
        "--json",
    ]);
    assert!(o.status.success(), "{}", stderr(&o));
    let v: serde_json::Value = serde_json::from_slice(&o.stdout).unwrap();
    assert_eq!(v["rules"].as_array().unwrap().len(), 4);
    assert_eq!(v["rules"][3]["id"], "one-side-run");
    assert_eq!(v["rules"][3]["length"], 8);
    let r0 = &v["results"][0];
    assert_eq!(r0["shift"], 0.0);
    assert_eq!(r0["method"], "markov");
    // Champ and Woodall (1987): 91.75.
    assert!((r0["arl"].as_f64().unwrap() - 91.75).abs() < 0.01);
    assert!((r0["time_to_signal_s"].as_f64().unwrap() - 91.75 * 3600.0).abs() < 50.0);
    let o = run(&[
        "arl",
        "--preset",
        "western-electric",
        "--shift",
        "0",
        "--interval",
        "1h",
    ]);
    let text = stdout(&o);
    assert!(text.contains("one false alarm every 3.82 days"), "{text}");
}

#[test]
fn arl_with_a_rules_file_and_bad_rules() {
    let dir = tempfile::tempdir().unwrap();
    let good = write(
        dir.path(),
        "ewma.toml",
        "[rules]\n[[rules.rule]]\nkind = \"ewma\"\nlambda = 0.2\nwidth = 2.962\n",
    );
    let o = run(&["arl", "--rules", &good, "--shift", "0", "--json"]);
    assert!(o.status.success(), "{}", stderr(&o));
    let v: serde_json::Value = serde_json::from_slice(&o.stdout).unwrap();
    assert_eq!(v["results"][0]["method"], "integral-equation");
    // Lucas and Saccucci (1990): about 500.
    assert!((v["results"][0]["arl"].as_f64().unwrap() - 500.0).abs() < 5.0);
    let bad = write(
        dir.path(),
        "bad.toml",
        "[rules]\n[[rules.rule]]\nkind = \"cusum\"\nk = 0.5\n",
    );
    let o = run(&["arl", "--rules", &bad]);
    assert!(!o.status.success());
    assert!(
        stderr(&o).contains("bad.toml:2:1: rules.rule[0]: kind = \"cusum\" needs h"),
        "{}",
        stderr(&o)
    );
    let o = run(&["arl"]);
    assert!(stderr(&o).contains("give --preset NAME and/or --rules FILE"));
}

fn small_archive(dir: &Path) {
    use linewarden::archive::Record;
    use linewarden::archive::writer::{Writer, WriterConfig};
    let mut cfg = WriterConfig::new(dir);
    cfg.max_segment_bytes = 2048;
    let (mut w, _) = Writer::open(cfg).unwrap();
    let t0 = 1_796_112_000_000; // 2026-12-01T08:00:00Z
    for i in 0..40i64 {
        w.append(
            &Record::ReadingAccepted {
                source: "gauge-1".into(),
                characteristic: if i % 2 == 0 {
                    "bore".into()
                } else {
                    "face".into()
                },
                value: 12.0 + i as f64 / 1000.0,
                unit: Some("mm".into()),
                source_time_ms: None,
                source_time_ignored: false,
                arrival_ms: t0 + i * 60_000,
                part: Some(format!("p{i}")),
                source_key: None,
                word: None,
                inspected: None,
            },
            t0 + i * 60_000,
        )
        .unwrap();
    }
    w.append(
        &Record::ReadingRejected {
            source: "gauge-1".into(),
            characteristic: None,
            raw: "12,0O4".into(),
            reason: "not a number".into(),
            arrival_ms: t0,
            source_key: None,
        },
        t0 + 40 * 60_000,
    )
    .unwrap();
    w.flush().unwrap();
}

#[test]
fn archive_verify_export_and_stats() {
    let dir = tempfile::tempdir().unwrap();
    let a = dir.path().join("archive");
    small_archive(&a);
    let d = a.to_str().unwrap();
    let o = run(&["archive", "verify", d]);
    assert!(o.status.success(), "{}{}", stdout(&o), stderr(&o));
    assert!(stdout(&o).contains("verified: no problems"));

    let o = run(&[
        "archive",
        "export",
        d,
        "--format",
        "csv",
        "--characteristic",
        "bore",
        "--since",
        "2026-12-01T08:10:00Z",
        "--until",
        "2026-12-01T08:20:00Z",
    ]);
    assert!(o.status.success(), "{}", stderr(&o));
    let text = stdout(&o);
    let lines: Vec<&str> = text.lines().collect();
    assert_eq!(
        lines[0],
        "seq,time,kind,characteristic,value,unit,source,part,subgroup,n,spread,lcl,center,ucl,verdict,alert,event,rule,severity,detail"
    );
    assert_eq!(lines.len(), 1 + 5, "{text}"); // minutes 10, 12, 14, 16, 18
    assert!(
        lines[1].contains("2026-12-01T08:10:00.000Z,reading-accepted,bore,12.01,mm,gauge-1,p10"),
        "{text}"
    );

    let o = run(&["archive", "export", d, "--kind", "reading-rejected"]);
    let v: serde_json::Value = serde_json::from_str(stdout(&o).lines().next().unwrap()).unwrap();
    assert_eq!(v["kind"], "reading-rejected");
    assert_eq!(v["raw"], "12,0O4");

    let o = run(&["archive", "stats", d, "--json"]);
    let v: serde_json::Value = serde_json::from_slice(&o.stdout).unwrap();
    assert_eq!(v["by_kind"]["reading-accepted"], 40);
    assert_eq!(v["by_characteristic"]["bore"], 20);
    assert!(v["segments"].as_u64().unwrap() > 1);

    // Tamper with a sealed segment: verify fails and says where.
    let seg = linewarden::archive::segment::list(&a).unwrap()[0].2.clone();
    let mut bytes = std::fs::read(&seg).unwrap();
    let n = bytes.len();
    bytes[n / 2] ^= 0x20;
    std::fs::write(&seg, bytes).unwrap();
    let o = run(&["archive", "verify", d]);
    assert!(!o.status.success());
    assert!(
        stdout(&o).contains("PROBLEM: 00000000-0000000000000001.lwseg"),
        "{}",
        stdout(&o)
    );
    assert!(stderr(&o).contains("problem(s) found"));
}

/// The regressions: `--kind alerts` (plural), `--kind reading` and `--characteristic vb210-bor`
/// printed nothing and exited 0. A kind that does not exist lists the kinds; a characteristic
/// the archive does not have says so with the nearest id; both exit non-zero. A valid filter
/// that matches nothing says so on standard error.
#[test]
fn export_never_answers_a_mistake_with_silence() {
    let dir = tempfile::tempdir().unwrap();
    let a = dir.path().join("archive");
    small_archive(&a);
    let d = a.to_str().unwrap();
    let o = run(&["archive", "export", d, "--kind", "alerts"]);
    assert!(!o.status.success());
    let e = stderr(&o);
    assert!(
        e.contains("\"alerts\" is not a kind of record (did you mean alert?)"),
        "{e}"
    );
    assert!(e.contains("reading-accepted, reading-rejected"), "{e}");
    let o = run(&["archive", "export", d, "--kind", "reading"]);
    assert!(
        !o.status.success() && stderr(&o).contains("the kinds are"),
        "{}",
        stderr(&o)
    );
    let o = run(&["archive", "export", d, "--characteristic", "bor"]);
    assert!(!o.status.success());
    let e = stderr(&o);
    assert!(
        e.contains(
            "has no records of characteristic \"bor\" (did you mean bore?); it has: bore, face"
        ),
        "{e}"
    );
    let o = run(&[
        "archive",
        "export",
        d,
        "--characteristic",
        "bore",
        "--kind",
        "alert",
    ]);
    assert!(o.status.success(), "{}", stderr(&o));
    assert!(stdout(&o).is_empty());
    assert!(stderr(&o).contains("no records match"), "{}", stderr(&o));
}

/// The regression: `linewarden … | head` ended with `error: Broken pipe`. A reader that goes
/// away ends the command quietly.
#[test]
fn a_closed_pipe_ends_quietly() {
    use std::io::Read;
    let dir = tempfile::tempdir().unwrap();
    let a = dir.path().join("archive");
    small_archive(&a);
    let mut child = Command::new(env!("CARGO_BIN_EXE_linewarden"))
        .args(["archive", "export", a.to_str().unwrap(), "--format", "csv"])
        .stdout(std::process::Stdio::piped())
        .stderr(std::process::Stdio::piped())
        .spawn()
        .unwrap();
    let mut first = [0u8; 16];
    child.stdout.take().unwrap().read_exact(&mut first).unwrap();
    // The pipe is closed here (the reader dropped), as `head` closes it.
    let out = child.wait_with_output().unwrap();
    let e = String::from_utf8_lossy(&out.stderr);
    assert!(!e.contains("Broken pipe") && !e.contains("error"), "{e}");
}

/// The regression: an unreadable config printed its cause twice (`… Permission denied (os
/// error 13): Permission denied (os error 13)`). Every message says each cause once.
#[test]
fn an_error_says_its_cause_once() {
    let dir = tempfile::tempdir().unwrap();
    // A directory where the file should be: unreadable as a file, for root as for anyone.
    let o = run(&["check", "--config", dir.path().to_str().unwrap()]);
    assert!(!o.status.success());
    let e = stderr(&o);
    assert_eq!(e.matches("(os error").count(), 1, "{e}");
    let o = run(&["limits", "--input", "/nonexistent/baseline.csv"]);
    let e = stderr(&o);
    assert_eq!(e.matches("No such file or directory").count(), 1, "{e}");
}

/// The regressions: `--delimiter '\t'` and `--delimiter tab` were refused; a semicolon file with
/// decimal commas only said `"12,0026" is not a number`; a subgroup out of range said `1..=25`.
#[test]
fn friendly_input_tabs_decimal_commas_and_ranges_in_words() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let tabbed = std::fs::read_to_string(DEMO).unwrap().replace(',', "\t");
    let tsv = write(d, "baseline.tsv", &tabbed);
    let plain = run(&["limits", "--input", DEMO, "--json"]);
    assert!(plain.status.success(), "{}", stderr(&plain));
    for delim in ["tab", "\\t", "\t"] {
        let o = run(&["limits", "--input", &tsv, "--delimiter", delim, "--json"]);
        assert!(o.status.success(), "--delimiter {delim:?}: {}", stderr(&o));
        assert_eq!(stdout(&o), stdout(&plain), "--delimiter {delim:?}");
    }
    let o = run(&["limits", "--input", &tsv, "--delimiter", "tabs"]);
    assert!(
        stderr(&o).contains("is not one character"),
        "{}",
        stderr(&o)
    );
    // A spreadsheet export with ';' between fields and decimal commas.
    let semi = std::fs::read_to_string(DEMO)
        .unwrap()
        .replace(',', ";")
        .replace('.', ",");
    let semi = write(d, "baseline-de.csv", &semi);
    let o = run(&["limits", "--input", &semi, "--delimiter", ";"]);
    assert!(!o.status.success());
    let e = stderr(&o);
    assert!(
        e.contains("decimal comma") && e.contains("--decimal-comma"),
        "{e}"
    );
    let o = run(&[
        "limits",
        "--input",
        &semi,
        "--delimiter",
        ";",
        "--decimal-comma",
        "--json",
    ]);
    assert!(o.status.success(), "{}", stderr(&o));
    assert_eq!(stdout(&o), stdout(&plain));
    let o = run(&["limits", "--input", DEMO, "--exclude", "26"]);
    let e = stderr(&o);
    assert!(e.contains("subgroups are numbered 1 to 25"), "{e}");
}

/// The regression: the CSV export left `unit` empty when the feed carried none (the
/// characteristic has one), gave subgroup rows only a mean, and alert rows as raw JSON. Every
/// field is now a column a spreadsheet can sort on.
#[test]
fn csv_export_is_spreadsheet_ready() {
    use linewarden::archive::Record;
    use linewarden::archive::writer::{Writer, WriterConfig};
    let dir = tempfile::tempdir().unwrap();
    let a = dir.path().join("archive");
    let (mut w, _) = Writer::open(WriterConfig::new(&a)).unwrap();
    let t0 = 1_796_112_000_000i64;
    let rec = |v: serde_json::Value| -> Record { serde_json::from_value(v).unwrap() };
    let records = [
        rec(
            serde_json::json!({"kind": "reading-accepted", "source": "g", "characteristic": "bore",
            "value": 12.001, "unit": "mm", "arrival_ms": t0}),
        ),
        rec(
            serde_json::json!({"kind": "reading-accepted", "source": "g", "characteristic": "bore",
            "value": 12.004, "arrival_ms": t0, "part": "VB00187"}),
        ),
        rec(
            serde_json::json!({"kind": "subgroup-result", "characteristic": "bore",
            "subgroup": {"number": 32, "time_ms": t0, "n": 5, "mean": 12.0064, "dispersion": 0.0131},
            "readings": [1, 2], "location": {"center": 12.0012, "ucl": 12.0059, "lcl": 11.9966},
            "violations": [{"rule": "beyond-limits", "severity": "stop", "message": "m",
                "points": [], "statistic": 12.0064, "limit": 12.0059, "side": "above"}]}),
        ),
        rec(
            serde_json::json!({"kind": "alert", "alert_id": "bore-32-beyond-limits-up",
            "characteristic": "bore", "event": "raised", "rule": "beyond-limits",
            "severity": "stop", "message": "subgroup mean 12.0064 mm is above the upper control limit 12.0059 mm",
            "statistic": 12.0064, "limit": 12.0059, "at_ms": t0}),
        ),
        rec(
            serde_json::json!({"kind": "alert", "alert_id": "bore-32-beyond-limits-up",
            "characteristic": "bore", "event": "acknowledged", "by": "R. Tech",
            "note": "insert changed", "at_ms": t0}),
        ),
    ];
    for r in &records {
        w.append(r, t0).unwrap();
    }
    w.flush().unwrap();
    drop(w);
    let o = run(&["archive", "export", a.to_str().unwrap(), "--format", "csv"]);
    assert!(o.status.success(), "{}", stderr(&o));
    let mut r = csv::Reader::from_reader(o.stdout.as_slice());
    let head = r.headers().unwrap().clone();
    let rows: Vec<std::collections::HashMap<String, String>> = r
        .records()
        .map(|x| {
            head.iter()
                .zip(x.unwrap().iter())
                .map(|(h, v)| (h.to_string(), v.to_string()))
                .collect()
        })
        .collect();
    assert_eq!(
        rows[1]["unit"], "mm",
        "the unit comes from the characteristic"
    );
    assert_eq!(rows[1]["part"], "VB00187");
    let sg = &rows[2];
    assert_eq!(
        [
            &sg["subgroup"],
            &sg["n"],
            &sg["value"],
            &sg["spread"],
            &sg["lcl"],
            &sg["center"],
            &sg["ucl"],
            &sg["unit"]
        ],
        [
            "32", "5", "12.0064", "0.0131", "11.9966", "12.0012", "12.0059", "mm"
        ]
    );
    assert_eq!(sg["verdict"], "signal: beyond-limits");
    let raised = &rows[3];
    assert_eq!(
        [
            &raised["alert"],
            &raised["event"],
            &raised["rule"],
            &raised["severity"]
        ],
        [
            "bore-32-beyond-limits-up",
            "raised",
            "beyond-limits",
            "stop"
        ]
    );
    assert!(
        raised["detail"].starts_with("subgroup mean 12.0064 mm"),
        "{}",
        raised["detail"]
    );
    assert_eq!(rows[4]["detail"], "by R. Tech: insert changed");
    assert!(
        !rows.iter().any(|r| r["detail"].starts_with('{')),
        "no raw JSON in a cell"
    );
}

/// The regression: `status` and `ack` looked for /etc/linewarden/linewarden.toml while the unit
/// and the README use cell.toml, so the README's `ack vb210-bore --by "your name"` failed as
/// written. With no options they now look where the unit puts things, and say so when nothing
/// is there.
#[test]
fn status_without_options_looks_where_the_unit_puts_the_daemon() {
    if Path::new("/etc/linewarden/cell.toml").exists()
        || Path::new("/run/linewarden/control.sock").exists()
    {
        eprintln!("skipped: this machine has an installed linewarden");
        return;
    }
    let o = Command::new(env!("CARGO_BIN_EXE_linewarden"))
        .args(["status"])
        .env_remove("LINEWARDEN_CONFIG")
        .output()
        .unwrap();
    assert!(!o.status.success());
    let e = stderr(&o);
    assert!(
        e.contains("/etc/linewarden/cell.toml")
            && e.contains("/run/linewarden/control.sock")
            && e.contains("--socket PATH"),
        "{e}"
    );
    assert_eq!(e.matches("(os error").count(), 1, "{e}");
}

/// What broke: `capability --json` gave `"warnings": []` while the text named the failed
/// normality test; and the verdict read `Cpk 1.33 is below 1.33`. Every warning is in the JSON,
/// and a figure compared with a threshold prints with the digits that make the comparison true.
#[test]
fn capability_json_carries_the_normality_warning_and_comparisons_read_true() {
    let dir = tempfile::tempdir().unwrap();
    // Strongly skewed readings (an exponential shape), one per row.
    let mut text = String::from("value\n");
    for i in 1..=60 {
        let u = (i as f64 - 0.5) / 60.0;
        text.push_str(&format!("{:.5}\n", 10.0 - 0.01 * (1.0 - u).ln()));
    }
    let f = dir.path().join("skewed.csv");
    std::fs::write(&f, text).unwrap();
    let p = f.to_str().unwrap();
    let o = run(&[
        "capability",
        "--input",
        p,
        "--layout",
        "single",
        "--lsl",
        "9.9",
        "--usl",
        "10.2",
        "--json",
    ]);
    let (out, err) = (stdout(&o), stderr(&o));
    assert!(o.status.success(), "{err}");
    let v: serde_json::Value = serde_json::from_str(&out).unwrap();
    let w = v["warnings"].as_array().unwrap();
    assert!(
        w.iter()
            .any(|s| s.as_str().unwrap().contains("do not look normal")),
        "{out}"
    );
    assert_eq!(v["sigma_method"], "mean-moving-range");
    let o = run(&[
        "capability",
        "--input",
        p,
        "--layout",
        "single",
        "--lsl",
        "9.9",
        "--usl",
        "10.2",
    ]);
    let (out, err) = (stdout(&o), stderr(&o));
    assert!(o.status.success(), "{err}");
    assert!(
        out.contains("adjusted for the estimated mean and sigma"),
        "{out}"
    );
    for line in out.lines().filter(|l| l.contains("verdict")) {
        // "Cpk X is below T" never with X printed equal to T.
        if let Some(rest) = line.split("Cpk ").nth(1) {
            let words: Vec<&str> = rest.split_whitespace().collect();
            if let (Some(x), Some(t)) = (words.first(), words.get(3)) {
                assert_ne!(x.trim_end_matches(','), t.trim_end_matches(','), "{line}");
            }
        }
    }
}

#[test]
fn percentile_capability_from_a_fitted_model_and_its_bad_requests() {
    let dir = tempfile::tempdir().unwrap();
    // Right-skewed readings (a lognormal shape), one per row; all above zero. Skewed enough
    // that the normality test rejects the normal (p < 0.05): `best` keeps the normal otherwise.
    let mut text = String::from("value\n");
    for i in 1..=60 {
        let u = (i as f64 - 0.5) / 60.0;
        let z = statrs::distribution::ContinuousCDF::inverse_cdf(
            &statrs::distribution::Normal::standard(),
            u,
        );
        text.push_str(&format!("{:.4}\n", (0.6 * z).exp()));
    }
    let good = write(dir.path(), "skewed.csv", &text);
    let base = |extra: &[&str]| {
        let mut args = vec![
            "capability",
            "--input",
            &good,
            "--layout",
            "single",
            "--lsl",
            "0.2",
            "--usl",
            "3.0",
        ];
        args.extend_from_slice(extra);
        run(&args)
    };
    let o = base(&["--distribution", "best", "--json"]);
    assert!(o.status.success(), "{}", stderr(&o));
    let v: serde_json::Value = serde_json::from_str(&stdout(&o)).unwrap();
    assert_eq!(v["method"], "percentile");
    assert_eq!(v["verdict_on"], "ppk");
    assert_eq!(v["distribution"]["name"], "lognormal", "{v}");
    assert!(
        v["distribution"]["parameters"]["log_sigma"]
            .as_f64()
            .unwrap()
            > 0.0
    );
    assert!(v["distribution"]["ad_statistic"].as_f64().unwrap() < 0.5);
    for key in ["pp", "ppk", "ppm_below", "ppm_above", "pp_ci95", "ppk_ci95"] {
        assert!(!v[key].is_null(), "{key} missing: {v}");
    }
    // The text names the method, the model and the index the verdict judges.
    let o = base(&["--distribution", "lognormal"]);
    let out = stdout(&o);
    assert!(o.status.success(), "{}", stderr(&o));
    assert!(out.contains("model: lognormal"), "{out}");
    assert!(out.contains("verdict (percentile method)"), "{out}");
    assert!(out.contains("Ppk"), "{out}");

    // A misspelt model is refused before any file is read, naming the value.
    let o = base(&["--distribution", "weibul"]);
    assert!(!o.status.success());
    assert!(stderr(&o).contains("\"weibul\""), "{}", stderr(&o));
    // No specification: nothing to judge against.
    let o = run(&[
        "limits",
        "--input",
        &good,
        "--layout",
        "single",
        "--distribution",
        "best",
    ]);
    assert!(!o.status.success());
    assert!(
        stderr(&o).contains("--distribution needs --lsl"),
        "{}",
        stderr(&o)
    );

    // A reading at or below zero: the positive models refuse it by value; `best` falls back on
    // what can be fitted and says why the others were not.
    let bad = write(
        dir.path(),
        "zero.csv",
        &text.replacen("\n", "\n-0.0020\n", 1),
    );
    let args = |model: &'static str| {
        vec![
            "capability",
            "--input",
            bad.as_str(),
            "--layout",
            "single",
            "--lsl",
            "-1",
            "--usl",
            "3.0",
            "--distribution",
            model,
            "--json",
        ]
    };
    let o = run(&args("weibull"));
    assert!(!o.status.success());
    let err = stderr(&o);
    assert!(
        err.contains("--distribution weibull") && err.contains("-0.002"),
        "{err}"
    );
    let o = run(&args("best"));
    assert!(o.status.success(), "{}", stderr(&o));
    let v: serde_json::Value = serde_json::from_str(&stdout(&o)).unwrap();
    assert_eq!(v["distribution"]["name"], "normal");
    let candidates = v["distribution"]["candidates"].as_array().unwrap();
    assert_eq!(candidates.len(), 4);
    assert!(
        candidates
            .iter()
            .filter(|c| c["ad_statistic"].is_null())
            .all(|c| c["not_fitted"].as_str().unwrap().contains("above zero"))
    );

    // limits takes the same option, and its JSON carries the same capability object.
    let o = run(&[
        "limits",
        "--input",
        &good,
        "--layout",
        "single",
        "--lsl",
        "0.2",
        "--usl",
        "3.0",
        "--distribution",
        "best",
        "--json",
    ]);
    assert!(o.status.success(), "{}", stderr(&o));
    let v: serde_json::Value = serde_json::from_str(&stdout(&o)).unwrap();
    assert_eq!(v["capability"]["method"], "percentile");
}
