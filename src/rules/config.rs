//! The rules of one characteristic: what is written in TOML, and the validated rule set.
//!
//! ```toml
//! [rules]
//! preset = "nelson"              # or "western-electric"; optional
//! off = ["alternating"]          # preset rules switched off, by id
//!
//! [[rules.rule]]                 # a rule added, or a preset rule replaced (same id)
//! id = "one-side-run"
//! kind = "one-side-run"
//! length = 7
//! severity = "warn"
//! ```

use serde::{Deserialize, Serialize};

use super::Severity;
use crate::diag::{Locator, Problem};

/// Rule sets published under a name, with their published counts.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize, clap::ValueEnum)]
#[serde(rename_all = "kebab-case")]
pub enum Preset {
    /// The four rules of the Western Electric Statistical Quality Control Handbook (1956).
    WesternElectric,
    /// The eight tests of Nelson, Journal of Quality Technology 16(4), 1984.
    Nelson,
}

/// Which chart a limits rule watches.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize, Default)]
#[serde(rename_all = "kebab-case")]
pub enum ChartSide {
    /// The location chart (subgroup means or individual readings).
    Location,
    /// The dispersion chart (ranges, standard deviations or moving ranges).
    Dispersion,
    /// Both.
    #[default]
    Both,
}

/// The `[rules]` table as written.
#[derive(Debug, Clone, PartialEq, Default, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RulesConfig {
    #[serde(default)]
    pub preset: Option<Preset>,
    /// Ids of preset rules to switch off.
    #[serde(default)]
    pub off: Vec<String>,
    /// Rules added, or replacing a preset rule of the same id.
    #[serde(default)]
    pub rule: Vec<RawRule>,
}

/// One `[[rules.rule]]` table as written: a kind and the parameters that kind takes.
#[derive(Debug, Clone, PartialEq, Default, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawRule {
    /// Identifier; defaults to the kind.
    pub id: Option<String>,
    pub kind: String,
    pub severity: Option<Severity>,
    pub chart: Option<ChartSide>,
    pub count: Option<u32>,
    pub window: Option<u32>,
    pub beyond_sigma: Option<f64>,
    pub within_sigma: Option<f64>,
    pub length: Option<u32>,
    pub lambda: Option<f64>,
    pub width: Option<f64>,
    pub k: Option<f64>,
    pub h: Option<f64>,
    pub head_start: Option<f64>,
    /// CUSUM: `"on-acknowledge"` (the default) or `"never"`.
    pub restart: Option<String>,
    pub repeats: Option<u32>,
    pub min: Option<f64>,
    pub max: Option<f64>,
    pub fraction_of_tolerance: Option<f64>,
    pub max_silence_s: Option<f64>,
}

/// The longest window or run a rule may use; keeps every evaluator's memory bounded.
pub const MAX_WINDOW: u32 = 64;

/// A validated rule's kind and parameters.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(tag = "kind", rename_all = "kebab-case")]
pub enum RuleKind {
    /// A point beyond the control limits.
    BeyondLimits { chart: ChartSide },
    /// `count` of `window` consecutive points more than `beyond_sigma` sigmas from the centre
    /// on the same side.
    Cluster {
        count: u32,
        window: u32,
        beyond_sigma: f64,
    },
    /// `length` points in a row on one side of the centre line.
    OneSideRun { length: u32 },
    /// `length` points in a row, each higher (or each lower) than the one before.
    SteadyTrend { length: u32 },
    /// `length` points in a row alternating up and down.
    Alternating { length: u32 },
    /// `length` points in a row within `within_sigma` of the centre (stratification).
    HuggingCentre { length: u32, within_sigma: f64 },
    /// `length` points in a row more than `beyond_sigma` from the centre, on either side, none
    /// within (mixture).
    AvoidingCentre { length: u32, beyond_sigma: f64 },
    /// The EWMA of the standardized points beyond its asymptotic limits.
    Ewma { lambda: f64, width: f64 },
    /// A tabular CUSUM sum beyond its decision interval.
    Cusum {
        k: f64,
        h: f64,
        head_start: f64,
        /// Both sums go back to the head start when an alert of this rule is acknowledged (the
        /// corrective action), so old evidence does not hold the alert after the fix.
        restart_on_acknowledge: bool,
    },
    /// A single reading outside the specification limits.
    OutsideSpec,
    /// The same reading `repeats` times running.
    StuckGauge { repeats: u32 },
    /// A reading outside what the characteristic can physically be.
    ImpossibleReading { min: f64, max: f64 },
    /// Over `window` readings, the finest step between distinct values is coarser than
    /// `fraction_of_tolerance` of the tolerance.
    CoarseResolution {
        window: u32,
        fraction_of_tolerance: f64,
    },
    /// No reading for `max_silence_s` seconds.
    StaleFeed { max_silence_s: f64 },
}

