//! The alert side of the config: `[alerts]` (what each severity does), `[[output]]` (where
//! alerts go: MQTT, email, a stack light, the log) and `[control]` (the local socket for
//! `linewarden status` and `linewarden ack`).

use std::collections::BTreeMap;
use std::path::PathBuf;

use serde::{Deserialize, Serialize};

use super::sources::{Broker, Secret, build_broker, host_port, read_password};
use crate::alerts::{Policies, Policy};
use crate::diag::{Locator, Problem};
use crate::limits_file::valid_id;
use crate::rules::Severity;

/// `[alerts]`.
#[derive(Debug, Clone, PartialEq, Deserialize, Serialize, Default)]
#[serde(deny_unknown_fields)]
pub struct RawAlerts {
    pub stop: Option<RawPolicy>,
    pub warn: Option<RawPolicy>,
    pub notice: Option<RawPolicy>,
    /// Outputs that receive only escalations (alerts left unacknowledged too long).
    pub escalate_to: Option<Vec<String>>,
}

/// `[alerts.stop]` and the like.
#[derive(Debug, Clone, PartialEq, Deserialize, Serialize)]
#[serde(deny_unknown_fields)]
pub struct RawPolicy {
    /// The alert stays until someone acknowledges it (and the condition is gone).
    pub acknowledge: Option<bool>,
    /// "15 min", "2h"; or "never".
    pub escalate_after: Option<String>,
}

/// `[control]`.
#[derive(Debug, Clone, PartialEq, Deserialize, Serialize)]
#[serde(deny_unknown_fields)]
pub struct RawControl {
    pub socket: String,
    /// Octal permissions, "0660" by default.
    pub mode: Option<String>,
    /// The group that may use the socket (besides the daemon's own user).
    pub group: Option<String>,
}

/// `[[output]]`.
#[derive(Debug, Clone, PartialEq, Deserialize, Serialize)]
#[serde(deny_unknown_fields)]
pub struct RawOutput {
    pub id: String,
    /// "mqtt", "email", "stack-light" or "log".
    pub kind: String,
    /// The least severity this output hears of ("notice", "warn", "stop").
    pub min_severity: Option<String>,
    /// mqtt: as for an MQTT source.
    pub broker: Option<String>,
    pub client_id: Option<String>,
    /// mqtt: the root of linewarden's topics (default "linewarden").
    pub topic_prefix: Option<String>,
    /// mqtt, email: credentials (the password from a file or the environment).
    pub username: Option<String>,
    pub password_file: Option<String>,
    pub password_env: Option<String>,
    pub ca_file: Option<String>,
    pub client_cert_file: Option<String>,
    pub client_key_file: Option<String>,
    pub keep_alive_s: Option<u64>,
    /// email: `smtp://host:587` (STARTTLS required), `smtps://host:465` (TLS from the first
    /// byte), or `smtp+plain://host:25` (no encryption: a closed cell network only).
    pub smtp: Option<String>,
    pub from: Option<String>,
    pub to: Option<Vec<String>>,
    /// email: at most this many emails an hour (default 12); alerts beyond wait for the next
    /// digest.
    pub max_per_hour: Option<u32>,
    /// email: alerts raised within this many seconds of each other go out in one email
    /// (default 30).
    pub digest_s: Option<u64>,
    /// stack-light: `tcp://host:502` (Modbus TCP), or `rtu` with `port` (Modbus RTU).
    pub modbus: Option<String>,
    pub port: Option<String>,
    pub baud: Option<u32>,
    pub parity: Option<String>,
    pub stop_bits: Option<u8>,
    /// stack-light: the Modbus unit (slave) id, 1 by default.
    pub unit_id: Option<u8>,
    /// stack-light: lamp name → coil address (0-based), e.g. { red = 0, yellow = 1, green = 2,
    /// buzzer = 3 }.
    pub coils: Option<BTreeMap<String, u16>>,
    /// stack-light: light state ("alarm", "attention", "normal", "off") → lamps that are on.
    pub lamps: Option<BTreeMap<String, Vec<String>>>,
    /// stack-light: how often the coils are written again (default 1000 ms).
    pub refresh_ms: Option<u64>,
}

