//! The `[[source]]` sections: where readings come from (replay, folder, serial, MQTT), as
//! written and as validated. One validated type per kind; `build_sources` checks every
//! source and reports each problem at its TOML path.

use std::collections::HashSet;
use std::path::PathBuf;

use serde::{Deserialize, Serialize};

use super::RawConfig;
use crate::diag::{Locator, Problem};
use crate::limits_file::valid_id;

/// The largest packet MQTT 3.1.1 can carry (the remaining length field's maximum).
///
/// The client takes any packet up to this size. A smaller incoming limit would not protect
/// anything: MQTT 3.1.1 has no way to tell the broker about it, so a larger message fails to
/// decode, the connection drops, and the broker sends the same message again on reconnecting,
/// for ever, with nothing behind it archived. Instead every message is read, and one larger than
/// the source's `max_payload_bytes` is archived as rejected and acknowledged. To keep huge
/// messages off the wire altogether, set the broker's own message size limit.
pub const MAX_PACKET: usize = 268_435_455;

/// `[[source]]`.
#[derive(Debug, Clone, PartialEq, Deserialize, Serialize)]
#[serde(deny_unknown_fields)]
pub struct RawSource {
    pub id: String,
    pub kind: String,
    /// replay: the recorded feed file (JSON lines).
    pub file: Option<String>,
    /// replay: speed factor (2 = twice as fast as recorded; 0 = as fast as possible).
    pub speed: Option<f64>,
    /// folder: the directory a measuring machine drops its CSV reports into.
    pub path: Option<String>,
    /// folder: "per-part" (one row per part, a column per characteristic) or "per-reading"
    /// (one reading per row).
    pub rows: Option<String>,
    /// folder, per-part: report column → characteristic id.
    pub columns: Option<std::collections::BTreeMap<String, String>>,
    /// folder: the column holding the part or sample id.
    pub part_column: Option<String>,
    /// folder, per-reading: the columns holding the characteristic id and the value.
    pub characteristic_column: Option<String>,
    pub value_column: Option<String>,
    /// folder: a file is read once its size has not changed for this long.
    pub settle_ms: Option<u64>,
    /// serial: the device (/dev/ttyUSB0, /dev/serial/by-id/...).
    pub port: Option<String>,
    /// serial: line settings.
    pub baud: Option<u32>,
    pub data_bits: Option<u8>,
    pub parity: Option<String>,
    pub stop_bits: Option<u8>,
    pub flow_control: Option<String>,
    /// serial: the end of each frame ("\r\n" by default).
    pub terminator: Option<String>,
    /// serial: a regular expression with a named group `value` (and optionally `unit` and
    /// `channel`).
    pub pattern: Option<String>,
    /// serial: the characteristic every reading belongs to (without channels).
    pub characteristic: Option<String>,
    /// serial: channel → characteristic, for multiplexers that prefix a channel.
    pub channels: Option<std::collections::BTreeMap<String, String>>,
    /// serial: sent on a timer for gauges that answer when asked.
    pub request: Option<String>,
    pub request_interval_ms: Option<u64>,
    /// serial: the unit the gauge reports in when it does not say ("mm" or "in").
    pub gauge_unit: Option<String>,
    /// mqtt: the broker, `mqtt://host[:port]` or `mqtts://host[:port]` (TLS).
    pub broker: Option<String>,
    /// mqtt: the client id; kept across restarts so the broker keeps the session (default
    /// `linewarden-<source id>`).
    pub client_id: Option<String>,
    /// mqtt: topic filters; `{characteristic}` stands for one level that names the
    /// characteristic (`cell4/{characteristic}/measure`); `+` and `#` as in MQTT.
    pub topics: Option<Vec<String>>,
    /// mqtt: 0 or 1 (default 1: acknowledged only once archived durably).
    pub qos: Option<u8>,
    /// mqtt: "plain" (the payload is the number) or "json".
    pub payload: Option<String>,
    /// mqtt, json: JSON pointers (RFC 6901) to the value, the time it was measured, the
    /// characteristic and the part id.
    pub value_pointer: Option<String>,
    pub time_pointer: Option<String>,
    pub characteristic_pointer: Option<String>,
    pub part_pointer: Option<String>,
    /// mqtt, json: a pointer to the units inspected, for stations that report a whole batch
    /// (the value is then the count found in them: nonconforming parts, or defects).
    pub inspected_pointer: Option<String>,
    /// mqtt: credentials. The password is read from a file or an environment variable, never
    /// written in the config.
    pub username: Option<String>,
    pub password_file: Option<String>,
    pub password_env: Option<String>,
    /// mqtt, TLS: the CA certificate (PEM) to trust instead of the system's, and a client
    /// certificate and key (PEM) when the broker asks for one.
    pub ca_file: Option<String>,
    pub client_cert_file: Option<String>,
    pub client_key_file: Option<String>,
    /// mqtt: keep-alive in seconds (default 30).
    pub keep_alive_s: Option<u64>,
    /// mqtt: how a redelivered message is recognised: "packet-id" (the DUP flag and the same
    /// packet id, as MQTT 3.1.1 asks of a broker) or "content" (for brokers that resume a log
    /// with new packet ids: the same topic and payload as one of the last `redelivery_window`
    /// messages archived, while the backlog arrives after connecting).
    pub duplicates: Option<String>,
    pub redelivery_window: Option<usize>,
    /// mqtt: the largest payload taken as a reading (default 65536 bytes); a larger message is
    /// archived as rejected (its size, topic and first bytes), acknowledged, and passed over.
    pub max_payload_bytes: Option<usize>,
    /// mqtt: a source time further than this from the arrival time (default 86400 s) is kept
    /// in the record with a warning, and the arrival time orders the reading.
    pub max_clock_skew_s: Option<u64>,
}

