//! The `[[characteristic]]` sections: what is measured, its subgroups, specification, rules,
//! limits and learning, as written and as validated by `build_characteristics`.

use std::collections::HashSet;
use std::path::{Path, PathBuf};

use serde::{Deserialize, Serialize};

use super::RawConfig;
use crate::diag::{Locator, Problem};
use crate::limits_file::{ChartKind, StoredLimits, valid_id};
use crate::rules::{RuleSet, RulesConfig};
use crate::stats::attributes::AttributeChart;
use crate::stats::capability::Spec;
use crate::stats::variables::VariablesChart;

/// What to do with a subgroup that is still incomplete when its maximum wait runs out.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Deserialize, Serialize, Default)]
#[serde(rename_all = "kebab-case")]
pub enum OnTimeout {
    /// Evaluate it with the readings it has (recorded as partial).
    #[default]
    Evaluate,
    /// Discard it (recorded as discarded).
    Discard,
}

/// `[characteristic.subgroup]`: how readings are grouped. Exactly one of `size`, `window_s`
/// and `by_part`.
#[derive(Debug, Clone, PartialEq, Deserialize, Serialize, Default)]
#[serde(deny_unknown_fields)]
pub struct RawSubgroup {
    /// n consecutive readings (1 for individuals).
    pub size: Option<usize>,
    /// All readings within a window of this many seconds.
    pub window_s: Option<f64>,
    /// Readings of the same part or sample id, `by_part_size` of them.
    #[serde(default)]
    pub by_part: bool,
    pub by_part_size: Option<usize>,
    /// After this long, an incomplete subgroup is evaluated or discarded.
    pub max_wait_s: Option<f64>,
    pub on_timeout: Option<OnTimeout>,
}

/// `[characteristic.learning]`: how limits are learned when none are stored.
#[derive(Debug, Clone, PartialEq, Deserialize, Serialize)]
#[serde(deny_unknown_fields)]
pub struct RawLearning {
    #[serde(default = "default_baseline")]
    pub subgroups: usize,
    /// The chart the learned limits are for; by default from the subgroup size.
    pub chart: Option<VariablesChart>,
    /// The highest severity an alert on learned limits has until an engineer approves them.
    #[serde(default = "default_provisional_severity")]
    pub provisional_severity: crate::rules::Severity,
}

impl Default for RawLearning {
    fn default() -> Self {
        RawLearning {
            subgroups: default_baseline(),
            chart: None,
            provisional_severity: default_provisional_severity(),
        }
    }
}

fn default_provisional_severity() -> crate::rules::Severity {
    crate::rules::Severity::Warn
}

fn default_baseline() -> usize {
    25
}

/// `[[characteristic]]`.
#[derive(Debug, Clone, PartialEq, Deserialize, Serialize)]
#[serde(deny_unknown_fields)]
pub struct RawCharacteristic {
    pub id: String,
    pub name: Option<String>,
    pub unit: Option<String>,
    /// The stored limits file (relative to the config file). Without one, the characteristic
    /// learns its limits.
    pub limits: Option<String>,
    /// "from-sigma" (default): the stored limits must be what their sigma gives; "as-stored":
    /// take them as written (limits widened on purpose), with `limits_reason`.
    pub limits_policy: Option<String>,
    pub limits_reason: Option<String>,
    /// Readings outside this range cannot be real and are rejected.
    pub valid_min: Option<f64>,
    pub valid_max: Option<f64>,
    #[serde(default)]
    pub subgroup: RawSubgroup,
    pub spec: Option<Spec>,
    #[serde(default)]
    pub rules: RulesConfig,
    #[serde(default)]
    pub learning: RawLearning,
    /// What the technician should check first when an alert is raised.
    pub reaction_plan: Option<String>,
    /// Decimals for every figure of this characteristic people read (alerts, the log, status);
    /// without it, derived from the limits.
    pub decimals: Option<usize>,
    /// An attribute characteristic: "p" (fraction nonconforming), "np" (number nonconforming
    /// at a constant sample size), "c" (defects per inspection unit), "u" (defects per unit).
    /// Without it, a measured (variables) characteristic.
    pub chart: Option<String>,
    /// p and np: the words a station sends for a good part ("OK", "PASS").
    pub conforming: Option<Vec<String>>,
    /// p and np: the words a station sends for a bad part ("NOK", "FAIL").
    pub nonconforming: Option<Vec<String>>,
    /// Attribute charts: the severity of a subgroup below the lower limit (an improvement, or
    /// a tester that stopped finding); by default the beyond-limits rule's own.
    pub below_limit_severity: Option<crate::rules::Severity>,
}

