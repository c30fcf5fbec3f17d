//! The engine of a cell: for every characteristic, reading checks, subgroup assembly, limits
//! (stored, or learned from a baseline), the run rules, and what to record and tell.
//!
//! Pure: no I/O, no clock. The daemon archives each accepted reading first and then hands it
//! here with its sequence number; everything the engine decides comes back as [`Output`]s for
//! the shell to carry out (records to append, violations to alert on, limits files to write).
//! Its state is rebuilt after a restart from the archive's [`Tail`].
//!
//! * [`assembly`] — readings into subgroups: by count, by time window, by part id, with a
//!   maximum wait.

pub mod assembly;

use std::collections::BTreeMap;
use std::path::PathBuf;

use serde::{Deserialize, Serialize};

use crate::archive::record::{PendingReading, Record, SubgroupSummary, Tail};
use crate::config::{Characteristic, Config};
use crate::format::{fixed, num};
use crate::limits_file::StoredLimits;
use crate::rules::Violation;
use crate::rules::point::{ChartBasis, PointEvaluator, PointState};
use crate::rules::reading::{Reading, ReadingBasis, ReadingEvaluator, ReadingState};
use crate::stats::study;
use crate::stats::variables::VariablesChart;
use crate::stats::{mean, range, sample_sd};
use assembly::{Assembled, Assembler};

/// A reading as a source delivers it, before it is checked.
#[derive(Debug, Clone, PartialEq)]
pub struct Incoming {
    pub source: String,
    pub characteristic: String,
    pub value: f64,
    pub unit: Option<String>,
    pub source_time_ms: Option<i64>,
    /// The source's time is too far from the arrival to be trusted: kept in the record, but
    /// the arrival time orders the reading.
    pub source_time_ignored: bool,
    pub arrival_ms: i64,
    pub part: Option<String>,
    pub source_key: Option<String>,
    /// The word a pass/fail station sent, when it sent one instead of a number: the engine
    /// maps it to 1 (nonconforming) or 0 under the characteristic's word lists
    /// ([`Engine::admit`]); until then `value` is not a number.
    pub word: Option<String>,
    /// Units inspected, for a message reporting a whole batch (`value` the count found).
    pub inspected: Option<f64>,
    /// The message as received (topic and first bytes), for the record should the engine
    /// reject what it carries; not archived with an accepted reading.
    pub sent: Option<String>,
}

impl Incoming {
    /// When it was measured: the source's time if it gave one it can be trusted with, else the
    /// arrival.
    pub fn time_ms(&self) -> i64 {
        match self.source_time_ms {
            Some(t) if !self.source_time_ignored => t,
            _ => self.arrival_ms,
        }
    }

    /// The reading an archived `reading-accepted` record holds (the inverse of
    /// [`Incoming::record`]); None for any other record.
    pub fn from_record(r: Record) -> Option<Incoming> {
        match r {
            Record::ReadingAccepted {
                source,
                characteristic,
                value,
                unit,
                source_time_ms,
                source_time_ignored,
                arrival_ms,
                part,
                source_key,
                word,
                inspected,
            } => Some(Incoming {
                source,
                characteristic,
                value,
                unit,
                source_time_ms,
                source_time_ignored,
                arrival_ms,
                part,
                source_key,
                word,
                inspected,
                sent: None,
            }),
            _ => None,
        }
    }

    /// What the source sent, for the record of a rejected reading: the word, the number, or
    /// a batch's count with its units inspected.
    pub fn as_sent(&self) -> String {
        if let Some(s) = &self.sent {
            return s.clone();
        }
        let v = match &self.word {
            Some(w) => w.chars().take(120).collect(),
            None => crate::format::plain(self.value),
        };
        match self.inspected {
            Some(n) => format!("{v} of {} inspected", crate::format::plain(n)),
            None => v,
        }
    }

    /// The record that archives it.
    pub fn record(&self) -> Record {
        Record::ReadingAccepted {
            source: self.source.clone(),
            characteristic: self.characteristic.clone(),
            value: self.value,
            unit: self.unit.clone(),
            source_time_ms: self.source_time_ms,
            source_time_ignored: self.source_time_ignored,
            arrival_ms: self.arrival_ms,
            part: self.part.clone(),
            source_key: self.source_key.clone(),
            word: self.word.clone(),
            inspected: self.inspected,
        }
    }
}

/// How loud a log line is.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Level {
    Info,
    Warn,
}

/// What the engine asks the shell to do.
#[derive(Debug, Clone, PartialEq)]
pub enum Output {
    /// Append to the archive.
    Record(Record),
    /// A rule fired (it is also in an archived record): for the alert router.
    Violation {
        characteristic: String,
        violation: Violation,
    },
    /// Store learned limits in this file.
    WriteLimits {
        path: PathBuf,
        limits: Box<StoredLimits>,
    },
    /// Tell people, in the log.
    Log {
        level: Level,
        characteristic: String,
        message: String,
    },
    /// A subgroup was checked (for the console and the status).
    Checked {
        characteristic: String,
        subgroup: SubgroupSummary,
        /// The causes that fired, in words (`beyond-limits (location, up)`).
        fired: Vec<String>,
        learning: bool,
        /// Checked against provisional (learned, unapproved) limits.
        provisional: bool,
        /// Decimals of the characteristic's figures.
        decimals: usize,
    },
}

fn alert_record(e: crate::alerts::Event) -> Output {
    Output::Record(Record::Alert {
        alert_id: e.alert_id,
        characteristic: e.characteristic,
        event: e.event,
    })
}

/// Why limits could not be approved.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum ApproveError {
    #[error("no characteristic is called \"{0}\"")]
    Unknown(String),
    #[error(
        "\"{id}\" is still learning its limits ({have} of {need} baseline subgroups); there is nothing to approve yet"
    )]
    Learning {
        id: String,
        have: usize,
        need: usize,
    },
    #[error("the limits of \"{id}\" were already approved by {by} at {at}")]
    Already { id: String, by: String, at: String },
    #[error(
        "the limits of \"{id}\" are not provisional: they come from {origin} ({computed_at}); only limits the daemon learned need approval"
    )]
    NotProvisional {
        id: String,
        origin: String,
        computed_at: String,
    },
    #[error("{0}")]
    BadText(String),
}

/// Subgroups between saved engine states (and at every learning subgroup).
/// A restart replays the subgroups after the last saved state from the archive's tail, so this
/// must stay within the tail's 30 subgroups; the state is a JSON value, the costliest thing the
/// engine does per subgroup, so it is not saved more often than needed.
pub const SAVE_EVERY: u64 = 25;
const _: () = assert!(SAVE_EVERY < 30);

/// What one characteristic saves in the archive to resume after a restart.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
struct Saved {
    number: u64,
    last_individual: Option<f64>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    learning: Option<Vec<Vec<f64>>>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    points: Option<PointState>,
    reading: ReadingState,
    readings: u64,
}

enum Mode {
    Learning {
        baseline: Vec<Vec<f64>>,
    },
    Monitoring {
        limits: Box<StoredLimits>,
        points: Box<PointEvaluator>,
    },
}

