//! The MQTT source: sensors and gateways that publish readings to a broker (rumqttc).
//!
//! QoS 1 messages are acknowledged by hand, and only once everything they carried is durable
//! in the archive: a Barrier is sent down the engine queue behind the readings, and the acks go
//! out when it is answered. The session is persistent (a fixed client id, clean session off), so
//! after a kill -9 the broker redelivers what was not acknowledged. A redelivery (DUP set) whose
//! packet id, topic and payload match the last message archived under that packet id is
//! recognised as a duplicate: acknowledged again, not archived twice. Brokers that instead
//! resume a log with new packet ids (rumqttd does) are served by `duplicates = "content"`: the
//! backlog that arrives first after connecting is matched by topic and payload against the last
//! messages archived, which is sound when each payload carries a time or a part id.
//!
//! Payloads are a plain number, or JSON with pointers to the value, the time it was measured,
//! the characteristic and the part id. A topic level written `{characteristic}` in the
//! subscription names the characteristic.

use std::collections::{HashMap, VecDeque};
use std::path::Path;
use std::time::Duration;

use rumqttc::{AsyncClient, Event, EventLoop, MqttOptions, Packet, Publish, QoS, Transport};
use tokio::sync::{mpsc, oneshot, watch};

use super::SourceEvent;
use crate::config::{Broker, Duplicates, MqttSource, Payload, TopicFilter};
use crate::daemon::clock::now_ms;
use crate::engine::Incoming;

pub use crate::config::MAX_PACKET;

/// The largest packet this client sends (alerts and states are a few kilobytes).
const MAX_OUTGOING: usize = 1024 * 1024;

/// Connection options for `b`: persistent session, manual acks, TLS when asked.
pub fn options(b: &Broker, manual_acks: bool) -> Result<MqttOptions, String> {
    let mut o = MqttOptions::new(b.client_id.clone(), b.host.clone(), b.port);
    o.set_keep_alive(Duration::from_secs(b.keep_alive_s));
    o.set_clean_session(false);
    o.set_manual_acks(manual_acks);
    o.set_max_packet_size(MAX_PACKET, MAX_OUTGOING);
    if let (Some(u), Some(p)) = (&b.username, &b.password) {
        o.set_credentials(u.clone(), p.0.clone());
    } else if let Some(u) = &b.username {
        o.set_credentials(u.clone(), String::new());
    }
    if b.tls {
        let read =
            |p: &Path| std::fs::read(p).map_err(|e| format!("cannot read {}: {e}", p.display()));
        let transport = match &b.ca_file {
            Some(ca) => {
                let client_auth = match (&b.client_cert_file, &b.client_key_file) {
                    (Some(c), Some(k)) => Some((read(c)?, read(k)?)),
                    _ => None,
                };
                Transport::Tls(rumqttc::TlsConfiguration::Simple {
                    ca: read(ca)?,
                    alpn: None,
                    client_auth,
                })
            }
            None => Transport::tls_with_default_config(),
        };
        o.set_transport(transport);
    }
    Ok(o)
}

/// True when `topic` matches the MQTT filter `filter`.
pub fn matches(filter: &str, topic: &str) -> bool {
    let mut f = filter.split('/');
    let mut t = topic.split('/');
    loop {
        match (f.next(), t.next()) {
            (Some("#"), _) => return !topic.starts_with('$') || filter.starts_with('$'),
            (Some("+"), Some(_)) => {}
            (Some(a), Some(b)) if a == b => {}
            (None, None) => return !topic.starts_with('$') || filter.starts_with('$'),
            _ => return false,
        }
    }
}

/// What a message carried.
#[derive(Debug, Clone, PartialEq)]
pub struct Parsed {
    pub characteristic: String,
    /// The number sent; not a number when a word was sent instead.
    pub value: f64,
    /// The word sent instead of a number ("NOK", `true`), for the engine to map.
    pub word: Option<String>,
    /// Units inspected, for a batch result.
    pub inspected: Option<f64>,
    pub time_ms: Option<i64>,
    pub part: Option<String>,
}

/// Why a message is not a reading, and the characteristic when that much was known.
#[derive(Debug, Clone, PartialEq)]
pub struct Unparsed {
    pub characteristic: Option<String>,
    pub reason: String,
}