/// What each severity does and who hears of escalations.
#[derive(Debug, Clone, PartialEq, Default)]
pub struct AlertsConfig {
    pub policies: Policies,
    pub escalate_to: Vec<String>,
}

/// The local control socket.
#[derive(Debug, Clone, PartialEq)]
pub struct Control {
    pub socket: PathBuf,
    pub mode: u32,
    pub group: Option<String>,
}

/// How an email output reaches its server.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum SmtpSecurity {
    StartTls,
    Tls,
    Plain,
}

#[derive(Debug, Clone, PartialEq)]
pub struct EmailOutput {
    pub host: String,
    pub port: u16,
    pub security: SmtpSecurity,
    pub from: String,
    pub to: Vec<String>,
    pub username: Option<String>,
    pub password: Option<Secret>,
    pub ca_file: Option<PathBuf>,
    pub max_per_hour: u32,
    pub digest_ms: u64,
}

/// How a stack light is reached.
#[derive(Debug, Clone, PartialEq)]
pub enum ModbusLink {
    Tcp {
        host: String,
        port: u16,
    },
    Rtu {
        port: String,
        baud: u32,
        parity: String,
        stop_bits: u8,
    },
}

/// The light's states, worst first.
pub const LIGHT_STATES: [&str; 4] = ["alarm", "attention", "normal", "off"];

#[derive(Debug, Clone, PartialEq)]
pub struct StackLight {
    pub link: ModbusLink,
    pub unit_id: u8,
    /// Lamp name → coil address.
    pub coils: Vec<(String, u16)>,
    /// Light state → lamps on (every other lamp is off).
    pub lamps: BTreeMap<String, Vec<String>>,
    pub refresh_ms: u64,
}

#[derive(Debug, Clone, PartialEq)]
pub enum OutputKind {
    Mqtt { broker: Broker, prefix: String },
    Email(Box<EmailOutput>),
    StackLight(Box<StackLight>),
    Log,
}

/// A validated output.
#[derive(Debug, Clone, PartialEq)]
pub struct Output {
    pub id: String,
    pub min_severity: Severity,
    /// Listed in `alerts.escalate_to`: hears only of escalations.
    pub escalation: bool,
    pub kind: OutputKind,
}

impl Output {
    /// `kind id`, for log lines.
    pub fn describe(&self) -> String {
        match &self.kind {
            OutputKind::Mqtt { broker, prefix } => {
                format!("MQTT {} under {prefix}/", broker.url())
            }
            OutputKind::Email(e) => {
                format!("email to {} via {}:{}", e.to.join(", "), e.host, e.port)
            }
            OutputKind::StackLight(s) => match &s.link {
                ModbusLink::Tcp { host, port } => {
                    format!("stack light, Modbus TCP {host}:{port} unit {}", s.unit_id)
                }
                ModbusLink::Rtu { port, baud, .. } => format!(
                    "stack light, Modbus RTU {port} at {baud} baud unit {}",
                    s.unit_id
                ),
            },
            OutputKind::Log => "the log".into(),
        }
    }
}

fn severity(s: &str) -> Option<Severity> {
    match s {
        "notice" => Some(Severity::Notice),
        "warn" => Some(Severity::Warn),
        "stop" => Some(Severity::Stop),
        _ => None,
    }
}

