//! Rules on single readings: a part out of specification now, and the health of the gauge.
//!
//! These look at each reading as it arrives, before subgroups are formed: a bad part needs a
//! reaction whatever the chart says, and a stuck or silent gauge makes every chart meaningless.
//! The stale-feed rule needs the time without readings, so the driver calls
//! [`ReadingEvaluator::on_tick`] with the current time; nothing here reads a clock.

use serde::{Deserialize, Serialize};

use super::config::{Rule, RuleKind, RuleSet};
use super::{PointRef, Side, Violation};
use crate::format::num;
use crate::stats::capability::Spec;

/// One accepted reading.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct Reading {
    /// Reading number, counted per characteristic.
    pub number: u64,
    /// Milliseconds since the Unix epoch.
    pub time_ms: i64,
    pub value: f64,
}

/// What readings are judged against.
#[derive(Debug, Clone, PartialEq, Default, Serialize, Deserialize)]
pub struct ReadingBasis {
    pub spec: Option<Spec>,
    /// Unit, for messages ("" when unknown).
    pub unit: String,
    /// Decimals of the figures in messages (six significant digits when not known).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub decimals: Option<usize>,
}

/// Everything the reading rules remember; plain data.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ReadingState {
    /// The last reading, if any.
    pub last: Option<Reading>,
    /// The first reading of the current run of identical values.
    pub run_start: Option<Reading>,
    /// Length of the current run of identical values.
    pub repeats: u32,
    /// When the feed was last heard from (a reading, or the start of monitoring).
    pub last_heard_ms: i64,
    /// Whether the current silence has already been reported.
    pub silence_reported: bool,
    /// Readings collected towards the next resolution check.
    pub resolution_window: Vec<f64>,
}

/// Evaluates a rule set's reading rules.
#[derive(Debug, Clone, PartialEq)]
pub struct ReadingEvaluator {
    rules: Vec<Rule>,
    basis: ReadingBasis,
    state: ReadingState,
}

impl ReadingEvaluator {
    /// A fresh evaluator; `now_ms` is when monitoring starts (for the stale-feed rule).
    pub fn new(set: &RuleSet, basis: ReadingBasis, now_ms: i64) -> Self {
        ReadingEvaluator {
            rules: set.reading_rules().cloned().collect(),
            basis,
            state: ReadingState {
                last: None,
                run_start: None,
                repeats: 0,
                last_heard_ms: now_ms,
                silence_reported: false,
                resolution_window: Vec::new(),
            },
        }
    }

    /// An evaluator resuming from saved state.
    pub fn resume(set: &RuleSet, basis: ReadingBasis, state: ReadingState) -> Self {
        let mut e = ReadingEvaluator::new(set, basis, state.last_heard_ms);
        e.state = state;
        e
    }

    /// The state to save.
    pub fn state(&self) -> &ReadingState {
        &self.state
    }

    fn unit(&self, v: f64) -> String {
        let v = match self.basis.decimals {
            Some(d) => crate::format::fixed(v, d),
            None => num(v),
        };
        if self.basis.unit.is_empty() {
            v
        } else {
            format!("{v} {}", self.basis.unit)
        }
    }

    /// A reading and the limit it is compared with, never printing equal when they differ.
    fn unit_pair(&self, v: f64, limit: f64) -> (String, String) {
        let (a, b) = match self.basis.decimals {
            Some(d) => crate::format::fixed_pair(v, limit, d),
            None => crate::format::sig_pair(v, limit),
        };
        if self.basis.unit.is_empty() {
            (a, b)
        } else {
            (
                format!("{a} {}", self.basis.unit),
                format!("{b} {}", self.basis.unit),
            )
        }
    }

