//! The daemon's configuration: one TOML file naming the archive, the characteristics of a cell
//! (with their subgroups, specification, rules and stored limits) and the sources that feed
//! them.
//!
//! Parse, then validate, then build: [`load`] collects *every* problem before it reports, each
//! with its TOML path and line:column, and opens no ports and touches no devices (it reads the
//! limits files the config names, nothing else), so `linewarden check` works on a laptop.

use std::collections::HashSet;
use std::path::{Path, PathBuf};

use serde::{Deserialize, Serialize};

pub mod outputs;
pub use outputs::{
    AlertsConfig, Control, EmailOutput, ModbusLink, Output, OutputKind, RawAlerts, RawControl,
    RawOutput, SmtpSecurity, StackLight,
};

use crate::diag::{Locator, Problem, Problems};
use crate::limits_file::{StoredLimits, valid_id};
use crate::rules::{RuleSet, RulesConfig};
use crate::stats::capability::Spec;
use crate::stats::variables::VariablesChart;

/// The file as written.
#[derive(Debug, Clone, PartialEq, Deserialize, Serialize)]
#[serde(deny_unknown_fields)]
pub struct RawConfig {
    pub daemon: RawDaemon,
    #[serde(default)]
    pub characteristic: Vec<RawCharacteristic>,
    #[serde(default)]
    pub source: Vec<RawSource>,
    #[serde(default)]
    pub alerts: RawAlerts,
    #[serde(default)]
    pub output: Vec<RawOutput>,
    pub control: Option<RawControl>,
}

/// `[daemon]`.
#[derive(Debug, Clone, PartialEq, Deserialize, Serialize)]
#[serde(deny_unknown_fields)]
pub struct RawDaemon {
    /// The archive directory (relative paths are relative to the config file).
    pub archive_dir: String,
    /// Where the daemon writes the limits it learns, one file per characteristic
    /// (`<id>.toml`); relative paths are relative to the config file. When not given, learned
    /// limits are written at the characteristic's `limits` path.
    pub learned_limits_dir: Option<String>,
    #[serde(default = "default_flush_ms")]
    pub flush_interval_ms: u64,
    #[serde(default = "default_segment_mb")]
    pub max_segment_mb: u64,
    /// The plant's time zone for times people read (an IANA name such as "Europe/Berlin");
    /// the system's when not given. The archive stays in UTC.
    pub timezone: Option<String>,
}

fn default_flush_ms() -> u64 {
    10
}

fn default_segment_mb() -> u64 {
    64
}

/// What to do with a subgroup that is still incomplete when its maximum wait runs out.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Deserialize, Serialize, Default)]
#[serde(rename_all = "kebab-case")]
pub enum OnTimeout {
    /// Evaluate it with the readings it has (recorded as partial).
    #[default]
    Evaluate,
    /// Discard it (recorded as discarded).
    Discard,
}

/// `[characteristic.subgroup]`: how readings are grouped. Exactly one of `size`, `window_s`
/// and `by_part`.
#[derive(Debug, Clone, PartialEq, Deserialize, Serialize, Default)]
#[serde(deny_unknown_fields)]
pub struct RawSubgroup {
    /// n consecutive readings (1 for individuals).
    pub size: Option<usize>,
    /// All readings within a window of this many seconds.
    pub window_s: Option<f64>,
    /// Readings of the same part or sample id, `by_part_size` of them.
    #[serde(default)]
    pub by_part: bool,
    pub by_part_size: Option<usize>,
    /// After this long, an incomplete subgroup is evaluated or discarded.
    pub max_wait_s: Option<f64>,
    pub on_timeout: Option<OnTimeout>,
}