pub(super) fn build_alerts(
    raw: &RawAlerts,
    outputs: &[RawOutput],
    loc: &Locator,
    p: &mut Vec<Problem>,
) -> AlertsConfig {
    let mut policies = Policies::default();
    for (name, r, slot) in [
        ("stop", &raw.stop, &mut policies.stop),
        ("warn", &raw.warn, &mut policies.warn),
        ("notice", &raw.notice, &mut policies.notice),
    ] {
        let Some(r) = r else { continue };
        let mut pol: Policy = *slot;
        if let Some(a) = r.acknowledge {
            pol.acknowledge = a;
        }
        if let Some(e) = &r.escalate_after {
            if e.trim() == "never" {
                pol.escalate_after_ms = None;
            } else {
                match humantime::parse_duration(e) {
                    Ok(d) if d.as_secs() >= 10 => {
                        pol.escalate_after_ms = Some(d.as_millis() as i64)
                    }
                    Ok(_) => p.push(loc.problem(
                        &format!("alerts.{name}.escalate_after"),
                        format!("\"{e}\" is too soon to escalate; use 10 s or more, or \"never\""),
                    )),
                    Err(_) => p.push(loc.problem(
                        &format!("alerts.{name}.escalate_after"),
                        format!(
                            "\"{e}\" is not a duration; write it as \"15 min\", \"2h\" or \"never\""
                        ),
                    )),
                }
            }
        }
        *slot = pol;
    }
    let escalate_to = raw.escalate_to.clone().unwrap_or_default();
    for (i, id) in escalate_to.iter().enumerate() {
        if !outputs.iter().any(|o| &o.id == id) {
            p.push(loc.problem(
                &format!("alerts.escalate_to[{i}]"),
                format!("\"{id}\" is not a configured output"),
            ));
        }
    }
    AlertsConfig {
        policies,
        escalate_to,
    }
}

pub(super) fn build_control(
    raw: &Option<RawControl>,
    resolve: &impl Fn(&str) -> PathBuf,
    loc: &Locator,
    p: &mut Vec<Problem>,
) -> Option<Control> {
    let c = raw.as_ref()?;
    if c.socket.trim().is_empty() {
        p.push(loc.problem("control.socket", "the socket path must be named"));
    }
    let mode_text = c.mode.clone().unwrap_or_else(|| "0660".into());
    let mode = match u32::from_str_radix(mode_text.trim_start_matches("0o"), 8) {
        Ok(m) if m <= 0o777 && m & 0o007 == 0 => m,
        Ok(m) if m <= 0o777 => {
            p.push(loc.problem(
                "control.mode",
                format!("\"{mode_text}\" lets every user on the machine acknowledge alerts; give others no access (0660, 0600)"),
            ));
            m
        }
        _ => {
            p.push(loc.problem(
                "control.mode",
                format!("\"{mode_text}\" is not octal permissions such as \"0660\""),
            ));
            0o660
        }
    };
    Some(Control {
        socket: resolve(&c.socket),
        mode,
        group: c.group.clone(),
    })
}

