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
//! An attribute chart (p, np, c, u) stores its centre and the limits at its nominal sample size
//! (`subgroup_size`, units inspected); other sizes get their own limits from the centre. Its
//! `sigma` is the standard deviation of the plotted value at the nominal size, and it has no
//! `[dispersion]` table:
//!
//! ```toml
//! format = 1
//! characteristic = "leak-test"
//! chart = "p"
//! subgroup_size = 50
//!
//! [sigma]
//! within = 0.0308
//! overall = 0.0308
//! method = "binomial: sqrt(pbar (1 - pbar) / n) at n = 50"
//!
//! [location]
//! center = 0.05
//! ucl = 0.1425
//! lcl = 0         # 0.05 - 3 x 0.0308 is below zero: clamped (common practice)
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
use crate::stats::attributes::AttributeChart;
use crate::stats::attributes::AttributeStudy;
use crate::stats::capability::Spec;
use crate::stats::study::{Exclusion, Study};
use crate::stats::variables::{DispersionKind, VariablesChart};

/// The chart stored limits are for: a variables chart or an attribute chart, written by its
/// name (`"xbar-r"`, `"p"`, ...).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(untagged)]
pub enum ChartKind {
    Variables(VariablesChart),
    Attribute(AttributeChart),
}

impl ChartKind {
    /// The name used in files and on the command line.
    pub fn name(self) -> &'static str {
        match self {
            ChartKind::Variables(v) => v.name(),
            ChartKind::Attribute(a) => a.name(),
        }
    }

    /// The variables chart, when it is one.
    pub fn variables(self) -> Option<VariablesChart> {
        match self {
            ChartKind::Variables(v) => Some(v),
            ChartKind::Attribute(_) => None,
        }
    }

    /// The attribute chart, when it is one.
    pub fn attribute(self) -> Option<AttributeChart> {
        match self {
            ChartKind::Attribute(a) => Some(a),
            ChartKind::Variables(_) => None,
        }
    }
}

impl From<VariablesChart> for ChartKind {
    fn from(v: VariablesChart) -> Self {
        ChartKind::Variables(v)
    }
}

/// The format version this build writes and reads.
pub const FORMAT: u32 = 1;

