//! Baseline (Phase I) studies: trial limits, exclusion of subgroups with assignable causes, and
//! recomputation until the remaining subgroups are in control.

use serde::Serialize;

use super::variables::{
    self, DispersionKind, Estimate, PointStats, VariablesChart, dispersion_limits, location_limits,
};
use super::{Limits, StatsError};

/// Fewer subgroups than this left in a baseline draws a warning (common practice: 20–25).
pub const RECOMMENDED_SUBGROUPS: usize = 20;

/// How a study is to be run.
#[derive(Debug, Clone, PartialEq)]
pub struct StudyOptions {
    pub chart: VariablesChart,
    /// Subgroups (numbered from 1 in input order) to leave out before anything is computed,
    /// because their assignable cause is already known.
    pub exclude: Vec<usize>,
    /// Exclude out-of-control subgroups and recompute, repeatedly, until none remain.
    pub auto_exclude: bool,
    /// Cap on automatic rounds of exclusion.
    pub max_iterations: usize,
    /// How far from the centre, in standard errors of the plotted statistic, a subgroup must
    /// fall to be excluded automatically (3 = at the control limits).
    pub exclusion_sigmas: f64,
    /// Exclude subgroups automatically for their dispersion (range, standard deviation or
    /// moving range) as well as for their location.
    pub exclude_on_dispersion: bool,
    /// At most this fraction of the baseline may be excluded automatically; a study that would
    /// exclude more stops and says the baseline was not stable.
    pub max_excluded_fraction: f64,
    /// How sigma is estimated from the subgroups (by default the chart's published estimator).
    pub sigma_estimator: variables::SigmaEstimator,
}

impl StudyOptions {
    /// A study on `chart` with no exclusions, and the default cap of 10 rounds.
    pub fn new(chart: VariablesChart) -> Self {
        StudyOptions {
            chart,
            exclude: Vec::new(),
            auto_exclude: false,
            max_iterations: 10,
            exclusion_sigmas: 3.0,
            exclude_on_dispersion: true,
            max_excluded_fraction: 1.0,
            sigma_estimator: variables::SigmaEstimator::Auto,
        }
    }
}

/// One subgroup left out of the final limits, and why.
#[derive(Debug, Clone, PartialEq, Serialize, serde::Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Exclusion {
    /// Subgroup number, from 1 in input order.
    pub subgroup: usize,
    /// Plain-words reason, with the value and the limit it crossed.
    pub reason: String,
    /// 0 when excluded on request; otherwise the round of trial limits it fell outside.
    pub iteration: usize,
}

/// The limits of one round of the study.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Trial {
    /// Round number, from 1.
    pub iteration: usize,
    pub subgroups_used: usize,
    pub sigma_within: f64,
    /// Location limits at the nominal subgroup size.
    pub location: Limits,
    /// Dispersion limits at the nominal subgroup size.
    pub dispersion: Limits,
}

/// One subgroup as the final study sees it.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct StudyPoint {
    pub subgroup: usize,
    #[serde(flatten)]
    pub stats: PointStats,
    pub included: bool,
    /// Final location limits for this subgroup's size.
    pub location: Limits,
    /// Final dispersion limits for this subgroup's size.
    pub dispersion_limits: Limits,
}

/// Whether the baseline showed a stable process: capability assumes one.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Stability {
    /// Enough subgroups were used to judge (20, common practice for a baseline).
    pub judged: bool,
    /// Included subgroups (numbered from 1) beyond the study's own 3-sigma limits, on either
    /// chart.
    pub beyond_trial_limits: Vec<usize>,
}

/// The autocorrelation of the plotted points (included subgroups, in order): Shewhart limits
/// and every ARL assume independent points.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct Autocorrelation {
    /// Lag-1 and lag-2 sample autocorrelations, r_k = Σ(x_t − x̄)(x_{t+k} − x̄) / Σ(x_t − x̄)²
    /// (Box and Jenkins; the estimator of common reference libraries).
    pub lag1: f64,
    pub lag2: f64,
    /// The approximate 95% bound for independent points, 1.96/√N.
    pub bound: f64,
    /// Either lag beyond the bound.
    pub significant: bool,
}

