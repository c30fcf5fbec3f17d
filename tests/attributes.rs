//! Attribute characteristics (p, np, c, u) through the whole daemon: a replayed station feeds
//! it, the archive is read back. Montgomery's worked examples give the limits and the signals;
//! a hostile station's results are archived as rejected with the reason, and the daemon runs on.

use std::path::Path;

use linewarden::archive::Record;
use linewarden::archive::reader::{Filter, Reader};
use linewarden::rules::{Severity, Side};

mod common;
use common::peers::cli;
use common::run_daemon;

/// Montgomery, Introduction to SQC, ch. 7, the orange juice cans: nonconforming cans in 30
/// samples of 50 (figures recalled from memory; the counts sum to the 347 the text gives, as in
/// tests/published.rs).
const CANS: [u32; 30] = [
    12, 15, 8, 10, 4, 7, 16, 9, 14, 10, 5, 6, 17, 12, 22, 8, 10, 5, 13, 11, 20, 18, 24, 15, 9, 12,
    7, 13, 9, 6,
];

/// Montgomery, ch. 7, the printed circuit boards: nonconformities in 26 inspection units of 100
/// boards (recalled from memory; they sum to the 516 the text gives).
const BOARDS: [u32; 26] = [
    21, 24, 16, 12, 15, 5, 28, 20, 31, 25, 20, 24, 16, 19, 10, 17, 13, 22, 18, 39, 30, 24, 16, 19,
    17, 15,
];

fn limits_file(
    id: &str,
    chart: &str,
    n: usize,
    sigma: f64,
    center: f64,
    ucl: f64,
    lcl: f64,
) -> String {
    format!(
        r#"format = 1
characteristic = "{id}"
chart = "{chart}"
subgroup_size = {n}
[sigma]
within = {sigma}
overall = {sigma}
method = "from the textbook's figures"
[location]
center = {center}
ucl = {ucl}
lcl = {lcl}
[provenance]
computed_at = "2026-12-01T08:00:00Z"
source = "Montgomery, Introduction to SQC, ch. 7"
tool = "linewarden test"
subgroups_total = 30
subgroups_used = 30
used = "1-30"
"#
    )
}

/// A cell with one attribute characteristic (`body` its keys) fed by `feed` (JSON lines).
fn cell(dir: &Path, body: &str, feed: &[String]) -> linewarden::config::Config {
    std::fs::write(dir.join("feed.jsonl"), feed.join("\n") + "\n").unwrap();
    let text = format!(
        r#"[daemon]
archive_dir = "archive"
flush_interval_ms = 2

[[characteristic]]
{body}

[[source]]
id = "station"
kind = "replay"
file = "feed.jsonl"
speed = 0
"#
    );
    std::fs::write(dir.join("cell.toml"), text).unwrap();
    linewarden::config::load(&dir.join("cell.toml")).unwrap()
}

fn batches(id: &str, counts: &[u32], inspected: f64) -> Vec<String> {
    counts
        .iter()
        .enumerate()
        .map(|(i, c)| {
            format!(
                r#"{{"t_ms": {}, "characteristic": "{id}", "value": {c}, "inspected": {inspected}}}"#,
                1000 * (i + 1)
            )
        })
        .collect()
}

/// Every subgroup result: (number, plotted value, limits, violations).
type Results = Vec<(
    u64,
    f64,
    Option<linewarden::stats::Limits>,
    Vec<linewarden::rules::Violation>,
)>;

fn results(archive: &Path) -> Results {
    let r = Reader::open(archive).unwrap();
    let mut out = Vec::new();
    for e in r.iter(&Filter::default()) {
        if let Record::SubgroupResult {
            subgroup,
            location,
            violations,
            ..
        } = e.unwrap().record
        {
            out.push((subgroup.number, subgroup.mean, location, violations));
        }
    }
    out
}

fn signals(res: &Results) -> Vec<(u64, String, Side)> {
    res.iter()
        .flat_map(|(n, _, _, v)| {
            v.iter().map(move |v| {
                (
                    *n,
                    v.rule.clone(),
                    v.side.expect("beyond-limits has a side"),
                )
            })
        })
        .collect()
}

const P_RULES: &str = r#"
[[characteristic.rules.rule]]
kind = "beyond-limits"
"#;