/// One characteristic's stored limits.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct StoredLimits {
    pub format: u32,
    pub characteristic: String,
    pub chart: ChartKind,
    /// Readings per subgroup; for an attribute chart, the nominal units inspected.
    pub subgroup_size: usize,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub unit: Option<String>,
    pub sigma: SigmaRecord,
    pub location: Limits,
    /// The dispersion chart (variables charts only).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub dispersion: Option<DispersionRecord>,
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
            chart: study.chart.into(),
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
            dispersion: Some(DispersionRecord {
                kind: study.dispersion_kind,
                center: tidy(study.dispersion.center),
                ucl: tidy(study.dispersion.ucl),
                lcl: tidy(study.dispersion.lcl),
            }),
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

    /// Limits from a finished attribute study, at the nominal sample size `size` (units
    /// inspected per subgroup).
    pub fn from_attribute_study(
        study: &AttributeStudy,
        size: usize,
        characteristic: &str,
        source: &str,
        computed_at: &str,
    ) -> Self {
        let chart = study.chart;
        let at = chart.limits(study.parameter, size as f64);
        let sigma = tidy(attribute_sigma(chart, study.parameter, size as f64));
        let used: Vec<usize> = (1..=study.samples_total)
            .filter(|i| !study.excluded.iter().any(|e| e.subgroup == *i))
            .collect();
        StoredLimits {
            format: FORMAT,
            characteristic: characteristic.to_string(),
            chart: ChartKind::Attribute(chart),
            subgroup_size: size,
            unit: None,
            sigma: SigmaRecord {
                within: sigma,
                overall: sigma,
                method: attribute_sigma_method(chart, size),
            },
            location: Limits {
                center: tidy(at.center),
                ucl: tidy(at.ucl),
                lcl: tidy(at.lcl),
            },
            dispersion: None,
            spec: None,
            provenance: Provenance {
                computed_at: computed_at.to_string(),
                source: source.to_string(),
                tool: format!("linewarden {}", env!("CARGO_PKG_VERSION")),
                subgroups_total: study.samples_total,
                subgroups_used: study.samples_used,
                used: ranges(&used),
                excluded: study.excluded.clone(),
                provisional: false,
            },
            approved: None,
        }
    }

    /// The centre parameter of an attribute chart: p̄ (p, np), c̄ (c) or ū (u).
    pub fn attribute_parameter(&self) -> Option<f64> {
        match self.chart {
            ChartKind::Attribute(AttributeChart::Np) => {
                Some(self.location.center / self.subgroup_size.max(1) as f64)
            }
            ChartKind::Attribute(_) => Some(self.location.center),
            ChartKind::Variables(_) => None,
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
        let chart = match self.chart {
            ChartKind::Variables(v) => v,
            ChartKind::Attribute(a) => {
                self.attribute_problems(a, &mut bad);
                return out;
            }
        };
        match chart {
            VariablesChart::Individuals if n != 1 => bad(
                "subgroup_size",
                format!("{n} does not fit chart = \"individuals\", which needs 1"),
            ),
            VariablesChart::XbarR | VariablesChart::XbarS if !(2..=100).contains(&n) => bad(
                "subgroup_size",
                format!(
                    "{n} does not fit chart = \"{}\", which needs 2 to 100",
                    chart.name()
                ),
            ),
            _ => {}
        }
        let expected_kind = chart.dispersion_kind();
        let Some(d) = &self.dispersion else {
            bad(
                "dispersion",
                format!(
                    "is missing; chart = \"{}\" needs its [dispersion] table (kind = \"{}\", center, ucl, lcl)",
                    chart.name(),
                    expected_kind.name()
                ),
            );
            return out;
        };
        if d.kind != expected_kind {
            bad(
                "dispersion.kind",
                format!(
                    "\"{}\" does not go with chart = \"{}\"; expected \"{}\"",
                    d.kind.name(),
                    chart.name(),
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
        self.common_problems(&mut bad);
        out
    }

    /// Problems of the parts every chart has: the approval and the provenance.
    fn common_problems(&self, bad: &mut impl FnMut(&str, String)) {
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
    }

    /// Problems of an attribute chart's limits: a sample size, a centre in range, limits that
    /// follow from it (the lower clamped at zero), no variables tables.
    fn attribute_problems(&self, chart: AttributeChart, bad: &mut impl FnMut(&str, String)) {
        let n = self.subgroup_size;
        if !(1..=1_000_000).contains(&n) {
            bad(
                "subgroup_size",
                format!("{n} units inspected is out of range; use 1 to 1000000"),
            );
        }
        if self.dispersion.is_some() {
            bad(
                "dispersion",
                format!(
                    "does not apply to chart = \"{}\": an attribute chart has no dispersion chart",
                    chart.name()
                ),
            );
        }
        if self.spec.is_some() {
            bad(
                "spec",
                format!(
                    "does not apply to chart = \"{}\": an attribute chart has no specification limits",
                    chart.name()
                ),
            );
        }
        let l = &self.location;
        for (key, v) in [("lcl", l.lcl), ("center", l.center), ("ucl", l.ucl)] {
            if !(v.is_finite() && v >= 0.0) {
                bad(
                    &format!("location.{key}"),
                    format!("{} must be a number of zero or more", num(v)),
                );
                return;
            }
        }
        let proportion = matches!(chart, AttributeChart::P);
        if proportion && l.center >= 1.0 {
            bad(
                "location.center",
                format!("{} is not a fraction nonconforming below 1", num(l.center)),
            );
            return;
        }
        if chart == AttributeChart::Np && l.center >= n as f64 {
            bad(
                "location.center",
                format!(
                    "{} nonconforming is not below the {n} units inspected",
                    num(l.center)
                ),
            );
            return;
        }
        if l.center <= 0.0 {
            bad(
                "location.center",
                "is 0: with no nonconformities at all the limits collapse and every find signals; take a longer baseline".into(),
            );
            return;
        }
        if let Some(p) = self.attribute_parameter() {
            let want = chart.limits(p, n as f64);
            // Within a hundredth of the plotted value's sigma: rounding passes, moved limits do
            // not.
            let tol = 0.01 * attribute_sigma(chart, p, n as f64) + 1e-9;
            for (key, found, expected) in [("ucl", l.ucl, want.ucl), ("lcl", l.lcl, want.lcl)] {
                if (found - expected).abs() > tol {
                    bad(
                        &format!("location.{key}"),
                        format!(
                            "{} is not what the centre {} gives on the {} chart at {n} units ({}{})",
                            num(found),
                            num(l.center),
                            chart.name(),
                            num(expected),
                            if key == "lcl" && expected == 0.0 {
                                ", the lower limit clamped at zero"
                            } else {
                                ""
                            }
                        ),
                    );
                }
            }
        }
        if !(self.sigma.within > 0.0 && self.sigma.within.is_finite()) {
            bad(
                "sigma.within",
                format!("{} must be a positive number", num(self.sigma.within)),
            );
        }
        self.common_problems(bad);
    }

    /// The problems these limits would have as a file (figures that are not finite numbers,
    /// limits out of order, ...): limits that would not load are never written nor installed.
    /// `what` names them in messages.
    pub fn check(&self, what: &str) -> Result<(), Problems> {
        Self::parse(&self.to_toml(), what).map(|_| ())
    }

    /// Writes the file atomically (see [`crate::fsutil::write_atomic`]), after checking that it
    /// would load: a file that would block the next start is never written.
    pub fn write(&self, path: &Path) -> Result<(), LimitsFileError> {
        self.check(&path.display().to_string())?;
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

/// The standard deviation of the plotted value of an attribute chart at `size` units, for a
/// centre parameter `p` (p̄, c̄ or ū).
pub fn attribute_sigma(chart: AttributeChart, p: f64, size: f64) -> f64 {
    match chart {
        AttributeChart::P => (p * (1.0 - p) / size).sqrt(),
        AttributeChart::Np => (size * p * (1.0 - p)).sqrt(),
        AttributeChart::C => p.sqrt(),
        AttributeChart::U => (p / size).sqrt(),
    }
}

fn attribute_sigma_method(chart: AttributeChart, size: usize) -> String {
    match chart {
        AttributeChart::P => format!("binomial: sqrt(pbar (1 - pbar) / n) at n = {size}"),
        AttributeChart::Np => format!("binomial: sqrt(n pbar (1 - pbar)) at n = {size}"),
        AttributeChart::C => format!("Poisson: sqrt(cbar) per {size} unit(s)"),
        AttributeChart::U => format!("Poisson: sqrt(ubar / n) at n = {size}"),
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
