//! The alert lifecycle, pure: no I/O, no clock reads; the engine drives it and archives every
//! event it returns, and a restart rebuilds it by applying the archived events again.
//!
//! A violation raises an alert with a stable id (`<characteristic>-<subgroup>-<rule>`, or
//! `-r<reading number>-` for a reading rule, then `-spread` for the dispersion chart and
//! `-up`/`-down` for the side; see [`alert_id`]). An alert is one cause: the same rule on the
//! same chart, the same way. That cause firing again while its alert is not cleared repeats it
//! (count, last seen, the new figures together); a mean below the lower limit after one above
//! the upper is a new alert, and so is a range beyond its limit beside a mean beyond its own. The condition is gone when a
//! later subgroup (or reading, for reading rules) is checked without that rule firing. An alert
//! whose severity needs acknowledgement latches: it clears only once acknowledged and gone;
//! otherwise it clears as soon as the condition is gone. An alert left unacknowledged past its
//! severity's escalation time is escalated once.

use std::collections::BTreeMap;

use serde::{Deserialize, Serialize};

use crate::rules::{Chart, PointRef, Severity, Side, Violation};

/// An alert's life events, as the archive records them and the book applies them.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(tag = "event", rename_all = "kebab-case")]
pub enum AlertEvent {
    Raised {
        rule: String,
        severity: crate::rules::Severity,
        message: String,
        #[serde(default)]
        level: Level,
        #[serde(default)]
        points: Vec<crate::rules::PointRef>,
        statistic: f64,
        limit: f64,
        #[serde(default, skip_serializing_if = "Option::is_none")]
        reaction_plan: Option<String>,
        at_ms: i64,
        /// The chart the cause was seen on.
        #[serde(default)]
        chart: crate::rules::Chart,
        /// Which way the process moved, where the rule has a side.
        #[serde(default, skip_serializing_if = "Option::is_none")]
        side: Option<crate::rules::Side>,
        /// The parts involved: the reading's part, or the parts of the subgroup that completed
        /// the signal, when the source names parts.
        #[serde(default, skip_serializing_if = "Vec::is_empty")]
        parts: Vec<String>,
        /// Raised against provisional limits; `capped_from` is the rule's own severity when
        /// the cap lowered it.
        #[serde(default, skip_serializing_if = "std::ops::Not::not")]
        provisional: bool,
        #[serde(default, skip_serializing_if = "Option::is_none")]
        capped_from: Option<crate::rules::Severity>,
    },
    /// The same cause (rule, chart and side) fired again while the alert was not cleared.
    Repeated {
        count: u64,
        at_ms: i64,
        message: String,
        #[serde(default)]
        points: Vec<crate::rules::PointRef>,
        statistic: f64,
        /// The limit of this firing (older records did not carry it: the raise's stands).
        #[serde(default, skip_serializing_if = "Option::is_none")]
        limit: Option<f64>,
        #[serde(default, skip_serializing_if = "Vec::is_empty")]
        parts: Vec<String>,
    },
    /// The condition is gone, but the alert waits for acknowledgement.
    Gone {
        at_ms: i64,
    },
    Acknowledged {
        by: String,
        #[serde(default, skip_serializing_if = "Option::is_none")]
        note: Option<String>,
        at_ms: i64,
    },
    Cleared {
        at_ms: i64,
    },
    /// Left unacknowledged too long: the escalation outputs get it.
    Escalated {
        at_ms: i64,
    },
    /// An output delivered this version of the alert.
    Delivered {
        output: String,
        version: u32,
    },
}

/// Cleared alerts kept per characteristic (for status and for deliveries still pending).
pub const KEEP_CLEARED: usize = 10;

/// Where an alert is in its life.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum Status {
    /// Raised, nobody has acknowledged it.
    Open,
    /// Someone has looked; the condition may still be there.
    Acknowledged,
    /// Over.
    Cleared,
}

impl Status {
    pub fn name(self) -> &'static str {
        match self {
            Status::Open => "open",
            Status::Acknowledged => "acknowledged",
            Status::Cleared => "cleared",
        }
    }
}

