//! Control-chart constants, computed from their definitions rather than copied from a table.
//!
//! * `d2(n)` is the mean and `d3(n)` the standard deviation of the range of `n` independent
//!   standard normal variables. Both come from numerical integration of the range distribution:
//!   `d2 = ∫ [1 − Φ(x)ⁿ − (1 − Φ(x))ⁿ] dx` and `E[W²] = 2 ∫₀^∞ w·P(W > w) dw` with
//!   `P(W ≤ w) = n ∫ φ(x)[Φ(x + w) − Φ(x)]ⁿ⁻¹ dx`.
//! * `c4(n) = √(2/(n−1)) · Γ(n/2) / Γ((n−1)/2)`, the mean of the sample standard deviation of `n`
//!   standard normals, from the gamma function.
//! * Every other factor is derived from those three by its textbook definition (each is written
//!   beside its field below).
//!
//! Sizes 2..=100 are supported; each size is computed once, on first use, and cached.

use std::sync::OnceLock;

use statrs::function::erf::erfc;
use statrs::function::gamma::ln_gamma;

use super::StatsError;

/// The smallest subgroup size the constants exist for.
pub const MIN_SIZE: usize = 2;
/// The largest subgroup size linewarden computes constants for.
pub const MAX_SIZE: usize = 100;

/// The constants and factors for one subgroup size. Names follow the trade's usage.
#[allow(non_snake_case)]
#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize)]
pub struct Factors {
    /// Subgroup size.
    pub n: usize,
    /// Mean of the range of `n` standard normals.
    pub d2: f64,
    /// Standard deviation of the range of `n` standard normals.
    pub d3: f64,
    /// Mean of the sample standard deviation of `n` standard normals.
    pub c4: f64,
    /// `3/√n`: X̄ limits from a known sigma.
    pub A: f64,
    /// `3/(d2·√n)`: X̄ limits from the average range.
    pub A2: f64,
    /// `3/(c4·√n)`: X̄ limits from the average standard deviation.
    pub A3: f64,
    /// `max(0, 1 − 3·√(1−c4²)/c4)`: S chart lower limit from s̄.
    pub B3: f64,
    /// `1 + 3·√(1−c4²)/c4`: S chart upper limit from s̄.
    pub B4: f64,
    /// `max(0, c4 − 3·√(1−c4²))`: S chart lower limit from a known sigma.
    pub B5: f64,
    /// `c4 + 3·√(1−c4²)`: S chart upper limit from a known sigma.
    pub B6: f64,
    /// `max(0, d2 − 3·d3)`: R chart lower limit from a known sigma.
    pub D1: f64,
    /// `d2 + 3·d3`: R chart upper limit from a known sigma.
    pub D2: f64,
    /// `max(0, 1 − 3·d3/d2)`: R chart lower limit from R̄.
    pub D3: f64,
    /// `1 + 3·d3/d2`: R chart upper limit from R̄.
    pub D4: f64,
    /// `3/d2`: individuals limits from the average moving range of span `n`.
    pub E2: f64,
}

static CACHE: [OnceLock<Factors>; MAX_SIZE + 1] = [const { OnceLock::new() }; MAX_SIZE + 1];

/// The factors for subgroup size `n` (2..=100), computed on first use and cached.
///
/// ```
/// let f = linewarden::stats::factors(5).unwrap();
/// // Montgomery, Introduction to SQC, Appendix VI: d2 = 2.326, A2 = 0.577, D4 = 2.114 for n = 5.
/// assert!((f.d2 - 2.326).abs() < 5e-4);
/// assert!((f.A2 - 0.577).abs() < 5e-4);
/// assert!((f.D4 - 2.114).abs() < 5e-4);
/// assert!(linewarden::stats::factors(1).is_err());
/// ```
pub fn factors(n: usize) -> Result<&'static Factors, StatsError> {
    if !(MIN_SIZE..=MAX_SIZE).contains(&n) {
        return Err(StatsError::SubgroupSizeOutOfRange { n });
    }
    Ok(CACHE[n].get_or_init(|| compute(n)))
}

/// The factors for subgroup size `n`, computed afresh (no cache): what the first use of each
/// size costs.
pub fn factors_uncached(n: usize) -> Result<Factors, StatsError> {
    if !(MIN_SIZE..=MAX_SIZE).contains(&n) {
        return Err(StatsError::SubgroupSizeOutOfRange { n });
    }
    Ok(compute(n))
}

