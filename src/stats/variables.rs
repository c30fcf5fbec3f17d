//! Shewhart charts for measured values: X̄-R, X̄-S and individuals with moving range.
//!
//! Limits are always built from one estimate of the within-subgroup sigma, so they exist for
//! any subgroup size: location `x̿ ± 3σ̂/√n`, range `[D1·σ̂, D2·σ̂]` around `d2·σ̂`, standard
//! deviation `[B5·σ̂, B6·σ̂]` around `c4·σ̂`. With a constant subgroup size these are exactly the
//! textbook `x̿ ± A2·R̄`, `[D3·R̄, D4·R̄]`, `x̿ ± A3·s̄` and `[B3·s̄, B4·s̄]`.

use serde::{Deserialize, Serialize};

use super::{Limits, StatsError, factors, finite, mean, range, sample_sd};

/// Which variables chart a characteristic is plotted on.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum VariablesChart {
    /// Subgroup means with subgroup ranges.
    XbarR,
    /// Subgroup means with subgroup standard deviations.
    XbarS,
    /// Single readings with the moving range of two.
    Individuals,
}

/// The statistic on the dispersion chart that accompanies the location chart.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum DispersionKind {
    Range,
    StdDev,
    MovingRange,
}

impl VariablesChart {
    /// The name used in files and on the command line.
    pub fn name(self) -> &'static str {
        match self {
            VariablesChart::XbarR => "xbar-r",
            VariablesChart::XbarS => "xbar-s",
            VariablesChart::Individuals => "individuals",
        }
    }

    /// The dispersion statistic plotted alongside.
    pub fn dispersion_kind(self) -> DispersionKind {
        match self {
            VariablesChart::XbarR => DispersionKind::Range,
            VariablesChart::XbarS => DispersionKind::StdDev,
            VariablesChart::Individuals => DispersionKind::MovingRange,
        }
    }
}

impl DispersionKind {
    /// The name used in files and reports.
    pub fn name(self) -> &'static str {
        match self {
            DispersionKind::Range => "range",
            DispersionKind::StdDev => "std-dev",
            DispersionKind::MovingRange => "moving-range",
        }
    }
}

/// What one subgroup contributes to the charts.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct PointStats {
    /// Readings in the subgroup.
    pub n: usize,
    /// The plotted location value: the subgroup mean (the reading itself for individuals).
    pub mean: f64,
    /// The plotted dispersion value; `None` for the first individual, which has no moving range.
    pub dispersion: Option<f64>,
}

/// The location and dispersion statistics of every subgroup, in input order. For individuals
/// the moving range of point `i` is `|x_i − x_{i−1}|`.
pub fn point_stats(
    chart: VariablesChart,
    subgroups: &[Vec<f64>],
) -> Result<Vec<PointStats>, StatsError> {
    check_shapes(chart, subgroups)?;
    let mut out = Vec::with_capacity(subgroups.len());
    for (i, s) in subgroups.iter().enumerate() {
        let dispersion = match chart {
            VariablesChart::XbarR => Some(range(s)),
            VariablesChart::XbarS => Some(sample_sd(s)),
            VariablesChart::Individuals => (i > 0).then(|| (s[0] - subgroups[i - 1][0]).abs()),
        };
        out.push(PointStats {
            n: s.len(),
            mean: mean(s),
            dispersion,
        });
    }
    Ok(out)
}

fn check_shapes(chart: VariablesChart, subgroups: &[Vec<f64>]) -> Result<(), StatsError> {
    for (i, s) in subgroups.iter().enumerate() {
        let number = i + 1;
        match chart {
            VariablesChart::Individuals if s.len() != 1 => {
                return Err(StatsError::NotIndividual {
                    subgroup: number,
                    n: s.len(),
                });
            }
            VariablesChart::XbarR | VariablesChart::XbarS if s.len() < 2 => {
                return Err(StatsError::SubgroupTooSmall {
                    subgroup: number,
                    n: s.len(),
                    chart: chart.name(),
                });
            }
            _ => {}
        }
        if s.len() > super::constants::MAX_SIZE {
            return Err(StatsError::SubgroupSizeOutOfRange { n: s.len() });
        }
        for (j, &v) in s.iter().enumerate() {
            finite(|| format!("subgroup {number} reading {}", j + 1), v)?;
        }
    }
    Ok(())
}