/// Which evaluation can show a rule's condition gone.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize, Default)]
#[serde(rename_all = "kebab-case")]
pub enum Level {
    /// A subgroup rule: gone when a later subgroup is checked without it.
    #[default]
    Subgroup,
    /// A reading rule: gone when a later reading passes it.
    Reading,
}

/// Who acknowledged, when, and why.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Ack {
    pub by: String,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub note: Option<String>,
    pub at_ms: i64,
}

/// One alert, as the archive, the status and every output see it.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Alert {
    pub id: String,
    pub characteristic: String,
    pub rule: String,
    pub severity: Severity,
    pub level: Level,
    /// The plain sentence of the violation that raised it.
    pub message: String,
    /// The sentence of the latest repeat.
    pub last_message: String,
    /// The points involved in the latest firing, with their values.
    pub points: Vec<PointRef>,
    pub statistic: f64,
    pub limit: f64,
    /// The chart the cause was seen on; with the rule and the side, what makes an alert one
    /// cause: a range beyond its limit and a mean beyond its limit are two alerts, and so are
    /// a mean above and a mean below.
    #[serde(default)]
    pub chart: Chart,
    /// Which way the process moved, where the rule has a side.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub side: Option<Side>,
    /// The parts involved in the latest firing (the reading's part, or the parts of the
    /// subgroup that completed the signal), when the source names parts.
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub parts: Vec<String>,
    /// Raised against provisional limits (learned, not yet approved).
    #[serde(default, skip_serializing_if = "std::ops::Not::not")]
    pub provisional: bool,
    /// The rule's own severity, when the provisional cap lowered it.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub capped_from: Option<Severity>,
    /// What the technician should check first (from the config).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub reaction_plan: Option<String>,
    pub raised_ms: i64,
    pub last_seen_ms: i64,
    pub count: u64,
    pub status: Status,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub ack: Option<Ack>,
    /// The condition is not there any more (the last check passed).
    pub gone: bool,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub escalated_ms: Option<i64>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub cleared_ms: Option<i64>,
    /// Bumped by every event; outputs deliver versions (alert id + version is the idempotency
    /// key).
    pub version: u32,
    /// The version each output has delivered.
    #[serde(default)]
    pub delivered: BTreeMap<String, u32>,
    /// The name of the latest event ("raised", "repeated", "acknowledged", ...).
    pub last_event: String,
}

/// What to do with alerts of one severity.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct Policy {
    /// The alert latches until someone acknowledges it.
    pub acknowledge: bool,
    /// Unacknowledged this long after raising: escalate.
    pub escalate_after_ms: Option<i64>,
}

/// Policies per severity.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct Policies {
    pub stop: Policy,
    pub warn: Policy,
    pub notice: Policy,
}

impl Default for Policies {
    /// Stop-level alerts latch until acknowledged and escalate after 15 minutes; warnings and
    /// notices clear by themselves when the condition is gone.
    fn default() -> Self {
        Policies {
            stop: Policy {
                acknowledge: true,
                escalate_after_ms: Some(15 * 60 * 1000),
            },
            warn: Policy {
                acknowledge: false,
                escalate_after_ms: None,
            },
            notice: Policy {
                acknowledge: false,
                escalate_after_ms: None,
            },
        }
    }
}

impl Policies {
    pub fn of(&self, s: Severity) -> Policy {
        match s {
            Severity::Stop => self.stop,
            Severity::Warn => self.warn,
            Severity::Notice => self.notice,
        }
    }
}

/// An event for the archive: which alert, which characteristic, what happened.
#[derive(Debug, Clone, PartialEq)]
pub struct Event {
    pub alert_id: String,
    pub characteristic: String,
    pub event: AlertEvent,
}

/// Why an acknowledgement was refused.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
pub enum AckError {
    #[error("no alert or characteristic is called \"{0}\"")]
    Unknown(String),
    #[error("\"{0}\" has no alert waiting for acknowledgement")]
    NothingOpen(String),
    #[error("alert {id} was already acknowledged by {by}")]
    Already { id: String, by: String },
    #[error("alert {0} is already cleared")]
    Cleared(String),
    #[error("say who acknowledges (a name or badge number)")]
    NoName,
    /// A name or note that could forge a log line or flood the record.
    #[error("{0}")]
    BadText(String),
}