#[test]
fn montgomerys_p_chart_signals_the_same_samples_through_the_daemon() {
    // Trial limits: p̄ = 0.2313, UCL = 0.4102, LCL = 0.0524; samples 15 and 23 lie above
    // (Montgomery, ch. 7). Revised without them: p̄ = 0.2150, UCL = 0.3893, LCL = 0.0407; then
    // sample 21 lies above too.
    for (center, ucl, lcl, sigma, expected) in [
        (0.2313, 0.4102, 0.0524, 0.05963, vec![15, 23]),
        (0.2150, 0.3893, 0.0407, 0.05809, vec![15, 21, 23]),
    ] {
        let dir = tempfile::tempdir().unwrap();
        std::fs::write(
            dir.path().join("cans.toml"),
            limits_file("cans", "p", 50, sigma, center, ucl, lcl),
        )
        .unwrap();
        let cfg = cell(
            dir.path(),
            &format!(
                "id = \"cans\"\nchart = \"p\"\nlimits = \"cans.toml\"\nsubgroup = {{ size = 1 }}\n[characteristic.rules]{P_RULES}"
            ),
            &batches("cans", &CANS, 50.0),
        );
        let s = run_daemon(cfg);
        assert_eq!((s.accepted, s.rejected, s.subgroups), (30, 0, 30));
        let res = results(&dir.path().join("archive"));
        let got: Vec<u64> = signals(&res).iter().map(|s| s.0).collect();
        assert_eq!(got, expected, "limits {center} / {ucl} / {lcl}");
        // Every point is plotted as its fraction and judged against the stored limits.
        for (n, p, lim, _) in &res {
            assert_eq!(*p, f64::from(CANS[*n as usize - 1]) / 50.0);
            assert_eq!(lim.unwrap().ucl, ucl);
        }
        let (_, _, _, v) = &res[14];
        assert_eq!(v[0].side, Some(Side::Above));
        assert_eq!(v[0].severity, Severity::Stop);
        assert!(
            v[0].message.starts_with(&format!(
                "22 of 50 parts nonconforming (44.0%) is above the upper limit {:.1}%",
                100.0 * ucl
            )),
            "{}",
            v[0].message
        );
    }
}

#[test]
fn learning_a_p_chart_from_montgomerys_samples_gives_his_revised_limits() {
    // One round of exclusion beyond the trial limits takes out samples 15 and 23, which is
    // Montgomery's revision: p̄ = 0.2150, UCL = 0.3893, LCL = 0.0407.
    let dir = tempfile::tempdir().unwrap();
    let cfg = cell(
        dir.path(),
        &format!(
            "id = \"cans\"\nchart = \"p\"\nlimits = \"learned/cans.toml\"\nsubgroup = {{ size = 1 }}\nlearning = {{ subgroups = 30 }}\n[characteristic.rules]{P_RULES}"
        ),
        &batches("cans", &CANS, 50.0),
    );
    run_daemon(cfg);
    let l =
        linewarden::limits_file::StoredLimits::load(&dir.path().join("learned/cans.toml")).unwrap();
    assert!(l.is_provisional());
    assert_eq!(l.chart.name(), "p");
    assert_eq!(l.subgroup_size, 50);
    assert!(
        (l.location.center - 0.2150).abs() < 5e-5,
        "{}",
        l.location.center
    );
    assert!((l.location.ucl - 0.3893).abs() < 5e-5, "{}", l.location.ucl);
    assert!((l.location.lcl - 0.0407).abs() < 5e-5, "{}", l.location.lcl);
    let excluded: Vec<usize> = l.provenance.excluded.iter().map(|e| e.subgroup).collect();
    assert_eq!(excluded, [15, 23]);
    // The file it wrote reads back, and says what it is.
    let text = std::fs::read_to_string(dir.path().join("learned/cans.toml")).unwrap();
    assert!(text.contains("PROVISIONAL"), "{text}");
    assert!(text.contains("binomial"), "{text}");
    // The same study at the desk from the record: the daemon's subgroups, each the count found
    // in the units inspected, give the same limits.
    let archive = dir.path().join("archive");
    let (ok, out, err) = cli(&[
        "limits",
        "--archive",
        archive.to_str().unwrap(),
        "--characteristic",
        "cans",
        "--exclude",
        "15,23",
        "--json",
    ]);
    assert!(ok, "{err}");
    let v: serde_json::Value = serde_json::from_str(&out).unwrap();
    assert_eq!(v["chart"], "p");
    assert_eq!(
        v["parameter"].as_f64().unwrap(),
        l.attribute_parameter().unwrap()
    );
    assert_eq!(v["samples"][20]["subgroup"], 21);
    assert_eq!(v["samples"][20]["beyond"], true);
}

