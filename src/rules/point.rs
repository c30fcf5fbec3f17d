//! Incremental evaluation of the rules on plotted subgroups.
//!
//! Each new point costs O(1) per rule: clusters keep a bit mask of the last `window` points per
//! side, runs and trends keep counters, EWMA and CUSUM keep their sums. The only buffer is the
//! last few points themselves (as many as the longest rule needs), kept so that a violation can
//! list the points that make it up. All state is plain data ([`PointState`]), so it can be
//! saved and rebuilt after a restart.
//!
//! Zone and run rules work on the standardized location value `z = (x̄ − centre)/(σ/√n)`, so
//! subgroups of different sizes mix correctly. A point exactly on the centre line breaks a run;
//! two equal consecutive points break a trend and an alternation (common practice).

use std::collections::VecDeque;

use serde::{Deserialize, Serialize};

use super::config::{ChartSide, Rule, RuleKind, RuleSet};
use super::{PointRef, Side, Violation};
use crate::format::num;
use crate::limits_file::{ChartKind, StoredLimits};
use crate::stats::Limits;
use crate::stats::attributes::AttributeChart;
use crate::stats::cusum::{CusumDesign, CusumState};
use crate::stats::ewma::{EwmaDesign, EwmaState};
use crate::stats::variables::{self, DispersionKind, VariablesChart};

/// The largest standardized distance from the centre the rules are stepped with.
pub const Z_SATURATED: f64 = 1e9;

/// What the points are judged against: the centre, sigma and limits in force.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ChartBasis {
    /// A variables chart, or an attribute chart (whose `sigma` is that of the plotted value
    /// at `nominal_n` units, and whose other sizes get their own limits from the centre).
    pub chart: ChartKind,
    pub center: f64,
    /// Within-subgroup sigma of single readings.
    pub sigma: f64,
    /// The subgroup size the stored limits are for.
    pub nominal_n: usize,
    /// Location limits at the nominal size.
    pub location: Limits,
    /// Dispersion limits at the nominal size.
    pub dispersion: Limits,
    /// Unit of the readings, for messages ("" when unknown).
    pub unit: String,
    /// Decimals of the figures in messages; derived from sigma when not set.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub decimals: Option<usize>,
    /// Attribute charts: the severity of a point below the lower limit (fewer nonconforming
    /// than the process makes: an improvement, or a tester that stopped finding them), when
    /// it is not the rule's own.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub below_severity: Option<super::Severity>,
}

impl ChartBasis {
    /// Decimals of the figures in messages: as configured, or one past what the spread of a
    /// plotted point resolves (for a p chart, of the percentage).
    pub fn decimals(&self) -> usize {
        self.decimals.unwrap_or_else(|| {
            if self.chart == ChartKind::Attribute(AttributeChart::P) {
                // A percentage, to a tenth at least: "14.0%".
                crate::format::decimals_for(100.0 * self.sigma_point(self.nominal_n)).max(1)
            } else {
                crate::format::decimals_for(self.sigma_point(self.nominal_n))
            }
        })
    }

    /// Decimals of the plotted value itself: as [`ChartBasis::decimals`], but a p chart's
    /// fraction (0.150) rather than its percentage (15.0%).
    pub fn value_decimals(&self) -> usize {
        match self.chart {
            ChartKind::Attribute(AttributeChart::P) if self.decimals.is_none() => {
                self.decimals() + 2
            }
            _ => self.decimals(),
        }
    }

    /// The attribute chart, when it is one.
    pub fn attribute(&self) -> Option<AttributeChart> {
        self.chart.attribute()
    }

    /// A value and the limit it is compared with, with the unit, never printing equal when
    /// they differ.
    fn pair_with_unit(&self, v: f64, limit: f64) -> (String, String) {
        if let Some(a) = self.attribute() {
            let scale = if a == AttributeChart::P { 100.0 } else { 1.0 };
            let (x, y) = crate::format::fixed_pair(scale * v, scale * limit, self.decimals());
            let unit = attribute_unit(a);
            return (format!("{x}{unit}"), format!("{y}{unit}"));
        }
        let (a, b) = crate::format::fixed_pair(v, limit, self.decimals());
        if self.unit.is_empty() {
            (a, b)
        } else {
            (format!("{a} {}", self.unit), format!("{b} {}", self.unit))
        }
    }