/// The sample autocorrelations at lags 1 and 2 of `x`, with the bound 1.96/√N; `None` for
/// fewer than 4 points or points that do not vary.
pub fn autocorrelation(x: &[f64]) -> Option<Autocorrelation> {
    let n = x.len();
    if n < 4 {
        return None;
    }
    let m = x.iter().sum::<f64>() / n as f64;
    let d: Vec<f64> = x.iter().map(|v| v - m).collect();
    let c0: f64 = d.iter().map(|v| v * v).sum();
    if c0 <= 0.0 {
        return None;
    }
    let r = |k: usize| d.windows(k + 1).map(|w| w[0] * w[k]).sum::<f64>() / c0;
    let (lag1, lag2) = (r(1), r(2));
    let bound = 1.96 / (n as f64).sqrt();
    Some(Autocorrelation {
        lag1,
        lag2,
        bound,
        significant: lag1.abs() > bound || lag2.abs() > bound,
    })
}

/// The outcome of a baseline study.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Study {
    pub chart: VariablesChart,
    /// The most common subgroup size; the limits in `location` and `dispersion` are for it.
    pub subgroup_size: usize,
    /// Smallest and largest subgroup sizes seen (equal when the size is constant).
    pub subgroup_size_range: (usize, usize),
    pub subgroups_total: usize,
    pub subgroups_used: usize,
    pub excluded: Vec<Exclusion>,
    pub estimate: Estimate,
    pub location: Limits,
    pub dispersion_kind: DispersionKind,
    pub dispersion: Limits,
    pub trials: Vec<Trial>,
    pub points: Vec<StudyPoint>,
    pub stability: Stability,
    pub autocorrelation: Option<Autocorrelation>,
    pub warnings: Vec<String>,
}

impl Study {
    /// Numbers (from 1) of the subgroups the final limits were computed from.
    pub fn used_subgroups(&self) -> Vec<usize> {
        self.points
            .iter()
            .filter(|p| p.included)
            .map(|p| p.subgroup)
            .collect()
    }

    /// Every included reading, for capability.
    pub fn included_readings(&self, subgroups: &[Vec<f64>]) -> Vec<f64> {
        self.points
            .iter()
            .filter(|p| p.included)
            .flat_map(|p| subgroups[p.subgroup - 1].iter().copied())
            .collect()
    }
}

