//! Average run lengths against published values (tolerance about 1%, as the sources print three
//! or four significant digits).

use linewarden::rules::arl::{self, ArlOptions, Method, cusum_arl, ewma_arl};
use linewarden::rules::config::{ChartSide, Rule, RuleKind, RuleSet};
use linewarden::rules::{Preset, Severity};

mod common;

fn single(kind: RuleKind) -> RuleSet {
    RuleSet::new(vec![Rule {
        id: kind.name().to_string(),
        severity: Severity::Warn,
        kind,
    }])
}

fn within(actual: f64, published: f64, rel: f64, what: &str) {
    assert!(
        ((actual - published) / published).abs() <= rel,
        "{what}: computed {actual}, published {published}"
    );
}

#[test]
fn one_point_beyond_three_sigma() {
    // 1 / (2·(1 − Φ(3))) = 370.4 (Montgomery, Introduction to SQC, ch. 5, the in-control ARL of
    // a Shewhart chart with 3-sigma limits).
    let set = single(RuleKind::BeyondLimits {
        chart: ChartSide::Both,
    });
    let r = arl::arl(&set, &[0.0, 1.0], &ArlOptions::default()).unwrap();
    assert_eq!(r[0].method, Method::Markov);
    within(r[0].arl, 370.4, 0.001, "ARL0");
    // Montgomery, ch. 6: a one-sigma shift on an individuals chart is caught after 43.9 points.
    within(r[1].arl, 43.89, 0.002, "ARL(1)");
}

#[test]
fn western_electric_rules_together() {
    // Champ and Woodall, Technometrics 29(4), 1987, Table 1: the four Western Electric rules
    // together have an in-control ARL of 91.75.
    let set = RuleSet::preset(Preset::WesternElectric);
    let r = arl::arl(&set, &[0.0], &ArlOptions::default()).unwrap();
    assert_eq!(r[0].method, Method::Markov);
    within(r[0].arl, 91.75, 0.01, "WE ARL0");
    eprintln!("WE chain: {:?} states, ARL0 {}", r[0].states, r[0].arl);
}

#[test]
fn tabular_cusum_montgomery_table() {
    // Montgomery, Introduction to SQC, ch. 9, ARL of the tabular CUSUM with k = 1/2:
    // h = 4: 168 in control, 8.38 at a one-sigma shift; h = 5: 465 and 10.4.
    within(cusum_arl(0.5, 4.0, 0.0, 96), 168.0, 0.01, "h=4 ARL0");
    within(cusum_arl(0.5, 4.0, 1.0, 96), 8.38, 0.01, "h=4 ARL(1)");
    within(cusum_arl(0.5, 5.0, 0.0, 96), 465.0, 0.01, "h=5 ARL0");
    within(cusum_arl(0.5, 5.0, 1.0, 96), 10.4, 0.01, "h=5 ARL(1)");
    let set = single(RuleKind::Cusum {
        k: 0.5,
        h: 5.0,
        head_start: 0.0,
        restart_on_acknowledge: true,
    });
    let r = arl::arl(&set, &[0.0], &ArlOptions::default()).unwrap();
    assert_eq!(r[0].method, Method::IntegralEquation);
    within(r[0].arl, 465.0, 0.01, "via arl()");
}

