//! The daemon's configuration: one TOML file naming the archive, the characteristics of a cell
//! (with their subgroups, specification, rules and stored limits) and the sources that feed
//! them.
//!
//! Parse, then validate, then build: [`load`] collects *every* problem before it reports, each
//! with its TOML path and line:column, and opens no ports and touches no devices (it reads the
//! limits files the config names, nothing else), so `linewarden check` works on a laptop.
//!
//! One module per section: this one holds the file as a whole and `[daemon]`;
//! [`characteristics`], [`sources`] and [`outputs`] (with `[alerts]` and `[control]`) the rest.

use std::path::{Path, PathBuf};

use serde::{Deserialize, Serialize};

pub mod characteristics;
pub mod outputs;
pub mod sources;
pub mod web;
pub use characteristics::{
    AttributeSettings, Characteristic, Grouping, OnTimeout, RawCharacteristic, RawLearning,
    RawSubgroup,
};
pub use outputs::{
    AlertsConfig, Control, EmailOutput, ModbusLink, Output, OutputKind, RawAlerts, RawControl,
    RawOutput, SmtpSecurity, StackLight,
};
pub use sources::{
    Broker, Duplicates, MAX_PACKET, MqttSource, Payload, RawSource, ReportRows, Secret,
    SerialGauge, Source, TopicFilter,
};
pub use web::{RawWeb, Web, WebUser};

use crate::diag::{Locator, Problem, Problems};

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
    pub web: Option<RawWeb>,
}

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
    /// The plant's and the cell's names, for the headers of reports.
    pub plant: Option<String>,
    pub cell: Option<String>,
}

fn default_flush_ms() -> u64 {
    10
}

fn default_segment_mb() -> u64 {
    64
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
    pub characteristics: Vec<std::sync::Arc<Characteristic>>,
    pub sources: Vec<Source>,
    pub alerts: AlertsConfig,
    pub outputs: Vec<Output>,
    pub control: Option<Control>,
    /// The HTTP endpoint (metrics, health), when configured.
    pub web: Option<Web>,
    /// The plant's time zone (IANA name); None for the system's.
    pub timezone: Option<String>,
    /// The plant's and the cell's names (report headers).
    pub plant: Option<String>,
    pub cell: Option<String>,
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
    let chars = characteristics::build_characteristics(
        raw,
        learned_limits_dir.as_deref(),
        &resolve,
        loc,
        p,
    );
    let sources = sources::build_sources(raw, &resolve, loc, p);
    let alerts = outputs::build_alerts(&raw.alerts, &raw.output, loc, p);
    let outputs = outputs::build_outputs(&raw.output, &alerts, &resolve, loc, p);
    let control = outputs::build_control(&raw.control, &resolve, loc, p);
    let web = web::build_web(&raw.web, &resolve, loc, p);
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
        web,
        timezone: raw.daemon.timezone.clone(),
        plant: raw.daemon.plant.clone(),
        cell: raw.daemon.cell.clone(),
    }
}
