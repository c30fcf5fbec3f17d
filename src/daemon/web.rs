//! The daemon's HTTP endpoint (`[web]`): `/metrics` for the plant's monitoring, `/healthz` and
//! `/readyz` for whatever supervises the box.
//!
//! A reader of the state like the control socket: it reads what the engine task publishes (the
//! alerts, the running counts, the archive writer's status, the engine loop's heartbeat) and
//! never reaches into the engine or waits for it. Each scrape builds its answer from those
//! snapshots.

use std::path::PathBuf;
use std::sync::Arc;
use std::sync::atomic::{AtomicI64, AtomicU64, Ordering};

use axum::Router;
use axum::extract::State;
use axum::http::{StatusCode, header};
use axum::response::{IntoResponse, Response};
use axum::routing::get;
use prometheus_client::encoding::text::encode;
use prometheus_client::metrics::counter::Counter;
use prometheus_client::metrics::family::Family;
use prometheus_client::metrics::gauge::Gauge;
use prometheus_client::metrics::info::Info;
use prometheus_client::registry::{Registry, Unit};
use tokio::sync::watch;

use super::clock::now_ms;
use super::hub::{AlertsView, Counts};
use crate::alerts::Status;
use crate::archive::writer::{Status as ArchiveStatus, WriterState};
use crate::rules::Severity;

/// The engine loop turns at least once a second (its tick); this long without a turn is a
/// stall, and `/readyz` says so.
const STALL_MS: i64 = 10_000;

/// What the endpoint reads.
#[derive(Clone)]
pub struct WebState {
    pub alerts: watch::Receiver<Arc<AlertsView>>,
    pub counts: watch::Receiver<Arc<Counts>>,
    pub archive: watch::Receiver<ArchiveStatus>,
    /// When the engine loop last turned (ms since 1970).
    pub progress: Arc<AtomicI64>,
    /// Each output's failed deliveries.
    pub failures: Arc<Vec<(String, Arc<AtomicU64>)>>,
    pub archive_dir: PathBuf,
    /// For the live page: every characteristic's view, the light, the cell's name, the time
    /// zone people read times in, and the reaction plans.
    pub views: watch::Receiver<super::hub::Views>,
    pub light: watch::Receiver<super::hub::Light>,
    pub cell: String,
    pub timezone: jiff::tz::TimeZone,
    pub reaction_plans: super::page::Plans,
    /// Charts drawn for the page, by characteristic and width, with the state they show.
    pub charts: super::page::ChartCache,
}

/// The routes.
pub fn router(state: WebState) -> Router {
    use super::page;
    Router::new()
        .route("/", get(page::overview))
        .route("/monitor", get(page::monitor))
        .route("/c/{id}", get(page::characteristic))
        .route("/events", get(page::events))
        .route("/metrics", get(metrics))
        .route("/healthz", get(healthz))
        .route("/readyz", get(readyz))
        .with_state(state)
}

/// Serves until `shutdown` turns true.
pub async fn serve(
    listener: tokio::net::TcpListener,
    state: WebState,
    mut shutdown: watch::Receiver<bool>,
) {
    let done = async move {
        let _ = shutdown.wait_for(|s| *s).await;
    };
    if let Err(e) = axum::serve(listener, router(state))
        .with_graceful_shutdown(done)
        .await
    {
        tracing::error!(component = "web", "the web endpoint stopped: {e}");
    }
}