/// The longest name of a person who acknowledges, in characters.
pub const MAX_NAME_CHARS: usize = 80;
/// The longest note with an acknowledgement, in characters.
pub const MAX_NOTE_CHARS: usize = 2000;

/// Checks the name and note of an acknowledgement before anything is logged or archived: no
/// control characters (a line break in a name would write a genuine-looking line into the
/// journal; an escape sequence would repaint a terminal), and bounded lengths. Every path that
/// acknowledges (the control socket, MQTT, the command line) goes through this.
pub fn check_ack_text(by: &str, note: Option<&str>) -> Result<(), AckError> {
    fn check(what: &str, text: &str, max: usize) -> Result<(), AckError> {
        if let Some(c) = text.chars().find(|c| c.is_control()) {
            return Err(AckError::BadText(format!(
                "the {what} contains a control character ({}); use plain text on one line",
                c.escape_default()
            )));
        }
        let n = text.chars().count();
        if n > max {
            return Err(AckError::BadText(format!(
                "the {what} is {n} characters long; at most {max} are taken"
            )));
        }
        Ok(())
    }
    if by.trim().is_empty() {
        return Err(AckError::NoName);
    }
    check("name", by, MAX_NAME_CHARS)?;
    if let Some(n) = note {
        check("note", n, MAX_NOTE_CHARS)?;
    }
    Ok(())
}

/// Every alert of a cell, by characteristic.
#[derive(Debug, Clone, PartialEq, Default, Serialize, Deserialize)]
pub struct Book {
    /// Shared lists: a snapshot of the book for the outputs copies pointers, and a list is
    /// copied only when it changes while a snapshot holds it.
    pub by_characteristic: BTreeMap<String, std::sync::Arc<Vec<Alert>>>,
}

impl Alert {
    /// Whether `v` is this alert's cause: the same rule, on the same chart, the same way.
    pub fn same_cause(&self, v: &Violation) -> bool {
        self.rule == v.rule
            && self.chart == v.chart
            && self.side == v.side
            && self.provisional == v.provisional
    }
}

/// The id of an alert raised at `at` (a subgroup number, or `r` and the reading's number) for
/// violation `v`: characteristic, where, rule, and the chart and side where they tell causes
/// apart (`bore-32-beyond-limits-up`, `bore-32-beyond-limits-spread-up`). Built from numbers
/// the engine counts per characteristic, so the same feed gives the same ids on every run.
pub fn alert_id(characteristic: &str, at: &str, v: &Violation) -> String {
    let mut id = format!("{characteristic}-{at}-{}", v.rule);
    if v.chart == Chart::Dispersion {
        id.push_str("-spread");
    }
    if let Some(side) = v.side {
        id.push('-');
        id.push_str(side.words());
    }
    id
}

impl Book {
    /// Every alert, cleared ones included.
    pub fn all(&self) -> impl Iterator<Item = &Alert> {
        self.by_characteristic.values().flat_map(|l| l.iter())
    }

    /// Alerts not yet cleared.
    pub fn active(&self) -> impl Iterator<Item = &Alert> {
        self.all().filter(|a| a.status != Status::Cleared)
    }

    pub fn get(&self, id: &str) -> Option<&Alert> {
        self.all().find(|a| a.id == id)
    }

    /// Applies an event (the live book and the restart rebuild both come here).
    pub fn apply(&mut self, alert_id: &str, characteristic: &str, event: &AlertEvent) {
        let list = self
            .by_characteristic
            .entry(characteristic.to_string())
            .or_default();
        apply(
            std::sync::Arc::make_mut(list),
            alert_id,
            characteristic,
            event,
        );
    }

