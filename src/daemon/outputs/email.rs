//! The email output (lettre, SMTP with STARTTLS, TLS from the first byte, or plain on a closed
//! network). One email per alert, or one digest when several are raised within `digest_s` of
//! each other; at most `max_per_hour` emails, later alerts waiting for the next digest. Each
//! email has a plain-text part and an HTML part with the control chart as an inline PNG. The
//! Message-ID carries the alert id, so a resend after a crash is recognisable.

use std::collections::{BTreeMap, VecDeque};
use std::time::Duration;

use lettre::message::header::ContentType;
use lettre::message::{Attachment, Mailbox, MultiPart, SinglePart};
use lettre::transport::smtp::authentication::Credentials;
use lettre::transport::smtp::client::{Certificate, Tls, TlsParameters};
use lettre::{AsyncSmtpTransport, AsyncTransport, Message, Tokio1Executor};

use super::{Feeds, Ledger, backoff, plain_words};
use crate::alerts::{Alert, Status};
use crate::config::{EmailOutput, Output, SmtpSecurity};
use crate::daemon::hub::AlertsView;

/// Charts in one email at most.
const MAX_CHARTS: usize = 6;

fn transport(e: &EmailOutput) -> Result<AsyncSmtpTransport<Tokio1Executor>, String> {
    let mut b =
        AsyncSmtpTransport::<Tokio1Executor>::builder_dangerous(e.host.clone()).port(e.port);
    if e.security != SmtpSecurity::Plain {
        let mut p = TlsParameters::builder(e.host.clone());
        if let Some(ca) = &e.ca_file {
            let pem =
                std::fs::read(ca).map_err(|x| format!("cannot read {}: {x}", ca.display()))?;
            let cert = Certificate::from_pem(&pem)
                .map_err(|x| format!("{} is not a PEM certificate: {x}", ca.display()))?;
            p = p.add_root_certificate(cert);
        }
        let params = p.build().map_err(|x| format!("TLS settings: {x}"))?;
        b = b.tls(match e.security {
            SmtpSecurity::Tls => Tls::Wrapper(params),
            _ => Tls::Required(params),
        });
    } else {
        b = b.tls(Tls::None);
    }
    if let (Some(u), Some(p)) = (&e.username, &e.password) {
        b = b.credentials(Credentials::new(u.clone(), p.0.clone()));
    }
    Ok(b.timeout(Some(Duration::from_secs(20))).build())
}

use crate::format::html as escape;

/// The size of the chart picture in an email, in pixels.
const CHART_WIDTH: u32 = 860;
const CHART_HEIGHT: u32 = 560;

