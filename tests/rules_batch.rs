//! The incremental rule evaluators against a plain batch re-evaluation of the whole history at
//! every point: for random sequences with shifts, trends, alternation and ties injected, both
//! must raise exactly the same violations.

use std::collections::BTreeSet;

use proptest::prelude::*;

use linewarden::rules::config::{Rule, RuleKind, RuleSet};
use linewarden::rules::point::{ChartBasis, Plotted, PointEvaluator};
use linewarden::rules::{Preset, Severity};
use linewarden::stats::Limits;
use linewarden::stats::variables::VariablesChart;

const CENTER: f64 = 12.0;
const SIGMA: f64 = 0.004; // of single readings
const N: usize = 4;

fn basis() -> ChartBasis {
    let sp = SIGMA / 2.0;
    ChartBasis {
        chart: VariablesChart::XbarR.into(),
        center: CENTER,
        sigma: SIGMA,
        nominal_n: N,
        location: Limits {
            center: CENTER,
            ucl: CENTER + 3.0 * sp,
            lcl: CENTER - 3.0 * sp,
        },
        dispersion: Limits {
            center: 2.059 * SIGMA,
            ucl: 4.698 * SIGMA,
            lcl: 0.0,
        },
        unit: "mm".into(),
        decimals: None,
        below_severity: None,
    }
}

fn rule_set() -> RuleSet {
    let mut set = RuleSet::preset(Preset::Nelson);
    set.rules.push(Rule {
        id: "ewma".into(),
        severity: Severity::Warn,
        kind: RuleKind::Ewma {
            lambda: 0.2,
            width: 2.962,
        },
    });
    set.rules.push(Rule {
        id: "cusum".into(),
        severity: Severity::Warn,
        kind: RuleKind::Cusum {
            k: 0.5,
            h: 4.0,
            head_start: 0.5,
            restart_on_acknowledge: true,
        },
    });
    set.rules.push(Rule {
        id: "wide-cluster".into(),
        severity: Severity::Notice,
        kind: RuleKind::Cluster {
            count: 5,
            window: 7,
            beyond_sigma: 0.5,
        },
    });
    set
}

/// Plain re-evaluation: for point `t`, which rules fire, looking at the whole history 0..=t.
fn batch(set: &RuleSet, b: &ChartBasis, pts: &[Plotted]) -> BTreeSet<(u64, String)> {
    let sp = b.sigma_point(N);
    let z: Vec<f64> = pts.iter().map(|p| (p.mean - b.center) / sp).collect();
    let mut out = BTreeSet::new();
    for t in 0..pts.len() {
        let hist = &z[..=t];
        let zt = z[t];
        // Length of the trailing run of points satisfying `f`.
        let trailing = |f: &dyn Fn(usize) -> bool| (0..=t).rev().take_while(|&i| f(i)).count();
        for r in &set.rules {
            let fires = match &r.kind {
                RuleKind::BeyondLimits { .. } => {
                    let loc = pts[t].mean > b.location.ucl || pts[t].mean < b.location.lcl;
                    let disp = pts[t]
                        .dispersion
                        .is_some_and(|d| d > b.dispersion.ucl || d < b.dispersion.lcl);
                    loc || disp
                }
                RuleKind::Cluster {
                    count,
                    window,
                    beyond_sigma: s,
                } => {
                    let from = (t + 1).saturating_sub(*window as usize);
                    let w = &hist[from..];
                    let up = w.iter().filter(|v| **v > *s).count();
                    let down = w.iter().filter(|v| **v < -*s).count();
                    (zt > *s && up >= *count as usize) || (zt < -*s && down >= *count as usize)
                }
                RuleKind::OneSideRun { length } => {
                    let l = *length as usize;
                    trailing(&|i| z[i] > 0.0) >= l || trailing(&|i| z[i] < 0.0) >= l
                }
                RuleKind::SteadyTrend { length } => {
                    let l = *length as usize;
                    let up = trailing(&|i| i > 0 && z[i] > z[i - 1]) + 1;
                    let down = trailing(&|i| i > 0 && z[i] < z[i - 1]) + 1;
                    up >= l || down >= l
                }
                RuleKind::Alternating { length } => {
                    // Differences d_i = sign(z_i − z_{i−1}); count trailing nonzero differences
                    // that alternate, plus one for the first point.
                    let sign = |i: usize| {
                        (z[i] - z[i - 1])
                            .partial_cmp(&0.0)
                            .map(|o| o as i8)
                            .unwrap_or(0)
                    };
                    let mut k = 0;
                    let mut i = t;
                    while i >= 1 && sign(i) != 0 && (i == t || sign(i) == -sign(i + 1)) {
                        k += 1;
                        i -= 1;
                    }
                    k + 1 >= *length as usize
                }
                RuleKind::HuggingCentre {
                    length,
                    within_sigma,
                } => trailing(&|i| z[i].abs() < *within_sigma) >= *length as usize,
                RuleKind::AvoidingCentre {
                    length,
                    beyond_sigma,
                } => {
                    let l = *length as usize;
                    if trailing(&|i| z[i].abs() > *beyond_sigma) >= l {
                        let last = &hist[t + 1 - l..];
                        last.iter().any(|v| *v > 0.0) && last.iter().any(|v| *v < 0.0)
                    } else {
                        false
                    }
                }
                RuleKind::Ewma { lambda, width } => {
                    let e = hist
                        .iter()
                        .fold(0.0, |acc, v| lambda * v + (1.0 - lambda) * acc);
                    e.abs() > width * (lambda / (2.0 - lambda)).sqrt()
                }
                RuleKind::Cusum {
                    k, h, head_start, ..
                } => {
                    let (mut hi, mut lo) = (head_start * h, head_start * h);
                    for v in hist {
                        hi = f64::max(0.0, hi + v - k);
                        lo = f64::max(0.0, lo - v - k);
                    }
                    hi > *h || lo > *h
                }
                _ => false,
            };
            if fires {
                out.insert((pts[t].number, r.id.clone()));
            }
        }
    }
    out
}