/// The process centre and within-subgroup sigma estimated from the included subgroups.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct Estimate {
    pub chart: VariablesChart,
    /// Mean of all included readings (x̿; with equal subgroup sizes, the mean of the means).
    pub grand_mean: f64,
    /// Within-subgroup sigma: R̄/d2, s̄/c4 or MR̄/d2(2).
    pub sigma_within: f64,
    /// Sample standard deviation of all included readings together (for Pp and Ppk).
    pub sigma_overall: f64,
    /// How `sigma_within` was obtained, in words.
    pub sigma_method: &'static str,
    /// The mean of the plotted dispersion statistic over the included subgroups (R̄, s̄ or MR̄).
    pub mean_dispersion: f64,
    /// Number of included subgroups.
    pub subgroups: usize,
    /// Number of included readings.
    pub readings: usize,
}

/// Estimates the centre and sigma from the subgroups whose `included` flag is set.
///
/// With unequal subgroup sizes the within sigma is the mean of `R_i/d2(n_i)` (or `s_i/c4(n_i)`),
/// each term an unbiased estimate of sigma on its own (common practice). For individuals, a
/// moving range counts only when both of its points are included.
pub fn estimate(
    chart: VariablesChart,
    subgroups: &[Vec<f64>],
    included: &[bool],
) -> Result<Estimate, StatsError> {
    let stats = point_stats(chart, subgroups)?;
    let used: Vec<usize> = (0..subgroups.len()).filter(|&i| included[i]).collect();
    let needed = 2;
    if used.len() < needed {
        return Err(StatsError::TooFewSubgroups {
            found: used.len(),
            needed,
        });
    }
    let all: Vec<f64> = used
        .iter()
        .flat_map(|&i| subgroups[i].iter().copied())
        .collect();
    let grand_mean = mean(&all);
    let sigma_overall = sample_sd(&all);

    let constant_n = used.iter().all(|&i| stats[i].n == stats[used[0]].n);
    let (sigma_within, mean_dispersion, sigma_method) = match chart {
        VariablesChart::XbarR | VariablesChart::XbarS => {
            let by_r = chart == VariablesChart::XbarR;
            let mut unbiased = 0.0;
            let mut plain = 0.0;
            for &i in &used {
                let f = factors(stats[i].n)?;
                let d = stats[i].dispersion.unwrap_or(0.0); // always Some for subgroup charts
                plain += d;
                unbiased += d / if by_r { f.d2 } else { f.c4 };
            }
            let k = used.len() as f64;
            let method = match (by_r, constant_n) {
                (true, true) => "average range / d2",
                (true, false) => "mean of range / d2(n) over subgroups",
                (false, true) => "average standard deviation / c4",
                (false, false) => "mean of standard deviation / c4(n) over subgroups",
            };
            (unbiased / k, plain / k, method)
        }
        VariablesChart::Individuals => {
            let mrs: Vec<f64> = (1..subgroups.len())
                .filter(|&i| included[i] && included[i - 1])
                .filter_map(|i| stats[i].dispersion)
                .collect();
            if mrs.is_empty() {
                return Err(StatsError::TooFewSubgroups {
                    found: used.len(),
                    needed: 2,
                });
            }
            let mr_bar = mean(&mrs);
            (
                mr_bar / factors(2)?.d2,
                mr_bar,
                "average moving range / d2(2)",
            )
        }
    };
    if sigma_within == 0.0 {
        return Err(StatsError::ZeroSpread {
            what: match chart {
                VariablesChart::XbarR => "subgroup range",
                VariablesChart::XbarS => "subgroup standard deviation",
                VariablesChart::Individuals => "moving range",
            },
        });
    }
    Ok(Estimate {
        chart,
        grand_mean,
        sigma_within,
        sigma_overall,
        sigma_method,
        mean_dispersion,
        subgroups: used.len(),
        readings: all.len(),
    })
}

/// Location limits `center ± 3σ/√n` for subgroups of size `n`.
pub fn location_limits(center: f64, sigma: f64, n: usize) -> Limits {
    let half = 3.0 * sigma / (n as f64).sqrt();
    Limits {
        center,
        ucl: center + half,
        lcl: center - half,
    }
}

/// Dispersion limits from the within sigma for subgroups of size `n` (the moving range always
/// has span 2, whatever `n` says).
pub fn dispersion_limits(kind: DispersionKind, sigma: f64, n: usize) -> Result<Limits, StatsError> {
    Ok(match kind {
        DispersionKind::Range => {
            let f = factors(n)?;
            Limits {
                center: f.d2 * sigma,
                ucl: f.D2 * sigma,
                lcl: f.D1 * sigma,
            }
        }
        DispersionKind::StdDev => {
            let f = factors(n)?;
            Limits {
                center: f.c4 * sigma,
                ucl: f.B6 * sigma,
                lcl: f.B5 * sigma,
            }
        }
        DispersionKind::MovingRange => {
            let f = factors(2)?;
            Limits {
                center: f.d2 * sigma,
                ucl: f.D2 * sigma,
                lcl: f.D1 * sigma,
            }
        }
    })
}