    /// The basis described by a stored limits file.
    pub fn from_stored(l: &StoredLimits) -> Self {
        ChartBasis {
            chart: l.chart,
            center: l.location.center,
            sigma: l.sigma.within,
            nominal_n: l.subgroup_size,
            location: l.location,
            // An attribute chart has none; `dispersion_for` says so.
            dispersion: l.dispersion.as_ref().map_or(
                Limits {
                    center: 0.0,
                    ucl: 0.0,
                    lcl: 0.0,
                },
                |d| Limits {
                    center: d.center,
                    ucl: d.ucl,
                    lcl: d.lcl,
                },
            ),
            unit: l.unit.clone().unwrap_or_default(),
            decimals: None,
            below_severity: None,
        }
    }

    /// The centre parameter of an attribute chart: p̄, c̄ or ū.
    fn parameter(&self, a: AttributeChart) -> f64 {
        match a {
            AttributeChart::Np => self.center / self.nominal_n.max(1) as f64,
            _ => self.center,
        }
    }

    /// Standard deviation of the plotted value of a subgroup of `size` units inspected, and
    /// its limits (attribute charts, where the size need not be whole).
    pub fn attribute_at(&self, a: AttributeChart, size: f64) -> (f64, Limits) {
        if size == self.nominal_n as f64 {
            return (self.sigma, self.location);
        }
        let p = self.parameter(a);
        (
            crate::limits_file::attribute_sigma(a, p, size),
            a.limits(p, size),
        )
    }

    /// A standardized basis: centre 0, sigma 1, 3-sigma limits, subgroups of one. Used for
    /// average run lengths and tests.
    pub fn standard() -> Self {
        ChartBasis {
            chart: ChartKind::Variables(VariablesChart::Individuals),
            center: 0.0,
            sigma: 1.0,
            nominal_n: 1,
            location: Limits {
                center: 0.0,
                ucl: 3.0,
                lcl: -3.0,
            },
            dispersion: variables::dispersion_limits(DispersionKind::MovingRange, 1.0, 2)
                .unwrap_or(Limits {
                    center: 1.128,
                    ucl: 3.686,
                    lcl: 0.0,
                }),
            unit: String::new(),
            decimals: None,
            below_severity: None,
        }
    }

    /// Standard deviation of a plotted point of `n` readings (of `n` units inspected on an
    /// attribute chart).
    pub fn sigma_point(&self, n: usize) -> f64 {
        match self.attribute() {
            Some(a) => self.attribute_at(a, n as f64).0,
            None => self.sigma / (n.max(1) as f64).sqrt(),
        }
    }

    /// Location limits for a subgroup of `n` (units inspected on an attribute chart).
    pub fn location_for(&self, n: usize) -> Limits {
        if n == self.nominal_n {
            return self.location;
        }
        match self.attribute() {
            Some(a) => self.attribute_at(a, n as f64).1,
            None => variables::location_limits(self.center, self.sigma, n),
        }
    }

    /// Dispersion limits for a subgroup of `n`, when that size has a dispersion chart.
    pub fn dispersion_for(&self, n: usize) -> Option<Limits> {
        let kind = self.chart.variables()?.dispersion_kind();
        if n == self.nominal_n {
            return Some(self.dispersion);
        }
        variables::dispersion_limits(kind, self.sigma, n).ok()
    }

    fn value_words(&self) -> (&'static str, &'static str) {
        match self.chart {
            ChartKind::Variables(VariablesChart::Individuals) => ("reading", "readings"),
            ChartKind::Variables(_) => ("subgroup mean", "subgroup means"),
            ChartKind::Attribute(_) => ("subgroup", "subgroups"),
        }
    }

    /// A value of the chart as people read it: with its unit, or as a percentage or count on
    /// an attribute chart.
    pub fn with_unit_pub(&self, v: f64) -> String {
        self.with_unit(v)
    }

    fn with_unit(&self, v: f64) -> String {
        if let Some(a) = self.attribute() {
            let scale = if a == AttributeChart::P { 100.0 } else { 1.0 };
            return format!(
                "{}{}",
                crate::format::fixed(scale * v, self.decimals()),
                attribute_unit(a)
            );
        }
        let v = crate::format::fixed(v, self.decimals());
        if self.unit.is_empty() {
            v
        } else {
            format!("{v} {}", self.unit)
        }
    }