    /// A rule fired. Returns the events to archive: a repeat of the alert with the same cause
    /// (rule, chart and side) while it is not cleared, else a new alert.
    #[allow(clippy::too_many_arguments)]
    pub fn fired(
        &mut self,
        characteristic: &str,
        v: &Violation,
        level: Level,
        at: &str,
        parts: &[String],
        reaction_plan: Option<&str>,
        now_ms: i64,
    ) -> Vec<Event> {
        let list = std::sync::Arc::make_mut(
            self.by_characteristic
                .entry(characteristic.to_string())
                .or_default(),
        );
        let event = match list
            .iter()
            .find(|a| a.same_cause(v) && a.status != Status::Cleared)
        {
            Some(a) => Event {
                alert_id: a.id.clone(),
                characteristic: characteristic.to_string(),
                event: AlertEvent::Repeated {
                    count: a.count + 1,
                    at_ms: now_ms,
                    message: v.message.clone(),
                    points: v.points.clone(),
                    statistic: v.statistic,
                    limit: Some(v.limit),
                    parts: parts.to_vec(),
                },
            },
            None => Event {
                alert_id: alert_id(characteristic, at, v),
                characteristic: characteristic.to_string(),
                event: AlertEvent::Raised {
                    rule: v.rule.clone(),
                    severity: v.severity,
                    message: v.message.clone(),
                    level,
                    points: v.points.clone(),
                    statistic: v.statistic,
                    limit: v.limit,
                    reaction_plan: reaction_plan.map(str::to_string),
                    at_ms: now_ms,
                    chart: v.chart,
                    side: v.side,
                    parts: parts.to_vec(),
                    provisional: v.provisional,
                    capped_from: v.capped_from,
                },
            },
        };
        apply(list, &event.alert_id, characteristic, &event.event);
        vec![event]
    }

    /// A check of `level` was made for `characteristic`, and `fired` are the violations it
    /// found: every other alert at that level (another rule, another chart, the other side)
    /// has its condition gone, and clears if its policy allows.
    pub fn checked(
        &mut self,
        characteristic: &str,
        level: Level,
        fired: &[&Violation],
        policies: &Policies,
        now_ms: i64,
    ) -> Vec<Event> {
        let Some(list) = self.by_characteristic.get_mut(characteristic) else {
            return Vec::new();
        };
        let mut events = Vec::new();
        for a in list.iter() {
            if a.status == Status::Cleared
                || a.level != level
                || fired.iter().any(|v| a.same_cause(v))
            {
                continue;
            }
            let latch = policies.of(a.severity).acknowledge;
            let ev = if a.status == Status::Acknowledged || !latch {
                AlertEvent::Cleared { at_ms: now_ms }
            } else if !a.gone {
                AlertEvent::Gone { at_ms: now_ms }
            } else {
                continue;
            };
            events.push(Event {
                alert_id: a.id.clone(),
                characteristic: characteristic.to_string(),
                event: ev,
            });
        }
        if !events.is_empty() {
            let list = std::sync::Arc::make_mut(list);
            for e in &events {
                apply(list, &e.alert_id, characteristic, &e.event);
            }
            prune(list);
        }
        events
    }

    /// Acknowledges alert `target`, or every unacknowledged alert of the characteristic
    /// `target`. An acknowledged alert whose condition is gone clears at once.
    pub fn acknowledge(
        &mut self,
        target: &str,
        by: &str,
        note: Option<&str>,
        now_ms: i64,
    ) -> Result<Vec<Event>, AckError> {
        check_ack_text(by, note)?;
        let mut chosen: Vec<(String, String, bool)> = Vec::new();
        if let Some(a) = self.get(target) {
            match a.status {
                Status::Cleared => return Err(AckError::Cleared(a.id.clone())),
                Status::Acknowledged => {
                    return Err(AckError::Already {
                        id: a.id.clone(),
                        by: a.ack.as_ref().map_or("someone".into(), |k| k.by.clone()),
                    });
                }
                Status::Open => chosen.push((a.id.clone(), a.characteristic.clone(), a.gone)),
            }
        } else if let Some(list) = self.by_characteristic.get(target) {
            chosen.extend(
                list.iter()
                    .filter(|a| a.status == Status::Open)
                    .map(|a| (a.id.clone(), a.characteristic.clone(), a.gone)),
            );
            if chosen.is_empty() {
                return Err(AckError::NothingOpen(target.to_string()));
            }
        } else {
            return Err(AckError::Unknown(target.to_string()));
        }
        let mut events = Vec::new();
        for (id, c, gone) in chosen {
            events.push(Event {
                alert_id: id.clone(),
                characteristic: c.clone(),
                event: AlertEvent::Acknowledged {
                    by: by.trim().to_string(),
                    note: note.map(str::to_string).filter(|n| !n.trim().is_empty()),
                    at_ms: now_ms,
                },
            });
            if gone {
                events.push(Event {
                    alert_id: id,
                    characteristic: c,
                    event: AlertEvent::Cleared { at_ms: now_ms },
                });
            }
        }
        for e in &events {
            self.apply(&e.alert_id, &e.characteristic, &e.event);
        }
        Ok(events)
    }