/// How an attribute characteristic reads its results.
#[derive(Debug, Clone, PartialEq)]
pub struct AttributeSettings {
    pub chart: AttributeChart,
    /// Words for a conforming unit (0) and a nonconforming one (1), compared without regard
    /// to case or surrounding spaces.
    pub conforming: Vec<String>,
    pub nonconforming: Vec<String>,
    pub below_severity: Option<crate::rules::Severity>,
}

impl AttributeSettings {
    /// What a word a station sent counts as: 0 conforming, 1 nonconforming; the error says
    /// which words are known.
    pub fn count_of(&self, word: &str) -> Result<f64, String> {
        let w = word.trim();
        let is = |list: &[String]| list.iter().any(|x| x.eq_ignore_ascii_case(w));
        if is(&self.nonconforming) {
            return Ok(1.0);
        }
        if is(&self.conforming) {
            return Ok(0.0);
        }
        // A number sent as text ("1", "0", "3") counts as itself; the count's own checks follow.
        if let Ok(v) = w.parse::<f64>() {
            return Ok(v);
        }
        let clipped: String = w.chars().take(40).collect();
        if matches!(self.chart, AttributeChart::C | AttributeChart::U) {
            return Err(format!(
                "\"{clipped}\" is not a count of defects (a whole number of zero or more)"
            ));
        }
        let known = |l: &[String]| {
            if l.is_empty() {
                "none".to_string()
            } else {
                l.iter()
                    .map(|x| format!("\"{x}\""))
                    .collect::<Vec<_>>()
                    .join(", ")
            }
        };
        Err(format!(
            "\"{clipped}\" is neither a conforming word ({}) nor a nonconforming one ({}), nor 0 or 1",
            known(&self.conforming),
            known(&self.nonconforming)
        ))
    }
}

/// How readings form subgroups.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(tag = "by", rename_all = "kebab-case")]
pub enum Grouping {
    Count { size: usize },
    Window { window_ms: i64 },
    Part { size: usize },
}

/// A validated characteristic.
#[derive(Debug, Clone, PartialEq)]
pub struct Characteristic {
    pub id: String,
    pub name: String,
    pub unit: String,
    pub grouping: Grouping,
    pub max_wait_ms: Option<i64>,
    pub on_timeout: OnTimeout,
    pub chart: ChartKind,
    /// Set for an attribute characteristic (p, np, c, u).
    pub attribute: Option<AttributeSettings>,
    pub valid: Option<(f64, f64)>,
    pub spec: Option<Spec>,
    /// Shared by the characteristics whose rules are the same.
    pub rules: std::sync::Arc<RuleSet>,
    /// The `limits` file as configured (resolved), whether or not it exists.
    pub configured_limits: Option<PathBuf>,
    /// The limits file in use: the configured one when it exists, else where learned limits
    /// are read from and written to.
    pub limits_path: Option<PathBuf>,
    /// Why the limits are taken as stored (`limits_policy = "as-stored"`), when they are.
    pub limits_reason: Option<String>,
    pub limits: Option<StoredLimits>,
    pub baseline_subgroups: usize,
    /// The cap on alert severity while the limits are provisional.
    pub provisional_severity: crate::rules::Severity,
    pub reaction_plan: Option<String>,
    /// Decimals for the figures people read, when the config sets them.
    pub decimals: Option<usize>,
}

