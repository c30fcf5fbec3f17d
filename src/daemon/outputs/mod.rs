//! Where alerts go. Each output is its own task: it watches the alerts, delivers what it has
//! not delivered yet (the alert id and version are the idempotency key), retries with backoff
//! while its peer is unreachable, and reports each delivery back so the archive records it; a
//! restart resumes from what the archive says was delivered.
//!
//! * [`mqtt`] — alert events, retained states and daemon status, acknowledgements from an HMI.
//! * [`email`] — plain text and HTML with an inline chart, rate-limited, with digests.
//! * [`light`] — a stack light on Modbus TCP or RTU coils.
//! * the log output here — a framed message on the console for each new alert.

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
    /// The plant's time zone, for the times people read.
    pub timezone: jiff::tz::TimeZone,
    /// Failed attempts to deliver (a send refused, a device or broker lost), for the metrics.
    pub failures: Arc<std::sync::atomic::AtomicU64>,
}

impl Feeds {
    /// Counts a failed attempt to deliver.
    pub fn failed(&self) {
        self.failures
            .fetch_add(1, std::sync::atomic::Ordering::Relaxed);
    }
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

/// The alert in plain words for a person: what and where, which chart and which way, the
/// parts, the figures (with the characteristic's decimals; a statistic beyond its limit never
/// prints equal to it), and what to check first. Every figure is of the alert's one cause.
pub fn plain_words(
    a: &Alert,
    unit: &str,
    decimals: Option<usize>,
    tz: &jiff::tz::TimeZone,
) -> String {
    use crate::format::{fixed, fixed_pair, num, sig_pair};
    let value = |v: f64| decimals.map_or_else(|| num(v), |d| fixed(v, d));
    let mut s = String::new();
    s.push_str(&format!(
        "{} on {}: {}\n",
        a.severity.name().to_uppercase(),
        a.characteristic,
        a.message
    ));
    let chart = match a.chart {
        crate::rules::Chart::Location => "the location chart (subgroup means or readings)",
        crate::rules::Chart::Dispersion => {
            "the spread chart (ranges, standard deviations or moving ranges)"
        }
        crate::rules::Chart::Reading => "single readings",
    };
    let way = match a.side {
        Some(crate::rules::Side::Above) => ", moving up",
        Some(crate::rules::Side::Below) => ", moving down",
        None => "",
    };
    s.push_str(&format!("Seen on {chart}{way}.\n"));
    if a.provisional {
        s.push_str(&format!(
            "Limits: PROVISIONAL, learned by the daemon from its first subgroups and not yet approved by an engineer{}.\n",
            match a.capped_from {
                Some(f) => format!(
                    "; this alert is held at {} until they are (its rule says {})",
                    a.severity.name(),
                    f.name()
                ),
                None => String::new(),
            }
        ));
    }
    let local = |ms: i64| crate::format::local_ms(ms, tz);
    if a.count > 1 {
        s.push_str(&format!(
            "When: first {}, latest {}\n",
            local(a.raised_ms),
            local(a.last_seen_ms)
        ));
    } else {
        s.push_str(&format!("When: {}\n", local(a.raised_ms)));
    }
    match a.parts.as_slice() {
        [] => {}
        [one] => s.push_str(&format!("Part: {one}\n")),
        many => s.push_str(&format!("Parts: {}\n", many.join(", "))),
    }
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
            .map(|p| format!("#{} {}", p.number, value(p.value)))
            .collect::<Vec<_>>()
            .join(", ");
        let unit = if unit.is_empty() {
            String::new()
        } else {
            format!(" ({unit})")
        };
        s.push_str(&format!("Points{unit}: {pts}\n"));
    }
    let (stat, limit) = match decimals {
        Some(d) => fixed_pair(a.statistic, a.limit, d),
        None => sig_pair(a.statistic, a.limit),
    };
    s.push_str(&format!("Statistic {stat} against limit {limit}\n"));
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
                let c = view.characteristics.get(&a.characteristic);
                let unit = c.map(|c| c.unit.as_str()).unwrap_or("");
                let text = plain_words(a, unit, c.and_then(|c| c.decimals), &f.timezone);
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

#[cfg(test)]
mod tests {
    use super::*;
    use crate::alerts::{Book, Level};
    use crate::rules::{Chart, PointRef, Severity, Side, Violation};

    /// The regression: `Fired 2 times; latest: subgroup range 0.033 mm …` and `Statistic 0.033
    /// against limit 21.4642` in one alert, and `mean 12.0047 mm is above the upper control
    /// limit 12.0047 mm`. Each alert's words are now its own cause's, with its chart, its way,
    /// its parts, and figures that compare truly.
    #[test]
    fn the_words_of_an_alert_belong_to_its_one_cause() {
        let v = |statistic: f64, limit: f64, chart: Chart| Violation {
            rule: "beyond-limits".into(),
            severity: Severity::Stop,
            message: "beyond".into(),
            points: vec![PointRef {
                number: 33,
                time_ms: 0,
                value: statistic,
            }],
            statistic,
            limit,
            side: Some(Side::Above),
            chart,
            provisional: false,
            capped_from: None,
        };
        let mut b = Book::default();
        let parts = ["VB00187".to_string(), "VB00188".to_string()];
        b.fired(
            "port",
            &v(0.033, 0.021, Chart::Dispersion),
            Level::Subgroup,
            "33",
            &parts,
            Some("Check the insert"),
            0,
        );
        b.fired(
            "port",
            &v(12.00472, 12.00468, Chart::Location),
            Level::Subgroup,
            "33",
            &[],
            None,
            0,
        );
        let spread = b.get("port-33-beyond-limits-spread-up").unwrap();
        let utc = jiff::tz::TimeZone::UTC;
        let text = plain_words(spread, "mm", Some(4), &utc);
        assert!(text.contains("When: 1970-01-01 00:00:00 +00:00"), "{text}");
        assert!(text.contains("Seen on the spread chart"), "{text}");
        assert!(text.contains("moving up"), "{text}");
        assert!(text.contains("Parts: VB00187, VB00188"), "{text}");
        assert!(
            text.contains("Statistic 0.0330 against limit 0.0210"),
            "{text}"
        );
        assert!(text.contains("Points (mm): #33 0.0330"), "{text}");
        let mean = b.get("port-33-beyond-limits-up").unwrap();
        let text = plain_words(mean, "mm", Some(4), &utc);
        assert!(
            text.contains("Statistic 12.00472 against limit 12.00468"),
            "{text}"
        );
        assert!(text.contains("the location chart"), "{text}");
        assert!(!text.contains("Parts"), "{text}");
    }
}
