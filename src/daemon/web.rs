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
use axum::http::{Request, StatusCode, header};
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
use crate::archive::writer::{HeldCause, Status as ArchiveStatus, WriterState};
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
    /// `[web]` as configured (the names the page answers to).
    pub web: Arc<crate::config::Web>,
    /// Logins and acknowledgements, when a users file is configured.
    pub access: Option<Arc<super::access::Access>>,
}

/// The routes. The page's (everything but the metrics and health checks, which machines
/// fetch by whatever name they know the box by) answer only to the names in `[web] hosts`: a
/// request with another `Host` is refused before it is read.
pub fn router(state: WebState) -> Router<()> {
    use super::page;
    use axum::routing::post;
    let pages = Router::new()
        .route("/", get(page::overview))
        .route("/monitor", get(page::monitor))
        .route("/c/{id}", get(page::characteristic))
        .route("/events", get(page::events))
        .route("/login", get(page::login_form).post(page::login))
        .route("/logout", post(page::logout))
        .route("/ack", post(page::acknowledge))
        .layer(axum::middleware::from_fn_with_state(
            state.clone(),
            host_guard,
        ));
    Router::new()
        .merge(pages)
        .route("/metrics", get(metrics))
        .route("/healthz", get(healthz))
        .route("/readyz", get(readyz))
        // Forms are a few hundred bytes; nothing posted here needs more.
        .layer(axum::extract::DefaultBodyLimit::max(16 * 1024))
        .with_state(state)
}

/// Refuses a page request whose `Host` is not one the page answers to (a foreign site's name
/// resolved to this box: DNS rebinding).
async fn host_guard(
    State(state): State<WebState>,
    req: axum::extract::Request,
    next: axum::middleware::Next,
) -> Response {
    let host = req
        .headers()
        .get(header::HOST)
        .and_then(|h| h.to_str().ok())
        .unwrap_or_default();
    if state.web.host_allowed(host) {
        return next.run(req).await;
    }
    tracing::debug!(component = "web", "refused a request for the host {host:?}");
    (
        StatusCode::MISDIRECTED_REQUEST,
        format!(
            "This page does not answer to the name {host:?}. The names it answers to are set in [web] hosts.\n"
        ),
    )
        .into_response()
}

/// The client's address, for the login limits and the log.
pub type Peer = axum::extract::ConnectInfo<std::net::SocketAddr>;

/// A client that has not sent a whole request header this long after connecting, or after
/// its last response on a kept-alive connection, is disconnected. The page's own event stream
/// is a response in progress, never waiting for a header, so it is not cut.
pub const HEADER_TIMEOUT: std::time::Duration = std::time::Duration::from_secs(10);

/// Connections served at once at most. More are accepted and closed at once (shed), so that
/// page clients can never take the descriptors the archive and the sources need.
pub const MAX_CONNECTIONS: usize = 256;

/// How long open connections (event streams among them) get to finish at shutdown.
const SHUTDOWN_GRACE: std::time::Duration = std::time::Duration::from_secs(2);

/// The connections served at once under a soft limit of `nofile` descriptors: at most
/// [`MAX_CONNECTIONS`], and never more than a quarter of the limit, which leaves three
/// quarters to the archive, the sources and the outputs.
pub fn connection_cap(nofile: u64) -> usize {
    ((nofile / 4) as usize).clamp(8, MAX_CONNECTIONS)
}

/// The soft limit on open files, raised to the hard limit first (the service manager's
/// default soft limit of 1024 is kept for old programs' sake; the unit sets LimitNOFILE).
pub fn raise_nofile() -> u64 {
    let mut r = libc::rlimit {
        rlim_cur: 0,
        rlim_max: 0,
    };
    // SAFETY: getrlimit and setrlimit read and write the struct passed; nothing else.
    unsafe {
        if libc::getrlimit(libc::RLIMIT_NOFILE, &mut r) != 0 {
            return 1024;
        }
        if r.rlim_cur < r.rlim_max {
            let want = libc::rlimit {
                rlim_cur: r.rlim_max,
                rlim_max: r.rlim_max,
            };
            if libc::setrlimit(libc::RLIMIT_NOFILE, &want) == 0 {
                r.rlim_cur = r.rlim_max;
            }
        }
    }
    r.rlim_cur
}

/// Serves until `shutdown` turns true; over TLS when the config has a certificate.
pub async fn serve(
    listener: tokio::net::TcpListener,
    tls: Option<Arc<rustls::ServerConfig>>,
    state: WebState,
    shutdown: watch::Receiver<bool>,
) {
    let cap = connection_cap(raise_nofile());
    let app = router(state);
    match tls {
        None => serve_on(listener, app, cap, shutdown).await,
        Some(cfg) => serve_on(TlsListener::new(listener, cfg), app, cap, shutdown).await,
    }
}

