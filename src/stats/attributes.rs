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
                beyond_words(chart, v, &lim)
                    .map(|w| (i, format!("{w} (trial limits of round {iteration})")))
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

/// Why a plotted value is excluded, when it is beyond a limit: `p 0.1360291 above the upper
/// control limit 0.1360289`, by the shared digits rule (a value beyond a limit never prints
/// equal to it).
pub fn beyond_words(chart: AttributeChart, v: f64, lim: &Limits) -> Option<String> {
    let (words, limit) = if v > lim.ucl {
        ("above the upper", lim.ucl)
    } else if v < lim.lcl {
        ("below the lower", lim.lcl)
    } else {
        return None;
    };
    let (v, limit) = crate::format::sig_pair(v, limit);
    Some(format!(
        "{} {v} {words} control limit {limit}",
        chart.name()
    ))
}

/// A sample's chance of falling beyond the limits of an attribute chart, exactly: the count of
/// a p or np sample is binomial (`size` parts, each nonconforming with probability `true_value`),
/// of a c sample Poisson with mean `true_value`, of a u sample Poisson with mean
/// `true_value × size`. A point is beyond a limit when strictly above the upper or below the
/// lower, as the beyond-limits rule judges it. Returns (above, below).
pub fn beyond_limits_probability(
    chart: AttributeChart,
    limits: &Limits,
    size: f64,
    true_value: f64,
) -> Result<(f64, f64), StatsError> {
    use statrs::distribution::{Binomial, Poisson};
    let bad = |name, value, expected| StatsError::BadParameter {
        name,
        value,
        expected,
    };
    if !(size > 0.0 && size.is_finite()) {
        return Err(bad("sample size", size, "a positive number of units"));
    }
    // The limits as counts: the plotted value times the size for p and u.
    let scale = match chart {
        AttributeChart::P | AttributeChart::U => size,
        AttributeChart::Np | AttributeChart::C => 1.0,
    };
    // The largest count not above the upper limit, and the smallest not below the lower one (a
    // count exactly at a limit is within it; a hair of tolerance for the products' rounding).
    let within_up = (limits.ucl * scale + 1e-9).floor();
    let within_down = (limits.lcl * scale - 1e-9).ceil();
    match chart {
        AttributeChart::P | AttributeChart::Np => {
            if size.fract() != 0.0 {
                return Err(bad("sample size", size, "a whole number of parts"));
            }
            let b = Binomial::new(true_value, size as u64)
                .ok()
                .filter(|_| (0.0..=1.0).contains(&true_value))
                .ok_or(bad(
                    "fraction nonconforming",
                    true_value,
                    "a fraction from 0 to 1",
                ))?;
            Ok(tails(&b, within_up, within_down, Some(size)))
        }
        AttributeChart::C | AttributeChart::U => {
            let mean = if chart == AttributeChart::C {
                true_value
            } else {
                true_value * size
            };
            let d = Poisson::new(mean)
                .ok()
                .filter(|_| mean > 0.0 && mean.is_finite())
                .ok_or(bad("defect rate", true_value, "a positive rate"))?;
            Ok(tails(&d, within_up, within_down, None))
        }
    }
}

/// P(count > `within_up`) and P(count < `within_down`) of a count distribution whose counts
/// reach at most `max` (binomial) or have no end (Poisson).
fn tails(
    d: &impl statrs::distribution::DiscreteCDF<u64, f64>,
    within_up: f64,
    within_down: f64,
    max: Option<f64>,
) -> (f64, f64) {
    let above = if max.is_some_and(|m| within_up >= m) {
        0.0
    } else if within_up < 0.0 {
        1.0
    } else {
        d.sf(within_up as u64)
    };
    let below = if within_down <= 0.0 {
        0.0
    } else {
        d.cdf(within_down as u64 - 1)
    };
    (above, below)
}

/// The average run length of the beyond-limits rule on an attribute chart (samples until the
/// first point beyond a limit), exactly: the reciprocal of [`beyond_limits_probability`];
/// infinite when no count can fall beyond.
pub fn beyond_limits_arl(
    chart: AttributeChart,
    limits: &Limits,
    size: f64,
    true_value: f64,
) -> Result<f64, StatsError> {
    let (a, b) = beyond_limits_probability(chart, limits, size, true_value)?;
    Ok(1.0 / (a + b))
}