/// What broke: with a head start the two-sided ARL was the one-sided head-start ARL halved,
/// 447.92 for k = 0.5, h = 5, head start h/2, named "integral-equation". Both sums start at
/// h/2 together, so that combination does not hold. Now it is simulated with its interval and
/// named so. Reference: an independent simulation gives 429.1 ± 1.4 (h = 5) and 148.9 ± 0.5
/// (h = 4); Lucas and Crosier (Technometrics 24(3), 1982) give about 430 for h = 5 (from
/// memory). The one-sided head-start ARL itself is still computed: its integral equation holds.
#[test]
fn two_sided_cusum_with_a_head_start_is_simulated_not_halved() {
    let opts = ArlOptions {
        runs: 40_000,
        ..ArlOptions::default()
    };
    for (h, reference, its_ci, old) in [(5.0, 429.1, 1.4, 447.92), (4.0, 148.9, 0.5, 158.19)] {
        let set = single(RuleKind::Cusum {
            k: 0.5,
            h,
            head_start: 0.5,
            restart_on_acknowledge: true,
        });
        let r = &arl::arl(&set, &[0.0], &opts).unwrap()[0];
        assert_eq!(r.method, Method::MonteCarlo, "h = {h}");
        let [lo, hi] = r.ci95.unwrap();
        let half = (hi - lo) / 2.0;
        assert!(
            (r.arl - reference).abs() <= half + its_ci,
            "h = {h}: {} ± {half}, reference {reference} ± {its_ci}",
            r.arl
        );
        assert!(
            old > hi + its_ci,
            "h = {h}: the old figure {old} is not excluded ({lo}, {hi})"
        );
    }
    // The one-sided scheme's head start (no interplay of two sums): halving it was the error.
    let one = arl::one_sided_cusum(0.5, 5.0, 2.5, 0.0);
    assert!((one / 2.0 - 447.92).abs() < 0.05, "{one}");
}

#[test]
fn ewma_lucas_saccucci() {
    // Lucas and Saccucci, Technometrics 32(1), 1990: λ = 0.10 with L = 2.814 and λ = 0.20 with
    // L = 2.962 both give an in-control ARL of about 500.
    within(ewma_arl(0.10, 2.814, 0.0, 160), 500.0, 0.01, "λ=0.1");
    within(ewma_arl(0.20, 2.962, 0.0, 160), 500.0, 0.01, "λ=0.2");
}

#[test]
fn monte_carlo_agrees_with_the_exact_chain() {
    // The same single rule, forced through simulation by adding a trend rule that can never
    // fire within a run of this length (a run of 64 steadily rising points), agrees with the
    // exact 370.4 within its own confidence interval (plus the shift the extra rule can cause).
    let mut set = single(RuleKind::BeyondLimits {
        chart: ChartSide::Both,
    });
    set.rules.push(Rule {
        id: "long-trend".into(),
        severity: Severity::Notice,
        kind: RuleKind::SteadyTrend { length: 64 },
    });
    let opts = ArlOptions {
        runs: 40000,
        ..ArlOptions::default()
    };
    let r = arl::arl(&set, &[0.0], &opts).unwrap();
    assert_eq!(r[0].method, Method::MonteCarlo);
    let [lo, hi] = r[0].ci95.unwrap();
    assert!(lo < 370.4 && 370.4 < hi, "CI {lo}..{hi}, mean {}", r[0].arl);
}

/// `arl --chart`: the attribute charts' beyond-limits ARLs from the command line, against
/// scipy 1.17.1 (binom.sf + binom.cdf at the np chart's exact limits 22 and 58, poisson.sf);
/// bad values are refused with the flag named.
#[test]
fn attribute_chart_arls_from_the_command_line_match_scipy() {
    let run = common::peers::cli;
    let (ok, out, err) = run(&[
        "arl", "--chart", "np", "--p0", "0.1", "--n", "400", "--at", "0.1,0.15", "--json",
    ]);
    assert!(ok, "{err}");
    let v: serde_json::Value = serde_json::from_str(&out).unwrap();
    assert_eq!(v["limits"]["lcl"], 22.0);
    assert_eq!(v["limits"]["ucl"], 58.0);
    let p = |i: usize| {
        v["results"][i]["p_above"].as_f64().unwrap() + v["results"][i]["p_below"].as_f64().unwrap()
    };
    within(p(0), 0.0021528989788261446, 1e-9, "np in control");
    within(p(1), 0.5770276927189687, 1e-9, "np at 0.15");
    let (ok, out, err) = run(&["arl", "--chart", "c", "--p0", "4", "--json"]);
    assert!(ok, "{err}");
    let v: serde_json::Value = serde_json::from_str(&out).unwrap();
    within(
        v["results"][0]["arl"].as_f64().unwrap(),
        1.0 / 0.0028397661205137414,
        1e-9,
        "c in control",
    );
    let (ok, out, _) = run(&["arl", "--chart", "p", "--p0", "0.02", "--n", "200"]);
    assert!(
        ok && out.contains("one false alarm every 133.7 samples"),
        "{out}"
    );
    assert!(out.contains("set to zero"), "{out}");
    for (args, want) in [
        (
            &["arl", "--chart", "p", "--p0", "1.5", "--n", "200"][..],
            "--p0 1.5",
        ),
        (&["arl", "--chart", "p", "--p0", "0.1"][..], "needs --n"),
        (
            &["arl", "--chart", "np", "--p0", "0.1", "--n", "20.5"][..],
            "whole number",
        ),
        (&["arl", "--chart", "u", "--n", "2"][..], "needs --p0"),
    ] {
        let (ok, _, err) = run(args);
        assert!(!ok && err.contains(want), "{args:?}: {err}");
    }
}