pub(super) fn build_outputs(
    raw: &[RawOutput],
    alerts: &AlertsConfig,
    resolve: &impl Fn(&str) -> PathBuf,
    loc: &Locator,
    p: &mut Vec<Problem>,
) -> Vec<Output> {
    let mut ids = std::collections::HashSet::new();
    let mut out = Vec::new();
    for (i, o) in raw.iter().enumerate() {
        let at = format!("output[{i}]");
        if !valid_id(&o.id) {
            p.push(loc.problem(
                &format!("{at}.id"),
                format!("\"{}\" is not a valid identifier", o.id),
            ));
        } else if !ids.insert(o.id.clone()) {
            p.push(loc.problem(
                &format!("{at}.id"),
                format!("output \"{}\" is configured twice", o.id),
            ));
        }
        let min_severity = match o.min_severity.as_deref() {
            None => Severity::Notice,
            Some(s) => severity(s).unwrap_or_else(|| {
                p.push(loc.problem(
                    &format!("{at}.min_severity"),
                    format!("\"{s}\" is not a severity; use notice, warn or stop"),
                ));
                Severity::Notice
            }),
        };
        let mut unused = |name: &str, given: bool| {
            if given {
                p.push(loc.problem(
                    &format!("{at}.{name}"),
                    format!("{name} is not a setting of kind = \"{}\"", o.kind),
                ));
            }
        };
        let kind = match o.kind.as_str() {
            "mqtt" => {
                for (n, g) in [
                    ("smtp", o.smtp.is_some()),
                    ("modbus", o.modbus.is_some()),
                    ("coils", o.coils.is_some()),
                ] {
                    unused(n, g);
                }
                let prefix = o
                    .topic_prefix
                    .clone()
                    .unwrap_or_else(|| "linewarden".into());
                if prefix.is_empty()
                    || prefix.contains(['+', '#'])
                    || prefix.starts_with('/')
                    || prefix.ends_with('/')
                {
                    p.push(loc.problem(
                        &format!("{at}.topic_prefix"),
                        format!("\"{prefix}\" is not a topic prefix; use levels without wildcards, e.g. \"plant1/cell4/linewarden\""),
                    ));
                }
                build_broker(
                    o.broker.as_deref(),
                    o.client_id.as_deref(),
                    &format!("linewarden-{}", o.id),
                    (
                        o.username.as_ref(),
                        o.password_file.as_ref(),
                        o.password_env.as_ref(),
                    ),
                    (
                        o.ca_file.as_ref(),
                        o.client_cert_file.as_ref(),
                        o.client_key_file.as_ref(),
                    ),
                    o.keep_alive_s,
                    &at,
                    resolve,
                    loc,
                    p,
                )
                .map(|broker| OutputKind::Mqtt { broker, prefix })
            }
            "email" => {
                for (n, g) in [
                    ("broker", o.broker.is_some()),
                    ("modbus", o.modbus.is_some()),
                    ("coils", o.coils.is_some()),
                ] {
                    unused(n, g);
                }
                build_email(o, &at, resolve, loc, p).map(|e| OutputKind::Email(Box::new(e)))
            }
            "stack-light" => {
                for (n, g) in [("broker", o.broker.is_some()), ("smtp", o.smtp.is_some())] {
                    unused(n, g);
                }
                build_light(o, &at, resolve, loc, p).map(|s| OutputKind::StackLight(Box::new(s)))
            }
            "log" => Some(OutputKind::Log),
            other => {
                p.push(loc.problem(
                    &format!("{at}.kind"),
                    format!("\"{other}\" is not an output kind; the kinds are: mqtt, email, stack-light, log"),
                ));
                None
            }
        };
        if let Some(kind) = kind {
            let escalation = alerts.escalate_to.contains(&o.id);
            if escalation && matches!(kind, OutputKind::StackLight(_)) {
                p.push(loc.problem(
                    &format!("{at}.id"),
                    "a stack light shows the cell's state; it cannot be an escalation output",
                ));
            }
            out.push(Output {
                id: o.id.clone(),
                min_severity,
                escalation,
                kind,
            });
        }
    }
    out
}

