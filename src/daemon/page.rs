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

use axum::extract::{Path, Query, State};
use axum::http::{HeaderMap, StatusCode, header};
use axum::response::sse::{Event, KeepAlive, Sse};
use axum::response::{Html, IntoResponse, Response};
use futures_util::stream::Stream;

use super::hub::Light;
use super::web::WebState;
use crate::alerts::{Alert, Standing, Status};
use crate::engine::CharView;
use crate::format::{fixed, html as esc};

/// `?fragment=1`: only the live part of the page (what the page's script fetches).
#[derive(serde::Deserialize, Default)]
pub struct Fragment {
    #[serde(default)]
    fragment: Option<String>,
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
"#;

/// Reconnects by itself (EventSource does), and on each change fetches this page's live part.
const SCRIPT: &str = r#"
const live = document.getElementById('live');
const es = new EventSource('/events');
es.addEventListener('changed', async () => {
  const sep = location.search ? '&' : '?';
  try {
    const r = await fetch(location.pathname + location.search + sep + 'fragment=1', {cache: 'no-store'});
    if (r.ok) { live.innerHTML = await r.text(); document.body.dataset.updated = Date.now(); }
  } catch (e) {}
});
"#;

/// The part of a page that updates: the header with the cell's light, and the content.
fn live(state: &WebState, class: &str, body: &str) -> String {
    let (lc, lw) = light_words(*state.light.borrow());
    format!(
        "<header><strong>{cell}</strong><span class=\"light {lc}\" id=\"light\">{lw}</span>\
         <a href=\"/\">All characteristics</a><a href=\"/monitor\">Cell monitor</a></header>\
         <main class=\"{class}\">{body}</main>",
        cell = esc(&state.cell),
    )
}

fn page(state: &WebState, title: &str, class: &str, body: &str) -> String {
    format!(
        "<!doctype html><html lang=\"en\"><head><meta charset=\"utf-8\">\
         <meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">\
         <title>{t}</title><style>{STYLE}</style></head><body>\
         <div id=\"live\">{live}</div><script>{SCRIPT}</script></body></html>",
        t = esc(title),
        live = live(state, class, body),
    )
}

fn fragment_or_page(
    state: &WebState,
    q: &Fragment,
    title: &str,
    class: &str,
    body: String,
) -> Response {
    let html = if q.fragment.is_some() {
        live(state, class, &body)
    } else {
        page(state, title, class, &body)
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
pub async fn overview(State(state): State<WebState>, Query(q): Query<Fragment>) -> Response {
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
    fragment_or_page(&state, &q, &state.cell, "", body)
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
    fragment_or_page(&state, &q, "Cell monitor", "mon", body)
}

/// `/c/{id}`: one characteristic: its charts, its open alerts with what to check first and how
/// to acknowledge, its recent subgroups.
pub async fn characteristic(
    State(state): State<WebState>,
    Path(id): Path<String>,
    Query(q): Query<Fragment>,
) -> Response {
    let Some(v) = state.views.borrow().get(&id).cloned() else {
        return (
            StatusCode::NOT_FOUND,
            Html(page(
                &state,
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
                b.push_str(&format!(
                    "<br>Acknowledge: <code>linewarden ack {} --by NAME [--note TEXT]</code>",
                    esc(&a.id)
                ));
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
    fragment_or_page(&state, &q, &id, "one", body)
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
