//! Distribution models for readings that are not normal, fitted by maximum likelihood, and the
//! Anderson–Darling statistic of each fit.
//!
//! Used by the percentile method of capability (ISO 22514-2): Pp and Ppk from the 0.135 %, 50 %
//! and 99.865 % quantiles of a fitted model instead of the mean ± 3σ of a normal one.
//!
//! * normal: mean and standard deviation with `n` in the denominator (the maximum-likelihood
//!   estimate; the classic Pp uses `n − 1`);
//! * lognormal (two parameters, readings above zero): the normal fit of `ln x`;
//! * Weibull (two parameters, readings above zero): shape `k` from the likelihood equation
//!   `Σxᵏ ln x / Σxᵏ − 1/k − mean(ln x) = 0`, scale `(Σxᵏ/n)^(1/k)`;
//! * Box–Cox (readings above zero): `y = (x^λ − 1)/λ` (`ln x` at λ = 0) with λ maximising the
//!   profile log-likelihood `(λ − 1)·Σ ln x − n/2·ln σ̂²(λ)` over −5 … 5, then the normal fit
//!   of `y`.
//!
//! The reference values in the tests come from scipy's `fit` methods and `boxcox` on the same
//! readings (`tests/reference/percentile_capability.py`).

use serde::Serialize;
use statrs::distribution::{ContinuousCDF, Normal};

/// The readings a model needs before it is fitted.
pub const MIN_READINGS: usize = 8;

/// The families that can be fitted.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "kebab-case")]
pub enum Family {
    Normal,
    Lognormal,
    Weibull,
    BoxCox,
}

impl Family {
    pub const ALL: [Family; 4] = [
        Family::Normal,
        Family::Lognormal,
        Family::Weibull,
        Family::BoxCox,
    ];

    /// The name used on the command line and in the JSON.
    pub fn key(self) -> &'static str {
        match self {
            Family::Normal => "normal",
            Family::Lognormal => "lognormal",
            Family::Weibull => "weibull",
            Family::BoxCox => "box-cox",
        }
    }

    /// The name in a sentence.
    pub fn words(self) -> &'static str {
        match self {
            Family::Normal => "normal",
            Family::Lognormal => "lognormal",
            Family::Weibull => "Weibull",
            Family::BoxCox => "Box–Cox transformed normal",
        }
    }

    pub fn from_key(key: &str) -> Option<Family> {
        Family::ALL.into_iter().find(|f| f.key() == key)
    }
}