fn build_email(
    o: &RawOutput,
    at: &str,
    resolve: &impl Fn(&str) -> PathBuf,
    loc: &Locator,
    p: &mut Vec<Problem>,
) -> Option<EmailOutput> {
    let Some(url) = &o.smtp else {
        p.push(loc.problem(at, "kind = \"email\" needs smtp = \"smtp://host:587\""));
        return None;
    };
    let (security, rest, default_port) = if let Some(r) = url.strip_prefix("smtps://") {
        (SmtpSecurity::Tls, r, 465)
    } else if let Some(r) = url.strip_prefix("smtp+plain://") {
        (SmtpSecurity::Plain, r, 25)
    } else if let Some(r) = url.strip_prefix("smtp://") {
        (SmtpSecurity::StartTls, r, 587)
    } else {
        p.push(loc.problem(
            &format!("{at}.smtp"),
            format!("\"{url}\" is not a mail server address; write smtp://host:587 (STARTTLS), smtps://host:465 or smtp+plain://host:25"),
        ));
        return None;
    };
    let (host, port) = host_port(rest, default_port, url, &format!("{at}.smtp"), loc, p)?;
    let mailbox = |s: &str| s.parse::<lettre::message::Mailbox>().is_ok();
    let from = o.from.clone().unwrap_or_default();
    if !mailbox(&from) {
        p.push(loc.problem(
            &format!("{at}.from"),
            format!("\"{from}\" is not an email address (write \"linewarden cell 4 <linewarden@plant.example>\")"),
        ));
    }
    let to = o.to.clone().unwrap_or_default();
    if to.is_empty() {
        p.push(loc.problem(
            at,
            "kind = \"email\" needs to = [\"someone@plant.example\"]",
        ));
    }
    for (i, t) in to.iter().enumerate() {
        if !mailbox(t) {
            p.push(loc.problem(
                &format!("{at}.to[{i}]"),
                format!("\"{t}\" is not an email address"),
            ));
        }
    }
    let password = read_password(
        o.password_file.as_ref(),
        o.password_env.as_ref(),
        at,
        resolve,
        loc,
        p,
    );
    if password.is_some() && o.username.is_none() {
        p.push(loc.problem(at, "a password needs a username"));
    }
    if password.is_some() && security == SmtpSecurity::Plain {
        p.push(loc.problem(
            &format!("{at}.smtp"),
            "a password would cross the network in clear; use smtp:// (STARTTLS) or smtps://",
        ));
    }
    let ca_file = o.ca_file.as_ref().map(|f| {
        let f = resolve(f);
        if !f.is_file() {
            p.push(loc.problem(
                &format!("{at}.ca_file"),
                format!("{} does not exist or is not a file", f.display()),
            ));
        }
        f
    });
    let max_per_hour = o.max_per_hour.unwrap_or(12);
    if !(1..=3600).contains(&max_per_hour) {
        p.push(loc.problem(
            &format!("{at}.max_per_hour"),
            format!("{max_per_hour} is out of range; use 1 to 3600"),
        ));
    }
    let digest_s = o.digest_s.unwrap_or(30);
    if digest_s > 3600 {
        p.push(loc.problem(
            &format!("{at}.digest_s"),
            format!("{digest_s} s would hold alerts back too long; use 0 to 3600"),
        ));
    }
    Some(EmailOutput {
        host,
        port,
        security,
        from,
        to,
        username: o.username.clone(),
        password,
        ca_file,
        max_per_hour,
        digest_ms: digest_s * 1000,
    })
}