/// Where stored limits do not follow from their own sigma (centre ± 3σ/√n, and the
/// dispersion chart's limits from σ) by more than a hundredth of a standard error: what, the
/// value found, the value expected.
fn limits_against_sigma(l: &StoredLimits) -> Vec<(&'static str, f64, f64)> {
    use crate::stats::variables::{dispersion_limits, location_limits};
    let mut out = Vec::new();
    let (Some(_), Some(disp)) = (l.chart.variables(), &l.dispersion) else {
        // An attribute chart's file is checked against its centre when it is read.
        return out;
    };
    let sigma = l.sigma.within;
    let n = l.subgroup_size;
    // Within a hundredth of a standard error agrees: rounding to the gauge's resolution or to
    // a table's constants passes; limits moved on purpose (3.5σ is half a standard error) do
    // not.
    let tol = 0.01 * sigma / (n.max(1) as f64).sqrt() + 1e-8 * l.location.center.abs();
    let loc = location_limits(l.location.center, sigma, n);
    for (what, found, expected) in [
        ("location.ucl", l.location.ucl, loc.ucl),
        ("location.lcl", l.location.lcl, loc.lcl),
    ] {
        if (found - expected).abs() > tol {
            out.push((what, found, expected));
        }
    }
    if let Ok(d) = dispersion_limits(disp.kind, sigma, n) {
        for (what, found, expected) in [
            ("dispersion.center", disp.center, d.center),
            ("dispersion.ucl", disp.ucl, d.ucl),
            ("dispersion.lcl", disp.lcl, d.lcl),
        ] {
            if (found - expected).abs() > 0.01 * sigma + 1e-8 * expected.abs() {
                out.push((what, found, expected));
            }
        }
    }
    out
}

