//! Attribute charts for go/no-go gauges and defect counts: p, np, c and u.
//!
//! * p: fraction nonconforming, `p̄ ± 3·√(p̄(1−p̄)/n_i)`, with `p̄ = Σd/Σn` (variable n allowed).
//! * np: number nonconforming at a constant n, `n·p̄ ± 3·√(n·p̄(1−p̄))`.
//! * c: defects per inspection unit of constant size, `c̄ ± 3·√c̄`.
//! * u: defects per unit, `ū ± 3·√(ū/n_i)`, with `ū = Σc/Σn` (variable n allowed).
//!
//! Lower limits below zero are set to zero (common practice).

use serde::{Deserialize, Serialize};

use super::{Limits, StatsError};
use crate::format::num;

/// Which attribute chart.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum AttributeChart {
    P,
    Np,
    C,
    U,
}

/// One inspected sample: how many were found (nonconforming parts or defects) in how many units.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct AttributeSample {
    pub count: f64,
    /// Units inspected (for c, the number of inspection units; usually 1).
    pub size: f64,
}

impl AttributeChart {
    /// The name used in files and on the command line.
    pub fn name(self) -> &'static str {
        match self {
            AttributeChart::P => "p",
            AttributeChart::Np => "np",
            AttributeChart::C => "c",
            AttributeChart::U => "u",
        }
    }

    /// The value plotted for a sample.
    pub fn plotted(self, s: &AttributeSample) -> f64 {
        match self {
            AttributeChart::P | AttributeChart::U => s.count / s.size,
            AttributeChart::Np | AttributeChart::C => s.count,
        }
    }

    /// Checks one sample (numbered from 1) for this chart.
    pub fn check(self, number: usize, s: &AttributeSample) -> Result<(), StatsError> {
        let bad = |name, value, expected| {
            Err(StatsError::BadParameter {
                name,
                value,
                expected,
            })
        };
        if !(s.count >= 0.0 && s.count.is_finite()) {
            return bad("count", s.count, "a non-negative count");
        }
        if !(s.size > 0.0 && s.size.is_finite()) {
            return bad("sample size", s.size, "a positive number of units");
        }
        if matches!(self, AttributeChart::P | AttributeChart::Np) && s.count > s.size {
            let _ = number;
            return bad(
                "count",
                s.count,
                "no more nonconforming parts than parts inspected",
            );
        }
        Ok(())
    }

    /// The centre parameter from the included samples: p̄ for p and np, c̄ for c, ū for u.
    pub fn center_parameter(
        self,
        samples: &[AttributeSample],
        included: &[bool],
    ) -> Result<f64, StatsError> {
        let used: Vec<&AttributeSample> = samples
            .iter()
            .zip(included)
            .filter(|(_, inc)| **inc)
            .map(|(s, _)| s)
            .collect();
        if used.len() < 2 {
            return Err(StatsError::TooFewSubgroups {
                found: used.len(),
                needed: 2,
            });
        }
        let count: f64 = used.iter().map(|s| s.count).sum();
        Ok(match self {
            AttributeChart::C => count / used.len() as f64,
            _ => count / used.iter().map(|s| s.size).sum::<f64>(),
        })
    }

    /// Limits for a sample of `size` units given the centre parameter.
    pub fn limits(self, parameter: f64, size: f64) -> Limits {
        let (center, half) = match self {
            AttributeChart::P => (
                parameter,
                3.0 * (parameter * (1.0 - parameter) / size).sqrt(),
            ),
            AttributeChart::Np => (
                size * parameter,
                3.0 * (size * parameter * (1.0 - parameter)).sqrt(),
            ),
            AttributeChart::C => (parameter, 3.0 * parameter.sqrt()),
            AttributeChart::U => (parameter, 3.0 * (parameter / size).sqrt()),
        };
        let ucl = center + half;
        Limits {
            center,
            ucl: if self == AttributeChart::P {
                ucl.min(1.0)
            } else {
                ucl
            },
            lcl: (center - half).max(0.0),
        }
    }
}

