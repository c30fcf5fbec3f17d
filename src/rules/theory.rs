//! The in-control rate of one rule on the chart it actually runs on: what a backtest's signal
//! counts are set beside, and what `arl` reports for a chart.
//!
//! * A rule on a measured characteristic's location chart: 1 / ARL₀ from [`super::arl::arl`]
//!   (exact where that is a Markov chain or an integral equation, simulated otherwise).
//! * The beyond-limits rule, which by default watches the dispersion chart too: the chance a
//!   subgroup's spread falls beyond its 3-sigma limits with a known sigma and normal data,
//!   exactly (the range from its distribution, the standard deviation from chi-square), joined
//!   with the location chart's as 1 − (1 − α_loc)(1 − α_disp). For subgroups of two or more the
//!   mean is independent of the range and of s for normal data, so the join is exact; for
//!   individuals consecutive moving ranges share a reading and depend on the readings, so it is
//!   approximate, and said so.
//! * An attribute chart's beyond-limits rule: exact binomial (p, np) or Poisson (c, u)
//!   probabilities at the nominal size ([`crate::stats::attributes::beyond_limits_probability`]).
//! * Every other rule on an attribute chart: the counts are discrete, ties break runs, and no
//!   normal chain applies, so the rule is stepped on simulated binomial or Poisson counts with a
//!   fixed seed, and the rate carries its 95% interval.

use rand::SeedableRng;
use rand::rngs::StdRng;
use rand_distr::{Binomial, Distribution, Poisson};
use serde::Serialize;
use statrs::distribution::{ChiSquared, ContinuousCDF};

use super::arl::{ArlOptions, Method, arl, simulate};
use super::config::{ChartSide, Rule, RuleKind, RuleSet};
use crate::stats::Limits;
use crate::stats::attributes::{AttributeChart, AttributeSample};
use crate::stats::variables::VariablesChart;

/// The chart a rule runs on, with what its in-control behaviour depends on.
#[derive(Debug, Clone, PartialEq)]
pub enum Basis {
    /// A measured characteristic: the chart and its subgroup size (1 for individuals).
    Variables { chart: VariablesChart, n: usize },
    /// An attribute chart: the in-control parameter (p for p and np, defects per unit for c
    /// and u), the nominal sample size and the limits of the plotted value at that size.
    Attribute {
        chart: AttributeChart,
        parameter: f64,
        n: f64,
        limits: Limits,
    },
}

/// How a rate was obtained.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "kebab-case")]
pub enum How {
    Exact,
    Approximate,
    Simulated,
}

impl How {
    pub fn name(self) -> &'static str {
        match self {
            How::Exact => "exact",
            How::Approximate => "approximate",
            How::Simulated => "simulated",
        }
    }
}

/// A rule's in-control signals per 1,000 subgroups, and how it was obtained.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Rate {
    pub per_1000: f64,
    pub how: How,
    /// The simulation's 95% interval, per 1,000.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub ci95_per_1000: Option<[f64; 2]>,
    /// What it covers, in words ("location and range charts together").
    pub covers: String,
    /// The rate is at most `per_1000`: some simulated runs reached the longest run simulated
    /// without a signal, so the run length is at least what was found.
    #[serde(default, skip_serializing_if = "std::ops::Not::not")]
    pub at_most: bool,
}

/// Simulated runs of a rule on an attribute chart, and the longest run simulated: enough for
/// a rate of 1 in 1,000 to a few percent, and a bound past that, in a second or two.
const ATTRIBUTE_RUNS: u64 = 1_000;
const ATTRIBUTE_LONGEST: u64 = 50_000;

/// The chance per subgroup that the dispersion chart's point falls beyond its 3-sigma limits,
/// for a known sigma and normal data, and whether it is exact: the range of `n` (D1σ, D2σ),
/// the standard deviation (B5σ, B6σ: (n − 1)s²/σ² is chi-square with n − 1 degrees of
/// freedom), or the moving range of two readings (√2·σ·|Z| against D2(2)·σ; exact for one
/// moving range, approximate as a rate since consecutive ones overlap).
pub fn dispersion_alpha(chart: VariablesChart, n: usize) -> Option<(f64, How)> {
    match chart {
        VariablesChart::XbarR => {
            let f = crate::stats::factors(n).ok()?;
            let (below, above) = crate::stats::constants::range_tails(n, f.D1, f.D2);
            Some((below + above, How::Exact))
        }
        VariablesChart::XbarS => {
            let f = crate::stats::factors(n).ok()?;
            let df = (n - 1) as f64;
            let chi = ChiSquared::new(df).ok()?;
            let above = chi.sf(df * f.B6 * f.B6);
            let below = if f.B5 > 0.0 {
                chi.cdf(df * f.B5 * f.B5)
            } else {
                0.0
            };
            Some((below + above, How::Exact))
        }
        VariablesChart::Individuals => {
            let f = crate::stats::factors(2).ok()?;
            let z = f.D2 / std::f64::consts::SQRT_2;
            Some((
                2.0 * (1.0 - crate::stats::constants::normal_cdf(z)),
                How::Approximate,
            ))
        }
    }
}