struct CharEngine {
    /// Shared with the configuration (one copy per characteristic in the whole daemon).
    cfg: std::sync::Arc<Characteristic>,
    /// The last subgroups, oldest first (for charts and the status).
    recent: std::collections::VecDeque<SubgroupSummary>,
    asm: Assembler,
    mode: Mode,
    reading_rules: ReadingEvaluator,
    /// Subgroups plotted so far.
    number: u64,
    /// Readings accepted so far.
    readings: u64,
    last_individual: Option<f64>,
    /// The part of the latest reading, kept only while a reading rule fired on it (for the
    /// alert).
    last_part: Option<String>,
    /// The parts of the latest subgroup, kept only while a rule fired on it.
    last_parts: Vec<String>,
}

/// Subgroups kept per characteristic for charts and the status.
pub const RECENT: usize = 30;

/// One characteristic as the status, the outputs and the charts see it.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct CharView {
    pub id: String,
    pub name: String,
    pub unit: String,
    pub learning: bool,
    /// Learning: subgroups collected and needed.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub baseline: Option<(usize, usize)>,
    /// Where the limits in force came from, and whether they are provisional.
    #[serde(default)]
    pub limits: LimitsState,
    pub standing: crate::alerts::Standing,
    /// The last subgroups, oldest first.
    pub recent: Vec<SubgroupSummary>,
    /// Location limits at the nominal subgroup size.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub location: Option<crate::stats::Limits>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub spec: Option<crate::stats::capability::Spec>,
    pub readings: u64,
    /// Decimals of the characteristic's figures, where known (configured, or from its limits).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub decimals: Option<usize>,
    /// The chart's basis (limits for every subgroup size), for drawing.
    #[serde(skip)]
    pub basis: Option<crate::rules::point::ChartBasis>,
    /// Zone rules (points beyond 1σ or 2σ) are on: charts draw those lines.
    #[serde(skip)]
    pub zones: bool,
}

/// Where a characteristic's limits come from.
#[derive(Debug, Clone, PartialEq, Default, serde::Serialize, serde::Deserialize)]
#[serde(tag = "state", rename_all = "kebab-case")]
pub enum LimitsState {
    /// No limits yet: collecting the baseline.
    #[default]
    Learning,
    /// Learned by the daemon and not yet approved: alerts are at most `cap`.
    Provisional {
        learned_at: String,
        cap: crate::rules::Severity,
    },
    /// Learned and approved by an engineer.
    Approved { by: String, at: String },
    /// From a limits file an engineer's study wrote.
    Stored { source: String, computed_at: String },
}

impl LimitsState {
    /// Plain words: "provisional (learned 2026-…, not yet approved; alerts at most warn)".
    pub fn words(&self) -> String {
        match self {
            LimitsState::Learning => "none yet (learning)".into(),
            LimitsState::Provisional { learned_at, cap } => format!(
                "PROVISIONAL: learned {learned_at}, not yet approved; alerts at most {}",
                cap.name()
            ),
            LimitsState::Approved { by, at } => format!("learned, approved by {by} at {at}"),
            LimitsState::Stored {
                source,
                computed_at,
            } => format!("from a study of {source} ({computed_at})"),
        }
    }
}

/// The engine of a whole cell.
pub struct Engine {
    chars: BTreeMap<String, CharEngine>,
    alerts: crate::alerts::Book,
    policies: crate::alerts::Policies,
}

impl Engine {
    /// A fresh engine for `cfg`; `now_ms` starts the stale-feed clocks.
    pub fn new(cfg: &Config, now_ms: i64) -> Self {
        let chars = cfg
            .characteristics
            .iter()
            .map(|c| (c.id.clone(), CharEngine::new(c.clone(), now_ms)))
            .collect();
        Engine {
            chars,
            alerts: crate::alerts::Book::default(),
            policies: cfg.alerts.policies,
        }
    }

    /// Takes a new configuration. A characteristic whose configuration (limits, rules,
    /// grouping, spec, ...) did not change keeps its state; a changed or new one starts afresh
    /// (rebuilt from `tail` where it has history); a removed one is dropped. Returns what changed,
    /// in words.
    pub fn reconfigure(&mut self, cfg: &Config, tail: &Tail, now_ms: i64) -> Vec<String> {
        let mut notes = Vec::new();
        self.policies = cfg.alerts.policies;
        let mut next = BTreeMap::new();
        for c in &cfg.characteristics {
            match self.chars.remove(&c.id) {
                Some(mut old) if old.cfg == *c => {
                    // The same configuration: keep the state, and share the new copy so that
                    // only one is held.
                    old.cfg = c.clone();
                    next.insert(c.id.clone(), old);
                }
                old => {
                    let mut fresh = CharEngine::new(c.clone(), now_ms);
                    if let Some(t) = tail.characteristics.get(&c.id) {
                        let _ = fresh.restore(t);
                    }
                    notes.push(if old.is_some() {
                        format!(
                            "{}: configuration changed; its rules start from the recent subgroups",
                            c.id
                        )
                    } else {
                        format!("{}: added", c.id)
                    });
                    next.insert(c.id.clone(), fresh);
                }
            }
        }
        for id in self.chars.keys() {
            notes.push(format!("{id}: removed"));
        }
        self.chars = next;
        notes
    }

    /// The characteristics, in order, and whether each is learning its limits.
    pub fn characteristics(&self) -> Vec<(String, bool)> {
        self.chars
            .iter()
            .map(|(id, c)| (id.clone(), matches!(c.mode, Mode::Learning { .. })))
            .collect()
    }

    /// Reads a word a pass/fail station sent into its count (1 nonconforming, 0 conforming)
    /// under the characteristic's word lists, then [`Engine::check`]s the reading. The error
    /// is the reason it is rejected.
    pub fn admit(&self, inc: &mut Incoming) -> Result<(), String> {
        if let (Some(w), Some(c)) = (&inc.word, self.chars.get(&inc.characteristic))
            && let Some(a) = &c.cfg.attribute
        {
            inc.value = a.count_of(w)?;
        }
        self.check(inc)
    }

    /// Checks a reading before it is accepted: a known characteristic, a finite value inside
    /// the physically possible range, a part id where subgroups go by part. The error is the
    /// reason it is rejected.
    pub fn check(&self, inc: &Incoming) -> Result<(), String> {
        let Some(c) = self.chars.get(&inc.characteristic) else {
            return Err(format!(
                "no characteristic \"{}\" is configured",
                inc.characteristic
            ));
        };
        if matches!(c.cfg.grouping, crate::config::Grouping::Part { .. }) && inc.part.is_none() {
            return Err(format!(
                "{} forms subgroups by part, and the reading names no part",
                c.cfg.id
            ));
        }
        if let Some(a) = &c.cfg.attribute {
            return check_attribute(&c.cfg.id, a.chart, inc);
        }
        if let Some(w) = &inc.word {
            let clipped: String = w.chars().take(40).collect();
            return Err(format!("\"{clipped}\" is not a number"));
        }
        if let Some(n) = inc.inspected {
            return Err(format!(
                "a count of {} in {} units inspected is a batch result, and {} is a measured characteristic",
                num(inc.value),
                num(n),
                c.cfg.id
            ));
        }
        if !inc.value.is_finite() {
            return Err(format!("{} is not a finite reading", inc.value));
        }
        if let Some((lo, hi)) = c.cfg.valid
            && !(lo..=hi).contains(&inc.value)
        {
            return Err(format!(
                "{} is outside the possible range {} to {} of {}",
                num(inc.value),
                num(lo),
                num(hi),
                c.cfg.id
            ));
        }
        if let (Some(u), false) = (&inc.unit, c.cfg.unit.is_empty())
            && u != &c.cfg.unit
        {
            return Err(format!(
                "the unit \"{u}\" is not the characteristic's unit \"{}\"",
                c.cfg.unit
            ));
        }
        if matches!(c.cfg.grouping, crate::config::Grouping::Part { .. }) && inc.part.is_none() {
            return Err(format!(
                "{} forms subgroups by part, and the reading names no part",
                c.cfg.id
            ));
        }
        Ok(())
    }

