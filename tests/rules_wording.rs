//! Each preset rule against the wording of its published definition, on crafted sequences:
//! the pattern one point short does not fire, the full pattern does.
//!
//! Western Electric, Statistical Quality Control Handbook (1956), the four tests for unnatural
//! patterns: (1) a single point outside 3 sigma; (2) two out of three successive points in zone
//! A or beyond (beyond 2 sigma), on one side of the centre line; (3) four out of five successive
//! points in zone B or beyond (beyond 1 sigma), on one side; (4) eight successive points in zone
//! C or beyond (on one side of the centre line).
//!
//! Nelson, "The Shewhart control chart — tests for special causes", Journal of Quality
//! Technology 16(4), 1984: (1) one point beyond zone A; (2) nine points in a row on one side of
//! the centre line; (3) six points in a row steadily increasing or decreasing; (4) fourteen points
//! in a row alternating up and down; (5) two out of three points in a row in zone A or beyond; (6)
//! four out of five points in a row in zone B or beyond; (7) fifteen points in a row in zone C,
//! above and below the centre line; (8) eight points in a row on both sides of the centre line
//! with none in zone C.

use linewarden::diag::Locator;
use linewarden::rules::point::{ChartBasis, Plotted, PointEvaluator};
use linewarden::rules::reading::{Reading, ReadingBasis, ReadingEvaluator};
use linewarden::rules::{Preset, RuleSet, RulesConfig, Severity};
use linewarden::stats::capability::Spec;

/// The rule ids that fire on the last point of `zs` (standardized values).
fn fired_at_end(set: &RuleSet, zs: &[f64]) -> Vec<String> {
    let mut e = PointEvaluator::new(set, ChartBasis::standard());
    let mut last = Vec::new();
    for (i, z) in zs.iter().enumerate() {
        last = e
            .evaluate(&Plotted {
                number: i as u64 + 1,
                time_ms: i as i64,
                n: 1,
                mean: *z,
                dispersion: None,
                attribute: None,
            })
            .into_iter()
            .map(|v| v.rule)
            .collect();
    }
    last
}

fn fires(preset: Preset, rule: &str, zs: &[f64]) -> bool {
    fired_at_end(&RuleSet::preset(preset), zs)
        .iter()
        .any(|r| r == rule)
}

#[test]
fn one_point_beyond_three_sigma() {
    for p in [Preset::WesternElectric, Preset::Nelson] {
        assert!(fires(p, "beyond-limits", &[0.2, 3.01]));
        assert!(fires(p, "beyond-limits", &[0.2, -3.01]));
        assert!(!fires(p, "beyond-limits", &[0.2, 2.99]));
    }
}

#[test]
fn two_of_three_beyond_two_sigma_on_one_side() {
    for p in [Preset::WesternElectric, Preset::Nelson] {
        assert!(fires(p, "near-limit-cluster", &[2.1, 0.0, 2.2]));
        assert!(fires(p, "near-limit-cluster", &[0.0, -2.1, -2.2]));
        assert!(
            !fires(p, "near-limit-cluster", &[2.1, 0.0, 0.0, 2.2]),
            "not within 3"
        );
        assert!(
            !fires(p, "near-limit-cluster", &[2.1, 0.0, -2.2]),
            "opposite sides"
        );
    }
}

#[test]
fn four_of_five_beyond_one_sigma_on_one_side() {
    for p in [Preset::WesternElectric, Preset::Nelson] {
        assert!(fires(p, "off-centre-cluster", &[1.1, 1.2, 0.0, 1.3, 1.4]));
        assert!(!fires(p, "off-centre-cluster", &[1.1, 1.2, 0.0, 0.0, 1.4]));
        assert!(!fires(p, "off-centre-cluster", &[1.1, 1.2, -1.3, 1.3, 0.5]));
    }
}

#[test]
fn run_on_one_side_eight_and_nine() {
    let above = |n: usize| vec![0.3; n];
    assert!(fires(Preset::WesternElectric, "one-side-run", &above(8)));
    assert!(!fires(Preset::WesternElectric, "one-side-run", &above(7)));
    assert!(fires(Preset::Nelson, "one-side-run", &above(9)));
    assert!(!fires(Preset::Nelson, "one-side-run", &above(8)));
    let mut broken = above(8);
    broken[3] = 0.0; // a point on the centre line breaks the run (common practice)
    broken.push(0.3);
    assert!(!fires(Preset::Nelson, "one-side-run", &broken));
}