/// The in-control rate of `rule` alone on the chart `basis` describes; None for a rule on
/// readings (it has no subgroup rate) or one that cannot signal in control.
pub fn in_control(rule: &Rule, basis: &Basis, opts: &ArlOptions) -> Option<Rate> {
    if rule.kind.on_readings() {
        return None;
    }
    match basis {
        Basis::Variables { chart, n } => variables(rule, *chart, *n, opts),
        Basis::Attribute {
            chart,
            parameter,
            n,
            limits,
        } => attribute(rule, *chart, *parameter, *n, limits, opts),
    }
}

fn location_rate(rule: &Rule, opts: &ArlOptions) -> Option<(f64, How, Option<[f64; 2]>)> {
    let mut only = rule.clone();
    if let RuleKind::BeyondLimits { chart } = &mut only.kind {
        *chart = ChartSide::Location;
    }
    let r = arl(&RuleSet::new(vec![only]), &[0.0], opts).ok()?;
    let r = r.first()?;
    let how = match r.method {
        Method::MonteCarlo => How::Simulated,
        _ => How::Exact,
    };
    // A longer run length is a lower rate: the interval's ends swap.
    let ci = r.ci95.map(|[lo, hi]| [1000.0 / hi, 1000.0 / lo.max(1.0)]);
    Some((1.0 / r.arl, how, ci))
}

fn variables(rule: &Rule, chart: VariablesChart, n: usize, opts: &ArlOptions) -> Option<Rate> {
    let dispersion_words = match chart {
        VariablesChart::XbarR => "range",
        VariablesChart::XbarS => "standard deviation",
        VariablesChart::Individuals => "moving range",
    };
    let location_words = match chart {
        VariablesChart::Individuals => "readings",
        _ => "means",
    };
    match &rule.kind {
        RuleKind::BeyondLimits {
            chart: ChartSide::Dispersion,
        } => {
            let (a, how) = dispersion_alpha(chart, n)?;
            Some(Rate {
                per_1000: 1000.0 * a,
                how,
                ci95_per_1000: None,
                covers: format!("the {dispersion_words} chart"),
                at_most: false,
            })
        }
        RuleKind::BeyondLimits {
            chart: ChartSide::Both,
        } => {
            let (loc, _, _) = location_rate(rule, opts)?;
            let (disp, how) = dispersion_alpha(chart, n)?;
            Some(Rate {
                per_1000: 1000.0 * (1.0 - (1.0 - loc) * (1.0 - disp)),
                how,
                ci95_per_1000: None,
                covers: format!(
                    "the {location_words} and {dispersion_words} charts together ({} and {} per 1,000 alone)",
                    crate::format::sig(1000.0 * loc, 3),
                    crate::format::sig(1000.0 * disp, 3)
                ),
                at_most: false,
            })
        }
        _ => {
            let (a, how, ci) = location_rate(rule, opts)?;
            Some(Rate {
                per_1000: 1000.0 * a,
                how,
                ci95_per_1000: ci,
                covers: format!("the {location_words} chart"),
                at_most: false,
            })
        }
    }
}

fn attribute(
    rule: &Rule,
    chart: AttributeChart,
    parameter: f64,
    n: f64,
    limits: &Limits,
    opts: &ArlOptions,
) -> Option<Rate> {
    let covers = format!(
        "the {} chart at {} {}",
        chart.name(),
        crate::format::num(n),
        match chart {
            AttributeChart::P | AttributeChart::Np => "parts",
            _ => "units",
        }
    );
    if let RuleKind::BeyondLimits { .. } = rule.kind {
        let (above, below) =
            crate::stats::attributes::beyond_limits_probability(chart, limits, n, parameter)
                .ok()?;
        return Some(Rate {
            per_1000: 1000.0 * (above + below),
            how: How::Exact,
            ci95_per_1000: None,
            covers,
            at_most: false,
        });
    }
    // The plotted value's sigma at this size; the rule sees (value − centre) / sigma.
    let sigma = crate::limits_file::attribute_sigma(chart, parameter, n);
    if !(sigma > 0.0 && sigma.is_finite()) {
        return None;
    }
    let centre = limits.center;
    let zu = (limits.ucl - centre) / sigma;
    let zl = (limits.lcl - centre) / sigma;
    let draw: Box<dyn FnMut(&mut StdRng) -> f64> = match chart {
        AttributeChart::P | AttributeChart::Np => {
            let b = Binomial::new(n.round() as u64, parameter).ok()?;
            Box::new(move |rng| b.sample(rng) as f64)
        }
        AttributeChart::C | AttributeChart::U => {
            let mean = if chart == AttributeChart::C {
                parameter
            } else {
                parameter * n
            };
            let p = Poisson::new(mean).ok()?;
            Box::new(move |rng| p.sample(rng))
        }
    };
    let mut draw = draw;
    let set = RuleSet::new(vec![rule.clone()]);
    let r = simulate(
        &set,
        |rng: &mut StdRng| {
            let count = draw(rng);
            let plotted = chart.plotted(&AttributeSample { count, size: n });
            (plotted - centre) / sigma
        },
        zu,
        zl,
        &ArlOptions {
            runs: ATTRIBUTE_RUNS,
            max_run_length: ATTRIBUTE_LONGEST,
            ..*opts
        },
        StdRng::seed_from_u64(opts.seed),
    );
    let ci = r.ci95.map(|[lo, hi]| [1000.0 / hi, 1000.0 / lo.max(1.0)]);
    Some(Rate {
        per_1000: 1000.0 / r.arl,
        how: How::Simulated,
        ci95_per_1000: if r.censored > 0 { None } else { ci },
        covers,
        at_most: r.censored > 0,
    })
}