/// How a folder source's CSV reports are laid out.
#[derive(Debug, Clone, PartialEq)]
pub enum ReportRows {
    /// One row per part; each mapped column a characteristic.
    PerPart { columns: Vec<(String, String)> },
    /// One reading per row.
    PerReading {
        characteristic_column: String,
        value_column: String,
    },
}

/// A validated serial gauge.
#[derive(Debug, Clone, PartialEq)]
pub struct SerialGauge {
    pub id: String,
    pub port: String,
    pub baud: u32,
    pub data_bits: u8,
    pub parity: String,
    pub stop_bits: u8,
    pub flow_control: String,
    pub terminator: String,
    pub pattern: String,
    pub characteristic: Option<String>,
    pub channels: Vec<(String, String)>,
    pub request: Option<String>,
    pub request_interval_ms: u64,
    pub gauge_unit: Option<String>,
    /// Each characteristic's unit, to convert mm/in readings into.
    pub units: Vec<(String, String)>,
}

/// A secret (a password): kept out of `Debug` output and so out of every log line.
#[derive(Clone, PartialEq, Eq)]
pub struct Secret(pub String);

impl std::fmt::Debug for Secret {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str("Secret(…)")
    }
}

/// How to reach an MQTT broker.
#[derive(Debug, Clone, PartialEq)]
pub struct Broker {
    pub host: String,
    pub port: u16,
    pub tls: bool,
    pub client_id: String,
    pub username: Option<String>,
    pub password: Option<Secret>,
    pub ca_file: Option<PathBuf>,
    pub client_cert_file: Option<PathBuf>,
    pub client_key_file: Option<PathBuf>,
    pub keep_alive_s: u64,
}

impl Broker {
    /// `mqtt://host:port` (TLS as `mqtts://`), for log lines; never the credentials.
    pub fn url(&self) -> String {
        let scheme = if self.tls { "mqtts" } else { "mqtt" };
        format!("{scheme}://{}:{}", self.host, self.port)
    }
}

/// One subscription of an MQTT source.
#[derive(Debug, Clone, PartialEq)]
pub struct TopicFilter {
    /// As written, with `{characteristic}`.
    pub template: String,
    /// What is subscribed to (`{characteristic}` replaced by `+`).
    pub filter: String,
    /// The level (0-based) that names the characteristic, if any.
    pub characteristic_level: Option<usize>,
}