fn build_light(
    o: &RawOutput,
    at: &str,
    resolve: &impl Fn(&str) -> PathBuf,
    loc: &Locator,
    p: &mut Vec<Problem>,
) -> Option<StackLight> {
    let link = match (o.modbus.as_deref(), &o.port) {
        (Some("rtu"), Some(port)) => {
            let parity = o.parity.clone().unwrap_or_else(|| "even".into());
            if !["none", "even", "odd"].contains(&parity.as_str()) {
                p.push(loc.problem(
                    &format!("{at}.parity"),
                    format!("\"{parity}\" is not a parity; use none, even or odd"),
                ));
            }
            let stop_bits = o.stop_bits.unwrap_or(1);
            if !(1..=2).contains(&stop_bits) {
                p.push(loc.problem(
                    &format!("{at}.stop_bits"),
                    format!("{stop_bits} stop bits; use 1 or 2"),
                ));
            }
            ModbusLink::Rtu {
                // A relative device path is the config file's, like every path in it.
                port: resolve(port).display().to_string(),
                baud: o.baud.unwrap_or(19200),
                parity,
                stop_bits,
            }
        }
        (Some("rtu"), None) => {
            p.push(loc.problem(at, "modbus = \"rtu\" needs port = \"/dev/ttyUSB0\""));
            return None;
        }
        (Some(url), _) => {
            let Some(rest) = url.strip_prefix("tcp://") else {
                p.push(loc.problem(
                    &format!("{at}.modbus"),
                    format!(
                        "\"{url}\" is not a Modbus link; write tcp://host:502 or \"rtu\" with port"
                    ),
                ));
                return None;
            };
            let (host, port) = host_port(rest, 502, url, &format!("{at}.modbus"), loc, p)?;
            if o.port.is_some() {
                p.push(loc.problem(
                    &format!("{at}.port"),
                    "port is the serial device of modbus = \"rtu\"",
                ));
            }
            ModbusLink::Tcp { host, port }
        }
        (None, _) => {
            p.push(loc.problem(at, "kind = \"stack-light\" needs modbus = \"tcp://host:502\" or modbus = \"rtu\" with port"));
            return None;
        }
    };
    let unit_id = o.unit_id.unwrap_or(1);
    if unit_id == 0 || unit_id > 247 {
        p.push(loc.problem(
            &format!("{at}.unit_id"),
            format!("{unit_id} is not a Modbus unit id; use 1 to 247"),
        ));
    }
    let coils: Vec<(String, u16)> = match &o.coils {
        Some(c) if !c.is_empty() => c.iter().map(|(k, v)| (k.clone(), *v)).collect(),
        _ => {
            p.push(loc.problem(at, "kind = \"stack-light\" needs coils = { red = 0, yellow = 1, green = 2, buzzer = 3 }"));
            Vec::new()
        }
    };
    let mut seen = std::collections::HashMap::new();
    for (lamp, addr) in &coils {
        if let Some(other) = seen.insert(*addr, lamp.clone()) {
            p.push(loc.problem(
                &format!("{at}.coils.{lamp}"),
                format!("coil {addr} is also {other}"),
            ));
        }
    }
    // IEC 60073 colour meanings: red for a condition that needs action now, yellow for an
    // abnormal condition, green for normal.
    let mut lamps: BTreeMap<String, Vec<String>> = BTreeMap::new();
    let has = |l: &str| coils.iter().any(|(n, _)| n == l);
    let defaults: [(&str, &[&str]); 4] = [
        ("alarm", &["red", "buzzer"]),
        ("attention", &["yellow"]),
        ("normal", &["green"]),
        ("off", &[]),
    ];
    for (state, on) in defaults {
        lamps.insert(
            state.to_string(),
            on.iter()
                .filter(|l| has(l))
                .map(|l| l.to_string())
                .collect(),
        );
    }
    if let Some(given) = &o.lamps {
        for (state, on) in given {
            if !LIGHT_STATES.contains(&state.as_str()) {
                p.push(loc.problem(
                    &format!("{at}.lamps.{state}"),
                    format!("\"{state}\" is not a light state; the states are: alarm, attention, normal, off"),
                ));
                continue;
            }
            for l in on {
                if !has(l) {
                    p.push(loc.problem(
                        &format!("{at}.lamps.{state}"),
                        format!("\"{l}\" is not one of the coils"),
                    ));
                }
            }
            lamps.insert(state.clone(), on.clone());
        }
    } else if !(coils.is_empty() || has("red") && has("green")) {
        p.push(loc.problem(
            &format!("{at}.coils"),
            "without lamps = { ... }, the coils must include red and green (yellow and buzzer if present)",
        ));
    }
    let refresh_ms = o.refresh_ms.unwrap_or(1000);
    if !(100..=10_000).contains(&refresh_ms) {
        p.push(loc.problem(
            &format!("{at}.refresh_ms"),
            format!("{refresh_ms} ms is out of range; use 100 to 10000"),
        ));
    }
    Some(StackLight {
        link,
        unit_id,
        coils,
        lamps,
        refresh_ms,
    })
}