    /// The data value `z` sigmas from the centre for subgroups of the nominal size.
    fn at_z(&self, z: f64) -> f64 {
        self.center + z * self.sigma_point(self.nominal_n)
    }
}

/// One plotted subgroup.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct Plotted {
    /// Subgroup number, counted per characteristic.
    pub number: u64,
    /// Milliseconds since the Unix epoch.
    pub time_ms: i64,
    /// Readings in the subgroup.
    pub n: usize,
    /// The location value: subgroup mean, or the reading itself for individuals.
    pub mean: f64,
    /// The dispersion value (range, standard deviation or moving range), if there is one.
    pub dispersion: Option<f64>,
    /// Attribute charts: the count found (nonconforming units or defects) and the units
    /// inspected (`mean` is then the plotted p, np, c or u).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub attribute: Option<(f64, f64)>,
}

/// What follows a plotted attribute value: "%" for p, a noun for the counts.
fn attribute_unit(a: AttributeChart) -> &'static str {
    match a {
        AttributeChart::P => "%",
        AttributeChart::Np => " nonconforming",
        AttributeChart::C => " defects",
        AttributeChart::U => " defects per unit",
    }
}

/// The running state of one rule.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(tag = "rule", rename_all = "kebab-case")]
pub enum RuleState {
    Stateless,
    /// Bit i set: the point i places back was beyond the threshold on that side.
    Cluster {
        above: u64,
        below: u64,
    },
    /// Points in a row on each side.
    Run {
        above: u32,
        below: u32,
    },
    /// Points in the current rising and falling sequences.
    Trend {
        rising: u32,
        falling: u32,
    },
    /// Points in the current alternating sequence, and the direction of the last step.
    Alternating {
        points: u32,
        last_step: i8,
    },
    /// Points in a row within the band.
    Hugging {
        points: u32,
    },
    /// Points in a row outside the band; bit i of `above` set when the point i back was above.
    Avoiding {
        points: u32,
        above: u64,
    },
    Ewma(EwmaState),
    Cusum(CusumState),
}

/// Everything an evaluator remembers: the recent points and one state per rule.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct PointState {
    /// The most recent location points, oldest first (as many as the longest rule needs).
    pub recent: VecDeque<PointRef>,
    /// The previous standardized location value.
    pub last_z: Option<f64>,
    pub rules: Vec<RuleState>,
}

/// Evaluates a rule set's subgroup rules, one point at a time.
#[derive(Debug, Clone, PartialEq)]
pub struct PointEvaluator {
    /// Shared with the rule set (and so with every evaluator of the same set).
    rules: std::sync::Arc<[Rule]>,
    basis: ChartBasis,
    keep: usize,
    state: PointState,
    /// The count found and units inspected of the point being judged (attribute charts), for
    /// its messages.
    current: Option<(f64, f64)>,
}

/// Bit `i` set when rule `i` (of the point rules, in order) fired on the location chart.
pub type Fired = u64;

impl PointEvaluator {
    /// A fresh evaluator for the point rules of `set`.
    pub fn new(set: &RuleSet, basis: ChartBasis) -> Self {
        let rules = set.point_rules_shared();
        let keep = rules.iter().map(|r| span(&r.kind)).max().unwrap_or(1) as usize;
        let states = rules.iter().map(|r| initial(&r.kind)).collect();
        PointEvaluator {
            rules,
            basis,
            keep,
            state: PointState {
                // Grown as points come (a characteristic that has seen few subgroups holds
                // few).
                recent: VecDeque::new(),
                last_z: None,
                rules: states,
            },
            current: None,
        }
    }

    /// An evaluator resuming from saved state. State that does not fit the rules (another rule
    /// set) is discarded and the evaluator starts fresh; the return says which happened.
    pub fn resume(set: &RuleSet, basis: ChartBasis, state: PointState) -> (Self, bool) {
        let mut e = PointEvaluator::new(set, basis);
        let fits = state.rules.len() == e.state.rules.len()
            && state
                .rules
                .iter()
                .zip(&e.state.rules)
                .all(|(a, b)| std::mem::discriminant(a) == std::mem::discriminant(b));
        if fits {
            e.state = state;
            while e.state.recent.len() > e.keep {
                e.state.recent.pop_front();
            }
        }
        (e, fits)
    }

