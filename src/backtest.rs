//! Trying a rule set on history: the archived accepted readings, in their order and with their
//! times, through a candidate configuration's engine (the daemon's own code), writing nothing;
//! its signals set beside the ones the record holds, subgroup by subgroup.

use std::collections::{BTreeMap, BTreeSet, HashMap};

use serde::Serialize;

use crate::archive::reader::{Filter, Reader};
use crate::archive::record::Record;
use crate::config::Config;
use crate::engine::{Engine, Incoming, Output};
use crate::rules::arl::ArlOptions;

/// Where a rule looks: at each completed subgroup, or at each reading (outside the
/// specification, a stuck gauge, a feed gone silent).
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord, Serialize)]
#[serde(rename_all = "kebab-case")]
pub enum SignalLevel {
    Subgroup,
    Reading,
}

impl SignalLevel {
    pub fn name(self) -> &'static str {
        match self {
            SignalLevel::Subgroup => "subgroup",
            SignalLevel::Reading => "reading",
        }
    }
}

/// One subgroup or reading on which one rule signalled, in the record, under the candidate, or
/// both.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Signal {
    pub characteristic: String,
    pub rule: String,
    pub level: SignalLevel,
    /// The subgroup as the candidate (else the record) numbered it; none for a reading rule.
    pub subgroup: Option<u64>,
    /// What matches a signal across the two: the archive sequence number of the subgroup's
    /// first reading, or of the flagged reading. A feed found silent is matched by the next
    /// reading of the characteristic (u64::MAX when none followed in the window).
    pub first_reading: u64,
    pub time_ms: i64,
    pub in_record: bool,
    pub in_candidate: bool,
}

/// One rule of one characteristic.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct RuleResult {
    pub rule: String,
    pub level: SignalLevel,
    /// Subgroups (readings, for a reading rule) on which it signalled, in the record and
    /// under the candidate.
    pub record_signals: u64,
    pub candidate_signals: u64,
    /// Signalled in both; only under the candidate; only in the record.
    pub kept: u64,
    pub new: u64,
    pub gone: u64,
    /// The candidate's signals per 1,000 of its subgroups (readings, for a reading rule), and
    /// per day of the window.
    pub per_1000_subgroups: f64,
    pub per_day: Option<f64>,
    /// The in-control rate of this rule alone on the chart it runs on, per 1,000 subgroups,
    /// when it is a rule on plotted subgroups (the same as `theory.per_1000`).
    pub theoretical_per_1000: Option<f64>,
    /// That rate with how it was obtained (exact, approximate, simulated with its interval)
    /// and what it covers.
    pub theory: Option<crate::rules::theory::Rate>,
    pub first_ms: Option<i64>,
    pub last_ms: Option<i64>,
}

/// What the alerts of one side (the record, or the candidate) did in the window.
#[derive(Debug, Clone, Default, PartialEq, Serialize)]
pub struct AlertTally {
    /// Alerts raised, by severity (a repeat of an open alert is not a new alert).
    pub stops: u64,
    pub warnings: u64,
    pub notices: u64,
    /// Stop alerts left unacknowledged past the escalation time.
    pub escalated: u64,
    /// Time a stop alert stood unacknowledged (the stack light red), in milliseconds, the
    /// number of such stretches, and its share of the window.
    pub red_ms: i64,
    pub red_episodes: u64,
    pub red_share: f64,
}

/// The record's alerts beside the candidate's.
#[derive(Debug, Clone, Default, PartialEq, Serialize)]
pub struct AlertComparison {
    pub record: AlertTally,
    pub candidate: AlertTally,
}

/// One characteristic's backtest.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct CharacteristicResult {
    pub id: String,
    /// Subgroups the candidate formed, and the record holds, in the window.
    pub subgroups: u64,
    pub record_subgroups: u64,
    pub readings: u64,
    /// Readings the record rejected (they stay rejected), and accepted ones the candidate's
    /// checks would reject.
    pub rejected_in_record: u64,
    pub rejected_by_candidate: u64,
    pub rules: Vec<RuleResult>,
    pub alerts: AlertComparison,
}