/// How an MQTT payload carries a reading.
#[derive(Debug, Clone, PartialEq)]
pub enum Payload {
    Plain,
    Json {
        value: String,
        time: Option<String>,
        characteristic: Option<String>,
        part: Option<String>,
        /// Units inspected, for batch results.
        inspected: Option<String>,
    },
}

/// A validated MQTT source.
#[derive(Debug, Clone, PartialEq)]
pub struct MqttSource {
    pub id: String,
    pub broker: Broker,
    pub topics: Vec<TopicFilter>,
    pub qos: u8,
    pub payload: Payload,
    /// The characteristic when neither the topic nor the payload names it.
    pub characteristic: Option<String>,
    pub duplicates: Duplicates,
    /// Larger payloads are rejected (archived as rejected and acknowledged).
    pub max_payload_bytes: usize,
    /// A source time further than this from the arrival is not trusted for ordering.
    pub max_clock_skew_ms: i64,
}

impl MqttSource {
    /// A source on a broker at localhost:1883 with every default, taking `payload` on the one
    /// topic `template` (where a level `{characteristic}` names the characteristic), for the
    /// tests, benchmarks and fuzz targets that exercise message parsing without a config file.
    pub fn on_localhost(payload: Payload, template: &str, characteristic: Option<&str>) -> Self {
        MqttSource {
            id: "local".into(),
            broker: Broker {
                host: "localhost".into(),
                port: 1883,
                tls: false,
                client_id: "linewarden-local".into(),
                username: None,
                password: None,
                ca_file: None,
                client_cert_file: None,
                client_key_file: None,
                keep_alive_s: 30,
            },
            topics: vec![TopicFilter {
                template: template.into(),
                filter: template.replace("{characteristic}", "+"),
                characteristic_level: template.split('/').position(|l| l == "{characteristic}"),
            }],
            qos: 1,
            payload,
            characteristic: characteristic.map(str::to_string),
            duplicates: Duplicates::PacketId,
            max_payload_bytes: 64 * 1024,
            max_clock_skew_ms: 86_400_000,
        }
    }
}

/// How an MQTT source recognises a redelivered message.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Duplicates {
    /// DUP set and the packet id of the last message archived under it (MQTT 3.1.1 §4.4).
    PacketId,
    /// Same topic and payload as one of the last `window` archived, in the backlog that arrives
    /// first after connecting. Only for payloads that carry a time or a part id.
    Content { window: usize },
}

/// A validated source.
#[derive(Debug, Clone, PartialEq)]
pub enum Source {
    Serial(Box<SerialGauge>),
    Mqtt(Box<MqttSource>),
    Replay {
        id: String,
        file: PathBuf,
        speed: f64,
    },
    Folder {
        id: String,
        path: PathBuf,
        rows: ReportRows,
        part_column: Option<String>,
        settle_ms: u64,
    },
}

/// The password named by `password_file` or `password_env` (never both), read now so that a
/// missing file or variable is reported with the rest of the config's problems.
pub(crate) fn read_password(
    file: Option<&String>,
    env: Option<&String>,
    at: &str,
    resolve: &impl Fn(&str) -> PathBuf,
    loc: &Locator,
    p: &mut Vec<Problem>,
) -> Option<Secret> {
    match (file, env) {
        (Some(_), Some(_)) => {
            p.push(loc.problem(
                &format!("{at}.password_env"),
                "give password_file or password_env, not both",
            ));
            None
        }
        (Some(f), None) => {
            let f = resolve(f);
            match std::fs::read_to_string(&f) {
                Ok(t) => Some(Secret(t.trim_end_matches(['\r', '\n']).to_string())),
                Err(e) => {
                    p.push(loc.problem(
                        &format!("{at}.password_file"),
                        format!("cannot read {}: {e}", f.display()),
                    ));
                    None
                }
            }
        }
        (None, Some(var)) => match std::env::var(var) {
            Ok(v) => Some(Secret(v)),
            Err(_) => {
                p.push(loc.problem(
                    &format!("{at}.password_env"),
                    format!("the environment variable {var} is not set"),
                ));
                None
            }
        },
        (None, None) => None,
    }
}

