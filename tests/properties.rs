//! Property tests of the statistics core: invariances any correct implementation must have.

use proptest::prelude::*;
use rand::rngs::StdRng;
use rand::{RngExt, SeedableRng};
use rand_distr::Normal;

use linewarden::stats::study::{self, StudyOptions};
use linewarden::stats::variables::VariablesChart;

fn subgroups(n: usize, m: usize) -> impl Strategy<Value = Vec<Vec<f64>>> {
    prop::collection::vec(prop::collection::vec(-50.0f64..50.0, n), m)
}

fn charts() -> impl Strategy<Value = VariablesChart> {
    prop_oneof![Just(VariablesChart::XbarR), Just(VariablesChart::XbarS)]
}

fn near(a: f64, b: f64, scale: f64) -> bool {
    (a - b).abs() <= 1e-9 * scale.max(1.0)
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(200))]

    /// Limits are equivariant: readings a·x + b (a > 0) give centre and limits a·L + b, sigma
    /// a·σ, dispersion limits a·D, and the same exclusions.
    #[test]
    fn limits_shift_and_scale_with_the_data(
        data in subgroups(4, 25),
        chart in charts(),
        a in 0.001f64..1000.0,
        b in -1000.0f64..1000.0,
        auto in any::<bool>(),
    ) {
        let mut opts = StudyOptions::new(chart);
        opts.auto_exclude = auto;
        let base = study::run(&data, &opts).unwrap();
        let moved: Vec<Vec<f64>> = data.iter().map(|g| g.iter().map(|x| a * x + b).collect()).collect();
        let m = study::run(&moved, &opts).unwrap();
        let scale = a * 100.0 + b.abs();
        prop_assert!(near(m.location.center, a * base.location.center + b, scale));
        prop_assert!(near(m.location.ucl, a * base.location.ucl + b, scale));
        prop_assert!(near(m.location.lcl, a * base.location.lcl + b, scale));
        prop_assert!(near(m.estimate.sigma_within, a * base.estimate.sigma_within, scale));
        prop_assert!(near(m.dispersion.ucl, a * base.dispersion.ucl, scale));
        let ex = |s: &study::Study| s.excluded.iter().map(|e| e.subgroup).collect::<Vec<_>>();
        prop_assert_eq!(ex(&m), ex(&base));
    }

    /// Automatic exclusion never removes an in-control subgroup: each excluded subgroup lies
    /// beyond the trial limits of the round that removed it, and a baseline entirely inside its
    /// first trial limits loses nothing.
    #[test]
    fn auto_exclusion_never_removes_an_in_control_subgroup(
        seed in any::<u64>(),
        chart in charts(),
        outliers in prop::collection::vec((0usize..30, -8.0f64..8.0), 0..5),
    ) {
        let mut rng = StdRng::seed_from_u64(seed);
        let normal = Normal::new(10.0, 1.0).unwrap();
        let mut data: Vec<Vec<f64>> = (0..30).map(|_| (0..5).map(|_| rng.sample(normal)).collect()).collect();
        for (i, shift) in outliers {
            for v in &mut data[i] {
                *v += shift;
            }
        }
        let mut opts = StudyOptions::new(chart);
        opts.auto_exclude = true;
        let s = study::run(&data, &opts).unwrap();
        for e in &s.excluded {
            let trial = &s.trials[e.iteration - 1];
            let p = &s.points[e.subgroup - 1].stats;
            let beyond = trial.location.beyond(p.mean)
                || p.dispersion.is_some_and(|d| trial.dispersion.beyond(d));
            prop_assert!(beyond, "subgroup {} excluded in round {} but inside its limits", e.subgroup, e.iteration);
        }
        let first = &s.trials[0];
        let all_inside = s.points.iter().all(|p| {
            !first.location.beyond(p.stats.mean)
                && !p.stats.dispersion.is_some_and(|d| first.dispersion.beyond(d))
        });
        if all_inside {
            prop_assert!(s.excluded.is_empty());
        }
        // And what is left is in control under the final limits (the cap was not reached here).
        for p in s.points.iter().filter(|p| p.included) {
            prop_assert!(!p.location.beyond(p.stats.mean));
        }
    }
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(20))]

    /// On large normal samples the X̄-R and X̄-S estimates of sigma agree within sampling error.
    /// With 400 subgroups of 5 each estimate has a relative standard error of about 1.7%
    /// (d3/(d2·√m) for the range; common practice), so 6% is over three standard errors.
    #[test]
    fn xbar_r_and_xbar_s_sigma_agree_on_large_normal_samples(seed in any::<u64>(), sigma in 0.01f64..100.0) {
        let mut rng = StdRng::seed_from_u64(seed);
        let normal = Normal::new(0.0, sigma).unwrap();
        let data: Vec<Vec<f64>> = (0..400).map(|_| (0..5).map(|_| rng.sample(normal)).collect()).collect();
        let r = study::run(&data, &StudyOptions::new(VariablesChart::XbarR)).unwrap();
        let s = study::run(&data, &StudyOptions::new(VariablesChart::XbarS)).unwrap();
        let (a, b) = (r.estimate.sigma_within, s.estimate.sigma_within);
        prop_assert!((a - b).abs() / sigma < 0.06, "R: {a}, S: {b}, true {sigma}");
        prop_assert!((a - sigma).abs() / sigma < 0.08);
        prop_assert!((b - sigma).abs() / sigma < 0.08);
    }
}