fn build_characteristic(
    c: &RawCharacteristic,
    at: &str,
    who: &str,
    resolve: &impl Fn(&str) -> PathBuf,
    learned_dir: Option<&Path>,
    loc: &Locator,
    p: &mut Vec<Problem>,
) -> Option<Characteristic> {
    let before = p.len();
    let sg = &c.subgroup;
    let chosen = [sg.size.is_some(), sg.window_s.is_some(), sg.by_part]
        .iter()
        .filter(|x| **x)
        .count();
    let grouping = match (sg.size, sg.window_s, sg.by_part) {
        _ if chosen != 1 => {
            p.push(loc.problem(
                &format!("{at}.subgroup"),
                format!("{who}: say how readings form subgroups with exactly one of size, window_s or by_part = true"),
            ));
            None
        }
        (Some(n), _, _) if !(1..=100).contains(&n) => {
            p.push(loc.problem(
                &format!("{at}.subgroup.size"),
                format!("{who}: subgroup.size = {n} is out of range; use 1 to 100"),
            ));
            None
        }
        (Some(n), _, _) => Some(Grouping::Count { size: n }),
        (_, Some(w), _) if !(w > 0.0 && w.is_finite()) => {
            p.push(loc.problem(
                &format!("{at}.subgroup.window_s"),
                format!("{who}: subgroup.window_s = {w} must be a positive number of seconds"),
            ));
            None
        }
        (_, Some(w), _) => Some(Grouping::Window {
            window_ms: (w * 1000.0).round() as i64,
        }),
        _ => match sg.by_part_size {
            Some(n) if (1..=100).contains(&n) => Some(Grouping::Part { size: n }),
            Some(n) => {
                p.push(loc.problem(
                    &format!("{at}.subgroup.by_part_size"),
                    format!("{who}: {n} is out of range; use 1 to 100"),
                ));
                None
            }
            None => {
                p.push(loc.problem(
                    &format!("{at}.subgroup"),
                    format!("{who}: by_part = true needs by_part_size, the readings per part"),
                ));
                None
            }
        },
    };
    if sg.by_part_size.is_some() && !sg.by_part {
        p.push(loc.problem(
            &format!("{at}.subgroup.by_part_size"),
            format!("{who}: by_part_size only applies with by_part = true"),
        ));
    }
    let max_wait_ms = match sg.max_wait_s {
        Some(w) if w > 0.0 && w.is_finite() => Some((w * 1000.0).round() as i64),
        Some(w) => {
            p.push(loc.problem(
                &format!("{at}.subgroup.max_wait_s"),
                format!("{who}: {w} must be a positive number of seconds"),
            ));
            None
        }
        None => None,
    };
    if sg.on_timeout.is_some() && sg.max_wait_s.is_none() {
        p.push(loc.problem(
            &format!("{at}.subgroup.on_timeout"),
            format!("{who}: on_timeout needs max_wait_s"),
        ));
    }
    // The chart follows from the stored limits, the learning table, or the subgroup size.
    let nominal = match &grouping {
        Some(Grouping::Count { size }) | Some(Grouping::Part { size }) => Some(*size),
        _ => None,
    };
    let default_chart = match nominal {
        Some(1) => VariablesChart::Individuals,
        Some(n) if n > 10 => VariablesChart::XbarS,
        _ => VariablesChart::XbarR,
    };
    let attribute = attribute_settings(c, at, who, &grouping, loc, p);
    let chart = c.learning.chart.unwrap_or(default_chart);
    if let Some(n) = nominal
        && attribute.is_none()
    {
        if n == 1 && chart != VariablesChart::Individuals {
            p.push(loc.problem(
                &format!("{at}.subgroup.size"),
                format!("{who}: subgroup.size = 1 needs chart = \"individuals\""),
            ));
        }
        if n > 1 && chart == VariablesChart::Individuals {
            p.push(loc.problem(
                &format!("{at}.learning.chart"),
                format!("{who}: chart = \"individuals\" needs subgroup.size = 1, not {n}"),
            ));
        }
    }
    if matches!(grouping, Some(Grouping::Window { .. }))
        && chart == VariablesChart::Individuals
        && attribute.is_none()
    {
        p.push(loc.problem(&format!("{at}.learning.chart"), format!("{who}: a time window forms subgroups of many readings; chart = \"individuals\" does not fit")));
    }
    if !(2..=1000).contains(&c.learning.subgroups) {
        p.push(loc.problem(
            &format!("{at}.learning.subgroups"),
            format!("{who}: {} baseline subgroups is out of range; use 2 to 1000 (common practice: 20 to 25)", c.learning.subgroups),
        ));
    }
    let valid = match (c.valid_min, c.valid_max) {
        (Some(a), Some(b)) if a < b && a.is_finite() && b.is_finite() => Some((a, b)),
        (Some(a), Some(b)) => {
            p.push(loc.problem(
                &format!("{at}.valid_max"),
                format!("{who}: valid_max = {b} must be above valid_min = {a}"),
            ));
            None
        }
        (None, None) => None,
        _ => {
            p.push(loc.problem(
                at,
                format!("{who}: give both valid_min and valid_max, or neither"),
            ));
            None
        }
    };
    if let Some(spec) = &c.spec
        && let Err(e) = spec.validate()
    {
        p.push(loc.problem(&format!("{at}.spec"), format!("{who}: {e}")));
    }
    let rules = match RuleSet::from_config(&c.rules, &format!("{at}.rules"), loc) {
        Ok(r) => std::sync::Arc::new(r),
        Err(mut more) => {
            p.append(&mut more);
            Default::default()
        }
    };
    // An attribute characteristic's rules are checked by `attribute_settings`.
    for (j, r) in c
        .rules
        .rule
        .iter()
        .enumerate()
        .filter(|_| c.chart.is_none())
    {
        let two_sided = c.spec.is_some_and(|s| s.lsl.is_some() && s.usl.is_some());
        match r.kind.as_str() {
            "outside-spec" if c.spec.is_none() => p.push(loc.problem(
                &format!("{at}.rules.rule[{j}]"),
                format!("{who}: kind = \"outside-spec\" needs a [characteristic.spec]"),
            )),
            "coarse-resolution" if !two_sided => p.push(loc.problem(
                &format!("{at}.rules.rule[{j}]"),
                format!("{who}: kind = \"coarse-resolution\" needs a two-sided spec (lsl and usl) to know the tolerance"),
            )),
            _ => {}
        }
    }
    // The engineer's file when it exists; else the learned file (read when there, learned and
    // written when not) in the learned-limits directory, or at the configured path.
    let configured_limits = c.limits.as_deref().map(resolve);
    let limits_path = match (&configured_limits, learned_dir) {
        (Some(f), _) if f.exists() => Some(f.clone()),
        // Named after the configured file, so that pointing `limits` at a new name learns
        // afresh, as it does without the directory.
        (f, Some(d)) => Some(
            d.join(
                f.as_ref()
                    .and_then(|f| f.file_name())
                    .map(|n| n.to_os_string())
                    .unwrap_or_else(|| format!("{}.toml", c.id).into()),
            ),
        ),
        (f, None) => f.clone(),
    };
    let limits = match &limits_path {
        Some(lp) if lp.exists() => match StoredLimits::load(lp) {
            Ok(l) => {
                if l.characteristic != c.id {
                    p.push(loc.problem(
                        &format!("{at}.limits"),
                        format!(
                            "{who}: {} holds the limits of \"{}\"",
                            lp.display(),
                            l.characteristic
                        ),
                    ));
                }
                let wanted = match &attribute {
                    Some(a) => Some(ChartKind::Attribute(a.chart)),
                    None if c.learning.chart.is_some() => Some(ChartKind::Variables(chart)),
                    None => None,
                };
                if let Some(w) = wanted
                    && l.chart != w
                {
                    p.push(loc.problem(
                        &format!(
                            "{at}.{}",
                            if attribute.is_some() {
                                "chart"
                            } else {
                                "learning.chart"
                            }
                        ),
                        format!(
                            "{who}: the stored limits in {} are for chart \"{}\", not \"{}\"",
                            lp.display(),
                            l.chart.name(),
                            w.name()
                        ),
                    ));
                } else if attribute.is_none() && l.chart.attribute().is_some() {
                    p.push(loc.problem(
                        &format!("{at}.limits"),
                        format!(
                            "{who}: {} holds limits for the attribute chart \"{}\"; say chart = \"{}\" to make it an attribute characteristic",
                            lp.display(),
                            l.chart.name(),
                            l.chart.name()
                        ),
                    ));
                }
                if let Some(n) = nominal
                    && n != l.subgroup_size
                    && attribute.is_none()
                {
                    p.push(loc.problem(
                        &format!("{at}.subgroup.size"),
                        format!("{who}: subgroups of {n}, but the stored limits are for subgroups of {}", l.subgroup_size),
                    ));
                }
                if let (Some(cu), Some(lu)) = (&c.unit, &l.unit)
                    && !cu.is_empty()
                    && !lu.is_empty()
                    && cu != lu
                {
                    p.push(loc.problem(
                        &format!("{at}.unit"),
                        format!(
                            "{who}: unit \"{cu}\", but the stored limits in {} are in \"{lu}\"",
                            lp.display()
                        ),
                    ));
                }
                // The limits of the two sides must agree; a target only where both give one.
                if let (Some(cs), Some(ls)) = (&c.spec, &l.spec)
                    && (cs.lsl != ls.lsl
                        || cs.usl != ls.usl
                        || matches!((cs.target, ls.target), (Some(a), Some(b)) if a != b))
                {
                    let words = |s: &Spec| {
                        let f = |v: Option<f64>| v.map_or("none".to_string(), crate::format::num);
                        format!("lsl {}, usl {}, target {}", f(s.lsl), f(s.usl), f(s.target))
                    };
                    p.push(loc.problem(
                        &format!("{at}.spec"),
                        format!(
                            "{who}: spec {}, but the stored limits in {} were computed with spec {}; recompute them or make the two agree",
                            words(cs),
                            lp.display(),
                            words(ls)
                        ),
                    ));
                }
                if c.limits_policy.as_deref() != Some("as-stored") {
                    for (what, found, expected) in limits_against_sigma(&l) {
                        p.push(loc.problem(
                            &format!("{at}.limits"),
                            format!(
                                "{who}: in {}, {what} is {}, but its sigma gives {}; the beyond-limits rule and the zone rules would disagree. Recompute the limits, or, if they were set apart from sigma on purpose, say limits_policy = \"as-stored\" with limits_reason",
                                lp.display(),
                                crate::format::num(found),
                                crate::format::num(expected)
                            ),
                        ));
                    }
                }
                Some(l)
            }
            Err(e) => {
                p.push(loc.problem(&format!("{at}.limits"), format!("{who}: {e}")));
                None
            }
        },
        // A named file that does not exist yet: the characteristic learns and writes it there.
        _ => None,
    };
    match (c.limits_policy.as_deref(), c.limits_reason.as_deref()) {
        (None | Some("from-sigma"), _) => {}
        (Some("as-stored"), Some(r)) if !r.trim().is_empty() => {}
        (Some("as-stored"), _) => p.push(loc.problem(
            &format!("{at}.limits_policy"),
            format!("{who}: limits_policy = \"as-stored\" needs limits_reason = \"...\": why the limits differ from what their sigma gives"),
        )),
        (Some(other), _) => p.push(loc.problem(
            &format!("{at}.limits_policy"),
            format!("{who}: \"{other}\" is not a limits policy; use \"from-sigma\" (the default) or \"as-stored\""),
        )),
    }
    let chart: ChartKind = match (&attribute, &limits) {
        (Some(a), _) => ChartKind::Attribute(a.chart),
        (None, Some(l)) => l.chart,
        (None, None) => ChartKind::Variables(chart),
    };
    if let Some(d) = c.decimals
        && d > 10
    {
        p.push(loc.problem(
            &format!("{at}.decimals"),
            format!("{d} decimals is more than a gauge resolves; use 0 to 10"),
        ));
    }
    if p.len() > before {
        return None;
    }
    Some(Characteristic {
        id: c.id.clone(),
        name: c.name.clone().unwrap_or_else(|| c.id.clone()),
        unit: c.unit.clone().unwrap_or_default(),
        grouping: grouping?,
        max_wait_ms,
        on_timeout: sg.on_timeout.unwrap_or_default(),
        chart,
        attribute,
        valid,
        spec: c.spec,
        rules,
        limits_reason: match c.limits_policy.as_deref() {
            Some("as-stored") => c.limits_reason.clone(),
            _ => None,
        },
        configured_limits,
        limits_path,
        limits,
        baseline_subgroups: c.learning.subgroups,
        provisional_severity: c.learning.provisional_severity,
        reaction_plan: c.reaction_plan.clone(),
        decimals: c.decimals,
    })
}

