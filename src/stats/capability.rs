//! Process capability and performance: Cp, Cpk, Pp, Ppk, Cpm, their confidence intervals, the
//! expected nonconforming fraction under a normal model, and a verdict against a threshold.
//!
//! * Cp, Cpk (and Cpu, Cpl) use the within-subgroup sigma of the chart; Pp, Ppk use the overall
//!   sample standard deviation of the same readings.
//! * Cp and Pp intervals: `Ĉ·√(χ²_{α/2,ν}/ν) … Ĉ·√(χ²_{1−α/2,ν}/ν)` with `ν = N − 1`.
//! * Cpk and Ppk intervals: Bissell's approximation
//!   `Ĉ·(1 ∓ z_{1−α/2}·√(1/(9N·Ĉ²) + 1/(2(N−1))))`.
//! * Cpm (with a target): `(USL − LSL) / (6·√(s² + (x̄ − T)²))`, s the overall sigma.
//! * The percentile method (ISO 22514-2), for readings that are not normal: with the 0.135 %,
//!   50 % and 99.865 % quantiles `X_l`, `X_m`, `X_u` of a fitted model,
//!   `Pp = (USL − LSL)/(X_u − X_l)`, `Ppk = min((USL − X_m)/(X_u − X_m), (X_m − LSL)/(X_m − X_l))`,
//!   and the ppm from the model's tails. Their intervals come from a parametric bootstrap (the
//!   model resampled and refitted; common practice, no closed form exists).

use rand::rngs::StdRng;
use rand::{RngExt, SeedableRng};
use serde::Serialize;
use statrs::distribution::{ChiSquared, ContinuousCDF, Normal};

use super::distributions::{self, Family, Model};
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
    /// `normal` (Pp, Ppk and ppm from the mean and overall sigma) or `percentile` (from a
    /// fitted model, see [`percentile_method`]).
    pub method: &'static str,
    /// The index the verdict judges: `cpk`, or `ppk` under the percentile method.
    pub verdict_on: &'static str,
    /// The fitted model of the percentile method.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub distribution: Option<DistributionFit>,
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
        Some(ad) if ad.doubtful() => {
            let offer = match distributions::best(&distributions::fit_all(readings), readings) {
                Some((m, a2)) if m.family() != Family::Normal => format!(
                    "; of the models tried the {} fits best (Anderson–Darling A² {} against its fitted model): the percentile method with that model (`--distribution best`) gives Pp, Ppk and ppm without assuming normality",
                    m.family().words(),
                    crate::format::sig(a2, 3)
                ),
                _ => String::new(),
            };
            c.warnings.insert(0, format!(
                "the readings do not look normal (Anderson–Darling A² = {}, adjusted for the estimated mean and sigma {}, p {}): the ppm figures and confidence intervals assume a normal distribution and may be wrong{offer}",
                crate::format::sig(ad.a2, 4),
                crate::format::sig(ad.a2_adjusted, 4),
                crate::format::p_words(ad.p_value)
            ))
        }
        None => c.warnings.insert(
            0,
            format!(
                "normality was not checked: it needs at least {} readings that vary",
                super::normality::MIN_READINGS
            ),
        ),
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
    let verdict = verdict_of(within.k, cpk_ci95[0], threshold);
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
        method: "normal",
        verdict_on: "cpk",
        distribution: None,
        warnings,
    })
}

/// The verdict on an index and the lower end of its interval. An interval that could not be
/// found (NaN: every bootstrap sample failed to refit) proves nothing.
fn verdict_of(index: f64, lower: f64, threshold: f64) -> Verdict {
    if index < threshold {
        Verdict::NotCapable
    } else if lower.is_nan() || lower < threshold {
        Verdict::CapableUnproven
    } else {
        Verdict::Capable
    }
}

/// Which model the percentile method uses.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum DistributionChoice {
    /// This family.
    Named(Family),
    /// The normal unless the normality test rejects it, then the fitted family with the
    /// smallest AIC ([`distributions::best`]).
    Best,
}

impl DistributionChoice {
    /// Reads `best` or a family's key (`normal`, `lognormal`, `weibull`, `box-cox`).
    pub fn parse(text: &str) -> Option<Self> {
        if text == "best" {
            Some(DistributionChoice::Best)
        } else {
            Family::from_key(text).map(DistributionChoice::Named)
        }
    }
}

