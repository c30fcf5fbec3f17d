//! Process capability and performance: Cp, Cpk, Pp, Ppk, Cpm, their confidence intervals, the
//! expected nonconforming fraction under a normal model, and a verdict against a threshold.
//!
//! * Cp, Cpk (and Cpu, Cpl) use the within-subgroup sigma of the chart; Pp, Ppk use the overall
//!   sample standard deviation of the same readings.
//! * Cp and Pp intervals: `Ĉ·√(χ²_{α/2,ν}/ν) … Ĉ·√(χ²_{1−α/2,ν}/ν)` with `ν = N − 1`.
//! * Cpk and Ppk intervals: Bissell's approximation
//!   `Ĉ·(1 ∓ z_{1−α/2}·√(1/(9N·Ĉ²) + 1/(2(N−1))))`.
//! * Cpm (with a target): `(USL − LSL) / (6·√(s² + (x̄ − T)²))`, s the overall sigma.

use serde::Serialize;
use statrs::distribution::{ChiSquared, ContinuousCDF, Normal};

use super::normality::{AndersonDarling, anderson_darling};
use super::{StatsError, finite, mean};
use crate::format::num;

/// The common-practice threshold for Cpk on an established process.
pub const DEFAULT_THRESHOLD: f64 = 1.33;

/// Specification limits for a characteristic; either side may be absent (one-sided spec).
#[derive(Debug, Clone, Copy, PartialEq, Default, Serialize, serde::Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Spec {
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub lsl: Option<f64>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub usl: Option<f64>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub target: Option<f64>,
}

impl Spec {
    /// Checks that the values are finite and the limits in order.
    pub fn validate(&self) -> Result<(), StatsError> {
        for (name, v) in [
            ("LSL", self.lsl),
            ("USL", self.usl),
            ("target", self.target),
        ] {
            if let Some(v) = v {
                finite(|| name.to_string(), v)?;
            }
        }
        if let (Some(lsl), Some(usl)) = (self.lsl, self.usl)
            && lsl >= usl
        {
            return Err(StatsError::SpecOrder { lsl, usl });
        }
        if self.lsl.is_none() && self.usl.is_none() {
            return Err(StatsError::NoSpec);
        }
        Ok(())
    }

    /// Whether `value` is outside the specification.
    pub fn outside(&self, value: f64) -> bool {
        self.lsl.is_some_and(|l| value < l) || self.usl.is_some_and(|u| value > u)
    }
}

/// The verdict against the threshold.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "kebab-case")]
pub enum Verdict {
    /// Cpk and the lower end of its 95% interval both reach the threshold.
    Capable,
    /// Cpk reaches the threshold but its 95% lower bound does not: more data is needed to show it.
    CapableUnproven,
    /// Cpk is below the threshold.
    NotCapable,
}

/// Capability figures. Indices that do not apply (Cp with a one-sided spec, Cpm without a
/// target) are `None`.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Capability {
    /// Number of readings the figures are based on.
    pub n: usize,
    pub mean: f64,
    pub sigma_within: f64,
    pub sigma_overall: f64,
    pub cp: Option<f64>,
    pub cpk: f64,
    pub cpu: Option<f64>,
    pub cpl: Option<f64>,
    pub pp: Option<f64>,
    pub ppk: f64,
    pub cpm: Option<f64>,
    pub cp_ci95: Option<[f64; 2]>,
    pub cpk_ci95: [f64; 2],
    pub pp_ci95: Option<[f64; 2]>,
    pub ppk_ci95: [f64; 2],
    /// Expected parts per million below the LSL, from the overall sigma.
    pub ppm_below: Option<f64>,
    /// Expected parts per million above the USL, from the overall sigma.
    pub ppm_above: Option<f64>,
    /// The same from the within sigma (what the process could do if it stayed centred and stable).
    pub ppm_below_within: Option<f64>,
    pub ppm_above_within: Option<f64>,
    pub normality: Option<AndersonDarling>,
    pub threshold: f64,
    pub verdict: Verdict,
    /// Plain-words cautions (doubtful normality, few readings, ...).
    pub warnings: Vec<String>,
}

/// The figures capability is computed from.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct Summary {
    /// Number of readings.
    pub n: usize,
    pub mean: f64,
    /// Within-subgroup sigma from the control chart.
    pub sigma_within: f64,
    /// Sample standard deviation of all the readings.
    pub sigma_overall: f64,
}

/// Computes capability of `readings` against `spec`, with the within sigma from the chart, and
/// checks the readings for normality.
pub fn capability(
    readings: &[f64],
    sigma_within: f64,
    spec: &Spec,
    threshold: f64,
) -> Result<Capability, StatsError> {
    if readings.len() < 2 {
        return Err(StatsError::TooFewSubgroups {
            found: readings.len(),
            needed: 2,
        });
    }
    let summary = Summary {
        n: readings.len(),
        mean: mean(readings),
        sigma_within,
        sigma_overall: super::sample_sd(readings),
    };
    let mut c = from_summary(&summary, spec, threshold)?;
    c.normality = anderson_darling(readings);
    match &c.normality {
        Some(ad) if ad.doubtful() => c.warnings.insert(0, format!(
            "the readings do not look normal (Anderson–Darling A² = {}, adjusted for the estimated mean and sigma {}, p = {}): the ppm figures and confidence intervals assume a normal distribution and may be wrong",
            crate::format::sig(ad.a2, 4),
            crate::format::sig(ad.a2_adjusted, 4),
            crate::format::sig(ad.p_value, 3)
        )),
        None => c.warnings.insert(0, format!(
            "normality was not checked: it needs at least {} readings that vary",
            super::normality::MIN_READINGS
        )),
        _ => {}
    }
    Ok(c)
}