/// `[characteristic.learning]`: how limits are learned when none are stored.
#[derive(Debug, Clone, PartialEq, Deserialize, Serialize)]
#[serde(deny_unknown_fields)]
pub struct RawLearning {
    #[serde(default = "default_baseline")]
    pub subgroups: usize,
    /// The chart the learned limits are for; by default from the subgroup size.
    pub chart: Option<VariablesChart>,
    /// The highest severity an alert on learned limits has until an engineer approves them.
    #[serde(default = "default_provisional_severity")]
    pub provisional_severity: crate::rules::Severity,
}

impl Default for RawLearning {
    fn default() -> Self {
        RawLearning {
            subgroups: default_baseline(),
            chart: None,
            provisional_severity: default_provisional_severity(),
        }
    }
}

fn default_provisional_severity() -> crate::rules::Severity {
    crate::rules::Severity::Warn
}

fn default_baseline() -> usize {
    25
}

/// `[[characteristic]]`.
#[derive(Debug, Clone, PartialEq, Deserialize, Serialize)]
#[serde(deny_unknown_fields)]
pub struct RawCharacteristic {
    pub id: String,
    pub name: Option<String>,
    pub unit: Option<String>,
    /// The stored limits file (relative to the config file). Without one, the characteristic
    /// learns its limits.
    pub limits: Option<String>,
    /// "from-sigma" (default): the stored limits must be what their sigma gives; "as-stored":
    /// take them as written (limits widened on purpose), with `limits_reason`.
    pub limits_policy: Option<String>,
    pub limits_reason: Option<String>,
    /// Readings outside this range cannot be real and are rejected.
    pub valid_min: Option<f64>,
    pub valid_max: Option<f64>,
    #[serde(default)]
    pub subgroup: RawSubgroup,
    pub spec: Option<Spec>,
    #[serde(default)]
    pub rules: RulesConfig,
    #[serde(default)]
    pub learning: RawLearning,
    /// What the technician should check first when an alert is raised.
    pub reaction_plan: Option<String>,
    /// Decimals for every figure of this characteristic people read (alerts, the log, status);
    /// without it, derived from the limits.
    pub decimals: Option<usize>,
}

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

/// How readings form subgroups.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(tag = "by", rename_all = "kebab-case")]
pub enum Grouping {
    Count { size: usize },
    Window { window_ms: i64 },
    Part { size: usize },
}

