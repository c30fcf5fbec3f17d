//! The statistics core: constants, chart limits, baseline studies, capability and normality.
//!
//! Pure functions over numbers. Nothing here does I/O, reads a clock or depends on tokio, so the
//! daemon, `replay`, the command line and the tests all compute exactly the same figures.

pub mod attributes;
pub mod capability;
pub mod constants;
pub mod cusum;
pub mod distributions;
pub mod ewma;
pub mod learning;
pub mod normality;
pub mod study;
pub mod variables;

pub use constants::{Factors, factors};

/// What can go wrong in a statistical computation. Each variant carries the offending value.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum StatsError {
    #[error(
        "subgroup size {n} is outside the supported range {}..={}",
        constants::MIN_SIZE,
        constants::MAX_SIZE
    )]
    SubgroupSizeOutOfRange { n: usize },
    #[error(
        "subgroup {subgroup} has {n} reading(s); the {chart} chart needs at least 2 per subgroup"
    )]
    SubgroupTooSmall {
        subgroup: usize,
        n: usize,
        chart: &'static str,
    },
    #[error(
        "subgroup {subgroup} has {n} readings; the individuals chart takes exactly one reading per subgroup"
    )]
    NotIndividual { subgroup: usize, n: usize },
    #[error("{what}: {found} is not a finite number")]
    NotFinite { what: String, found: f64 },
    #[error("only {found} subgroup(s) remain; at least {needed} are needed to estimate limits")]
    TooFewSubgroups { found: usize, needed: usize },
    #[error(
        "every {what} in the baseline is zero, so the within-subgroup sigma is 0: the gauge resolution is too coarse for this process (or the readings are not independent)"
    )]
    ZeroSpread { what: &'static str },
    #[error("{name} = {value} is invalid: {expected}")]
    BadParameter {
        name: &'static str,
        value: f64,
        expected: &'static str,
    },
    #[error("the lower specification {lsl} is not below the upper specification {usl}")]
    SpecOrder { lsl: f64, usl: f64 },
    #[error("capability needs at least one specification limit (LSL or USL)")]
    NoSpec,
    #[error("subgroup {subgroup} is not in the data (subgroups are numbered 1 to {total})")]
    UnknownSubgroup { subgroup: usize, total: usize },
    #[error(transparent)]
    Fit(#[from] distributions::FitError),
}

/// A centre line with its upper and lower control limits.
#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize, serde::Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Limits {
    /// Written `center`; `centre`, as the messages spell the centre line, is read too.
    #[serde(alias = "centre")]
    pub center: f64,
    pub ucl: f64,
    pub lcl: f64,
}

impl Limits {
    /// Whether `value` lies strictly beyond either limit. A point exactly on a limit is inside
    /// (common practice).
    pub fn beyond(&self, value: f64) -> bool {
        value > self.ucl || value < self.lcl
    }
}

/// Arithmetic mean. `values` must not be empty.
pub fn mean(values: &[f64]) -> f64 {
    values.iter().sum::<f64>() / values.len() as f64
}

/// Sample standard deviation (n − 1 in the denominator); 0 for fewer than two values.
/// Two-pass for accuracy when readings share a large offset (12.003, 12.004, ...).
pub fn sample_sd(values: &[f64]) -> f64 {
    if values.len() < 2 {
        return 0.0;
    }
    let m = mean(values);
    let ss: f64 = values.iter().map(|v| (v - m) * (v - m)).sum();
    (ss / (values.len() - 1) as f64).sqrt()
}

/// Largest minus smallest value; 0 for an empty slice.
pub fn range(values: &[f64]) -> f64 {
    let mut lo = f64::INFINITY;
    let mut hi = f64::NEG_INFINITY;
    for &v in values {
        lo = lo.min(v);
        hi = hi.max(v);
    }
    if values.is_empty() { 0.0 } else { hi - lo }
}

/// Rejects NaN and infinities with the name of what was being computed.
pub(crate) fn finite(what: impl FnOnce() -> String, value: f64) -> Result<f64, StatsError> {
    if value.is_finite() {
        Ok(value)
    } else {
        Err(StatsError::NotFinite {
            what: what(),
            found: value,
        })
    }
}