/// The whole backtest.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Backtest {
    /// The window the readings span (first and last reading time).
    pub first_ms: Option<i64>,
    pub last_ms: Option<i64>,
    pub characteristics: Vec<CharacteristicResult>,
    /// The cell as a whole: red while any chosen characteristic has a stop alert standing
    /// unacknowledged.
    pub alerts: AlertComparison,
    #[serde(skip)]
    pub signals: Vec<Signal>,
}

#[derive(Debug, thiserror::Error)]
pub enum BacktestError {
    #[error(transparent)]
    Archive(#[from] crate::archive::ArchiveError),
    #[error("{0}")]
    Request(String),
}

/// A signal seen so far: (subgroup number, time, level, in record, in candidate).
#[derive(Clone, Copy)]
struct Seen {
    subgroup: Option<u64>,
    time_ms: i64,
    level: SignalLevel,
    in_record: bool,
    in_candidate: bool,
}

#[derive(Default)]
struct Tally {
    readings: u64,
    rejected_in_record: u64,
    rejected_by_candidate: u64,
    record_subgroups: u64,
    subgroups: u64,
    first_ms: Option<i64>,
    last_ms: Option<i64>,
    /// (rule, matching reading) → what was seen
    signals: BTreeMap<(String, u64), Seen>,
    /// Feed-silent flags waiting for the next reading to be matched by: (rule, time), for the
    /// record and for the candidate.
    silent: [Vec<(String, i64)>; 2],
}

impl Tally {
    fn mark(&mut self, rule: String, key: u64, seen: Seen, in_record: bool) {
        let e = self.signals.entry((rule, key)).or_insert(seen);
        if in_record {
            e.in_record = true;
        } else {
            e.subgroup = seen.subgroup.or(e.subgroup);
            e.in_candidate = true;
        }
    }

    /// Notes the rules that signalled on a subgroup (matched by its first reading), in the
    /// record or under the candidate. The candidate's numbering is the one kept.
    fn note(
        &mut self,
        subgroup: &crate::archive::record::SubgroupSummary,
        readings: &[u64],
        violations: Vec<crate::rules::Violation>,
        in_record: bool,
    ) {
        let Some(&first) = readings.first() else {
            return;
        };
        for v in violations {
            let seen = Seen {
                subgroup: Some(subgroup.number),
                time_ms: subgroup.time_ms,
                level: SignalLevel::Subgroup,
                in_record: false,
                in_candidate: false,
            };
            self.mark(v.rule, first, seen, in_record);
        }
    }

    /// Notes a flagged reading (matched by its sequence number), or a feed found silent
    /// (matched later, by the next reading).
    fn flagged(
        &mut self,
        reading: Option<u64>,
        violations: Vec<crate::rules::Violation>,
        at_ms: i64,
        in_record: bool,
    ) {
        for v in violations {
            let time = v.points.last().map_or(at_ms, |p| p.time_ms);
            match reading {
                Some(seq) => {
                    let seen = Seen {
                        subgroup: None,
                        time_ms: time,
                        level: SignalLevel::Reading,
                        in_record: false,
                        in_candidate: false,
                    };
                    self.mark(v.rule, seq, seen, in_record);
                }
                None => self.silent[usize::from(!in_record)].push((v.rule, at_ms)),
            }
        }
    }

    /// A reading of this characteristic arrived: the silent flags waiting are matched by it.
    fn settle_silent(&mut self, seq: u64) {
        for (side, in_record) in [(0, true), (1, false)] {
            for (rule, time) in std::mem::take(&mut self.silent[side]) {
                let seen = Seen {
                    subgroup: None,
                    time_ms: time,
                    level: SignalLevel::Reading,
                    in_record: false,
                    in_candidate: false,
                };
                self.mark(rule, seq, seen, in_record);
            }
        }
    }
}

/// Follows one side's alerts: the book, and how long a stop alert stood unacknowledged.
#[derive(Default)]
struct AlertWatch {
    book: crate::alerts::Book,
    per: HashMap<String, (AlertTally, Option<i64>)>,
    cell: AlertTally,
    cell_red_since: Option<i64>,
    /// Characteristics red now.
    red_now: usize,
}

impl AlertWatch {
    fn red(&self, characteristic: &str) -> bool {
        self.book
            .by_characteristic
            .get(characteristic)
            .is_some_and(|l| {
                l.iter().any(|a| {
                    a.severity == crate::rules::Severity::Stop
                        && a.status == crate::alerts::Status::Open
                })
            })
    }

