//! Learned limits keep the designed false-alarm rate on a stable process, and still leave out
//! a real upset in the baseline. The figures for every policy considered are printed by
//! `cargo bench --bench learning` (README, "How limits are learned").
//!
//! Design rate: 2·(1 − Φ(3)) = 0.27% per point (the normal tail; any statistics table).

use linewarden::stats::learning::{self, POLICY};
use linewarden::stats::study;
use linewarden::stats::variables::VariablesChart;

/// Baselines per case: enough that the medians are steady to well under a percent.
const RUNS: usize = 2000;
const SEED: u64 = 2026;

/// The regression: learning excluded ordinary subgroups from a stable baseline (3σ trial limits
/// on both charts, round after round) and estimated sigma low, so the line raised alarms on
/// nothing. Over many baselines of a stable normal process (subgroups of 1, 3 and 5; 20 and 25
/// subgroups), the median learned sigma is within 5% of the true sigma, a typical
/// installation's false-alarm rate after learning is within 1.5× the design rate, and the
/// exclusion adds almost nothing to the rate that estimating limits from 20–25 subgroups
/// costs anyway.
#[test]
fn learned_limits_on_a_stable_process_keep_the_design_false_alarm_rate() {
    let design = learning::design_rate();
    assert!((design - 0.0027).abs() < 1e-5, "design rate {design}");
    for n in [1usize, 3, 5] {
        for m in [20usize, 25] {
            let f = learning::simulate(&POLICY, n, m, RUNS, SEED).unwrap();
            println!(
                "n {n} m {m}: median sigma ratio {:.4}, false alarms per point: median {:.4}%, mean {:.4}% (no exclusion {:.4}%), excluded per baseline {:.3}",
                f.median_sigma_ratio,
                100.0 * f.median_false_alarm_rate,
                100.0 * f.false_alarm_rate,
                100.0 * f.false_alarm_rate_no_exclusion,
                f.mean_excluded
            );
            assert!(
                (f.median_sigma_ratio - 1.0).abs() <= 0.05,
                "n {n} m {m}: median learned sigma {:.4} of the true one",
                f.median_sigma_ratio
            );
            assert!(
                f.median_false_alarm_rate <= 1.5 * design,
                "n {n} m {m}: median false-alarm rate {:.4}% against the design {:.4}%",
                100.0 * f.median_false_alarm_rate,
                100.0 * design
            );
            assert!(
                f.false_alarm_rate <= 1.10 * f.false_alarm_rate_no_exclusion,
                "n {n} m {m}: exclusion raises the mean false-alarm rate from {:.4}% to {:.4}%",
                100.0 * f.false_alarm_rate_no_exclusion,
                100.0 * f.false_alarm_rate
            );
        }
    }
}

/// The policy that learned before (3σ on both charts, up to 10 rounds) fails the same test:
/// the test can tell a policy that cries wolf from one that does not.
#[test]
fn the_old_policy_fails_where_the_new_one_passes() {
    let old = learning::DESK;
    let f = learning::simulate(&old, 1, 20, RUNS, SEED).unwrap();
    let new = learning::simulate(&POLICY, 1, 20, RUNS, SEED).unwrap();
    assert!(
        f.false_alarm_rate > 1.10 * f.false_alarm_rate_no_exclusion,
        "old policy mean rate {:.4}% against no exclusion {:.4}%",
        100.0 * f.false_alarm_rate,
        100.0 * f.false_alarm_rate_no_exclusion
    );
    assert!(new.false_alarm_rate < f.false_alarm_rate);
}

fn stable(n: usize, m: usize, seed: u64) -> Vec<Vec<f64>> {
    // A fixed, deterministic, normal-looking baseline: sums of uniforms.
    let mut x = seed as f64 * 0.618_033_988_7;
    let mut next = || {
        let mut s = 0.0;
        for _ in 0..12 {
            x = (x * 9.1 + 0.137).fract();
            s += x;
        }
        s - 6.0
    };
    (0..m)
        .map(|_| (0..n).map(|_| 10.0 + next()).collect())
        .collect()
}

/// An upset inside the baseline (a mean 6 standard errors out, a range many times the usual)
/// is still left out of learned limits, with its reason.
#[test]
fn a_real_upset_in_the_baseline_is_still_excluded() {
    for (n, chart) in [(5usize, VariablesChart::XbarR), (3, VariablesChart::XbarR)] {
        let mut b = stable(n, 25, 7);
        // Subgroup 9: the whole subgroup 6 sigma of a mean up.
        let shift = 6.0 / (n as f64).sqrt() + 1.0;
        for v in &mut b[8] {
            *v += shift;
        }
        // Subgroup 17: one reading 8 sigma off (a wrong setup, a dropped part).
        b[16][0] += 8.0;
        let s = study::run(&b, &POLICY.options(chart)).unwrap();
        let out: Vec<usize> = s.excluded.iter().map(|e| e.subgroup).collect();
        assert!(
            out.contains(&9),
            "n {n}: the shifted subgroup stays in: {out:?}"
        );
        assert!(
            out.contains(&17),
            "n {n}: the wild reading stays in: {out:?}"
        );
        assert!(
            s.excluded
                .iter()
                .all(|e| e.reason.contains("exclusion bound"))
        );
    }
}

/// A baseline with more than a tenth of its subgroups far out was not stable: learning does
/// not quietly throw a quarter of it away; it says so and keeps them.
#[test]
fn a_baseline_that_was_not_stable_is_said_so_not_trimmed() {
    let mut b = stable(3, 20, 11);
    for s in b.iter_mut().skip(10).take(5) {
        for v in s.iter_mut() {
            *v += 9.0;
        }
    }
    let s = study::run(&b, &POLICY.options(VariablesChart::XbarR)).unwrap();
    assert!(s.excluded.is_empty(), "{:?}", s.excluded);
    assert!(
        s.warnings.iter().any(|w| w.contains("not stable")),
        "{:?}",
        s.warnings
    );
}