/// Capability from pass/fail results: the fraction nonconforming with its exact
/// (Clopper–Pearson) interval, in parts per million, and the equivalent normal Z (the distance
/// in standard deviations from the mean to a normal tail holding the same fraction).
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct AttributeCapability {
    pub nonconforming: u64,
    pub inspected: u64,
    pub confidence: f64,
    pub fraction: f64,
    /// The exact two-sided interval of the fraction.
    pub fraction_low: f64,
    pub fraction_high: f64,
    pub ppm: f64,
    pub ppm_low: f64,
    pub ppm_high: f64,
    /// Φ⁻¹(1 − fraction); infinite with no nonconforming part.
    pub z: f64,
    /// Z at the interval's ends (the high fraction gives the low Z).
    pub z_low: f64,
    pub z_high: f64,
}

/// The Clopper–Pearson interval of a binomial proportion, `x` of `n`, two-sided at
/// `confidence`: beta quantiles (0 when x = 0, 1 when x = n).
pub fn clopper_pearson(x: u64, n: u64, confidence: f64) -> Result<(f64, f64), StatsError> {
    use statrs::distribution::{Beta, ContinuousCDF};
    let bad = |name, value, expected| StatsError::BadParameter {
        name,
        value,
        expected,
    };
    if n == 0 {
        return Err(bad("inspected", 0.0, "at least one part inspected"));
    }
    if x > n {
        return Err(bad(
            "nonconforming",
            x as f64,
            "no more nonconforming parts than parts inspected",
        ));
    }
    if !(confidence > 0.0 && confidence < 1.0) {
        return Err(bad(
            "confidence",
            confidence,
            "a level between 0 and 1, such as 0.95",
        ));
    }
    let alpha = 1.0 - confidence;
    let (xf, nf) = (x as f64, n as f64);
    let low = if x == 0 {
        0.0
    } else {
        Beta::new(xf, nf - xf + 1.0)
            .map(|b| b.inverse_cdf(alpha / 2.0))
            .unwrap_or(0.0)
    };
    let high = if x == n {
        1.0
    } else {
        Beta::new(xf + 1.0, nf - xf)
            .map(|b| b.inverse_cdf(1.0 - alpha / 2.0))
            .unwrap_or(1.0)
    };
    Ok((low, high))
}

/// [`AttributeCapability`] of `nonconforming` out of `inspected`.
pub fn attribute_capability(
    nonconforming: u64,
    inspected: u64,
    confidence: f64,
) -> Result<AttributeCapability, StatsError> {
    use statrs::distribution::{ContinuousCDF, Normal};
    let (lo, hi) = clopper_pearson(nonconforming, inspected, confidence)?;
    let fraction = nonconforming as f64 / inspected as f64;
    let n = Normal::standard();
    let z = |p: f64| {
        if p <= 0.0 {
            f64::INFINITY
        } else if p >= 1.0 {
            f64::NEG_INFINITY
        } else {
            // Φ⁻¹(1 − p) as −Φ⁻¹(p): the same, and precise for small fractions.
            -n.inverse_cdf(p)
        }
    };
    Ok(AttributeCapability {
        nonconforming,
        inspected,
        confidence,
        fraction,
        fraction_low: lo,
        fraction_high: hi,
        ppm: fraction * 1e6,
        ppm_low: lo * 1e6,
        ppm_high: hi * 1e6,
        z: z(fraction),
        z_low: z(hi),
        z_high: z(lo),
    })
}

/// Defects per unit with its exact interval: what a c or u chart's process makes.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct DefectRate {
    pub defects: u64,
    /// Units inspected (inspection units for a c chart).
    pub units: f64,
    pub confidence: f64,
    /// Defects per unit.
    pub rate: f64,
    /// The exact two-sided interval of the rate (Poisson, from chi-square quantiles).
    pub rate_low: f64,
    pub rate_high: f64,
}

