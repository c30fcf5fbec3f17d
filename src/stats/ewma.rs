//! The exponentially weighted moving average chart.
//!
//! `z_i = λ·x_i + (1 − λ)·z_{i−1}`, `z_0` = the centre line. The exact limits widen towards the
//! asymptote: `centre ± L·σ·√(λ/(2−λ)·(1 − (1−λ)^{2i}))`; the asymptotic limits drop the last
//! factor. `σ` is the standard deviation of the plotted value (σ/√n for subgroup means).

use serde::{Deserialize, Serialize};

use super::{Limits, StatsError};

/// Parameters of an EWMA chart.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct EwmaDesign {
    /// Weight of the newest point, 0 < λ ≤ 1.
    pub lambda: f64,
    /// Width of the limits in standard deviations of the EWMA (L).
    pub width: f64,
    /// Centre line (target or process mean).
    pub center: f64,
    /// Standard deviation of each plotted value.
    pub sigma: f64,
}

impl EwmaDesign {
    /// Checks the parameters.
    pub fn new(lambda: f64, width: f64, center: f64, sigma: f64) -> Result<Self, StatsError> {
        if !(lambda > 0.0 && lambda <= 1.0) {
            return Err(StatsError::BadParameter {
                name: "lambda",
                value: lambda,
                expected: "a weight in (0, 1]",
            });
        }
        if !(width > 0.0 && width.is_finite()) {
            return Err(StatsError::BadParameter {
                name: "width",
                value: width,
                expected: "a positive number of sigmas",
            });
        }
        if !(sigma > 0.0 && sigma.is_finite()) {
            return Err(StatsError::BadParameter {
                name: "sigma",
                value: sigma,
                expected: "a positive finite number",
            });
        }
        super::finite(|| "EWMA centre".to_string(), center)?;
        Ok(EwmaDesign {
            lambda,
            width,
            center,
            sigma,
        })
    }

    /// Exact limits for the `i`-th plotted point (`i` from 1).
    pub fn limits_at(&self, i: u64) -> Limits {
        let l = self.lambda;
        let decay = 1.0 - (1.0 - l).powf(2.0 * i as f64);
        self.limits_with(l / (2.0 - l) * decay)
    }

    /// The asymptotic (steady-state) limits.
    pub fn asymptotic(&self) -> Limits {
        self.limits_with(self.lambda / (2.0 - self.lambda))
    }

    fn limits_with(&self, variance_factor: f64) -> Limits {
        let half = self.width * self.sigma * variance_factor.sqrt();
        Limits {
            center: self.center,
            ucl: self.center + half,
            lcl: self.center - half,
        }
    }
}

/// The running state of an EWMA: plain data, so it can be saved and restored.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct EwmaState {
    /// The current EWMA value.
    pub z: f64,
    /// Points plotted so far.
    pub count: u64,
}

impl EwmaState {
    /// The state before any point: `z_0` is the centre line.
    pub fn start(design: &EwmaDesign) -> Self {
        EwmaState {
            z: design.center,
            count: 0,
        }
    }

    /// Adds a point and returns the new EWMA value.
    pub fn update(&mut self, design: &EwmaDesign, x: f64) -> f64 {
        self.z = design.lambda * x + (1.0 - design.lambda) * self.z;
        self.count += 1;
        self.z
    }
}

/// EWMA values of a whole series, for reports and checks.
pub fn series(design: &EwmaDesign, values: &[f64]) -> Vec<f64> {
    let mut state = EwmaState::start(design);
    values.iter().map(|&x| state.update(design, x)).collect()
}