/// A sequence of standardized values with a pattern injected, quantized sometimes to force ties.
fn sequences() -> impl Strategy<Value = Vec<f64>> {
    (
        prop::collection::vec(-2.5f64..2.5, 20..160),
        0usize..6,
        0usize..160,
        -2.5f64..2.5,
        any::<bool>(),
    )
        .prop_map(|(mut v, pattern, at, size, quantize)| {
            let len = v.len();
            let at = at % len;
            for (i, x) in v.iter_mut().enumerate().skip(at) {
                let k = (i - at) as f64;
                match pattern {
                    0 => {}
                    1 => *x += size,           // sustained shift
                    2 => *x += size * 0.1 * k, // drift
                    3 => *x = if i % 2 == 0 { size } else { -size }, // alternation, mixture
                    4 => *x *= 0.2,            // hugging the centre
                    _ => *x = size * 0.3 * k - 3.0, // a clean trend
                }
            }
            if quantize {
                for x in &mut v {
                    *x = (*x * 2.0).round() / 2.0;
                }
            }
            v
        })
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(3000))]

    #[test]
    fn incremental_equals_batch(zs in sequences(), ranges in prop::collection::vec(0.0f64..6.0, 160)) {
        let b = basis();
        let set = rule_set();
        let sp = b.sigma_point(N);
        let pts: Vec<Plotted> = zs
            .iter()
            .enumerate()
            .map(|(i, z)| Plotted {
                number: i as u64 + 1,
                time_ms: 1_780_000_000_000 + i as i64 * 60_000,
                n: N,
                mean: b.center + z * sp,
                dispersion: Some(ranges[i] * SIGMA),
                attribute: None,
            })
            .collect();
        let mut eval = PointEvaluator::new(&set, b.clone());
        let mut incremental = BTreeSet::new();
        for p in &pts {
            for v in eval.evaluate(p) {
                prop_assert!(!v.message.is_empty());
                prop_assert!(v.points.last().is_some_and(|last| last.number == p.number));
                incremental.insert((p.number, v.rule.clone()));
            }
        }
        let expected = batch(&set, &b, &pts);
        prop_assert_eq!(incremental, expected);
    }
}

#[test]
fn state_survives_a_round_trip_through_json() {
    // A restart rebuilds the evaluator from saved state: 7 points above the centre before, 2
    // after, and a run of 9 still fires on the 9th.
    let set = RuleSet::preset(Preset::Nelson);
    let b = basis();
    let sp = b.sigma_point(N);
    let mut e = PointEvaluator::new(&set, b.clone());
    let p = |i: u64, z: f64| Plotted {
        number: i,
        time_ms: i as i64 * 1000,
        n: N,
        mean: CENTER + z * sp,
        dispersion: Some(2.0 * SIGMA),
        attribute: None,
    };
    let zs = [0.3, 0.5, 0.2, 0.6, 0.4, 0.7, 0.25];
    for (i, z) in zs.iter().enumerate() {
        assert!(e.evaluate(&p(i as u64 + 1, *z)).is_empty());
    }
    let saved = serde_json::to_string(e.state()).unwrap();
    let (mut e2, fitted) = PointEvaluator::resume(&set, b, serde_json::from_str(&saved).unwrap());
    assert!(fitted);
    assert!(e2.evaluate(&p(8, 0.35)).is_empty());
    let v = e2.evaluate(&p(9, 0.45));
    assert_eq!(v.len(), 1, "{v:?}");
    assert_eq!(v[0].rule, "one-side-run");
    assert_eq!(v[0].points.len(), 9);
    assert_eq!(v[0].points[0].number, 1);
    assert!(
        v[0].message
            .starts_with("9 subgroup means in a row above the centre line 12.0000 mm"),
        "{}",
        v[0].message
    );
}
