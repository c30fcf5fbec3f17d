//! The live page at the cell: an overview of every characteristic, one page per characteristic
//! (its charts, open alerts with what to check first, recent subgroups), and a cell monitor
//! readable from across the cell. Server-side HTML and SVG (the charts come from the one chart
//! module, as in the email and the report); live updates over one Server-Sent Events stream
//! per page, on which the page fetches its own fresh content. No build step, no external
//! resources, a few lines of plain JavaScript.
//!
//! Like the metrics it only reads what the engine task publishes (watches: the latest state,
//! never a queue), so a slow or stalled browser costs the engine nothing: a client that falls
//! behind simply fetches the state as it is when it catches up.

use std::collections::BTreeMap;
use std::convert::Infallible;
use std::sync::Arc;
use std::time::Duration;

use axum::extract::{Form, Path, Query, State};
use axum::http::{HeaderMap, StatusCode, header};
use axum::response::sse::{Event, KeepAlive, Sse};
use axum::response::{AppendHeaders, Html, IntoResponse, Redirect, Response};
use futures_util::stream::Stream;

use super::access::{LOGIN_COOKIE, LoginRefused, MAX_NOTE, SESSION_COOKIE, Session, same};
use super::hub::Light;
use super::web::{Peer, WebState};
use crate::alerts::{Alert, Standing, Status};
use crate::engine::CharView;
use crate::format::{fixed, html as esc};

/// `?fragment=1`: only the live part of the page (what the page's script fetches);
/// `?acked=ID`: after an acknowledgement from this page, say how it stands.
#[derive(serde::Deserialize, Default)]
pub struct Fragment {
    #[serde(default)]
    fragment: Option<String>,
    #[serde(default)]
    acked: Option<String>,
}

/// Who is looking: logged in (with the session's CSRF token for the forms) or not, and where
/// (for the way back after logging in).
pub struct Viewer {
    session: Option<Session>,
    can_login: bool,
    here: String,
}

fn viewer(state: &WebState, headers: &HeaderMap, here: &str) -> Viewer {
    let access = state.access.as_ref();
    Viewer {
        session: access.and_then(|a| a.session(headers)),
        can_login: access.is_some_and(|a| a.enabled().is_ok()),
        here: here.to_string(),
    }
}

/// Percent-encodes a query value.
fn query_value(v: &str) -> String {
    v.bytes()
        .map(|b| {
            if b.is_ascii_alphanumeric() || matches!(b, b'-' | b'_' | b'.' | b'~') {
                (b as char).to_string()
            } else {
                format!("%{b:02X}")
            }
        })
        .collect()
}

/// The meaning of a standing in plain words, and its class (colour by IEC 60073 meaning: red
/// for a state that needs action now, yellow for an abnormal one, green for normal; learning
/// carries no particular meaning and is shown neutral).
fn standing_words(v: &CharView) -> (&'static str, String) {
    match v.standing {
        Standing::ActionNeeded => (
            "act",
            "ACT NOW: a stop alert nobody has acknowledged".to_string(),
        ),
        Standing::Warning => ("warn", "Warning: a rule has fired".to_string()),
        Standing::InControl => ("ok", "In control".to_string()),
        Standing::Learning => (
            "learn",
            match v.baseline {
                Some((have, need)) => {
                    format!("Learning its limits: {have} of {need} subgroups")
                }
                None => "Learning its limits".to_string(),
            },
        ),
    }
}

fn light_words(l: Light) -> (&'static str, &'static str) {
    match l {
        Light::Alarm => ("act", "Cell: ACT NOW"),
        Light::Attention => ("warn", "Cell: attention"),
        Light::Normal => ("ok", "Cell: normal"),
        Light::Off => ("learn", "Cell: not monitoring"),
    }
}