#[test]
fn six_steadily_increasing_or_decreasing() {
    let rising: Vec<f64> = (0..6).map(|i| -1.0 + 0.3 * i as f64).collect();
    assert!(fires(Preset::Nelson, "steady-trend", &rising));
    assert!(!fires(Preset::Nelson, "steady-trend", &rising[1..]));
    let falling: Vec<f64> = rising.iter().rev().copied().collect();
    assert!(fires(Preset::Nelson, "steady-trend", &falling));
    let mut tie = rising.clone();
    tie[3] = tie[2]; // equal neighbours are not "steadily increasing"
    assert!(!fires(Preset::Nelson, "steady-trend", &tie));
}

#[test]
fn fourteen_alternating_up_and_down() {
    let alt = |n: usize| {
        (0..n)
            .map(|i| if i % 2 == 0 { 0.5 } else { -0.5 })
            .collect::<Vec<_>>()
    };
    assert!(fires(Preset::Nelson, "alternating", &alt(14)));
    assert!(!fires(Preset::Nelson, "alternating", &alt(13)));
}

#[test]
fn fifteen_within_one_sigma_both_sides() {
    let hug = |n: usize| {
        (0..n)
            .map(|i| if i % 3 == 0 { 0.5 } else { -0.4 })
            .collect::<Vec<_>>()
    };
    assert!(fires(Preset::Nelson, "hugging-centre", &hug(15)));
    assert!(!fires(Preset::Nelson, "hugging-centre", &hug(14)));
}

#[test]
fn eight_on_both_sides_none_within_one_sigma() {
    let mix: Vec<f64> = (0..8)
        .map(|i| if i % 3 == 0 { 1.5 } else { -1.6 })
        .collect();
    assert!(fires(Preset::Nelson, "avoiding-centre", &mix));
    assert!(!fires(Preset::Nelson, "avoiding-centre", &mix[1..]));
    let mut with_c = mix.clone();
    with_c[4] = 0.5;
    assert!(!fires(Preset::Nelson, "avoiding-centre", &with_c));
    // "On both sides": eight beyond 1 sigma all above is a shift (other rules), not a mixture.
    assert!(!fires(Preset::Nelson, "avoiding-centre", &[1.5; 8]));
}

#[test]
fn presets_have_the_published_rules_in_order() {
    assert_eq!(
        RuleSet::preset(Preset::WesternElectric).ids(),
        [
            "beyond-limits",
            "near-limit-cluster",
            "off-centre-cluster",
            "one-side-run"
        ]
    );
    assert_eq!(
        RuleSet::preset(Preset::Nelson).ids(),
        [
            "beyond-limits",
            "one-side-run",
            "steady-trend",
            "alternating",
            "near-limit-cluster",
            "off-centre-cluster",
            "hugging-centre",
            "avoiding-centre"
        ]
    );
}

fn parse(text: &str) -> Result<RuleSet, String> {
    #[derive(serde::Deserialize)]
    struct F {
        rules: RulesConfig,
    }
    let f: F = toml::from_str(text).map_err(|e| e.to_string())?;
    let loc = Locator::new(text);
    RuleSet::from_config(&f.rules, "rules", &loc).map_err(|p| {
        linewarden::diag::Problems {
            file: "r.toml".into(),
            problems: p,
        }
        .to_string()
    })
}

#[test]
fn presets_extend_and_switch_off() {
    let set = parse(
        r#"
[rules]
preset = "western-electric"
off = ["off-centre-cluster"]

[[rules.rule]]
id = "one-side-run"
kind = "one-side-run"
length = 7
severity = "stop"

[[rules.rule]]
kind = "ewma"
lambda = 0.2
width = 2.962
"#,
    )
    .unwrap();
    assert_eq!(
        set.ids(),
        [
            "beyond-limits",
            "near-limit-cluster",
            "one-side-run",
            "ewma"
        ]
    );
    assert_eq!(set.rules[2].severity, Severity::Stop);
    assert!(fired_at_end(&set, &[0.3; 7]).contains(&"one-side-run".to_string()));
}