/// Runs a baseline study over `subgroups` (each a list of readings, in input order).
pub fn run(subgroups: &[Vec<f64>], options: &StudyOptions) -> Result<Study, StatsError> {
    let chart = options.chart;
    let stats = variables::point_stats(chart, subgroups)?;
    let total = subgroups.len();
    let mut included = vec![true; total];
    let mut excluded = Vec::new();
    for &s in &options.exclude {
        if s == 0 || s > total {
            return Err(StatsError::UnknownSubgroup { subgroup: s, total });
        }
        if included[s - 1] {
            included[s - 1] = false;
            excluded.push(Exclusion {
                subgroup: s,
                reason: "excluded on request (known assignable cause)".to_string(),
                iteration: 0,
            });
        }
    }
    let nominal = nominal_size(&stats);
    let kind = chart.dispersion_kind();
    let mut trials = Vec::new();
    let mut warnings = Vec::new();

    let est = loop {
        let est = variables::estimate_with(chart, subgroups, &included, options.sigma_estimator)?;
        let iteration = trials.len() + 1;
        trials.push(Trial {
            iteration,
            subgroups_used: est.subgroups,
            sigma_within: est.sigma_within,
            location: location_limits(est.grand_mean, est.sigma_within, nominal),
            dispersion: dispersion_limits(kind, est.sigma_within, nominal)?,
        });
        if !options.auto_exclude {
            break est;
        }
        let mut out = Vec::new();
        for i in (0..total).filter(|&i| included[i]) {
            if let Some(reason) = out_of_control(&stats[i], &est, kind, options)? {
                out.push((i, reason));
            }
        }
        if out.is_empty() {
            break est;
        }
        let left = included.iter().filter(|&&i| i).count() - out.len();
        let mut tentative = included.clone();
        for (i, _) in &out {
            tentative[*i] = false;
        }
        if let Err(e) =
            variables::estimate_with(chart, subgroups, &tentative, options.sigma_estimator)
        {
            warnings.push(format!(
                "automatic exclusion stopped: excluding {} more subgroup(s) would leave {left}, too few to estimate from ({e}); the process was probably not stable during the baseline",
                out.len()
            ));
            break est;
        }
        let automatic = excluded.iter().filter(|e| e.iteration > 0).count();
        let cap = (options.max_excluded_fraction * total as f64).floor() as usize;
        if automatic + out.len() > cap {
            let list: Vec<String> = out.iter().map(|(i, _)| (i + 1).to_string()).collect();
            warnings.push(format!(
                "automatic exclusion stopped: excluding subgroups {} as well would leave out more than {} of the {total} subgroups; the process was probably not stable during the baseline",
                list.join(", "),
                cap
            ));
            break est;
        }
        if iteration > options.max_iterations {
            let list: Vec<String> = out.iter().map(|(i, _)| (i + 1).to_string()).collect();
            warnings.push(format!(
                "stopped after {} rounds of exclusion with subgroups still beyond the limits: {}; the process was probably not stable during the baseline",
                options.max_iterations,
                list.join(", ")
            ));
            break est;
        }
        for (i, reason) in out {
            included[i] = false;
            excluded.push(Exclusion {
                subgroup: i + 1,
                reason: format!("{reason} (trial limits of round {iteration})"),
                iteration,
            });
        }
    };

    if est.subgroups < RECOMMENDED_SUBGROUPS {
        warnings.push(format!(
            "only {} subgroups are left for the limits; common practice is a baseline of 20 to 25",
            est.subgroups
        ));
    }
    if chart == VariablesChart::XbarR && nominal > 10 {
        warnings.push(format!(
            "subgroups of {nominal} on an X̄-R chart: the range wastes information above about 10 readings; consider the X̄-S chart"
        ));
    }
    let mut points = Vec::with_capacity(total);
    for (i, s) in stats.iter().enumerate() {
        points.push(StudyPoint {
            subgroup: i + 1,
            stats: *s,
            included: included[i],
            location: location_limits(est.grand_mean, est.sigma_within, s.n),
            dispersion_limits: dispersion_limits(kind, est.sigma_within, s.n)?,
        });
    }
    // Stability: included subgroups beyond the study's own limits (3 sigma, both charts).
    let at_limits = StudyOptions {
        exclusion_sigmas: 3.0,
        exclude_on_dispersion: true,
        ..StudyOptions::new(chart)
    };
    let mut beyond_trial_limits = Vec::new();
    for i in (0..total).filter(|&i| included[i]) {
        if out_of_control(&stats[i], &est, kind, &at_limits)?.is_some() {
            beyond_trial_limits.push(i + 1);
        }
    }
    let stability = Stability {
        judged: est.subgroups >= RECOMMENDED_SUBGROUPS,
        beyond_trial_limits,
    };
    if !stability.beyond_trial_limits.is_empty() {
        let list: Vec<String> = stability
            .beyond_trial_limits
            .iter()
            .map(|n| n.to_string())
            .collect();
        warnings.push(format!(
            "the process was not shown to be stable: subgroup(s) {} are beyond this study's own limits, and the limits and capability assume a stable process; find their causes and leave them out (--exclude), or use --auto-exclude",
            list.join(", ")
        ));
    }
    let plotted: Vec<f64> = (0..total)
        .filter(|&i| included[i])
        .map(|i| stats[i].mean)
        .collect();
    let autocorrelation = autocorrelation(&plotted);
    if let Some(a) = autocorrelation
        && a.significant
    {
        let (lag, r) = if a.lag1.abs() > a.bound {
            (1, a.lag1)
        } else {
            (2, a.lag2)
        };
        let effect = if r > 0.0 {
            "positively correlated points make sigma from ranges too small and the limits too tight, so the line alarms far more often than the rules' false-alarm rate says"
        } else {
            "negatively correlated points make the limits too wide, so real shifts are caught later than the rules' ARL says"
        };
        warnings.push(format!(
            "the plotted points are autocorrelated (lag-{lag} autocorrelation {}, beyond ±{} for independent points): Shewhart limits and every ARL assume independence; {effect}. Sample less often, or model the dependence (for example an EWMA of residuals)",
            crate::format::sig(r, 3),
            crate::format::sig(a.bound, 3)
        ));
    }
    let min = stats.iter().map(|s| s.n).min().unwrap_or(0);
    let max = stats.iter().map(|s| s.n).max().unwrap_or(0);
    Ok(Study {
        chart,
        subgroup_size: nominal,
        subgroup_size_range: (min, max),
        subgroups_total: total,
        subgroups_used: est.subgroups,
        excluded,
        estimate: est,
        location: location_limits(est.grand_mean, est.sigma_within, nominal),
        dispersion_kind: kind,
        dispersion: dispersion_limits(kind, est.sigma_within, nominal)?,
        trials,
        points,
        stability,
        autocorrelation,
        warnings,
    })
}