/// The attribute settings of `c` when it names an attribute chart, with a problem for each
/// key that does not apply to one (or, for a measured characteristic, each attribute key).
fn attribute_settings(
    c: &RawCharacteristic,
    at: &str,
    who: &str,
    grouping: &Option<Grouping>,
    loc: &Locator,
    p: &mut Vec<Problem>,
) -> Option<AttributeSettings> {
    let Some(name) = &c.chart else {
        for (key, set) in [
            ("conforming", c.conforming.is_some()),
            ("nonconforming", c.nonconforming.is_some()),
            ("below_limit_severity", c.below_limit_severity.is_some()),
        ] {
            if set {
                p.push(loc.problem(
                    &format!("{at}.{key}"),
                    format!("{who}: {key} applies only to an attribute characteristic (chart = \"p\", \"np\", \"c\" or \"u\")"),
                ));
            }
        }
        return None;
    };
    let chart = match name.as_str() {
        "p" => AttributeChart::P,
        "np" => AttributeChart::Np,
        "c" => AttributeChart::C,
        "u" => AttributeChart::U,
        "xbar-r" | "xbar-s" | "individuals" => {
            p.push(loc.problem(
                &format!("{at}.chart"),
                format!("{who}: chart = \"{name}\": this key names an attribute chart (\"p\", \"np\", \"c\" or \"u\"); a measured characteristic's chart is learning.chart"),
            ));
            return None;
        }
        other => {
            p.push(loc.problem(
                &format!("{at}.chart"),
                format!("{who}: \"{other}\" is not an attribute chart; use \"p\", \"np\", \"c\" or \"u\""),
            ));
            return None;
        }
    };
    let kind = format!("an attribute characteristic (chart = \"{name}\")");
    let mut does_not_apply = |key: &str, why: &str| {
        p.push(loc.problem(
            &format!("{at}.{key}"),
            format!("{who}: {key} does not apply to {kind}: {why}"),
        ));
    };
    let either = |a: bool, b: bool, first: &'static str, second: &'static str| {
        (if a { first } else { second }, a || b)
    };
    let (valid_key, valid_set) = either(
        c.valid_min.is_some(),
        c.valid_max.is_some(),
        "valid_min",
        "valid_max",
    );
    let (policy_key, policy_set) = either(
        c.limits_policy.is_some(),
        c.limits_reason.is_some(),
        "limits_policy",
        "limits_reason",
    );
    for (key, set, why) in [
        (
            "spec",
            c.spec.is_some(),
            "it judges counts, not measurements against specification limits",
        ),
        (
            valid_key,
            valid_set,
            "counts are checked as counts (whole, zero or more, no more nonconforming than inspected)",
        ),
        (
            "unit",
            c.unit.is_some(),
            "its values are counts and fractions of the units inspected",
        ),
        (
            "learning.chart",
            c.learning.chart.is_some(),
            "the chart is the characteristic's chart key",
        ),
        (
            policy_key,
            policy_set,
            "its limits always follow from the stored centre, and the file is checked for that",
        ),
    ] {
        if set {
            does_not_apply(key, why);
        }
    }
    let counts = matches!(chart, AttributeChart::C | AttributeChart::U);
    if counts {
        for (key, set) in [
            ("conforming", c.conforming.is_some()),
            ("nonconforming", c.nonconforming.is_some()),
        ] {
            if set {
                does_not_apply(
                    key,
                    "a c or u chart counts defects; its readings are counts, not pass/fail words",
                );
            }
        }
    }
    if matches!(chart, AttributeChart::Np | AttributeChart::C)
        && matches!(grouping, Some(Grouping::Window { .. }))
    {
        p.push(loc.problem(
            &format!("{at}.subgroup.window_s"),
            format!("{who}: the {name} chart needs the same number of units in every subgroup, which a time window does not give; use subgroup.size, or chart = \"{}\"", if chart == AttributeChart::Np { "p" } else { "u" }),
        ));
    }
    for (j, r) in c.rules.rule.iter().enumerate() {
        let here = format!("{at}.rules.rule[{j}]");
        match r.kind.as_str() {
            "outside-spec" | "stuck-gauge" | "impossible-reading" | "coarse-resolution" => {
                p.push(loc.problem(
                    &here,
                    format!("{who}: kind = \"{}\" does not apply to {kind}: it judges single measured readings", r.kind),
                ));
            }
            "beyond-limits" if r.chart == Some(crate::rules::config::ChartSide::Dispersion) => {
                p.push(loc.problem(
                    &format!("{here}.chart"),
                    format!("{who}: chart = \"dispersion\" does not apply to {kind}: it has no dispersion chart"),
                ));
            }
            _ => {}
        }
    }
    let mut words = |key: &str, list: &Option<Vec<String>>| -> Vec<String> {
        let list = list.clone().unwrap_or_default();
        for (j, w) in list.iter().enumerate() {
            let t = w.trim();
            if t.is_empty() || t.len() > 40 || t.chars().any(char::is_control) {
                p.push(loc.problem(
                    &format!("{at}.{key}[{j}]"),
                    format!("{who}: {w:?} is not a word a station sends; use 1 to 40 printable characters"),
                ));
            } else if t.parse::<f64>().is_ok() {
                p.push(loc.problem(
                    &format!("{at}.{key}[{j}]"),
                    format!("{who}: \"{t}\" is a number; numbers are counts (1 nonconforming, 0 conforming) and cannot be remapped"),
                ));
            }
        }
        list.iter().map(|w| w.trim().to_string()).collect()
    };
    let conforming = words("conforming", &c.conforming);
    let nonconforming = words("nonconforming", &c.nonconforming);
    for (j, w) in nonconforming.iter().enumerate() {
        if conforming.iter().any(|x| x.eq_ignore_ascii_case(w)) {
            p.push(loc.problem(
                &format!("{at}.nonconforming[{j}]"),
                format!("{who}: \"{w}\" is both a conforming and a nonconforming word"),
            ));
        }
    }
    Some(AttributeSettings {
        chart,
        conforming,
        nonconforming,
        below_severity: c.below_limit_severity,
    })
}