impl RuleKind {
    /// The kind's name as written in TOML.
    pub fn name(&self) -> &'static str {
        match self {
            RuleKind::BeyondLimits { .. } => "beyond-limits",
            RuleKind::Cluster { .. } => "cluster",
            RuleKind::OneSideRun { .. } => "one-side-run",
            RuleKind::SteadyTrend { .. } => "steady-trend",
            RuleKind::Alternating { .. } => "alternating",
            RuleKind::HuggingCentre { .. } => "hugging-centre",
            RuleKind::AvoidingCentre { .. } => "avoiding-centre",
            RuleKind::Ewma { .. } => "ewma",
            RuleKind::Cusum { .. } => "cusum",
            RuleKind::OutsideSpec => "outside-spec",
            RuleKind::StuckGauge { .. } => "stuck-gauge",
            RuleKind::ImpossibleReading { .. } => "impossible-reading",
            RuleKind::CoarseResolution { .. } => "coarse-resolution",
            RuleKind::StaleFeed { .. } => "stale-feed",
        }
    }

    /// Whether the rule looks at single readings rather than plotted subgroups.
    pub fn on_readings(&self) -> bool {
        matches!(
            self,
            RuleKind::OutsideSpec
                | RuleKind::StuckGauge { .. }
                | RuleKind::ImpossibleReading { .. }
                | RuleKind::CoarseResolution { .. }
                | RuleKind::StaleFeed { .. }
        )
    }

    /// The severity a rule of this kind gets when config does not say.
    pub fn default_severity(&self) -> Severity {
        match self {
            RuleKind::BeyondLimits { .. } | RuleKind::OutsideSpec => Severity::Stop,
            RuleKind::Alternating { .. }
            | RuleKind::HuggingCentre { .. }
            | RuleKind::AvoidingCentre { .. }
            | RuleKind::CoarseResolution { .. } => Severity::Notice,
            _ => Severity::Warn,
        }
    }
}

/// A validated rule.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Rule {
    pub id: String,
    #[serde(flatten)]
    pub kind: RuleKind,
    pub severity: Severity,
}

impl Rule {
    fn new(id: &str, kind: RuleKind) -> Self {
        Rule {
            id: id.to_string(),
            severity: kind.default_severity(),
            kind,
        }
    }
}

/// A characteristic's validated rules, in evaluation order.
#[derive(Debug, Clone, Default, Serialize, Deserialize)]
pub struct RuleSet {
    pub rules: Vec<Rule>,
    /// The subgroup rules, built once and shared by every evaluator of this set (10,000
    /// characteristics on one preset hold one copy).
    #[serde(skip)]
    point: std::sync::OnceLock<std::sync::Arc<[Rule]>>,
}

impl PartialEq for RuleSet {
    fn eq(&self, other: &Self) -> bool {
        self.rules == other.rules
    }
}

impl RuleSet {
    /// A set of `rules`, in evaluation order.
    pub fn new(rules: Vec<Rule>) -> Self {
        RuleSet {
            rules,
            point: Default::default(),
        }
    }