    /// The state to save.
    pub fn state(&self) -> &PointState {
        &self.state
    }

    /// The per-rule states alone, for the run-length calculations, which explore them.
    pub(crate) fn rule_states_mut(&mut self) -> &mut Vec<RuleState> {
        &mut self.state.rules
    }

    /// Forgets the previous value (so a trend or alternation starts afresh).
    pub(crate) fn clear_last(&mut self) {
        self.state.last_z = None;
    }

    /// Restarts the rule `id` after its alert was acknowledged (the corrective action), when it
    /// is a CUSUM that says so: both sums back to the head start (zero without one). True when
    /// a state was restarted.
    pub fn restart_after_acknowledgement(&mut self, id: &str) -> bool {
        let mut restarted = false;
        for (r, st) in self.rules.iter().zip(self.state.rules.iter_mut()) {
            if r.id == id
                && let RuleKind::Cusum {
                    restart_on_acknowledge: true,
                    ..
                } = r.kind
            {
                *st = initial(&r.kind);
                restarted = true;
            }
        }
        restarted
    }

    /// The rules evaluated, in order.
    pub fn rules(&self) -> &[Rule] {
        &self.rules
    }

    /// The basis points are judged against.
    pub fn basis(&self) -> &ChartBasis {
        &self.basis
    }

    /// Evaluates one plotted subgroup and returns every violation it completes.
    pub fn evaluate(&mut self, p: &Plotted) -> Vec<Violation> {
        // An attribute chart's point is judged at its own size (p and u: z on the limits for
        // that many units, so the zone and run rules read the standardized value); a lower
        // limit clamped at zero cannot be passed.
        let (sigma_point, loc) = match (self.basis.attribute(), p.attribute) {
            (Some(a), Some((_, size))) => self.basis.attribute_at(a, size),
            _ => (self.basis.sigma_point(p.n), self.basis.location_for(p.n)),
        };
        self.current = p.attribute;
        // A point a billion sigmas out is beyond every limit and zone; saturating there keeps
        // an absurd reading (1e308 against limits a hundredth apart) from putting an infinity
        // into the EWMA or CUSUM sums, where it would stay for good.
        let z = ((p.mean - loc.center) / sigma_point).clamp(-Z_SATURATED, Z_SATURATED);
        let zu = (loc.ucl - loc.center) / sigma_point;
        let zl = (loc.lcl - loc.center) / sigma_point;
        let here = PointRef {
            number: p.number,
            time_ms: p.time_ms,
            value: p.mean,
        };
        if self.state.recent.len() == self.keep {
            self.state.recent.pop_front();
        }
        self.state.recent.push_back(here);
        let fired = self.step(z, zu, zl);
        let mut out = Vec::new();
        for (i, rule) in self.rules.iter().enumerate() {
            if fired & (1 << i) != 0 {
                out.push(self.describe(i, rule, z, &loc));
            }
        }
        // The dispersion chart: only the limits rule applies to it (common practice: the
        // pattern rules assume the symmetric distribution of the location statistic).
        if let (Some(d), Some(lim)) = (p.dispersion, self.basis.dispersion_for(p.n)) {
            for rule in self.rules.iter() {
                if let RuleKind::BeyondLimits {
                    chart: ChartSide::Both | ChartSide::Dispersion,
                } = rule.kind
                    && lim.beyond(d)
                {
                    out.push(self.dispersion_violation(rule, p, d, &lim));
                }
            }
        }
        out
    }

    /// Advances every rule's state by one standardized location value `z`, with the limits at
    /// `zu` and `zl` sigmas; returns which rules fired. No messages, no history: this is what
    /// the run-length calculations drive millions of times.
    pub fn step(&mut self, z: f64, zu: f64, zl: f64) -> Fired {
        let last = self.state.last_z.replace(z);
        let mut fired: Fired = 0;
        for (i, (rule, st)) in self
            .rules
            .iter()
            .zip(self.state.rules.iter_mut())
            .enumerate()
        {
            if advance(&rule.kind, st, z, last, zu, zl) {
                fired |= 1 << i;
            }
        }
        fired
    }