impl Characteristic {
    /// What `check` should say about the configuration that is valid but doubtful: zone and
    /// pattern rules on an attribute chart whose counts are too small for the normal
    /// approximation they assume.
    pub fn warnings(&self) -> Vec<String> {
        let mut out = Vec::new();
        let Some(a) = &self.attribute else {
            return out;
        };
        let normal_rules: Vec<&str> = self
            .rules
            .rules
            .iter()
            .filter(|r| {
                !matches!(
                    r.kind,
                    crate::rules::config::RuleKind::BeyondLimits { .. }
                        | crate::rules::config::RuleKind::OneSideRun { .. }
                        | crate::rules::config::RuleKind::SteadyTrend { .. }
                        | crate::rules::config::RuleKind::StaleFeed { .. }
                )
            })
            .map(|r| r.id.as_str())
            .collect();
        if normal_rules.is_empty() {
            return out;
        }
        let expected = self.limits.as_ref().map(|l| match a.chart {
            AttributeChart::P => l.location.center * l.subgroup_size as f64,
            AttributeChart::U => l.location.center * l.subgroup_size as f64,
            _ => l.location.center,
        });
        let what = match a.chart {
            AttributeChart::P | AttributeChart::Np => "n·p̄",
            _ => "the expected count per subgroup",
        };
        match expected {
            Some(e) if e < 5.0 => out.push(format!(
                "characteristic \"{}\": the rules {} read zones or patterns of the {} chart, which assume a nearly normal statistic; {what} is {} here, below about 5 (common practice), so their false-alarm rates are not what their names promise. Prefer beyond-limits, one-side-run and steady-trend, or larger subgroups",
                self.id,
                normal_rules.join(", "),
                a.chart.name(),
                crate::format::fixed(e, 2)
            )),
            Some(_) => {}
            None => out.push(format!(
                "characteristic \"{}\": the rules {} read zones or patterns of the {} chart, which assume a nearly normal statistic; with no limits yet it cannot be told whether {what} reaches about 5 (common practice). Run check again once the limits are learned",
                self.id,
                normal_rules.join(", "),
                a.chart.name()
            )),
        }
        out
    }
}