    /// The subgroup rules, shared.
    pub fn point_rules_shared(&self) -> std::sync::Arc<[Rule]> {
        self.point
            .get_or_init(|| self.point_rules().cloned().collect())
            .clone()
    }

    /// The rules of a published preset, with the published counts.
    pub fn preset(p: Preset) -> Self {
        use RuleKind::*;
        let limits = Rule::new(
            "beyond-limits",
            BeyondLimits {
                chart: ChartSide::Both,
            },
        );
        let near = Rule::new(
            "near-limit-cluster",
            Cluster {
                count: 2,
                window: 3,
                beyond_sigma: 2.0,
            },
        );
        let off = Rule::new(
            "off-centre-cluster",
            Cluster {
                count: 4,
                window: 5,
                beyond_sigma: 1.0,
            },
        );
        let rules = match p {
            // Western Electric handbook, 1956: one point beyond 3 sigma; 2 of 3 successive
            // beyond 2 sigma on one side; 4 of 5 beyond 1 sigma on one side; 8 successive on one
            // side of the centre line.
            Preset::WesternElectric => vec![
                limits,
                near,
                off,
                Rule::new("one-side-run", OneSideRun { length: 8 }),
            ],
            // Nelson 1984, tests 1 to 8 in his order: beyond 3 sigma; 9 in a row on one side; 6
            // in a row steadily increasing or decreasing; 14 in a row alternating up and down; 2
            // of 3 beyond 2 sigma on one side; 4 of 5 beyond 1 sigma on one side; 15 in a row
            // within 1 sigma; 8 in a row beyond 1 sigma on either side.
            Preset::Nelson => vec![
                limits,
                Rule::new("one-side-run", OneSideRun { length: 9 }),
                Rule::new("steady-trend", SteadyTrend { length: 6 }),
                Rule::new("alternating", Alternating { length: 14 }),
                near,
                off,
                Rule::new(
                    "hugging-centre",
                    HuggingCentre {
                        length: 15,
                        within_sigma: 1.0,
                    },
                ),
                Rule::new(
                    "avoiding-centre",
                    AvoidingCentre {
                        length: 8,
                        beyond_sigma: 1.0,
                    },
                ),
            ],
        };
        RuleSet::new(rules)
    }

    /// Builds the rule set from its TOML table at `path` (e.g. `rules` or
    /// `characteristic[2].rules`). Every problem is reported, located through `loc`.
    pub fn from_config(cfg: &RulesConfig, path: &str, loc: &Locator) -> Result<Self, Vec<Problem>> {
        let mut problems = Vec::new();
        let mut set = cfg.preset.map(RuleSet::preset).unwrap_or_default();
        for (i, id) in cfg.off.iter().enumerate() {
            let before = set.rules.len();
            set.rules.retain(|r| &r.id != id);
            if set.rules.len() == before {
                let known: Vec<String> = cfg
                    .preset
                    .map(|p| RuleSet::preset(p).ids())
                    .unwrap_or_default();
                problems.push(loc.problem(
                    &format!("{path}.off[{i}]"),
                    if known.is_empty() {
                        format!("\"{id}\" cannot be switched off: no preset is chosen")
                    } else {
                        format!(
                            "\"{id}\" is not a rule of the preset; it has: {}",
                            known.join(", ")
                        )
                    },
                ));
            }
        }
        let mut added: Vec<String> = Vec::new();
        for (i, raw) in cfg.rule.iter().enumerate() {
            let here = format!("{path}.rule[{i}]");
            match build(raw, &here, loc) {
                Ok(rule) => {
                    if added.contains(&rule.id) {
                        problems.push(loc.problem(
                            &format!("{here}.id"),
                            format!(
                                "\"{}\" is used by an earlier rule; ids must be unique",
                                rule.id
                            ),
                        ));
                        continue;
                    }
                    added.push(rule.id.clone());
                    match set.rules.iter_mut().find(|r| r.id == rule.id) {
                        Some(existing) => *existing = rule,
                        None => set.rules.push(rule),
                    }
                }
                Err(mut p) => problems.append(&mut p),
            }
        }
        if problems.is_empty() {
            Ok(set)
        } else {
            Err(problems)
        }
    }