    /// Takes an accepted reading, already archived as record `seq`.
    pub fn accept(&mut self, seq: u64, inc: &Incoming) -> Vec<Output> {
        let Some(c) = self.chars.get_mut(&inc.characteristic) else {
            return Vec::new();
        };
        let mut out = c.accept(seq, inc);
        let cfg = c.cfg.clone();
        self.follow(
            &inc.characteristic,
            cfg.reaction_plan.as_deref(),
            &mut out,
            Some(seq),
            inc.arrival_ms,
        );
        out
    }

    /// The earliest time at which [`Engine::tick`] would do anything: a window closing, a
    /// maximum wait running out, a feed going silent, an alert to escalate. Before it a tick
    /// changes nothing, so a driver replaying history may leave ticks out until then.
    pub fn next_due_ms(&self) -> Option<i64> {
        self.chars
            .values()
            .filter_map(CharEngine::next_due_ms)
            .chain(self.alerts.next_due_ms(&self.policies))
            .min()
    }

    /// [`Engine::next_due_ms`] of one characteristic's subgroups and feed: after a reading of
    /// `characteristic`, what can have come nearer (with [`Engine::alerts_due_ms`] when it
    /// raised an alert).
    pub fn next_due_of(&self, characteristic: &str) -> Option<i64> {
        self.chars
            .get(characteristic)
            .and_then(CharEngine::next_due_ms)
    }

    /// When the first open alert escalates, if any will.
    pub fn alerts_due_ms(&self) -> Option<i64> {
        self.alerts.next_due_ms(&self.policies)
    }

    /// Applies time: windows that closed, maximum waits that ran out, feeds gone silent,
    /// alerts left unacknowledged too long.
    pub fn tick(&mut self, now_ms: i64) -> Vec<Output> {
        let mut out = Vec::new();
        // Most characteristics have nothing due at a tick: only those that do are followed
        // (the tick runs every second over every characteristic).
        let mut due: Vec<(std::sync::Arc<Characteristic>, Vec<Output>)> = Vec::new();
        for c in self.chars.values_mut() {
            let o = c.tick(now_ms);
            if !o.is_empty() {
                due.push((c.cfg.clone(), o));
            }
        }
        for (cfg, mut o) in due {
            self.follow(&cfg.id, cfg.reaction_plan.as_deref(), &mut o, None, now_ms);
            out.extend(o);
        }
        for e in self.alerts.tick(&self.policies, now_ms) {
            out.push(alert_record(e));
        }
        out
    }

    /// Drives the alert book from what a reading or a tick produced: violations raise or
    /// repeat alerts, passed checks let them go.
    fn follow(
        &mut self,
        characteristic: &str,
        plan: Option<&str>,
        out: &mut Vec<Output>,
        reading: Option<u64>,
        now_ms: i64,
    ) {
        use crate::alerts::Level;
        let mut events = Vec::new();
        let mut reading_fired: Vec<Violation> = Vec::new();
        let judged = out.iter().any(|o| {
            matches!(
                o,
                Output::Record(Record::Flagged { .. } | Record::SubgroupResult { .. })
            )
        });
        let (reading_part, subgroup_parts) = match self.chars.get(characteristic) {
            Some(c) if judged => (c.last_part.clone(), c.last_parts.clone()),
            _ => (None, Vec::new()),
        };
        for o in out.iter() {
            let Output::Record(r) = o else { continue };
            match r {
                Record::Flagged { violations, .. } => {
                    for v in violations {
                        // The reading's number, counted per characteristic: the same feed
                        // gives the same id on every run (an archive sequence number would not).
                        let at = match (reading, v.points.last()) {
                            (Some(_), Some(p)) => format!("r{}", p.number),
                            _ => format!("t{now_ms}"),
                        };
                        let parts: Vec<String> = if reading.is_some() {
                            reading_part.iter().cloned().collect()
                        } else {
                            Vec::new()
                        };
                        if reading.is_some() {
                            reading_fired.push(v.clone());
                        }
                        events.extend(self.alerts.fired(
                            characteristic,
                            v,
                            Level::Reading,
                            &at,
                            &parts,
                            plan,
                            now_ms,
                        ));
                    }
                }
                Record::SubgroupResult {
                    subgroup,
                    violations,
                    ..
                } => {
                    let at = subgroup.number.to_string();
                    for v in violations {
                        events.extend(self.alerts.fired(
                            characteristic,
                            v,
                            Level::Subgroup,
                            &at,
                            &subgroup_parts,
                            plan,
                            now_ms,
                        ));
                    }
                    let fired: Vec<&Violation> = violations.iter().collect();
                    events.extend(self.alerts.checked(
                        characteristic,
                        Level::Subgroup,
                        &fired,
                        &self.policies,
                        now_ms,
                    ));
                }
                _ => {}
            }
        }
        if reading.is_some() {
            let fired: Vec<&Violation> = reading_fired.iter().collect();
            events.extend(self.alerts.checked(
                characteristic,
                Level::Reading,
                &fired,
                &self.policies,
                now_ms,
            ));
        }
        out.extend(events.into_iter().map(alert_record));
    }

    /// Approves the provisional limits of `characteristic`: recorded with who and when, written
    /// to its limits file, and from then on its alerts take their rules' own severities.
    pub fn approve(
        &mut self,
        characteristic: &str,
        by: &str,
        note: Option<&str>,
        now_ms: i64,
    ) -> Result<Vec<Output>, ApproveError> {
        crate::alerts::check_ack_text(by, note)
            .map_err(|e| ApproveError::BadText(e.to_string()))?;
        let c = self
            .chars
            .get_mut(characteristic)
            .ok_or_else(|| ApproveError::Unknown(characteristic.to_string()))?;
        c.approve(by, note, now_ms)
    }

    /// Acknowledges an alert, or every unacknowledged alert of a characteristic.
    pub fn acknowledge(
        &mut self,
        target: &str,
        by: &str,
        note: Option<&str>,
        now_ms: i64,
    ) -> Result<(Vec<String>, Vec<Output>), crate::alerts::AckError> {
        let events = match self.alerts.acknowledge(target, by, note, now_ms) {
            // A characteristic that never had an alert is known, just quiet: say that.
            Err(crate::alerts::AckError::Unknown(t)) if self.chars.contains_key(&t) => {
                return Err(crate::alerts::AckError::NothingOpen(t));
            }
            other => other?,
        };
        let mut ids: Vec<String> = events.iter().map(|e| e.alert_id.clone()).collect();
        ids.dedup();
        let mut out: Vec<Output> = events.into_iter().map(alert_record).collect();
        // The acknowledgement is the corrective action: a CUSUM whose alert it was starts again
        // from its head start, and its state is saved at once so a restart agrees.
        let mut restarted: Vec<(String, String)> = Vec::new();
        for id in &ids {
            if let Some(a) = self.alerts.get(id)
                && !restarted.contains(&(a.characteristic.clone(), a.rule.clone()))
                && let Some(c) = self.chars.get_mut(&a.characteristic)
                && let Mode::Monitoring { points, .. } = &mut c.mode
                && points.restart_after_acknowledgement(&a.rule)
            {
                restarted.push((a.characteristic.clone(), a.rule.clone()));
            }
        }
        for (characteristic, rule) in restarted {
            if let Some(c) = self.chars.get(&characteristic) {
                out.push(Output::Record(c.saved_record()));
                out.push(Output::Log {
                    level: Level::Info,
                    characteristic,
                    message: format!(
                        "the {rule} sums start again from the head start after the acknowledgement (restart = \"on-acknowledge\")"
                    ),
                });
            }
        }
        Ok((ids, out))
    }

