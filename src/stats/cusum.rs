//! The tabular (two-sided) CUSUM.
//!
//! `C⁺_i = max(0, x_i − (μ₀ + K) + C⁺_{i−1})`, `C⁻_i = max(0, (μ₀ − K) − x_i + C⁻_{i−1})`, with
//! `K = k·σ` and a signal when either exceeds `H = h·σ`. A fast initial response starts both
//! sums at a fraction of `H` (commonly H/2) so that a process that starts off target is caught
//! sooner.

use serde::{Deserialize, Serialize};

use super::StatsError;

/// Parameters of a tabular CUSUM. `k` and `h` are in units of `sigma`.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct CusumDesign {
    /// Target mean μ₀.
    pub target: f64,
    /// Standard deviation of each plotted value.
    pub sigma: f64,
    /// Reference value (allowance) in sigmas; half the shift to detect, commonly 0.5.
    pub k: f64,
    /// Decision interval in sigmas; commonly 4 or 5.
    pub h: f64,
    /// Starting value of both sums as a fraction of `h` (0 = none, 0.5 = the usual fast initial
    /// response).
    pub head_start: f64,
}

impl CusumDesign {
    /// Checks the parameters.
    pub fn new(
        target: f64,
        sigma: f64,
        k: f64,
        h: f64,
        head_start: f64,
    ) -> Result<Self, StatsError> {
        super::finite(|| "CUSUM target".to_string(), target)?;
        let checks = [
            ("sigma", sigma, sigma > 0.0, "a positive finite number"),
            ("k", k, k >= 0.0, "a non-negative number of sigmas"),
            ("h", h, h > 0.0, "a positive number of sigmas"),
            (
                "head_start",
                head_start,
                (0.0..1.0).contains(&head_start),
                "a fraction of h in [0, 1)",
            ),
        ];
        for (name, value, ok, expected) in checks {
            if !ok || !value.is_finite() {
                return Err(StatsError::BadParameter {
                    name,
                    value,
                    expected,
                });
            }
        }
        Ok(CusumDesign {
            target,
            sigma,
            k,
            h,
            head_start,
        })
    }

    /// The decision interval H in data units.
    pub fn decision_interval(&self) -> f64 {
        self.h * self.sigma
    }
}

/// Which side of a CUSUM signalled.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, Serialize, Deserialize)]
pub struct CusumSignal {
    pub upper: bool,
    pub lower: bool,
}

/// Running sums of a tabular CUSUM, in data units: plain data, so it can be saved and restored.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct CusumState {
    pub upper: f64,
    pub lower: f64,
    /// Consecutive points for which each sum has been non-zero (to estimate when a shift began).
    pub upper_run: u64,
    pub lower_run: u64,
}

impl CusumState {
    /// The sums before any point (with the head start, if any).
    pub fn start(design: &CusumDesign) -> Self {
        let s = design.head_start * design.decision_interval();
        CusumState {
            upper: s,
            lower: s,
            upper_run: 0,
            lower_run: 0,
        }
    }

    /// Adds a point and says whether either sum now exceeds H.
    pub fn update(&mut self, design: &CusumDesign, x: f64) -> CusumSignal {
        let allowance = design.k * design.sigma;
        self.upper = (self.upper + x - design.target - allowance).max(0.0);
        self.lower = (self.lower + design.target - allowance - x).max(0.0);
        self.upper_run = if self.upper > 0.0 {
            self.upper_run + 1
        } else {
            0
        };
        self.lower_run = if self.lower > 0.0 {
            self.lower_run + 1
        } else {
            0
        };
        let h = design.decision_interval();
        CusumSignal {
            upper: self.upper > h,
            lower: self.lower > h,
        }
    }
}