    /// Rules on plotted subgroups.
    pub fn point_rules(&self) -> impl Iterator<Item = &Rule> {
        self.rules.iter().filter(|r| !r.kind.on_readings())
    }

    /// Rules on single readings.
    pub fn reading_rules(&self) -> impl Iterator<Item = &Rule> {
        self.rules.iter().filter(|r| r.kind.on_readings())
    }

    /// Whether a rule reads the ±1σ/±2σ zones (then the charts draw them).
    pub fn has_zone_rules(&self) -> bool {
        self.rules.iter().any(|r| {
            matches!(
                r.kind,
                RuleKind::Cluster { .. }
                    | RuleKind::HuggingCentre { .. }
                    | RuleKind::AvoidingCentre { .. }
            )
        })
    }

    /// The rule ids, in order.
    pub fn ids(&self) -> Vec<String> {
        self.rules.iter().map(|r| r.id.clone()).collect()
    }
}

const KINDS: &[&str] = &[
    "beyond-limits",
    "cluster",
    "one-side-run",
    "steady-trend",
    "alternating",
    "hugging-centre",
    "avoiding-centre",
    "ewma",
    "cusum",
    "outside-spec",
    "stuck-gauge",
    "impossible-reading",
    "coarse-resolution",
    "stale-feed",
];

