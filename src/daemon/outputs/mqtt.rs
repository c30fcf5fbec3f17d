//! The MQTT output, under the configured prefix (default `linewarden`):
//!
//! * `<prefix>/alerts/<characteristic>/<alert id>` — every alert event (QoS 1): the alert as
//!   it now stands, with `version` and `event` (raised, repeated, condition-gone,
//!   acknowledged, cleared, escalated). A version is published once; a restart publishes
//!   again only what the archive does not record as delivered (the broker's PUBACK).
//! * `<prefix>/characteristics/<id>/state` — retained: in-control / warning / action-needed /
//!   learning, where the limits come from (provisional until approved), the last subgroup,
//!   the active alerts.
//! * `<prefix>/status` — retained: online, then stopped; "offline" as the last will.
//! * `<prefix>/command/ack` — acknowledgements from an HMI: `{"alert": "<id or
//!   characteristic>", "by": "<name>", "note": "..."}`; the answer goes to
//!   `<prefix>/command/result`.
//! * `<prefix>/command/approve` — approving a characteristic's learned limits:
//!   `{"characteristic": "<id>", "by": "<name>", "note": "..."}`; the answer goes to
//!   `<prefix>/command/result` too.

use std::collections::{HashMap, VecDeque};
use std::time::Duration;

use rumqttc::{AsyncClient, Event, LastWill, Outgoing, Packet, QoS};
use serde::Deserialize;
use tokio::sync::mpsc;

use super::{Feeds, Ledger};
use crate::config::{Broker, Output};
use crate::daemon::clock::now_ms;
use crate::daemon::control::engine_answer;
use crate::daemon::hub::Request;