    /// The earliest time at which [`Book::tick`] would escalate an alert; None when none can.
    pub fn next_due_ms(&self, policies: &Policies) -> Option<i64> {
        self.all()
            .filter(|a| a.status == Status::Open && a.escalated_ms.is_none())
            .filter_map(|a| {
                policies
                    .of(a.severity)
                    .escalate_after_ms
                    .map(|after| a.raised_ms.saturating_add(after))
            })
            .min()
    }

    /// Escalates alerts left unacknowledged past their severity's time.
    pub fn tick(&mut self, policies: &Policies, now_ms: i64) -> Vec<Event> {
        let mut events = Vec::new();
        for a in self.all() {
            if a.status != Status::Open || a.escalated_ms.is_some() {
                continue;
            }
            if let Some(after) = policies.of(a.severity).escalate_after_ms
                && now_ms - a.raised_ms >= after
            {
                events.push(Event {
                    alert_id: a.id.clone(),
                    characteristic: a.characteristic.clone(),
                    event: AlertEvent::Escalated { at_ms: now_ms },
                });
            }
        }
        for e in &events {
            self.apply(&e.alert_id, &e.characteristic, &e.event);
        }
        events
    }

    /// Output `output` has delivered `version` of alert `id`.
    pub fn delivered(&mut self, output: &str, id: &str, version: u32) -> Option<Event> {
        let a = self.all().find(|a| a.id == id)?;
        if a.delivered.get(output).is_some_and(|v| *v >= version) {
            return None;
        }
        let e = Event {
            alert_id: id.to_string(),
            characteristic: a.characteristic.clone(),
            event: AlertEvent::Delivered {
                output: output.to_string(),
                version,
            },
        };
        self.apply(&e.alert_id, &e.characteristic, &e.event);
        Some(e)
    }
}

/// Applies one event to a characteristic's alert list.
pub fn apply(list: &mut Vec<Alert>, id: &str, characteristic: &str, event: &AlertEvent) {
    if let AlertEvent::Raised {
        rule,
        severity,
        message,
        level,
        points,
        statistic,
        limit,
        reaction_plan,
        at_ms,
        chart,
        side,
        parts,
        provisional,
        capped_from,
    } = event
    {
        if list.iter().any(|a| a.id == id) {
            return; // applied already (a checkpoint and the record after it)
        }
        list.push(Alert {
            id: id.to_string(),
            characteristic: characteristic.to_string(),
            rule: rule.clone(),
            severity: *severity,
            level: *level,
            message: message.clone(),
            last_message: message.clone(),
            points: points.clone(),
            statistic: *statistic,
            limit: *limit,
            chart: *chart,
            side: *side,
            parts: parts.clone(),
            provisional: *provisional,
            capped_from: *capped_from,
            reaction_plan: reaction_plan.clone(),
            raised_ms: *at_ms,
            last_seen_ms: *at_ms,
            count: 1,
            status: Status::Open,
            ack: None,
            gone: false,
            escalated_ms: None,
            cleared_ms: None,
            version: 1,
            delivered: BTreeMap::new(),
            last_event: "raised".into(),
        });
        return;
    }
    let Some(a) = list.iter_mut().find(|a| a.id == id) else {
        return;
    };
    match event {
        AlertEvent::Raised { .. } => {}
        AlertEvent::Repeated {
            count,
            at_ms,
            message,
            points,
            statistic,
            limit,
            parts,
        } => {
            a.count = *count;
            a.last_seen_ms = *at_ms;
            a.last_message = message.clone();
            a.points = points.clone();
            a.statistic = *statistic;
            if let Some(l) = limit {
                a.limit = *l;
            }
            a.parts = parts.clone();
            a.gone = false;
            a.version += 1;
            a.last_event = "repeated".into();
        }
        AlertEvent::Gone { .. } => {
            a.gone = true;
            a.version += 1;
            a.last_event = "condition-gone".into();
        }
        AlertEvent::Acknowledged { by, note, at_ms } => {
            a.status = Status::Acknowledged;
            a.ack = Some(Ack {
                by: by.clone(),
                note: note.clone(),
                at_ms: *at_ms,
            });
            a.version += 1;
            a.last_event = "acknowledged".into();
        }
        AlertEvent::Cleared { at_ms } => {
            a.status = Status::Cleared;
            a.gone = true;
            a.cleared_ms = Some(*at_ms);
            a.version += 1;
            a.last_event = "cleared".into();
        }
        AlertEvent::Escalated { at_ms } => {
            a.escalated_ms = Some(*at_ms);
            a.version += 1;
            a.last_event = "escalated".into();
        }
        AlertEvent::Delivered { output, version } => {
            let v = a.delivered.entry(output.clone()).or_insert(0);
            *v = (*v).max(*version);
        }
    }
    if matches!(event, AlertEvent::Cleared { .. }) {
        prune(list);
    }
}

