//! The stored limits of one characteristic: a TOML file of our own that people can read and
//! the daemon loads.
//!
//! ```toml
//! format = 1
//! characteristic = "bore-a"
//! chart = "xbar-r"
//! subgroup_size = 5
//! unit = "mm"
//!
//! [sigma]
//! within = 0.0042
//! overall = 0.0045
//! method = "average range / d2"
//!
//! [location]
//! center = 12.001
//! ucl = 12.0066
//! lcl = 11.9954
//!
//! [dispersion]
//! kind = "range"
//! center = 0.00977
//! ucl = 0.02066
//! lcl = 0
//!
//! [spec]
//! lsl = 11.95
//! usl = 12.05
//!
//! [provenance]
//! computed_at = "2026-12-01T08:00:00Z"
//! source = "baseline.csv"
//! tool = "linewarden 0.1.0"
//! subgroups_total = 25
//! subgroups_used = 24
//! used = "1-6, 8-25"
//!
//! [[provenance.excluded]]
//! subgroup = 7
//! iteration = 1
//! reason = "mean 12.0093 above the upper control limit 12.0066 (trial limits of round 1)"
//! ```
//!
//! Limits the daemon learned from its first subgroups say `provisional = true` in
//! `[provenance]` until an engineer approves them (`linewarden approve`), which adds:
//!
//! ```toml
//! [approved]
//! by = "R. Okafor"
//! at = "2026-12-02T09:14:03Z"
//! note = "checked against the setup sheet"
//! ```

use std::path::Path;

use serde::{Deserialize, Serialize};

use crate::diag::{Locator, Problem, Problems};
use crate::format::num;
use crate::stats::Limits;
use crate::stats::capability::Spec;
use crate::stats::study::{Exclusion, Study};
use crate::stats::variables::{DispersionKind, VariablesChart};

/// The format version this build writes and reads.
pub const FORMAT: u32 = 1;

/// One characteristic's stored limits.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct StoredLimits {
    pub format: u32,
    pub characteristic: String,
    pub chart: VariablesChart,
    pub subgroup_size: usize,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub unit: Option<String>,
    pub sigma: SigmaRecord,
    pub location: Limits,
    pub dispersion: DispersionRecord,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub spec: Option<Spec>,
    pub provenance: Provenance,
    /// Who approved provisional limits, and when.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub approved: Option<Approval>,
}

/// An engineer's approval of provisional (learned) limits.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Approval {
    pub by: String,
    /// RFC 3339, UTC.
    pub at: String,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub note: Option<String>,
}

/// The process sigma and how it was estimated.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct SigmaRecord {
    pub within: f64,
    pub overall: f64,
    pub method: String,
}

/// The dispersion chart's statistic and limits.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct DispersionRecord {
    pub kind: DispersionKind,
    #[serde(alias = "centre")]
    pub center: f64,
    pub ucl: f64,
    pub lcl: f64,
}

/// Where the limits came from.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Provenance {
    /// RFC 3339 time of the computation.
    pub computed_at: String,
    /// The data the study read (a file name, or "learning" for limits the daemon computed).
    pub source: String,
    pub tool: String,
    pub subgroups_total: usize,
    pub subgroups_used: usize,
    /// The subgroups used, as ranges: "1-6, 8-25".
    pub used: String,
    #[serde(default)]
    pub excluded: Vec<Exclusion>,
    /// Learned by the daemon from its first subgroups, with nobody having looked at them:
    /// alerts on them are capped until they are approved.
    #[serde(default, skip_serializing_if = "std::ops::Not::not")]
    pub provisional: bool,
}

