//! What the archive holds: every reading, rejected reading, subgroup verdict, alert event,
//! limit change and daemon event, each with a sequence number and the time it was recorded.
//!
//! Records are versioned (`v`); a reader refuses versions it does not know rather than guess.

use std::collections::BTreeMap;

use serde::{Deserialize, Serialize};

use crate::alerts::AlertEvent;
use crate::limits_file::StoredLimits;
use crate::rules::Violation;
use crate::stats::Limits;

/// The record version this build writes.
pub const RECORD_VERSION: u32 = 1;

/// A record as stored: its sequence number, when it was recorded, and what it says.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Envelope {
    pub v: u32,
    /// Monotonic, gap-free sequence number across the whole archive, from 1.
    pub seq: u64,
    /// When the record was appended, milliseconds since the Unix epoch.
    pub time_ms: i64,
    #[serde(flatten)]
    pub record: Record,
}

/// A characteristic's saved engine state, kept as JSON text (a parsed JSON tree would take
/// several times the memory, for every characteristic, in every tail and checkpoint). Stored
/// as a string; a record that holds the state as a JSON object reads as well.
#[derive(Debug, Clone, PartialEq)]
pub struct StateText(pub String);

impl Serialize for StateText {
    fn serialize<S: serde::Serializer>(&self, s: S) -> Result<S::Ok, S::Error> {
        s.serialize_str(&self.0)
    }
}

impl<'de> Deserialize<'de> for StateText {
    fn deserialize<D: serde::Deserializer<'de>>(d: D) -> Result<Self, D::Error> {
        Ok(match serde_json::Value::deserialize(d)? {
            serde_json::Value::String(s) => StateText(s),
            other => StateText(other.to_string()),
        })
    }
}

impl StateText {
    /// The state of `value`, as JSON text.
    pub fn of<T: Serialize>(value: &T) -> Self {
        StateText(serde_json::to_string(value).unwrap_or_else(|_| "null".into()))
    }

    /// The state read back.
    pub fn read<T: serde::de::DeserializeOwned>(&self) -> Option<T> {
        serde_json::from_str(&self.0).ok()
    }
}

/// One subgroup as it was plotted, in brief: enough to redraw a chart and rebuild rules.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct SubgroupSummary {
    pub number: u64,
    pub time_ms: i64,
    pub n: usize,
    pub mean: f64,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub dispersion: Option<f64>,
    /// Attribute charts: nonconforming units (or defects) found in the subgroup.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub found: Option<f64>,
    /// Attribute charts: units inspected in the subgroup.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub inspected: Option<f64>,
}

impl SubgroupSummary {
    /// What an attribute chart's subgroup found, in words ("3 found in 20 inspected, plotted
    /// 0.150"), when it is one.
    pub fn attribute_words(&self, decimals: usize) -> Option<String> {
        let (found, inspected) = self.found.zip(self.inspected)?;
        Some(format!(
            "{} found in {} inspected, plotted {}",
            crate::format::num(found),
            crate::format::num(inspected),
            crate::format::fixed(self.mean, decimals)
        ))
    }
}

/// A reading waiting to complete a subgroup.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct PendingReading {
    /// The sequence number of its `reading-accepted` record.
    pub seq: u64,
    pub value: f64,
    pub time_ms: i64,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub part: Option<String>,
    /// Units inspected, for a batch result on an attribute chart.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub inspected: Option<f64>,
}

/// The recent state of one characteristic, as the archive knows it.
#[derive(Debug, Clone, PartialEq, Default, Serialize, Deserialize)]
pub struct CharacteristicTail {
    /// The last subgroups, oldest first (at most the archive's tail length).
    pub recent: Vec<SubgroupSummary>,
    /// Accepted readings not yet part of a subgroup, oldest first.
    pub pending: std::collections::VecDeque<PendingReading>,
    /// The engine's last saved state and the sequence number it was saved at.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub engine: Option<(u64, StateText)>,
    /// The characteristic's alerts that are not cleared, and the last few cleared ones.
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub alerts: Vec<crate::alerts::Alert>,
    /// The limits last learned by the daemon and the file they were meant for, so that a
    /// restart uses them even when that file could not be written.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub installed: Option<(String, Box<StoredLimits>)>,
    /// The limits the archive last recorded in force (learned, or read from a file), with
    /// any approval since: a start or reload that finds other limits records the change.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub in_force: Option<Box<StoredLimits>>,
}