/// Keeps at most [`KEEP_CLEARED`] cleared alerts, dropping the oldest.
fn prune(list: &mut Vec<Alert>) {
    let cleared = list.iter().filter(|a| a.status == Status::Cleared).count();
    if cleared > KEEP_CLEARED {
        let mut drop = cleared - KEEP_CLEARED;
        list.retain(|a| {
            if drop > 0 && a.status == Status::Cleared {
                drop -= 1;
                false
            } else {
                true
            }
        });
    }
}

/// How a characteristic stands, for the status, the HMI and the stack light.
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum Standing {
    /// No limits yet: collecting the baseline.
    Learning,
    InControl,
    /// A warning or notice is active, or a stop alert has been acknowledged and is not over.
    Warning,
    /// A stop-level alert nobody has acknowledged: someone must act now. (Written
    /// `action-needed`; older records said `stopped`, which read as "monitoring stopped".)
    #[serde(alias = "stopped")]
    ActionNeeded,
}

impl Standing {
    pub fn name(self) -> &'static str {
        match self {
            Standing::Learning => "learning",
            Standing::InControl => "in-control",
            Standing::Warning => "warning",
            Standing::ActionNeeded => "action-needed",
        }
    }
}

/// The standing of a characteristic from its alerts.
pub fn standing<'a>(alerts: impl Iterator<Item = &'a Alert>, learning: bool) -> Standing {
    let mut s = if learning {
        Standing::Learning
    } else {
        Standing::InControl
    };
    for a in alerts.filter(|a| a.status != Status::Cleared) {
        let this = if a.severity == Severity::Stop && a.status == Status::Open {
            Standing::ActionNeeded
        } else {
            Standing::Warning
        };
        s = s.max(this);
    }
    s
}

#[cfg(test)]
mod tests {
    use super::*;

    fn v(rule: &str, severity: Severity) -> Violation {
        Violation {
            rule: rule.into(),
            severity,
            message: format!("{rule} fired"),
            points: vec![PointRef {
                number: 1,
                time_ms: 0,
                value: 12.01,
            }],
            statistic: 12.01,
            limit: 12.006,
            side: None,
            chart: crate::rules::Chart::Location,
            provisional: false,
            capped_from: None,
        }
    }

    fn replay(events: &[Event]) -> Book {
        let mut b = Book::default();
        for e in events {
            b.apply(&e.alert_id, &e.characteristic, &e.event);
        }
        b
    }