/// Why a limits file could not be loaded.
#[derive(Debug, thiserror::Error)]
pub enum LimitsFileError {
    #[error("cannot read limits file {path}: {source}")]
    Read {
        path: String,
        source: std::io::Error,
    },
    #[error("cannot write limits file {path}: {source}")]
    Write {
        path: String,
        source: std::io::Error,
    },
    #[error("{0}")]
    Invalid(#[from] Problems),
}

impl StoredLimits {
    /// Limits from a finished study.
    pub fn from_study(
        study: &Study,
        characteristic: &str,
        unit: Option<String>,
        spec: Option<Spec>,
        source: &str,
        computed_at: &str,
    ) -> Self {
        StoredLimits {
            format: FORMAT,
            characteristic: characteristic.to_string(),
            chart: study.chart,
            subgroup_size: study.subgroup_size,
            unit,
            sigma: SigmaRecord {
                within: tidy(study.estimate.sigma_within),
                overall: tidy(study.estimate.sigma_overall),
                method: study.estimate.sigma_method.to_string(),
            },
            location: Limits {
                center: tidy(study.location.center),
                ucl: tidy(study.location.ucl),
                lcl: tidy(study.location.lcl),
            },
            dispersion: DispersionRecord {
                kind: study.dispersion_kind,
                center: tidy(study.dispersion.center),
                ucl: tidy(study.dispersion.ucl),
                lcl: tidy(study.dispersion.lcl),
            },
            spec,
            provenance: Provenance {
                computed_at: computed_at.to_string(),
                source: source.to_string(),
                tool: format!("linewarden {}", env!("CARGO_PKG_VERSION")),
                subgroups_total: study.subgroups_total,
                subgroups_used: study.subgroups_used,
                used: ranges(&study.used_subgroups()),
                excluded: study.excluded.clone(),
                provisional: false,
            },
            approved: None,
        }
    }

    /// Learned limits nobody has approved yet.
    pub fn is_provisional(&self) -> bool {
        self.provenance.provisional && self.approved.is_none()
    }

    /// The file's text: a comment saying what it is, then the TOML.
    pub fn to_toml(&self) -> String {
        let body = toml::to_string(self).unwrap_or_else(|e| {
            // Every field is a plain number, string or table: serialization cannot fail.
            unreachable!("stored limits always serialize: {e}")
        });
        let review = if self.is_provisional() {
            format!(
                "# PROVISIONAL: learned by the daemon from its first subgroups and not yet approved.\n# Alerts on these limits are capped until an engineer reviews them and runs\n#   linewarden approve {} --by NAME\n",
                self.characteristic
            )
        } else {
            "# Review before use; edit by recomputing, not by hand.\n".to_string()
        };
        format!(
            "# Control limits for characteristic \"{}\", written by {}.\n{review}\n{body}",
            self.characteristic, self.provenance.tool
        )
    }

    /// Parses and validates `text`; `file` names it in messages. Every problem is reported.
    pub fn parse(text: &str, file: &str) -> Result<Self, Problems> {
        let loc = Locator::new(text);
        let parsed: Self = toml::from_str(text).map_err(|e| Problems {
            file: file.to_string(),
            problems: vec![loc.from_toml_error(&e)],
        })?;
        let problems = parsed.problems(&loc);
        if problems.is_empty() {
            Ok(parsed)
        } else {
            Err(Problems {
                file: file.to_string(),
                problems,
            })
        }
    }

    fn problems(&self, loc: &Locator) -> Vec<Problem> {
        let mut out = Vec::new();
        let mut bad = |path: &str, msg: String| out.push(loc.problem(path, msg));
        if self.format != FORMAT {
            bad(
                "format",
                format!(
                    "format {} is not known to this build; expected {FORMAT}",
                    self.format
                ),
            );
        }
        if !valid_id(&self.characteristic) {
            bad(
                "characteristic",
                format!(
                    "\"{}\" is not a valid identifier; use letters, digits, '-', '_' and '.'",
                    self.characteristic
                ),
            );
        }
        let n = self.subgroup_size;
        match self.chart {
            VariablesChart::Individuals if n != 1 => bad(
                "subgroup_size",
                format!("{n} does not fit chart = \"individuals\", which needs 1"),
            ),
            VariablesChart::XbarR | VariablesChart::XbarS if !(2..=100).contains(&n) => bad(
                "subgroup_size",
                format!(
                    "{n} does not fit chart = \"{}\", which needs 2 to 100",
                    self.chart.name()
                ),
            ),
            _ => {}
        }
        let expected_kind = self.chart.dispersion_kind();
        if self.dispersion.kind != expected_kind {
            bad(
                "dispersion.kind",
                format!(
                    "\"{}\" does not go with chart = \"{}\"; expected \"{}\"",
                    self.dispersion.kind.name(),
                    self.chart.name(),
                    expected_kind.name()
                ),
            );
        }
        for (path, v) in [
            ("sigma.within", self.sigma.within),
            ("sigma.overall", self.sigma.overall),
        ] {
            if !(v > 0.0 && v.is_finite()) {
                bad(path, format!("{} must be a positive number", num(v)));
            }
        }
        let l = &self.location;
        order(&mut bad, "location", l.lcl, l.center, l.ucl, false);
        let d = &self.dispersion;
        if d.lcl < 0.0 {
            bad(
                "dispersion.lcl",
                format!("{} is negative; a spread cannot be", num(d.lcl)),
            );
        }
        order(&mut bad, "dispersion", d.lcl, d.center, d.ucl, true);
        if let Some(spec) = &self.spec
            && let Err(e) = spec.validate()
        {
            bad("spec", e.to_string());
        }
        if let Some(a) = &self.approved {
            if a.by.trim().is_empty() {
                bad(
                    "approved.by",
                    "is empty; say who approved the limits".into(),
                );
            }
            if crate::format::parse_rfc3339(&a.at).is_err() {
                bad(
                    "approved.at",
                    format!(
                        "\"{}\" is not an RFC 3339 time such as 2026-12-02T09:14:03Z",
                        a.at
                    ),
                );
            }
        }
        if self.provenance.subgroups_used > self.provenance.subgroups_total {
            bad(
                "provenance.subgroups_used",
                format!(
                    "{} is more than subgroups_total = {}",
                    self.provenance.subgroups_used, self.provenance.subgroups_total
                ),
            );
        }
        out
    }