/// Takes the reading out of a message on `topic`.
pub fn parse(src: &MqttSource, topic: &str, payload: &[u8]) -> Result<Parsed, Unparsed> {
    let from_topic = src.topics.iter().find_map(|t: &TopicFilter| {
        let level = t.characteristic_level?;
        matches(&t.filter, topic).then(|| topic.split('/').nth(level).map(str::to_string))?
    });
    let fail = |c: Option<String>, reason: String| Unparsed {
        characteristic: c,
        reason,
    };
    let text = std::str::from_utf8(payload)
        .map_err(|_| fail(from_topic.clone(), "the payload is not UTF-8 text".into()))?;
    match &src.payload {
        Payload::Plain => {
            let characteristic = from_topic
                .or_else(|| src.characteristic.clone())
                .ok_or_else(|| {
                    fail(
                        None,
                        "neither the topic nor the config names the characteristic".into(),
                    )
                })?;
            let (value, word) = match text.trim().parse::<f64>() {
                Ok(v) if v.is_finite() => (v, None),
                Ok(_) => {
                    return Err(fail(
                        Some(characteristic.clone()),
                        crate::format::finite_number(text).unwrap_err(),
                    ));
                }
                // A short word may be a pass/fail station's result; the characteristic's word
                // lists decide.
                Err(_) if is_word(text.trim()) => (f64::NAN, Some(text.trim().to_string())),
                Err(_) => {
                    return Err(fail(
                        Some(characteristic.clone()),
                        format!("{:?} is not a number", clip(text)),
                    ));
                }
            };
            Ok(Parsed {
                characteristic,
                value,
                word,
                inspected: None,
                time_ms: None,
                part: None,
            })
        }
        Payload::Json {
            value,
            time,
            characteristic,
            part,
            inspected,
        } => {
            let doc: serde_json::Value = serde_json::from_str(text).map_err(|e| {
                fail(
                    from_topic.clone(),
                    format!("not JSON ({e}): {:?}", clip(text)),
                )
            })?;
            let named = match characteristic {
                Some(ptr) => match doc.pointer(ptr) {
                    Some(serde_json::Value::String(s)) => Some(s.clone()),
                    Some(other) => {
                        return Err(fail(
                            from_topic,
                            format!("{ptr} is {other}, not a characteristic id"),
                        ));
                    }
                    None => None,
                },
                None => None,
            };
            let characteristic = from_topic
                .or(named)
                .or_else(|| src.characteristic.clone())
                .ok_or_else(|| {
                    fail(
                        None,
                        format!(
                            "no characteristic: the topic does not name one and {} is missing",
                            characteristic.as_deref().unwrap_or("the payload")
                        ),
                    )
                })?;
            let c = Some(characteristic.clone());
            let (v, word) = match doc.pointer(value) {
                Some(serde_json::Value::Number(n)) => (n.as_f64(), None),
                Some(serde_json::Value::String(s)) => match s.trim().parse::<f64>() {
                    Ok(v) if v.is_finite() => (Some(v), None),
                    Ok(_) => {
                        return Err(fail(
                            c.clone(),
                            format!(
                                "{value} is {}",
                                crate::format::finite_number(s).unwrap_err()
                            ),
                        ));
                    }
                    Err(_) if is_word(s.trim()) => (Some(f64::NAN), Some(s.trim().to_string())),
                    Err(_) => (None, None),
                },
                // A pass/fail result; what true means is the characteristic's word lists'.
                Some(serde_json::Value::Bool(b)) => (Some(f64::NAN), Some(b.to_string())),
                _ => (None, None),
            };
            let v = v.ok_or_else(|| {
                fail(
                    c.clone(),
                    match doc.pointer(value) {
                        None => format!("no value at {value} in {:?}", clip(text)),
                        Some(v) => format!("{value} is {v}, not a number"),
                    },
                )
            })?;
            let time_ms = match time {
                None => None,
                Some(ptr) => match doc.pointer(ptr) {
                    None | Some(serde_json::Value::Null) => None,
                    Some(serde_json::Value::Number(n)) => match n.as_f64() {
                        Some(ms) if (0.0..1e15).contains(&ms) && ms.fract() == 0.0 => {
                            Some(ms as i64)
                        }
                        _ => {
                            return Err(fail(
                                c,
                                format!("{ptr} = {n} is not a time in milliseconds since 1970"),
                            ));
                        }
                    },
                    Some(serde_json::Value::String(s)) => match crate::format::parse_rfc3339(s) {
                        Ok(ms) => Some(ms),
                        Err(why) => {
                            return Err(fail(
                                c,
                                format!("{ptr} = {:?} is not an RFC 3339 time: {why}", clip(s)),
                            ));
                        }
                    },
                    Some(other) => return Err(fail(c, format!("{ptr} is {other}, not a time"))),
                },
            };
            let part = match part.as_ref().and_then(|ptr| doc.pointer(ptr)) {
                Some(serde_json::Value::String(s)) => Some(s.clone()),
                Some(serde_json::Value::Number(n)) => Some(n.to_string()),
                _ => None,
            };
            // The pointer reads a batch's units where a message carries them; a message
            // without them is one unit's result (or a measurement), read as such.
            let inspected = match inspected {
                None => None,
                Some(ptr) => match doc.pointer(ptr) {
                    Some(serde_json::Value::Number(n)) => n.as_f64(),
                    Some(serde_json::Value::String(s)) => match s.trim().parse::<f64>() {
                        Ok(n) if n.is_finite() => Some(n),
                        _ => {
                            return Err(fail(
                                c,
                                format!("{ptr} = {:?} is not a number of units inspected", clip(s)),
                            ));
                        }
                    },
                    None => None,
                    Some(other) => {
                        return Err(fail(
                            c,
                            format!("{ptr} is {other}, not a number of units inspected"),
                        ));
                    }
                },
            };
            Ok(Parsed {
                characteristic,
                value: v,
                word,
                inspected,
                time_ms,
                part,
            })
        }
    }
}

