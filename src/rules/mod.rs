//! Run rules: the patterns on a control chart that say a process has changed, evaluated the
//! moment each subgroup (or reading) arrives, and their average run lengths.
//!
//! * [`config`] — the rules of a characteristic as written in TOML (a preset, rules switched
//!   off, rules added or replaced), validated with every problem located.
//! * [`point`] — evaluators for plotted subgroups: limits, clusters, runs, trends, EWMA, CUSUM.
//! * [`reading`] — evaluators for single readings: out of specification and gauge health.
//! * [`arl`] — average run lengths of a rule set, in control and under shifts.
//!
//! Pure code: time comes in as a value (milliseconds since the Unix epoch), state is plain data.

pub mod arl;
pub mod config;
pub mod point;
pub mod reading;
pub mod theory;

use serde::{Deserialize, Serialize};

pub use config::{Preset, RuleSet, RulesConfig};

/// How urgent a violation is. Set per rule in config.
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord, Hash, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum Severity {
    /// Worth a look at the next opportunity.
    Notice,
    /// Check the process soon.
    Warn,
    /// Stop and react now.
    Stop,
}

impl Severity {
    /// The name used in files and messages.
    pub fn name(self) -> &'static str {
        match self {
            Severity::Notice => "notice",
            Severity::Warn => "warn",
            Severity::Stop => "stop",
        }
    }
}

/// Which side of the centre line (or of a limit) a pattern is on.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum Side {
    Above,
    Below,
}

/// Which chart a violation was seen on: each is its own cause, with its own alert.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Serialize, Deserialize, Default)]
#[serde(rename_all = "kebab-case")]
pub enum Chart {
    /// Subgroup means, or individual readings on an individuals chart (and the EWMA and
    /// CUSUM built on them).
    #[default]
    Location,
    /// Ranges, standard deviations or moving ranges.
    Dispersion,
    /// One reading by itself (specification limits, a stuck or silent gauge).
    Reading,
}

impl Chart {
    /// Plain words for people.
    pub fn words(self) -> &'static str {
        match self {
            Chart::Location => "location",
            Chart::Dispersion => "spread",
            Chart::Reading => "reading",
        }
    }
}

impl Side {
    /// Plain words for people and ids: which way the process moved.
    pub fn words(self) -> &'static str {
        match self {
            Side::Above => "up",
            Side::Below => "down",
        }
    }
}

/// One plotted point (or reading) that a violation involves.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct PointRef {
    /// Subgroup number (or reading number for reading rules), counted per characteristic.
    pub number: u64,
    /// When it was taken, in milliseconds since the Unix epoch.
    pub time_ms: i64,
    /// The plotted value (subgroup mean, range, reading ...), in the characteristic's unit.
    pub value: f64,
}

/// A rule that fired.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Violation {
    /// The rule's identifier from the rule set.
    pub rule: String,
    pub severity: Severity,
    /// A sentence a technician understands: what was seen and what it probably means.
    pub message: String,
    /// The points that make up the pattern, oldest first.
    pub points: Vec<PointRef>,
    /// The statistic that crossed (a mean, an EWMA, a CUSUM sum, a count ...).
    pub statistic: f64,
    /// The limit it was compared with.
    pub limit: f64,
    pub side: Option<Side>,
    /// The chart it was seen on.
    #[serde(default)]
    pub chart: Chart,
    /// Seen against provisional limits (learned, not yet approved): `severity` is capped and
    /// `capped_from` says what the rule's own severity was, when the cap lowered it.
    #[serde(default, skip_serializing_if = "std::ops::Not::not")]
    pub provisional: bool,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub capped_from: Option<Severity>,
}

impl Violation {
    /// The same violation, seen on `chart`.
    pub fn on(mut self, chart: Chart) -> Self {
        self.chart = chart;
        self
    }

    /// The same violation, seen against provisional limits: its severity at most `cap`.
    pub fn provisional(mut self, cap: Severity) -> Self {
        self.provisional = true;
        if self.severity > cap {
            self.capped_from = Some(self.severity);
            self.severity = cap;
        }
        self
    }

    /// A violation of `rule`.
    pub fn new(
        rule: &config::Rule,
        message: String,
        points: Vec<PointRef>,
        statistic: f64,
        limit: f64,
        side: Option<Side>,
    ) -> Self {
        Violation {
            rule: rule.id.clone(),
            severity: rule.severity,
            message,
            points,
            statistic,
            limit,
            side,
            chart: Chart::Location,
            provisional: false,
            capped_from: None,
        }
    }
}