/// Validates one raw rule; every problem in it is reported.
fn build(raw: &RawRule, here: &str, loc: &Locator) -> Result<Rule, Vec<Problem>> {
    let mut p = Checker {
        raw,
        here,
        loc,
        problems: Vec::new(),
        used: vec!["id", "kind", "severity"],
    };
    let kind = match raw.kind.as_str() {
        "beyond-limits" => Some(RuleKind::BeyondLimits {
            chart: {
                p.used.push("chart");
                raw.chart.unwrap_or_default()
            },
        }),
        "cluster" => {
            let count = p.count("count", 1, MAX_WINDOW);
            let window = p.count("window", 1, MAX_WINDOW);
            let beyond_sigma = p.real("beyond_sigma", 0.0, 6.0, None);
            if let (Some(c), Some(w)) = (count, window)
                && c > w
            {
                p.bad("count", format!("{c} is more than window = {w}"));
            }
            Some(RuleKind::Cluster {
                count: count.unwrap_or(1),
                window: window.unwrap_or(1),
                beyond_sigma: beyond_sigma.unwrap_or(1.0),
            })
        }
        "one-side-run" => p
            .count("length", 2, MAX_WINDOW)
            .map(|length| RuleKind::OneSideRun { length }),
        "steady-trend" => p
            .count("length", 3, MAX_WINDOW)
            .map(|length| RuleKind::SteadyTrend { length }),
        "alternating" => p
            .count("length", 4, MAX_WINDOW)
            .map(|length| RuleKind::Alternating { length }),
        "hugging-centre" => {
            let length = p.count("length", 2, MAX_WINDOW);
            let within = p.real("within_sigma", 0.0, 3.0, Some(1.0));
            Some(RuleKind::HuggingCentre {
                length: length.unwrap_or(2),
                within_sigma: within.unwrap_or(1.0),
            })
        }
        "avoiding-centre" => {
            let length = p.count("length", 2, MAX_WINDOW);
            let beyond = p.real("beyond_sigma", 0.0, 3.0, Some(1.0));
            Some(RuleKind::AvoidingCentre {
                length: length.unwrap_or(2),
                beyond_sigma: beyond.unwrap_or(1.0),
            })
        }
        "ewma" => {
            let lambda = p.real("lambda", 0.0, 1.0, None);
            let width = p.real("width", 0.0, 6.0, None);
            Some(RuleKind::Ewma {
                lambda: lambda.unwrap_or(0.2),
                width: width.unwrap_or(3.0),
            })
        }
        "cusum" => {
            let k = p.real_from("k", 0.0, 3.0, None);
            let h = p.real("h", 0.0, 20.0, None);
            let head_start = p.real_from("head_start", 0.0, 0.99, Some(0.0));
            p.used.push("restart");
            let restart_on_acknowledge = match p.raw.restart.as_deref() {
                None | Some("on-acknowledge") => true,
                Some("never") => false,
                Some(other) => {
                    let other = other.to_string();
                    p.bad(
                        "restart",
                        format!("\"{other}\" is not a restart; use \"on-acknowledge\" (the default: both sums back to the head start when its alert is acknowledged) or \"never\""),
                    );
                    true
                }
            };
            Some(RuleKind::Cusum {
                k: k.unwrap_or(0.5),
                h: h.unwrap_or(5.0),
                head_start: head_start.unwrap_or(0.0),
                restart_on_acknowledge,
            })
        }
        "outside-spec" => Some(RuleKind::OutsideSpec),
        "stuck-gauge" => p
            .count("repeats", 2, 100_000)
            .map(|repeats| RuleKind::StuckGauge { repeats }),
        "impossible-reading" => {
            p.used.extend(["min", "max"]);
            match (raw.min, raw.max) {
                (Some(min), Some(max)) if min < max && min.is_finite() && max.is_finite() => {
                    Some(RuleKind::ImpossibleReading { min, max })
                }
                (Some(min), Some(max)) => {
                    p.bad(
                        "max",
                        format!("{max} must be a finite number above min = {min}"),
                    );
                    None
                }
                _ => {
                    p.bad(
                        "",
                        "kind = \"impossible-reading\" needs both min and max".to_string(),
                    );
                    None
                }
            }
        }
        "coarse-resolution" => {
            let window = p.count("window", 10, 100_000);
            let f = p.real("fraction_of_tolerance", 0.0, 1.0, Some(0.1));
            Some(RuleKind::CoarseResolution {
                window: window.unwrap_or(50),
                fraction_of_tolerance: f.unwrap_or(0.1),
            })
        }
        "stale-feed" => p
            .real("max_silence_s", 0.0, 1e9, None)
            .map(|max_silence_s| RuleKind::StaleFeed { max_silence_s }),
        other => {
            p.bad(
                "kind",
                format!(
                    "\"{other}\" is not a rule kind; the kinds are: {}",
                    KINDS.join(", ")
                ),
            );
            None
        }
    };
    if let Some(kind) = &kind {
        p.unused(kind.name());
    }
    let id = raw.id.clone().unwrap_or_else(|| raw.kind.clone());
    if !crate::limits_file::valid_id(&id) {
        p.bad(
            "id",
            format!("\"{id}\" is not a valid identifier; use letters, digits, '-', '_' and '.'"),
        );
    }
    match kind {
        Some(kind) if p.problems.is_empty() => Ok(Rule {
            id,
            severity: raw.severity.unwrap_or_else(|| kind.default_severity()),
            kind,
        }),
        _ => Err(p.problems),
    }
}

struct Checker<'a, 't> {
    raw: &'a RawRule,
    here: &'a str,
    loc: &'a Locator<'t>,
    problems: Vec<Problem>,
    used: Vec<&'static str>,
}

impl Checker<'_, '_> {
    fn bad(&mut self, key: &str, message: String) {
        let path = if key.is_empty() {
            self.here.to_string()
        } else {
            format!("{}.{key}", self.here)
        };
        self.problems.push(self.loc.problem(&path, message));
    }

    fn field_u32(&self, key: &str) -> Option<u32> {
        match key {
            "count" => self.raw.count,
            "window" => self.raw.window,
            "length" => self.raw.length,
            "repeats" => self.raw.repeats,
            _ => None,
        }
    }