    /// An output delivered `version` of alert `id`.
    pub fn delivered(&mut self, output: &str, id: &str, version: u32) -> Option<Output> {
        self.alerts.delivered(output, id, version).map(alert_record)
    }

    /// Every alert.
    pub fn alerts(&self) -> &crate::alerts::Book {
        &self.alerts
    }

    /// Every characteristic, for the status and the outputs.
    pub fn view(&self) -> Vec<CharView> {
        self.chars.values().map(|c| self.view_char(c)).collect()
    }

    /// One characteristic, for the status and the outputs.
    pub fn view_of(&self, id: &str) -> Option<CharView> {
        self.chars.get(id).map(|c| self.view_char(c))
    }

    fn view_char(&self, c: &CharEngine) -> CharView {
        let learning = matches!(c.mode, Mode::Learning { .. });
        let alerts = self
            .alerts
            .by_characteristic
            .get(&c.cfg.id)
            .map(|l| l.as_slice())
            .unwrap_or(&[]);
        CharView {
            id: c.cfg.id.clone(),
            name: c.cfg.name.clone(),
            unit: c.cfg.unit.clone(),
            learning,
            baseline: match &c.mode {
                Mode::Learning { baseline } => Some((baseline.len(), c.cfg.baseline_subgroups)),
                Mode::Monitoring { .. } => None,
            },
            limits: match &c.mode {
                Mode::Learning { .. } => LimitsState::Learning,
                Mode::Monitoring { limits, .. } if limits.is_provisional() => {
                    LimitsState::Provisional {
                        learned_at: limits.provenance.computed_at.clone(),
                        cap: c.cfg.provisional_severity,
                    }
                }
                Mode::Monitoring { limits, .. } => match &limits.approved {
                    Some(a) => LimitsState::Approved {
                        by: a.by.clone(),
                        at: a.at.clone(),
                    },
                    None => LimitsState::Stored {
                        source: limits.provenance.source.clone(),
                        computed_at: limits.provenance.computed_at.clone(),
                    },
                },
            },
            standing: crate::alerts::standing(alerts.iter(), learning),
            recent: c.recent.iter().copied().collect(),
            location: match &c.mode {
                Mode::Monitoring { points, .. } => Some(points.basis().location),
                Mode::Learning { .. } => None,
            },
            spec: c.cfg.spec,
            readings: c.readings,
            decimals: match &c.mode {
                Mode::Monitoring { points, .. } => Some(points.basis().value_decimals()),
                Mode::Learning { .. } => c.cfg.decimals,
            },
            basis: match &c.mode {
                Mode::Monitoring { points, .. } => Some(points.basis().clone()),
                Mode::Learning { .. } => None,
            },
            zones: c.cfg.rules.has_zone_rules(),
        }
    }

    /// Rebuilds every characteristic's state from the archive's tail: waiting readings,
    /// learning progress, and rule state (saved state, then the subgroups after it).
    pub fn restore(&mut self, tail: &Tail) -> Vec<Output> {
        let mut out = Vec::new();
        for (id, c) in self.chars.iter_mut() {
            if let Some(t) = tail.characteristics.get(id) {
                out.extend(c.restore(t));
            }
        }
        self.alerts = crate::alerts::Book::default();
        for (id, t) in &tail.characteristics {
            if !t.alerts.is_empty() {
                self.alerts
                    .by_characteristic
                    .insert(id.clone(), std::sync::Arc::new(t.alerts.clone()));
            }
        }
        let open = self.alerts.active().count();
        if open > 0 {
            out.push(Output::Log {
                level: Level::Warn,
                characteristic: "-".into(),
                message: format!(
                    "{open} alert(s) still open from before the restart: {}",
                    self.alerts
                        .active()
                        .map(|a| a.id.as_str())
                        .collect::<Vec<_>>()
                        .join(", ")
                ),
            });
        }
        out
    }

    /// Records for every characteristic whose limits in force are not the ones the archive
    /// last recorded (`tail`): a first start, an engineer's new limits file, limits taken as
    /// stored with their reason. Called after a start and after a reload, so the record says
    /// which limits every verdict was made against.
    pub fn limits_records(&self, tail: &Tail) -> Vec<Output> {
        let mut out = Vec::new();
        for (id, c) in &self.chars {
            let Mode::Monitoring { limits, .. } = &c.mode else {
                continue;
            };
            let recorded = tail
                .characteristics
                .get(id)
                .and_then(|t| t.in_force.as_deref());
            if recorded == Some(&**limits) {
                continue;
            }
            let file = c.cfg.limits_path.as_ref().map(|p| p.display().to_string());
            let mut reason = match &file {
                Some(f) => format!("read from the limits file {f}"),
                None => "configured".to_string(),
            };
            if recorded.is_some() {
                reason.push_str(", replacing the limits recorded before");
            }
            if let Some(r) = &c.cfg.limits_reason {
                reason.push_str(&format!(
                    "; taken as stored (limits_policy = \"as-stored\"): {r}"
                ));
            }
            out.push(Output::Record(Record::LimitsInstalled {
                characteristic: id.clone(),
                old: recorded.map(|l| Box::new(l.clone())),
                new: limits.clone(),
                reason,
                file,
            }));
        }
        out
    }

    /// The state of every characteristic, as records to append (at shutdown, say).
    pub fn snapshot(&self) -> Vec<Record> {
        self.chars.values().map(CharEngine::saved_record).collect()
    }
}

impl CharEngine {
    fn new(cfg: std::sync::Arc<Characteristic>, now_ms: i64) -> Self {
        let asm = Assembler::new(cfg.grouping.clone(), cfg.max_wait_ms, cfg.on_timeout);
        let basis = reading_basis(&cfg);
        let reading_rules = ReadingEvaluator::new(&cfg.rules, basis, now_ms);
        let mode = match &cfg.limits {
            Some(l) => Mode::Monitoring {
                points: Box::new(PointEvaluator::new(&cfg.rules, basis_of(l, &cfg))),
                limits: Box::new(l.clone()),
            },
            None => Mode::Learning {
                baseline: Vec::new(),
            },
        };
        CharEngine {
            cfg,
            recent: std::collections::VecDeque::new(),
            asm,
            mode,
            reading_rules,
            number: 0,
            readings: 0,
            last_individual: None,
            last_part: None,
            last_parts: Vec::new(),
        }
    }

    fn accept(&mut self, seq: u64, inc: &Incoming) -> Vec<Output> {
        self.readings += 1;
        let mut out = Vec::new();
        let flagged = self.reading_rules.on_reading(Reading {
            number: self.readings,
            time_ms: inc.time_ms(),
            value: inc.value,
        });
        self.last_part = if flagged.is_empty() {
            None
        } else {
            inc.part.clone()
        };
        self.flag(&mut out, Some(seq), flagged);
        let pending = PendingReading {
            seq,
            value: inc.value,
            time_ms: inc.time_ms(),
            part: inc.part.clone(),
            inspected: inc.inspected,
        };
        for a in self.asm.push(pending) {
            self.assembled(a, &mut out);
        }
        out
    }