/// A baseline study on an attribute chart, with the same exclusion rules as for variables.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct AttributeStudy {
    pub chart: AttributeChart,
    /// p̄, c̄ or ū from the included samples.
    pub parameter: f64,
    pub samples_total: usize,
    pub samples_used: usize,
    pub excluded: Vec<super::study::Exclusion>,
    /// Limits per sample, in input order.
    pub limits: Vec<Limits>,
    pub warnings: Vec<String>,
}

/// Runs a baseline study: trial limits, then (with `auto_exclude`) exclusion of samples beyond
/// them and recomputation until none remain or `max_iterations` rounds have passed.
pub fn study(
    chart: AttributeChart,
    samples: &[AttributeSample],
    exclude: &[usize],
    auto_exclude: bool,
    max_iterations: usize,
) -> Result<AttributeStudy, StatsError> {
    if chart == AttributeChart::Np
        && let Some(s) = samples.iter().find(|s| s.size != samples[0].size)
    {
        return Err(StatsError::BadParameter {
            name: "sample size",
            value: s.size,
            expected: "the same size for every sample on an np chart (use the p chart for varying sizes)",
        });
    }
    for (i, s) in samples.iter().enumerate() {
        chart.check(i + 1, s)?;
    }
    let total = samples.len();
    let mut included = vec![true; total];
    let mut excluded = Vec::new();
    for &s in exclude {
        if s == 0 || s > total {
            return Err(StatsError::UnknownSubgroup { subgroup: s, total });
        }
        if std::mem::replace(&mut included[s - 1], false) {
            excluded.push(super::study::Exclusion {
                subgroup: s,
                reason: "excluded on request (known assignable cause)".to_string(),
                iteration: 0,
            });
        }
    }
    let mut warnings = Vec::new();
    let mut iteration = 0;
    let parameter = loop {
        iteration += 1;
        let parameter = chart.center_parameter(samples, &included)?;
        if !auto_exclude {
            break parameter;
        }
        let out: Vec<(usize, String)> = (0..total)
            .filter(|&i| included[i])
            .filter_map(|i| {
                let lim = chart.limits(parameter, samples[i].size);
                let v = chart.plotted(&samples[i]);
                let side = if v > lim.ucl {
                    Some(("above the upper", lim.ucl))
                } else if v < lim.lcl {
                    Some(("below the lower", lim.lcl))
                } else {
                    None
                };
                side.map(|(words, limit)| {
                    (
                        i,
                        format!(
                            "{} {} {words} control limit {} (trial limits of round {iteration})",
                            chart.name(),
                            num(v),
                            num(limit)
                        ),
                    )
                })
            })
            .collect();
        if out.is_empty() {
            break parameter;
        }
        if iteration > max_iterations {
            warnings.push(format!(
                "stopped after {max_iterations} rounds of exclusion with samples still beyond the limits"
            ));
            break parameter;
        }
        for (i, reason) in out {
            included[i] = false;
            excluded.push(super::study::Exclusion {
                subgroup: i + 1,
                reason,
                iteration,
            });
        }
    };
    if parameter == 0.0 {
        warnings.push(
            "no nonconformities at all in the baseline: the limits collapse to zero and every later find will signal"
                .to_string(),
        );
    }
    let used = included.iter().filter(|i| **i).count();
    if used < super::study::RECOMMENDED_SUBGROUPS {
        warnings.push(format!(
            "only {used} samples are left for the limits; common practice is a baseline of 20 to 25"
        ));
    }
    Ok(AttributeStudy {
        chart,
        parameter,
        samples_total: total,
        samples_used: used,
        excluded,
        limits: samples
            .iter()
            .map(|s| chart.limits(parameter, s.size))
            .collect(),
        warnings,
    })
}