    fn apply(&mut self, id: &str, characteristic: &str, event: &crate::alerts::AlertEvent) {
        use crate::alerts::AlertEvent;
        use crate::rules::Severity;
        let at = match event {
            AlertEvent::Raised { at_ms, .. }
            | AlertEvent::Repeated { at_ms, .. }
            | AlertEvent::Gone { at_ms }
            | AlertEvent::Acknowledged { at_ms, .. }
            | AlertEvent::Cleared { at_ms }
            | AlertEvent::Escalated { at_ms } => *at_ms,
            AlertEvent::Delivered { .. } => return,
        };
        let known = self
            .book
            .by_characteristic
            .get(characteristic)
            .is_some_and(|l| l.iter().any(|a| a.id == id));
        if !known && !matches!(event, AlertEvent::Raised { .. }) {
            return; // raised before the window
        }
        self.book.apply(id, characteristic, event);
        let red = self.red(characteristic);
        let (t, since) = self.per.entry(characteristic.to_string()).or_default();
        match event {
            AlertEvent::Raised { severity, .. } if !known => match severity {
                Severity::Stop => t.stops += 1,
                Severity::Warn => t.warnings += 1,
                Severity::Notice => t.notices += 1,
            },
            AlertEvent::Escalated { .. } => t.escalated += 1,
            _ => {}
        }
        match (red, *since) {
            (true, None) => {
                *since = Some(at);
                t.red_episodes += 1;
                self.red_now += 1;
            }
            (false, Some(s)) => {
                t.red_ms += at - s;
                *since = None;
                self.red_now -= 1;
            }
            _ => {}
        }
        match event {
            AlertEvent::Raised { severity, .. } if !known => match severity {
                Severity::Stop => self.cell.stops += 1,
                Severity::Warn => self.cell.warnings += 1,
                Severity::Notice => self.cell.notices += 1,
            },
            AlertEvent::Escalated { .. } => self.cell.escalated += 1,
            _ => {}
        }
        match (self.red_now > 0, self.cell_red_since) {
            (true, None) => {
                self.cell_red_since = Some(at);
                self.cell.red_episodes += 1;
            }
            (false, Some(s)) => {
                self.cell.red_ms += at - s;
                self.cell_red_since = None;
            }
            _ => {}
        }
    }