    fn next_due_ms(&self) -> Option<i64> {
        match (self.asm.next_due_ms(), self.reading_rules.next_due_ms()) {
            (Some(a), Some(b)) => Some(a.min(b)),
            (a, b) => a.or(b),
        }
    }

    fn tick(&mut self, now_ms: i64) -> Vec<Output> {
        let mut out = Vec::new();
        for a in self.asm.tick(now_ms) {
            self.assembled(a, &mut out);
        }
        let silent = self.reading_rules.on_tick(now_ms);
        self.flag(&mut out, None, silent);
        out
    }

    fn flag(&self, out: &mut Vec<Output>, reading: Option<u64>, violations: Vec<Violation>) {
        if violations.is_empty() {
            return;
        }
        for v in &violations {
            out.push(Output::Violation {
                characteristic: self.cfg.id.clone(),
                violation: v.clone(),
            });
        }
        out.push(Output::Record(Record::Flagged {
            characteristic: self.cfg.id.clone(),
            reading,
            violations,
        }));
    }

    fn assembled(&mut self, a: Assembled, out: &mut Vec<Output>) {
        let (readings, partial) = match a {
            Assembled::Complete { readings, partial } => (readings, partial),
            Assembled::Discarded { readings, reason } => {
                out.push(self.discard(&readings, reason));
                return;
            }
        };
        if let Some(a) = self.cfg.attribute.as_ref().map(|a| a.chart) {
            return self.assembled_attribute(a, readings, partial, out);
        }
        let values: Vec<f64> = readings.iter().map(|r| r.value).collect();
        let chart = self.chart();
        if chart != VariablesChart::Individuals && values.len() < 2 {
            let reason = format!(
                "a subgroup of {} reading cannot be evaluated on the {} chart",
                values.len(),
                chart.name()
            );
            out.push(self.discard(&readings, reason));
            return;
        }
        if chart == VariablesChart::Individuals && values.len() != 1 {
            // A time window or a wait produced several readings on an individuals chart: each
            // is a point of its own.
            for r in readings {
                self.assembled(
                    Assembled::Complete {
                        readings: vec![r],
                        partial,
                    },
                    out,
                );
            }
            return;
        }
        let time_ms = readings.last().map_or(0, |r| r.time_ms);
        let dispersion = match chart {
            VariablesChart::XbarR => Some(range(&values)),
            VariablesChart::XbarS => Some(sample_sd(&values)),
            VariablesChart::Individuals => {
                let d = self.last_individual.map(|p| (values[0] - p).abs());
                self.last_individual = Some(values[0]);
                d
            }
        };
        let summary = SubgroupSummary {
            number: 0,
            time_ms,
            n: values.len(),
            mean: mean(&values),
            dispersion,
            found: None,
            inspected: None,
        };
        self.judge(summary, values, &readings, partial, out);
    }

    /// A completed subgroup of an attribute characteristic: the count found in the units
    /// inspected, plotted as p, np, c or u.
    fn assembled_attribute(
        &mut self,
        a: crate::stats::attributes::AttributeChart,
        readings: Vec<PendingReading>,
        partial: bool,
        out: &mut Vec<Output>,
    ) {
        use crate::stats::attributes::{AttributeChart, AttributeSample};
        let found: f64 = readings.iter().map(|r| r.value).sum();
        let inspected: f64 = readings.iter().map(|r| r.inspected.unwrap_or(1.0)).sum();
        // np and c need the same number of units in every subgroup: the limits' (or the first
        // baseline subgroup's).
        if matches!(a, AttributeChart::Np | AttributeChart::C) {
            let nominal = match &self.mode {
                Mode::Monitoring { limits, .. } => Some(limits.subgroup_size as f64),
                Mode::Learning { baseline } => baseline.first().and_then(|b| b.get(1).copied()),
            };
            if let Some(n) = nominal
                && inspected != n
            {
                let reason = format!(
                    "the {} chart needs {} units inspected in every subgroup; this one has {}{}",
                    a.name(),
                    num(n),
                    num(inspected),
                    if partial {
                        " (cut short by its maximum wait)"
                    } else {
                        ""
                    }
                );
                out.push(self.discard(&readings, reason));
                return;
            }
        }
        let time_ms = readings.last().map_or(0, |r| r.time_ms);
        let summary = SubgroupSummary {
            number: 0,
            time_ms,
            n: readings.len(),
            mean: a.plotted(&AttributeSample {
                count: found,
                size: inspected,
            }),
            dispersion: None,
            found: Some(found),
            inspected: Some(inspected),
        };
        self.judge(summary, vec![found, inspected], &readings, partial, out);
    }

    /// Checks a completed subgroup against the limits (or adds it to the baseline), and says
    /// so. `baseline` is what the learning keeps of it: the readings, or for an attribute
    /// chart the count found and the units inspected.
    ///
    /// A subgroup whose figures overflow (readings so large that their sum, spread or ratio is
    /// not a finite number) is discarded with the reason before it is numbered: its readings
    /// stay in the archive as they were accepted, and no figure that cannot be written reaches
    /// a record, the rules' state or a baseline.
    fn judge(
        &mut self,
        mut summary: SubgroupSummary,
        baseline_entry: Vec<f64>,
        readings: &[PendingReading],
        partial: bool,
        out: &mut Vec<Output>,
    ) {
        let reason = overflow_reason(&summary, readings).or_else(|| match &self.mode {
            Mode::Monitoring { points, .. } => limits_overflow(points.basis(), &summary),
            Mode::Learning { .. } => None,
        });
        if let Some(reason) = reason {
            out.push(Output::Log {
                level: Level::Warn,
                characteristic: self.cfg.id.clone(),
                message: format!("a subgroup was discarded: {reason}"),
            });
            out.push(self.discard(readings, reason));
            return;
        }
        self.number += 1;
        summary.number = self.number;
        let time_ms = summary.time_ms;
        let dispersion = summary.dispersion;
        let seqs: Vec<u64> = readings.iter().map(|r| r.seq).collect();
        self.remember(summary);
        let learning = matches!(self.mode, Mode::Learning { .. });
        let (location, disp_limits, violations) = match &mut self.mode {
            Mode::Monitoring { points, limits } => {
                let mut v = points.evaluate(&crate::rules::point::Plotted {
                    number: summary.number,
                    time_ms,
                    n: summary.n,
                    mean: summary.mean,
                    dispersion,
                    attribute: summary.found.zip(summary.inspected),
                });
                if limits.is_provisional() {
                    let cap = self.cfg.provisional_severity;
                    v = v.into_iter().map(|v| v.provisional(cap)).collect();
                }
                // A signal whose figures overflow (an EWMA a billion sigmas out on limits
                // near the largest double) cannot be stated in numbers: said, not recorded.
                v.retain(|v| {
                    let fine = v.statistic.is_finite() && v.limit.is_finite();
                    if !fine {
                        out.push(Output::Log {
                            level: Level::Warn,
                            characteristic: self.cfg.id.clone(),
                            message: format!(
                                "rule {} fired on subgroup {}, but its figures are not finite numbers; the signal is left out of the record",
                                v.rule, summary.number
                            ),
                        });
                    }
                    fine
                });
                let (location, dispersion) = limits_at(points.basis(), &summary);
                (Some(location), dispersion, v)
            }
            Mode::Learning { baseline } => {
                baseline.push(baseline_entry);
                (None, None, Vec::new())
            }
        };
        self.last_parts = if violations.is_empty() {
            Vec::new()
        } else {
            readings.iter().filter_map(|r| r.part.clone()).collect()
        };
        for v in &violations {
            out.push(Output::Violation {
                characteristic: self.cfg.id.clone(),
                violation: v.clone(),
            });
        }
        let decimals = match &self.mode {
            Mode::Monitoring { points, .. } => points.basis().value_decimals(),
            // Before there are limits, four decimals unless the config says otherwise.
            Mode::Learning { .. } => self.cfg.decimals.unwrap_or(4),
        };
        out.push(Output::Checked {
            characteristic: self.cfg.id.clone(),
            subgroup: summary,
            fired: violations
                .iter()
                .map(|v| match v.side {
                    Some(side) => format!("{} ({}, {})", v.rule, v.chart.words(), side.words()),
                    None => format!("{} ({})", v.rule, v.chart.words()),
                })
                .collect(),
            learning,
            provisional: matches!(&self.mode, Mode::Monitoring { limits, .. } if limits.is_provisional()),
            decimals,
        });
        out.push(Output::Record(Record::SubgroupResult {
            characteristic: self.cfg.id.clone(),
            subgroup: summary,
            readings: seqs,
            partial,
            location,
            dispersion: disp_limits,
            violations,
        }));
        if learning {
            self.maybe_learn(time_ms, out);
        }
        if learning || self.number.is_multiple_of(SAVE_EVERY) {
            out.push(Output::Record(self.saved_record()));
        }
    }