    /// Checks one reading.
    pub fn on_reading(&mut self, r: Reading) -> Vec<Violation> {
        let st = &mut self.state;
        if st.last.is_some_and(|l| l.value == r.value) {
            st.repeats += 1;
        } else {
            st.repeats = 1;
            st.run_start = Some(r);
        }
        st.last = Some(r);
        st.last_heard_ms = st.last_heard_ms.max(r.time_ms);
        st.silence_reported = false;
        let here = PointRef {
            number: r.number,
            time_ms: r.time_ms,
            value: r.value,
        };
        let mut out = Vec::new();
        let mut window_full = false;
        for rule in &self.rules {
            let v = |message: String,
                     points: Vec<PointRef>,
                     statistic: f64,
                     limit: f64,
                     side: Option<Side>| {
                Violation::new(rule, message, points, statistic, limit, side)
                    .on(super::Chart::Reading)
            };
            match &rule.kind {
                RuleKind::OutsideSpec => {
                    let Some(spec) = &self.basis.spec else {
                        continue;
                    };
                    if let Some(usl) = spec.usl.filter(|u| r.value > *u) {
                        out.push(v(
                            {
                                let (value, limit) = self.unit_pair(r.value, usl);
                                format!(
                                    "reading {value} is above the upper specification {limit}: this part is out of tolerance"
                                )
                            },
                            vec![here],
                            r.value,
                            usl,
                            Some(Side::Above),
                        ));
                    } else if let Some(lsl) = spec.lsl.filter(|l| r.value < *l) {
                        out.push(v(
                            {
                                let (value, limit) = self.unit_pair(r.value, lsl);
                                format!(
                                    "reading {value} is below the lower specification {limit}: this part is out of tolerance"
                                )
                            },
                            vec![here],
                            r.value,
                            lsl,
                            Some(Side::Below),
                        ));
                    }
                }
                RuleKind::StuckGauge { repeats } if self.state.repeats >= *repeats => {
                    let first = self.state.run_start.map(|s| PointRef {
                        number: s.number,
                        time_ms: s.time_ms,
                        value: s.value,
                    });
                    out.push(v(
                        format!(
                            "the gauge gave the same value {} {} times in a row; check that it is connected and its probe moves",
                            self.unit(r.value),
                            self.state.repeats
                        ),
                        first.into_iter().chain([here]).collect(),
                        f64::from(self.state.repeats),
                        f64::from(*repeats),
                        None,
                    ));
                }
                RuleKind::ImpossibleReading { min, max } if r.value < *min || r.value > *max => {
                    out.push(v(
                        format!(
                            "reading {} is outside the physically possible range {} to {}; check the gauge, its cable and its unit setting",
                            self.unit(r.value),
                            self.unit(*min),
                            self.unit(*max)
                        ),
                        vec![here],
                        r.value,
                        if r.value > *max { *max } else { *min },
                        Some(if r.value > *max { Side::Above } else { Side::Below }),
                    ));
                }
                RuleKind::CoarseResolution {
                    window,
                    fraction_of_tolerance,
                } => {
                    let Some(tolerance) = self.basis.spec.and_then(|s| Some(s.usl? - s.lsl?))
                    else {
                        continue;
                    };
                    self.state.resolution_window.push(r.value);
                    if self.state.resolution_window.len() < *window as usize {
                        continue;
                    }
                    window_full = true;
                    let finest = finest_step(&self.state.resolution_window);
                    let allowed = fraction_of_tolerance * tolerance;
                    if let Some(step) = finest.filter(|s| *s > allowed * (1.0 + 1e-9)) {
                        out.push(v(
                            format!(
                                "over the last {window} readings the gauge resolved no finer than {}, more than {} of the tolerance {}; a finer gauge is needed for these charts to mean anything",
                                self.unit(step),
                                percent(*fraction_of_tolerance),
                                self.unit(tolerance)
                            ),
                            vec![here],
                            step,
                            allowed,
                            None,
                        ));
                    }
                }
                _ => {}
            }
        }
        if window_full {
            self.state.resolution_window.clear();
        }
        out
    }

    /// The earliest time at which [`ReadingEvaluator::on_tick`] could report a silent feed
    /// (never later than the first millisecond it would); None when it cannot.
    pub fn next_due_ms(&self) -> Option<i64> {
        if self.state.silence_reported {
            return None;
        }
        self.rules
            .iter()
            .filter_map(|r| match r.kind {
                RuleKind::StaleFeed { max_silence_s } => Some(
                    self.state
                        .last_heard_ms
                        .saturating_add((max_silence_s * 1000.0).floor() as i64),
                ),
                _ => None,
            })
            .min()
    }

    /// Checks for silence at time `now_ms`. Reports each silence once.
    pub fn on_tick(&mut self, now_ms: i64) -> Vec<Violation> {
        let mut out = Vec::new();
        let silent_s = (now_ms - self.state.last_heard_ms) as f64 / 1000.0;
        for rule in &self.rules {
            if let RuleKind::StaleFeed { max_silence_s } = rule.kind
                && silent_s > max_silence_s
                && !self.state.silence_reported
            {
                out.push(Violation {
                    rule: rule.id.clone(),
                    severity: rule.severity,
                    message: format!(
                        "no reading for {} (allowed: {}); check the gauge, its cable and the feed",
                        duration_words(silent_s),
                        duration_words(max_silence_s)
                    ),
                    points: self
                        .state
                        .last
                        .map(|l| PointRef {
                            number: l.number,
                            time_ms: l.time_ms,
                            value: l.value,
                        })
                        .into_iter()
                        .collect(),
                    statistic: silent_s,
                    limit: max_silence_s,
                    side: None,
                    chart: super::Chart::Reading,
                    provisional: false,
                    capped_from: None,
                });
            }
        }
        if !out.is_empty() {
            self.state.silence_reported = true;
        }
        out
    }
}

/// The smallest gap between distinct values, or `None` with fewer than two distinct values.
fn finest_step(values: &[f64]) -> Option<f64> {
    let mut v = values.to_vec();
    v.sort_by(f64::total_cmp);
    v.dedup();
    v.windows(2).map(|w| w[1] - w[0]).min_by(f64::total_cmp)
}

fn percent(f: f64) -> String {
    format!("{}%", num(f * 100.0))
}

/// "90 s", "15 min", "2.5 h", "3.8 days".
pub fn duration_words(seconds: f64) -> String {
    let s = seconds.abs();
    if s < 120.0 {
        format!("{} s", crate::format::sig(seconds, 3))
    } else if s < 7200.0 {
        format!("{} min", crate::format::sig(seconds / 60.0, 3))
    } else if s < 172_800.0 {
        format!("{} h", crate::format::sig(seconds / 3600.0, 3))
    } else if s < 86_400.0 * 365.0 * 2.0 {
        format!("{} days", crate::format::sig(seconds / 86_400.0, 3))
    } else {
        format!(
            "{} years",
            crate::format::sig(seconds / (86_400.0 * 365.25), 3)
        )
    }
}