/// Why a subgroup is out of control under `est`, or `None` when it is inside both charts.
fn out_of_control(
    p: &PointStats,
    est: &Estimate,
    kind: DispersionKind,
    options: &StudyOptions,
) -> Result<Option<String>, StatsError> {
    let k = options.exclusion_sigmas;
    let at_limits = (k - 3.0).abs() < 1e-12;
    let loc = location_limits(est.grand_mean, est.sigma_within, p.n);
    let what = if kind == DispersionKind::MovingRange {
        "reading"
    } else {
        "mean"
    };
    let loc_bounds = if at_limits {
        loc
    } else {
        let half = (loc.ucl - loc.center) * k / 3.0;
        Limits {
            center: loc.center,
            ucl: loc.center + half,
            lcl: loc.center - half,
        }
    };
    if let Some(r) = beyond(what, p.mean, &loc_bounds, at_limits) {
        return Ok(Some(r));
    }
    if !options.exclude_on_dispersion {
        return Ok(None);
    }
    if let Some(d) = p.dispersion {
        let lim = dispersion_limits(kind, est.sigma_within, p.n)?;
        let bounds = if at_limits {
            lim
        } else {
            dispersion_bounds(kind, est.sigma_within, p.n, k)?
        };
        return Ok(beyond(kind.name(), d, &bounds, at_limits));
    }
    Ok(None)
}

/// Centre ± `k` standard errors of the dispersion statistic (lower bound at least 0).
fn dispersion_bounds(
    kind: DispersionKind,
    sigma: f64,
    n: usize,
    k: f64,
) -> Result<Limits, StatsError> {
    let (center, se) = match kind {
        DispersionKind::Range => {
            let f = super::constants::factors(n)?;
            (f.d2 * sigma, f.d3 * sigma)
        }
        DispersionKind::MovingRange => {
            let f = super::constants::factors(2)?;
            (f.d2 * sigma, f.d3 * sigma)
        }
        DispersionKind::StdDev => {
            let f = super::constants::factors(n)?;
            (f.c4 * sigma, (1.0 - f.c4 * f.c4).sqrt() * sigma)
        }
    };
    Ok(Limits {
        center,
        ucl: center + k * se,
        lcl: (center - k * se).max(0.0),
    })
}

fn beyond(what: &str, value: f64, lim: &Limits, at_limits: bool) -> Option<String> {
    let (upper, lower) = if at_limits {
        ("the upper control limit", "the lower control limit")
    } else {
        ("the upper exclusion bound", "the lower exclusion bound")
    };
    if value > lim.ucl {
        let (v, l) = crate::format::sig_pair(value, lim.ucl);
        Some(format!("{what} {v} above {upper} {l}"))
    } else if value < lim.lcl {
        let (v, l) = crate::format::sig_pair(value, lim.lcl);
        Some(format!("{what} {v} below {lower} {l}"))
    } else {
        None
    }
}

/// The most common subgroup size; the larger one on a tie.
fn nominal_size(stats: &[PointStats]) -> usize {
    let mut counts = std::collections::BTreeMap::new();
    for s in stats {
        *counts.entry(s.n).or_insert(0usize) += 1;
    }
    counts
        .iter()
        .max_by_key(|(n, c)| (**c, **n))
        .map(|(n, _)| *n)
        .unwrap_or(1)
}