fn compute(n: usize) -> Factors {
    let (d2, d3) = range_moments(n);
    let c4 = c4(n);
    let rn = (n as f64).sqrt();
    let s_sd = (1.0 - c4 * c4).sqrt();
    Factors {
        n,
        d2,
        d3,
        c4,
        A: 3.0 / rn,
        A2: 3.0 / (d2 * rn),
        A3: 3.0 / (c4 * rn),
        B3: (1.0 - 3.0 * s_sd / c4).max(0.0),
        B4: 1.0 + 3.0 * s_sd / c4,
        B5: (c4 - 3.0 * s_sd).max(0.0),
        B6: c4 + 3.0 * s_sd,
        D1: (d2 - 3.0 * d3).max(0.0),
        D2: d2 + 3.0 * d3,
        D3: (1.0 - 3.0 * d3 / d2).max(0.0),
        D4: 1.0 + 3.0 * d3 / d2,
        E2: 3.0 / d2,
    }
}

/// `c4(n)` from the gamma function; logarithms keep large `n` from overflowing. Defined for
/// any `n ≥ 2` (the pooled standard deviation uses it at its degrees of freedom + 1).
pub fn c4(n: usize) -> f64 {
    let nf = n as f64;
    (2.0 / (nf - 1.0)).sqrt() * (ln_gamma(nf / 2.0) - ln_gamma((nf - 1.0) / 2.0)).exp()
}

/// Grid step and half-width for the quadrature. Simpson's rule with h = 0.02 on these smooth,
/// rapidly decaying integrands is accurate far beyond the 4–5 digits a table prints; the
/// truncation at |x| = 10 drops mass below 1e-22.
const STEP: f64 = 0.02;
const HALF_WIDTH: f64 = 10.0;

/// Returns `(d2, d3)` for size `n`.
fn range_moments(n: usize) -> (f64, f64) {
    let cells = (2.0 * HALF_WIDTH / STEP).round() as usize; // even: Simpson needs it
    // The range of 100 normals rarely exceeds 10 sigma; integrate w over [0, 16] to be safe.
    let w_cells = (16.0 / STEP).round() as usize;
    let points = cells + w_cells + 1;
    let x_at = |i: usize| -HALF_WIDTH + i as f64 * STEP;
    // Φ and φ on one grid: since w steps by the same h, Φ(x_i + w_j) is simply cdf[i + j].
    let cdf: Vec<f64> = (0..points).map(|i| normal_cdf(x_at(i))).collect();
    let pdf: Vec<f64> = (0..=cells).map(|i| normal_pdf(x_at(i))).collect();
    let k = (n - 1) as i32;

    let d2 = simpson(cells, |i| {
        let p = cdf[i];
        1.0 - p.powi(n as i32) - (1.0 - p).powi(n as i32)
    });

    // P(W > w_j) for each w on the grid.
    let tail = |j: usize| -> f64 {
        if j == 0 {
            return 1.0;
        }
        let inside = simpson(cells, |i| pdf[i] * (cdf[i + j] - cdf[i]).max(0.0).powi(k));
        (1.0 - n as f64 * inside).max(0.0)
    };
    let second = 2.0 * simpson(w_cells, |j| j as f64 * STEP * tail(j));
    let d3 = (second - d2 * d2).max(0.0).sqrt();
    (d2, d3)
}

/// P(W < `lo`) and P(W > `hi`) for W the range of `n` independent standard normals:
/// `P(W ≤ w) = n ∫ φ(x)[Φ(x + w) − Φ(x)]ⁿ⁻¹ dx`, by the same quadrature as the constants. The
/// chance a range chart with a known sigma signals, for limits `lo`·σ and `hi`·σ.
pub fn range_tails(n: usize, lo: f64, hi: f64) -> (f64, f64) {
    let cells = (2.0 * HALF_WIDTH / STEP).round() as usize;
    let x_at = |i: usize| -HALF_WIDTH + i as f64 * STEP;
    let k = (n - 1) as i32;
    let cdf_at = |w: f64| -> f64 {
        if w <= 0.0 {
            return 0.0;
        }
        let inside = simpson(cells, |i| {
            let x = x_at(i);
            normal_pdf(x) * (normal_cdf(x + w) - normal_cdf(x)).max(0.0).powi(k)
        });
        (n as f64 * inside).clamp(0.0, 1.0)
    };
    (cdf_at(lo), 1.0 - cdf_at(hi))
}

/// Composite Simpson's rule over `cells` (even) equal steps of `STEP`, with `f(i)` the value at
/// grid point `i`.
fn simpson(cells: usize, f: impl Fn(usize) -> f64) -> f64 {
    let mut sum = f(0) + f(cells);
    for i in 1..cells {
        sum += if i % 2 == 1 { 4.0 } else { 2.0 } * f(i);
    }
    sum * STEP / 3.0
}

/// Standard normal CDF via the complementary error function (accurate in both tails).
pub(crate) fn normal_cdf(x: f64) -> f64 {
    0.5 * erfc(-x / std::f64::consts::SQRT_2)
}

fn normal_pdf(x: f64) -> f64 {
    (-0.5 * x * x).exp() / (2.0 * std::f64::consts::PI).sqrt()
}