/// A candidate model in the report: its statistic, or why it could not be fitted.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct CandidateFit {
    pub name: &'static str,
    pub ad_statistic: Option<f64>,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub not_fitted: Option<String>,
}

/// The model the percentile method used, and how it was chosen.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct DistributionFit {
    pub name: &'static str,
    pub parameters: std::collections::BTreeMap<&'static str, f64>,
    /// Anderson–Darling A² of the readings against the fitted model.
    pub ad_statistic: f64,
    /// `named` (`--distribution NAME`) or `best-fit` (smallest A² of the candidates).
    pub chosen_by: &'static str,
    /// The 0.135 %, 50 % and 99.865 % quantiles of the model.
    pub quantiles: [f64; 3],
    /// Every model tried, in a fixed order.
    pub candidates: Vec<CandidateFit>,
    /// How the intervals of Pp and Ppk were found.
    pub interval_method: String,
    #[serde(skip)]
    pub model: Model,
}

/// The quantile probabilities of the percentile method: the normal's ±3σ and median.
pub const PERCENTILES: [f64; 3] = [0.00135, 0.5, 0.99865];

/// Resamples in the bootstrap interval of Pp and Ppk, and its fixed seed (the same readings
/// always give the same interval).
pub const BOOTSTRAP_RESAMPLES: usize = 1000;
const BOOTSTRAP_SEED: u64 = 22514;

/// Pp (two-sided specs only) and Ppk of a model by the percentile method.
fn percentile_indices(model: &Model, spec: &Spec) -> (Option<f64>, f64) {
    let [lo, mid, hi] = PERCENTILES.map(|p| model.quantile(p));
    let pp = match (spec.lsl, spec.usl) {
        (Some(l), Some(u)) => Some((u - l) / (hi - lo)),
        _ => None,
    };
    let upper = spec.usl.map(|u| (u - mid) / (hi - mid));
    let lower = spec.lsl.map(|l| (mid - l) / (mid - lo));
    let ppk = match (upper, lower) {
        (Some(a), Some(b)) => a.min(b),
        (Some(a), None) | (None, Some(a)) => a,
        (None, None) => f64::NAN,
    };
    (pp, ppk)
}

/// The 2.5 % and 97.5 % points of sorted bootstrap values (linear interpolation).
fn interval(mut values: Vec<f64>) -> Option<[f64; 2]> {
    values.retain(|v| v.is_finite());
    if values.len() < 2 {
        return None;
    }
    values.sort_by(f64::total_cmp);
    let at = |p: f64| {
        let h = p * (values.len() - 1) as f64;
        let (i, f) = (h.floor() as usize, h.fract());
        let next = values[(i + 1).min(values.len() - 1)];
        values[i] + f * (next - values[i])
    };
    Some([at(0.025), at(0.975)])
}