/// Whether `s` may be a word a pass/fail station sends ("OK", "NOK", "PASS"): 1 to 40
/// printable characters.
fn is_word(s: &str) -> bool {
    !s.is_empty() && s.chars().count() <= 40 && !s.chars().any(char::is_control)
}

fn clip(s: &str) -> String {
    if s.chars().count() > 80 {
        format!("{}…", s.chars().take(80).collect::<String>())
    } else {
        s.to_string()
    }
}

/// The key a QoS 1 message is archived under: its packet id and a hash of topic and payload.
pub fn message_key(pkid: u16, topic: &str, payload: &[u8]) -> String {
    use sha2::Digest;
    let mut h = sha2::Sha256::new();
    h.update(topic.as_bytes());
    h.update([0u8]);
    h.update(payload);
    let d = h.finalize();
    let content = u64::from_be_bytes(d[..8].try_into().expect("a SHA-256 digest has 32 bytes"));
    format!("mqtt:{pkid}:{content:016x}")
}

/// The packet id in a key made by [`message_key`].
fn key_pkid(key: &str) -> Option<u16> {
    key.strip_prefix("mqtt:")?.split(':').next()?.parse().ok()
}

/// The content hash in a key made by [`message_key`] (None for a key of another shape, which
/// then matches nothing).
fn key_content(key: &str) -> Option<u64> {
    u64::from_str_radix(key.rsplit(':').next()?, 16).ok()
}

/// The keys source `name` archived (accepted or rejected), oldest first, from the newest two segments (what the
/// broker may still redeliver is never older than the last few acknowledgements).
pub fn recent_keys(archive: &Path, name: &str) -> Vec<String> {
    let mut keys = Vec::new();
    let Ok(r) = crate::archive::reader::Reader::open(archive) else {
        return keys;
    };
    let n = r.segments().len();
    for i in n.saturating_sub(2)..n {
        for e in r.read_segment(i, None).into_iter().flatten() {
            use crate::archive::record::Record;
            // Rejected messages count too: the broker redelivers them like any other.
            if let Record::ReadingAccepted {
                source,
                source_key: Some(k),
                ..
            }
            | Record::ReadingRejected {
                source,
                source_key: Some(k),
                ..
            } = e.record
                && source == name
                && k.starts_with("mqtt:")
            {
                keys.push(k);
            }
        }
    }
    keys
}