/// Everything the archive records.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(tag = "kind", rename_all = "kebab-case")]
pub enum Record {
    ReadingAccepted {
        source: String,
        characteristic: String,
        value: f64,
        #[serde(default, skip_serializing_if = "Option::is_none")]
        unit: Option<String>,
        /// When the gauge or source says it measured, if it says.
        #[serde(default, skip_serializing_if = "Option::is_none")]
        source_time_ms: Option<i64>,
        /// The source's time was too far from the arrival time to be trusted (a gauge clock
        /// that is wrong, or seconds sent for milliseconds): it is kept here as sent, and the
        /// arrival time orders the reading.
        #[serde(default, skip_serializing_if = "std::ops::Not::not")]
        source_time_ignored: bool,
        /// When linewarden received it.
        arrival_ms: i64,
        #[serde(default, skip_serializing_if = "Option::is_none")]
        part: Option<String>,
        /// A key that identifies the message at its source (MQTT topic and payload hash, file
        /// hash and row), so that redeliveries are recognised.
        #[serde(default, skip_serializing_if = "Option::is_none")]
        source_key: Option<String>,
        /// The word a pass/fail station sent ("NOK"), when it sent one; `value` is what it
        /// counts as (1 nonconforming, 0 conforming) under the characteristic's word lists.
        #[serde(default, skip_serializing_if = "Option::is_none")]
        word: Option<String>,
        /// Units inspected, for a message that reports a whole batch (`value` is then the
        /// count found in them); absent for one unit.
        #[serde(default, skip_serializing_if = "Option::is_none")]
        inspected: Option<f64>,
    },
    ReadingRejected {
        source: String,
        #[serde(default, skip_serializing_if = "Option::is_none")]
        characteristic: Option<String>,
        raw: String,
        reason: String,
        arrival_ms: i64,
        /// The key of the message at its source, as for accepted readings, so that a rejected
        /// message the source delivers again is recognised and not archived twice.
        #[serde(default, skip_serializing_if = "Option::is_none")]
        source_key: Option<String>,
    },
    SubgroupResult {
        characteristic: String,
        subgroup: SubgroupSummary,
        /// The `reading-accepted` records it was formed from.
        readings: Vec<u64>,
        /// Whether it was completed early (by the maximum wait) with fewer readings.
        #[serde(default)]
        partial: bool,
        /// The limits in force (none while the characteristic is still learning its limits).
        #[serde(default, skip_serializing_if = "Option::is_none")]
        location: Option<Limits>,
        #[serde(default, skip_serializing_if = "Option::is_none")]
        dispersion: Option<Limits>,
        violations: Vec<Violation>,
    },
    /// Reading rules that fired (out of specification, gauge health), on a reading or, for a
    /// silent feed, on none.
    Flagged {
        characteristic: String,
        #[serde(default, skip_serializing_if = "Option::is_none")]
        reading: Option<u64>,
        violations: Vec<Violation>,
    },
    /// A subgroup that was given up (discarded after its maximum wait).
    SubgroupDiscarded {
        characteristic: String,
        readings: Vec<u64>,
        reason: String,
    },
    Alert {
        alert_id: String,
        characteristic: String,
        #[serde(flatten)]
        event: AlertEvent,
    },
    LimitsInstalled {
        characteristic: String,
        #[serde(default, skip_serializing_if = "Option::is_none")]
        old: Option<Box<StoredLimits>>,
        new: Box<StoredLimits>,
        reason: String,
        /// The limits file they were meant for (learned limits), as configured then.
        #[serde(default, skip_serializing_if = "Option::is_none")]
        file: Option<String>,
    },
    /// An engineer approved the provisional (learned) limits in force.
    LimitsApproved {
        characteristic: String,
        approval: crate::limits_file::Approval,
        /// The limits file the approval was written to, when there is one.
        #[serde(default, skip_serializing_if = "Option::is_none")]
        file: Option<String>,
    },
    ConfigLoaded {
        path: String,
        sha256: String,
    },
    DaemonStarted {
        version: String,
    },
    DaemonStopped {
        reason: String,
    },
    /// The engine's state for one characteristic, saved so a restart resumes its rules.
    EngineState {
        characteristic: String,
        state: StateText,
    },
    /// Written by the archive itself at the start of every segment: the recent state of every
    /// characteristic, so a restart reads back only from the newest checkpoint.
    Checkpoint {
        characteristics: BTreeMap<String, CharacteristicTail>,
    },
}

impl Record {
    /// Every kind of record, as the `kind` field writes it.
    pub const KINDS: &'static [&'static str] = &[
        "reading-accepted",
        "reading-rejected",
        "subgroup-result",
        "subgroup-discarded",
        "flagged",
        "alert",
        "limits-installed",
        "limits-approved",
        "config-loaded",
        "daemon-started",
        "daemon-stopped",
        "engine-state",
        "checkpoint",
    ];

    /// The record's kind, as written in the `kind` field.
    pub fn kind(&self) -> &'static str {
        match self {
            Record::ReadingAccepted { .. } => "reading-accepted",
            Record::ReadingRejected { .. } => "reading-rejected",
            Record::SubgroupResult { .. } => "subgroup-result",
            Record::SubgroupDiscarded { .. } => "subgroup-discarded",
            Record::Flagged { .. } => "flagged",
            Record::Alert { .. } => "alert",
            Record::LimitsInstalled { .. } => "limits-installed",
            Record::LimitsApproved { .. } => "limits-approved",
            Record::ConfigLoaded { .. } => "config-loaded",
            Record::DaemonStarted { .. } => "daemon-started",
            Record::DaemonStopped { .. } => "daemon-stopped",
            Record::EngineState { .. } => "engine-state",
            Record::Checkpoint { .. } => "checkpoint",
        }
    }

    /// The characteristic the record is about, if any.
    pub fn characteristic(&self) -> Option<&str> {
        match self {
            Record::ReadingAccepted { characteristic, .. }
            | Record::SubgroupResult { characteristic, .. }
            | Record::SubgroupDiscarded { characteristic, .. }
            | Record::Flagged { characteristic, .. }
            | Record::Alert { characteristic, .. }
            | Record::LimitsInstalled { characteristic, .. }
            | Record::LimitsApproved { characteristic, .. }
            | Record::EngineState { characteristic, .. } => Some(characteristic),
            Record::ReadingRejected { characteristic, .. } => characteristic.as_deref(),
            _ => None,
        }
    }
}