    /// A compact key of the rule states that matter for the future, for building the Markov
    /// chain of a rule set. `None` when a rule's future depends on the exact last value (trends,
    /// alternation, EWMA, CUSUM).
    pub fn markov_key(&self) -> Option<Vec<u64>> {
        let mut key = Vec::with_capacity(self.rules.len() * 2);
        for (rule, st) in self.rules.iter().zip(&self.state.rules) {
            match (&rule.kind, st) {
                (RuleKind::BeyondLimits { .. }, _) => {}
                (RuleKind::Cluster { window, .. }, RuleState::Cluster { above, below }) => {
                    let keep = low_bits(*window - 1);
                    key.push(above & keep);
                    key.push(below & keep);
                }
                (RuleKind::OneSideRun { .. }, RuleState::Run { above, below }) => {
                    key.push(u64::from(*above));
                    key.push(u64::from(*below));
                }
                (RuleKind::HuggingCentre { .. }, RuleState::Hugging { points }) => {
                    key.push(u64::from(*points));
                }
                (
                    RuleKind::AvoidingCentre { length, .. },
                    RuleState::Avoiding { points, above },
                ) => {
                    key.push(u64::from(*points));
                    key.push(above & low_bits((*points).min(length - 1)));
                }
                _ => return None,
            }
        }
        Some(key)
    }