#[test]
fn every_problem_in_a_rules_table_is_reported_with_its_place() {
    let text = r#"[rules]
preset = "nelson"
off = ["no-such-rule"]

[[rules.rule]]
kind = "one-side-run"
length = 1

[[rules.rule]]
kind = "ewma"
lambda = 1.5
length = 3

[[rules.rule]]
kind = "spiral"

[[rules.rule]]
kind = "cluster"
count = 5
window = 3
beyond_sigma = 2
"#;
    let err = parse(text).unwrap_err();
    let expect = [
        "r.toml:3:8: rules.off[0]: \"no-such-rule\" is not a rule of the preset; it has: beyond-limits,",
        "r.toml:7:10: rules.rule[0].length: 1 is out of range for kind = \"one-side-run\"; use 2 to 64",
        "r.toml:11:10: rules.rule[1].lambda: 1.5 is out of range for kind = \"ewma\"; use a value above 0 and at most 1",
        "r.toml:9:1: rules.rule[1]: kind = \"ewma\" needs width",
        "r.toml:12:10: rules.rule[1].length: kind = \"ewma\" does not take length",
        "r.toml:15:8: rules.rule[2].kind: \"spiral\" is not a rule kind; the kinds are: beyond-limits, cluster,",
        "r.toml:19:9: rules.rule[3].count: 5 is more than window = 3",
    ];
    for e in expect {
        assert!(err.contains(e), "missing\n  {e}\nin\n{err}");
    }
    assert_eq!(err.lines().count(), expect.len(), "{err}");
}

#[test]
fn reading_rules_spec_stuck_impossible_coarse_stale() {
    let set = parse(
        r#"
[rules]
[[rules.rule]]
kind = "outside-spec"
[[rules.rule]]
kind = "stuck-gauge"
repeats = 5
[[rules.rule]]
kind = "impossible-reading"
min = 0
max = 50
[[rules.rule]]
kind = "coarse-resolution"
window = 10
[[rules.rule]]
kind = "stale-feed"
max_silence_s = 600
"#,
    )
    .unwrap();
    let basis = ReadingBasis {
        spec: Some(Spec {
            lsl: Some(11.985),
            usl: Some(12.015),
            target: None,
        }),
        unit: "mm".into(),
        decimals: None,
    };
    let t0 = 1_780_000_000_000;
    let mut e = ReadingEvaluator::new(&set, basis, t0);
    let mut n = 0;
    let mut feed = |e: &mut ReadingEvaluator, v: f64| {
        n += 1;
        e.on_reading(Reading {
            number: n,
            time_ms: t0 + n as i64 * 1000,
            value: v,
        })
        .into_iter()
        .map(|v| (v.rule, v.message))
        .collect::<Vec<_>>()
    };
    let v = feed(&mut e, 12.016);
    assert_eq!(v[0].0, "outside-spec");
    assert_eq!(
        v[0].1,
        "reading 12.016 mm is above the upper specification 12.015 mm: this part is out of tolerance"
    );
    assert_eq!(feed(&mut e, 120.0)[1].0, "impossible-reading");
    for _ in 0..4 {
        assert!(feed(&mut e, 12.001).iter().all(|(r, _)| r != "stuck-gauge"));
    }
    let v = feed(&mut e, 12.001);
    assert!(
        v.iter()
            .any(|(r, m)| r == "stuck-gauge" && m.contains("5 times in a row")),
        "{v:?}"
    );
    // Readings on a 0.01 mm step (at least one full window of ten): a tenth of the 0.03 mm
    // tolerance is 0.003 mm.
    let mut coarse = Vec::new();
    for i in 0..20 {
        coarse.extend(feed(&mut e, 11.99 + 0.01 * (i % 3) as f64));
    }
    assert!(
        coarse.iter().any(|(r, _)| r == "coarse-resolution"),
        "{coarse:?}"
    );
    let last = t0 + 27_000; // 27 readings, one a second
    assert!(e.on_tick(last + 599_000).is_empty());
    let stale = e.on_tick(last + 900_000);
    assert_eq!(stale.len(), 1);
    assert!(
        stale[0].message.starts_with("no reading for 15 min"),
        "{}",
        stale[0].message
    );
    assert!(
        e.on_tick(last + 901_000).is_empty(),
        "one report per silence"
    );
}