    fn field_f64(&self, key: &str) -> Option<f64> {
        let r = self.raw;
        match key {
            "beyond_sigma" => r.beyond_sigma,
            "within_sigma" => r.within_sigma,
            "lambda" => r.lambda,
            "width" => r.width,
            "k" => r.k,
            "h" => r.h,
            "head_start" => r.head_start,
            "fraction_of_tolerance" => r.fraction_of_tolerance,
            "max_silence_s" => r.max_silence_s,
            _ => None,
        }
    }

    /// A required whole number in `lo..=hi`.
    fn count(&mut self, key: &'static str, lo: u32, hi: u32) -> Option<u32> {
        self.used.push(key);
        match self.field_u32(key) {
            Some(v) if (lo..=hi).contains(&v) => Some(v),
            Some(v) => {
                let kind = self.raw.kind.clone();
                self.bad(
                    key,
                    format!("{v} is out of range for kind = \"{kind}\"; use {lo} to {hi}"),
                );
                None
            }
            None => {
                let kind = self.raw.kind.clone();
                self.bad("", format!("kind = \"{kind}\" needs {key}"));
                None
            }
        }
    }

    /// A number in the open-closed range `(lo, hi]`, or `default` when absent (required when
    /// `default` is `None`).
    fn real(&mut self, key: &'static str, lo: f64, hi: f64, default: Option<f64>) -> Option<f64> {
        self.real_checked(
            key,
            default,
            |v| v > lo && v <= hi,
            format!("above {lo} and at most {hi}"),
        )
    }

    /// A number in the closed range `[lo, hi]`.
    fn real_from(
        &mut self,
        key: &'static str,
        lo: f64,
        hi: f64,
        default: Option<f64>,
    ) -> Option<f64> {
        self.real_checked(
            key,
            default,
            |v| v >= lo && v <= hi,
            format!("from {lo} to {hi}"),
        )
    }

    fn real_checked(
        &mut self,
        key: &'static str,
        default: Option<f64>,
        ok: impl Fn(f64) -> bool,
        range: String,
    ) -> Option<f64> {
        self.used.push(key);
        match (self.field_f64(key), default) {
            (Some(v), _) if ok(v) => Some(v),
            (Some(v), _) => {
                let kind = self.raw.kind.clone();
                self.bad(
                    key,
                    format!("{v} is out of range for kind = \"{kind}\"; use a value {range}"),
                );
                None
            }
            (None, Some(d)) => Some(d),
            (None, None) => {
                let kind = self.raw.kind.clone();
                self.bad("", format!("kind = \"{kind}\" needs {key}"));
                None
            }
        }
    }

    /// Reports parameters given that the kind does not take.
    fn unused(&mut self, kind: &str) {
        let r = self.raw;
        let given: [(&'static str, bool); 17] = [
            ("chart", r.chart.is_some()),
            ("count", r.count.is_some()),
            ("window", r.window.is_some()),
            ("beyond_sigma", r.beyond_sigma.is_some()),
            ("within_sigma", r.within_sigma.is_some()),
            ("length", r.length.is_some()),
            ("lambda", r.lambda.is_some()),
            ("width", r.width.is_some()),
            ("k", r.k.is_some()),
            ("h", r.h.is_some()),
            ("head_start", r.head_start.is_some()),
            ("restart", r.restart.is_some()),
            ("repeats", r.repeats.is_some()),
            ("min", r.min.is_some()),
            ("max", r.max.is_some()),
            ("fraction_of_tolerance", r.fraction_of_tolerance.is_some()),
            ("max_silence_s", r.max_silence_s.is_some()),
        ];
        for (key, present) in given {
            if present && !self.used.contains(&key) {
                self.bad(key, format!("kind = \"{kind}\" does not take {key}"));
            }
        }
    }
}