/// The connection loop: each connection served by HTTP/1 with [`HEADER_TIMEOUT`], at most
/// `cap` at once (the rest shed), all told to finish at shutdown.
async fn serve_on<L>(
    mut listener: L,
    app: Router<()>,
    cap: usize,
    mut shutdown: watch::Receiver<bool>,
) where
    L: axum::serve::Listener<Addr = std::net::SocketAddr>,
{
    let slots = Arc::new(tokio::sync::Semaphore::new(cap));
    let mut shed = 0u64;
    loop {
        let (io, peer) = tokio::select! {
            c = listener.accept() => c,
            _ = async { let _ = shutdown.wait_for(|s| *s).await; } => break,
        };
        let Ok(permit) = slots.clone().try_acquire_owned() else {
            shed += 1;
            if shed <= 3 || shed.is_power_of_two() {
                tracing::warn!(
                    component = "web",
                    "{cap} page connections are open; a connection from {peer} was closed at once ({shed} so far)"
                );
            }
            drop(io);
            continue;
        };
        let app = app.clone();
        let mut stop = shutdown.clone();
        tokio::spawn(async move {
            let _permit = permit;
            let svc = hyper::service::service_fn(move |mut req: Request<hyper::body::Incoming>| {
                req.extensions_mut()
                    .insert(axum::extract::ConnectInfo(peer));
                let mut app = app.clone();
                tower_service::Service::call(&mut app, req.map(axum::body::Body::new))
            });
            let mut builder = hyper::server::conn::http1::Builder::new();
            builder
                .timer(hyper_util::rt::TokioTimer::new())
                .header_read_timeout(HEADER_TIMEOUT);
            let conn = builder.serve_connection(hyper_util::rt::TokioIo::new(io), svc);
            tokio::pin!(conn);
            tokio::select! {
                r = conn.as_mut() => {
                    if let Err(e) = r {
                        tracing::debug!(component = "web", "connection from {peer} ended: {e}");
                    }
                }
                _ = async { let _ = stop.wait_for(|s| *s).await; } => {
                    conn.as_mut().graceful_shutdown();
                    let _ = tokio::time::timeout(SHUTDOWN_GRACE, conn).await;
                }
            }
        });
    }
    // Open connections see the same signal and finish within the grace time.
    let _ = tokio::time::timeout(
        SHUTDOWN_GRACE + std::time::Duration::from_millis(200),
        slots.acquire_many(cap as u32),
    )
    .await;
}

/// Handshakes at once at most; more wait for their turn to be accepted.
const MAX_HANDSHAKES: usize = 64;
/// A client that has not finished its TLS handshake by then is dropped.
const HANDSHAKE_TIMEOUT: std::time::Duration = std::time::Duration::from_secs(10);

/// Accepts TCP connections and hands on those that complete a TLS handshake. Handshakes run
/// side by side, each with a time limit, so a client that opens a connection and says nothing
/// holds up no one.
pub struct TlsListener {
    local: std::net::SocketAddr,
    ready: tokio::sync::mpsc::Receiver<(
        tokio_rustls::server::TlsStream<tokio::net::TcpStream>,
        std::net::SocketAddr,
    )>,
    _accepting: tokio::task::JoinHandle<()>,
}

impl Drop for TlsListener {
    fn drop(&mut self) {
        self._accepting.abort();
    }
}

impl TlsListener {
    pub fn new(listener: tokio::net::TcpListener, cfg: Arc<rustls::ServerConfig>) -> TlsListener {
        let local = listener
            .local_addr()
            .unwrap_or_else(|_| ([0, 0, 0, 0], 0).into());
        let (tx, ready) = tokio::sync::mpsc::channel(16);
        let acceptor = tokio_rustls::TlsAcceptor::from(cfg);
        let slots = Arc::new(tokio::sync::Semaphore::new(MAX_HANDSHAKES));
        let accepting = tokio::spawn(async move {
            loop {
                let Ok(permit) = slots.clone().acquire_owned().await else {
                    return;
                };
                let (tcp, peer) = match listener.accept().await {
                    Ok(x) => x,
                    Err(e) => {
                        tracing::debug!(component = "web", "accept failed: {e}");
                        tokio::time::sleep(std::time::Duration::from_millis(50)).await;
                        continue;
                    }
                };
                let acceptor = acceptor.clone();
                let tx = tx.clone();
                tokio::spawn(async move {
                    let _permit = permit;
                    match tokio::time::timeout(HANDSHAKE_TIMEOUT, acceptor.accept(tcp)).await {
                        Ok(Ok(s)) => {
                            let _ = tx.send((s, peer)).await;
                        }
                        Ok(Err(e)) => {
                            tracing::debug!(
                                component = "web",
                                "TLS handshake with {peer} failed: {e}"
                            )
                        }
                        Err(_) => tracing::debug!(
                            component = "web",
                            "TLS handshake with {peer} timed out"
                        ),
                    }
                });
            }
        });
        TlsListener {
            local,
            ready,
            _accepting: accepting,
        }
    }
}

impl axum::serve::Listener for TlsListener {
    type Io = tokio_rustls::server::TlsStream<tokio::net::TcpStream>;
    type Addr = std::net::SocketAddr;

    async fn accept(&mut self) -> (Self::Io, Self::Addr) {
        match self.ready.recv().await {
            Some(x) => x,
            // The accepting task ended (the runtime is shutting down): wait to be dropped.
            None => std::future::pending().await,
        }
    }

    fn local_addr(&self) -> std::io::Result<Self::Addr> {
        Ok(self.local)
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
        WriterState::Held { cause, .. } => problems.push(match cause {
            HeldCause::DiskFull => "the archive's disk is full: readings are held back".to_string(),
            HeldCause::NoDescriptors => {
                "the daemon has no file descriptor free for the archive: readings are held back"
                    .to_string()
            }
        }),
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
            web: Arc::new(crate::config::Web {
                listen: ([127, 0, 0, 1], 9630).into(),
                hosts: Vec::new(),
                users: None,
                tls: None,
                session_ms: 3_600_000,
            }),
            access: None,
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
            WriterState::Held {
                cause: HeldCause::DiskFull,
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