/// Runs until shutdown, reconnecting with backoff whenever the broker is lost.
pub async fn run(
    src: MqttSource,
    known: Vec<String>,
    tx: mpsc::Sender<SourceEvent>,
    mut shutdown: watch::Receiver<bool>,
) {
    let name = format!("mqtt:{}", src.id);
    let opts = match options(&src.broker, src.qos > 0) {
        Ok(o) => o,
        Err(e) => {
            tracing::error!("cannot set up the connection to {}: {e}", src.broker.url());
            let _ = tx.send(SourceEvent::Ended { source: name }).await;
            return;
        }
    };
    let (client, mut eventloop): (AsyncClient, EventLoop) = AsyncClient::new(opts, 1024);
    // Only what an acknowledgement needs: a queued message would keep its payload, and with
    // it the whole read buffer it was cut from, alive until the archive has it.
    let (ack_tx, ack_rx) = mpsc::unbounded_channel::<(u16, QoS)>();
    let acker = tokio::spawn(acknowledge(client.clone(), ack_rx, tx.clone()));
    let qos = if src.qos == 0 {
        QoS::AtMostOnce
    } else {
        QoS::AtLeastOnce
    };
    let mut seen = Redeliveries::new(src.duplicates, known);
    let mut backoff = Duration::from_millis(250);
    let mut down_since: Option<tokio::time::Instant> = None;
    let mut connected = false;
    let mut duplicates = 0u64;
    let mut skewed = 0u64;
    tracing::info!(
        "connecting to {} as {}, topics {}",
        src.broker.url(),
        src.broker.client_id,
        src.topics
            .iter()
            .map(|t| t.template.as_str())
            .collect::<Vec<_>>()
            .join(", ")
    );
    loop {
        let ev = tokio::select! {
            ev = eventloop.poll() => ev,
            _ = shutdown.changed() => break,
        };
        match ev {
            Ok(Event::Incoming(Packet::ConnAck(ack))) => {
                connected = true;
                seen.connected();
                let _ = tx
                    .send(SourceEvent::Health {
                        source: name.clone(),
                        up: true,
                        detail: format!("connected to {}", src.broker.url()),
                    })
                    .await;
                backoff = Duration::from_millis(250);
                match down_since.take() {
                    Some(t) => tracing::warn!(
                        "connected to {} again after {:.1} s without readings (session kept: {})",
                        src.broker.url(),
                        t.elapsed().as_secs_f64(),
                        ack.session_present
                    ),
                    None => tracing::info!("connected to {}", src.broker.url()),
                }
                let subs = src
                    .topics
                    .iter()
                    .map(|t| rumqttc::SubscribeFilter::new(t.filter.clone(), qos));
                if let Err(e) = client.try_subscribe_many(subs) {
                    tracing::error!("cannot subscribe: {e}");
                }
            }
            Ok(Event::Incoming(Packet::SubAck(s))) => {
                if s.return_codes
                    .iter()
                    .any(|c| matches!(c, rumqttc::SubscribeReasonCode::Failure))
                {
                    tracing::error!(
                        "the broker refused a subscription (check its access rules): {:?}",
                        s.return_codes
                    );
                } else {
                    tracing::info!("subscribed");
                }
            }
            Ok(Event::Incoming(Packet::Publish(p))) => {
                let arrival = now_ms();
                tracing::trace!(pkid = p.pkid, dup = p.dup, topic = %p.topic, "message");
                let needs_ack = p.qos != QoS::AtMostOnce;
                let key = needs_ack.then(|| message_key(p.pkid, &p.topic, &p.payload));
                let duplicate = key.as_deref().is_some_and(|k| seen.is_redelivery(p.dup, k));
                if duplicate {
                    duplicates += 1;
                    if duplicates <= 10 || duplicates.is_multiple_of(1000) {
                        tracing::info!(
                            "redelivered message {} on {} is already archived; acknowledged, not stored again ({duplicates} so far)",
                            p.pkid,
                            p.topic
                        );
                    }
                } else {
                    // Every message the broker sent is archived once, accepted or rejected, and
                    // remembered under its key either way: a rejected message that comes again
                    // is a redelivery like any other.
                    if let Some(k) = &key {
                        seen.archived(k);
                    }
                    let ev = message_event(&src, &name, &p, key, arrival, &mut skewed);
                    if tx.send(ev).await.is_err() {
                        break;
                    }
                }
                if needs_ack && ack_tx.send((p.pkid, p.qos)).is_err() {
                    break;
                }
            }
            Ok(_) => {}
            Err(e) => {
                if connected || down_since.is_none() {
                    let _ = tx
                        .send(SourceEvent::Health {
                            source: name.clone(),
                            up: false,
                            detail: format!("{}: {e}", src.broker.url()),
                        })
                        .await;
                    tracing::warn!(
                        "lost the broker {}: {e}; reconnecting (messages not yet acknowledged will be redelivered)",
                        src.broker.url()
                    );
                    down_since.get_or_insert_with(tokio::time::Instant::now);
                }
                connected = false;
                tokio::select! {
                    _ = tokio::time::sleep(backoff) => {}
                    _ = shutdown.changed() => break,
                }
                backoff = (backoff * 2).min(Duration::from_secs(30));
            }
        }
    }
    drop(ack_tx);
    // Acknowledge what is already durable before leaving; the rest is redelivered next time.
    let _ = tokio::time::timeout(Duration::from_secs(2), acker).await;
    let _ = tokio::time::timeout(Duration::from_secs(1), async {
        let _ = client.try_disconnect();
        while let Ok(ev) = eventloop.poll().await {
            if matches!(ev, Event::Outgoing(rumqttc::Outgoing::Disconnect)) {
                break;
            }
        }
    })
    .await;
    let _ = tx.send(SourceEvent::Ended { source: name }).await;
}

