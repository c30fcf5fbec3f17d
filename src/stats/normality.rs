//! The Anderson–Darling test for normality, with the mean and standard deviation estimated from
//! the data (case 3 of D'Agostino and Stephens).

use serde::Serialize;

use super::constants::normal_cdf;
use super::{mean, sample_sd};

/// Fewer readings than this make the test meaningless; it is not run.
pub const MIN_READINGS: usize = 8;

/// The outcome of an Anderson–Darling test.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct AndersonDarling {
    pub n: usize,
    /// The statistic A².
    pub a2: f64,
    /// A² adjusted for estimated parameters: `A²·(1 + 0.75/n + 2.25/n²)`.
    pub a2_adjusted: f64,
    /// Approximate p-value of the adjusted statistic.
    pub p_value: f64,
}

impl AndersonDarling {
    /// Whether the normal model is doubtful at the 5% level.
    pub fn doubtful(&self) -> bool {
        self.p_value < 0.05
    }
}

/// Tests `values` for normality. `None` when there are fewer than [`MIN_READINGS`] readings or
/// they do not vary.
pub fn anderson_darling(values: &[f64]) -> Option<AndersonDarling> {
    let n = values.len();
    if n < MIN_READINGS {
        return None;
    }
    let m = mean(values);
    let s = sample_sd(values);
    if s <= 0.0 {
        return None;
    }
    let mut z: Vec<f64> = values.iter().map(|v| (v - m) / s).collect();
    z.sort_by(f64::total_cmp);
    let nf = n as f64;
    let mut sum = 0.0;
    for i in 0..n {
        // Clamp so that a wild outlier gives a huge statistic rather than ln(0) = -inf.
        let lo = normal_cdf(z[i]).max(1e-300);
        let hi = (1.0 - normal_cdf(z[n - 1 - i])).max(1e-300);
        sum += (2.0 * i as f64 + 1.0) * (lo.ln() + hi.ln());
    }
    let a2 = -nf - sum / nf;
    let a2_adjusted = a2 * (1.0 + 0.75 / nf + 2.25 / (nf * nf));
    Some(AndersonDarling {
        n,
        a2,
        a2_adjusted,
        p_value: p_value(a2_adjusted),
    })
}

/// The p-value approximation of D'Agostino and Stephens, Goodness-of-Fit Techniques (1986),
/// for the adjusted statistic (coefficients recalled from memory; checked in the tests against
/// statsmodels' `normal_ad`, which uses the same approximation).
fn p_value(a: f64) -> f64 {
    let p = if a >= 0.6 {
        (1.2937 - 5.709 * a + 0.0186 * a * a).exp()
    } else if a >= 0.34 {
        (0.9177 - 4.279 * a - 1.38 * a * a).exp()
    } else if a >= 0.2 {
        1.0 - (-8.318 + 42.796 * a - 59.938 * a * a).exp()
    } else {
        1.0 - (-13.436 + 101.14 * a - 223.73 * a * a).exp()
    };
    p.clamp(0.0, 1.0)
}