/// Validates every `[[characteristic]]`; each problem goes to `p` with its path.
pub(super) fn build_characteristics(
    raw: &RawConfig,
    learned_limits_dir: Option<&Path>,
    resolve: &impl Fn(&str) -> PathBuf,
    loc: &Locator,
    p: &mut Vec<Problem>,
) -> Vec<std::sync::Arc<Characteristic>> {
    let mut ids = HashSet::new();
    let mut chars = Vec::new();
    let mut sets: std::collections::HashMap<String, std::sync::Arc<RuleSet>> = Default::default();
    for (i, c) in raw.characteristic.iter().enumerate() {
        let at = format!("characteristic[{i}]");
        let who = format!("characteristic \"{}\"", c.id);
        if !valid_id(&c.id) {
            p.push(loc.problem(
                &format!("{at}.id"),
                format!(
                    "\"{}\" is not a valid identifier; use letters, digits, '-', '_' and '.'",
                    c.id
                ),
            ));
        } else if !ids.insert(c.id.clone()) {
            p.push(loc.problem(&format!("{at}.id"), format!("{who} is configured twice")));
        }
        if let Some(ch) = build_characteristic(c, &at, &who, &resolve, learned_limits_dir, loc, p) {
            if let Some(lp) = &ch.limits_path
                && let Some(other) = chars
                    .iter()
                    .find(|o: &&std::sync::Arc<Characteristic>| o.limits_path.as_ref() == Some(lp))
            {
                p.push(loc.problem(
                    &format!("{at}.limits"),
                    format!(
                        "{who}: its limits file {} is also characteristic \"{}\"'s; give each its own file name",
                        lp.display(),
                        other.id
                    ),
                ));
            }
            // One copy of each distinct rule set (a cell's characteristics mostly share a
            // preset): the evaluators share it too.
            let mut ch = ch;
            // Keyed by its text: rules hold numbers, which do not hash.
            let key = serde_json::to_string(&*ch.rules).unwrap_or_default();
            ch.rules = sets.entry(key).or_insert_with(|| ch.rules.clone()).clone();
            chars.push(std::sync::Arc::new(ch));
        }
    }
    chars
}