/// The email for `due` (one alert, or a digest).
pub fn compose(
    e: &EmailOutput,
    output: &str,
    view: &AlertsView,
    due: &[&Alert],
    tz: &jiff::tz::TimeZone,
) -> Result<Message, String> {
    let subject = if due.len() == 1 {
        let a = due[0];
        let mut m: String = a.message.chars().take(90).collect();
        if a.message.chars().count() > 90 {
            m.push('…');
        }
        format!(
            "[linewarden] {} {}: {m}",
            a.severity.name().to_uppercase(),
            a.characteristic
        )
    } else {
        let mut per: BTreeMap<&str, usize> = BTreeMap::new();
        for a in due {
            *per.entry(a.characteristic.as_str()).or_default() += 1;
        }
        let worst = due
            .iter()
            .map(|a| a.severity)
            .max()
            .unwrap_or(crate::rules::Severity::Notice);
        format!(
            "[linewarden] {} {} alerts: {}",
            worst.name().to_uppercase(),
            due.len(),
            per.iter()
                .map(|(c, n)| format!("{c} ({n})"))
                .collect::<Vec<_>>()
                .join(", ")
        )
    };
    let mut text = String::new();
    let mut html = String::from("<html><body style=\"font-family: sans-serif\">");
    if due.len() > 1 {
        text.push_str(&format!(
            "{} alerts were raised close together.\n\n",
            due.len()
        ));
        html.push_str(&format!(
            "<p>{} alerts were raised close together.</p>",
            due.len()
        ));
    }
    let mut charts: Vec<(String, Vec<u8>)> = Vec::new();
    let mut charted: Vec<&str> = Vec::new();
    for a in due {
        let c = view.characteristics.get(&a.characteristic);
        let unit = c.map(|c| c.unit.as_str()).unwrap_or("");
        let words = plain_words(a, unit, c.and_then(|c| c.decimals), tz);
        let state = match a.status {
            Status::Open => format!(
                "Open. Acknowledge at the cell or with: linewarden ack {} --by NAME",
                a.id
            ),
            Status::Acknowledged => format!(
                "Acknowledged by {}.",
                a.ack.as_ref().map_or("someone", |k| k.by.as_str())
            ),
            Status::Cleared => "Already cleared.".to_string(),
        };
        let escalated = if a.escalated_ms.is_some() {
            "ESCALATED: nobody has acknowledged this alert.\n"
        } else {
            ""
        };
        text.push_str(&format!("{escalated}{words}{state}\n\n"));
        html.push_str(&format!(
            "<h3 style=\"color:{}\">{}{} on {}</h3><pre style=\"font-size: 13px\">{}</pre><p>{}</p>",
            if a.severity == crate::rules::Severity::Stop { "#b01818" } else { "#9a6700" },
            if a.escalated_ms.is_some() { "ESCALATED " } else { "" },
            a.severity.name().to_uppercase(),
            escape(&a.characteristic),
            escape(&words),
            escape(&state)
        ));
        if let Some(c) = c
            && !charted.contains(&c.id.as_str())
            && charts.len() < MAX_CHARTS
        {
            let on_it: Vec<&Alert> = due
                .iter()
                .copied()
                .filter(|x| x.characteristic == c.id)
                .collect();
            let drawn = crate::chart::Picture::of_view(c.as_ref(), &on_it, tz)
                .and_then(|p| p.png(CHART_WIDTH, CHART_HEIGHT));
            match drawn {
                Ok(png) => {
                    let cid = format!("chart-{}@linewarden", c.id);
                    html.push_str(&format!(
                        "<p><img src=\"cid:{cid}\" alt=\"control charts of {}: location above, spread below; red points belong to the alerts\" width=\"{CHART_WIDTH}\" height=\"{CHART_HEIGHT}\"></p>",
                        escape(&c.id)
                    ));
                    charts.push((cid, png));
                }
                Err(err) => tracing::warn!("no chart for {}: {err}", c.id),
            }
            charted.push(c.id.as_str());
        }
    }
    text.push_str(
        "linewarden: these alerts are advisory process signals, not a safety function.\n",
    );
    html.push_str("<p style=\"color:#666; font-size: 12px\">linewarden: these alerts are advisory process signals, not a safety function.</p></body></html>");
    let from: Mailbox = e
        .from
        .parse()
        .map_err(|x| format!("from {:?}: {x}", e.from))?;
    let mut m = Message::builder()
        .from(from)
        .subject(subject)
        .message_id(Some(format!(
            "<{}.v{}.{output}@linewarden>",
            due[0].id, due[0].version
        )))
        .date_now();
    for t in &e.to {
        m = m.to(t.parse().map_err(|x| format!("to {t:?}: {x}"))?);
    }
    let mut related = MultiPart::related().singlepart(SinglePart::html(html));
    for (cid, png) in charts {
        related = related.singlepart(
            Attachment::new_inline(cid)
                .body(png, ContentType::parse("image/png").expect("a valid type")),
        );
    }
    let body = MultiPart::alternative()
        .singlepart(SinglePart::plain(text))
        .multipart(related);
    m.multipart(body).map_err(|x| x.to_string())
}

pub async fn run(o: Output, e: EmailOutput, mut f: Feeds) {
    let mailer = match transport(&e) {
        Ok(t) => t,
        Err(err) => {
            tracing::error!("cannot set up mail to {}:{}: {err}", e.host, e.port);
            return;
        }
    };
    let mut ledger = Ledger::new(&o.id);
    let mut sent: VecDeque<tokio::time::Instant> = VecDeque::new();
    let mut attempt = 0u32;
    let mut failing_since: Option<tokio::time::Instant> = None;
    let due_ids = |view: &AlertsView, ledger: &Ledger| -> Vec<String> {
        view.for_output(o.min_severity, o.escalation)
            .filter(|a| ledger.delivered(a) == 0)
            .map(|a| a.id.clone())
            .collect()
    };
    'outer: loop {
        let view = f.alerts.borrow_and_update().clone();
        ledger.forget_gone(&view);
        if due_ids(&view, &ledger).is_empty() {
            tokio::select! {
                r = f.alerts.changed() => if r.is_err() { break },
                _ = f.shutdown.changed() => break,
            }
            continue;
        }
        // Gather what else fires close by into one digest; a stop-level alert waits at most
        // STOP_GATHER, even when it arrives while lower ones are being gathered.
        if attempt == 0 && e.digest_ms > 0 {
            let mut until = tokio::time::Instant::now() + Duration::from_millis(e.digest_ms);
            let mut seen_stop = false;
            loop {
                if !seen_stop && urgent(&f.alerts.borrow(), &ledger, &o) {
                    seen_stop = true;
                    until = until.min(tokio::time::Instant::now() + STOP_GATHER);
                }
                tokio::select! {
                    _ = tokio::time::sleep_until(until) => break,
                    r = f.alerts.changed() => if r.is_err() { break 'outer },
                    _ = f.shutdown.changed() => break 'outer,
                }
            }
        }
        // Rate limit: at most max_per_hour in any hour.
        let hour = Duration::from_secs(3600);
        while let Some(t) = sent.front() {
            if t.elapsed() >= hour {
                sent.pop_front();
            } else {
                break;
            }
        }
        // The hourly limit holds back lower severities and updates, never a stop.
        if sent.len() >= e.max_per_hour as usize && !urgent(&f.alerts.borrow(), &ledger, &o) {
            let wait = hour - sent.front().map_or(Duration::ZERO, |t| t.elapsed());
            tracing::info!(
                "{} emails in the last hour: the next one waits {:.0} s and will carry every alert since",
                sent.len(),
                wait.as_secs_f64()
            );
            tokio::select! {
                _ = tokio::time::sleep(wait) => {}
                r = f.alerts.changed() => if r.is_err() { break },
                _ = f.shutdown.changed() => break,
            }
            continue;
        }
        let view = f.alerts.borrow().clone();
        let ids = due_ids(&view, &ledger);
        let due: Vec<&Alert> = ids.iter().filter_map(|id| view.book.get(id)).collect();
        if due.is_empty() {
            continue;
        }
        let msg = match compose(&e, &o.id, &view, &due, &f.timezone) {
            Ok(m) => m,
            Err(err) => {
                f.failed();
                tracing::error!(
                    "cannot write the email for {}: {err}; skipping it",
                    ids.join(", ")
                );
                for a in &due {
                    ledger.mark(&a.id, a.version, &f.delivered).await;
                }
                continue;
            }
        };
        match mailer.send(msg).await {
            Ok(_) => {
                if let Some(t) = failing_since.take() {
                    tracing::warn!(
                        "mail server {}:{} reachable again after {:.0} s",
                        e.host,
                        e.port,
                        t.elapsed().as_secs_f64()
                    );
                }
                tracing::info!("emailed {} to {}", ids.join(", "), e.to.join(", "));
                for a in &due {
                    ledger.mark(&a.id, a.version, &f.delivered).await;
                }
                sent.push_back(tokio::time::Instant::now());
                attempt = 0;
            }
            Err(err) => {
                f.failed();
                if failing_since.is_none() || attempt.is_multiple_of(10) {
                    tracing::warn!(
                        "cannot send mail through {}:{}: {err}; retrying, the alerts wait",
                        e.host,
                        e.port
                    );
                }
                failing_since.get_or_insert_with(tokio::time::Instant::now);
                tokio::select! {
                    _ = tokio::time::sleep(backoff(attempt).min(Duration::from_secs(60))) => {}
                    _ = f.shutdown.changed() => break 'outer,
                }
                attempt += 1;
            }
        }
    }
    flush(&o, &e, &mailer, &mut ledger, &f).await;
}