    fn describe(&self, i: usize, rule: &Rule, z: f64, loc: &Limits) -> Violation {
        let b = &self.basis;
        let (one, many) = b.value_words();
        let recent: Vec<PointRef> = self.state.recent.iter().copied().collect();
        let last_n = |n: u32| -> Vec<PointRef> {
            let n = (n as usize).min(recent.len());
            recent[recent.len() - n..].to_vec()
        };
        let current = *recent.last().expect("the current point was just pushed");
        let side = if z > 0.0 { Side::Above } else { Side::Below };
        let (up, words) = match side {
            Side::Above => ("up", "above"),
            Side::Below => ("down", "below"),
        };
        let centre = b.with_unit(b.center);
        let mk = |message: String,
                  points: Vec<PointRef>,
                  statistic: f64,
                  limit: f64,
                  side: Option<Side>| {
            Violation::new(rule, message, points, statistic, limit, side)
        };
        match (&rule.kind, &self.state.rules[i]) {
            (RuleKind::BeyondLimits { .. }, _) if b.attribute().is_some() => {
                let a = b.attribute().expect("matched as an attribute chart");
                let (limit, which) = match side {
                    Side::Above => (loc.ucl, "upper"),
                    Side::Below => (loc.lcl, "lower"),
                };
                let (value_text, limit_text) = b.pair_with_unit(current.value, limit);
                let (found, size) = self.current.unwrap_or((current.value, b.nominal_n as f64));
                let seen = match a {
                    AttributeChart::P => format!(
                        "{} of {} parts nonconforming ({value_text})",
                        num(found),
                        num(size)
                    ),
                    AttributeChart::Np => {
                        format!("{} of {} parts nonconforming", num(found), num(size))
                    }
                    AttributeChart::C => format!(
                        "{} defects in {} unit{}",
                        num(found),
                        num(size),
                        if size == 1.0 { "" } else { "s" }
                    ),
                    AttributeChart::U => format!(
                        "{} defects in {} units ({value_text})",
                        num(found),
                        num(size)
                    ),
                };
                let meaning = match side {
                    Side::Above => match a {
                        AttributeChart::P | AttributeChart::Np => {
                            "the process is making more nonconforming parts than it did"
                        }
                        _ => "the process is making more defects than it did",
                    },
                    Side::Below => {
                        "fewer than the process makes: a real improvement, or a tester or inspection that stopped finding them (check it with a known bad part)"
                    }
                };
                let mut v = mk(
                    format!("{seen} is {words} the {which} limit {limit_text}; {meaning}"),
                    vec![current],
                    current.value,
                    limit,
                    Some(side),
                );
                if let (Side::Below, Some(s)) = (side, b.below_severity) {
                    v.severity = s;
                }
                v
            }
            (RuleKind::BeyondLimits { .. }, _) => {
                let (limit, which) = match side {
                    Side::Above => (loc.ucl, "upper"),
                    Side::Below => (loc.lcl, "lower"),
                };
                let (value_text, limit_text) = b.pair_with_unit(current.value, limit);
                mk(
                    format!(
                        "{one} {value_text} is {words} the {which} control limit {limit_text}; the process has probably shifted {up}, or this subgroup had a special cause"
                    ),
                    vec![current],
                    current.value,
                    limit,
                    Some(side),
                )
            }
            (
                RuleKind::Cluster {
                    count,
                    window,
                    beyond_sigma,
                },
                RuleState::Cluster { above, below },
            ) => {
                let mask = if side == Side::Above { *above } else { *below };
                let pts: Vec<PointRef> = last_n(*window)
                    .into_iter()
                    .rev()
                    .enumerate()
                    .filter(|(age, _)| mask & (1 << age) != 0)
                    .map(|(_, p)| p)
                    .rev()
                    .collect();
                let sign = if side == Side::Above { 1.0 } else { -1.0 };
                let threshold = b.at_z(sign * beyond_sigma);
                mk(
                    format!(
                        "{} of the last {window} {many} are more than {} sigma {words} the centre line {centre} (beyond {}); the process has probably shifted {up}",
                        (mask & low_bits(*window)).count_ones().max(*count),
                        num(*beyond_sigma),
                        b.with_unit(threshold)
                    ),
                    pts,
                    current.value,
                    threshold,
                    Some(side),
                )
            }
            (RuleKind::OneSideRun { length }, RuleState::Run { above, below }) => {
                let run = if side == Side::Above { *above } else { *below };
                mk(
                    format!(
                        "{run} {many} in a row {words} the centre line {centre}; the process mean has probably shifted {up}"
                    ),
                    last_n(*length),
                    current.value,
                    b.center,
                    Some(side),
                )
            }
            (RuleKind::SteadyTrend { length }, RuleState::Trend { rising, falling }) => {
                let (pts, dir, s) = if rising >= falling {
                    (*rising, "rising", Side::Above)
                } else {
                    (*falling, "falling", Side::Below)
                };
                let shown = last_n(*length);
                let first = shown.first().map(|p| p.value).unwrap_or(current.value);
                mk(
                    format!(
                        "{pts} {many} in a row steadily {dir}, from {} to {}; something is drifting (tool wear, temperature, a loosening fixture)",
                        b.with_unit(first),
                        b.with_unit(current.value)
                    ),
                    shown,
                    current.value,
                    first,
                    Some(s),
                )
            }
            (RuleKind::Alternating { length }, RuleState::Alternating { points, .. }) => mk(
                format!(
                    "{points} {many} in a row alternating up and down; look for two alternating sources, such as two spindles, fixtures, gauges or operators"
                ),
                last_n(*length),
                current.value,
                b.center,
                None,
            ),
            (
                RuleKind::HuggingCentre {
                    length,
                    within_sigma,
                },
                RuleState::Hugging { points },
            ) => mk(
                format!(
                    "{points} {many} in a row within {} sigma of the centre line ({} to {}); the limits may be too wide, or each subgroup mixes different streams",
                    num(*within_sigma),
                    b.with_unit(b.at_z(-within_sigma)),
                    b.with_unit(b.at_z(*within_sigma))
                ),
                last_n(*length),
                current.value,
                b.at_z(*within_sigma),
                None,
            ),
            (
                RuleKind::AvoidingCentre {
                    length,
                    beyond_sigma,
                },
                RuleState::Avoiding { points, .. },
            ) => mk(
                format!(
                    "{points} {many} in a row more than {} sigma from the centre line {centre} on both sides, none near it; the output probably mixes two processes",
                    num(*beyond_sigma)
                ),
                last_n(*length),
                current.value,
                b.at_z(*beyond_sigma),
                None,
            ),
            (RuleKind::Ewma { lambda, width }, RuleState::Ewma(st)) => {
                let half = width * (lambda / (2.0 - lambda)).sqrt();
                let sign = if st.z > 0.0 { 1.0 } else { -1.0 };
                let (w, u) = if st.z > 0.0 {
                    ("above", "up")
                } else {
                    ("below", "down")
                };
                let (value_text, limit_text) = b.pair_with_unit(b.at_z(st.z), b.at_z(sign * half));
                mk(
                    format!(
                        "the EWMA of the {many}, {value_text}, is {w} its limit {limit_text}; a small sustained shift {u}"
                    ),
                    vec![current],
                    b.at_z(st.z),
                    b.at_z(sign * half),
                    Some(if st.z > 0.0 { Side::Above } else { Side::Below }),
                )
            }
            (RuleKind::Cusum { k, h, .. }, RuleState::Cusum(st)) => {
                let upper = st.upper > *h;
                let (sum, run, w, s) = if upper {
                    (st.upper, st.upper_run, "upper", Side::Above)
                } else {
                    (st.lower, st.lower_run, "lower", Side::Below)
                };
                // Montgomery, ch. 9: the new mean is estimated as μ0 ± (K + C/N), N the points
                // since the sum was last zero.
                let sign = if upper { 1.0 } else { -1.0 };
                let estimate = b.at_z(sign * (k + sum / run.max(1) as f64));
                let pts = last_n(run.min(u64::from(u32::MAX)) as u32);
                let since = pts.first().map(|p| p.number).unwrap_or(current.number);
                mk(
                    format!(
                        "the {w} CUSUM, {} sigma, has passed its decision interval {} sigma; the mean has probably shifted to about {}, starting around subgroup {since}",
                        num(sum),
                        num(*h),
                        b.with_unit(estimate)
                    ),
                    pts,
                    sum,
                    *h,
                    Some(s),
                )
            }
            _ => mk(
                format!("rule {} fired", rule.id),
                vec![current],
                current.value,
                f64::NAN,
                None,
            ),
        }
    }