/// What broke: `backtest`'s theory column gave the beyond-limits rule the location chart's
/// 2.70 per 1,000, while the rule also watches the dispersion chart. With a known sigma and
/// normal data the mean is independent of the range and of s, so the rates join exactly.
/// Expected values: scipy 1.17.1, `n·quad(φ(x)(Φ(x+w)−Φ(x))^(n−1))` for the range's CDF at
/// D1 and D2 (d2, d3 by the same quadrature), `chi2.sf((n−1)·B6², n−1)` for s, and
/// `2·norm.sf(D2(2)/√2)` for a moving range of two.
#[test]
fn the_beyond_limits_rule_counts_the_dispersion_chart_too() {
    use linewarden::rules::theory::{Basis, How, in_control};
    use linewarden::stats::variables::VariablesChart;
    let rule = |chart| Rule {
        id: "beyond-limits".into(),
        severity: Severity::Stop,
        kind: RuleKind::BeyondLimits { chart },
    };
    let opts = ArlOptions::default();
    let rate =
        |chart, n, side| in_control(&rule(side), &Basis::Variables { chart, n }, &opts).unwrap();
    for (chart, n, alone, both) in [
        (VariablesChart::XbarR, 3, 5.842954, 8.526975),
        (VariablesChart::XbarR, 5, 4.603048, 7.290417),
        // n = 7: the range chart's lower limit D1 is above zero, a lower tail as well.
        (VariablesChart::XbarR, 7, 4.376952, 7.064931),
        (
            VariablesChart::XbarS,
            5,
            3.899114,
            1000.0 - (1000.0 - 2.699796) * (1.0 - 3.899114e-3),
        ),
        (
            VariablesChart::XbarS,
            10,
            2.999357,
            1000.0 - (1000.0 - 2.699796) * (1.0 - 2.999357e-3),
        ),
    ] {
        let d = rate(chart, n, ChartSide::Dispersion);
        within(
            d.per_1000,
            alone,
            2e-4,
            &format!("{chart:?} n={n} dispersion"),
        );
        assert_eq!(d.how, How::Exact);
        let b = rate(chart, n, ChartSide::Both);
        within(b.per_1000, both, 2e-4, &format!("{chart:?} n={n} both"));
        assert_eq!(b.how, How::Exact);
        let l = rate(chart, n, ChartSide::Location);
        within(l.per_1000, 2.699796, 1e-4, "location alone: 2(1 − Φ(3))");
    }
    // Individuals: the moving ranges overlap, so the joined rate is approximate, and says so.
    let i = rate(VariablesChart::Individuals, 1, ChartSide::Both);
    within(i.per_1000, 11.827302, 2e-4, "individuals both");
    assert_eq!(i.how, How::Approximate);
}