type Labels = Vec<(&'static str, String)>;

fn labels(pairs: &[(&'static str, &str)]) -> Labels {
    pairs.iter().map(|(k, v)| (*k, v.to_string())).collect()
}

fn severity_name(s: Severity) -> &'static str {
    match s {
        Severity::Stop => "stop",
        Severity::Warn => "warn",
        Severity::Notice => "notice",
    }
}

/// The metrics text, built from the snapshots (also for tests and `promtool`).
pub fn render(state: &WebState) -> String {
    let counts = state.counts.borrow().clone();
    let alerts = state.alerts.borrow().clone();
    let archive = state.archive.borrow().clone();
    let mut r = Registry::with_prefix("linewarden");

    let info = Info::new(vec![("version", env!("CARGO_PKG_VERSION").to_string())]);
    r.register("build", "The running build", info);

    let accepted = Family::<Labels, Counter>::default();
    let rejected = Family::<Labels, Counter>::default();
    let up = Family::<Labels, Gauge>::default();
    for s in &counts.sources {
        let l = labels(&[("source", &s.source)]);
        accepted.get_or_create(&l).inc_by(s.readings);
        rejected.get_or_create(&l).inc_by(s.rejected);
        up.get_or_create(&l).set(i64::from(s.state == "up"));
    }
    r.register(
        "readings_accepted",
        "Readings accepted and archived, per source",
        accepted,
    );
    r.register(
        "readings_rejected",
        "Readings rejected (archived as rejected, with the reason), per source",
        rejected,
    );
    r.register(
        "source_up",
        "1 while the source is connected or reading, 0 while it is down or has ended",
        up,
    );

    let subgroups = Family::<Labels, Counter>::default();
    for (c, n) in &counts.subgroups {
        subgroups
            .get_or_create(&labels(&[("characteristic", c)]))
            .inc_by(*n);
    }
    r.register(
        "subgroups_checked",
        "Subgroups checked against limits and run rules, per characteristic",
        subgroups,
    );
    let violations = Family::<Labels, Counter>::default();
    for ((c, rule, sev), n) in &counts.violations {
        violations
            .get_or_create(&labels(&[
                ("characteristic", c),
                ("rule", rule),
                ("severity", severity_name(*sev)),
            ]))
            .inc_by(*n);
    }
    r.register(
        "violations",
        "Run rule violations, per characteristic, rule and severity",
        violations,
    );

    let open = Family::<Labels, Gauge>::default();
    for sev in [Severity::Stop, Severity::Warn, Severity::Notice] {
        open.get_or_create(&labels(&[("severity", severity_name(sev))]))
            .set(0);
    }
    let unacknowledged = Gauge::<i64>::default();
    for a in alerts.book.active() {
        open.get_or_create(&labels(&[("severity", severity_name(a.severity))]))
            .inc();
        if a.status == Status::Open && a.severity == Severity::Stop {
            unacknowledged.inc();
        }
    }
    r.register("open_alerts", "Alerts not yet cleared, per severity", open);
    r.register(
        "unacknowledged_stop_alerts",
        "Stop-level alerts nobody has acknowledged (the stack light is red while above 0)",
        unacknowledged,
    );

    let durable = Gauge::<i64>::default();
    durable.set(i64::try_from(archive.durable_seq).unwrap_or(i64::MAX));
    r.register(
        "archive_durable_sequence",
        "Every archive record up to this sequence number is on disk",
        durable,
    );
    let writable = Gauge::<i64>::default();
    writable.set(i64::from(matches!(archive.state, WriterState::Running)));
    r.register(
        "archive_writable",
        "1 while the archive takes records, 0 while its disk is full or it has failed",
        writable,
    );
    let bytes = Gauge::<i64>::default();
    bytes.set(archive_bytes(&state.archive_dir));
    r.register_with_unit(
        "archive_size",
        "Size of the archive's segment files",
        Unit::Bytes,
        bytes,
    );
    if let Some(free) = crate::fsutil::free_bytes(&state.archive_dir) {
        let g = Gauge::<i64>::default();
        g.set(i64::try_from(free).unwrap_or(i64::MAX));
        r.register_with_unit(
            "archive_disk_free",
            "Free space on the archive's filesystem (for an unprivileged user)",
            Unit::Bytes,
            g,
        );
    }

    let failures = Family::<Labels, Counter>::default();
    for (id, n) in state.failures.iter() {
        failures
            .get_or_create(&labels(&[("output", id)]))
            .inc_by(n.load(Ordering::Relaxed));
    }
    r.register(
        "output_delivery_failures",
        "Failed attempts to deliver alerts (a send refused, a device or broker lost), per output",
        failures,
    );

    let lag = Gauge::<f64, AtomicU64>::default();
    lag.set((now_ms() - state.progress.load(Ordering::Relaxed)).max(0) as f64 / 1000.0);
    r.register_with_unit(
        "engine_loop_lag",
        "Time since the engine loop last turned (it turns at least once a second)",
        Unit::Seconds,
        lag,
    );

    let mut text = String::new();
    // Writing into a String cannot fail.
    let _ = encode(&mut text, &r);
    text
}

/// The total size of the archive's segment files.
fn archive_bytes(dir: &std::path::Path) -> i64 {
    let Ok(entries) = std::fs::read_dir(dir) else {
        return 0;
    };
    entries
        .filter_map(|e| e.ok())
        .filter(|e| e.path().extension().is_some_and(|x| x == "lwseg"))
        .filter_map(|e| e.metadata().ok())
        .map(|m| i64::try_from(m.len()).unwrap_or(0))
        .sum()
}

/// The same metrics in the classic Prometheus text format (0.0.4), for scrapers and tools that
/// do not ask for OpenMetrics: a counter's family is named with its `_total`, the build info is
/// a gauge named `..._info`, and the `# UNIT` and `# EOF` lines go.
pub fn classic(openmetrics: &str) -> String {
    let mut renamed: std::collections::HashMap<&str, (String, &str)> = Default::default();
    for l in openmetrics.lines() {
        if let Some(rest) = l.strip_prefix("# TYPE ")
            && let Some((name, kind)) = rest.split_once(' ')
        {
            let to = match kind {
                "counter" => (format!("{name}_total"), "counter"),
                "info" => (format!("{name}_info"), "gauge"),
                other => (name.to_string(), other),
            };
            renamed.insert(name, to);
        }
    }
    let mut out = String::with_capacity(openmetrics.len());
    for l in openmetrics.lines() {
        if l.starts_with("# UNIT ") || l == "# EOF" {
            continue;
        }
        if let Some(rest) = l.strip_prefix("# HELP ")
            && let Some((name, help)) = rest.split_once(' ')
        {
            let to = renamed.get(name).map_or(name, |(n, _)| n.as_str());
            out.push_str(&format!("# HELP {to} {help}\n"));
        } else if let Some(rest) = l.strip_prefix("# TYPE ")
            && let Some((name, _)) = rest.split_once(' ')
            && let Some((to, kind)) = renamed.get(name)
        {
            out.push_str(&format!("# TYPE {to} {kind}\n"));
        } else {
            out.push_str(l);
            out.push('\n');
        }
    }
    out
}

async fn metrics(State(state): State<WebState>, headers: axum::http::HeaderMap) -> Response {
    let text = tokio::task::spawn_blocking(move || render(&state))
        .await
        .unwrap_or_default();
    let openmetrics = headers
        .get_all(header::ACCEPT)
        .iter()
        .filter_map(|v| v.to_str().ok())
        .any(|v| v.contains("application/openmetrics-text"));
    if openmetrics {
        (
            [(
                header::CONTENT_TYPE,
                "application/openmetrics-text; version=1.0.0; charset=utf-8",
            )],
            text,
        )
            .into_response()
    } else {
        (
            [(
                header::CONTENT_TYPE,
                "text/plain; version=0.0.4; charset=utf-8",
            )],
            classic(&text),
        )
            .into_response()
    }
}

/// Alive: the process answers.
async fn healthz() -> &'static str {
    "alive\n"
}

/// Ready: the archive takes records, the engine loop turns, and no source is down.
async fn readyz(State(state): State<WebState>) -> Response {
    let mut problems = Vec::new();
    match &state.archive.borrow().state {
        WriterState::Running => {}
        WriterState::DiskFull { .. } => {
            problems.push("the archive's disk is full: readings are held back".to_string())
        }
        WriterState::Failed { message } => {
            problems.push(format!("the archive has failed: {message}"))
        }
        WriterState::Stopped => problems.push("the archive is closed: stopping".to_string()),
    }
    let lag = now_ms() - state.progress.load(Ordering::Relaxed);
    if lag > STALL_MS {
        problems.push(format!(
            "the engine loop has not turned for {} s",
            lag / 1000
        ));
    }
    for s in &state.counts.borrow().sources {
        if s.state == "down" {
            problems.push(format!(
                "source {} is down{}",
                s.source,
                if s.detail.is_empty() {
                    String::new()
                } else {
                    format!(": {}", s.detail)
                }
            ));
        }
    }
    if problems.is_empty() {
        (StatusCode::OK, "ready\n".to_string()).into_response()
    } else {
        (
            StatusCode::SERVICE_UNAVAILABLE,
            format!("not ready: {}\n", problems.join("; ")),
        )
            .into_response()
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::daemon::hub::SourceHealth;

    fn state(archive: WriterState, source: &str, progress_ms: i64) -> WebState {
        let counts = Counts {
            sources: vec![SourceHealth {
                source: "mqtt:cell4".into(),
                state: source.into(),
                since_ms: 0,
                last_reading_ms: None,
                readings: 3,
                rejected: 0,
                clock_skewed: 0,
                detail: "connection refused".into(),
            }],
            ..Counts::default()
        };
        WebState {
            alerts: watch::channel(Arc::new(AlertsView::default())).1,
            counts: watch::channel(Arc::new(counts)).1,
            archive: watch::channel(ArchiveStatus {
                durable_seq: 7,
                state: archive,
                segment: Some(1),
            })
            .1,
            progress: Arc::new(AtomicI64::new(progress_ms)),
            failures: Arc::new(Vec::new()),
            archive_dir: std::env::temp_dir(),
            views: watch::channel(Default::default()).1,
            light: watch::channel(super::super::hub::Light::Normal).1,
            cell: "cell".into(),
            timezone: jiff::tz::TimeZone::UTC,
            reaction_plans: Default::default(),
            charts: Default::default(),
        }
    }

    async fn ready(s: WebState) -> (StatusCode, String) {
        let r = readyz(State(s)).await;
        let code = r.status();
        let body = axum::body::to_bytes(r.into_body(), 1 << 16).await.unwrap();
        (code, String::from_utf8_lossy(&body).into_owned())
    }

    #[tokio::test]
    async fn readyz_names_every_reason_it_is_not_ready() {
        let now = now_ms();
        assert_eq!(
            ready(state(WriterState::Running, "up", now)).await,
            (StatusCode::OK, "ready\n".into())
        );
        let (code, body) = ready(state(
            WriterState::DiskFull {
                message: "no space left on device".into(),
            },
            "down",
            now - 60_000,
        ))
        .await;
        assert_eq!(code, StatusCode::SERVICE_UNAVAILABLE);
        for want in [
            "the archive's disk is full",
            "the engine loop has not turned for 60 s",
            "source mqtt:cell4 is down: connection refused",
        ] {
            assert!(body.contains(want), "{want} in {body}");
        }
        let (_, body) = ready(state(
            WriterState::Failed {
                message: "fsync failed".into(),
            },
            "ended",
            now,
        ))
        .await;
        assert!(
            body.contains("the archive has failed: fsync failed"),
            "{body}"
        );
    }

    #[test]
    fn the_classic_text_names_counter_and_info_families_as_their_samples() {
        let om = "# HELP x_build The build.\n# TYPE x_build info\nx_build_info{version=\"1\"} 1\n\
                  # HELP x_reads Reads.\n# TYPE x_reads counter\nx_reads_total 4\n\
                  # HELP x_size Size.\n# TYPE x_size_bytes gauge\n# UNIT x_size_bytes bytes\nx_size_bytes 9\n# EOF\n";
        let c = classic(om);
        assert!(c.contains("# TYPE x_build_info gauge\n"), "{c}");
        assert!(
            c.contains("# HELP x_reads_total Reads.\n# TYPE x_reads_total counter\n"),
            "{c}"
        );
        assert!(!c.contains("# UNIT") && !c.contains("# EOF"), "{c}");
        assert!(c.contains("x_size_bytes 9\n"), "{c}");
    }
}