    /// The regression: a range beyond its limit was filed as a repeat of the mean's alert
    /// (its statistic shown against the mean's limit), and a mean below the lower limit as a
    /// repeat of the "above" alert. Each cause is now its own alert, its figures its own, and
    /// the status of each follows its own checks.
    #[test]
    fn each_chart_and_each_side_is_its_own_alert() {
        let p = Policies::default();
        let mut b = Book::default();
        let at = |value: f64, limit: f64, side: Side, chart: Chart| Violation {
            statistic: value,
            limit,
            side: Some(side),
            chart,
            points: vec![PointRef {
                number: 1,
                time_ms: 0,
                value,
            }],
            ..v("beyond-limits", Severity::Stop)
        };
        let mean_up = at(21.4643, 21.4642, Side::Above, Chart::Location);
        let range_up = at(0.033, 0.021, Side::Above, Chart::Dispersion);
        let mean_down = at(21.4301, 21.4358, Side::Below, Chart::Location);
        let parts = ["VB00187".to_string(), "VB00188".to_string()];
        b.fired("port", &mean_up, Level::Subgroup, "32", &parts, None, 1);
        b.fired("port", &range_up, Level::Subgroup, "33", &[], None, 2);
        b.fired("port", &mean_down, Level::Subgroup, "40", &[], None, 3);
        let ids: Vec<&str> = b.active().map(|a| a.id.as_str()).collect();
        assert_eq!(
            ids,
            [
                "port-32-beyond-limits-up",
                "port-33-beyond-limits-spread-up",
                "port-40-beyond-limits-down"
            ]
        );
        let range = b.get("port-33-beyond-limits-spread-up").unwrap();
        assert_eq!((range.statistic, range.limit), (0.033, 0.021));
        assert_eq!(range.chart, Chart::Dispersion);
        assert_eq!(b.get("port-32-beyond-limits-up").unwrap().parts, parts);
        // The same cause again is a repeat, with its new figures together.
        let mean_up2 = at(21.4650, 21.4642, Side::Above, Chart::Location);
        b.fired("port", &mean_up2, Level::Subgroup, "41", &[], None, 4);
        let a = b.get("port-32-beyond-limits-up").unwrap();
        assert_eq!((a.count, a.statistic, a.limit), (2, 21.4650, 21.4642));
        // A check where only the mean-below fired: the other two causes are gone.
        let e = b.checked("port", Level::Subgroup, &[&mean_down], &p, 5);
        let gone: Vec<&str> = e.iter().map(|e| e.alert_id.as_str()).collect();
        assert_eq!(
            gone,
            [
                "port-32-beyond-limits-up",
                "port-33-beyond-limits-spread-up"
            ]
        );
        assert!(!b.get("port-40-beyond-limits-down").unwrap().gone);
    }

    #[test]
    fn a_stop_alert_latches_until_acknowledged_and_gone() {
        let p = Policies::default();
        let mut b = Book::default();
        let mut log = Vec::new();
        let stop = v("beyond-limits", Severity::Stop);
        log.extend(b.fired(
            "bore",
            &stop,
            Level::Subgroup,
            "7",
            &[],
            Some("check the insert"),
            1000,
        ));
        let id = "bore-7-beyond-limits";
        assert_eq!(b.get(id).unwrap().status, Status::Open);
        log.extend(b.fired("bore", &stop, Level::Subgroup, "8", &[], None, 2000));
        assert_eq!(b.active().count(), 1, "a repeat is not a new alert");
        assert_eq!(b.get(id).unwrap().count, 2);
        log.extend(b.checked("bore", Level::Subgroup, &[], &p, 3000));
        let a = b.get(id).unwrap();
        assert!(a.gone && a.status == Status::Open, "latched: {a:?}");
        assert_eq!(standing(b.all(), false), Standing::ActionNeeded);
        log.extend(
            b.acknowledge("bore", "R. Tech", Some("insert changed"), 4000)
                .unwrap(),
        );
        let a = b.get(id).unwrap();
        assert_eq!(a.status, Status::Cleared, "acknowledged and gone: cleared");
        assert_eq!(
            a.ack.as_ref().unwrap().note.as_deref(),
            Some("insert changed")
        );
        assert_eq!(standing(b.all(), false), Standing::InControl);
        assert_eq!(replay(&log), b, "the archive rebuilds the same book");
        assert_eq!(
            b.acknowledge(id, "R. Tech", None, 5000),
            Err(AckError::Cleared(id.into()))
        );
    }