/// What broke: the theory column gave the demo's leak test (a p chart, p̄ 0.03, n 20) the
/// normal chart's 2.7 per 1,000; its exact binomial rate is 21.0 (`arl --chart p` gives ARL
/// 47.6). scipy 1.17.1: `1000·binom.sf(2, 20, 0.03)` = 21.0083563783 (the upper limit 0.1444
/// is 2.89 parts: three or more are beyond; the lower limit is clamped at zero).
#[test]
fn an_attribute_charts_beyond_limits_rate_is_exact_binomial() {
    use linewarden::rules::theory::{Basis, How, in_control};
    use linewarden::stats::Limits;
    use linewarden::stats::attributes::AttributeChart;
    let basis = Basis::Attribute {
        chart: AttributeChart::P,
        parameter: 0.03,
        n: 20.0,
        limits: Limits {
            center: 0.03,
            ucl: 0.1444333867,
            lcl: 0.0,
        },
    };
    let r = in_control(
        &Rule {
            id: "beyond-limits".into(),
            severity: Severity::Stop,
            kind: RuleKind::BeyondLimits {
                chart: ChartSide::Both,
            },
        },
        &basis,
        &ArlOptions::default(),
    )
    .unwrap();
    within(r.per_1000, 21.0083563783, 1e-9, "p chart beyond limits");
    assert_eq!(r.how, How::Exact);
}

/// A run rule on a discrete statistic: a point exactly on the centre line (2 of 20 parts at
/// p̄ 0.1) breaks a run, which no normal chain knows. The simulated rate must agree with an
/// exact chain written here over the three outcomes, with binomial probabilities from scipy
/// 1.17.1 (`binom(20, 0.1)`: sf(2) = 0.32307319, cdf(1) = 0.39174700, pmf(2) = 0.28517981).
#[test]
fn a_run_rule_on_a_p_chart_is_simulated_and_agrees_with_an_exact_chain() {
    use linewarden::rules::theory::{Basis, How, in_control};
    use linewarden::stats::Limits;
    use linewarden::stats::attributes::AttributeChart;
    let sigma = (0.1f64 * 0.9 / 20.0).sqrt();
    let basis = Basis::Attribute {
        chart: AttributeChart::P,
        parameter: 0.1,
        n: 20.0,
        limits: Limits {
            center: 0.1,
            ucl: 0.1 + 3.0 * sigma,
            lcl: 0.0,
        },
    };
    let length = 6;
    let r = in_control(
        &Rule {
            id: "one-side-run".into(),
            severity: Severity::Warn,
            kind: RuleKind::OneSideRun { length },
        },
        &basis,
        &ArlOptions::default(),
    )
    .unwrap();
    assert_eq!(r.how, How::Simulated);
    assert!(!r.at_most);
    // The chain: no run (e), i points above in a row (a[i]) or below (b[i]), i = 1..length−1;
    // a point on the centre line ends both. Expected steps to a run of `length`, by value
    // iteration to convergence.
    let (pa, pb, p0) = (0.32307319481053404, 0.3917469981251679, 0.28517980706429846);
    let l = length as usize;
    let (mut e, mut a, mut b) = (0.0f64, vec![0.0f64; l], vec![0.0f64; l]);
    for _ in 0..100_000 {
        let ne = 1.0 + pa * a[1] + pb * b[1] + p0 * e;
        let mut na = vec![0.0; l];
        let mut nb = vec![0.0; l];
        for i in 1..l {
            let up = if i + 1 < l { a[i + 1] } else { 0.0 };
            let down = if i + 1 < l { b[i + 1] } else { 0.0 };
            na[i] = 1.0 + pa * up + pb * b[1] + p0 * e;
            nb[i] = 1.0 + pb * down + pa * a[1] + p0 * e;
        }
        e = ne;
        a = na;
        b = nb;
    }
    let arl0 = e;
    let exact = 1000.0 / arl0;
    let [lo, hi] = r.ci95_per_1000.unwrap();
    assert!(
        lo <= exact && exact <= hi,
        "simulated {} ({lo} to {hi}) per 1,000, the chain gives {exact} (ARL {arl0})",
        r.per_1000
    );
}