/// The event for one message: a reading, or why it is not one. `skewed` counts the source
/// times too far from the arrival to be trusted (logged now and then).
fn message_event(
    src: &MqttSource,
    name: &str,
    p: &Publish,
    key: Option<String>,
    arrival: i64,
    skewed: &mut u64,
) -> SourceEvent {
    let rejected = |characteristic: Option<String>, reason: String, key: Option<String>| {
        SourceEvent::Unreadable {
            source: name.to_string(),
            characteristic,
            raw: crate::format::raw_text(&p.payload),
            reason: format!("on topic {}: {reason}", p.topic),
            source_key: key,
        }
    };
    if p.payload.len() > src.max_payload_bytes {
        return rejected(
            None,
            format!(
                "the message on {} is {} bytes, more than max_payload_bytes = {}; it was not read as a reading",
                p.topic,
                p.payload.len(),
                src.max_payload_bytes
            ),
            key,
        );
    }
    match parse(src, &p.topic, &p.payload) {
        Ok(r) => {
            let ignored = r
                .time_ms
                .is_some_and(|t| (t - arrival).abs() > src.max_clock_skew_ms);
            if ignored {
                *skewed += 1;
                if *skewed <= 10 || skewed.is_multiple_of(1000) {
                    tracing::warn!(
                        "{}",
                        skew_warning(r.time_ms.unwrap_or(arrival), arrival, src, *skewed)
                    );
                }
            }
            SourceEvent::Reading(Incoming {
                source: name.to_string(),
                characteristic: r.characteristic,
                value: r.value,
                unit: None,
                source_time_ms: r.time_ms,
                source_time_ignored: ignored,
                arrival_ms: arrival,
                part: r.part,
                source_key: key,
                sent: Some(crate::format::raw_text(&p.payload)),
                word: r.word,
                inspected: r.inspected,
            })
        }
        Err(u) => rejected(u.characteristic, u.reason, key),
    }
}

/// Words for a source time that is too far from the arrival time.
pub fn skew_warning(source_ms: i64, arrival_ms: i64, src: &MqttSource, count: u64) -> String {
    let off_s = (source_ms - arrival_ms) as f64 / 1000.0;
    let hint = if source_ms
        .saturating_mul(1000)
        .saturating_sub(arrival_ms)
        .abs()
        <= src.max_clock_skew_ms
    {
        " (it looks like seconds since 1970 sent where milliseconds are expected)"
    } else {
        ""
    };
    format!(
        "a reading's source time {} is {:.0} s {} its arrival {}, more than max_clock_skew_s = {}{hint}; it is kept in the record, and the arrival time orders the reading ({count} so far from this source)",
        crate::format::utc_ms(source_ms),
        off_s.abs(),
        if off_s < 0.0 { "before" } else { "after" },
        crate::format::utc_ms(arrival_ms),
        src.max_clock_skew_ms / 1000
    )
}

/// What a source remembers of the messages it archived, to recognise the broker sending one
/// again (after a reconnect or a kill -9). Pure: the source feeds it keys made by
/// [`message_key`], the archive's recent keys at start, and each new connection.
///
/// Every message archived counts, accepted or rejected: a rejected message comes again like
/// any other. (Remembering only readings once let a rejected message in the redelivered backlog
/// end the catch-up, and every reading redelivered after it was stored twice.)
#[derive(Debug, Clone)]
pub struct Redeliveries {
    mode: Duplicates,
    /// Packet id → content hash of the last message archived under it (packet-id mode).
    last_key: HashMap<u16, Option<u64>>,
    /// Content hashes of the last `window` messages archived (content mode).
    recent: VecDeque<Option<u64>>,
    window: usize,
    /// Content mode: the backlog after connecting is still arriving.
    catching_up: bool,
}