/// Replaces Pp, Ppk, their intervals and the ppm of all readings in `c` by the percentile
/// method of ISO 22514-2 with a model fitted to `readings`, and judges the verdict on that Ppk.
/// Cp, Cpk and the within-subgroup ppm are left as they are (they assume a normal
/// distribution, and the warning says so).
pub fn percentile_method(
    c: &mut Capability,
    readings: &[f64],
    spec: &Spec,
    choice: DistributionChoice,
) -> Result<(), StatsError> {
    let tried = distributions::fit_all(readings);
    let (model, a2, chosen_by) = match choice {
        DistributionChoice::Named(family) => {
            let (m, a2) = tried
                .iter()
                .find(|t| t.family == family)
                .expect("every family is tried")
                .fit
                .clone()?;
            (m, a2, "named")
        }
        DistributionChoice::Best => match distributions::best(&tried, readings) {
            Some((m, a2)) => (m, a2, "best-fit"),
            // No model fits: the normal's reason is the plainest.
            None => {
                return Err(distributions::fit(Family::Normal, readings)
                    .unwrap_err()
                    .into());
            }
        },
    };
    let (pp, ppk) = percentile_indices(&model, spec);

    // Parametric bootstrap: readings drawn from the fitted model, the same family refitted.
    let mut rng = StdRng::seed_from_u64(BOOTSTRAP_SEED);
    let mut pps = Vec::with_capacity(BOOTSTRAP_RESAMPLES);
    let mut ppks = Vec::with_capacity(BOOTSTRAP_RESAMPLES);
    let mut failed = 0usize;
    let mut unbounded = 0usize;
    let mut sample = vec![0.0; readings.len()];
    // Drawn where the model gives a possible reading (a transformed normal has mass beyond
    // zero or infinity), as an open interval: a quantile at exactly 0 or 1 is infinite.
    let (p_lo, p_hi) = model.support();
    let (p_lo, p_hi) = (p_lo.max(f64::EPSILON), p_hi.min(1.0 - f64::EPSILON));
    for _ in 0..BOOTSTRAP_RESAMPLES {
        for v in sample.iter_mut() {
            let u: f64 = rng.random_range(p_lo..p_hi);
            *v = model.quantile(u);
        }
        match distributions::fit(model.family(), &sample) {
            Ok(m) => {
                if !PERCENTILES.iter().all(|&p| m.quantile(p).is_finite()) {
                    unbounded += 1;
                }
                let (p, k) = percentile_indices(&m, spec);
                if let Some(p) = p {
                    pps.push(p);
                }
                ppks.push(k);
            }
            Err(_) => failed += 1,
        }
    }
    let mut interval_method = format!(
        "parametric bootstrap: {BOOTSTRAP_RESAMPLES} samples of {} readings drawn from the fitted model and refitted, 2.5% and 97.5% points",
        readings.len()
    );
    if failed > 0 {
        interval_method.push_str(&format!(
            " ({failed} samples could not be refitted and were left out)"
        ));
    }
    if unbounded > 0 {
        interval_method.push_str(&format!(
            "; in {unbounded} samples the refitted model's 0.135% or 99.865% point was unbounded (a Box–Cox λ whose normal reaches past the transform of zero or infinity), which counts as an index of 0: the model's tail is poorly determined by these readings"
        ));
    }
    let ppk_ci95 = interval(ppks).unwrap_or([f64::NAN, f64::NAN]);

    let ppm_below = spec.lsl.map(|l| model.cdf(l) * 1e6);
    let ppm_above = spec.usl.map(|u| model.sf(u) * 1e6);
    c.pp = pp;
    c.ppk = ppk;
    c.pp_ci95 = pp.and_then(|_| interval(pps));
    c.ppk_ci95 = ppk_ci95;
    c.ppm_below = ppm_below;
    c.ppm_above = ppm_above;
    c.verdict = verdict_of(ppk, ppk_ci95[0], c.threshold);
    c.method = "percentile";
    c.verdict_on = "ppk";
    let family = model.family();
    c.distribution = Some(DistributionFit {
        name: family.key(),
        parameters: model.parameters().into_iter().collect(),
        ad_statistic: a2,
        chosen_by,
        quantiles: PERCENTILES.map(|p| model.quantile(p)),
        candidates: tried
            .iter()
            .map(|t| CandidateFit {
                name: t.family.key(),
                ad_statistic: t.fit.as_ref().ok().map(|f| f.1),
                not_fitted: t.fit.as_ref().err().map(|e| e.to_string()),
            })
            .collect(),
        interval_method,
        model,
    });
    // The normality warning's "may be wrong" now concerns only what still assumes normality.
    for w in c.warnings.iter_mut() {
        if w.starts_with("the readings do not look normal") {
            let head = w.split(": the ppm figures").next().unwrap_or(w).to_string();
            *w = format!(
                "{head}: Pp, Ppk and the ppm of all readings come from the fitted {} model instead (percentile method); Cp, Cpk and the ppm judged from the spread inside subgroups still assume a normal distribution",
                family.words()
            );
        }
    }
    if family != Family::Normal
        && let Some(normal) = tried.iter().find(|t| t.family == Family::Normal)
        && let Ok((_, normal_a2)) = normal.fit
        && normal_a2 < a2
    {
        c.warnings.push(format!(
            "the normal model fits these readings better (A² {}) than the {} model chosen (A² {})",
            crate::format::sig(normal_a2, 3),
            family.words(),
            crate::format::sig(a2, 3)
        ));
    }
    Ok(())
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

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn an_index_without_an_interval_is_capable_only_unproven() {
        assert_eq!(verdict_of(1.5, f64::NAN, 1.33), Verdict::CapableUnproven);
        assert_eq!(verdict_of(1.5, 1.4, 1.33), Verdict::Capable);
        assert_eq!(verdict_of(1.2, f64::NAN, 1.33), Verdict::NotCapable);
    }
}