    fn remember(&mut self, s: SubgroupSummary) {
        if self.recent.len() == RECENT {
            self.recent.pop_front();
        }
        self.recent.push_back(s);
    }

    fn discard(&self, readings: &[PendingReading], reason: String) -> Output {
        Output::Record(Record::SubgroupDiscarded {
            characteristic: self.cfg.id.clone(),
            readings: readings.iter().map(|r| r.seq).collect(),
            reason,
        })
    }

    /// The variables chart (only asked of measured characteristics).
    fn chart(&self) -> VariablesChart {
        let kind = match &self.mode {
            Mode::Monitoring { limits, .. } => limits.chart,
            Mode::Learning { .. } => self.cfg.chart,
        };
        kind.variables().unwrap_or(VariablesChart::XbarR)
    }

    /// With a full baseline, runs the study (automatic exclusion) and installs provisional
    /// limits; on failure keeps the newest subgroups and tries again with the next.
    fn maybe_learn(&mut self, time_ms: i64, out: &mut Vec<Output>) {
        let Mode::Learning { baseline } = &mut self.mode else {
            return;
        };
        if baseline.len() < self.cfg.baseline_subgroups {
            return;
        }
        if let Some(a) = self.cfg.attribute.as_ref().map(|a| a.chart) {
            return self.learn_attribute(a, time_ms, out);
        }
        let Some(chart) = self.cfg.chart.variables() else {
            return;
        };
        let opts = crate::stats::learning::POLICY.options(chart);
        match study::run(baseline, &opts) {
            Ok(s) => {
                let when = humantime::format_rfc3339_seconds(
                    std::time::UNIX_EPOCH + std::time::Duration::from_millis(time_ms.max(0) as u64),
                )
                .to_string();
                let unit = (!self.cfg.unit.is_empty()).then(|| self.cfg.unit.clone());
                let mut limits = StoredLimits::from_study(
                    &s,
                    &self.cfg.id,
                    unit,
                    self.cfg.spec,
                    "learning",
                    &when,
                );
                limits.provenance.provisional = true;
                let d = basis_of(&limits, &self.cfg).decimals();
                let u = if self.cfg.unit.is_empty() {
                    String::new()
                } else {
                    format!(" {}", self.cfg.unit)
                };
                let message = format!(
                    "provisional limits learned from {} subgroups ({} excluded): centre {}{u}, limits {}{u} to {}{u}, sigma {}{u}. Until an engineer approves them (linewarden approve {} --by NAME) alerts on them are at most {}",
                    s.subgroups_total,
                    s.excluded.len(),
                    fixed(limits.location.center, d),
                    fixed(limits.location.lcl, d),
                    fixed(limits.location.ucl, d),
                    fixed(limits.sigma.within, d + 1),
                    self.cfg.id,
                    self.cfg.provisional_severity.name(),
                );
                self.announce_learned(message, &s.warnings, limits, out);
            }
            Err(e) => self.not_learned(&e, out),
        }
    }

    /// Says and records limits just learned (`message`, with the study's `warnings`), and
    /// starts checking against them.
    fn announce_learned(
        &mut self,
        mut message: String,
        warnings: &[String],
        limits: StoredLimits,
        out: &mut Vec<Output>,
    ) {
        if let Err(problems) = limits.check("the learned limits") {
            return self.not_learned(&problems, out);
        }
        for w in warnings {
            message.push_str("; ");
            message.push_str(w);
        }
        out.push(Output::Log {
            level: Level::Warn,
            characteristic: self.cfg.id.clone(),
            message: message.clone(),
        });
        out.push(Output::Record(Record::LimitsInstalled {
            characteristic: self.cfg.id.clone(),
            old: None,
            new: Box::new(limits.clone()),
            reason: message,
            file: self
                .cfg
                .limits_path
                .as_ref()
                .map(|p| p.display().to_string()),
        }));
        self.install_learned(limits, out);
    }

    /// A full baseline that gives no limits yet: says why, and learning goes on with the
    /// newest subgroups.
    fn not_learned(&mut self, e: &dyn std::fmt::Display, out: &mut Vec<Output>) {
        let Mode::Learning { baseline } = &mut self.mode else {
            return;
        };
        out.push(Output::Log {
            level: Level::Warn,
            characteristic: self.cfg.id.clone(),
            message: format!(
                "the baseline of {} subgroups gives no limits yet ({e}); learning goes on with the newest subgroups",
                baseline.len()
            ),
        });
        baseline.remove(0);
    }