/// A stop-level alert waits this long at most for others raised with it to share its email.
pub const STOP_GATHER: Duration = Duration::from_millis(500);

/// At shutdown, the last email (everything held for a digest or by the hourly limit) gets this
/// long to go out: the daemon waits for its outputs a little longer.
pub const FLUSH_LIMIT: Duration = Duration::from_secs(4);

/// Whether a stop-level alert waits for its first email.
fn urgent(view: &AlertsView, ledger: &Ledger, o: &Output) -> bool {
    view.for_output(o.min_severity, o.escalation).any(|a| {
        a.severity == crate::rules::Severity::Stop
            && a.status == Status::Open
            && ledger.delivered(a) == 0
    })
}

/// At shutdown: one email with everything still held, within [`FLUSH_LIMIT`]; what could not
/// go is named in the log, alert by alert, and goes out at the next start (the archive knows it
/// was never delivered).
async fn flush(
    o: &Output,
    e: &EmailOutput,
    mailer: &AsyncSmtpTransport<Tokio1Executor>,
    ledger: &mut Ledger,
    f: &Feeds,
) {
    let output = o.id.as_str();
    let view = f.alerts.borrow().clone();
    let waiting = |ledger: &Ledger| -> Vec<Alert> {
        view.for_output(o.min_severity, o.escalation)
            .filter(|a| ledger.delivered(a) == 0)
            .cloned()
            .collect()
    };
    let due = waiting(ledger);
    if due.is_empty() {
        return;
    }
    let refs: Vec<&Alert> = due.iter().collect();
    let sent = match compose(e, output, &view, &refs, &f.timezone) {
        Ok(msg) => match tokio::time::timeout(FLUSH_LIMIT, mailer.send(msg)).await {
            Ok(Ok(_)) => Ok(()),
            Ok(Err(err)) => Err(format!("cannot send mail: {err}")),
            Err(_) => Err(format!(
                "the mail server did not take the email within {} s",
                FLUSH_LIMIT.as_secs()
            )),
        },
        Err(err) => Err(format!("cannot write the email: {err}")),
    };
    match sent {
        Ok(()) => {
            let ids: Vec<&str> = due.iter().map(|a| a.id.as_str()).collect();
            tracing::info!(
                "at shutdown, emailed {} to {}",
                ids.join(", "),
                e.to.join(", ")
            );
            for a in &due {
                ledger.mark(&a.id, a.version, &f.delivered).await;
            }
        }
        Err(why) => {
            f.failed();
            tracing::warn!("at shutdown, {why}");
        }
    }
    for a in waiting(ledger) {
        tracing::warn!(
            "at shutdown, alert {} ({}) is not yet emailed by output {output}: it is sent at the next start",
            a.id,
            a.severity.name()
        );
    }
}
