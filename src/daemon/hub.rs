//! What the engine task shares with the outputs and the control socket: the alerts (a watch
//! that changes only when an alert does), the stack light's state, the retained state of each
//! characteristic, source health, and the requests that come back (acknowledgements, status
//! questions, deliveries done).

use std::collections::BTreeMap;
use std::sync::Arc;

use serde::{Deserialize, Serialize};
use tokio::sync::oneshot;

use crate::alerts::{Alert, Book, Standing, Status};
use crate::archive::record::SubgroupSummary;
use crate::engine::CharView;
use crate::rules::Severity;

/// How a source is doing.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct SourceHealth {
    pub source: String,
    /// "up", "down" or "ended".
    pub state: String,
    pub since_ms: i64,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub last_reading_ms: Option<i64>,
    pub readings: u64,
    pub rejected: u64,
    /// Readings whose source time was too far from their arrival to order them by.
    #[serde(default)]
    pub clock_skewed: u64,
    #[serde(default, skip_serializing_if = "String::is_empty")]
    pub detail: String,
}

/// The alerts, and the characteristics they are on (for the charts in emails).
#[derive(Debug, Clone, Default)]
pub struct AlertsView {
    pub book: Book,
    /// The characteristics that have alerts, as they stood when the alerts last changed.
    pub characteristics: BTreeMap<String, Arc<CharView>>,
}

impl AlertsView {
    /// Alerts an output should hear of, by least severity and whether it is for escalations.
    pub fn for_output<'a>(
        &'a self,
        min: Severity,
        escalation: bool,
    ) -> impl Iterator<Item = &'a Alert> + 'a {
        self.book
            .all()
            .filter(move |a| a.severity >= min && (!escalation || a.escalated_ms.is_some()))
    }
}

/// A characteristic's retained state, for the HMI.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct StateView {
    pub characteristic: String,
    pub name: String,
    pub state: String,
    /// Where the limits come from: `learning`, `provisional` (learned, not approved: alerts
    /// capped), `approved`, or `stored` (from a study's file).
    pub limits: crate::engine::LimitsState,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub last_subgroup: Option<SubgroupSummary>,
    pub active_alerts: Vec<String>,
}

impl StateView {
    pub fn of(c: &CharView, book: &Book) -> StateView {
        StateView {
            characteristic: c.id.clone(),
            name: c.name.clone(),
            state: c.standing.name().to_string(),
            limits: c.limits.clone(),
            last_subgroup: c.recent.last().copied(),
            active_alerts: book
                .by_characteristic
                .get(&c.id)
                .into_iter()
                .flat_map(|l| l.iter())
                .filter(|a| a.status != Status::Cleared)
                .map(|a| a.id.clone())
                .collect(),
        }
    }
}

/// Running totals since the daemon started, for the metrics endpoint; published once a second.
#[derive(Debug, Clone, Default)]
pub struct Counts {
    /// Each source's health and reading counts.
    pub sources: Vec<SourceHealth>,
    /// Subgroups checked, per characteristic.
    pub subgroups: BTreeMap<String, u64>,
    /// Violations per (characteristic, rule, severity).
    pub violations: BTreeMap<(String, String, Severity), u64>,
}

/// Every characteristic as the engine sees it (recent subgroups, limits, standing), for the
/// live page; refreshed at most once a second, only the ones that changed.
pub type Views = Arc<BTreeMap<String, Arc<CharView>>>;

/// Every characteristic's retained state, refreshed at most once a second.
pub type States = Arc<BTreeMap<String, StateView>>;

/// What the stack light should show.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum Light {
    /// A stop-level alert nobody has acknowledged: act now.
    Alarm,
    /// A warning, an acknowledged stop alert not yet over, or monitoring degraded (a source
    /// down, the archive's disk full).
    Attention,
    /// Everything in control and every source healthy.
    Normal,
    /// Not monitoring (starting, stopping, or the daemon stalled).
    Off,
}

impl Light {
    pub fn name(self) -> &'static str {
        match self {
            Light::Alarm => "alarm",
            Light::Attention => "attention",
            Light::Normal => "normal",
            Light::Off => "off",
        }
    }
}

/// The light for a cell: its alerts, its sources, its archive.
pub fn light(book: &Book, sources_healthy: bool, archive_ok: bool) -> Light {
    let mut worst = Standing::InControl;
    for a in book.active() {
        worst = worst.max(
            if a.severity == Severity::Stop && a.status == Status::Open {
                Standing::ActionNeeded
            } else if a.severity >= Severity::Warn {
                Standing::Warning
            } else {
                Standing::InControl
            },
        );
    }
    match worst {
        Standing::ActionNeeded => Light::Alarm,
        Standing::Warning => Light::Attention,
        _ if !sources_healthy || !archive_ok => Light::Attention,
        _ => Light::Normal,
    }
}

/// An output delivered this version of an alert.
#[derive(Debug, Clone, PartialEq)]
pub struct Delivery {
    pub output: String,
    pub alert_id: String,
    pub version: u32,
}

/// A question for the engine task, with where the answer goes.
#[derive(Debug)]
pub enum Request {
    /// `brief`: leave out the characteristics (a cell of 10,000 has a big answer).
    Status {
        brief: bool,
        reply: oneshot::Sender<StatusReport>,
    },
    Ack {
        target: String,
        by: String,
        note: Option<String>,
        /// Where it came from, for the log ("control socket", "MQTT").
        via: String,
        reply: oneshot::Sender<AckReply>,
    },
    /// Approve provisional limits.
    Approve {
        characteristic: String,
        by: String,
        note: Option<String>,
        via: String,
        reply: oneshot::Sender<ApproveReply>,
    },
}

/// The answer to an approval.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ApproveReply {
    pub ok: bool,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub error: Option<String>,
}

/// The answer to an acknowledgement.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct AckReply {
    pub ok: bool,
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub acknowledged: Vec<String>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub error: Option<String>,
}

/// The daemon as `linewarden status` shows it.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct StatusReport {
    pub version: String,
    pub config: String,
    pub started_ms: i64,
    pub now_ms: i64,
    pub light: Light,
    pub archive: ArchiveStatus,
    pub sources: Vec<SourceHealth>,
    pub characteristics: Vec<CharStatus>,
    pub alerts: Vec<Alert>,
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ArchiveStatus {
    pub dir: String,
    pub durable_seq: u64,
    /// "running", "disk-full: ...", "failed: ...".
    pub state: String,
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct CharStatus {
    pub id: String,
    pub name: String,
    pub unit: String,
    pub state: String,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub baseline: Option<(usize, usize)>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub last_subgroup: Option<SubgroupSummary>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub limits: Option<crate::stats::Limits>,
    /// Where the limits come from (provisional until approved).
    #[serde(default)]
    pub limits_state: crate::engine::LimitsState,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub decimals: Option<usize>,
    pub readings: u64,
}

impl CharStatus {
    pub fn of(c: &CharView) -> CharStatus {
        CharStatus {
            id: c.id.clone(),
            name: c.name.clone(),
            unit: c.unit.clone(),
            state: c.standing.name().to_string(),
            baseline: c.baseline,
            last_subgroup: c.recent.last().copied(),
            limits: c.location,
            limits_state: c.limits.clone(),
            decimals: c.decimals,
            readings: c.readings,
        }
    }
}