/// A validated characteristic.
#[derive(Debug, Clone, PartialEq)]
pub struct Characteristic {
    pub id: String,
    pub name: String,
    pub unit: String,
    pub grouping: Grouping,
    pub max_wait_ms: Option<i64>,
    pub on_timeout: OnTimeout,
    pub chart: VariablesChart,
    pub valid: Option<(f64, f64)>,
    pub spec: Option<Spec>,
    pub rules: RuleSet,
    /// The `limits` file as configured (resolved), whether or not it exists.
    pub configured_limits: Option<PathBuf>,
    /// The limits file in use: the configured one when it exists, else where learned limits
    /// are read from and written to.
    pub limits_path: Option<PathBuf>,
    /// Why the limits are taken as stored (`limits_policy = "as-stored"`), when they are.
    pub limits_reason: Option<String>,
    pub limits: Option<StoredLimits>,
    pub baseline_subgroups: usize,
    /// The cap on alert severity while the limits are provisional.
    pub provisional_severity: crate::rules::Severity,
    pub reaction_plan: Option<String>,
    /// Decimals for the figures people read, when the config sets them.
    pub decimals: Option<usize>,
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

/// A validated configuration.
#[derive(Debug, Clone, PartialEq)]
pub struct Config {
    pub path: PathBuf,
    pub archive_dir: PathBuf,
    /// Where learned limits are written (`<id>.toml`), when configured.
    pub learned_limits_dir: Option<PathBuf>,
    pub flush_interval_ms: u64,
    pub max_segment_bytes: u64,
    pub characteristics: Vec<Characteristic>,
    pub sources: Vec<Source>,
    pub alerts: AlertsConfig,
    pub outputs: Vec<Output>,
    pub control: Option<Control>,
    /// The plant's time zone (IANA name); None for the system's.
    pub timezone: Option<String>,
}

impl Config {
    /// The time zone for times people read: the configured one, else the system's.
    pub fn tz(&self) -> jiff::tz::TimeZone {
        self.timezone
            .as_deref()
            .and_then(|n| jiff::tz::TimeZone::get(n).ok())
            .unwrap_or_else(jiff::tz::TimeZone::system)
    }
}

/// Why a configuration could not be loaded.
#[derive(Debug, thiserror::Error)]
pub enum ConfigError {
    #[error("cannot read config file {path}: {source}")]
    Read {
        path: String,
        source: std::io::Error,
    },
    #[error("{0}")]
    Invalid(#[from] Problems),
}

/// Reads, parses and validates the config file at `path`.
pub fn load(path: &Path) -> Result<Config, ConfigError> {
    let text = std::fs::read_to_string(path).map_err(|source| ConfigError::Read {
        path: path.display().to_string(),
        source,
    })?;
    Ok(parse(&text, path)?)
}

/// Parses and validates config `text` that came from `path` (relative paths in it are taken
/// from the file's directory).
pub fn parse(text: &str, path: &Path) -> Result<Config, Problems> {
    let file = path.display().to_string();
    let loc = Locator::new(text);
    let (raw, mut p, removed) = deserialize_all(text, &loc);
    let Some(raw) = raw else {
        return Err(Problems { file, problems: p });
    };
    let base = path.parent().unwrap_or(Path::new("."));
    let mut checked = Vec::new();
    let cfg = build(&raw, base, path, &loc, &mut checked);
    // A key already reported as unknown or of the wrong type was left out to go on checking;
    // what its absence causes is not a second problem.
    // Nor is a complaint about the table it was in (a subgroup table whose only key was
    // misspelt is "unknown field `sise`", not also "say how readings form subgroups").
    let parent = |r: &String| r.rfind('.').map(|i| r[..i].to_string());
    p.extend(checked.into_iter().filter(|q| {
        !removed.iter().any(|r| {
            q.path == *r
                || q.path.starts_with(&format!("{r}."))
                || (!r.ends_with(']')
                    && parent(r).as_deref() == Some(q.path.as_str())
                    && q.path.contains('.'))
        })
    }));
    if p.is_empty() {
        Ok(cfg)
    } else {
        Err(Problems { file, problems: p })
    }
}

/// Reads the raw config, finding every unknown key and every value of the wrong type (not
/// only the first, where deserialization stops): each one is reported at its place, left out,
/// and reading goes on. Returns the raw config when one could be read, the problems, and the
/// paths left out.
fn deserialize_all(text: &str, loc: &Locator) -> (Option<RawConfig>, Vec<Problem>, Vec<String>) {
    let mut value = match text.parse::<toml::Table>() {
        Ok(t) => toml::Value::Table(t),
        Err(e) => return (None, vec![loc.from_toml_error(&e)], Vec::new()),
    };
    let mut problems = Vec::new();
    let mut removed = Vec::new();
    // Every round removes one key; a file has far fewer mistakes than this.
    for _ in 0..200 {
        let err = match serde_path_to_error::deserialize::<_, RawConfig>(value.clone()) {
            Ok(raw) => return (Some(raw), problems, removed),
            Err(e) => e,
        };
        let mut segs: Vec<PathSeg> = err
            .path()
            .iter()
            .filter_map(|s| match s {
                serde_path_to_error::Segment::Map { key } => Some(PathSeg::Key(key.clone())),
                serde_path_to_error::Segment::Seq { index } => Some(PathSeg::Index(*index)),
                _ => None,
            })
            .collect();
        let message = err.inner().message().trim().to_string();
        // "unknown field `sise`, expected …": the path is the table's; the key is in the words.
        if let Some(field) = message
            .strip_prefix("unknown field `")
            .and_then(|r| r.split('`').next())
            && segs.last() != Some(&PathSeg::Key(field.to_string()))
        {
            segs.push(PathSeg::Key(field.to_string()));
        }
        let at = path_text(&segs);
        let missing = message.starts_with("missing field");
        if message.starts_with("unknown field") {
            problems.push(loc.key_problem(&at, message));
        } else {
            problems.push(loc.problem(&at, message));
        }
        if missing || segs.is_empty() || !remove_at(&mut value, &segs) {
            return (None, problems, removed);
        }
        removed.push(at);
    }
    (None, problems, removed)
}

#[derive(Debug, Clone, PartialEq)]
enum PathSeg {
    Key(String),
    Index(usize),
}

fn path_text(segs: &[PathSeg]) -> String {
    let mut s = String::new();
    for seg in segs {
        match seg {
            PathSeg::Key(k) => {
                if !s.is_empty() {
                    s.push('.');
                }
                s.push_str(k);
            }
            PathSeg::Index(i) => s.push_str(&format!("[{i}]")),
        }
    }
    s
}

/// Removes the value at `segs`; false when the path does not lead anywhere.
fn remove_at(v: &mut toml::Value, segs: &[PathSeg]) -> bool {
    let Some((last, parents)) = segs.split_last() else {
        return false;
    };
    let mut cur = v;
    for seg in parents {
        cur = match (seg, cur) {
            (PathSeg::Key(k), toml::Value::Table(t)) => match t.get_mut(k) {
                Some(x) => x,
                None => return false,
            },
            (PathSeg::Index(i), toml::Value::Array(a)) => match a.get_mut(*i) {
                Some(x) => x,
                None => return false,
            },
            _ => return false,
        };
    }
    match (last, cur) {
        (PathSeg::Key(k), toml::Value::Table(t)) => t.remove(k).is_some(),
        // An element of the wrong type: leave an empty table in its place would change the
        // shape; say it and stop instead.
        _ => false,
    }
}

fn build(raw: &RawConfig, base: &Path, path: &Path, loc: &Locator, p: &mut Vec<Problem>) -> Config {
    let resolve = |s: &str| {
        let q = Path::new(s);
        if q.is_absolute() {
            q.to_path_buf()
        } else {
            base.join(q)
        }
    };
    if raw.daemon.archive_dir.trim().is_empty() {
        p.push(loc.problem("daemon.archive_dir", "the archive directory must be named"));
    }
    if raw.daemon.max_segment_mb == 0 || raw.daemon.max_segment_mb > 4096 {
        p.push(loc.problem(
            "daemon.max_segment_mb",
            format!(
                "{} is out of range; use 1 to 4096",
                raw.daemon.max_segment_mb
            ),
        ));
    }
    if raw.daemon.flush_interval_ms > 10_000 {
        p.push(loc.problem(
            "daemon.flush_interval_ms",
            format!(
                "{} ms would leave records unconfirmed too long; use 0 to 10000",
                raw.daemon.flush_interval_ms
            ),
        ));
    }
    let learned_limits_dir = match raw.daemon.learned_limits_dir.as_deref() {
        Some(d) if d.trim().is_empty() => {
            p.push(loc.problem(
                "daemon.learned_limits_dir",
                "an empty directory name; name a directory (for an installed daemon, /var/lib/linewarden/limits) or leave the key out",
            ));
            None
        }
        Some(d) => Some(resolve(d)),
        None => None,
    };
    if raw.characteristic.is_empty() {
        p.push(loc.problem(
            "",
            "no [[characteristic]] is configured: there is nothing to watch",
        ));
    }
    let mut ids = HashSet::new();
    let mut chars = Vec::new();
    for (i, c) in raw.characteristic.iter().enumerate() {
        let at = format!("characteristic[{i}]");
        let who = format!("characteristic \"{}\"", c.id);
        if !valid_id(&c.id) {
            p.push(loc.problem(
                &format!("{at}.id"),
                format!(
                    "\"{}\" is not a valid identifier; use letters, digits, '-', '_' and '.'",
                    c.id
                ),
            ));
        } else if !ids.insert(c.id.clone()) {
            p.push(loc.problem(&format!("{at}.id"), format!("{who} is configured twice")));
        }
        if let Some(ch) = build_characteristic(
            c,
            &at,
            &who,
            &resolve,
            learned_limits_dir.as_deref(),
            loc,
            p,
        ) {
            if let Some(lp) = &ch.limits_path
                && let Some(other) = chars
                    .iter()
                    .find(|o: &&Characteristic| o.limits_path.as_ref() == Some(lp))
            {
                p.push(loc.problem(
                    &format!("{at}.limits"),
                    format!(
                        "{who}: its limits file {} is also characteristic \"{}\"'s; give each its own file name",
                        lp.display(),
                        other.id
                    ),
                ));
            }
            chars.push(ch);
        }
    }
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
    let alerts = outputs::build_alerts(&raw.alerts, &raw.output, loc, p);
    let outputs = outputs::build_outputs(&raw.output, &alerts, &resolve, loc, p);
    let control = outputs::build_control(&raw.control, &resolve, loc, p);
    if let Some(tz) = &raw.daemon.timezone
        && let Err(e) = jiff::tz::TimeZone::get(tz)
    {
        p.push(loc.problem(
            "daemon.timezone",
            format!("\"{tz}\" is not a time zone this machine knows ({e}); use an IANA name such as \"Europe/Berlin\""),
        ));
    }
    Config {
        path: path.to_path_buf(),
        archive_dir: resolve(&raw.daemon.archive_dir),
        learned_limits_dir,
        flush_interval_ms: raw.daemon.flush_interval_ms,
        max_segment_bytes: raw.daemon.max_segment_mb * 1024 * 1024,
        characteristics: chars,
        sources,
        alerts,
        outputs,
        control,
        timezone: raw.daemon.timezone.clone(),
    }
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
    if !(16..=crate::daemon::mqtt::MAX_PACKET).contains(&max_payload_bytes) {
        p.push(loc.problem(
            &format!("{at}.max_payload_bytes"),
            format!(
                "{max_payload_bytes} is out of range; use 16 to {} (the largest MQTT packet)",
                crate::daemon::mqtt::MAX_PACKET
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

/// Where stored limits do not follow from their own sigma (centre ± 3σ/√n, and the
/// dispersion chart's limits from σ) by more than a hundredth of a standard error: what, the
/// value found, the value expected.
fn limits_against_sigma(l: &StoredLimits) -> Vec<(&'static str, f64, f64)> {
    use crate::stats::variables::{dispersion_limits, location_limits};
    let mut out = Vec::new();
    let sigma = l.sigma.within;
    let n = l.subgroup_size;
    // Within a hundredth of a standard error agrees: rounding to the gauge's resolution or to
    // a table's constants passes; limits moved on purpose (3.5σ is half a standard error) do
    // not.
    let tol = 0.01 * sigma / (n.max(1) as f64).sqrt() + 1e-8 * l.location.center.abs();
    let loc = location_limits(l.location.center, sigma, n);
    for (what, found, expected) in [
        ("location.ucl", l.location.ucl, loc.ucl),
        ("location.lcl", l.location.lcl, loc.lcl),
    ] {
        if (found - expected).abs() > tol {
            out.push((what, found, expected));
        }
    }
    if let Ok(d) = dispersion_limits(l.dispersion.kind, sigma, n) {
        for (what, found, expected) in [
            ("dispersion.center", l.dispersion.center, d.center),
            ("dispersion.ucl", l.dispersion.ucl, d.ucl),
            ("dispersion.lcl", l.dispersion.lcl, d.lcl),
        ] {
            if (found - expected).abs() > 0.01 * sigma + 1e-8 * expected.abs() {
                out.push((what, found, expected));
            }
        }
    }
    out
}

fn build_characteristic(
    c: &RawCharacteristic,
    at: &str,
    who: &str,
    resolve: &impl Fn(&str) -> PathBuf,
    learned_dir: Option<&Path>,
    loc: &Locator,
    p: &mut Vec<Problem>,
) -> Option<Characteristic> {
    let before = p.len();
    let sg = &c.subgroup;
    let chosen = [sg.size.is_some(), sg.window_s.is_some(), sg.by_part]
        .iter()
        .filter(|x| **x)
        .count();
    let grouping = match (sg.size, sg.window_s, sg.by_part) {
        _ if chosen != 1 => {
            p.push(loc.problem(
                &format!("{at}.subgroup"),
                format!("{who}: say how readings form subgroups with exactly one of size, window_s or by_part = true"),
            ));
            None
        }
        (Some(n), _, _) if !(1..=100).contains(&n) => {
            p.push(loc.problem(
                &format!("{at}.subgroup.size"),
                format!("{who}: subgroup.size = {n} is out of range; use 1 to 100"),
            ));
            None
        }
        (Some(n), _, _) => Some(Grouping::Count { size: n }),
        (_, Some(w), _) if !(w > 0.0 && w.is_finite()) => {
            p.push(loc.problem(
                &format!("{at}.subgroup.window_s"),
                format!("{who}: subgroup.window_s = {w} must be a positive number of seconds"),
            ));
            None
        }
        (_, Some(w), _) => Some(Grouping::Window {
            window_ms: (w * 1000.0).round() as i64,
        }),
        _ => match sg.by_part_size {
            Some(n) if (1..=100).contains(&n) => Some(Grouping::Part { size: n }),
            Some(n) => {
                p.push(loc.problem(
                    &format!("{at}.subgroup.by_part_size"),
                    format!("{who}: {n} is out of range; use 1 to 100"),
                ));
                None
            }
            None => {
                p.push(loc.problem(
                    &format!("{at}.subgroup"),
                    format!("{who}: by_part = true needs by_part_size, the readings per part"),
                ));
                None
            }
        },
    };
    if sg.by_part_size.is_some() && !sg.by_part {
        p.push(loc.problem(
            &format!("{at}.subgroup.by_part_size"),
            format!("{who}: by_part_size only applies with by_part = true"),
        ));
    }
    let max_wait_ms = match sg.max_wait_s {
        Some(w) if w > 0.0 && w.is_finite() => Some((w * 1000.0).round() as i64),
        Some(w) => {
            p.push(loc.problem(
                &format!("{at}.subgroup.max_wait_s"),
                format!("{who}: {w} must be a positive number of seconds"),
            ));
            None
        }
        None => None,
    };
    if sg.on_timeout.is_some() && sg.max_wait_s.is_none() {
        p.push(loc.problem(
            &format!("{at}.subgroup.on_timeout"),
            format!("{who}: on_timeout needs max_wait_s"),
        ));
    }
    // The chart follows from the stored limits, the learning table, or the subgroup size.
    let nominal = match &grouping {
        Some(Grouping::Count { size }) | Some(Grouping::Part { size }) => Some(*size),
        _ => None,
    };
    let default_chart = match nominal {
        Some(1) => VariablesChart::Individuals,
        Some(n) if n > 10 => VariablesChart::XbarS,
        _ => VariablesChart::XbarR,
    };
    let chart = c.learning.chart.unwrap_or(default_chart);
    if let Some(n) = nominal {
        if n == 1 && chart != VariablesChart::Individuals {
            p.push(loc.problem(
                &format!("{at}.subgroup.size"),
                format!("{who}: subgroup.size = 1 needs chart = \"individuals\""),
            ));
        }
        if n > 1 && chart == VariablesChart::Individuals {
            p.push(loc.problem(
                &format!("{at}.learning.chart"),
                format!("{who}: chart = \"individuals\" needs subgroup.size = 1, not {n}"),
            ));
        }
    }
    if matches!(grouping, Some(Grouping::Window { .. })) && chart == VariablesChart::Individuals {
        p.push(loc.problem(&format!("{at}.learning.chart"), format!("{who}: a time window forms subgroups of many readings; chart = \"individuals\" does not fit")));
    }
    if !(2..=1000).contains(&c.learning.subgroups) {
        p.push(loc.problem(
            &format!("{at}.learning.subgroups"),
            format!("{who}: {} baseline subgroups is out of range; use 2 to 1000 (common practice: 20 to 25)", c.learning.subgroups),
        ));
    }
    let valid = match (c.valid_min, c.valid_max) {
        (Some(a), Some(b)) if a < b && a.is_finite() && b.is_finite() => Some((a, b)),
        (Some(a), Some(b)) => {
            p.push(loc.problem(
                &format!("{at}.valid_max"),
                format!("{who}: valid_max = {b} must be above valid_min = {a}"),
            ));
            None
        }
        (None, None) => None,
        _ => {
            p.push(loc.problem(
                at,
                format!("{who}: give both valid_min and valid_max, or neither"),
            ));
            None
        }
    };
    if let Some(spec) = &c.spec
        && let Err(e) = spec.validate()
    {
        p.push(loc.problem(&format!("{at}.spec"), format!("{who}: {e}")));
    }
    let rules = match RuleSet::from_config(&c.rules, &format!("{at}.rules"), loc) {
        Ok(r) => r,
        Err(mut more) => {
            p.append(&mut more);
            RuleSet::default()
        }
    };
    for (j, r) in c.rules.rule.iter().enumerate() {
        let two_sided = c.spec.is_some_and(|s| s.lsl.is_some() && s.usl.is_some());
        match r.kind.as_str() {
            "outside-spec" if c.spec.is_none() => p.push(loc.problem(
                &format!("{at}.rules.rule[{j}]"),
                format!("{who}: kind = \"outside-spec\" needs a [characteristic.spec]"),
            )),
            "coarse-resolution" if !two_sided => p.push(loc.problem(
                &format!("{at}.rules.rule[{j}]"),
                format!("{who}: kind = \"coarse-resolution\" needs a two-sided spec (lsl and usl) to know the tolerance"),
            )),
            _ => {}
        }
    }
    // The engineer's file when it exists; else the learned file (read when there, learned and
    // written when not) in the learned-limits directory, or at the configured path.
    let configured_limits = c.limits.as_deref().map(resolve);
    let limits_path = match (&configured_limits, learned_dir) {
        (Some(f), _) if f.exists() => Some(f.clone()),
        // Named after the configured file, so that pointing `limits` at a new name learns
        // afresh, as it does without the directory.
        (f, Some(d)) => Some(
            d.join(
                f.as_ref()
                    .and_then(|f| f.file_name())
                    .map(|n| n.to_os_string())
                    .unwrap_or_else(|| format!("{}.toml", c.id).into()),
            ),
        ),
        (f, None) => f.clone(),
    };
    let limits = match &limits_path {
        Some(lp) if lp.exists() => match StoredLimits::load(lp) {
            Ok(l) => {
                if l.characteristic != c.id {
                    p.push(loc.problem(
                        &format!("{at}.limits"),
                        format!(
                            "{who}: {} holds the limits of \"{}\"",
                            lp.display(),
                            l.characteristic
                        ),
                    ));
                }
                if l.chart != chart && c.learning.chart.is_some() {
                    p.push(loc.problem(
                        &format!("{at}.learning.chart"),
                        format!(
                            "{who}: the stored limits are for chart \"{}\", not \"{}\"",
                            l.chart.name(),
                            chart.name()
                        ),
                    ));
                }
                if let Some(n) = nominal
                    && n != l.subgroup_size
                {
                    p.push(loc.problem(
                        &format!("{at}.subgroup.size"),
                        format!("{who}: subgroups of {n}, but the stored limits are for subgroups of {}", l.subgroup_size),
                    ));
                }
                if let (Some(cu), Some(lu)) = (&c.unit, &l.unit)
                    && !cu.is_empty()
                    && !lu.is_empty()
                    && cu != lu
                {
                    p.push(loc.problem(
                        &format!("{at}.unit"),
                        format!(
                            "{who}: unit \"{cu}\", but the stored limits in {} are in \"{lu}\"",
                            lp.display()
                        ),
                    ));
                }
                // The limits of the two sides must agree; a target only where both give one.
                if let (Some(cs), Some(ls)) = (&c.spec, &l.spec)
                    && (cs.lsl != ls.lsl
                        || cs.usl != ls.usl
                        || matches!((cs.target, ls.target), (Some(a), Some(b)) if a != b))
                {
                    let words = |s: &Spec| {
                        let f = |v: Option<f64>| v.map_or("none".to_string(), crate::format::num);
                        format!("lsl {}, usl {}, target {}", f(s.lsl), f(s.usl), f(s.target))
                    };
                    p.push(loc.problem(
                        &format!("{at}.spec"),
                        format!(
                            "{who}: spec {}, but the stored limits in {} were computed with spec {}; recompute them or make the two agree",
                            words(cs),
                            lp.display(),
                            words(ls)
                        ),
                    ));
                }
                if c.limits_policy.as_deref() != Some("as-stored") {
                    for (what, found, expected) in limits_against_sigma(&l) {
                        p.push(loc.problem(
                            &format!("{at}.limits"),
                            format!(
                                "{who}: in {}, {what} is {}, but its sigma gives {}; the beyond-limits rule and the zone rules would disagree. Recompute the limits, or, if they were set apart from sigma on purpose, say limits_policy = \"as-stored\" with limits_reason",
                                lp.display(),
                                crate::format::num(found),
                                crate::format::num(expected)
                            ),
                        ));
                    }
                }
                Some(l)
            }
            Err(e) => {
                p.push(loc.problem(&format!("{at}.limits"), format!("{who}: {e}")));
                None
            }
        },
        // A named file that does not exist yet: the characteristic learns and writes it there.
        _ => None,
    };
    match (c.limits_policy.as_deref(), c.limits_reason.as_deref()) {
        (None | Some("from-sigma"), _) => {}
        (Some("as-stored"), Some(r)) if !r.trim().is_empty() => {}
        (Some("as-stored"), _) => p.push(loc.problem(
            &format!("{at}.limits_policy"),
            format!("{who}: limits_policy = \"as-stored\" needs limits_reason = \"...\": why the limits differ from what their sigma gives"),
        )),
        (Some(other), _) => p.push(loc.problem(
            &format!("{at}.limits_policy"),
            format!("{who}: \"{other}\" is not a limits policy; use \"from-sigma\" (the default) or \"as-stored\""),
        )),
    }
    let chart = limits.as_ref().map_or(chart, |l| l.chart);
    if let Some(d) = c.decimals
        && d > 10
    {
        p.push(loc.problem(
            &format!("{at}.decimals"),
            format!("{d} decimals is more than a gauge resolves; use 0 to 10"),
        ));
    }
    if p.len() > before {
        return None;
    }
    Some(Characteristic {
        id: c.id.clone(),
        name: c.name.clone().unwrap_or_else(|| c.id.clone()),
        unit: c.unit.clone().unwrap_or_default(),
        grouping: grouping?,
        max_wait_ms,
        on_timeout: sg.on_timeout.unwrap_or_default(),
        chart,
        valid,
        spec: c.spec,
        rules,
        limits_reason: match c.limits_policy.as_deref() {
            Some("as-stored") => c.limits_reason.clone(),
            _ => None,
        },
        configured_limits,
        limits_path,
        limits,
        baseline_subgroups: c.learning.subgroups,
        provisional_severity: c.learning.provisional_severity,
        reaction_plan: c.reaction_plan.clone(),
        decimals: c.decimals,
    })
}
