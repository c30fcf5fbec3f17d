//! Where alerts go. Each output is its own task: it watches the alerts, delivers what it has
//! not delivered yet (the alert id and version are the idempotency key), retries with backoff
//! while its peer is unreachable, and reports each delivery back so the archive records it; a
//! restart resumes from what the archive says was delivered.
//!
//! * [`mqtt`] — alert events, retained states and daemon status, acknowledgements from an HMI.
//! * [`email`] — plain text and HTML with an inline chart, rate-limited, with digests.
//! * [`light`] — a stack light on Modbus TCP or RTU coils.
//! * the log output here — a framed message on the console for each new alert.

pub mod chart;
pub mod email;
pub mod light;
pub mod mqtt;

use std::collections::HashMap;
use std::sync::Arc;
use std::time::Duration;

use tokio::sync::{mpsc, watch};
use tracing::Instrument;

use super::hub::{AlertsView, Delivery, Light, Request, States};
use crate::alerts::Alert;
use crate::config::{Output, OutputKind};

/// What every output may watch and where it reports.
#[derive(Clone)]
pub struct Feeds {
    pub alerts: watch::Receiver<Arc<AlertsView>>,
    pub light: watch::Receiver<Light>,
    pub states: watch::Receiver<States>,
    pub delivered: mpsc::Sender<Delivery>,
    pub requests: mpsc::Sender<Request>,
    pub shutdown: watch::Receiver<bool>,
    /// When the engine loop last turned (ms since 1970).
    pub progress: Arc<std::sync::atomic::AtomicI64>,
}

/// Starts output `o`.
pub fn spawn(o: Output, feeds: Feeds) -> tokio::task::JoinHandle<()> {
    let span = tracing::info_span!("output", component = "output", id = %o.id);
    match o.kind.clone() {
        OutputKind::Log => tokio::spawn(log_output(o, feeds).instrument(span)),
        OutputKind::Mqtt { broker, prefix } => {
            tokio::spawn(mqtt::run(o, broker, prefix, feeds).instrument(span))
        }
        OutputKind::Email(e) => tokio::spawn(email::run(o, *e, feeds).instrument(span)),
        OutputKind::StackLight(s) => tokio::spawn(light::run(o, *s, feeds).instrument(span)),
    }
}

/// The versions an output has delivered, starting from what the archive says.
pub struct Ledger {
    pub output: String,
    done: HashMap<String, u32>,
}

impl Ledger {
    pub fn new(output: &str) -> Self {
        Ledger {
            output: output.to_string(),
            done: HashMap::new(),
        }
    }

    /// The version of `a` this output has delivered (the archive's word or this run's).
    pub fn delivered(&self, a: &Alert) -> u32 {
        let here = self.done.get(&a.id).copied().unwrap_or(0);
        here.max(a.delivered.get(&self.output).copied().unwrap_or(0))
    }

    /// Forgets alerts the book no longer holds (cleared long ago), so the ledger stays the
    /// size of the book over months of running.
    pub fn forget_gone(&mut self, view: &AlertsView) {
        if self.done.len() > 2 * view.book.all().count() + 64 {
            let ids: std::collections::HashSet<&str> =
                view.book.all().map(|a| a.id.as_str()).collect();
            self.done.retain(|id, _| ids.contains(id.as_str()));
        }
    }

    /// Notes a delivery and reports it for the archive.
    pub async fn mark(&mut self, a: &str, version: u32, tx: &mpsc::Sender<Delivery>) {
        let v = self.done.entry(a.to_string()).or_insert(0);
        if *v >= version {
            return;
        }
        *v = version;
        let _ = tx
            .send(Delivery {
                output: self.output.clone(),
                alert_id: a.to_string(),
                version,
            })
            .await;
    }
}

/// Retry delays: 1 s doubling to 5 min.
pub fn backoff(attempt: u32) -> Duration {
    Duration::from_secs(1u64 << attempt.min(8)).min(Duration::from_secs(300))
}

/// The message a technician reads, in plain words.
pub fn plain_words(a: &Alert, unit: &str) -> String {
    use crate::format::num;
    let mut s = String::new();
    s.push_str(&format!(
        "{} on {}: {}\n",
        a.severity.name().to_uppercase(),
        a.characteristic,
        a.message
    ));
    s.push_str(&format!("Rule: {}  Alert: {}\n", a.rule, a.id));
    if a.count > 1 {
        s.push_str(&format!(
            "Fired {} times; latest: {}\n",
            a.count, a.last_message
        ));
    }
    if !a.points.is_empty() {
        let pts = a
            .points
            .iter()
            .map(|p| format!("#{} {}", p.number, num(p.value)))
            .collect::<Vec<_>>()
            .join(", ");
        s.push_str(&format!("Recent values ({unit}): {pts}\n"));
    }
    s.push_str(&format!(
        "Statistic {} against limit {}\n",
        num(a.statistic),
        num(a.limit)
    ));
    if let Some(p) = &a.reaction_plan {
        s.push_str(&format!("What to check first: {p}\n"));
    }
    s
}

async fn log_output(o: Output, mut f: Feeds) {
    let mut ledger = Ledger::new(&o.id);
    loop {
        let view = f.alerts.borrow_and_update().clone();
        ledger.forget_gone(&view);
        for a in view.for_output(o.min_severity, o.escalation) {
            let have = ledger.delivered(a);
            if have >= a.version {
                continue;
            }
            if have == 0 {
                let unit = view
                    .characteristics
                    .get(&a.characteristic)
                    .map(|c| c.unit.as_str())
                    .unwrap_or("");
                let text = plain_words(a, unit);
                let bar = "=".repeat(72);
                eprintln!(
                    "{bar}\n{}{}\n{bar}",
                    text,
                    if a.status == crate::alerts::Status::Open {
                        format!(
                            "Acknowledge: linewarden ack {} --by NAME [--note TEXT]",
                            a.id
                        )
                    } else {
                        format!("Now {}.", a.status.name())
                    }
                );
            }
            ledger.mark(&a.id, a.version, &f.delivered).await;
        }
        tokio::select! {
            r = f.alerts.changed() => if r.is_err() { break },
            _ = f.shutdown.changed() => break,
        }
    }
}
