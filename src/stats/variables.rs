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

/// How the within-subgroup sigma is estimated from subgroups (of possibly unequal sizes).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum SigmaEstimator {
    /// The published estimator for the chart: X̄-R Burr's weighted ranges (the plain average
    /// range / d2 when all subgroups are the same size, to which it is then equal); X̄-S the
    /// average s / c4 for equal sizes, the pooled standard deviation for unequal ones;
    /// individuals the average moving range / d2(2).
    #[default]
    Auto,
    /// Mean of Rᵢ/d2(nᵢ): each term unbiased, all weighted alike.
    MeanRange,
    /// Burr (J. Quality Technology 1(3), 1969): Σ fᵢ·Rᵢ/d2(nᵢ) / Σ fᵢ with fᵢ = d2(nᵢ)²/d3(nᵢ)²,
    /// each subgroup weighted by the inverse variance of its estimate.
    BurrWeightedRange,
    /// Mean of sᵢ/c4(nᵢ).
    MeanSd,
    /// The pooled standard deviation √(Σ(nᵢ−1)sᵢ² / Σ(nᵢ−1)) (Montgomery, Introduction to
    /// SQC, the X̄-S chart with variable sample size), divided by c4(Σ(nᵢ−1)+1) to remove its
    /// small bias (common practice).
    PooledSd,
}

impl SigmaEstimator {
    /// The names `--sigma-estimator` takes.
    pub const NAMES: [&'static str; 5] = [
        "auto",
        "mean-range",
        "burr-weighted-range",
        "mean-sd",
        "pooled-sd",
    ];

    pub fn parse(name: &str) -> Option<Self> {
        Some(match name {
            "auto" => SigmaEstimator::Auto,
            "mean-range" => SigmaEstimator::MeanRange,
            "burr-weighted-range" => SigmaEstimator::BurrWeightedRange,
            "mean-sd" => SigmaEstimator::MeanSd,
            "pooled-sd" => SigmaEstimator::PooledSd,
            _ => return None,
        })
    }

    /// Whether this estimator belongs to `chart`.
    pub fn fits(self, chart: VariablesChart) -> bool {
        match self {
            SigmaEstimator::Auto => true,
            SigmaEstimator::MeanRange | SigmaEstimator::BurrWeightedRange => {
                chart == VariablesChart::XbarR
            }
            SigmaEstimator::MeanSd | SigmaEstimator::PooledSd => chart == VariablesChart::XbarS,
        }
    }
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
    /// The same as a stable name: `mean-range`, `burr-weighted-range`, `mean-sd`, `pooled-sd`,
    /// `mean-moving-range`.
    pub sigma_key: &'static str,
    /// The mean of the plotted dispersion statistic over the included subgroups (R̄, s̄ or MR̄).
    pub mean_dispersion: f64,
    /// Number of included subgroups.
    pub subgroups: usize,
    /// Number of included readings.
    pub readings: usize,
}

/// Estimates the centre and sigma from the subgroups whose `included` flag is set, with the
/// chart's published estimator ([`SigmaEstimator::Auto`]).
pub fn estimate(
    chart: VariablesChart,
    subgroups: &[Vec<f64>],
    included: &[bool],
) -> Result<Estimate, StatsError> {
    estimate_with(chart, subgroups, included, SigmaEstimator::Auto)
}

/// [`estimate`] with a chosen sigma estimator (one that [fits](SigmaEstimator::fits) the
/// chart; another is taken as `Auto`). For individuals, a moving range counts only when both
/// of its points are included.
pub fn estimate_with(
    chart: VariablesChart,
    subgroups: &[Vec<f64>],
    included: &[bool],
    estimator: SigmaEstimator,
) -> Result<Estimate, StatsError> {
    let estimator = if estimator.fits(chart) {
        estimator
    } else {
        SigmaEstimator::Auto
    };
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
    let (sigma_within, mean_dispersion, sigma_method, sigma_key) = match chart {
        VariablesChart::XbarR | VariablesChart::XbarS => {
            let by_r = chart == VariablesChart::XbarR;
            let chosen = match (estimator, by_r, constant_n) {
                (SigmaEstimator::Auto, true, true) => SigmaEstimator::MeanRange,
                (SigmaEstimator::Auto, true, false) => SigmaEstimator::BurrWeightedRange,
                (SigmaEstimator::Auto, false, true) => SigmaEstimator::MeanSd,
                (SigmaEstimator::Auto, false, false) => SigmaEstimator::PooledSd,
                (e, _, _) => e,
            };
            let (mut plain, mut mean_terms) = (0.0, 0.0);
            let (mut weighted, mut weights) = (0.0, 0.0);
            let (mut squares, mut dof) = (0.0, 0.0);
            for &i in &used {
                let f = factors(stats[i].n)?;
                let d = stats[i].dispersion.unwrap_or(0.0); // always Some for subgroup charts
                plain += d;
                mean_terms += d / if by_r { f.d2 } else { f.c4 };
                let w = (f.d2 / f.d3).powi(2);
                weighted += w * d / f.d2;
                weights += w;
                let nu = (stats[i].n - 1) as f64;
                squares += nu * d * d;
                dof += nu;
            }
            let k = used.len() as f64;
            let (sigma, method, key) = match chosen {
                SigmaEstimator::BurrWeightedRange => (
                    weighted / weights,
                    "Burr's weighted ranges: sum of (d2/d3)²·R/d2 over sum of (d2/d3)²",
                    "burr-weighted-range",
                ),
                SigmaEstimator::PooledSd => (
                    (squares / dof).sqrt() / super::constants::c4(dof as usize + 1),
                    "pooled standard deviation / c4(degrees of freedom + 1)",
                    "pooled-sd",
                ),
                SigmaEstimator::MeanRange if constant_n => {
                    (mean_terms / k, "average range / d2", "mean-range")
                }
                SigmaEstimator::MeanRange => (
                    mean_terms / k,
                    "mean of range / d2(n) over subgroups",
                    "mean-range",
                ),
                _ if constant_n => (mean_terms / k, "average standard deviation / c4", "mean-sd"),
                _ => (
                    mean_terms / k,
                    "mean of standard deviation / c4(n) over subgroups",
                    "mean-sd",
                ),
            };
            (sigma, plain / k, method, key)
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
                "mean-moving-range",
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
        sigma_key,
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