/// `host[:port]` of an address whose scheme is already taken off, or a located problem.
pub(crate) fn host_port(
    rest: &str,
    default_port: u16,
    url: &str,
    key: &str,
    loc: &Locator,
    p: &mut Vec<Problem>,
) -> Option<(String, u16)> {
    let rest = rest.trim_end_matches('/');
    let (host, port) = match rest.rsplit_once(':') {
        Some((h, n)) => match n.parse::<u16>() {
            Ok(n) if n > 0 => (h.to_string(), n),
            _ => {
                p.push(loc.problem(key, format!("\"{n}\" in \"{url}\" is not a port number")));
                return None;
            }
        },
        None => (rest.to_string(), default_port),
    };
    if host.is_empty() || host.contains('/') || host.contains('@') {
        p.push(loc.problem(
            key,
            format!("\"{url}\" does not name a host (credentials go in username and password_file, not the address)"),
        ));
        return None;
    }
    Some((host, port))
}

/// Reads a broker's connection settings (shared by the MQTT source and the MQTT output).
#[allow(clippy::too_many_arguments)]
pub(crate) fn build_broker(
    url: Option<&str>,
    client_id: Option<&str>,
    default_client_id: &str,
    creds: (Option<&String>, Option<&String>, Option<&String>),
    tls_files: (Option<&String>, Option<&String>, Option<&String>),
    keep_alive_s: Option<u64>,
    at: &str,
    resolve: &impl Fn(&str) -> PathBuf,
    loc: &Locator,
    p: &mut Vec<Problem>,
) -> Option<Broker> {
    let Some(url) = url else {
        p.push(loc.problem(
            at,
            "needs broker = \"mqtt://host:port\" (or mqtts:// for TLS)",
        ));
        return None;
    };
    let (tls, rest) = if let Some(r) = url.strip_prefix("mqtts://") {
        (true, r)
    } else if let Some(r) = url.strip_prefix("mqtt://") {
        (false, r)
    } else {
        p.push(loc.problem(
            &format!("{at}.broker"),
            format!(
                "\"{url}\" is not a broker address; write mqtt://host:port or mqtts://host:port"
            ),
        ));
        return None;
    };
    let (host, port) = host_port(
        rest,
        if tls { 8883 } else { 1883 },
        url,
        &format!("{at}.broker"),
        loc,
        p,
    )?;
    let client_id = client_id.unwrap_or(default_client_id).to_string();
    if client_id.is_empty() || client_id.len() > 64 {
        p.push(loc.problem(
            &format!("{at}.client_id"),
            "the client id must be 1 to 64 characters",
        ));
    }
    let (username, password_file, password_env) = creds;
    let password = read_password(password_file, password_env, at, resolve, loc, p);
    if password.is_some() && username.is_none() {
        p.push(loc.problem(at, "a password needs a username"));
    }
    let (ca, cert, key) = tls_files;
    let mut file = |name: &str, v: Option<&String>| {
        v.map(|f| {
            let f = resolve(f);
            if !tls {
                p.push(loc.problem(
                    &format!("{at}.{name}"),
                    "certificates are for TLS; the broker address needs mqtts://",
                ));
            } else if !f.is_file() {
                p.push(loc.problem(
                    &format!("{at}.{name}"),
                    format!("{} does not exist or is not a file", f.display()),
                ));
            }
            f
        })
    };
    let ca_file = file("ca_file", ca);
    let client_cert_file = file("client_cert_file", cert);
    let client_key_file = file("client_key_file", key);
    if client_cert_file.is_some() != client_key_file.is_some() {
        p.push(loc.problem(at, "client_cert_file and client_key_file go together"));
    }
    let keep_alive_s = keep_alive_s.unwrap_or(30);
    if !(5..=3600).contains(&keep_alive_s) {
        p.push(loc.problem(
            &format!("{at}.keep_alive_s"),
            format!("{keep_alive_s} s is out of range; use 5 to 3600"),
        ));
    }
    Some(Broker {
        host,
        port,
        tls,
        client_id,
        username: username.cloned(),
        password,
        ca_file,
        client_cert_file,
        client_key_file,
        keep_alive_s,
    })
}