impl Redeliveries {
    /// Starts from the keys the archive holds for this source, oldest first.
    pub fn new(mode: Duplicates, known: Vec<String>) -> Self {
        let window = match mode {
            Duplicates::Content { window } => window,
            Duplicates::PacketId => 0,
        };
        let mut r = Redeliveries {
            mode,
            last_key: HashMap::new(),
            recent: VecDeque::with_capacity(window),
            window,
            catching_up: false,
        };
        for k in &known {
            r.archived(k);
        }
        r
    }

    /// A connection was made: in content mode the backlog comes first.
    pub fn connected(&mut self) {
        self.catching_up = true;
    }

    /// Whether the message with `key` (and the DUP flag `dup`) is one already archived.
    pub fn is_redelivery(&mut self, dup: bool, key: &str) -> bool {
        match self.mode {
            Duplicates::PacketId => {
                dup && key_pkid(key).is_some_and(|id| {
                    self.last_key
                        .get(&id)
                        .is_some_and(|k| k.is_some() && *k == key_content(key))
                })
            }
            Duplicates::Content { .. } if self.catching_up => {
                let c = key_content(key);
                let seen = c.is_some() && self.recent.iter().any(|r| *r == c);
                // The first message not archived before ends the backlog: the broker sends what
                // it holds in order, and everything after it is new.
                self.catching_up = seen;
                seen
            }
            Duplicates::Content { .. } => false,
        }
    }

    /// The message with `key` is being archived (accepted or rejected).
    pub fn archived(&mut self, key: &str) {
        if let Some(id) = key_pkid(key) {
            self.last_key.insert(id, key_content(key));
        }
        if self.window == 0 {
            return;
        }
        if self.recent.len() == self.window {
            self.recent.pop_front();
        }
        self.recent.push_back(key_content(key));
    }
}