    #[test]
    fn acknowledged_while_still_there_clears_when_gone() {
        let p = Policies::default();
        let mut b = Book::default();
        b.fired(
            "bore",
            &v("one-side-run", Severity::Stop),
            Level::Subgroup,
            "9",
            &[],
            None,
            0,
        );
        b.acknowledge("bore-9-one-side-run", "R. Tech", None, 10)
            .unwrap();
        assert_eq!(standing(b.all(), false), Standing::Warning);
        assert!(matches!(
            b.acknowledge("bore-9-one-side-run", "K. Lead", None, 11),
            Err(AckError::Already { .. })
        ));
        b.fired(
            "bore",
            &v("one-side-run", Severity::Stop),
            Level::Subgroup,
            "10",
            &[],
            None,
            20,
        );
        assert!(
            b.checked(
                "bore",
                Level::Subgroup,
                &[&v("one-side-run", Severity::Stop)],
                &p,
                20
            )
            .is_empty()
        );
        let e = b.checked("bore", Level::Subgroup, &[], &p, 30);
        assert!(matches!(e[0].event, AlertEvent::Cleared { .. }));
        // A new firing after clearing is a new alert.
        b.fired(
            "bore",
            &v("one-side-run", Severity::Stop),
            Level::Subgroup,
            "15",
            &[],
            None,
            40,
        );
        assert_eq!(b.active().next().unwrap().id, "bore-15-one-side-run");
    }

    #[test]
    fn warnings_clear_by_themselves_and_levels_stay_apart() {
        let p = Policies::default();
        let mut b = Book::default();
        b.fired(
            "bore",
            &v("cluster", Severity::Warn),
            Level::Subgroup,
            "3",
            &[],
            None,
            0,
        );
        b.fired(
            "bore",
            &v("outside-spec", Severity::Warn),
            Level::Reading,
            "r44",
            &[],
            None,
            0,
        );
        // A reading passing clears the reading alert only.
        b.checked("bore", Level::Reading, &[], &p, 5);
        assert_eq!(
            b.active().map(|a| a.rule.as_str()).collect::<Vec<_>>(),
            ["cluster"]
        );
        b.checked("bore", Level::Subgroup, &[], &p, 6);
        assert_eq!(b.active().count(), 0);
    }

    #[test]
    fn escalation_happens_once_and_only_unacknowledged() {
        let p = Policies::default();
        let mut b = Book::default();
        b.fired(
            "bore",
            &v("beyond-limits", Severity::Stop),
            Level::Subgroup,
            "1",
            &[],
            None,
            0,
        );
        b.fired(
            "face",
            &v("beyond-limits", Severity::Stop),
            Level::Subgroup,
            "1",
            &[],
            None,
            0,
        );
        b.acknowledge("face", "R. Tech", None, 60_000).unwrap();
        assert!(b.tick(&p, 899_999).is_empty());
        let e = b.tick(&p, 900_000);
        assert_eq!(e.len(), 1);
        assert_eq!(e[0].alert_id, "bore-1-beyond-limits");
        assert!(b.tick(&p, 1_000_000).is_empty());
    }

    #[test]
    fn acknowledgement_needs_a_name_and_a_known_target() {
        let mut b = Book::default();
        assert_eq!(b.acknowledge("x", "", None, 0), Err(AckError::NoName));
        assert_eq!(
            b.acknowledge("x", "R", None, 0),
            Err(AckError::Unknown("x".into()))
        );
        b.fired(
            "bore",
            &v("cluster", Severity::Warn),
            Level::Subgroup,
            "1",
            &[],
            None,
            0,
        );
        b.acknowledge("bore", "R", None, 1).unwrap();
        assert_eq!(
            b.acknowledge("bore", "R", None, 2),
            Err(AckError::NothingOpen("bore".into()))
        );
    }

    #[test]
    fn deliveries_are_remembered_and_cleared_alerts_are_bounded() {
        let p = Policies::default();
        let mut b = Book::default();
        for i in 0..(KEEP_CLEARED + 10) {
            b.fired(
                "bore",
                &v("cluster", Severity::Warn),
                Level::Subgroup,
                &i.to_string(),
                &[],
                None,
                0,
            );
            b.checked("bore", Level::Subgroup, &[], &p, 1);
        }
        assert_eq!(b.all().count(), KEEP_CLEARED);
        let id = b.all().last().unwrap().id.clone();
        assert!(b.delivered("hmi", &id, 3).is_some());
        assert!(
            b.delivered("hmi", &id, 2).is_none(),
            "older versions are already covered"
        );
        assert_eq!(b.get(&id).unwrap().delivered["hmi"], 3);
    }
}