#[test]
fn montgomerys_c_chart_signals_both_sides_each_with_its_own_severity() {
    // Trial limits c̄ = 19.85, UCL = 33.22, LCL = 6.48: sample 6 lies below and sample 20
    // above (Montgomery, ch. 7). Below is fewer defects than the process makes: set to a notice.
    let dir = tempfile::tempdir().unwrap();
    std::fs::write(
        dir.path().join("boards.toml"),
        limits_file("boards", "c", 1, 4.4553, 19.85, 33.22, 6.48),
    )
    .unwrap();
    let feed: Vec<String> = BOARDS
        .iter()
        .enumerate()
        .map(|(i, c)| {
            format!(
                r#"{{"t_ms": {}, "characteristic": "boards", "value": {c}, "part": "lot-{}"}}"#,
                1000 * (i + 1),
                i + 1
            )
        })
        .collect();
    let cfg = cell(
        dir.path(),
        &format!(
            "id = \"boards\"\nchart = \"c\"\nlimits = \"boards.toml\"\nsubgroup = {{ size = 1 }}\nbelow_limit_severity = \"notice\"\n[characteristic.rules]{P_RULES}"
        ),
        &feed,
    );
    let s = run_daemon(cfg);
    assert_eq!(s.subgroups, 26);
    let res = results(&dir.path().join("archive"));
    assert_eq!(
        signals(&res),
        [
            (6, "beyond-limits".to_string(), Side::Below),
            (20, "beyond-limits".to_string(), Side::Above)
        ]
    );
    let below = &res[5].3[0];
    assert_eq!(below.severity, Severity::Notice);
    assert!(
        below
            .message
            .starts_with("5 defects in 1 unit is below the lower limit 6.5 defects"),
        "{}",
        below.message
    );
    assert!(
        below.message.contains("stopped finding"),
        "{}",
        below.message
    );
    // The report of the record: the counts' study, the chart with no histogram, both alerts.
    let html = dir.path().join("boards.html");
    let (ok, _, err) = cli(&[
        "report",
        "--archive",
        dir.path().join("archive").to_str().unwrap(),
        "--characteristic",
        "boards",
        "--output",
        html.to_str().unwrap(),
    ]);
    assert!(ok, "{err}");
    let text = std::fs::read_to_string(&html).unwrap();
    for want in [
        "Attribute study: c chart (defects per inspection)",
        "c̄ = 19.8462 (516 defects in 26 samples)",
        "c (defects per inspection)",
        "5 defects in 1 unit is below the lower limit 6.5 defects",
        "39 defects in 1 unit is above the upper limit 33.2 defects",
        "intact",
    ] {
        assert!(text.contains(want), "{want}");
    }
    assert!(!text.contains("histogram holds"));
    let above = &res[19].3[0];
    assert_eq!(above.severity, Severity::Stop);
    assert!(
        above
            .message
            .starts_with("39 defects in 1 unit is above the upper limit 33.2 defects"),
        "{}",
        above.message
    );
}

#[test]
fn a_u_chart_judges_each_batch_at_its_own_number_of_units() {
    // ū = 2 defects per unit, stored at 5 units; each batch's limits are ū ± 3√(ū/n)
    // (Montgomery, ch. 7, the u chart with variable sample size), the lower clamped at zero.
    let ubar: f64 = 2.0;
    let at = |n: f64| {
        (
            ubar + 3.0 * (ubar / n).sqrt(),
            (ubar - 3.0 * (ubar / n).sqrt()).max(0.0),
        )
    };
    let (u5, l5) = at(5.0);
    let dir = tempfile::tempdir().unwrap();
    std::fs::write(
        dir.path().join("cloth.toml"),
        limits_file("cloth", "u", 5, (ubar / 5.0).sqrt(), ubar, u5, l5),
    )
    .unwrap();
    // (defects, units): 12 in 2.5 units is 4.8 per unit, above 2 + 3√0.8 = 4.683; the same 4.8
    // per unit in 1.25 units (6 defects) is within 2 + 3√1.6 = 5.795. None in 2 units cannot
    // be below a lower limit clamped at zero (2 − 3·1 < 0); 1 in 8 units (0.125) is below
    // 2 − 3√0.25 = 0.5.
    let batches = [
        (10.0, 5.0),
        (9.0, 4.0),
        (14.0, 6.0),
        (12.0, 2.5),
        (6.0, 1.25),
        (0.0, 2.0),
        (1.0, 8.0),
    ];
    let feed: Vec<String> = batches
        .iter()
        .enumerate()
        .map(|(i, (c, n))| {
            format!(
                r#"{{"t_ms": {}, "characteristic": "cloth", "value": {c}, "inspected": {n}}}"#,
                1000 * (i + 1)
            )
        })
        .collect();
    let cfg = cell(
        dir.path(),
        &format!(
            "id = \"cloth\"\nchart = \"u\"\nlimits = \"cloth.toml\"\nsubgroup = {{ size = 1 }}\n[characteristic.rules]{P_RULES}"
        ),
        &feed,
    );
    run_daemon(cfg);
    let res = results(&dir.path().join("archive"));
    assert_eq!(res.len(), batches.len());
    for ((_, u, lim, _), (c, n)) in res.iter().zip(batches) {
        let lim = lim.unwrap();
        let (ucl, lcl) = at(n);
        assert!((lim.ucl - ucl).abs() < 1e-9, "n {n}: {} vs {ucl}", lim.ucl);
        assert!((lim.lcl - lcl).abs() < 1e-9, "n {n}: {} vs {lcl}", lim.lcl);
        assert_eq!(*u, c / n);
    }
    assert_eq!(
        signals(&res),
        [
            (4, "beyond-limits".to_string(), Side::Above),
            (7, "beyond-limits".to_string(), Side::Below)
        ]
    );
    assert_eq!(res[5].2.unwrap().lcl, 0.0);
    assert!(
        res[3].3[0]
            .message
            .starts_with("12 defects in 2.5 units (4.80 defects per unit) is above the upper limit 4.68 defects per unit"),
        "{}",
        res[3].3[0].message
    );
}