/// Checks a topic filter: levels split by '/', `+` a whole level, `#` only as the last level.
fn check_filter(filter: &str) -> Result<(), String> {
    if filter.is_empty() {
        return Err("a topic filter must not be empty".into());
    }
    let levels: Vec<&str> = filter.split('/').collect();
    for (i, l) in levels.iter().enumerate() {
        if (l.contains('+') && *l != "+") || (l.contains('#') && *l != "#") {
            return Err(format!("\"{l}\": + and # must stand alone in their level"));
        }
        if *l == "#" && i + 1 != levels.len() {
            return Err("# must be the last level".into());
        }
    }
    Ok(())
}

fn build_mqtt(
    raw: &RawConfig,
    s: &RawSource,
    at: &str,
    resolve: &impl Fn(&str) -> PathBuf,
    loc: &Locator,
    p: &mut Vec<Problem>,
) -> Option<MqttSource> {
    let known = |c: &str| raw.characteristic.iter().any(|k| k.id == c);
    let broker = build_broker(
        s.broker.as_deref(),
        s.client_id.as_deref(),
        &format!("linewarden-{}", s.id),
        (
            s.username.as_ref(),
            s.password_file.as_ref(),
            s.password_env.as_ref(),
        ),
        (
            s.ca_file.as_ref(),
            s.client_cert_file.as_ref(),
            s.client_key_file.as_ref(),
        ),
        s.keep_alive_s,
        at,
        resolve,
        loc,
        p,
    );
    let mut topics = Vec::new();
    match &s.topics {
        Some(list) if !list.is_empty() => {
            for (i, t) in list.iter().enumerate() {
                let levels: Vec<&str> = t.split('/').collect();
                let marks: Vec<usize> = levels
                    .iter()
                    .enumerate()
                    .filter(|(_, l)| **l == "{characteristic}")
                    .map(|(i, _)| i)
                    .collect();
                let filter = levels
                    .iter()
                    .map(|l| if *l == "{characteristic}" { "+" } else { l })
                    .collect::<Vec<_>>()
                    .join("/");
                if marks.len() > 1 {
                    p.push(loc.problem(
                        &format!("{at}.topics[{i}]"),
                        format!("\"{t}\" names {{characteristic}} more than once"),
                    ));
                } else if t.contains("{characteristic}") && marks.is_empty() {
                    p.push(loc.problem(
                        &format!("{at}.topics[{i}]"),
                        format!("\"{t}\": {{characteristic}} must be a whole level"),
                    ));
                } else if let Err(e) = check_filter(&filter) {
                    p.push(loc.problem(&format!("{at}.topics[{i}]"), format!("\"{t}\": {e}")));
                } else {
                    topics.push(TopicFilter {
                        template: t.clone(),
                        filter,
                        characteristic_level: marks.first().copied(),
                    });
                }
            }
        }
        _ => p.push(loc.problem(at, "kind = \"mqtt\" needs topics = [\"...\"]")),
    }
    let qos = s.qos.unwrap_or(1);
    if qos > 1 {
        p.push(loc.problem(
            &format!("{at}.qos"),
            format!("QoS {qos}: use 1 (acknowledged once archived) or 0 (no redelivery)"),
        ));
    }
    let json_keys = [
        ("value_pointer", &s.value_pointer),
        ("time_pointer", &s.time_pointer),
        ("characteristic_pointer", &s.characteristic_pointer),
        ("part_pointer", &s.part_pointer),
        ("inspected_pointer", &s.inspected_pointer),
    ];
    for (name, v) in json_keys {
        if let Some(v) = v
            && !v.is_empty()
            && !v.starts_with('/')
        {
            p.push(loc.problem(
                &format!("{at}.{name}"),
                format!("\"{v}\" is not a JSON pointer; pointers start with / (\"/value\")"),
            ));
        }
    }
    let payload = match s.payload.as_deref().unwrap_or("plain") {
        "plain" => {
            for (name, v) in json_keys {
                if v.is_some() {
                    p.push(loc.problem(
                        &format!("{at}.{name}"),
                        "pointers are for payload = \"json\"",
                    ));
                }
            }
            Payload::Plain
        }
        "json" => Payload::Json {
            value: s.value_pointer.clone().unwrap_or_else(|| "/value".into()),
            time: s.time_pointer.clone(),
            characteristic: s.characteristic_pointer.clone(),
            part: s.part_pointer.clone(),
            inspected: s.inspected_pointer.clone(),
        },
        other => {
            p.push(loc.problem(
                &format!("{at}.payload"),
                format!("\"{other}\" is not a payload format; use \"plain\" or \"json\""),
            ));
            Payload::Plain
        }
    };
    if let Some(c) = &s.characteristic
        && !known(c)
    {
        p.push(loc.problem(
            &format!("{at}.characteristic"),
            format!("\"{c}\" is not a configured characteristic"),
        ));
    }
    let from_payload = matches!(
        &payload,
        Payload::Json {
            characteristic: Some(_),
            ..
        }
    );
    if s.characteristic.is_none()
        && !from_payload
        && topics.iter().any(|t| t.characteristic_level.is_none())
    {
        p.push(loc.problem(
            at,
            "say which characteristic a message is for: {characteristic} in every topic, characteristic_pointer, or characteristic",
        ));
    }
    let window = s.redelivery_window.unwrap_or(1000);
    if !(1..=100_000).contains(&window) {
        p.push(loc.problem(
            &format!("{at}.redelivery_window"),
            format!("{window} is out of range; use 1 to 100000"),
        ));
    }
    let duplicates = match s.duplicates.as_deref().unwrap_or("packet-id") {
        "packet-id" => Duplicates::PacketId,
        "content" => {
            if !matches!(
                &payload,
                Payload::Json { time: Some(_), .. } | Payload::Json { part: Some(_), .. }
            ) {
                p.push(loc.problem(
                    &format!("{at}.duplicates"),
                    "duplicates = \"content\" needs payloads that differ from one reading to the next: payload = \"json\" with time_pointer or part_pointer",
                ));
            }
            Duplicates::Content { window }
        }
        other => {
            p.push(loc.problem(
                &format!("{at}.duplicates"),
                format!("\"{other}\" is not a way to recognise redeliveries; use \"packet-id\" or \"content\""),
            ));
            Duplicates::PacketId
        }
    };
    if s.redelivery_window.is_some() && duplicates == Duplicates::PacketId {
        p.push(loc.problem(
            &format!("{at}.redelivery_window"),
            "redelivery_window is for duplicates = \"content\"",
        ));
    }
    let max_payload_bytes = s.max_payload_bytes.unwrap_or(64 * 1024);
    if !(16..=MAX_PACKET).contains(&max_payload_bytes) {
        p.push(loc.problem(
            &format!("{at}.max_payload_bytes"),
            format!(
                "{max_payload_bytes} is out of range; use 16 to {} (the largest MQTT packet)",
                MAX_PACKET
            ),
        ));
    }
    let skew = s.max_clock_skew_s.unwrap_or(86_400);
    if !(1..=10 * 365 * 86_400).contains(&skew) {
        p.push(loc.problem(
            &format!("{at}.max_clock_skew_s"),
            format!("{skew} is out of range; use 1 to 315360000 (ten years)"),
        ));
    }
    Some(MqttSource {
        id: s.id.clone(),
        broker: broker?,
        topics,
        qos,
        payload,
        characteristic: s.characteristic.clone(),
        duplicates,
        max_payload_bytes,
        max_clock_skew_ms: skew.min(10 * 365 * 86_400) as i64 * 1000,
    })
}