    /// Closes what is still red at the end of the window, and takes the tallies.
    fn finish(
        mut self,
        first_ms: Option<i64>,
        end_ms: Option<i64>,
    ) -> (HashMap<String, AlertTally>, AlertTally) {
        let span = match (first_ms, end_ms) {
            (Some(a), Some(b)) if b > a => Some((b - a) as f64),
            _ => None,
        };
        let close = |t: &mut AlertTally, since: Option<i64>| {
            if let (Some(s), Some(end)) = (since, end_ms) {
                t.red_ms += (end - s).max(0);
            }
            if let Some(span) = span {
                t.red_share = t.red_ms as f64 / span;
            }
        };
        let per = self
            .per
            .into_iter()
            .map(|(id, (mut t, since))| {
                close(&mut t, since);
                (id, t)
            })
            .collect();
        close(&mut self.cell, self.cell_red_since);
        (per, self.cell)
    }
}

/// Notes a subgroup result or a flagged reading, of the record (`in_record`) or of the
/// candidate, in its characteristic's tally; gives back any other record.
fn judged(
    tallies: &mut HashMap<String, Tally>,
    r: Record,
    in_record: bool,
    at_ms: i64,
) -> Option<Record> {
    match r {
        Record::SubgroupResult {
            characteristic,
            subgroup,
            readings,
            violations,
            ..
        } => {
            if let Some(t) = tallies.get_mut(&characteristic) {
                if in_record {
                    t.record_subgroups += 1;
                } else {
                    t.subgroups += 1;
                }
                t.note(&subgroup, &readings, violations, in_record);
            }
            None
        }
        Record::Flagged {
            characteristic,
            reading,
            violations,
        } => {
            if let Some(t) = tallies.get_mut(&characteristic) {
                t.flagged(reading, violations, at_ms, in_record);
            }
            None
        }
        other => Some(other),
    }
}

/// Runs the backtest of `cfg`'s characteristics `ids` (all of them when empty) over the
/// archive's records appended in `[since_ms, until_ms)`.
///
/// The candidate's engine starts fresh at the window's start (stored limits from its limits
/// files, learning from the window's first subgroups where it learns). The record's
/// acknowledgements are replayed at their times: an acknowledgement of any alert of a
/// characteristic acknowledges every open alert of it under the candidate, as the technician
/// who came to the cell then would have.
pub fn run(
    cfg: &Config,
    reader: &Reader,
    ids: &[String],
    since_ms: Option<i64>,
    until_ms: Option<i64>,
) -> Result<Backtest, BacktestError> {
    let chosen: BTreeSet<String> = if ids.is_empty() {
        cfg.characteristics.iter().map(|c| c.id.clone()).collect()
    } else {
        for id in ids {
            if !cfg.characteristics.iter().any(|c| &c.id == id) {
                return Err(BacktestError::Request(format!(
                    "--characteristic {id:?} is not in the candidate config {} (it has: {})",
                    cfg.path.display(),
                    cfg.characteristics
                        .iter()
                        .map(|c| c.id.as_str())
                        .collect::<Vec<_>>()
                        .join(", ")
                )));
            }
        }
        ids.iter().cloned().collect()
    };
    let filter = Filter {
        since_ms,
        until_ms,
        kinds: [
            "reading-accepted",
            "reading-rejected",
            "subgroup-result",
            "flagged",
            "alert",
        ]
        .map(String::from)
        .to_vec(),
        ..Filter::default()
    };
    let mut engine: Option<Engine> = None;
    let mut tallies: HashMap<String, Tally> = chosen
        .iter()
        .map(|id| (id.clone(), Tally::default()))
        .collect();
    let mut record_alerts = AlertWatch::default();
    let mut candidate_alerts = AlertWatch::default();
    let mut next_tick = i64::MIN;
    // The earliest time the candidate's engine has something to do at a tick (never later).
    let mut due: Option<i64> = None;
    let mut now_ms = i64::MIN;
    let mut first_ms: Option<i64> = None;
    let take = |tallies: &mut HashMap<String, Tally>,
                watch: &mut AlertWatch,
                outs: Vec<Output>,
                now_ms: i64| {
        for o in outs {
            let Output::Record(r) = o else { continue };
            let Some(r) = judged(tallies, r, false, now_ms) else {
                continue;
            };
            match r {
                Record::Alert {
                    alert_id,
                    characteristic,
                    event,
                } if tallies.contains_key(&characteristic) => {
                    watch.apply(&alert_id, &characteristic, &event);
                }
                _ => {}
            }
        }
    };
    for e in reader.iter(&filter) {
        let e = e?;
        if let Some(c) = e.record.characteristic()
            && !chosen.contains(c)
        {
            continue;
        }
        now_ms = now_ms.max(e.time_ms);
        let Some(record) = judged(&mut tallies, e.record, true, e.time_ms) else {
            continue;
        };
        match record {
            Record::ReadingAccepted { .. } => {
                let Some(inc) = Incoming::from_record(record) else {
                    continue;
                };
                let arrival_ms = inc.arrival_ms;
                now_ms = now_ms.max(arrival_ms);
                first_ms.get_or_insert(arrival_ms);
                let engine = engine.get_or_insert_with(|| {
                    let e = Engine::new(cfg, arrival_ms);
                    due = e.next_due_ms();
                    e
                });
                // Time moves as it did: the daemon's one-second tick, on the readings' clock.
                // A tick before anything is due changes nothing and is left out (at 1,000
                // characteristics it would cost more than the readings).
                if arrival_ms >= next_tick {
                    if due.is_some_and(|d| arrival_ms >= d) {
                        let outs = engine.tick(arrival_ms);
                        take(&mut tallies, &mut candidate_alerts, outs, arrival_ms);
                        due = engine.next_due_ms();
                    }
                    next_tick = arrival_ms + 1000;
                }
                let Some(t) = tallies.get_mut(&inc.characteristic) else {
                    continue;
                };
                t.settle_silent(e.seq);
                t.readings += 1;
                let time = inc.time_ms();
                t.first_ms = Some(t.first_ms.map_or(time, |f| f.min(time)));
                t.last_ms = Some(t.last_ms.map_or(time, |l| l.max(time)));
                let mut inc = inc;
                if engine.admit(&mut inc).is_err() {
                    t.rejected_by_candidate += 1;
                    continue;
                }
                let outs = engine.accept(e.seq, &inc);
                let raised = outs.iter().any(|o| {
                    matches!(
                        o,
                        Output::Record(Record::Alert {
                            event: crate::alerts::AlertEvent::Raised { .. },
                            ..
                        })
                    )
                });
                take(&mut tallies, &mut candidate_alerts, outs, arrival_ms);
                let sooner = engine
                    .next_due_of(&inc.characteristic)
                    .into_iter()
                    .chain(if raised { engine.alerts_due_ms() } else { None });
                due = due.into_iter().chain(sooner).min();
            }
            Record::ReadingRejected {
                characteristic: Some(c),
                ..
            } => {
                if let Some(t) = tallies.get_mut(&c) {
                    t.rejected_in_record += 1;
                }
            }
            Record::Alert {
                alert_id,
                characteristic,
                event,
            } => {
                if let crate::alerts::AlertEvent::Acknowledged { by, note, at_ms } = &event
                    && let Some(engine) = engine.as_mut()
                    && let Ok((_, outs)) =
                        engine.acknowledge(&characteristic, by, note.as_deref(), *at_ms)
                {
                    take(&mut tallies, &mut candidate_alerts, outs, *at_ms);
                }
                record_alerts.apply(&alert_id, &characteristic, &event);
            }
            _ => {}
        }
    }
    let silent: Vec<&String> = chosen
        .iter()
        .filter(|id| tallies.get(*id).is_none_or(|t| t.readings == 0))
        .collect();
    if !silent.is_empty() {
        return Err(BacktestError::Request(format!(
            "the archive holds no accepted readings of {} in the window asked for{}",
            silent
                .iter()
                .map(|s| s.as_str())
                .collect::<Vec<_>>()
                .join(", "),
            if silent.len() < chosen.len() {
                " (name the others with --characteristic to leave it out)"
            } else {
                ""
            }
        )));
    }
    // Silent feeds not followed by a reading in the window.
    for t in tallies.values_mut() {
        t.settle_silent(u64::MAX);
    }
    let end_ms = (now_ms > i64::MIN).then_some(now_ms);
    let (record_per, record_cell) = record_alerts.finish(first_ms, end_ms);
    let (candidate_per, candidate_cell) = candidate_alerts.finish(first_ms, end_ms);
    let mut theoretical: HashMap<String, Option<crate::rules::theory::Rate>> = HashMap::new();
    let mut out = Backtest {
        first_ms,
        last_ms: end_ms,
        characteristics: Vec::new(),
        alerts: AlertComparison {
            record: record_cell,
            candidate: candidate_cell,
        },
        signals: Vec::new(),
    };
    let empty = |t: Option<&AlertTally>| t.cloned().unwrap_or_default();
    for id in &chosen {
        let t = tallies.remove(id).unwrap_or_default();
        let c = cfg
            .characteristics
            .iter()
            .find(|c| &c.id == id)
            .expect("chosen from the config");
        let mut rules: Vec<(String, SignalLevel)> = c
            .rules
            .rules
            .iter()
            .map(|r| {
                let level = if r.kind.on_readings() {
                    SignalLevel::Reading
                } else {
                    SignalLevel::Subgroup
                };
                (r.id.clone(), level)
            })
            .collect();
        for ((rule, _), seen) in &t.signals {
            if !rules.iter().any(|(r, _)| r == rule) {
                rules.push((rule.clone(), seen.level));
            }
        }
        let days = match (t.first_ms, t.last_ms) {
            (Some(a), Some(b)) if b > a => Some((b - a) as f64 / 86_400_000.0),
            _ => None,
        };
        let mut results = Vec::new();
        for (rule, level) in rules {
            let mut r = RuleResult {
                rule: rule.clone(),
                level,
                record_signals: 0,
                candidate_signals: 0,
                kept: 0,
                new: 0,
                gone: 0,
                per_1000_subgroups: 0.0,
                per_day: None,
                theoretical_per_1000: None,
                theory: None,
                first_ms: None,
                last_ms: None,
            };
            for (&(ref rid, first), seen) in t
                .signals
                .range((rule.clone(), 0)..=(rule.clone(), u64::MAX))
            {
                let (rec, cand) = (seen.in_record, seen.in_candidate);
                r.record_signals += u64::from(rec);
                r.candidate_signals += u64::from(cand);
                match (rec, cand) {
                    (true, true) => r.kept += 1,
                    (false, true) => r.new += 1,
                    (true, false) => r.gone += 1,
                    _ => {}
                }
                let time = seen.time_ms;
                r.first_ms = Some(r.first_ms.map_or(time, |f| f.min(time)));
                r.last_ms = Some(r.last_ms.map_or(time, |l| l.max(time)));
                out.signals.push(Signal {
                    characteristic: id.clone(),
                    rule: rid.clone(),
                    level: seen.level,
                    subgroup: seen.subgroup,
                    first_reading: first,
                    time_ms: time,
                    in_record: rec,
                    in_candidate: cand,
                });
            }
            let base = match level {
                SignalLevel::Subgroup => t.subgroups,
                SignalLevel::Reading => t.readings,
            };
            if base > 0 {
                r.per_1000_subgroups = r.candidate_signals as f64 * 1000.0 / base as f64;
            }
            r.per_day = days.map(|d| r.candidate_signals as f64 / d);
            if level == SignalLevel::Subgroup
                && let Some(one) = c.rules.rules.iter().find(|x| x.id == rule)
                && let Some(basis) = theory_basis(c)
            {
                let key = format!(
                    "{}/{basis:?}",
                    serde_json::to_string(one).unwrap_or_default()
                );
                r.theory = theoretical
                    .entry(key)
                    .or_insert_with(|| {
                        crate::rules::theory::in_control(one, &basis, &ArlOptions::default())
                    })
                    .clone();
                r.theoretical_per_1000 = r.theory.as_ref().map(|t| t.per_1000);
            }
            results.push(r);
        }
        out.characteristics.push(CharacteristicResult {
            id: id.clone(),
            subgroups: t.subgroups,
            record_subgroups: t.record_subgroups,
            readings: t.readings,
            rejected_in_record: t.rejected_in_record,
            rejected_by_candidate: t.rejected_by_candidate,
            rules: results,
            alerts: AlertComparison {
                record: empty(record_per.get(id)),
                candidate: empty(candidate_per.get(id)),
            },
        });
    }
    out.signals.sort_by(|a, b| {
        (a.time_ms, &a.characteristic, &a.rule).cmp(&(b.time_ms, &b.characteristic, &b.rule))
    });
    Ok(out)
}

/// The chart a characteristic's rules run on, for their in-control rates: a measured chart
/// and its subgroup size, or an attribute chart with its stored limits (learned attribute
/// limits are not known before the candidate learns them).
fn theory_basis(c: &crate::config::Characteristic) -> Option<crate::rules::theory::Basis> {
    use crate::rules::theory::Basis;
    if c.attribute.is_some() {
        let l = c.limits.as_ref()?;
        return Some(Basis::Attribute {
            chart: l.chart.attribute()?,
            parameter: l.attribute_parameter()?,
            n: l.subgroup_size as f64,
            limits: l.location,
        });
    }
    let chart = c.limits.as_ref().map_or(c.chart, |l| l.chart).variables()?;
    let n = match (&c.limits, &c.grouping) {
        (Some(l), _) => l.subgroup_size,
        (
            None,
            crate::config::Grouping::Count { size } | crate::config::Grouping::Part { size },
        ) => *size,
        (None, crate::config::Grouping::Window { .. }) => return None,
    };
    Some(Basis::Variables { chart, n })
}