/// What broke, as a class: a pass/fail station's results that are not results. Every kind of
/// bad result is archived as rejected with its reason, none is fatal, and the good ones around
/// them are counted exactly.
#[test]
fn bad_results_from_a_station_are_archived_as_rejected_with_the_reason() {
    let dir = tempfile::tempdir().unwrap();
    let lines = [
        // (line, rejected reason or None)
        (r#""result": "OK""#, None),
        (r#""result": " nok ""#, None),
        (r#""result": "FAIL""#, None),
        (r#""result": "1""#, None),
        (r#""value": 0"#, None),
        (r#""result": "PASS""#, None),
        (
            r#""result": "MAYBE""#,
            Some(
                "\"MAYBE\" is neither a conforming word (\"OK\", \"PASS\") nor a nonconforming one (\"NOK\", \"FAIL\"), nor 0 or 1",
            ),
        ),
        (r#""result": "true""#, Some("\"true\" is neither")),
        (r#""result": "2""#, Some("2 is not one part's result")),
        (r#""value": 2"#, Some("2 is not one part's result")),
        (r#""value": -1"#, Some("-1 is not a nonconforming count")),
        (r#""value": 0.5"#, Some("0.5 is not a nonconforming count")),
        (
            r#""value": 7, "inspected": 5"#,
            Some("7 nonconforming of 5 inspected"),
        ),
        (
            r#""value": 0, "inspected": 0"#,
            Some("0 units inspected is not a batch"),
        ),
        (
            r#""value": 1, "inspected": 2.5"#,
            Some("2.5 units inspected is not a whole number"),
        ),
        (
            r#""value": 1, "inspected": -4"#,
            Some("-4 units inspected is not a batch"),
        ),
        (r#""value": 3, "inspected": 6"#, None),
        (r#""result": "OK""#, None),
    ];
    let feed: Vec<String> = lines
        .iter()
        .enumerate()
        .map(|(i, (l, _))| {
            format!(
                r#"{{"t_ms": {}, "characteristic": "leak", {l}}}"#,
                1000 * (i + 1)
            )
        })
        .collect();
    let cfg = cell(
        dir.path(),
        "id = \"leak\"\nchart = \"p\"\nconforming = [\"OK\", \"PASS\"]\nnonconforming = [\"NOK\", \"FAIL\"]\nsubgroup = { size = 8 }\nlearning = { subgroups = 20 }",
        &feed,
    );
    let s = run_daemon(cfg);
    let bad = lines.iter().filter(|(_, r)| r.is_some()).count() as u64;
    assert_eq!(s.rejected, bad);
    assert_eq!(s.accepted, lines.len() as u64 - bad);
    let r = Reader::open(&dir.path().join("archive")).unwrap();
    let mut rejected = Vec::new();
    let mut words = Vec::new();
    let mut subgroups = Vec::new();
    for e in r.iter(&Filter::default()) {
        match e.unwrap().record {
            Record::ReadingRejected { reason, raw, .. } => rejected.push((raw, reason)),
            Record::ReadingAccepted { word, value, .. } => words.push((word, value)),
            Record::SubgroupResult { subgroup, .. } => {
                subgroups.push((subgroup.found, subgroup.inspected))
            }
            _ => {}
        }
    }
    let expected: Vec<&str> = lines.iter().filter_map(|(_, r)| *r).collect();
    assert_eq!(rejected.len(), expected.len());
    for ((raw, reason), want) in rejected.iter().zip(expected) {
        assert!(reason.contains(want), "{raw}: {reason} (wanted {want})");
    }
    assert_eq!(rejected[0].0, "MAYBE");
    assert_eq!(rejected[6].0, "7 of 5 inspected");
    // The words as sent are kept beside what they count as.
    assert_eq!(
        words[..3],
        [
            (Some("OK".to_string()), 0.0),
            (Some("nok".to_string()), 1.0),
            (Some("FAIL".to_string()), 1.0)
        ]
    );
    // Eight messages make a subgroup: six single parts (3 bad), a batch of 6 (3 bad), one OK.
    assert_eq!(subgroups, [(Some(6.0), Some(13.0))]);
    // Still learning: the record does not say the chart, and the desk says so rather than
    // studying counts as measurements.
    let archive = dir.path().join("archive");
    for cmd in ["limits", "report"] {
        let out = dir.path().join("r.html");
        let mut args = vec![
            cmd,
            "--archive",
            archive.to_str().unwrap(),
            "--characteristic",
            "leak",
        ];
        if cmd == "report" {
            args.extend(["--output", out.to_str().unwrap()]);
        }
        let (ok, _, err) = cli(&args);
        assert!(!ok, "{cmd} succeeded");
        assert!(
            err.contains("no limits in force in this window"),
            "{cmd}: {err}"
        );
        assert!(!out.exists());
    }
}

#[test]
fn an_attribute_characteristic_with_keys_that_do_not_apply_is_refused_naming_each() {
    let dir = tempfile::tempdir().unwrap();
    let text = r#"[daemon]
archive_dir = "archive"

[[characteristic]]
id = "leak"
chart = "p"
unit = "mm"
spec = { lsl = 0.0, usl = 1.0 }
valid_min = 0.0
valid_max = 1.0
learning = { chart = "xbar-r" }
conforming = ["OK", "3"]
nonconforming = ["ok", "FAIL"]
subgroup = { size = 20 }
[characteristic.rules]
[[characteristic.rules.rule]]
kind = "outside-spec"
[[characteristic.rules.rule]]
kind = "beyond-limits"
chart = "dispersion"

[[characteristic]]
id = "scratches"
chart = "c"
conforming = ["OK"]
subgroup = { window_s = 60 }

[[characteristic]]
id = "bore"
chart = "xbar-r"
subgroup = { size = 5 }

[[characteristic]]
id = "face"
nonconforming = ["NOK"]
subgroup = { size = 5 }

[[characteristic]]
id = "port"
chart = "q"
subgroup = { size = 5 }
"#;
    std::fs::write(dir.path().join("bad.toml"), text).unwrap();
    let e = linewarden::config::load(&dir.path().join("bad.toml"))
        .unwrap_err()
        .to_string();
    for want in [
        "characteristic[0].spec: characteristic \"leak\": spec does not apply to an attribute characteristic (chart = \"p\")",
        "characteristic[0].valid_min: characteristic \"leak\": valid_min does not apply",
        "characteristic[0].unit: characteristic \"leak\": unit does not apply",
        "characteristic[0].learning.chart: characteristic \"leak\": learning.chart does not apply",
        "characteristic[0].conforming[1]: characteristic \"leak\": \"3\" is a number",
        "characteristic[0].nonconforming[0]: characteristic \"leak\": \"ok\" is both a conforming and a nonconforming word",
        "characteristic[0].rules.rule[0]: characteristic \"leak\": kind = \"outside-spec\" does not apply",
        "characteristic[0].rules.rule[1].chart: characteristic \"leak\": chart = \"dispersion\" does not apply",
        "characteristic[1].conforming: characteristic \"scratches\": conforming does not apply",
        "characteristic[1].subgroup.window_s: characteristic \"scratches\": the c chart needs the same number of units",
        "characteristic[2].chart: characteristic \"bore\": chart = \"xbar-r\": this key names an attribute chart",
        "characteristic[3].nonconforming: characteristic \"face\": nonconforming applies only to an attribute characteristic",
        "characteristic[4].chart: characteristic \"port\": \"q\" is not an attribute chart",
    ] {
        assert_eq!(e.matches(want).count(), 1, "{want}\nin:\n{e}");
    }
    // outside-spec on an attribute chart is said once, not also as "needs a spec".
    assert!(!e.contains("needs a [characteristic.spec]"), "{e}");
}

#[test]
fn check_warns_when_zone_rules_meet_counts_too_small_for_them() {
    // A p chart at 3% in subgroups of 20: n·p̄ = 0.6, far below about 5 (common practice).
    let dir = tempfile::tempdir().unwrap();
    let root = Path::new(env!("CARGO_MANIFEST_DIR"));
    std::fs::copy(
        root.join("config/limits/vb210-leak.toml"),
        dir.path().join("leak.toml"),
    )
    .unwrap();
    let text = r#"[daemon]
archive_dir = "archive"

[[characteristic]]
id = "vb210-leak"
chart = "p"
limits = "leak.toml"
subgroup = { size = 20 }
[characteristic.rules]
preset = "western-electric"
"#;
    std::fs::write(dir.path().join("cell.toml"), text).unwrap();
    let (ok, out, err) = cli(&[
        "check",
        "--config",
        dir.path().join("cell.toml").to_str().unwrap(),
    ]);
    assert!(ok, "{err}");
    assert!(out.contains("vb210-leak"), "{out}");
    assert!(out.contains("p chart"), "{out}");
    assert!(
        err.contains(
            "the rules near-limit-cluster, off-centre-cluster read zones or patterns of the p chart"
        ) && err.contains("n·p̄ is 0.60 here, below about 5"),
        "{err}"
    );
    // The demo's leak test keeps to the rules that need no normal approximation: no warning.
    let (ok, _, err) = cli(&[
        "check",
        "--config",
        root.join("config/demo.toml").to_str().unwrap(),
    ]);
    assert!(ok, "{err}");
    assert!(!err.contains("vb210-leak"), "{err}");
}

#[test]
fn a_subgroup_of_batches_completes_across_a_restart() {
    // Two batches before the stop, two after: the subgroup holds all four, with the units of
    // each (the waiting readings come back from the archive with their units inspected).
    let dir = tempfile::tempdir().unwrap();
    std::fs::write(
        dir.path().join("cans.toml"),
        limits_file("cans", "p", 40, 0.0474, 0.1, 0.2423, 0.0),
    )
    .unwrap();
    let body = "id = \"cans\"\nchart = \"p\"\nlimits = \"cans.toml\"\nsubgroup = { size = 4 }";
    let first = batches("cans", &[1, 2], 10.0);
    run_daemon(cell(dir.path(), body, &first));
    assert!(results(&dir.path().join("archive")).is_empty());
    let second = batches("cans", &[0, 3], 10.0);
    run_daemon(cell(dir.path(), body, &second));
    let res = results(&dir.path().join("archive"));
    assert_eq!(res.len(), 1);
    assert_eq!(res[0].1, 6.0 / 40.0);
    let r = Reader::open(&dir.path().join("archive")).unwrap();
    let inspected: Vec<(Option<f64>, Option<f64>)> = r
        .iter(&Filter::default())
        .filter_map(|e| match e.unwrap().record {
            Record::SubgroupResult { subgroup, .. } => Some((subgroup.found, subgroup.inspected)),
            _ => None,
        })
        .collect();
    assert_eq!(inspected, [(Some(6.0), Some(40.0))]);
}

#[test]
fn limits_and_capability_of_an_attribute_chart_from_a_file() {
    let dir = tempfile::tempdir().unwrap();
    let csv = dir.path().join("cans.csv");
    let mut text = String::from("# Montgomery, ch. 7: orange juice cans\nsample,bad,cans\n");
    for (i, c) in CANS.iter().enumerate() {
        text.push_str(&format!("{},{c},50\n", i + 1));
    }
    std::fs::write(&csv, text).unwrap();
    let s = |p: &Path| p.to_str().unwrap().to_string();
    let written = dir.path().join("cans.toml");
    let args = [
        "limits",
        "--input",
        &s(&csv),
        "--chart",
        "p",
        "--count-column",
        "bad",
        "--size-column",
        "cans",
        "--exclude",
        "15,23",
        "--characteristic",
        "cans",
        "--write",
        &s(&written),
        "--approved-by",
        "R. Okafor",
        "--json",
    ];
    let (ok, out, err) = cli(&args);
    assert!(ok, "{err}");
    let v: serde_json::Value = serde_json::from_str(&out).unwrap();
    // Montgomery's revised limits.
    assert!((v["parameter"].as_f64().unwrap() - 0.2150).abs() < 5e-5);
    let s21 = &v["samples"][20];
    assert!((s21["ucl"].as_f64().unwrap() - 0.3893).abs() < 5e-5);
    assert!((s21["lcl"].as_f64().unwrap() - 0.0407).abs() < 5e-5);
    assert_eq!(s21["beyond"], true);
    assert_eq!(s21["line"], 23);
    assert_eq!(v["samples_used"], 28);
    // scipy 1.17.1: binomtest(301, 1400).proportion_ci(method="exact") and norm.isf.
    let c = &v["capability"];
    assert_eq!(
        (c["nonconforming"].as_u64(), c["inspected"].as_u64()),
        (Some(301), Some(1400))
    );
    for (key, want) in [
        ("fraction_low", 0.19373903442618928),
        ("fraction_high", 0.23746383041051028),
        ("equivalent_normal_z", 0.7891916526582226),
        ("equivalent_normal_z_low", 0.7144844619874494),
    ] {
        let got = c[key].as_f64().unwrap();
        assert!((got - want).abs() < 1e-9 * want, "{key}: {got} vs {want}");
    }
    // The written file is an approved p chart the daemon takes as it is.
    let l = linewarden::limits_file::StoredLimits::load(&written).unwrap();
    assert_eq!((l.chart.name(), l.subgroup_size), ("p", 50));
    assert_eq!(l.approved.as_ref().unwrap().by, "R. Okafor");
    std::fs::write(
        dir.path().join("cell.toml"),
        "[daemon]\narchive_dir = \"archive\"\n[[characteristic]]\nid = \"cans\"\nchart = \"p\"\nlimits = \"cans.toml\"\nsubgroup = { size = 50 }\n",
    )
    .unwrap();
    let (ok, out, err) = cli(&["check", "--config", &s(&dir.path().join("cell.toml"))]);
    assert!(ok, "{err}");
    assert!(out.contains("p chart"), "{out}");
    // The report in words.
    let (ok, out, err) = cli(&args[..args.len() - 7]);
    assert!(ok, "{err}");
    for want in [
        "p̄ = 0.2150 (301 nonconforming of 1400 inspected)",
        "UCL 0.3893, LCL 0.0407",
        "sample 21 (line 23): p 0.4000 is above the upper limit 0.3893",
        "95% exact interval (Clopper-Pearson) 19.37% to 23.75%",
        "equivalent normal Z     0.79",
    ] {
        assert!(out.contains(want), "{want}\n{out}");
    }
    // A u chart's samples of different sizes each have their own limits, the lower clamped.
    let u = dir.path().join("cloth.csv");
    std::fs::write(&u, "count,size\n10,5\n9,4\n14,6\n12,2.5\n6,1.25\n").unwrap();
    let (ok, out, err) = cli(&["limits", "--input", &s(&u), "--chart", "u", "--json"]);
    assert!(ok, "{err}");
    let v: serde_json::Value = serde_json::from_str(&out).unwrap();
    let ubar = 51.0 / 18.75;
    for sample in v["samples"].as_array().unwrap() {
        let n = sample["size"].as_f64().unwrap();
        let ucl = ubar + 3.0 * (ubar / n).sqrt();
        assert!((sample["ucl"].as_f64().unwrap() - ucl).abs() < 1e-9);
        assert!(sample["lcl"].as_f64().unwrap() >= 0.0);
    }
    // Its capability is the defects per unit with the exact Poisson interval: scipy 1.17.1,
    // chi2.ppf(0.025, 2·51)/2/18.75 and chi2.ppf(0.975, 2·51 + 2)/2/18.75.
    let c = &v["capability"];
    assert_eq!(c["defects_per_unit"].as_f64().unwrap(), 51.0 / 18.75);
    for (key, want) in [
        ("defects_per_unit_low", 2.025218658042174),
        ("defects_per_unit_high", 3.5762976734188685),
    ] {
        let got = c[key].as_f64().unwrap();
        assert!((got - want).abs() < 1e-9 * want, "{key}: {got} vs {want}");
    }
    // Montgomery's circuit boards: 516 nonconformities in 26 inspection units, c̄ 19.85;
    // scipy: chi2.ppf(0.025, 1032)/2/26 and chi2.ppf(0.975, 1034)/2/26.
    let boards = dir.path().join("boards.csv");
    let mut text = String::from("count\n");
    for c in BOARDS {
        text.push_str(&format!("{c}\n"));
    }
    std::fs::write(&boards, text).unwrap();
    let (ok, out, err) = cli(&["capability", "--input", &s(&boards), "--chart", "c"]);
    assert!(ok, "{err}");
    assert!(
        out.contains("defects per unit        516 in 26 units = 19.8462, 95% exact interval (Poisson) 18.1705 to 21.6348"),
        "{out}"
    );
}

/// What broke, as a class: a file of samples that is not one. Each refusal names the file, the
/// line and the column or the flag, and nothing is written.
#[test]
fn a_bad_file_of_samples_is_refused_naming_the_place() {
    let dir = tempfile::tempdir().unwrap();
    let s = |p: &Path| p.to_str().unwrap().to_string();
    let out = dir.path().join("x.toml");
    for (body, extra, want) in [
        (
            "count,size\n3,50\n2.5,50\n",
            vec![],
            "x.csv:3:1: 2.5 is not a count: a whole number of zero or more (column \"count\")",
        ),
        (
            "count,size\n3,50\n-1,50\n",
            vec![],
            "x.csv:3:1: -1 is not a count",
        ),
        (
            "count,size\n3,50\n51,50\n",
            vec![],
            "x.csv:3: 51 nonconforming of 50 inspected",
        ),
        (
            "count,size\n3,50\n1,0\n",
            vec![],
            "x.csv:3:2: 0 is not a number of units inspected: more than zero (column \"size\")",
        ),
        (
            "count,size\n3,50\n1,12.5\n",
            vec![],
            "x.csv:3:2: 12.5 is not a number of parts inspected",
        ),
        (
            "count,size\n3,50\n1,fifty\n",
            vec![],
            "x.csv:3:2: \"fifty\" is not a number (column \"size\")",
        ),
        (
            "count,size\n3,50\n1\n",
            vec![],
            "x.csv:3: the row has 1 fields but the first row has 2",
        ),
        (
            "bad,n\n3,50\n",
            vec![],
            "x.csv: no column named \"count\" (the header has: bad, n)",
        ),
        ("count,size\n", vec![], "x.csv: no readings found"),
        (
            "count,size\n0,50\n0,50\n",
            vec![],
            "no nonconformities at all in 2 samples",
        ),
        (
            "count,size\n3,50\n2,50\n",
            vec!["--usl", "0.1"],
            "--lsl, --usl and --target do not apply to a p chart",
        ),
        (
            "count,size\n3,50\n2,50\n",
            vec!["--sigma-estimator", "mean-range"],
            "--sigma-estimator applies to measured subgroups",
        ),
    ] {
        let csv = dir.path().join("x.csv");
        std::fs::write(&csv, body).unwrap();
        let mut args = vec![
            "limits".to_string(),
            "--input".into(),
            s(&csv),
            "--chart".into(),
            "p".into(),
            "--characteristic".into(),
            "x".into(),
            "--write".into(),
            s(&out),
        ];
        args.extend(extra.iter().map(|a| a.to_string()));
        let a: Vec<&str> = args.iter().map(String::as_str).collect();
        let (ok, _, err) = cli(&a);
        assert!(!ok, "{body:?} {extra:?} succeeded");
        assert!(err.contains(want), "{body:?} {extra:?}: {err}");
        assert!(!out.exists(), "{body:?} left a file");
    }
    // The commands for measured subgroups say where attribute charts are handled.
    let csv = dir.path().join("x.csv");
    std::fs::write(&csv, "count,size\n3,50\n").unwrap();
    let (ok, _, err) = cli(&[
        "report",
        "--input",
        &s(&csv),
        "--chart",
        "p",
        "--output",
        &s(&dir.path().join("r.html")),
    ]);
    assert!(!ok);
    assert!(
        err.contains(
            "for an attribute chart use linewarden limits, chart or capability with --chart p"
        ),
        "{err}"
    );
    let (ok, _, err) = cli(&[
        "capability",
        "--input",
        &s(&csv),
        "--chart",
        "c",
        "--usl",
        "3",
    ]);
    assert!(!ok);
    assert!(
        err.contains("--lsl, --usl and --target do not apply to a c chart"),
        "{err}"
    );
}

/// The live page's and the email's chart of an attribute characteristic: the plotted rate with
/// each point's own limits (they step with the units inspected), no spread chart.
#[test]
fn the_live_chart_of_a_u_chart_steps_its_limits_with_the_units() {
    use linewarden::engine::{Engine, Incoming};
    let dir = tempfile::tempdir().unwrap();
    let ubar: f64 = 2.0;
    let ucl5 = ubar + 3.0 * (ubar / 5.0).sqrt();
    let lcl5 = ubar - 3.0 * (ubar / 5.0).sqrt();
    std::fs::write(
        dir.path().join("cloth.toml"),
        limits_file("cloth", "u", 5, (ubar / 5.0).sqrt(), ubar, ucl5, lcl5),
    )
    .unwrap();
    let cfg = cell(
        dir.path(),
        "id = \"cloth\"\nchart = \"u\"\nlimits = \"cloth.toml\"\nsubgroup = { size = 1 }",
        &[],
    );
    let mut e = Engine::new(&cfg, 0);
    for (i, (c, n)) in [(10.0, 5.0), (9.0, 4.0), (12.0, 2.5)]
        .into_iter()
        .enumerate()
    {
        let mut inc = Incoming {
            source: "test".into(),
            characteristic: "cloth".into(),
            value: c,
            unit: None,
            source_time_ms: None,
            source_time_ignored: false,
            arrival_ms: 1_000 * (i as i64 + 1),
            part: None,
            source_key: None,
            word: None,
            inspected: Some(n),
            sent: None,
        };
        e.admit(&mut inc).unwrap();
        e.accept(i as u64 + 1, &inc);
    }
    let view = e.view_of("cloth").unwrap();
    let p = linewarden::chart::Picture::of_view(&view, &[], &jiff::tz::TimeZone::UTC).unwrap();
    assert_eq!(p.panels.len(), 1, "no spread chart for counts");
    assert_eq!(p.panels[0].what, "defects per unit (u)");
    for (pt, n) in p.panels[0].points.iter().zip([5.0, 4.0, 2.5]) {
        let ucl = pt.limits.unwrap().ucl;
        assert!(
            (ucl - (ubar + 3.0 * (ubar / n).sqrt())).abs() < 1e-9,
            "n {n}: {ucl}"
        );
    }
    assert!(p.svg(900, 520).unwrap().contains("defects per unit (u)"));
}