    /// [`CharEngine::maybe_learn`] for an attribute chart: the attribute study with automatic
    /// exclusion, at the baseline's most common sample size.
    fn learn_attribute(
        &mut self,
        a: crate::stats::attributes::AttributeChart,
        time_ms: i64,
        out: &mut Vec<Output>,
    ) {
        use crate::stats::attributes::AttributeSample;
        let Mode::Learning { baseline } = &mut self.mode else {
            return;
        };
        let samples: Vec<AttributeSample> = baseline
            .iter()
            .map(|b| AttributeSample {
                count: b.first().copied().unwrap_or(0.0),
                size: b.get(1).copied().unwrap_or(1.0),
            })
            .collect();
        // The nominal size: the one most subgroups have (all of them for np and c).
        let mut sizes: Vec<u64> = samples.iter().map(|s| s.size.round() as u64).collect();
        sizes.sort_unstable();
        let nominal = sizes
            .chunk_by(|x, y| x == y)
            .max_by_key(|c| c.len())
            .map_or(1, |c| c[0])
            .max(1) as usize;
        let policy = crate::stats::learning::POLICY;
        // One round of exclusion beyond the 3-sigma trial limits (the attribute study's), at
        // most a tenth of the baseline, as the policy says for variables.
        let result = crate::stats::attributes::study(a, &samples, &[], true, policy.rounds)
            .and_then(|s| {
                let most = (policy.max_fraction * s.samples_total as f64).floor() as usize;
                if s.excluded.len() > most {
                    Err(crate::stats::StatsError::BadParameter {
                        name: "subgroups beyond the trial limits",
                        value: s.excluded.len() as f64,
                        expected: "at most a tenth of the baseline (more means the baseline was not stable)",
                    })
                } else if s.parameter > 0.0 {
                    Ok(s)
                } else {
                    Err(crate::stats::StatsError::BadParameter {
                        name: "centre",
                        value: 0.0,
                        expected: "some nonconformities in the baseline (with none, the limits collapse to zero and every later find would signal)",
                    })
                }
            });
        match result {
            Ok(s) => {
                let when = crate::format::utc_ms(time_ms).replace(".000Z", "Z");
                let mut limits = StoredLimits::from_attribute_study(
                    &s,
                    nominal,
                    &self.cfg.id,
                    "learning",
                    &when,
                );
                limits.provenance.provisional = true;
                let basis = basis_of(&limits, &self.cfg);
                let clamped = if limits.location.lcl == 0.0 {
                    " (the lower limit is below zero and is set to zero: a subgroup cannot fall below it)"
                } else {
                    ""
                };
                let (lcl, ucl) = (
                    basis.with_unit_pub(limits.location.lcl),
                    basis.with_unit_pub(limits.location.ucl),
                );
                let message = format!(
                    "provisional limits learned from {} subgroups ({} excluded): {} chart, centre {}, limits {lcl} to {ucl} at {nominal} units inspected{clamped}. Until an engineer approves them (linewarden approve {} --by NAME) alerts on them are at most {}",
                    s.samples_total,
                    s.excluded.len(),
                    a.name(),
                    basis.with_unit_pub(limits.location.center),
                    self.cfg.id,
                    self.cfg.provisional_severity.name(),
                );
                self.announce_learned(message, &s.warnings, limits, out);
            }
            Err(e) => self.not_learned(&e, out),
        }
    }

    fn saved(&self) -> Saved {
        let (learning, points) = match &self.mode {
            Mode::Learning { baseline } => (Some(baseline.clone()), None),
            Mode::Monitoring { points, .. } => (None, Some(points.state().clone())),
        };
        Saved {
            number: self.number,
            last_individual: self.last_individual,
            learning,
            points,
            reading: self.reading_rules.state().clone(),
            readings: self.readings,
        }
    }

    fn saved_record(&self) -> Record {
        Record::EngineState {
            characteristic: self.cfg.id.clone(),
            state: crate::archive::record::StateText::of(&self.saved()),
        }
    }

    /// Approves the provisional limits in force.
    fn approve(
        &mut self,
        by: &str,
        note: Option<&str>,
        now_ms: i64,
    ) -> Result<Vec<Output>, ApproveError> {
        let id = self.cfg.id.clone();
        let limits = match &mut self.mode {
            Mode::Learning { baseline } => {
                return Err(ApproveError::Learning {
                    id,
                    have: baseline.len(),
                    need: self.cfg.baseline_subgroups,
                });
            }
            Mode::Monitoring { limits, .. } => limits,
        };
        if let Some(a) = &limits.approved {
            return Err(ApproveError::Already {
                id,
                by: a.by.clone(),
                at: a.at.clone(),
            });
        }
        if !limits.provenance.provisional {
            return Err(ApproveError::NotProvisional {
                id,
                origin: limits.provenance.source.clone(),
                computed_at: limits.provenance.computed_at.clone(),
            });
        }
        let approval = crate::limits_file::Approval {
            by: by.to_string(),
            at: crate::format::utc_ms(now_ms),
            note: note.map(str::to_string),
        };
        limits.approved = Some(approval.clone());
        let limits = (**limits).clone();
        let mut out = vec![
            Output::Record(Record::LimitsApproved {
                characteristic: id.clone(),
                approval,
                file: self
                    .cfg
                    .limits_path
                    .as_ref()
                    .map(|p| p.display().to_string()),
            }),
            Output::Log {
                level: Level::Info,
                characteristic: id,
                message: format!(
                    "the limits learned {} were approved by {by}; alerts now take their rules' own severities",
                    limits.provenance.computed_at
                ),
            },
        ];
        if let Some(path) = &self.cfg.limits_path {
            out.push(Output::WriteLimits {
                path: path.clone(),
                limits: Box::new(limits),
            });
        }
        Ok(out)
    }

    /// Starts monitoring with learned `limits`, asking for them to be written to the limits
    /// file (at learning, and again after a restart that found the file missing).
    fn install_learned(&mut self, limits: StoredLimits, out: &mut Vec<Output>) {
        if let Some(path) = &self.cfg.limits_path {
            out.push(Output::WriteLimits {
                path: path.clone(),
                limits: Box::new(limits.clone()),
            });
        }
        let points = PointEvaluator::new(&self.cfg.rules, basis_of(&limits, &self.cfg));
        self.mode = Mode::Monitoring {
            limits: Box::new(limits),
            points: Box::new(points),
        };
    }

    fn restore(&mut self, t: &crate::archive::record::CharacteristicTail) -> Vec<Output> {
        let mut out = Vec::new();
        // Limits learned before the restart whose file could not be written (or was lost): use
        // them from the archive rather than learning again, and try the file once more.
        // Only for the same file: pointing `limits` at a new file name learns afresh.
        if let (Mode::Learning { .. }, Some((file, l))) = (&self.mode, &t.installed)
            && l.chart == self.cfg.chart
            && self
                .cfg
                .limits_path
                .as_ref()
                .is_some_and(|p| p.display().to_string() == *file)
        {
            let limits = (**l).clone();
            out.push(Output::Log {
                level: Level::Warn,
                characteristic: self.cfg.id.clone(),
                message: format!(
                    "installed the limits learned before the restart from the archive ({}); their file {file} is missing",
                    limits.provenance.computed_at,
                ),
            });
            self.install_learned(limits, &mut out);
        }
        // Approved before the restart, but the file (still provisional) could not be rewritten:
        // the approval in the archive holds for the same limits.
        if let (Mode::Monitoring { limits, .. }, Some((file, l))) = (&mut self.mode, &t.installed)
            && limits.is_provisional()
            && l.approved.is_some()
            && self
                .cfg
                .limits_path
                .as_ref()
                .is_some_and(|p| p.display().to_string() == *file)
            && (StoredLimits {
                approved: None,
                ..(**l).clone()
            }) == **limits
        {
            limits.approved = l.approved.clone();
            let approved = (**limits).clone();
            if let Some(a) = &approved.approved {
                out.push(Output::Log {
                    level: Level::Warn,
                    characteristic: self.cfg.id.clone(),
                    message: format!(
                        "the limits file {file} does not carry the approval by {} at {} that the archive records; the approval holds, and the file is written again",
                        a.by, a.at
                    ),
                });
            }
            if let Some(path) = &self.cfg.limits_path {
                out.push(Output::WriteLimits {
                    path: path.clone(),
                    limits: Box::new(approved),
                });
            }
        }
        self.asm.restore(t.pending.iter().cloned());
        self.recent = t.recent.iter().rev().take(RECENT).rev().copied().collect();
        let saved: Option<Saved> = t.engine.as_ref().and_then(|(_, v)| v.read());
        let mut replay_from = 0;
        if let Some(s) = saved {
            self.number = s.number;
            self.readings = s.readings;
            self.last_individual = s.last_individual;
            let basis = reading_basis(&self.cfg);
            self.reading_rules = ReadingEvaluator::resume(&self.cfg.rules, basis, s.reading);
            match (&mut self.mode, s.learning, s.points) {
                (Mode::Learning { baseline }, Some(b), _) => *baseline = b,
                (Mode::Monitoring { points, .. }, _, Some(ps)) => {
                    let (resumed, fits) =
                        PointEvaluator::resume(&self.cfg.rules, points.basis().clone(), ps);
                    if fits {
                        **points = resumed;
                    } else {
                        out.push(Output::Log {
                            level: Level::Warn,
                            characteristic: self.cfg.id.clone(),
                            message: "the rules changed since the last run; their state starts afresh from the recent subgroups".into(),
                        });
                    }
                }
                _ => {}
            }
            replay_from = s.number;
        }
        // Subgroups after the saved state go through the rules again (without alerting), so
        // a run that began before the restart goes on counting.
        if let Mode::Monitoring { points, .. } = &mut self.mode {
            for sg in t.recent.iter().filter(|s| s.number > replay_from) {
                let _ = points.evaluate(&crate::rules::point::Plotted {
                    number: sg.number,
                    time_ms: sg.time_ms,
                    n: sg.n,
                    mean: sg.mean,
                    dispersion: sg.dispersion,
                    attribute: sg.found.zip(sg.inspected),
                });
            }
        }
        if let Some(last) = t.recent.last() {
            self.number = self.number.max(last.number);
        }
        out.push(Output::Log {
            level: Level::Info,
            characteristic: self.cfg.id.clone(),
            message: format!(
                "resumed at subgroup {} with {} reading(s) waiting",
                self.number,
                self.asm.waiting().len()
            ),
        });
        out
    }
}