const STYLE: &str = r#"
body{font-family:system-ui,sans-serif;margin:0;background:#f4f4f1;color:#1c1c1c}
header{display:flex;gap:1em;align-items:center;padding:.6em 1em;background:#263238;color:#fff}
header a{color:#fff}
header .light{padding:.2em .8em;border-radius:.3em;font-weight:700}
main{padding:1em;display:grid;gap:1em;grid-template-columns:repeat(auto-fill,minmax(520px,1fr))}
main.one{display:block}
.card{background:#fff;border-left:.9em solid #9e9e9e;padding:.6em .9em;border-radius:.3em}
.card h2{margin:.1em 0;font-size:1.15em}
.state{font-weight:700;margin:.2em 0}
.act{border-color:#c62828}.act .state,.light.act{color:#fff;background:#c62828;padding:.1em .4em}
.warn{border-color:#f9a825}.warn .state,.light.warn{background:#f9a825;color:#000;padding:.1em .4em}
.ok{border-color:#2e7d32}.light.ok{background:#2e7d32;color:#fff}
.learn{border-color:#9e9e9e}.light.learn{background:#9e9e9e;color:#000}
svg{max-width:100%;height:auto}
table{border-collapse:collapse}td,th{padding:.15em .6em;text-align:right;border-bottom:1px solid #ddd}
th:first-child,td:first-child{text-align:left}
.alert{background:#fff;border:2px solid #c62828;padding:.5em .8em;margin:.6em 0}
.alert.warn-sev{border-color:#f9a825}
.plan{font-weight:700}
.mon{grid-template-columns:repeat(auto-fill,minmax(30em,1fr))}
.mon .card{font-size:2.4em;padding:.4em .6em}
.mon .card h2{font-size:1.1em}
header .who{margin-left:auto}
form.inline{display:inline;margin:0}
form.ack{margin-top:.5em}
.done{background:#e8f5e9;border-left:.5em solid #2e7d32;padding:.4em .8em}
.refused{background:#ffebee;border-left:.5em solid #c62828;padding:.4em .8em}
.login{max-width:26em}.login label{display:block;margin:.6em 0}.login input{width:100%;font-size:1.1em}
button{font-size:1em;padding:.3em .9em}
"#;

/// Reconnects by itself (EventSource does), and on each change fetches this page's live part.
const SCRIPT: &str = r#"
const live = document.getElementById('live');
const es = new EventSource('/events');
let waiting = false;
// Someone filling in a form (a note to an acknowledgement) keeps it until they leave it.
const busy = () => { const a = document.activeElement; return a && a.closest && live.contains(a) && a.closest('form'); };
async function refresh() {
  if (busy()) { waiting = true; return; }
  waiting = false;
  const sep = location.search ? '&' : '?';
  try {
    const r = await fetch(location.pathname + location.search + sep + 'fragment=1', {cache: 'no-store'});
    if (r.ok && !busy()) { live.innerHTML = await r.text(); document.body.dataset.updated = Date.now(); }
  } catch (e) {}
}
es.addEventListener('changed', refresh);
document.addEventListener('focusout', () => setTimeout(() => { if (waiting) refresh(); }, 300));
"#;

/// The part of a page that updates: the header with the cell's light (and who is logged in),
/// and the content.
fn live(state: &WebState, who: Option<&Viewer>, class: &str, body: &str) -> String {
    let (lc, lw) = light_words(*state.light.borrow());
    let login = match who {
        Some(Viewer {
            session: Some(s), ..
        }) => format!(
            "<span class=\"who\">Logged in as {user}</span>\
             <form method=\"post\" action=\"/logout\" class=\"inline\">\
             <input type=\"hidden\" name=\"csrf\" value=\"{csrf}\"><button>Log out</button></form>",
            user = esc(&s.user),
            csrf = esc(&s.csrf),
        ),
        Some(Viewer {
            can_login: true,
            here,
            ..
        }) => format!(
            "<a class=\"who\" href=\"/login?next={}\">Log in to acknowledge</a>",
            query_value(here)
        ),
        _ => String::new(),
    };
    format!(
        "<header><strong>{cell}</strong><span class=\"light {lc}\" id=\"light\">{lw}</span>\
         <a href=\"/\">All characteristics</a><a href=\"/monitor\">Cell monitor</a>{login}</header>\
         <main class=\"{class}\">{body}</main>",
        cell = esc(&state.cell),
    )
}

fn page(state: &WebState, who: Option<&Viewer>, title: &str, class: &str, body: &str) -> String {
    format!(
        "<!doctype html><html lang=\"en\"><head><meta charset=\"utf-8\">\
         <meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">\
         <title>{t}</title><style>{STYLE}</style></head><body>\
         <div id=\"live\">{live}</div><script>{SCRIPT}</script></body></html>",
        t = esc(title),
        live = live(state, who, class, body),
    )
}

/// A page that does not update itself (the login form, an answer to a form).
fn still_page(state: &WebState, title: &str, body: &str) -> String {
    format!(
        "<!doctype html><html lang=\"en\"><head><meta charset=\"utf-8\">\
         <meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">\
         <title>{t}</title><style>{STYLE}</style></head><body>{live}</body></html>",
        t = esc(title),
        live = live(state, None, "one", body),
    )
}

fn fragment_or_page(
    state: &WebState,
    who: Option<&Viewer>,
    q: &Fragment,
    title: &str,
    class: &str,
    body: String,
) -> Response {
    let html = if q.fragment.is_some() {
        live(state, who, class, &body)
    } else {
        page(state, who, title, class, &body)
    };
    ([(header::CACHE_CONTROL, "no-store")], Html(html)).into_response()
}

fn alerts_of<'a>(book: &'a crate::alerts::Book, id: &str) -> Vec<&'a Alert> {
    book.by_characteristic
        .get(id)
        .map(|l| l.iter().filter(|a| a.status != Status::Cleared).collect())
        .unwrap_or_default()
}

/// The chart of `v` at `w`×`h`, drawn once per change of the characteristic and shared by
/// every page that shows it (twenty open pages cost one drawing, not twenty).
fn chart_svg(state: &WebState, v: &CharView, alerts: &[&Alert], w: u32, h: u32) -> Arc<String> {
    use std::hash::{Hash, Hasher};
    if v.recent.is_empty() {
        return Arc::new("<p>No subgroup yet.</p>".to_string());
    }
    let mut k = std::collections::hash_map::DefaultHasher::new();
    (w, h, v.readings, v.recent.len(), v.standing as u8).hash(&mut k);
    v.recent.last().map(|s| s.number).hash(&mut k);
    for a in alerts {
        (&a.id, a.version).hash(&mut k);
    }
    let key = k.finish();
    let slot = (v.id.clone(), w);
    if let Some((have, svg)) = state.charts.lock().ok().and_then(|c| c.get(&slot).cloned())
        && have == key
    {
        return svg;
    }
    let svg = Arc::new(
        match crate::chart::Picture::of_view(v, alerts, &state.timezone).and_then(|p| p.svg(w, h)) {
            Ok(svg) => svg,
            Err(e) => format!("<p>No chart: {}</p>", esc(&e)),
        },
    );
    if let Ok(mut c) = state.charts.lock() {
        c.insert(slot, (key, svg.clone()));
    }
    svg
}

fn latest_words(v: &CharView) -> String {
    let Some(s) = v.recent.last() else {
        return "no subgroup yet".to_string();
    };
    let d = v.decimals.unwrap_or(4);
    if let Some(words) = s.attribute_words(d) {
        return format!("subgroup {}: {}", s.number, esc(&words));
    }
    format!(
        "subgroup {}: mean {} {} (n = {}){}",
        s.number,
        fixed(s.mean, d),
        esc(&v.unit),
        s.n,
        s.dispersion
            .map(|x| format!(", spread {}", fixed(x, d)))
            .unwrap_or_default()
    )
}

/// Charts on the overview at most: the characteristics that need someone first, then the
/// rest in order; beyond this the overview lists them without a chart (their page has it), so
/// a page of a large cell stays a page a browser fetches every second.
const OVERVIEW_CHARTS: usize = 48;

/// `/`: every characteristic, its state in words and colour, its latest subgroup, a small
/// chart (for the first [`OVERVIEW_CHARTS`], most urgent first).
pub async fn overview(
    State(state): State<WebState>,
    headers: HeaderMap,
    Query(q): Query<Fragment>,
) -> Response {
    let views = state.views.borrow().clone();
    let book = state.alerts.borrow().book.clone();
    let s2 = state.clone();
    let body = tokio::task::spawn_blocking(move || {
        let mut body = String::new();
        let mut order: Vec<&Arc<CharView>> = views.values().collect();
        // Most urgent first; within a standing, by id (a stable place on the screen).
        order.sort_by(|a, b| b.standing.cmp(&a.standing).then_with(|| a.id.cmp(&b.id)));
        for (i, v) in order.into_iter().enumerate() {
            let (class, words) = standing_words(v);
            let on = alerts_of(&book, &v.id);
            let chart = if i < OVERVIEW_CHARTS {
                chart_svg(&s2, v, &on, 480, 300)
            } else {
                Arc::new(String::new())
            };
            body.push_str(&format!(
                "<section class=\"card {class}\" data-characteristic=\"{id}\">\
                 <h2><a href=\"/c/{id}\">{name}</a></h2><div class=\"state\">{words}</div>\
                 <div>{latest}</div>{chart}</section>",
                id = esc(&v.id),
                name = esc(if v.name.is_empty() { &v.id } else { &v.name }),
                words = esc(&words),
                latest = latest_words(v),
                chart = chart,
            ));
        }
        if body.is_empty() {
            body.push_str("<p>No characteristic is configured.</p>");
        }
        body
    })
    .await
    .unwrap_or_default();
    let who = viewer(&state, &headers, "/");
    fragment_or_page(&state, Some(&who), &q, &state.cell, "", body)
}

/// `/monitor`: the cell monitor, large type, no interaction needed.
pub async fn monitor(State(state): State<WebState>, Query(q): Query<Fragment>) -> Response {
    let views = state.views.borrow().clone();
    let book = state.alerts.borrow().book.clone();
    let mut body = String::new();
    for v in views.values() {
        let (class, words) = standing_words(v);
        let first = alerts_of(&book, &v.id)
            .into_iter()
            .filter(|a| a.status == Status::Open)
            .max_by_key(|a| (a.severity, a.raised_ms))
            .map(|a| format!("<div>{}</div>", esc(&a.last_message)))
            .unwrap_or_default();
        body.push_str(&format!(
            "<section class=\"card {class}\" data-characteristic=\"{id}\"><h2>{name}</h2>\
             <div class=\"state\">{words}</div>{first}</section>",
            id = esc(&v.id),
            name = esc(if v.name.is_empty() { &v.id } else { &v.name }),
            words = esc(&words),
        ));
    }
    fragment_or_page(&state, None, &q, "Cell monitor", "mon", body)
}

/// `/c/{id}`: one characteristic: its charts, its open alerts with what to check first and how
/// to acknowledge, its recent subgroups.
pub async fn characteristic(
    State(state): State<WebState>,
    headers: HeaderMap,
    Path(id): Path<String>,
    Query(q): Query<Fragment>,
) -> Response {
    let who = viewer(&state, &headers, &format!("/c/{id}"));
    let Some(v) = state.views.borrow().get(&id).cloned() else {
        return (
            StatusCode::NOT_FOUND,
            Html(page(
                &state,
                Some(&who),
                "Not found",
                "one",
                &format!("<p>No characteristic is called \"{}\".</p>", esc(&id)),
            )),
        )
            .into_response();
    };
    let book = state.alerts.borrow().book.clone();
    let plan = state.reaction_plans.get(&id).cloned();
    let s2 = state.clone();
    let session = who.session.clone();
    let can_login = who.can_login;
    let acked = q.acked.clone();
    let body = tokio::task::spawn_blocking(move || {
        let on = alerts_of(&book, &v.id);
        let (class, words) = standing_words(&v);
        let d = v.decimals.unwrap_or(4);
        let mut b = format!(
            "<section class=\"card {class}\"><h2>{name}</h2><div class=\"state\">{words}</div>\
             <div>{latest}</div></section>",
            name = esc(if v.name.is_empty() { &v.id } else { &v.name }),
            words = esc(&words),
            latest = latest_words(&v),
        );
        if let Some(a) = acked.as_deref().and_then(|id| {
            book.by_characteristic
                .get(&v.id)
                .and_then(|l| l.iter().find(|a| a.id == id))
        }) && let Some(k) = &a.ack
        {
            b.push_str(&format!(
                "<p class=\"done\" id=\"acked\">{id} is acknowledged by {by} at {at}.</p>",
                id = esc(&a.id),
                by = esc(&k.by),
                at = esc(&crate::format::local_ms(k.at_ms, &s2.timezone)),
            ));
        }
        for a in &on {
            let sev = match a.severity {
                crate::rules::Severity::Stop => "stop",
                crate::rules::Severity::Warn => "warn-sev",
                crate::rules::Severity::Notice => "warn-sev",
            };
            let status = match (a.status, a.gone) {
                (Status::Acknowledged, _) => format!(
                    "acknowledged by {}",
                    esc(a.ack.as_ref().map_or("someone", |k| k.by.as_str()))
                ),
                (_, true) => "the condition is gone; waiting for acknowledgement".to_string(),
                _ => "open".to_string(),
            };
            b.push_str(&format!(
                "<div class=\"alert {sev}\" data-alert=\"{id}\"><strong>{rule}</strong> ({status}, {count})<br>{msg}",
                id = esc(&a.id),
                rule = esc(&a.rule),
                count = if a.count == 1 {
                    "fired once".to_string()
                } else {
                    format!("fired {} times", a.count)
                },
                msg = esc(&a.last_message),
            ));
            if !a.parts.is_empty() {
                b.push_str(&format!("<br>Parts: {}", esc(&a.parts.join(", "))));
            }
            if let Some(p) = a.reaction_plan.as_ref().or(plan.as_ref()) {
                b.push_str(&format!("<br><span class=\"plan\">What to check first:</span> {}", esc(p)));
            }
            if a.status == Status::Open {
                match &session {
                    Some(s) => b.push_str(&format!(
                        "<form method=\"post\" action=\"/ack\" class=\"ack\">\
                         <input type=\"hidden\" name=\"csrf\" value=\"{csrf}\">\
                         <input type=\"hidden\" name=\"alert\" value=\"{id}\">\
                         <input type=\"hidden\" name=\"back\" value=\"{back}\">\
                         <label>Note (what you found or did) <input name=\"note\" maxlength=\"{MAX_NOTE}\" size=\"50\"></label> \
                         <button>Acknowledge as {user}</button></form>",
                        csrf = esc(&s.csrf),
                        id = esc(&a.id),
                        back = esc(&v.id),
                        user = esc(&s.user),
                    )),
                    None => {
                        b.push_str(&format!(
                            "<br>Acknowledge: <code>linewarden ack {} --by NAME [--note TEXT]</code>",
                            esc(&a.id)
                        ));
                        if can_login {
                            b.push_str(&format!(
                                " or <a href=\"/login?next={}\">log in</a> to acknowledge here",
                                query_value(&format!("/c/{}", v.id))
                            ));
                        }
                    }
                }
            }
            b.push_str("</div>");
        }
        b.push_str(&chart_svg(&s2, &v, &on, 1100, 560));
        b.push_str("<h3>Recent subgroups</h3><table><tr><th>subgroup</th><th>time</th><th>n</th><th>mean</th><th>spread</th></tr>");
        for s in v.recent.iter().rev().take(20) {
            b.push_str(&format!(
                "<tr><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td></tr>",
                s.number,
                esc(&crate::format::local_ms(s.time_ms, &s2.timezone)),
                s.n,
                fixed(s.mean, d),
                s.dispersion.map(|x| fixed(x, d)).unwrap_or_default()
            ));
        }
        b.push_str("</table>");
        b
    })
    .await
    .unwrap_or_default();
    fragment_or_page(&state, Some(&who), &q, &id, "one", body)
}

/// `/events`: one event, `changed`, whenever what the pages show has changed, at most one a
/// second. The event id is a version; a browser that reconnects with
/// `Last-Event-ID` of the version it last saw is told only of later changes.
pub async fn events(
    State(state): State<WebState>,
    headers: HeaderMap,
) -> Sse<impl Stream<Item = Result<Event, Infallible>>> {
    let seen: Option<u64> = headers
        .get("last-event-id")
        .and_then(|v| v.to_str().ok())
        .and_then(|v| v.parse().ok());
    struct Watching {
        state: WebState,
        first: bool,
        seen: Option<u64>,
        sent: tokio::time::Instant,
    }
    let start = Watching {
        state,
        first: true,
        seen,
        sent: tokio::time::Instant::now(),
    };
    let stream = futures_util::stream::unfold(start, |mut w| async move {
        loop {
            if !w.first {
                // At most one event a second per page: changes in between are one change
                // (the watches keep only the latest), so a busy cell costs each page one
                // fetch a second at most, and a page that does not keep up misses nothing
                // but intermediate states.
                tokio::time::sleep_until(w.sent + MIN_GAP).await;
                let mut views = w.state.views.clone();
                let mut alerts = w.state.alerts.clone();
                let mut light = w.state.light.clone();
                tokio::select! {
                    r = views.changed() => if r.is_err() { return None },
                    r = alerts.changed() => if r.is_err() { return None },
                    r = light.changed() => if r.is_err() { return None },
                }
                w.state.views = views;
                w.state.alerts = alerts;
                w.state.light = light;
            }
            w.first = false;
            let version = version(&w.state);
            if w.seen == Some(version) {
                continue;
            }
            w.seen = Some(version);
            w.sent = tokio::time::Instant::now();
            let ev = Event::default()
                .event("changed")
                .id(version.to_string())
                .data(version.to_string());
            return Some((Ok(ev), w));
        }
    });
    Sse::new(stream).keep_alive(KeepAlive::new().interval(Duration::from_secs(15)))
}

/// The least time between two events to one page.
const MIN_GAP: Duration = Duration::from_secs(1);

/// A number that changes whenever the views, the alerts or the light do.
fn version(state: &WebState) -> u64 {
    use std::hash::{Hash, Hasher};
    let mut h = std::collections::hash_map::DefaultHasher::new();
    let views = state.views.borrow();
    for (id, v) in views.iter() {
        id.hash(&mut h);
        v.readings.hash(&mut h);
        v.recent.last().map(|s| s.number).hash(&mut h);
        (v.standing as u8).hash(&mut h);
    }
    let alerts = state.alerts.borrow();
    for a in alerts.book.all() {
        a.id.hash(&mut h);
        a.version.hash(&mut h);
    }
    (*state.light.borrow() as u8).hash(&mut h);
    h.finish() >> 11
}

/// The page's reaction plans by characteristic (from the config).
pub type Plans = Arc<BTreeMap<String, String>>;

/// Drawn charts: (characteristic, width) → (what they show, the SVG). One entry per
/// characteristic and size, so it is bounded by the cell's size.
pub type ChartCache =
    Arc<std::sync::Mutex<std::collections::HashMap<(String, u32), (u64, Arc<String>)>>>;

/// A path on this page to go back to after logging in (never another site).
fn local_path(next: Option<&str>) -> String {
    match next {
        // Printable ASCII only: it goes into a Location header as it is.
        Some(n)
            if n.starts_with('/')
                && !n.starts_with("//")
                && !n.contains('\\')
                && n.bytes().all(|b| b.is_ascii_graphic())
                && n.len() < 300 =>
        {
            n.to_string()
        }
        _ => "/".to_string(),
    }
}

/// A refusal in plain words on a page of its own, with the way back.
fn refused(state: &WebState, code: StatusCode, words: &str, back: &str) -> Response {
    (
        code,
        [(header::CACHE_CONTROL, "no-store")],
        Html(still_page(
            state,
            "Refused",
            &format!(
                "<p class=\"refused\" id=\"refused\">{}</p><p><a href=\"{}\">Back</a></p>",
                esc(words),
                esc(back)
            ),
        )),
    )
        .into_response()
}

#[derive(serde::Deserialize, Default)]
pub struct Next {
    #[serde(default)]
    next: Option<String>,
}

/// The login form, with a fresh token in a short-lived cookie and in the form (a POST without
/// both, the same, is refused).
fn login_page(state: &WebState, next: &str, problem: Option<&str>, code: StatusCode) -> Response {
    let Some(access) = &state.access else {
        return refused(
            state,
            StatusCode::NOT_FOUND,
            "Acknowledging from this page is not configured ([web] users).",
            "/",
        );
    };
    if let Err(e) = access.enabled() {
        return refused(state, StatusCode::FORBIDDEN, &e, "/");
    }
    let t = super::access::token();
    let body = format!(
        "<form method=\"post\" action=\"/login\" class=\"login\"><h2>Log in to acknowledge alerts</h2>{problem}\
         <input type=\"hidden\" name=\"csrf\" value=\"{t}\">\
         <input type=\"hidden\" name=\"next\" value=\"{next}\">\
         <label>Name <input name=\"user\" autocomplete=\"username\" required autofocus></label>\
         <label>Password <input name=\"password\" type=\"password\" autocomplete=\"current-password\" required></label>\
         <button>Log in</button></form>",
        problem = problem
            .map(|p| format!("<p class=\"refused\" id=\"refused\">{}</p>", esc(p)))
            .unwrap_or_default(),
        next = esc(next),
    );
    (
        code,
        AppendHeaders([
            (header::SET_COOKIE, access.set_cookie(LOGIN_COOKIE, &t, 900)),
            (header::CACHE_CONTROL, "no-store".to_string()),
        ]),
        Html(still_page(state, "Log in", &body)),
    )
        .into_response()
}

/// `GET /login`.
pub async fn login_form(State(state): State<WebState>, Query(q): Query<Next>) -> Response {
    login_page(&state, &local_path(q.next.as_deref()), None, StatusCode::OK)
}

#[derive(serde::Deserialize)]
pub struct LoginForm {
    #[serde(default)]
    user: String,
    #[serde(default)]
    password: String,
    #[serde(default)]
    csrf: String,
    #[serde(default)]
    next: Option<String>,
}

/// The checks every POST passes before its form is looked at: logins possible here, and the
/// request from this page (Origin). The `Host` was checked on the way in. The page's access
/// control, when they pass.
fn post_guard(
    state: &WebState,
    headers: &HeaderMap,
) -> Result<std::sync::Arc<super::access::Access>, Box<Response>> {
    let Some(access) = &state.access else {
        return Err(Box::new(refused(
            state,
            StatusCode::NOT_FOUND,
            "Acknowledging from this page is not configured ([web] users).",
            "/",
        )));
    };
    if let Err(e) = access.enabled() {
        return Err(Box::new(refused(state, StatusCode::FORBIDDEN, &e, "/")));
    }
    if let Err(e) = access.same_origin(headers) {
        tracing::warn!(component = "web", "refused a form: {e}");
        return Err(Box::new(refused(state, StatusCode::FORBIDDEN, &e, "/")));
    }
    Ok(access.clone())
}

/// `POST /login`.
pub async fn login(
    State(state): State<WebState>,
    axum::extract::ConnectInfo(peer): Peer,
    headers: HeaderMap,
    Form(f): Form<LoginForm>,
) -> Response {
    let access = match post_guard(&state, &headers) {
        Ok(a) => a,
        Err(r) => return *r,
    };
    let next = local_path(f.next.as_deref());
    let token_ok = super::access::cookie(&headers, LOGIN_COOKIE)
        .is_some_and(|c| !f.csrf.is_empty() && same(&c, &f.csrf));
    if !token_ok {
        return login_page(
            &state,
            &next,
            Some("The login form had expired or did not come from this page. Please log in again."),
            StatusCode::FORBIDDEN,
        );
    }
    match access.login(peer.ip(), f.user.trim(), &f.password).await {
        Ok((token, s)) => {
            tracing::info!(component = "web", "{} logged in from {}", s.user, peer.ip());
            let max_age = (s.expires_ms - super::clock::now_ms()) / 1000;
            (
                AppendHeaders([
                    (
                        header::SET_COOKIE,
                        access.set_cookie(SESSION_COOKIE, &token, max_age),
                    ),
                    (header::SET_COOKIE, access.set_cookie(LOGIN_COOKIE, "", 0)),
                ]),
                Redirect::to(&next),
            )
                .into_response()
        }
        Err(LoginRefused::Wrong) => {
            tracing::warn!(
                component = "web",
                "failed login as {:?} from {}",
                f.user,
                peer.ip()
            );
            login_page(
                &state,
                &next,
                Some("Wrong name or password."),
                StatusCode::UNAUTHORIZED,
            )
        }
        Err(LoginRefused::TooMany { retry_after_s }) => {
            tracing::warn!(
                component = "web",
                "login as {:?} from {} refused: too many failed attempts",
                f.user,
                peer.ip()
            );
            let mut r = login_page(
                &state,
                &next,
                Some(&format!(
                    "Too many failed logins: try again in {}.",
                    crate::rules::reading::duration_words(retry_after_s as f64)
                )),
                StatusCode::TOO_MANY_REQUESTS,
            );
            if let Ok(v) = retry_after_s.to_string().parse() {
                r.headers_mut().insert(header::RETRY_AFTER, v);
            }
            r
        }
        Err(LoginRefused::Unavailable(e)) => {
            tracing::error!(component = "web", "logins refused: {e}");
            refused(
                &state,
                StatusCode::SERVICE_UNAVAILABLE,
                "Logins are not possible now: the users file cannot be read (the daemon's log says why).",
                "/",
            )
        }
    }
}

#[derive(serde::Deserialize)]
pub struct CsrfForm {
    #[serde(default)]
    csrf: String,
}

/// The session of a POST whose form carries its token.
fn session_of(
    state: &WebState,
    access: &super::access::Access,
    headers: &HeaderMap,
    csrf: &str,
) -> Result<Session, Box<Response>> {
    match access.session(headers) {
        Some(s) if !csrf.is_empty() && same(&s.csrf, csrf) => Ok(s),
        Some(_) => Err(Box::new(refused(
            state,
            StatusCode::FORBIDDEN,
            "The form did not carry this login's token (it came from elsewhere, or from before a new login); nothing was done.",
            "/",
        ))),
        None => Err(Box::new(refused(
            state,
            StatusCode::UNAUTHORIZED,
            "You are not logged in (or your login has run out); nothing was done. Log in and try again.",
            "/login",
        ))),
    }
}

/// `POST /logout`.
pub async fn logout(
    State(state): State<WebState>,
    headers: HeaderMap,
    Form(f): Form<CsrfForm>,
) -> Response {
    let access = match post_guard(&state, &headers) {
        Ok(a) => a,
        Err(r) => return *r,
    };
    if let Err(r) = session_of(&state, &access, &headers, &f.csrf) {
        return *r;
    }
    access.logout(&headers);
    (
        AppendHeaders([(header::SET_COOKIE, access.set_cookie(SESSION_COOKIE, "", 0))]),
        Redirect::to("/"),
    )
        .into_response()
}

#[derive(serde::Deserialize)]
pub struct AckForm {
    #[serde(default)]
    csrf: String,
    #[serde(default)]
    alert: String,
    #[serde(default)]
    note: String,
    #[serde(default)]
    back: String,
}

/// `POST /ack`: acknowledges an alert as the logged-in user; the archive records it with
/// their name, as from `linewarden ack`.
pub async fn acknowledge(
    State(state): State<WebState>,
    axum::extract::ConnectInfo(peer): Peer,
    headers: HeaderMap,
    Form(f): Form<AckForm>,
) -> Response {
    let access = match post_guard(&state, &headers) {
        Ok(a) => a,
        Err(r) => return *r,
    };
    let s = match session_of(&state, &access, &headers, &f.csrf) {
        Ok(s) => s,
        Err(r) => return *r,
    };
    let back = if state.views.borrow().contains_key(&f.back) {
        format!("/c/{}", f.back)
    } else {
        "/".to_string()
    };
    match access.still_listed(&s.user) {
        Ok(true) => {}
        Ok(false) => {
            access.logout(&headers);
            return refused(
                &state,
                StatusCode::FORBIDDEN,
                &format!(
                    "{} is no longer in the users file; nothing was done.",
                    s.user
                ),
                &back,
            );
        }
        Err(e) => {
            tracing::error!(component = "web", "acknowledgement refused: {e}");
            return refused(
                &state,
                StatusCode::SERVICE_UNAVAILABLE,
                "The users file cannot be read now, so nothing was done (the daemon's log says why).",
                &back,
            );
        }
    }
    let note = f.note.trim();
    if note.chars().count() > MAX_NOTE {
        return refused(
            &state,
            StatusCode::BAD_REQUEST,
            &format!(
                "The note has {} characters; {MAX_NOTE} at most. Nothing was done.",
                note.chars().count()
            ),
            &back,
        );
    }
    let note = (!note.is_empty()).then(|| note.to_string());
    let answer = access.acknowledge(&f.alert, &s.user, note, peer).await;
    if answer.ok {
        Redirect::to(&local_path(Some(&format!(
            "{back}?acked={}",
            query_value(&f.alert)
        ))))
        .into_response()
    } else {
        refused(
            &state,
            StatusCode::CONFLICT,
            &format!(
                "{} was not acknowledged: {}",
                f.alert,
                answer.error.unwrap_or_default()
            ),
            &back,
        )
    }
}