    /// Writes the file atomically (see [`crate::fsutil::write_atomic`]).
    pub fn write(&self, path: &Path) -> Result<(), LimitsFileError> {
        crate::fsutil::write_atomic(path, self.to_toml().as_bytes()).map_err(|source| {
            LimitsFileError::Write {
                path: path.display().to_string(),
                source,
            }
        })
    }

    /// Reads and validates a limits file.
    pub fn load(path: &Path) -> Result<Self, LimitsFileError> {
        let text = std::fs::read_to_string(path).map_err(|source| LimitsFileError::Read {
            path: path.display().to_string(),
            source,
        })?;
        Ok(Self::parse(&text, &path.display().to_string())?)
    }
}

fn order(
    bad: &mut impl FnMut(&str, String),
    table: &str,
    lcl: f64,
    center: f64,
    ucl: f64,
    lcl_may_equal: bool,
) {
    for (key, v) in [("lcl", lcl), ("center", center), ("ucl", ucl)] {
        if !v.is_finite() {
            bad(
                &format!("{table}.{key}"),
                format!("{v} is not a finite number"),
            );
            return;
        }
    }
    if ucl <= center {
        bad(
            &format!("{table}.ucl"),
            format!("{} is not above the centre line {}", num(ucl), num(center)),
        );
    }
    if lcl > center || (!lcl_may_equal && lcl == center) {
        bad(
            &format!("{table}.lcl"),
            format!("{} is not below the centre line {}", num(lcl), num(center)),
        );
    }
}

/// Identifiers of characteristics: letters, digits, '-', '_', '.'; 1 to 64 characters.
pub fn valid_id(id: &str) -> bool {
    (1..=64).contains(&id.len())
        && id
            .chars()
            .all(|c| c.is_ascii_alphanumeric() || matches!(c, '-' | '_' | '.'))
}

/// Rounds to 10 significant digits so files read 12.0066 rather than 12.006600000000001; far
/// below any gauge's resolution.
fn tidy(v: f64) -> f64 {
    if v == 0.0 || !v.is_finite() {
        return v;
    }
    let digits = 10 - 1 - v.abs().log10().floor() as i32;
    let scale = 10f64.powi(digits);
    let r = (v * scale).round() / scale;
    if r.is_finite() { r } else { v }
}

/// Compresses sorted subgroup numbers into ranges: [1,2,3,5,7,8] → "1-3, 5, 7-8".
pub fn ranges(numbers: &[usize]) -> String {
    let mut parts = Vec::new();
    let mut i = 0;
    while i < numbers.len() {
        let start = numbers[i];
        let mut end = start;
        while i + 1 < numbers.len() && numbers[i + 1] == end + 1 {
            i += 1;
            end = numbers[i];
        }
        parts.push(if start == end {
            start.to_string()
        } else {
            format!("{start}-{end}")
        });
        i += 1;
    }
    parts.join(", ")
}