/// Pending readings kept per characteristic at most: the largest subgroup linewarden forms.
/// More means readings that no subgroup will take (they stay in the archive, just not in the
/// tail), and checkpoints stay small.
pub const MAX_PENDING: usize = crate::stats::constants::MAX_SIZE;

/// The recent state of every characteristic, kept up to date record by record. The writer
/// keeps one and writes it as a checkpoint at the start of each segment; a reader rebuilds it
/// from the newest checkpoint and the records after it.
#[derive(Debug, Clone, PartialEq, Default, Serialize, Deserialize)]
pub struct Tail {
    /// How many recent subgroups to keep per characteristic.
    pub keep: usize,
    pub characteristics: BTreeMap<String, CharacteristicTail>,
}

impl Tail {
    /// An empty tail keeping `keep` subgroups per characteristic.
    pub fn new(keep: usize) -> Self {
        Tail {
            keep,
            characteristics: BTreeMap::new(),
        }
    }

    /// Takes one record into account.
    pub fn apply(&mut self, e: &Envelope) {
        self.apply_record(e.seq, &e.record);
    }

    /// The entry for `c`, created if new (without allocating the key when it exists).
    fn entry(&mut self, c: &str) -> &mut CharacteristicTail {
        if !self.characteristics.contains_key(c) {
            self.characteristics
                .insert(c.to_string(), CharacteristicTail::default());
        }
        self.characteristics.get_mut(c).expect("inserted above")
    }

    /// Takes one record, numbered `seq`, into account.
    pub fn apply_record(&mut self, seq: u64, record: &Record) {
        match record {
            Record::ReadingAccepted {
                characteristic,
                value,
                source_time_ms,
                source_time_ignored,
                arrival_ms,
                part,
                inspected,
                ..
            } => {
                let time_ms = match source_time_ms {
                    Some(t) if !source_time_ignored => *t,
                    _ => *arrival_ms,
                };
                let t = self.entry(characteristic);
                if t.pending.len() >= MAX_PENDING {
                    t.pending.pop_front();
                }
                t.pending.push_back(PendingReading {
                    seq,
                    value: *value,
                    time_ms,
                    part: part.clone(),
                    inspected: *inspected,
                });
            }
            Record::LimitsInstalled {
                characteristic,
                new,
                file,
                ..
            } => {
                let t = self.entry(characteristic);
                // Only limits the daemon learned are installed again from the archive; an
                // engineer's file that was removed means "learn afresh".
                if new.provenance.provisional || new.provenance.source == "learning" {
                    t.installed = file.as_ref().map(|f| (f.clone(), new.clone()));
                }
                t.in_force = Some(new.clone());
            }
            Record::LimitsApproved {
                characteristic,
                approval,
                ..
            } => {
                let t = self.entry(characteristic);
                if let Some((_, l)) = &mut t.installed {
                    l.approved = Some(approval.clone());
                }
                if let Some(l) = &mut t.in_force {
                    l.approved = Some(approval.clone());
                }
            }
            Record::SubgroupResult {
                characteristic,
                subgroup,
                readings,
                ..
            } => {
                let keep = self.keep;
                let t = self.entry(characteristic);
                t.pending.retain(|p| !readings.contains(&p.seq));
                t.recent.push(*subgroup);
                if t.recent.len() > keep {
                    let extra = t.recent.len() - keep;
                    t.recent.drain(..extra);
                }
            }
            Record::SubgroupDiscarded {
                characteristic,
                readings,
                ..
            } => {
                if let Some(t) = self.characteristics.get_mut(characteristic) {
                    t.pending.retain(|p| !readings.contains(&p.seq));
                }
            }
            Record::EngineState {
                characteristic,
                state,
            } => {
                let t = self.entry(characteristic);
                t.engine = Some((seq, state.clone()));
            }
            Record::Checkpoint { characteristics } => {
                self.characteristics = characteristics.clone();
            }
            Record::Alert {
                alert_id,
                characteristic,
                event,
            } => {
                let t = self.entry(characteristic);
                crate::alerts::apply(&mut t.alerts, alert_id, characteristic, event);
            }
            _ => {}
        }
    }
}
