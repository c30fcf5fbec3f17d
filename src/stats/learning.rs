//! How the daemon learns limits from its first subgroups, and the simulation that shows the
//! learned limits keep the designed false-alarm rate on a stable process.
//!
//! Learning runs the baseline study with automatic exclusion, but on data nobody has looked
//! at: most baselines come from a stable process, and every ordinary subgroup the study throws
//! away makes sigma smaller and the limits tighter, so the line later raises alarms on nothing.
//! [`POLICY`] is the exclusion policy chosen with [`simulate`] (figures in the README).

use rand::rngs::StdRng;
use rand::{RngExt, SeedableRng};
use rand_distr::StandardNormal;

use super::StatsError;
use super::constants::normal_cdf;
use super::study::{self, StudyOptions};
use super::variables::VariablesChart;

/// The exclusion policy for learned limits.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Policy {
    /// Rounds of exclusion and recomputation.
    pub rounds: usize,
    /// Distance from the centre, in standard errors of the plotted statistic, beyond which a
    /// subgroup is excluded.
    pub sigmas: f64,
    /// Exclude for the dispersion statistic as well as the location.
    pub on_dispersion: bool,
    /// Largest fraction of the baseline that may be excluded.
    pub max_fraction: f64,
}

/// The policy the daemon learns with: one round, a subgroup excluded only when its location is
/// more than 4 standard errors from the centre or its dispersion more than 4 standard errors
/// above or below its centre, at most a tenth of the baseline.
///
/// A stable process puts a point beyond 4 standard errors about once in 16,000 (normal tail),
/// so ordinary subgroups stay in; a real upset in the baseline (a broken tool, a wrong setup)
/// is usually far bigger and is still taken out. More than a tenth of the baseline beyond that
/// means the baseline was not stable, which the study says instead of hiding it.
pub const POLICY: Policy = Policy {
    rounds: 1,
    sigmas: 4.0,
    on_dispersion: true,
    max_fraction: 0.1,
};

/// The policy a baseline study at the engineer's desk uses with `--auto-exclude`: every round
/// until nothing is beyond the 3σ trial limits on either chart (common practice for a Phase I
/// study someone reviews).
pub const DESK: Policy = Policy {
    rounds: 10,
    sigmas: 3.0,
    on_dispersion: true,
    max_fraction: 1.0,
};

impl Policy {
    /// Study options for `chart` with this policy.
    pub fn options(&self, chart: VariablesChart) -> StudyOptions {
        let mut o = StudyOptions::new(chart);
        o.auto_exclude = true;
        o.max_iterations = self.rounds;
        o.exclusion_sigmas = self.sigmas;
        o.exclude_on_dispersion = self.on_dispersion;
        o.max_excluded_fraction = self.max_fraction;
        o
    }
}

/// What learning did over many simulated baselines of a stable normal process (sigma 1).
#[derive(Debug, Clone, PartialEq)]
pub struct Figures {
    pub chart: VariablesChart,
    pub subgroup_size: usize,
    pub baseline_subgroups: usize,
    pub runs: usize,
    /// Median over runs of learned sigma / true sigma.
    pub median_sigma_ratio: f64,
    /// Mean over runs of the probability that a later in-control point falls beyond the
    /// learned location limits: the false-alarm rate per point after learning (design 0.27%).
    pub false_alarm_rate: f64,
    /// Median over runs of that probability: the rate a typical installation sees.
    pub median_false_alarm_rate: f64,
    /// The mean rate, on limits computed from the whole baseline with no exclusion.
    pub false_alarm_rate_no_exclusion: f64,
    /// Mean number of baseline subgroups excluded.
    pub mean_excluded: f64,
}

/// The design false-alarm rate of a point against 3σ limits: 2·(1 − Φ(3)).
pub fn design_rate() -> f64 {
    2.0 * (1.0 - normal_cdf(3.0))
}

/// Learns limits `runs` times from baselines of `baseline_subgroups` subgroups of
/// `subgroup_size` readings drawn from N(0, 1) (seeded by `seed`), with `policy`.
///
/// The false-alarm rate after learning is exact for each run (a later subgroup mean is
/// N(0, 1/n), so the chance it falls outside the learned limits is a normal tail), then
/// averaged over runs; only the baselines are random.
pub fn simulate(
    policy: &Policy,
    subgroup_size: usize,
    baseline_subgroups: usize,
    runs: usize,
    seed: u64,
) -> Result<Figures, StatsError> {
    let chart = if subgroup_size == 1 {
        VariablesChart::Individuals
    } else {
        VariablesChart::XbarR
    };
    let mut rng = StdRng::seed_from_u64(seed);
    let options = policy.options(chart);
    let plain = StudyOptions::new(chart);
    let se = 1.0 / (subgroup_size as f64).sqrt();
    let outside = |center: f64, sigma: f64| {
        let half = 3.0 * sigma * se;
        normal_cdf((center - half) / se) + 1.0 - normal_cdf((center + half) / se)
    };
    let mut ratios = Vec::with_capacity(runs);
    let mut fars = Vec::with_capacity(runs);
    let mut far_plain = 0.0;
    let mut excluded = 0usize;
    for _ in 0..runs {
        let baseline: Vec<Vec<f64>> = (0..baseline_subgroups)
            .map(|_| {
                (0..subgroup_size)
                    .map(|_| rng.sample::<f64, _>(StandardNormal))
                    .collect()
            })
            .collect();
        let s = study::run(&baseline, &options)?;
        ratios.push(s.estimate.sigma_within);
        fars.push(outside(s.estimate.grand_mean, s.estimate.sigma_within));
        excluded += s.excluded.len();
        let p = study::run(&baseline, &plain)?;
        far_plain += outside(p.estimate.grand_mean, p.estimate.sigma_within);
    }
    let far = fars.iter().sum::<f64>();
    Ok(Figures {
        chart,
        subgroup_size,
        baseline_subgroups,
        runs,
        median_sigma_ratio: median(&mut ratios),
        median_false_alarm_rate: median(&mut fars),
        false_alarm_rate: far / runs as f64,
        false_alarm_rate_no_exclusion: far_plain / runs as f64,
        mean_excluded: excluded as f64 / runs as f64,
    })
}

fn median(v: &mut [f64]) -> f64 {
    v.sort_by(f64::total_cmp);
    let k = v.len();
    if k == 0 {
        f64::NAN
    } else if k % 2 == 1 {
        v[k / 2]
    } else {
        (v[k / 2 - 1] + v[k / 2]) / 2.0
    }
}