/// Defects per unit, `defects` found in `units`, with the exact Poisson interval at
/// `confidence`: χ²(α/2; 2x)/2 and χ²(1−α/2; 2x+2)/2 over the units (0 below when none was
/// found), through the gamma distribution those quantiles are.
pub fn defect_rate(defects: u64, units: f64, confidence: f64) -> Result<DefectRate, StatsError> {
    use statrs::distribution::{ContinuousCDF, Gamma};
    let bad = |name, value, expected| StatsError::BadParameter {
        name,
        value,
        expected,
    };
    if !(units > 0.0 && units.is_finite()) {
        return Err(bad("units", units, "more than zero units inspected"));
    }
    if !(confidence > 0.0 && confidence < 1.0) {
        return Err(bad(
            "confidence",
            confidence,
            "a level between 0 and 1, such as 0.95",
        ));
    }
    let alpha = 1.0 - confidence;
    let x = defects as f64;
    let quantile = |shape: f64, p: f64| {
        Gamma::new(shape, 1.0)
            .map(|g| g.inverse_cdf(p))
            .unwrap_or(f64::NAN)
    };
    let low = if defects == 0 {
        0.0
    } else {
        quantile(x, alpha / 2.0)
    };
    let high = quantile(x + 1.0, 1.0 - alpha / 2.0);
    Ok(DefectRate {
        defects,
        units,
        confidence,
        rate: x / units,
        rate_low: low / units,
        rate_high: high / units,
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    // Reference values: scipy 1.17.1, scipy.stats.chi2.ppf(0.025, 2x)/2/n and
    // chi2.ppf(0.975, 2x + 2)/2/n (the exact Poisson interval).
    #[test]
    fn defect_rate_interval_matches_scipy() {
        for (x, n, lo, hi) in [
            (516, 26.0, 18.170490954366514, 21.63478480476706),
            (51, 18.75, 2.025218658042174, 3.5762976734188685),
            (0, 10.0, 0.0, 0.3688879454113935),
            (3, 1.0, 0.6186721228956014, 8.767273069742323),
        ] {
            let r = defect_rate(x, n, 0.95).unwrap();
            assert!(
                close(r.rate_low, lo, 1e-9) || (lo == 0.0 && r.rate_low == 0.0),
                "{x}/{n}: {} vs {lo}",
                r.rate_low
            );
            assert!(
                close(r.rate_high, hi, 1e-9),
                "{x}/{n}: {} vs {hi}",
                r.rate_high
            );
            assert_eq!(r.rate, x as f64 / n);
        }
        assert!(defect_rate(3, 0.0, 0.95).is_err());
        assert!(defect_rate(3, 1.0, 1.0).is_err());
    }

    fn close(a: f64, b: f64, rel: f64) -> bool {
        (a - b).abs() <= rel * b.abs()
    }

    // Reference values: scipy 1.17.1, scipy.stats.binomtest(x, n).proportion_ci(
    // confidence_level=c, method="exact"), and scipy.stats.norm.isf for Z.
    #[test]
    fn clopper_pearson_matches_scipy() {
        for (x, n, c, lo, hi) in [
            (7, 50, 0.95, 0.05819170033997344, 0.26739600249700846),
            (0, 200, 0.95, 0.0, 0.018275340355148807),
            (3, 5000, 0.95, 0.00012375152045600987, 0.0017524436035038196),
            (7, 50, 0.99, 0.042468787378833785, 0.3091069659648189),
            (50, 50, 0.95, 0.9288782635357954, 1.0),
        ] {
            let (l, h) = clopper_pearson(x, n, c).unwrap();
            assert!(close(l, lo, 1e-9), "{x}/{n}: {l} vs {lo}");
            assert!(close(h, hi, 1e-9), "{x}/{n}: {h} vs {hi}");
        }
        let cap = attribute_capability(3, 5000, 0.95).unwrap();
        assert!(close(cap.ppm, 600.0, 1e-12));
        assert!(close(cap.z, 3.2388801183529776, 1e-9), "{}", cap.z);
        assert!(cap.z_low < cap.z && cap.z < cap.z_high);
        let z = attribute_capability(7, 50, 0.95).unwrap().z;
        assert!(close(z, 1.0803193408149558, 1e-9), "{z}");
        assert!(attribute_capability(0, 200, 0.95).unwrap().z.is_infinite());
        assert!(clopper_pearson(5, 4, 0.95).is_err());
        assert!(clopper_pearson(0, 0, 0.95).is_err());
        assert!(clopper_pearson(1, 4, 1.0).is_err());
    }

    // Reference values: scipy 1.17.1, scipy.stats.binom.sf and binom.cdf, poisson.sf.
    #[test]
    fn beyond_limits_arls_match_scipy_binomial_and_poisson() {
        // p chart, p0 = 0.02, n = 200: UCL 0.0497 (a count of 10 or more), LCL 0.
        let l = AttributeChart::P.limits(0.02, 200.0);
        for (p, want) in [(0.02, 0.007479287865361496), (0.04, 0.28079999866412103)] {
            let (a, b) = beyond_limits_probability(AttributeChart::P, &l, 200.0, p).unwrap();
            assert_eq!(b, 0.0);
            assert!(close(a, want, 1e-9), "{p}: {a} vs {want}");
        }
        let arl = beyond_limits_arl(AttributeChart::P, &l, 200.0, 0.02).unwrap();
        assert!(close(arl, 1.0 / 0.007479287865361496, 1e-9), "{arl}");
        assert!(beyond_limits_probability(AttributeChart::P, &l, 200.5, 0.1).is_err());
        assert!(beyond_limits_probability(AttributeChart::P, &l, 200.0, 1.5).is_err());
        // np chart, p0 = 0.1, n = 400: limits exactly 22 and 58; a count at a limit is within.
        let l = AttributeChart::Np.limits(0.1, 400.0);
        assert_eq!((l.lcl, l.ucl), (22.0, 58.0));
        for (p, want) in [(0.1, 0.0021528989788261446), (0.15, 0.5770276927189687)] {
            let (a, b) = beyond_limits_probability(AttributeChart::Np, &l, 400.0, p).unwrap();
            assert!(close(a + b, want, 1e-9), "{p}: {} vs {want}", a + b);
        }
        // c chart, c0 = 4: UCL 10; u chart, u0 = 1.6 per unit on 2.5 units: UCL 4.0 per unit,
        // the same count of 10.
        let c = AttributeChart::C.limits(4.0, 1.0);
        let u = AttributeChart::U.limits(1.6, 2.5);
        for (k, want) in [(1.0, 0.0028397661205137414), (2.0, 0.18411420744145338)] {
            let (a, _) = beyond_limits_probability(AttributeChart::C, &c, 1.0, 4.0 * k).unwrap();
            assert!(close(a, want, 1e-9), "c {k}: {a} vs {want}");
            let (a, _) = beyond_limits_probability(AttributeChart::U, &u, 2.5, 1.6 * k).unwrap();
            assert!(close(a, want, 1e-9), "u {k}: {a} vs {want}");
        }
        assert!(beyond_limits_probability(AttributeChart::C, &c, 1.0, 0.0).is_err());
    }

    /// What broke: "p 0.136029 above the upper control limit 0.136029" in an exclusion reason
    /// (text and JSON). Swept just past each limit.
    #[test]
    fn an_exclusion_reason_never_prints_a_value_equal_to_its_limit() {
        for limit in [0.1360289, 0.1360289123, 12.0, 1e-7, 0.5] {
            let lim = Limits {
                center: limit / 2.0,
                ucl: limit,
                lcl: limit / 4.0,
            };
            let figures = |w: &str| -> Vec<String> {
                w.split(' ')
                    .filter(|t| t.parse::<f64>().is_ok())
                    .map(str::to_string)
                    .collect()
            };
            for k in 1..2000 {
                let v = limit * (1.0 + k as f64 * 1e-12);
                let w = beyond_words(AttributeChart::P, v, &lim).unwrap();
                let f = figures(&w);
                assert_ne!(f[0], f[1], "{w}");
                let below = lim.lcl * (1.0 - k as f64 * 1e-12);
                let w = beyond_words(AttributeChart::P, below, &lim).unwrap();
                let f = figures(&w);
                assert_ne!(f[0], f[1], "{w}");
            }
        }
    }
}