/// Why a model could not be fitted to the readings.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum FitError {
    #[error("the {family} model needs at least {MIN_READINGS} readings; there are {n}")]
    TooFew { family: &'static str, n: usize },
    #[error("the {family} model needs every reading above zero; {value} is not")]
    NotPositive { family: &'static str, value: f64 },
    #[error("the readings do not vary, so no {family} model can be fitted")]
    NoSpread { family: &'static str },
    #[error("{value} is not a finite number")]
    NotFinite { value: f64 },
}

/// A fitted model.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Model {
    Normal {
        mu: f64,
        sigma: f64,
    },
    /// `ln x` is normal with mean `mu` and standard deviation `sigma`.
    Lognormal {
        mu: f64,
        sigma: f64,
    },
    Weibull {
        shape: f64,
        scale: f64,
    },
    /// The transformed readings are normal with mean `mu` and standard deviation `sigma`.
    BoxCox {
        lambda: f64,
        mu: f64,
        sigma: f64,
    },
}

fn std_normal() -> Normal {
    Normal::standard()
}

/// The Box–Cox transform, stable near λ = 0.
pub fn box_cox(x: f64, lambda: f64) -> f64 {
    let l = x.ln();
    if lambda.abs() < 1e-12 {
        l
    } else {
        (lambda * l).exp_m1() / lambda
    }
}

impl Model {
    pub fn family(&self) -> Family {
        match self {
            Model::Normal { .. } => Family::Normal,
            Model::Lognormal { .. } => Family::Lognormal,
            Model::Weibull { .. } => Family::Weibull,
            Model::BoxCox { .. } => Family::BoxCox,
        }
    }

    /// The parameters by name, in a fixed order.
    pub fn parameters(&self) -> Vec<(&'static str, f64)> {
        match *self {
            Model::Normal { mu, sigma } => vec![("mean", mu), ("sigma", sigma)],
            Model::Lognormal { mu, sigma } => vec![("log_mean", mu), ("log_sigma", sigma)],
            Model::Weibull { shape, scale } => vec![("shape", shape), ("scale", scale)],
            Model::BoxCox { lambda, mu, sigma } => vec![
                ("lambda", lambda),
                ("transformed_mean", mu),
                ("transformed_sigma", sigma),
            ],
        }
    }

    /// The standardized normal score of `x` for the normal-based models; `None` for Weibull.
    fn z(&self, x: f64) -> Option<f64> {
        match *self {
            Model::Normal { mu, sigma } => Some((x - mu) / sigma),
            Model::Lognormal { mu, sigma } => Some(if x <= 0.0 {
                f64::NEG_INFINITY
            } else {
                (x.ln() - mu) / sigma
            }),
            Model::BoxCox { lambda, mu, sigma } => Some(if x <= 0.0 {
                // The transformed normal's mass below the transform of zero: −1/λ for λ > 0;
                // for λ ≤ 0 the transform of zero is −∞.
                if lambda > 0.0 {
                    (-1.0 / lambda - mu) / sigma
                } else {
                    f64::NEG_INFINITY
                }
            } else {
                (box_cox(x, lambda) - mu) / sigma
            }),
            Model::Weibull { .. } => None,
        }
    }

    /// P(X ≤ x).
    pub fn cdf(&self, x: f64) -> f64 {
        match (*self, self.z(x)) {
            (Model::Weibull { shape, scale }, _) => {
                if x <= 0.0 {
                    0.0
                } else {
                    -(-(x / scale).powf(shape)).exp_m1()
                }
            }
            (_, Some(z)) => std_normal().cdf(z),
            (_, None) => f64::NAN,
        }
    }

    /// P(X > x), computed directly so that far upper tails keep their precision.
    pub fn sf(&self, x: f64) -> f64 {
        match (*self, self.z(x)) {
            (Model::Weibull { shape, scale }, _) => {
                if x <= 0.0 {
                    1.0
                } else {
                    (-(x / scale).powf(shape)).exp()
                }
            }
            (_, Some(z)) => std_normal().sf(z),
            (_, None) => f64::NAN,
        }
    }

    /// The `p` quantile.
    pub fn quantile(&self, p: f64) -> f64 {
        let z = || std_normal().inverse_cdf(p);
        match *self {
            Model::Normal { mu, sigma } => mu + z() * sigma,
            Model::Lognormal { mu, sigma } => (mu + z() * sigma).exp(),
            Model::Weibull { shape, scale } => scale * (-(-p).ln_1p()).powf(1.0 / shape),
            Model::BoxCox { lambda, mu, sigma } => {
                let y = mu + z() * sigma;
                if lambda.abs() < 1e-12 {
                    y.exp()
                } else {
                    let base = lambda * y + 1.0;
                    if base > 0.0 {
                        (base.ln() / lambda).exp()
                    } else if lambda > 0.0 {
                        0.0
                    } else {
                        f64::INFINITY
                    }
                }
            }
        }
    }

    /// The probabilities between which the model gives readings above zero and finite: a
    /// transformed normal puts some mass where no reading can be (below the transform of zero
    /// for λ > 0, above the transform of infinity for λ < 0). A sample drawn from the model
    /// draws its probabilities from this range.
    pub fn support(&self) -> (f64, f64) {
        match *self {
            Model::BoxCox { lambda, mu, sigma } if lambda > 0.0 => {
                (std_normal().cdf((-1.0 / lambda - mu) / sigma), 1.0)
            }
            Model::BoxCox { lambda, mu, sigma } if lambda < 0.0 => {
                (0.0, std_normal().cdf((-1.0 / lambda - mu) / sigma))
            }
            _ => (0.0, 1.0),
        }
    }

    /// The log-likelihood of `values` under this model, in the readings' own units (for a
    /// transformed normal the Jacobian of the transform is added, so models compare).
    pub fn log_likelihood(&self, values: &[f64]) -> f64 {
        let ln_phi = |z: f64| -0.5 * z * z - 0.5 * (2.0 * std::f64::consts::PI).ln();
        values
            .iter()
            .map(|&x| match *self {
                Model::Normal { mu, sigma } => ln_phi((x - mu) / sigma) - sigma.ln(),
                Model::Lognormal { mu, sigma } => {
                    ln_phi((x.ln() - mu) / sigma) - sigma.ln() - x.ln()
                }
                Model::Weibull { shape, scale } => {
                    shape.ln() - scale.ln() + (shape - 1.0) * (x / scale).ln()
                        - (x / scale).powf(shape)
                }
                Model::BoxCox { lambda, mu, sigma } => {
                    ln_phi((box_cox(x, lambda) - mu) / sigma) - sigma.ln() + (lambda - 1.0) * x.ln()
                }
            })
            .sum()
    }

    /// Akaike's information criterion of the fit: 2k − 2·ln L.
    pub fn aic(&self, values: &[f64]) -> f64 {
        2.0 * self.parameters().len() as f64 - 2.0 * self.log_likelihood(values)
    }

    /// The Anderson–Darling statistic A² of `values` against this model (its parameters taken
    /// as given; no small-sample adjustment).
    pub fn anderson_darling(&self, values: &[f64]) -> f64 {
        let mut x = values.to_vec();
        x.sort_by(f64::total_cmp);
        let n = x.len();
        let nf = n as f64;
        let mut sum = 0.0;
        for i in 0..n {
            // Clamped so that a wild reading gives a huge statistic rather than ln(0) = −∞.
            let lo = self.cdf(x[i]).max(1e-300).ln();
            let hi = self.sf(x[n - 1 - i]).max(1e-300).ln();
            sum += (2.0 * i as f64 + 1.0) * (lo + hi);
        }
        -nf - sum / nf
    }
}

fn check(family: Family, values: &[f64], positive: bool) -> Result<(), FitError> {
    if let Some(&v) = values.iter().find(|v| !v.is_finite()) {
        return Err(FitError::NotFinite { value: v });
    }
    if values.len() < MIN_READINGS {
        return Err(FitError::TooFew {
            family: family.key(),
            n: values.len(),
        });
    }
    if positive && let Some(&v) = values.iter().find(|&&v| v <= 0.0) {
        return Err(FitError::NotPositive {
            family: family.key(),
            value: v,
        });
    }
    let first = values[0];
    if values.iter().all(|&v| v == first) {
        return Err(FitError::NoSpread {
            family: family.key(),
        });
    }
    Ok(())
}

/// Mean and maximum-likelihood standard deviation (two-pass).
fn normal_mle(values: impl Iterator<Item = f64> + Clone) -> (f64, f64) {
    let n = values.clone().count() as f64;
    let mu = values.clone().sum::<f64>() / n;
    let ss: f64 = values.map(|v| (v - mu) * (v - mu)).sum();
    (mu, (ss / n).sqrt())
}

/// Fits `family` to `values` by maximum likelihood.
pub fn fit(family: Family, values: &[f64]) -> Result<Model, FitError> {
    check(family, values, family != Family::Normal)?;
    let model = match family {
        Family::Normal => {
            let (mu, sigma) = normal_mle(values.iter().copied());
            Model::Normal { mu, sigma }
        }
        Family::Lognormal => {
            let (mu, sigma) = normal_mle(values.iter().map(|v| v.ln()));
            Model::Lognormal { mu, sigma }
        }
        Family::Weibull => weibull(values),
        Family::BoxCox => {
            let lambda = box_cox_lambda(values);
            let (mu, sigma) = normal_mle(values.iter().map(|&v| box_cox(v, lambda)));
            Model::BoxCox { lambda, mu, sigma }
        }
    };
    let finite = model.parameters().iter().all(|(_, v)| v.is_finite());
    let spread = match model {
        Model::Normal { sigma, .. }
        | Model::Lognormal { sigma, .. }
        | Model::BoxCox { sigma, .. } => sigma > 0.0,
        Model::Weibull { .. } => true,
    };
    if !(finite && spread) {
        return Err(FitError::NoSpread {
            family: family.key(),
        });
    }
    Ok(model)
}

/// Weibull maximum likelihood. The shape solves a monotone equation in `k`; it is bracketed
/// and solved by safeguarded Newton steps on readings scaled by their maximum (so `xᵏ` cannot
/// overflow).
fn weibull(values: &[f64]) -> Model {
    let max = values.iter().copied().fold(0.0, f64::max);
    let y: Vec<f64> = values.iter().map(|v| v / max).collect();
    let logs: Vec<f64> = y.iter().map(|v| v.ln()).collect();
    let n = y.len() as f64;
    let mean_log = logs.iter().sum::<f64>() / n;
    // g(k) = Σyᵏ ln y / Σyᵏ − 1/k − mean(ln y), increasing in k; g'(k) for Newton.
    let g = |k: f64| {
        let (mut s0, mut s1, mut s2) = (0.0, 0.0, 0.0);
        for &l in &logs {
            let p = (k * l).exp();
            s0 += p;
            s1 += p * l;
            s2 += p * l * l;
        }
        let a = s1 / s0;
        (a - 1.0 / k - mean_log, s2 / s0 - a * a + 1.0 / (k * k))
    };
    let (mut lo, mut hi) = (1e-3, 1.0);
    while g(hi).0 < 0.0 && hi < 1e6 {
        lo = hi;
        hi *= 2.0;
    }
    let mut k = 0.5 * (lo + hi);
    for _ in 0..200 {
        let (v, d) = g(k);
        if v < 0.0 {
            lo = k;
        } else {
            hi = k;
        }
        let newton = k - v / d;
        let next = if newton > lo && newton < hi && d > 0.0 {
            newton
        } else {
            0.5 * (lo + hi)
        };
        if (next - k).abs() <= 1e-14 * k {
            k = next;
            break;
        }
        k = next;
    }
    let mean_pow = y.iter().map(|v| v.powf(k)).sum::<f64>() / n;
    Model::Weibull {
        shape: k,
        scale: max * mean_pow.powf(1.0 / k),
    }
}

/// The Box–Cox λ maximising the profile log-likelihood, by golden-section search on −5 … 5
/// (the likelihood is unimodal in λ for positive data in practice; the bounds keep a flat
/// likelihood from running away).
fn box_cox_lambda(values: &[f64]) -> f64 {
    let sum_log: f64 = values.iter().map(|v| v.ln()).sum();
    let n = values.len() as f64;
    let llf = |lambda: f64| {
        let (_, sigma) = normal_mle(values.iter().map(|&v| box_cox(v, lambda)));
        (lambda - 1.0) * sum_log - n * sigma.ln()
    };
    let ratio = (5f64.sqrt() - 1.0) / 2.0;
    let (mut a, mut b) = (-5.0f64, 5.0f64);
    let mut c = b - ratio * (b - a);
    let mut d = a + ratio * (b - a);
    let (mut fc, mut fd) = (llf(c), llf(d));
    while b - a > 1e-10 {
        if fc > fd {
            b = d;
            d = c;
            fd = fc;
            c = b - ratio * (b - a);
            fc = llf(c);
        } else {
            a = c;
            c = d;
            fc = fd;
            d = a + ratio * (b - a);
            fd = llf(d);
        }
    }
    0.5 * (a + b)
}

/// One candidate model: its fit and goodness of fit, or why it could not be fitted.
#[derive(Debug, Clone, PartialEq)]
pub struct Candidate {
    pub family: Family,
    pub fit: Result<(Model, f64), FitError>,
}

/// Fits every family to `values`, with each fit's A² (see [`best`] for the choice among them).
pub fn fit_all(values: &[f64]) -> Vec<Candidate> {
    Family::ALL
        .into_iter()
        .map(|family| Candidate {
            family,
            fit: fit(family, values).map(|m| (m, m.anderson_darling(values))),
        })
        .collect()
}

/// The model to use when asked for the best: the normal unless the Anderson–Darling test
/// rejects it (p below 0.05, adjusted for the estimated mean and sigma); otherwise the fitted
/// model with the smallest AIC, 2k − 2·ln L, from each model's maximised likelihood of the
/// readings themselves (a transform's Jacobian included) with k its parameters (two, three for
/// Box–Cox). A² alone favours the model with more parameters: Box–Cox, one more than the
/// normal, was chosen for normal data. Returns the model and its A².
pub fn best(candidates: &[Candidate], values: &[f64]) -> Option<(Model, f64)> {
    let fitted = || {
        candidates
            .iter()
            .filter_map(|c| c.fit.as_ref().ok().copied())
    };
    let normal_kept = super::normality::anderson_darling(values).is_none_or(|ad| !ad.doubtful());
    if normal_kept && let Some(n) = fitted().find(|(m, _)| m.family() == Family::Normal) {
        return Some(n);
    }
    fitted()
        .map(|(m, a2)| (m, a2, m.aic(values)))
        .filter(|(_, _, aic)| aic.is_finite())
        .min_by(|a, b| a.2.total_cmp(&b.2))
        .map(|(m, a2, _)| (m, a2))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn quantile_inverts_cdf_for_every_family() {
        let models = [
            Model::Normal {
                mu: 10.0,
                sigma: 2.0,
            },
            Model::Lognormal {
                mu: 0.5,
                sigma: 0.3,
            },
            Model::Weibull {
                shape: 1.7,
                scale: 3.0,
            },
            Model::BoxCox {
                lambda: 0.4,
                mu: 1.0,
                sigma: 0.2,
            },
            Model::BoxCox {
                lambda: -0.6,
                mu: 0.5,
                sigma: 0.1,
            },
        ];
        for m in models {
            for p in [0.00135, 0.1, 0.5, 0.9, 0.99865] {
                let x = m.quantile(p);
                // statrs' normal quantile is good to about 5e-12 in probability.
                assert!(
                    (m.cdf(x) - p).abs() < 1e-10,
                    "{m:?} p {p}: cdf {}",
                    m.cdf(x)
                );
                assert!((m.sf(x) - (1.0 - p)).abs() < 1e-10);
            }
        }
    }

    #[test]
    fn readings_at_or_below_zero_are_refused_by_the_positive_models() {
        let v = [1.0, 2.0, 0.0, 3.0, 4.0, 5.0, 6.0, 7.0];
        assert!(matches!(
            fit(Family::Weibull, &v),
            Err(FitError::NotPositive { value, .. }) if value == 0.0
        ));
        assert!(fit(Family::Normal, &v).is_ok());
        let flat = [2.0; 10];
        assert!(matches!(
            fit(Family::Lognormal, &flat),
            Err(FitError::NoSpread { .. })
        ));
        assert!(matches!(
            fit(Family::BoxCox, &v[..5]),
            Err(FitError::TooFew { n: 5, .. })
        ));
    }

    /// The log-likelihoods AIC is built from, against scipy 1.17.1 (`norm.logpdf`,
    /// `lognorm.logpdf(x, 0.25, scale=e^0.95)`, `weibull_min.logpdf(x, 3.2, scale=3)`, and
    /// `norm.logpdf` of the Box–Cox transform plus (λ − 1)·Σ ln x), summed over ten readings.
    #[test]
    fn log_likelihoods_match_scipy() {
        let x = [2.1, 2.5, 1.9, 3.3, 2.8, 2.2, 4.1, 2.6, 2.9, 3.0];
        for (m, want) in [
            (
                Model::Normal {
                    mu: 2.7,
                    sigma: 0.6,
                },
                -9.3033513166,
            ),
            (
                Model::Lognormal {
                    mu: 0.95,
                    sigma: 0.25,
                },
                -9.0011234849,
            ),
            (
                Model::Weibull {
                    shape: 3.2,
                    scale: 3.0,
                },
                -10.7572657478,
            ),
            (
                Model::BoxCox {
                    lambda: 0.3,
                    mu: 1.1,
                    sigma: 0.2,
                },
                -11.1358133820,
            ),
        ] {
            let got = m.log_likelihood(&x);
            assert!((got - want).abs() < 1e-9, "{m:?}: {got} against {want}");
        }
    }

    /// What broke: ranked by A² alone, Box–Cox (one parameter more than the normal) was
    /// chosen for 12 of 16 datasets, a normal sample among them. Seeded samples of 100: the
    /// normal is kept for normal data nearly always, and lognormal and Weibull data get their
    /// own model most of the time.
    #[test]
    fn best_keeps_the_normal_for_normal_data_and_finds_skewed_models() {
        use rand::SeedableRng;
        use rand_distr::{Distribution, LogNormal, Normal as N, Weibull};
        let mut rng = rand::rngs::StdRng::seed_from_u64(31);
        let picks = |draw: &mut dyn FnMut(&mut rand::rngs::StdRng) -> f64,
                     rng: &mut rand::rngs::StdRng| {
            let mut count = std::collections::BTreeMap::<&str, usize>::new();
            for _ in 0..60 {
                let v: Vec<f64> = (0..100).map(|_| draw(rng)).collect();
                let (m, _) = best(&fit_all(&v), &v).unwrap();
                *count.entry(m.family().key()).or_default() += 1;
            }
            count
        };
        let normal = N::new(50.0, 2.0).unwrap();
        let c = picks(&mut |r| normal.sample(r), &mut rng);
        assert!(
            c.get("normal").copied().unwrap_or(0) >= 54,
            "normal data: {c:?}"
        );
        let logn = LogNormal::new(1.0, 0.5).unwrap();
        let c = picks(&mut |r| logn.sample(r), &mut rng);
        assert!(
            c.get("lognormal").copied().unwrap_or(0) >= 36,
            "lognormal data: {c:?}"
        );
        let w = Weibull::new(3.0, 1.3).unwrap();
        let c = picks(&mut |r| w.sample(r), &mut rng);
        assert!(
            c.get("weibull").copied().unwrap_or(0) >= 30,
            "Weibull data: {c:?}"
        );
    }
}