/// Validates every `[[source]]`; each problem goes to `p` with its path.
pub(super) fn build_sources(
    raw: &RawConfig,
    resolve: &impl Fn(&str) -> PathBuf,
    loc: &Locator,
    p: &mut Vec<Problem>,
) -> Vec<Source> {
    let mut source_ids = HashSet::new();
    let mut sources = Vec::new();
    for (i, s) in raw.source.iter().enumerate() {
        let at = format!("source[{i}]");
        if !valid_id(&s.id) {
            p.push(loc.problem(
                &format!("{at}.id"),
                format!("\"{}\" is not a valid identifier", s.id),
            ));
        } else if !source_ids.insert(s.id.clone()) {
            p.push(loc.problem(
                &format!("{at}.id"),
                format!("source \"{}\" is configured twice", s.id),
            ));
        }
        match s.kind.as_str() {
            "replay" => {
                let speed = s.speed.unwrap_or(1.0);
                if !(speed >= 0.0 && speed.is_finite()) {
                    p.push(loc.problem(
                        &format!("{at}.speed"),
                        format!(
                            "{speed} is not a speed factor; use 0 (as fast as possible) or more"
                        ),
                    ));
                }
                match &s.file {
                    Some(f) => {
                        let file = resolve(f);
                        if !file.is_file() {
                            p.push(loc.problem(
                                &format!("{at}.file"),
                                format!("{} does not exist or is not a file", file.display()),
                            ));
                        }
                        sources.push(Source::Replay {
                            id: s.id.clone(),
                            file,
                            speed,
                        });
                    }
                    None => p.push(loc.problem(&at, "kind = \"replay\" needs file")),
                }
            }
            "folder" => {
                let Some(dir) = &s.path else {
                    p.push(loc.problem(&at, "kind = \"folder\" needs path"));
                    continue;
                };
                let path = resolve(dir);
                if !path.is_dir() {
                    p.push(loc.problem(
                        &format!("{at}.path"),
                        format!("{} is not a directory", path.display()),
                    ));
                }
                let known = |c: &str| raw.characteristic.iter().any(|k| k.id == c);
                let rows = match s.rows.as_deref() {
                    Some("per-part") => match &s.columns {
                        Some(cols) if !cols.is_empty() => {
                            for (col, c) in cols {
                                if !known(c) {
                                    p.push(loc.problem(
                                        &format!("{at}.columns.{col}"),
                                        format!("column \"{col}\" maps to \"{c}\", which is not a configured characteristic"),
                                    ));
                                }
                            }
                            Some(ReportRows::PerPart {
                                columns: cols.iter().map(|(a, b)| (a.clone(), b.clone())).collect(),
                            })
                        }
                        _ => {
                            p.push(loc.problem(&at, "rows = \"per-part\" needs columns = { \"report column\" = \"characteristic\", ... }"));
                            None
                        }
                    },
                    Some("per-reading") => match (&s.characteristic_column, &s.value_column) {
                        (Some(c), Some(v)) => Some(ReportRows::PerReading {
                            characteristic_column: c.clone(),
                            value_column: v.clone(),
                        }),
                        _ => {
                            p.push(loc.problem(&at, "rows = \"per-reading\" needs characteristic_column and value_column"));
                            None
                        }
                    },
                    other => {
                        p.push(loc.problem(
                            &format!("{at}.rows"),
                            format!(
                                "{} is not a report layout; use \"per-part\" or \"per-reading\"",
                                other.map_or("nothing".to_string(), |o| format!("\"{o}\""))
                            ),
                        ));
                        None
                    }
                };
                if let Some(rows) = rows {
                    sources.push(Source::Folder {
                        id: s.id.clone(),
                        path,
                        rows,
                        part_column: s.part_column.clone(),
                        settle_ms: s.settle_ms.unwrap_or(1000),
                    });
                }
            }
            "serial" => {
                let known = |c: &str| raw.characteristic.iter().any(|k| k.id == c);
                let Some(port) = &s.port else {
                    p.push(loc.problem(&at, "kind = \"serial\" needs port"));
                    continue;
                };
                let pattern = s.pattern.clone().unwrap_or_else(|| {
                    r"^\s*(?P<value>[-+]?\d+(?:\.\d+)?)\s*(?P<unit>mm|in)?\s*$".to_string()
                });
                match regex::Regex::new(&pattern) {
                    Ok(re) if re.capture_names().flatten().any(|n| n == "value") => {}
                    Ok(_) => p.push(loc.problem(
                        &format!("{at}.pattern"),
                        "the pattern needs a named group (?P<value>...)",
                    )),
                    Err(e) => p.push(loc.problem(
                        &format!("{at}.pattern"),
                        format!("not a regular expression: {e}"),
                    )),
                }
                let channels: Vec<(String, String)> =
                    s.channels.clone().unwrap_or_default().into_iter().collect();
                match (&s.characteristic, channels.is_empty()) {
                    (Some(c), true) if !known(c) => p.push(loc.problem(
                        &format!("{at}.characteristic"),
                        format!("\"{c}\" is not a configured characteristic"),
                    )),
                    (None, true) => p.push(loc.problem(
                        &at,
                        "kind = \"serial\" needs characteristic, or channels for a multiplexer",
                    )),
                    (Some(_), false) => p.push(loc.problem(
                        &format!("{at}.characteristic"),
                        "give characteristic or channels, not both",
                    )),
                    _ => {}
                }
                for (ch, c) in &channels {
                    if !known(c) {
                        p.push(loc.problem(
                            &format!("{at}.channels.{ch}"),
                            format!("\"{c}\" is not a configured characteristic"),
                        ));
                    }
                }
                let parity = s.parity.clone().unwrap_or_else(|| "none".into());
                if !["none", "even", "odd"].contains(&parity.as_str()) {
                    p.push(loc.problem(
                        &format!("{at}.parity"),
                        format!("\"{parity}\" is not a parity; use none, even or odd"),
                    ));
                }
                let flow = s.flow_control.clone().unwrap_or_else(|| "none".into());
                if !["none", "software", "hardware"].contains(&flow.as_str()) {
                    p.push(loc.problem(
                        &format!("{at}.flow_control"),
                        format!("\"{flow}\" is not a flow control; use none, software or hardware"),
                    ));
                }
                let data_bits = s.data_bits.unwrap_or(8);
                if !(5..=8).contains(&data_bits) {
                    p.push(loc.problem(
                        &format!("{at}.data_bits"),
                        format!("{data_bits} data bits; use 5 to 8"),
                    ));
                }
                let stop_bits = s.stop_bits.unwrap_or(1);
                if !(1..=2).contains(&stop_bits) {
                    p.push(loc.problem(
                        &format!("{at}.stop_bits"),
                        format!("{stop_bits} stop bits; use 1 or 2"),
                    ));
                }
                if let Some(u) = &s.gauge_unit
                    && u != "mm"
                    && u != "in"
                {
                    p.push(loc.problem(
                        &format!("{at}.gauge_unit"),
                        format!("\"{u}\" is not a gauge unit; use mm or in"),
                    ));
                }
                let terminator = s.terminator.clone().unwrap_or_else(|| "\r\n".into());
                if terminator.is_empty() {
                    p.push(loc.problem(&format!("{at}.terminator"), "the terminator must not be empty"));
                }
                sources.push(Source::Serial(Box::new(SerialGauge {
                    id: s.id.clone(),
                    // A relative device path is the config file's, like every path in it.
                    port: resolve(port).display().to_string(),
                    baud: s.baud.unwrap_or(9600),
                    data_bits,
                    parity,
                    stop_bits,
                    flow_control: flow,
                    terminator,
                    pattern,
                    characteristic: s.characteristic.clone(),
                    channels,
                    request: s.request.clone(),
                    request_interval_ms: s.request_interval_ms.unwrap_or(1000),
                    gauge_unit: s.gauge_unit.clone(),
                    units: raw
                        .characteristic
                        .iter()
                        .filter_map(|c| c.unit.clone().map(|u| (c.id.clone(), u)))
                        .collect(),
                })));
            }
            "mqtt" => {
                if let Some(m) = build_mqtt(raw, s, &at, &resolve, loc, p) {
                    sources.push(Source::Mqtt(Box::new(m)));
                }
            }
            other => p.push(loc.problem(
                &format!("{at}.kind"),
                format!(
                    "\"{other}\" is not a source kind this build has; the kinds are: replay, folder, serial, mqtt"
                ),
            )),
        }
    }
    sources
}