    fn dispersion_violation(&self, rule: &Rule, p: &Plotted, d: f64, lim: &Limits) -> Violation {
        let b = &self.basis;
        let kind = b
            .chart
            .variables()
            .map_or(DispersionKind::Range, |c| c.dispersion_kind());
        let name = match kind {
            DispersionKind::Range => "subgroup range",
            DispersionKind::StdDev => "subgroup standard deviation",
            DispersionKind::MovingRange => "moving range",
        };
        let (side, limit, text) = if d > lim.ucl {
            (
                Side::Above,
                lim.ucl,
                "the spread has grown (a worn or chipped tool, a loose fixture, a gauge problem), or one reading is wrong",
            )
        } else {
            (
                Side::Below,
                lim.lcl,
                "the spread has fallen, which may be a real improvement or a gauge that stopped responding",
            )
        };
        let which = if side == Side::Above {
            "above the upper"
        } else {
            "below the lower"
        };
        let (value_text, limit_text) = b.pair_with_unit(d, limit);
        Violation::new(
            rule,
            format!("{name} {value_text} is {which} control limit {limit_text}; {text}"),
            vec![PointRef {
                number: p.number,
                time_ms: p.time_ms,
                value: d,
            }],
            d,
            limit,
            Some(side),
        )
        .on(super::Chart::Dispersion)
    }
}

fn low_bits(n: u32) -> u64 {
    if n >= 64 { u64::MAX } else { (1u64 << n) - 1 }
}

/// How many recent points a rule's pattern spans.
fn span(kind: &RuleKind) -> u32 {
    match kind {
        RuleKind::Cluster { window, .. } => *window,
        RuleKind::OneSideRun { length }
        | RuleKind::SteadyTrend { length }
        | RuleKind::Alternating { length }
        | RuleKind::HuggingCentre { length, .. }
        | RuleKind::AvoidingCentre { length, .. } => *length,
        // Enough to show where a CUSUM shift began in most cases.
        RuleKind::Cusum { .. } => super::config::MAX_WINDOW,
        _ => 1,
    }
}