/// Computes capability from summary figures (no normality check: the readings are not known).
pub fn from_summary(
    summary: &Summary,
    spec: &Spec,
    threshold: f64,
) -> Result<Capability, StatsError> {
    spec.validate()?;
    let Summary {
        n,
        mean: mu,
        sigma_within,
        sigma_overall,
    } = *summary;
    if n < 2 {
        return Err(StatsError::TooFewSubgroups {
            found: n,
            needed: 2,
        });
    }
    finite(|| "mean".to_string(), mu)?;
    for (name, sigma) in [
        ("within-subgroup sigma", sigma_within),
        ("overall sigma", sigma_overall),
    ] {
        if sigma == 0.0 {
            return Err(StatsError::ZeroSpread { what: "reading" });
        }
        if !(sigma > 0.0 && sigma.is_finite()) {
            return Err(StatsError::BadParameter {
                name,
                value: sigma,
                expected: "a positive finite number",
            });
        }
    }
    let within = Indices::new(spec, mu, sigma_within);
    let overall = Indices::new(spec, mu, sigma_overall);

    let cpm = match (spec.lsl, spec.usl, spec.target) {
        (Some(l), Some(u), Some(t)) => {
            Some((u - l) / (6.0 * (sigma_overall.powi(2) + (mu - t).powi(2)).sqrt()))
        }
        _ => None,
    };
    let cpk_ci95 = bissell(within.k, n, 0.95);
    let verdict = if within.k < threshold {
        Verdict::NotCapable
    } else if cpk_ci95[0] < threshold {
        Verdict::CapableUnproven
    } else {
        Verdict::Capable
    };
    let mut warnings = Vec::new();
    if let Some(t) = spec.target
        && (spec.lsl.is_some_and(|l| t < l) || spec.usl.is_some_and(|u| t > u))
    {
        warnings.push(format!(
            "the target {} lies outside the specification",
            num(t)
        ));
    }
    let ppm = |sigma: f64, below: bool| {
        let z = Normal::standard();
        if below {
            spec.lsl.map(|l| z.cdf((l - mu) / sigma) * 1e6)
        } else {
            spec.usl.map(|u| z.sf((u - mu) / sigma) * 1e6)
        }
    };
    Ok(Capability {
        n,
        mean: mu,
        sigma_within,
        sigma_overall,
        cp: within.p,
        cpk: within.k,
        cpu: within.upper,
        cpl: within.lower,
        pp: overall.p,
        ppk: overall.k,
        cpm,
        cp_ci95: within.p.map(|c| chi_square_interval(c, n, 0.95)),
        cpk_ci95,
        pp_ci95: overall.p.map(|c| chi_square_interval(c, n, 0.95)),
        ppk_ci95: bissell(overall.k, n, 0.95),
        ppm_below: ppm(sigma_overall, true),
        ppm_above: ppm(sigma_overall, false),
        ppm_below_within: ppm(sigma_within, true),
        ppm_above_within: ppm(sigma_within, false),
        normality: None,
        threshold,
        verdict,
        warnings,
    })
}

/// The potential index (Cp or Pp), the one-sided indices and the minimum of those (Cpk or Ppk).
struct Indices {
    p: Option<f64>,
    upper: Option<f64>,
    lower: Option<f64>,
    k: f64,
}

impl Indices {
    fn new(spec: &Spec, mu: f64, sigma: f64) -> Self {
        let upper = spec.usl.map(|u| (u - mu) / (3.0 * sigma));
        let lower = spec.lsl.map(|l| (mu - l) / (3.0 * sigma));
        let p = match (spec.lsl, spec.usl) {
            (Some(l), Some(u)) => Some((u - l) / (6.0 * sigma)),
            _ => None,
        };
        // At least one side exists: validate() rejects a spec with neither.
        let k = match (upper, lower) {
            (Some(a), Some(b)) => a.min(b),
            (Some(a), None) | (None, Some(a)) => a,
            (None, None) => f64::NAN,
        };
        Indices { p, upper, lower, k }
    }
}

/// Two-sided interval for Cp or Pp from the chi-square distribution with `n − 1` degrees of
/// freedom.
pub fn chi_square_interval(c: f64, n: usize, confidence: f64) -> [f64; 2] {
    let nu = (n - 1) as f64;
    let alpha = 1.0 - confidence;
    // n ≥ 2 is checked by the caller, so ν ≥ 1 and the distribution exists.
    let chi = ChiSquared::new(nu).expect("degrees of freedom are positive");
    [
        c * (chi.inverse_cdf(alpha / 2.0) / nu).sqrt(),
        c * (chi.inverse_cdf(1.0 - alpha / 2.0) / nu).sqrt(),
    ]
}

/// Bissell's (1990) normal approximation to the interval for Cpk or Ppk.
pub fn bissell(c: f64, n: usize, confidence: f64) -> [f64; 2] {
    let nf = n as f64;
    let z = Normal::standard().inverse_cdf(1.0 - (1.0 - confidence) / 2.0);
    let half = z * (1.0 / (9.0 * nf * c * c) + 1.0 / (2.0 * (nf - 1.0))).sqrt();
    [c * (1.0 - half), c * (1.0 + half)]
}