/// What the event loop task tells the output loop.
enum Heard {
    Connected,
    Lost(String),
    Sent(u16),
    Acked(u16),
    Command { approve: bool, payload: Vec<u8> },
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct ApproveCommand {
    characteristic: String,
    by: String,
    #[serde(default)]
    note: Option<String>,
}

#[derive(Deserialize)]
struct AckCommand {
    alert: String,
    by: String,
    #[serde(default)]
    note: Option<String>,
}

/// An alert as published: everything but the delivery bookkeeping. `first` says this is the
/// first this subscriber hears of it: the event is then "raised" whatever happened since (a
/// repeat in the same subgroup, say), with the count telling the rest.
pub fn alert_payload(a: &crate::alerts::Alert, first: bool) -> String {
    let mut v = serde_json::to_value(a).unwrap_or_default();
    if let Some(m) = v.as_object_mut() {
        m.remove("delivered");
        m.insert("alert_id".into(), serde_json::Value::String(a.id.clone()));
        m.remove("id");
        let event = if first && a.status != crate::alerts::Status::Cleared {
            "raised".to_string()
        } else {
            a.last_event.clone()
        };
        m.insert("event".into(), serde_json::Value::String(event));
        m.remove("last_event");
    }
    v.to_string()
}

pub async fn run(o: Output, broker: Broker, prefix: String, mut f: Feeds) {
    let mut opts = match crate::daemon::sources::mqtt::options(&broker, false) {
        Ok(o) => o,
        Err(e) => {
            tracing::error!("cannot set up the connection to {}: {e}", broker.url());
            return;
        }
    };
    let status_topic = format!("{prefix}/status");
    let command_topic = format!("{prefix}/command/ack");
    let approve_topic = format!("{prefix}/command/approve");
    let result_topic = format!("{prefix}/command/result");
    opts.set_last_will(LastWill::new(
        &status_topic,
        r#"{"state":"offline"}"#,
        QoS::AtLeastOnce,
        true,
    ));
    let (client, eventloop) = AsyncClient::new(opts, 1024);
    let (poller, mut heard) = spawn_poller(eventloop, command_topic.clone(), approve_topic.clone());
    let mut ledger = Ledger::new(&o.id);
    // In publish order: the alert and version each QoS 1 publish carries (None: a state).
    let mut tokens: VecDeque<Option<(String, u32)>> = VecDeque::new();
    let mut inflight: HashMap<u16, Option<(String, u32)>> = HashMap::new();
    // The latest version handed to the client per alert (not yet acknowledged, perhaps).
    let mut handed: HashMap<String, u32> = HashMap::new();
    let mut published_states: HashMap<String, String> = HashMap::new();
    let mut connected = false;
    let mut down_since: Option<tokio::time::Instant> = None;
    let started = now_ms();
    tracing::info!("connecting to {} as {}", broker.url(), broker.client_id);
    let mut alerts_due = true;
    let mut states_due = true;
    loop {
        if alerts_due {
            alerts_due = false;
            let view = f.alerts.borrow_and_update().clone();
            ledger.forget_gone(&view);
            if handed.len() > 2 * view.book.all().count() + 64 {
                let ids: std::collections::HashSet<&str> =
                    view.book.all().map(|a| a.id.as_str()).collect();
                handed.retain(|id, _| ids.contains(id.as_str()));
            }
            for a in view.for_output(o.min_severity, o.escalation) {
                if ledger.delivered(a) >= a.version
                    || handed.get(&a.id).is_some_and(|v| *v >= a.version)
                {
                    continue;
                }
                let topic = format!("{prefix}/alerts/{}/{}", a.characteristic, a.id);
                let first = ledger.delivered(a) == 0 && !handed.contains_key(&a.id);
                if client
                    .publish(topic, QoS::AtLeastOnce, false, alert_payload(a, first))
                    .await
                    .is_err()
                {
                    break;
                }
                tokens.push_back(Some((a.id.clone(), a.version)));
                handed.insert(a.id.clone(), a.version);
            }
        }
        if states_due {
            states_due = false;
            let states = f.states.borrow_and_update().clone();
            for (id, s) in states.iter() {
                let text = serde_json::to_string(s).unwrap_or_default();
                if published_states.get(id) == Some(&text) {
                    continue;
                }
                let topic = format!("{prefix}/characteristics/{id}/state");
                if client
                    .publish(topic, QoS::AtLeastOnce, true, text.clone())
                    .await
                    .is_err()
                {
                    break;
                }
                tokens.push_back(None);
                published_states.insert(id.clone(), text);
            }
        }
        tokio::select! {
            h = heard.recv() => match h {
                Some(Heard::Connected) => {
                    match down_since.take() {
                        Some(t) => tracing::warn!("connected to {} again after {:.1} s; undelivered alerts go out now", broker.url(), t.elapsed().as_secs_f64()),
                        None => tracing::info!("connected to {}", broker.url()),
                    }
                    connected = true;
                    let status = serde_json::json!({"state": "online", "version": env!("CARGO_PKG_VERSION"), "since_ms": started});
                    if client.try_publish(&status_topic, QoS::AtLeastOnce, true, status.to_string()).is_ok() {
                        tokens.push_back(None);
                    }
                    let _ = client.try_subscribe(&command_topic, QoS::AtLeastOnce);
                    let _ = client.try_subscribe(&approve_topic, QoS::AtLeastOnce);
                    // A broker that lost its retained messages gets them again.
                    published_states.clear();
                    states_due = true;
                }
                Some(Heard::Lost(e)) => {
                    f.failed();
                    if connected || down_since.is_none() {
                        tracing::warn!("lost the broker {}: {e}; alerts wait and go out when it is back", broker.url());
                        down_since.get_or_insert_with(tokio::time::Instant::now);
                    }
                    connected = false;
                }
                Some(Heard::Sent(pkid)) => {
                    // A retransmission keeps its packet id; a new publish takes the next token.
                    if pkid != 0
                        && !inflight.contains_key(&pkid)
                        && let Some(t) = tokens.pop_front()
                    {
                        inflight.insert(pkid, t);
                    }
                }
                Some(Heard::Acked(pkid)) => {
                    if let Some(Some((id, version))) = inflight.remove(&pkid) {
                        ledger.mark(&id, version, &f.delivered).await;
                    }
                }
                Some(Heard::Command { approve, payload }) => {
                    tokio::spawn(answer_command(client.clone(), f.requests.clone(), result_topic.clone(), approve, payload));
                }
                None => break,
            },
            r = f.alerts.changed() => { if r.is_err() { break } alerts_due = true; }
            r = f.states.changed() => { if r.is_err() { break } states_due = true; }
            _ = f.shutdown.changed() => break,
        }
    }
    let _ = tokio::time::timeout(Duration::from_secs(2), async {
        let status = serde_json::json!({"state": "stopped", "since_ms": now_ms()});
        let _ = client
            .publish(&status_topic, QoS::AtLeastOnce, true, status.to_string())
            .await;
        tokens.push_back(None);
        // Acknowledgements that arrive now are still archived as deliveries.
        let deadline = tokio::time::Instant::now() + Duration::from_millis(1500);
        while !inflight.is_empty() || !tokens.is_empty() {
            match tokio::time::timeout_at(deadline, heard.recv()).await {
                Ok(Some(Heard::Sent(pkid))) if pkid != 0 && !inflight.contains_key(&pkid) => {
                    if let Some(t) = tokens.pop_front() {
                        inflight.insert(pkid, t);
                    }
                }
                Ok(Some(Heard::Acked(pkid))) => {
                    if let Some(Some((id, version))) = inflight.remove(&pkid) {
                        ledger.mark(&id, version, &f.delivered).await;
                    }
                }
                Ok(Some(_)) => {}
                _ => break,
            }
        }
        let _ = client.disconnect().await;
        let _ = poller.await;
    })
    .await;
}

/// Polls the client's event loop on its own task (a publish that waits for room must not stop
/// the connection from making progress) and reports what it hears.
fn spawn_poller(
    mut eventloop: rumqttc::EventLoop,
    ack: String,
    approve: String,
) -> (tokio::task::JoinHandle<()>, mpsc::UnboundedReceiver<Heard>) {
    let (heard_tx, heard) = mpsc::unbounded_channel::<Heard>();
    let poller = tokio::spawn(async move {
        let mut backoff = Duration::from_millis(250);
        loop {
            match eventloop.poll().await {
                Ok(Event::Incoming(Packet::ConnAck(_))) => {
                    backoff = Duration::from_millis(250);
                    if heard_tx.send(Heard::Connected).is_err() {
                        break;
                    }
                }
                Ok(Event::Incoming(Packet::PubAck(a))) => {
                    let _ = heard_tx.send(Heard::Acked(a.pkid));
                }
                Ok(Event::Incoming(Packet::Publish(p))) if p.topic == ack || p.topic == approve => {
                    let _ = heard_tx.send(Heard::Command {
                        approve: p.topic == approve,
                        payload: p.payload.to_vec(),
                    });
                }
                Ok(Event::Outgoing(Outgoing::Publish(pkid))) => {
                    let _ = heard_tx.send(Heard::Sent(pkid));
                }
                Ok(Event::Outgoing(Outgoing::Disconnect)) => break,
                Ok(_) => {}
                Err(e) => {
                    if heard_tx.send(Heard::Lost(e.to_string())).is_err() {
                        break;
                    }
                    tokio::time::sleep(backoff).await;
                    backoff = (backoff * 2).min(Duration::from_secs(30));
                }
            }
        }
    });
    (poller, heard)
}

/// Answers one message on a command topic (an acknowledgement, or with `approve` an approval
/// of learned limits), passed to the engine as from the control socket; the result goes to the
/// result topic, naming the alert or characteristic it concerns.
async fn answer_command(
    client: AsyncClient,
    requests: mpsc::Sender<Request>,
    result_topic: String,
    approve: bool,
    payload: Vec<u8>,
) {
    let answer = if let Some(refusal) = too_large(&payload) {
        refusal
    } else if approve {
        match serde_json::from_slice::<ApproveCommand>(&payload) {
            Ok(c) => {
                let id = c.characteristic.clone();
                let mut v = engine_answer(&requests, |reply| Request::Approve {
                    characteristic: c.characteristic,
                    by: c.by,
                    note: c.note,
                    via: "MQTT".into(),
                    reply,
                })
                .await;
                v["characteristic"] = serde_json::Value::String(id);
                v
            }
            Err(e) => serde_json::json!({"ok": false, "error": format!(
                "not an approval ({e}); send {{\"characteristic\": \"<id>\", \"by\": \"<name>\", \"note\": \"...\"}}"
            )}),
        }
    } else {
        match serde_json::from_slice::<AckCommand>(&payload) {
            Ok(c) => {
                let id = c.alert.clone();
                let mut v = engine_answer(&requests, |reply| Request::Ack {
                    target: c.alert,
                    by: c.by,
                    note: c.note,
                    via: "MQTT".into(),
                    reply,
                })
                .await;
                v["alert"] = serde_json::Value::String(id);
                v
            }
            Err(e) => serde_json::json!({"ok": false, "error": format!(
                "not an acknowledgement ({e}); send {{\"alert\": \"<id>\", \"by\": \"<name>\", \"note\": \"...\"}}"
            )}),
        }
    };
    let _ = client
        .publish(result_topic, QoS::AtLeastOnce, false, answer.to_string())
        .await;
}

/// Commands are a few hundred bytes; anything past this is refused unread.
const MAX_COMMAND_BYTES: usize = 16 * 1024;

fn too_large(payload: &[u8]) -> Option<serde_json::Value> {
    (payload.len() > MAX_COMMAND_BYTES).then(|| {
        serde_json::json!({"ok": false, "error": format!(
            "the command is {} bytes; a command is at most {MAX_COMMAND_BYTES}",
            payload.len()
        )})
    })
}