fn basis_of(l: &StoredLimits, c: &Characteristic) -> ChartBasis {
    let mut b = ChartBasis::from_stored(l);
    if b.unit.is_empty() {
        b.unit = c.unit.clone();
    }
    b.decimals = c.decimals;
    b.below_severity = c.attribute.as_ref().and_then(|a| a.below_severity);
    b
}

/// Why a subgroup's figures cannot be used, when one of them is not a finite number: the
/// figure, and the readings it came from (the first few, as numbers).
fn overflow_reason(s: &SubgroupSummary, readings: &[PendingReading]) -> Option<String> {
    let figures = [
        ("its mean", Some(s.mean)),
        ("its spread", s.dispersion),
        ("its count found", s.found),
        ("its units inspected", s.inspected),
    ];
    let (what, value) = figures
        .into_iter()
        .find_map(|(w, v)| v.filter(|v| !v.is_finite()).map(|v| (w, v)))?;
    let mut shown: Vec<String> = readings
        .iter()
        .take(5)
        .map(|r| match r.inspected {
            Some(n) => format!("{} in {}", num(r.value), num(n)),
            None => num(r.value),
        })
        .collect();
    if readings.len() > 5 {
        shown.push(format!("and {} more", readings.len() - 5));
    }
    Some(format!(
        "{what} is {value}, not a finite number: the readings ({}) are too large to compute with; they stay in the archive as received",
        shown.join(", ")
    ))
}

/// Why a subgroup cannot be judged when the limits in force at its size are not finite
/// numbers (an attribute subgroup of 1e-155 units puts its upper limit beyond any double).
fn limits_overflow(b: &ChartBasis, s: &SubgroupSummary) -> Option<String> {
    let (location, dispersion) = limits_at(b, s);
    let mut figures = vec![location.center, location.ucl, location.lcl];
    if let Some(d) = dispersion {
        figures.extend([d.center, d.ucl, d.lcl]);
    }
    figures.iter().any(|v| !v.is_finite()).then(|| {
        format!(
            "the limits at its size ({}) are not finite numbers, so it cannot be judged; its readings stay in the archive as received",
            match s.inspected {
                Some(n) => format!("{} units inspected", num(n)),
                None => format!("{} readings", s.n),
            }
        )
    })
}

/// The limits in force for subgroup `s`: an attribute chart's at its own number of units, a
/// measured chart's at its size; and the dispersion chart's.
fn limits_at(
    b: &ChartBasis,
    s: &SubgroupSummary,
) -> (crate::stats::Limits, Option<crate::stats::Limits>) {
    let location = match (b.attribute(), s.inspected) {
        (Some(a), Some(size)) => b.attribute_at(a, size).1,
        _ => b.location_for(s.n),
    };
    (location, b.dispersion_for(s.n))
}

/// The largest count or number of units taken exactly (2^53): a double holds every whole
/// number up to it, and sums of counts beyond it are no longer counts.
pub const MAX_COUNT: f64 = 9_007_199_254_740_992.0;

/// Checks a reading of an attribute characteristic: a whole count of zero or more; on p and
/// np one unit's result (0 or 1) or a batch's count no larger than the units inspected; a
/// batch of at least one unit.
fn check_attribute(
    id: &str,
    chart: crate::stats::attributes::AttributeChart,
    inc: &Incoming,
) -> Result<(), String> {
    use crate::stats::attributes::AttributeChart;
    let v = inc.value;
    let per_unit = matches!(chart, AttributeChart::P | AttributeChart::Np);
    let what = if per_unit {
        "nonconforming count"
    } else {
        "defect count"
    };
    if !v.is_finite() {
        return Err(format!("{v} is not a {what}"));
    }
    if v < 0.0 || v.fract() != 0.0 {
        return Err(format!(
            "{} is not a {what} of {id}: it must be a whole number of zero or more",
            num(v)
        ));
    }
    if v > MAX_COUNT {
        return Err(format!(
            "{} is not a {what} of {id}: it is beyond {}, the largest count kept exactly",
            num(v),
            num(MAX_COUNT)
        ));
    }
    if let Some(n) = inc.inspected
        && n > MAX_COUNT
    {
        return Err(format!(
            "{} units inspected is beyond {}, the largest number of units kept exactly",
            num(n),
            num(MAX_COUNT)
        ));
    }
    match inc.inspected {
        Some(n) if !(n.is_finite() && n > 0.0) => Err(format!(
            "{} units inspected is not a batch: it must be more than zero",
            num(n)
        )),
        Some(n) if per_unit && n.fract() != 0.0 => Err(format!(
            "{} units inspected is not a whole number of parts",
            num(n)
        )),
        Some(n) if per_unit && v > n => Err(format!(
            "{} nonconforming of {} inspected: a batch cannot have more nonconforming parts than it has parts",
            num(v),
            num(n)
        )),
        None if per_unit && v > 1.0 => Err(format!(
            "{} is not one part's result for {id}: 1 is nonconforming, 0 conforming (a batch's count needs its units inspected)",
            num(v)
        )),
        _ => Ok(()),
    }
}

/// What the reading rules judge a reading against: the specification, and the decimals of a
/// single reading (as configured, or from the stored sigma of single readings).
fn reading_basis(c: &Characteristic) -> ReadingBasis {
    ReadingBasis {
        spec: c.spec,
        unit: c.unit.clone(),
        decimals: c.decimals.or_else(|| {
            c.limits
                .as_ref()
                .map(|l| crate::format::decimals_for(l.sigma.within))
        }),
    }
}