/// Acknowledges messages in batches once the archive holds them durably: every message handed
/// over since the last batch waits for one Barrier behind it in the engine queue.
async fn acknowledge(
    client: AsyncClient,
    mut rx: mpsc::UnboundedReceiver<(u16, QoS)>,
    tx: mpsc::Sender<SourceEvent>,
) {
    while let Some(first) = rx.recv().await {
        let mut batch = vec![first];
        while batch.len() < 4096 {
            match rx.try_recv() {
                Ok(p) => batch.push(p),
                Err(_) => break,
            }
        }
        let (done, durable) = oneshot::channel();
        if tx.send(SourceEvent::Barrier(done)).await.is_err() || durable.await.is_err() {
            return; // the engine stopped: nothing more is known durable; the broker redelivers
        }
        for &(pkid, qos) in &batch {
            let mut p = Publish::new(String::new(), qos, Vec::new());
            p.pkid = pkid;
            if client.ack(&p).await.is_err() {
                return;
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn topic_filters_match_as_mqtt_says() {
        assert!(matches("cell4/+/measure", "cell4/bore/measure"));
        assert!(!matches("cell4/+/measure", "cell4/bore/x/measure"));
        assert!(matches("cell4/#", "cell4/bore/measure"));
        assert!(matches("cell4/#", "cell4"));
        assert!(!matches("#", "$SYS/broker/load"));
        assert!(!matches("cell4/+", "cell5/bore"));
    }

    fn source(payload: Payload, topic: &str, characteristic: Option<&str>) -> MqttSource {
        MqttSource::on_localhost(payload, topic, characteristic)
    }

    #[test]
    fn payloads_give_readings_or_say_why_not() {
        let plain = source(Payload::Plain, "cell4/{characteristic}/raw", None);
        let r = parse(&plain, "cell4/bore/raw", b" 12.0031\n").unwrap();
        assert_eq!((r.characteristic.as_str(), r.value), ("bore", 12.0031));
        // A short word goes on to the engine, which maps it for a pass/fail characteristic and
        // rejects it for a measured one; text that cannot be a word is refused here.
        let r = parse(&plain, "cell4/bore/raw", b"12.0O31").unwrap();
        assert_eq!(r.word.as_deref(), Some("12.0O31"));
        assert!(r.value.is_nan());
        let long = "x".repeat(41);
        let e = parse(&plain, "cell4/bore/raw", long.as_bytes()).unwrap_err();
        assert_eq!(e.characteristic.as_deref(), Some("bore"));
        assert!(e.reason.contains("is not a number"), "{}", e.reason);
        let e = parse(&plain, "cell4/bore/raw", b"  \n").unwrap_err();
        assert!(e.reason.contains("is not a number"), "{}", e.reason);
        let json = source(
            Payload::Json {
                value: "/m/v".into(),
                time: Some("/t".into()),
                characteristic: Some("/c".into()),
                part: Some("/p".into()),
                inspected: None,
            },
            "lab/#",
            None,
        );
        let r = parse(
            &json,
            "lab/x",
            br#"{"m": {"v": "25.5"}, "t": 1796198400000, "c": "face", "p": 417}"#,
        )
        .unwrap();
        assert_eq!(r.characteristic, "face");
        assert_eq!(r.value, 25.5);
        assert_eq!(r.time_ms, Some(1_796_198_400_000));
        assert_eq!(r.part.as_deref(), Some("417"));
        let r = parse(
            &json,
            "lab/x",
            br#"{"m": {"v": 1}, "t": "2026-12-02T08:00:00.250Z", "c": "face"}"#,
        )
        .unwrap();
        assert_eq!(r.time_ms, Some(1_796_198_400_250));
        // A pass/fail result: true and a word go on as words, for the characteristic's lists.
        let r = parse(&json, "lab/x", br#"{"m": {"v": true}, "c": "leak"}"#).unwrap();
        assert_eq!(r.word.as_deref(), Some("true"));
        let r = parse(&json, "lab/x", br#"{"m": {"v": " NOK "}, "c": "leak"}"#).unwrap();
        assert_eq!(r.word.as_deref(), Some("NOK"));
        // A batch: the count and the units inspected.
        let batch = source(
            Payload::Json {
                value: "/bad".into(),
                time: None,
                characteristic: None,
                part: None,
                inspected: Some("/tested".into()),
            },
            "eol/{characteristic}",
            None,
        );
        let r = parse(&batch, "eol/leak", br#"{"bad": 3, "tested": "50"}"#).unwrap();
        assert_eq!((r.value, r.inspected), (3.0, Some(50.0)));
        // Without units it is one unit's result, read as such (the engine judges it).
        let r = parse(&batch, "eol/leak", br#"{"bad": 1}"#).unwrap();
        assert_eq!((r.value, r.inspected), (1.0, None));
        for (payload, why) in [
            (
                &br#"{"bad": 3, "tested": "many"}"#[..],
                "is not a number of units inspected",
            ),
            (
                br#"{"bad": 3, "tested": null}"#,
                "/tested is null, not a number of units inspected",
            ),
        ] {
            let e = parse(&batch, "eol/leak", payload).unwrap_err();
            assert!(
                e.reason.contains(why),
                "{}: {}",
                String::from_utf8_lossy(payload),
                e.reason
            );
            assert_eq!(e.characteristic.as_deref(), Some("leak"));
        }
        for (payload, why) in [
            (&br#"{"m": {}, "c": "face"}"#[..], "no value at /m/v"),
            (
                br#"{"m": {"v": [1]}, "c": "face"}"#,
                "/m/v is [1], not a number",
            ),
            (
                br#"{"m": {"v": 1}, "c": "face", "t": "yesterday"}"#,
                "not an RFC 3339 time",
            ),
            (br#"{"m": {"v": 1}}"#, "no characteristic"),
            (br#"{"m": "#, "not JSON"),
        ] {
            let e = parse(&json, "lab/x", payload).unwrap_err();
            assert!(e.reason.contains(why), "{} does not say {why}", e.reason);
        }
    }

    /// The regression, in both modes: a backlog redelivered after a kill -9 that holds a
    /// rejected message among readings. Every message already archived is recognised, the
    /// rejected one included, and the first new one ends the backlog.
    #[test]
    fn a_rejected_message_in_the_redelivered_backlog_is_recognised_and_does_not_end_it() {
        let topic = "cell4/bore/measure";
        let keys: Vec<String> = [
            (10, r#"{"v": 12.001, "part": "K1"}"#),
            (11, r#"{"v": "n/a", "part": "P1"}"#),
            (12, r#"{"v": 12.002, "part": "K2"}"#),
        ]
        .iter()
        .map(|(id, p)| message_key(*id, topic, p.as_bytes()))
        .collect();
        let new = message_key(13, topic, br#"{"v": 12.003, "part": "K3"}"#);
        // As the archive gives them back at start (accepted and rejected alike).
        for mode in [Duplicates::PacketId, Duplicates::Content { window: 100 }] {
            let mut r = Redeliveries::new(mode, keys.clone());
            r.connected();
            for k in &keys {
                assert!(r.is_redelivery(true, k), "{mode:?}: {k} stored twice");
            }
            assert!(!r.is_redelivery(false, &new), "{mode:?}");
        }
        // And as archived during the run, before the connection dropped.
        let mut r = Redeliveries::new(Duplicates::Content { window: 100 }, Vec::new());
        r.connected();
        for k in &keys {
            assert!(!r.is_redelivery(false, k));
            r.archived(k);
        }
        r.connected();
        for k in &keys {
            assert!(r.is_redelivery(true, k), "{k} stored twice");
        }
        // Content mode after rumqttd's way: new packet ids, same content, no DUP.
        let mut r = Redeliveries::new(Duplicates::Content { window: 100 }, keys.clone());
        r.connected();
        assert!(r.is_redelivery(
            false,
            &message_key(900, topic, br#"{"v": 12.001, "part": "K1"}"#)
        ));
        assert!(r.is_redelivery(
            false,
            &message_key(901, topic, br#"{"v": "n/a", "part": "P1"}"#)
        ));
        assert!(r.is_redelivery(
            false,
            &message_key(902, topic, br#"{"v": 12.002, "part": "K2"}"#)
        ));
    }

    /// The regression: RFC 3339 times with a numeric offset were rejected. And a time far from
    /// the arrival (a wrong gauge clock, or seconds sent for milliseconds) is kept in the
    /// record, flagged, and the arrival orders the reading.
    #[test]
    fn offsets_are_read_and_a_time_far_from_the_arrival_is_kept_but_not_trusted() {
        let src = source(
            Payload::Json {
                value: "/v".into(),
                time: Some("/t".into()),
                characteristic: None,
                part: None,
                inspected: None,
            },
            "cell4/{characteristic}/m",
            None,
        );
        let arrival = 1_796_198_400_000; // 2026-12-02T08:00:00Z
        let event = |t: &str| {
            let p = Publish::new(
                "cell4/bore/m",
                QoS::AtLeastOnce,
                format!(r#"{{"v": 12.0, "t": {t}}}"#),
            );
            let mut skewed = 0;
            let ev = message_event(&src, "mqtt:t", &p, None, arrival, &mut skewed);
            match ev {
                SourceEvent::Reading(r) => (r, skewed),
                other => panic!("{t}: {other:?}"),
            }
        };
        for t in [
            r#""2026-12-02T09:00:00+01:00""#,
            r#""2026-12-02T03:00:00-05:00""#,
            r#""2026-12-02T08:00:00Z""#,
            "1796198400000",
        ] {
            let (r, skewed) = event(t);
            assert_eq!(r.source_time_ms, Some(arrival), "{t}");
            assert!(!r.source_time_ignored && skewed == 0, "{t}");
            assert_eq!(r.time_ms(), arrival);
        }
        // Seconds for milliseconds (January 1970 as milliseconds), and a clock a year out.
        for t in ["1796198400", r#""2027-12-02T08:00:00Z""#] {
            let (r, skewed) = event(t);
            assert!(r.source_time_ms.is_some(), "{t}: kept");
            assert!(r.source_time_ignored, "{t}");
            assert_eq!(skewed, 1);
            assert_eq!(r.time_ms(), arrival, "{t}: the arrival orders it");
            assert_eq!(
                r.record(),
                crate::archive::Record::ReadingAccepted {
                    source: "mqtt:t".into(),
                    characteristic: "bore".into(),
                    value: 12.0,
                    unit: None,
                    source_time_ms: r.source_time_ms,
                    source_time_ignored: true,
                    arrival_ms: arrival,
                    part: None,
                    source_key: None,
                    word: None,
                    inspected: None,
                }
            );
        }
        let w = skew_warning(1_796_198_400, arrival, &src, 1);
        assert!(w.contains("looks like seconds since 1970"), "{w}");
    }

    #[test]
    fn keys_carry_the_packet_id() {
        let k = message_key(513, "cell4/bore", b"12.0");
        assert_eq!(key_pkid(&k), Some(513));
        assert_ne!(k, message_key(513, "cell4/bore", b"12.1"));
        assert_ne!(k, message_key(513, "cell4/face", b"12.0"));
    }
}