fn initial(kind: &RuleKind) -> RuleState {
    match kind {
        RuleKind::Cluster { .. } => RuleState::Cluster { above: 0, below: 0 },
        RuleKind::OneSideRun { .. } => RuleState::Run { above: 0, below: 0 },
        RuleKind::SteadyTrend { .. } => RuleState::Trend {
            rising: 1,
            falling: 1,
        },
        RuleKind::Alternating { .. } => RuleState::Alternating {
            points: 0,
            last_step: 0,
        },
        RuleKind::HuggingCentre { .. } => RuleState::Hugging { points: 0 },
        RuleKind::AvoidingCentre { .. } => RuleState::Avoiding {
            points: 0,
            above: 0,
        },
        RuleKind::Ewma { lambda, width } => {
            let d = ewma_design(*lambda, *width);
            RuleState::Ewma(EwmaState::start(&d))
        }
        RuleKind::Cusum {
            k, h, head_start, ..
        } => RuleState::Cusum(CusumState::start(&cusum_design(*k, *h, *head_start))),
        _ => RuleState::Stateless,
    }
}

fn ewma_design(lambda: f64, width: f64) -> EwmaDesign {
    EwmaDesign {
        lambda,
        width,
        center: 0.0,
        sigma: 1.0,
    }
}

fn cusum_design(k: f64, h: f64, head_start: f64) -> CusumDesign {
    CusumDesign {
        target: 0.0,
        sigma: 1.0,
        k,
        h,
        head_start,
    }
}

/// Advances one rule by the standardized value `z` (previous value `last`); true when it fires.
fn advance(
    kind: &RuleKind,
    st: &mut RuleState,
    z: f64,
    last: Option<f64>,
    zu: f64,
    zl: f64,
) -> bool {
    match (kind, st) {
        (RuleKind::BeyondLimits { chart }, _) => {
            *chart != ChartSide::Dispersion && (z > zu || z < zl)
        }
        (
            RuleKind::Cluster {
                count,
                window,
                beyond_sigma,
            },
            RuleState::Cluster { above, below },
        ) => {
            let keep = low_bits(*window);
            let up = z > *beyond_sigma;
            let down = z < -*beyond_sigma;
            *above = ((*above << 1) | u64::from(up)) & keep;
            *below = ((*below << 1) | u64::from(down)) & keep;
            (up && above.count_ones() >= *count) || (down && below.count_ones() >= *count)
        }
        (RuleKind::OneSideRun { length }, RuleState::Run { above, below }) => {
            *above = if z > 0.0 { *above + 1 } else { 0 };
            *below = if z < 0.0 { *below + 1 } else { 0 };
            *above >= *length || *below >= *length
        }
        (RuleKind::SteadyTrend { length }, RuleState::Trend { rising, falling }) => {
            match last {
                Some(prev) if z > prev => {
                    *rising += 1;
                    *falling = 1;
                }
                Some(prev) if z < prev => {
                    *falling += 1;
                    *rising = 1;
                }
                _ => {
                    *rising = 1;
                    *falling = 1;
                }
            }
            *rising >= *length || *falling >= *length
        }
        (RuleKind::Alternating { length }, RuleState::Alternating { points, last_step }) => {
            let step = match last {
                Some(prev) if z > prev => 1,
                Some(prev) if z < prev => -1,
                _ => 0,
            };
            *points = if step == 0 {
                1
            } else if step == -*last_step {
                *points + 1
            } else {
                2
            };
            *last_step = step;
            *points >= *length
        }
        (
            RuleKind::HuggingCentre {
                length,
                within_sigma,
            },
            RuleState::Hugging { points },
        ) => {
            *points = if z.abs() < *within_sigma {
                *points + 1
            } else {
                0
            };
            *points >= *length
        }
        (
            RuleKind::AvoidingCentre {
                length,
                beyond_sigma,
            },
            RuleState::Avoiding { points, above },
        ) => {
            if z.abs() > *beyond_sigma {
                *points += 1;
                *above = ((*above << 1) | u64::from(z > 0.0)) & low_bits(*length);
            } else {
                *points = 0;
                *above = 0;
            }
            // On both sides: the last `length` points include at least one above and one below.
            let ups = (*above & low_bits(*length)).count_ones();
            *points >= *length && ups > 0 && ups < *length
        }
        (RuleKind::Ewma { lambda, width }, RuleState::Ewma(st)) => {
            let d = ewma_design(*lambda, *width);
            let e = st.update(&d, z);
            d.asymptotic().beyond(e)
        }
        (
            RuleKind::Cusum {
                k, h, head_start, ..
            },
            RuleState::Cusum(st),
        ) => {
            let s = st.update(&cusum_design(*k, *h, *head_start), z);
            s.upper || s.lower
        }
        _ => false,
    }
}
