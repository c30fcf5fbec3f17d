//! The linewarden command line: a thin shell over the library.

use std::path::PathBuf;
use std::process::ExitCode;

use anyhow::{Context, Result, bail};
use clap::{Args, Parser, Subcommand, ValueEnum};
use serde_json::json;

use linewarden::input::{self, InputOptions, Layout};
use linewarden::limits_file::{StoredLimits, valid_id};
use linewarden::report;
use linewarden::stats::capability::{self, Capability, Spec};
use linewarden::stats::study::{self, Study, StudyOptions};
use linewarden::stats::variables::{SigmaEstimator, VariablesChart};

#[derive(Parser)]
#[command(
    name = "linewarden",
    version,
    about = "Statistical process control beside the machine: control limits, capability and run rules"
)]
struct Cli {
    #[command(subcommand)]
    command: Command,
}

#[derive(Subcommand)]
enum Command {
    /// Compute control limits from a baseline of subgroups, optionally with capability, and
    /// store them for a characteristic.
    Limits(LimitsArgs),
    /// Report process capability (Cp, Cpk, Pp, Ppk, Cpm) of a data file against its specs.
    Capability(CapabilityArgs),
    /// How often a rule set raises a false alarm, and how fast it catches a mean shift
    /// (average run lengths).
    Arl(ArlArgs),
    /// Run the daemon: read the sources, check every subgroup, archive everything, alert.
    Run {
        /// The config file.
        #[arg(long, value_name = "FILE")]
        config: PathBuf,
    },
    /// Validate a daemon config file and report every problem at once.
    Check {
        /// The config file.
        #[arg(long, value_name = "FILE")]
        config: PathBuf,
    },
    /// Inspect the archive: verify it, export it, count what it holds.
    #[command(subcommand)]
    Archive(ArchiveCommand),
    /// Ask the running daemon how things stand: sources, characteristics, open alerts.
    Status {
        #[command(flatten)]
        to: DaemonArgs,
        /// Print the daemon's JSON answer.
        #[arg(long)]
        json: bool,
        /// Only the light, the archive, the sources and the alerts, not every characteristic.
        #[arg(long)]
        brief: bool,
    },
    /// Acknowledge an alert (or every unacknowledged alert of a characteristic).
    Ack {
        /// The alert id (as the log, the HMI and the email show it), or a characteristic id.
        alert: String,
        /// Who acknowledges: a name or badge number, recorded in the archive.
        #[arg(long, value_name = "NAME")]
        by: String,
        /// What was found or done.
        #[arg(long, value_name = "TEXT")]
        note: Option<String>,
        #[command(flatten)]
        to: DaemonArgs,
        /// Print the daemon's JSON answer.
        #[arg(long)]
        json: bool,
    },
    /// Approve the provisional limits a characteristic learned: recorded with who and when in
    /// the archive and the limits file; from then on its alerts take their rules' severities.
    Approve {
        /// The characteristic id.
        characteristic: String,
        /// Who approves: a name, recorded in the archive and the limits file.
        #[arg(long, value_name = "NAME")]
        by: String,
        /// What was reviewed (a setup sheet, a study).
        #[arg(long, value_name = "TEXT")]
        note: Option<String>,
        #[command(flatten)]
        to: DaemonArgs,
    },
}

/// Which daemon to talk to.
#[derive(clap::Args)]
struct DaemonArgs {
    /// The control socket.
    #[arg(long, value_name = "PATH", conflicts_with = "config")]
    socket: Option<PathBuf>,
    /// The daemon's config file (its [control] socket is used). Default: LINEWARDEN_CONFIG,
    /// else /etc/linewarden/cell.toml, else the socket /run/linewarden/control.sock.
    #[arg(long, value_name = "FILE")]
    config: Option<PathBuf>,
}

/// Where the installed daemon's config and control socket are (systemd/linewarden.service).
const INSTALLED_CONFIG: &str = "/etc/linewarden/cell.toml";
const INSTALLED_SOCKET: &str = "/run/linewarden/control.sock";

impl DaemonArgs {
    fn socket(&self) -> Result<PathBuf> {
        if let Some(s) = &self.socket {
            return Ok(s.clone());
        }
        let given = self
            .config
            .clone()
            .or_else(|| std::env::var_os("LINEWARDEN_CONFIG").map(PathBuf::from));
        let path = match given {
            Some(p) => p,
            None => {
                // As installed: the unit's config, else (a user who may use the socket but
                // not read the config) the socket where the unit's runtime directory puts it.
                let installed = PathBuf::from(INSTALLED_CONFIG);
                match linewarden::config::load(&installed) {
                    Ok(cfg) => {
                        if let Some(c) = cfg.control {
                            return Ok(c.socket);
                        }
                        bail!("{INSTALLED_CONFIG} has no [control] socket = \"...\"")
                    }
                    Err(e) => {
                        let socket = PathBuf::from(INSTALLED_SOCKET);
                        if socket.exists() {
                            return Ok(socket);
                        }
                        bail!(
                            "no daemon to talk to: {e:#}, and there is no {INSTALLED_SOCKET}; say --config FILE or --socket PATH"
                        )
                    }
                }
            }
        };
        let cfg = linewarden::config::load(&path)?;
        cfg.control
            .map(|c| c.socket)
            .ok_or_else(|| anyhow::anyhow!("{} has no [control] socket = \"...\"", path.display()))
    }
}

#[derive(Subcommand)]
enum ArchiveCommand {
    /// Check every record's CRC, the sequence numbers, every seal and the hash chain; exits
    /// non-zero on any problem.
    Verify {
        /// The archive directory.
        dir: PathBuf,
    },
    /// Print records as CSV or JSON lines.
    Export {
        /// The archive directory.
        dir: PathBuf,
        /// jsonl: one record per line, every field (for programs); csv: one row per record
        /// (for a spreadsheet).
        #[arg(long, value_enum, default_value = "jsonl")]
        format: ExportFormat,
        /// Only records about this characteristic.
        #[arg(long, value_name = "ID")]
        characteristic: Option<String>,
        /// Only records appended at or after this time (RFC 3339, e.g. 2026-12-01T06:00:00Z).
        #[arg(long, value_name = "TIME")]
        since: Option<String>,
        /// Only records appended before this time.
        #[arg(long, value_name = "TIME")]
        until: Option<String>,
        /// Only records of these kinds (reading-accepted, subgroup-result, alert, ...).
        #[arg(long, value_delimiter = ',')]
        kind: Vec<String>,
        /// Print what is readable of a damaged archive (a segment missing, repeated or out of
        /// order, a damaged record), saying on standard error what is left out. Without it, any
        /// gap, repeat or reversal in the sequence numbers stops the export with an error.
        #[arg(long)]
        allow_gaps: bool,
    },
    /// Count segments, records by kind and by characteristic.
    Stats {
        /// The archive directory.
        dir: PathBuf,
        #[arg(long)]
        json: bool,
    },
}

#[derive(Clone, Copy, ValueEnum)]
enum ExportFormat {
    Csv,
    Jsonl,
}

#[derive(Args)]
struct ArlArgs {
    /// A published rule set to start from.
    #[arg(long, value_enum)]
    preset: Option<linewarden::rules::Preset>,
    /// A TOML file with a [rules] table (preset, off, [[rules.rule]]), as in a characteristic.
    #[arg(long, value_name = "FILE", conflicts_with = "config")]
    rules: Option<PathBuf>,
    /// A daemon config file; the rules of --characteristic are used.
    #[arg(long, value_name = "FILE", requires = "characteristic")]
    config: Option<PathBuf>,
    /// The characteristic of --config whose rules to evaluate.
    #[arg(long, value_name = "ID", requires = "config")]
    characteristic: Option<String>,
    /// Mean shifts to evaluate, in sigmas of the plotted point.
    #[arg(
        long,
        value_delimiter = ',',
        allow_hyphen_values = true,
        default_value = "0,0.5,1,1.5,2,3"
    )]
    shift: Vec<f64>,
    /// Time between subgroups (e.g. 1h, 30min, 90s), to state the ARL as a time.
    #[arg(long, value_name = "DURATION")]
    interval: Option<String>,
    /// Simulated runs per shift, when simulation is needed.
    #[arg(long, default_value_t = 20_000)]
    runs: u64,
    /// Seed for the simulation.
    #[arg(long, default_value_t = 1984)]
    seed: u64,
    /// Print JSON instead of the table.
    #[arg(long)]
    json: bool,
}

#[derive(Clone, Copy, ValueEnum)]
enum ChartArg {
    XbarR,
    XbarS,
    Individuals,
}

impl From<ChartArg> for VariablesChart {
    fn from(c: ChartArg) -> Self {
        match c {
            ChartArg::XbarR => VariablesChart::XbarR,
            ChartArg::XbarS => VariablesChart::XbarS,
            ChartArg::Individuals => VariablesChart::Individuals,
        }
    }
}

#[derive(Args)]
struct InputArgs {
    /// CSV file with the readings.
    #[arg(long, value_name = "FILE")]
    input: PathBuf,
    /// wide: a row per subgroup; long: subgroup and value columns; single: a reading per row.
    #[arg(long, value_enum, default_value = "wide")]
    layout: Layout,
    /// Column(s) holding readings, by header name (wide: several, comma-separated; long and
    /// single: one). Long layout default: "value".
    #[arg(long, value_name = "NAME", value_delimiter = ',')]
    value_column: Vec<String>,
    /// Column holding the subgroup key (long layout).
    #[arg(long, value_name = "NAME", default_value = "subgroup")]
    subgroup_column: String,
    /// Consecutive readings per subgroup (single layout).
    #[arg(long, value_name = "N")]
    subgroup_size: Option<usize>,
    /// Field separator: one character, or `tab` (also `\t`), `semicolon`, `comma`.
    #[arg(long, default_value = ",", value_name = "CHAR")]
    delimiter: String,
    /// Readings use a decimal comma (`12,0026`), as semicolon-separated spreadsheet exports
    /// in many countries do.
    #[arg(long)]
    decimal_comma: bool,
    /// Chart to estimate sigma with. Default: individuals for single readings, X̄-R for
    /// subgroups up to 10, X̄-S above.
    #[arg(long, value_enum)]
    chart: Option<ChartArg>,
}

#[derive(Args)]
struct SpecArgs {
    /// Lower specification limit.
    #[arg(long, allow_hyphen_values = true)]
    lsl: Option<f64>,
    /// Upper specification limit.
    #[arg(long, allow_hyphen_values = true)]
    usl: Option<f64>,
    /// Nominal (target) value, for Cpm.
    #[arg(long, allow_hyphen_values = true)]
    target: Option<f64>,
    /// Cpk a capable process must reach.
    #[arg(long, default_value_t = capability::DEFAULT_THRESHOLD)]
    capable_at: f64,
    /// Pp, Ppk and ppm by the percentile method (ISO 22514-2) from a fitted model: normal,
    /// lognormal, weibull, box-cox, or best (the smallest Anderson–Darling statistic).
    #[arg(long, value_name = "NAME")]
    distribution: Option<String>,
}

#[derive(Args)]
struct ExcludeArgs {
    /// Subgroups (numbered from 1 in file order) to leave out, for known assignable causes.
    #[arg(long, value_name = "LIST", value_delimiter = ',')]
    exclude: Vec<usize>,
    /// Exclude subgroups beyond the trial limits and recompute until none remain.
    #[arg(long)]
    auto_exclude: bool,
    /// Cap on rounds of automatic exclusion.
    #[arg(long, default_value_t = 10)]
    max_iterations: usize,
    /// How sigma is estimated from the subgroups: auto (the chart's published estimator),
    /// mean-range or burr-weighted-range (X̄-R), mean-sd or pooled-sd (X̄-S). They differ only
    /// when subgroup sizes vary.
    #[arg(long, value_name = "NAME", default_value = "auto")]
    sigma_estimator: String,
}

#[derive(Args)]
struct LimitsArgs {
    #[command(flatten)]
    input: InputArgs,
    #[command(flatten)]
    exclude: ExcludeArgs,
    #[command(flatten)]
    spec: SpecArgs,
    /// Store the limits in this file (written atomically).
    #[arg(long, value_name = "FILE", requires = "characteristic")]
    write: Option<PathBuf>,
    /// Identifier of the characteristic the limits belong to.
    #[arg(long, value_name = "ID")]
    characteristic: Option<String>,
    /// Unit of the readings, recorded in the limits file.
    #[arg(long)]
    unit: Option<String>,
    /// Print JSON instead of the report.
    #[arg(long)]
    json: bool,
}

#[derive(Args)]
struct CapabilityArgs {
    #[command(flatten)]
    input: InputArgs,
    #[command(flatten)]
    exclude: ExcludeArgs,
    #[command(flatten)]
    spec: SpecArgs,
    /// Print JSON instead of the report.
    #[arg(long)]
    json: bool,
}

fn main() -> ExitCode {
    let cli = Cli::parse();
    if !matches!(cli.command, Command::Run { .. }) {
        // A command whose output goes into a pipe that closes (`| head`) ends quietly, as
        // other Unix tools do. Not the daemon: it writes to sockets, and a peer that goes
        // away is an error it handles, never a reason to die.
        // SAFETY: restoring the default action of a signal; no handler runs.
        unsafe {
            libc::signal(libc::SIGPIPE, libc::SIG_DFL);
        }
    }
    let result = match cli.command {
        Command::Limits(a) => limits(a),
        Command::Capability(a) => capability_cmd(a),
        Command::Arl(a) => arl_cmd(a),
        Command::Archive(a) => archive_cmd(a),
        Command::Check { config } => check_cmd(&config),
        Command::Run { config } => run_cmd(&config),
        Command::Status { to, json, brief } => status_cmd(&to, json, brief),
        Command::Ack {
            alert,
            by,
            note,
            to,
            json,
        } => ack_cmd(&to, alert, by, note, json),
        Command::Approve {
            characteristic,
            by,
            note,
            to,
        } => approve_cmd(&to, characteristic, by, note),
    };
    match result {
        Ok(()) => ExitCode::SUCCESS,
        Err(e) => {
            eprintln!("error: {}", error_words(&e));
            ExitCode::FAILURE
        }
    }
}

/// The whole chain of causes, each said once: an error whose own text already carries its
/// cause (`cannot read … : Permission denied (os error 13)`) does not get it repeated.
fn error_words(e: &anyhow::Error) -> String {
    let mut out = String::new();
    for cause in e.chain() {
        let text = cause.to_string();
        if out.contains(&text) {
            continue;
        }
        if !out.is_empty() {
            out.push_str(": ");
        }
        out.push_str(&text);
    }
    out
}

/// The name in `known` closest to `given` (at most a third of its letters off), for "did you
/// mean".
fn nearest<'a>(given: &str, known: impl Iterator<Item = &'a str>) -> Option<&'a str> {
    fn distance(a: &str, b: &str) -> usize {
        let b: Vec<char> = b.chars().collect();
        let mut row: Vec<usize> = (0..=b.len()).collect();
        for (i, ca) in a.chars().enumerate() {
            let mut prev = row[0];
            row[0] = i + 1;
            for j in 0..b.len() {
                let here = row[j + 1];
                row[j + 1] = (prev + usize::from(ca != b[j]))
                    .min(row[j] + 1)
                    .min(here + 1);
                prev = here;
            }
        }
        row[b.len()]
    }
    known
        .map(|k| (distance(given, k), k))
        .filter(|(d, _)| *d <= given.chars().count().div_ceil(3))
        .min_by_key(|(d, _)| *d)
        .map(|(_, k)| k)
}

/// Each characteristic's unit, as its readings or its limits in the archive give it, for CSV
/// rows whose record carries none.
fn archived_units(dir: &std::path::Path) -> Result<std::collections::HashMap<String, String>> {
    use linewarden::archive::Record;
    use linewarden::archive::reader::{Filter, Reader};
    let r = Reader::open(dir)?;
    let filter = Filter {
        kinds: vec!["limits-installed".into(), "reading-accepted".into()],
        ..Filter::default()
    };
    let mut units = std::collections::HashMap::new();
    for e in r.iter(&filter).flatten() {
        let (c, u) = match &e.record {
            Record::ReadingAccepted {
                characteristic,
                unit: Some(u),
                ..
            } => (characteristic, u.clone()),
            Record::LimitsInstalled {
                characteristic,
                new,
                ..
            } => match &new.unit {
                Some(u) => (characteristic, u.clone()),
                None => continue,
            },
            _ => continue,
        };
        if !u.is_empty() && !units.contains_key(c) {
            units.insert(c.clone(), u);
        }
    }
    Ok(units)
}

/// Every characteristic the archive has records of.
fn archived_characteristics(dir: &std::path::Path) -> Result<std::collections::BTreeSet<String>> {
    use linewarden::archive::reader::{Filter, Reader};
    let r = Reader::open(dir)?;
    let mut known = std::collections::BTreeSet::new();
    for e in r.iter(&Filter::default()).flatten() {
        if let Some(c) = e.record.characteristic()
            && !known.contains(c)
        {
            known.insert(c.to_string());
        }
    }
    Ok(known)
}

/// The byte a `--delimiter` value names.
fn delimiter_byte(given: &str) -> Result<u8> {
    Ok(match given {
        "tab" | "\\t" | "\t" => b'\t',
        "semicolon" => b';',
        "comma" => b',',
        "space" => b' ',
        s if s.len() == 1 && s.is_ascii() => s.as_bytes()[0],
        other => bail!(
            "--delimiter {other:?} is not one character; use a single character such as ';', or tab, semicolon, comma, space"
        ),
    })
}

/// Reads the input file and runs the study both commands share.
fn load_and_study(
    input: &InputArgs,
    exclude: &ExcludeArgs,
) -> Result<(Study, Vec<Vec<f64>>, Vec<String>)> {
    let name = input.input.display().to_string();
    let text = std::fs::read_to_string(&input.input)
        .with_context(|| format!("cannot read input file {name}"))?;
    let delimiter = delimiter_byte(&input.delimiter)?;
    let mut opts = InputOptions::new(input.layout);
    opts.value_columns = input.value_column.clone();
    opts.subgroup_column = Some(input.subgroup_column.clone());
    opts.subgroup_size = input.subgroup_size;
    opts.delimiter = delimiter;
    opts.decimal_comma = input.decimal_comma;
    if opts.decimal_comma && delimiter == b',' {
        bail!(
            "--decimal-comma with ',' between fields cannot tell a field from a decimal; such files use ';' (--delimiter ';')"
        );
    }
    let parsed = input::parse(&text, &name, &opts)?;
    let chart = input.chart.map(VariablesChart::from).unwrap_or_else(|| {
        match parsed.subgroups.iter().map(Vec::len).max().unwrap_or(1) {
            1 => VariablesChart::Individuals,
            2..=10 => VariablesChart::XbarR,
            _ => VariablesChart::XbarS,
        }
    });
    let mut options = StudyOptions::new(chart);
    let Some(estimator) = SigmaEstimator::parse(&exclude.sigma_estimator) else {
        bail!(
            "--sigma-estimator {:?} is not an estimator; use one of: {}",
            exclude.sigma_estimator,
            SigmaEstimator::NAMES.join(", ")
        );
    };
    if !estimator.fits(chart) {
        bail!(
            "--sigma-estimator {} is not for the {} chart: {} take the X̄-R chart's ranges, {} the X̄-S chart's standard deviations",
            exclude.sigma_estimator,
            chart.name(),
            "mean-range and burr-weighted-range",
            "mean-sd and pooled-sd"
        );
    }
    options.sigma_estimator = estimator;
    options.exclude = exclude.exclude.clone();
    options.auto_exclude = exclude.auto_exclude;
    options.max_iterations = exclude.max_iterations;
    let s = study::run(&parsed.subgroups, &options)
        .with_context(|| format!("{name}: the study failed"))?;
    Ok((s, parsed.subgroups, parsed.warnings))
}

fn spec_of(a: &SpecArgs) -> Result<Option<Spec>> {
    if a.lsl.is_none() && a.usl.is_none() {
        if a.target.is_some() {
            bail!("--target needs --lsl and/or --usl");
        }
        if a.distribution.is_some() {
            bail!("--distribution needs --lsl and/or --usl");
        }
        return Ok(None);
    }
    let spec = Spec {
        lsl: a.lsl,
        usl: a.usl,
        target: a.target,
    };
    spec.validate().map_err(|e| match e {
        linewarden::stats::StatsError::SpecOrder { lsl, usl } => {
            anyhow::anyhow!("--lsl {lsl} must be below --usl {usl}")
        }
        other => anyhow::anyhow!("specification options: {other}"),
    })?;
    if !(a.capable_at > 0.0 && a.capable_at.is_finite()) {
        bail!("--capable-at {} must be a positive number", a.capable_at);
    }
    if let Some(name) = &a.distribution
        && capability::DistributionChoice::parse(name).is_none()
    {
        bail!(
            "--distribution {name:?} is not a model linewarden fits; use normal, lognormal, weibull, box-cox or best"
        );
    }
    Ok(Some(spec))
}

fn capability_of(
    s: &Study,
    subgroups: &[Vec<f64>],
    spec: &Spec,
    args: &SpecArgs,
) -> Result<Capability> {
    let readings = s.included_readings(subgroups);
    let mut c = capability::capability(&readings, s.estimate.sigma_within, spec, args.capable_at)?;
    if let Some(name) = &args.distribution {
        let Some(choice) = capability::DistributionChoice::parse(name) else {
            bail!("--distribution {name:?} is not a model linewarden fits");
        };
        capability::percentile_method(&mut c, &readings, spec, choice)
            .with_context(|| format!("--distribution {name}"))?;
    }
    Ok(c)
}

fn limits(a: LimitsArgs) -> Result<()> {
    if let Some(id) = &a.characteristic
        && !valid_id(id)
    {
        bail!(
            "--characteristic {id:?} is not a valid identifier; use letters, digits, '-', '_' and '.'"
        );
    }
    let spec = spec_of(&a.spec)?;
    let (s, subgroups, mut warnings) = load_and_study(&a.input, &a.exclude)?;
    let cap = match &spec {
        Some(spec) => Some(capability_of(&s, &subgroups, spec, &a.spec)?),
        None => None,
    };
    let source = a.input.input.display().to_string();
    if let (Some(path), Some(id)) = (&a.write, &a.characteristic) {
        let now = humantime::format_rfc3339_seconds(std::time::SystemTime::now()).to_string();
        let stored = StoredLimits::from_study(&s, id, a.unit.clone(), spec, &source, &now);
        stored.write(path)?;
        eprintln!("wrote limits for {id} to {}", path.display());
    }
    warnings.extend(s.warnings.iter().cloned());
    if a.json {
        if let Some(c) = &cap {
            warnings.extend(c.warnings.iter().cloned());
        }
        for w in &warnings {
            eprintln!("warning: {w}");
        }
        let mut v = study_json(&s);
        v["capability"] = cap
            .as_ref()
            .map(capability_json)
            .unwrap_or(serde_json::Value::Null);
        v["warnings"] = json!(warnings);
        println!("{}", serde_json::to_string_pretty(&v)?);
    } else {
        for w in &warnings[..warnings.len() - s.warnings.len()] {
            eprintln!("warning: {w}");
        }
        print!(
            "{}",
            report::study(&source, &s, spec.as_ref().zip(cap.as_ref()))
        );
    }
    Ok(())
}

fn capability_cmd(a: CapabilityArgs) -> Result<()> {
    let Some(spec) = spec_of(&a.spec)? else {
        bail!("capability needs --lsl and/or --usl");
    };
    let (s, subgroups, mut warnings) = load_and_study(&a.input, &a.exclude)?;
    let cap = capability_of(&s, &subgroups, &spec, &a.spec)?;
    warnings.extend(s.warnings.iter().cloned());
    if a.json {
        // Every warning, the capability's own (normality) included: the text report has them.
        warnings.extend(cap.warnings.iter().cloned());
        for w in &warnings {
            eprintln!("warning: {w}");
        }
        let mut v = capability_json(&cap);
        v["sigma_within_method"] = json!(s.estimate.sigma_method);
        v["sigma_method"] = json!(s.estimate.sigma_key);
        v["stability"] = json!(s.stability);
        v["autocorrelation"] = json!(s.autocorrelation);
        v["chart"] = json!(s.chart.name());
        v["warnings"] = json!(warnings);
        println!("{}", serde_json::to_string_pretty(&v)?);
    } else {
        let source = a.input.input.display().to_string();
        print!(
            "{}",
            report::capability_report(&source, &spec, &cap, &warnings)
        );
    }
    Ok(())
}

fn study_json(s: &Study) -> serde_json::Value {
    json!({
        "chart": s.chart.name(),
        "subgroup_size": s.subgroup_size,
        "subgroup_size_range": [s.subgroup_size_range.0, s.subgroup_size_range.1],
        "subgroups_total": s.subgroups_total,
        "subgroups_used": s.subgroups_used,
        "excluded": s.excluded.iter().map(|e| json!({
            "subgroup": e.subgroup, "reason": e.reason, "iteration": e.iteration,
        })).collect::<Vec<_>>(),
        "sigma_within": s.estimate.sigma_within,
        "sigma_within_method": s.estimate.sigma_method,
        "sigma_method": s.estimate.sigma_key,
        "stability": s.stability,
        "autocorrelation": s.autocorrelation,
        "sigma_overall": s.estimate.sigma_overall,
        "location": s.location,
        "dispersion": {
            "kind": s.dispersion_kind.name(),
            "center": s.dispersion.center,
            "ucl": s.dispersion.ucl,
            "lcl": s.dispersion.lcl,
        },
        "trials": s.trials,
        "points": s.points.iter().map(|p| json!({
            "subgroup": p.subgroup, "n": p.stats.n, "mean": p.stats.mean,
            "dispersion": p.stats.dispersion, "included": p.included,
        })).collect::<Vec<_>>(),
    })
}

fn capability_json(c: &Capability) -> serde_json::Value {
    let mut v = serde_json::to_value(c).unwrap_or(serde_json::Value::Null);
    // Keep the documented keys present even where an index does not apply.
    for key in ["cp", "cpm", "cp_ci95", "ppm_below", "ppm_above"] {
        if v.get(key).is_none() {
            v[key] = serde_json::Value::Null;
        }
    }
    v
}

/// A TOML file holding just a `[rules]` table.
#[derive(serde::Deserialize)]
#[serde(deny_unknown_fields)]
struct RulesFile {
    rules: linewarden::rules::RulesConfig,
}

fn arl_cmd(a: ArlArgs) -> Result<()> {
    use linewarden::rules::{RuleSet, RulesConfig};
    let mut cfg = RulesConfig::default();
    let mut source = String::new();
    let mut text = String::new();
    if let (Some(path), Some(id)) = (&a.config, &a.characteristic) {
        let c = linewarden::config::load(path)?;
        let Some(ch) = c.characteristics.iter().find(|c| &c.id == id) else {
            let known: Vec<&str> = c.characteristics.iter().map(|c| c.id.as_str()).collect();
            bail!(
                "{}: no characteristic \"{id}\" (it has: {})",
                path.display(),
                known.join(", ")
            );
        };
        if a.preset.is_some() {
            bail!(
                "--preset and --config both give rules; the characteristic's rules already name their preset"
            );
        }
        return arl_report(&a, &ch.rules);
    }
    if let Some(path) = &a.rules {
        source = path.display().to_string();
        text = std::fs::read_to_string(path)
            .with_context(|| format!("cannot read rules file {source}"))?;
        let loc = linewarden::diag::Locator::new(&text);
        let file: RulesFile = toml::from_str(&text).map_err(|e| {
            anyhow::anyhow!(
                "{}",
                linewarden::diag::Problems {
                    file: source.clone(),
                    problems: vec![loc.from_toml_error(&e)],
                }
            )
        })?;
        cfg = file.rules;
    }
    match (a.preset, cfg.preset) {
        (Some(p), None) => cfg.preset = Some(p),
        (Some(p), Some(q)) if p != q => {
            bail!("--preset {p:?} conflicts with preset {q:?} in {source}")
        }
        (None, None) if a.rules.is_none() => {
            bail!("give --preset NAME and/or --rules FILE, or --config FILE --characteristic ID")
        }
        _ => {}
    }
    let loc = linewarden::diag::Locator::new(&text);
    let set = RuleSet::from_config(&cfg, "rules", &loc).map_err(|problems| {
        anyhow::anyhow!(
            "{}",
            linewarden::diag::Problems {
                file: if source.is_empty() {
                    "--preset".into()
                } else {
                    source.clone()
                },
                problems,
            }
        )
    })?;
    arl_report(&a, &set)
}

fn arl_report(a: &ArlArgs, set: &linewarden::rules::RuleSet) -> Result<()> {
    use linewarden::rules::arl::{self, ArlOptions, time_between};
    let interval_s = match &a.interval {
        Some(t) => {
            let d = humantime::parse_duration(t).with_context(|| {
                format!("--interval {t:?} is not a duration such as 1h, 30min or 90s")
            })?;
            if d.is_zero() {
                bail!("--interval {t:?} must be longer than zero");
            }
            Some(d.as_secs_f64())
        }
        None => None,
    };
    let opts = ArlOptions {
        runs: a.runs,
        seed: a.seed,
        ..ArlOptions::default()
    };
    let results = arl::arl(set, &a.shift, &opts)?;
    if a.json {
        let rows: Vec<serde_json::Value> = results
            .iter()
            .map(|r| {
                let mut v = serde_json::to_value(r).unwrap_or_default();
                if let Some(i) = interval_s {
                    v["time_to_signal_s"] = json!(r.arl * i);
                }
                v
            })
            .collect();
        let v = json!({ "rules": set.rules, "interval_s": interval_s, "results": rows });
        println!("{}", serde_json::to_string_pretty(&v)?);
        return Ok(());
    }
    println!("Rule set: {}", set.ids().join(", "));
    let ignored: Vec<String> = set
        .rules
        .iter()
        .filter(|r| r.kind.on_readings())
        .map(|r| r.id.clone())
        .collect();
    if !ignored.is_empty() {
        println!("  (reading rules not counted: {})", ignored.join(", "));
    }
    if let Some(t) = &a.interval {
        println!("A subgroup every {t}");
    }
    println!();
    println!("  {:<8} {:>10}  {:<18} in words", "shift", "ARL", "method");
    for r in &results {
        let ci = r
            .ci95
            .map(|[lo, hi]| {
                format!(
                    " (95% CI {} to {})",
                    linewarden::format::sig(lo, 4),
                    linewarden::format::sig(hi, 4)
                )
            })
            .unwrap_or_default();
        let words = match interval_s {
            Some(i) if r.shift == 0.0 => {
                format!("one false alarm every {}", time_between(r.arl, i))
            }
            Some(i) => format!("signalled after {} on average", time_between(r.arl, i)),
            None if r.shift == 0.0 => format!(
                "one false alarm every {} subgroups",
                linewarden::format::sig(r.arl, 4)
            ),
            None => format!(
                "signalled after {} subgroups on average",
                linewarden::format::sig(r.arl, 4)
            ),
        };
        println!(
            "  {:<8} {:>10}  {:<18} {words}{ci}",
            linewarden::format::num(r.shift),
            linewarden::format::sig(r.arl, 5),
            r.method.name()
        );
    }
    println!("\nShifts are in sigmas of the plotted point (sigma/sqrt(n) for subgroup means).");
    Ok(())
}

fn parse_time(option: &str, t: &str) -> Result<i64> {
    let st = humantime::parse_rfc3339_weak(t)
        .with_context(|| format!("{option} {t:?} is not a time such as 2026-12-01T06:00:00Z"))?;
    Ok(st
        .duration_since(std::time::UNIX_EPOCH)
        .map(|d| d.as_millis() as i64)
        .unwrap_or(0))
}

fn format_ms(ms: i64) -> String {
    let t = std::time::UNIX_EPOCH + std::time::Duration::from_millis(ms.max(0) as u64);
    humantime::format_rfc3339_millis(t).to_string()
}

fn archive_cmd(a: ArchiveCommand) -> Result<()> {
    use linewarden::archive::reader::{self, Filter, Reader};
    match a {
        ArchiveCommand::Verify { dir } => {
            if !dir.is_dir() {
                bail!("{} is not an archive directory", dir.display());
            }
            let r = reader::verify(&dir)?;
            println!(
                "{}: {} segments ({} sealed), {} records, last sequence {}",
                dir.display(),
                r.segments,
                r.sealed,
                r.records,
                r.last_seq
            );
            for n in &r.notes {
                println!("  note: {n}");
            }
            for p in &r.problems {
                println!("  PROBLEM: {p}");
            }
            if r.problems.is_empty() {
                println!("verified: no problems");
                Ok(())
            } else {
                bail!("{} problem(s) found in {}", r.problems.len(), dir.display())
            }
        }
        ArchiveCommand::Export {
            dir,
            format,
            characteristic,
            since,
            until,
            kind,
            allow_gaps,
        } => {
            use linewarden::archive::Record;
            for k in &kind {
                if !Record::KINDS.contains(&k.as_str()) {
                    bail!(
                        "--kind {k:?} is not a kind of record{}; the kinds are: {}",
                        nearest(k, Record::KINDS.iter().copied())
                            .map(|n| format!(" (did you mean {n}?)"))
                            .unwrap_or_default(),
                        Record::KINDS.join(", ")
                    );
                }
            }
            let wanted = characteristic.clone();
            let filter = Filter {
                from_seq: None,
                since_ms: since
                    .as_deref()
                    .map(|t| parse_time("--since", t))
                    .transpose()?,
                until_ms: until
                    .as_deref()
                    .map(|t| parse_time("--until", t))
                    .transpose()?,
                characteristic,
                kinds: kind,
            };
            let r = Reader::open(&dir)?;
            // With --allow-gaps each problem is said on standard error and the export goes on;
            // without it the first problem ends the export with an error (exit status 1).
            let left_out = std::cell::Cell::new(0usize);
            let exported = std::cell::Cell::new(0usize);
            let records = r
                .iter(&filter)
                .inspect(|e| {
                    if e.is_ok() {
                        exported.set(exported.get() + 1);
                    }
                })
                .filter_map(|e| match e {
                    Err(err) if allow_gaps => {
                        eprintln!("linewarden: not exported: {err}");
                        left_out.set(left_out.get() + 1);
                        None
                    }
                    other => Some(other),
                });
            let stdout = std::io::stdout();
            let mut out = std::io::BufWriter::new(stdout.lock());
            use std::io::Write;
            match format {
                ExportFormat::Jsonl => {
                    for e in records {
                        serde_json::to_writer(&mut out, &e?)?;
                        out.write_all(b"\n")?;
                    }
                    out.flush()?;
                }
                ExportFormat::Csv => {
                    let units = archived_units(&dir)?;
                    let mut w = csv::Writer::from_writer(out);
                    w.write_record(CSV_COLUMNS)?;
                    for e in records {
                        let e = e?;
                        w.write_record(csv_row(&e, &units))?;
                    }
                    w.flush()?;
                }
            }
            if left_out.get() > 0 {
                eprintln!(
                    "linewarden: the archive has {} problem(s); what could be read was exported (--allow-gaps)",
                    left_out.get()
                );
            }
            if exported.get() == 0 {
                // Nothing matched: say why rather than print nothing and succeed.
                if let Some(id) = &wanted {
                    let known = archived_characteristics(&dir)?;
                    if !known.contains(id) {
                        bail!(
                            "the archive {} has no records of characteristic {id:?}{}; it has: {}",
                            dir.display(),
                            nearest(id, known.iter().map(String::as_str))
                                .map(|n| format!(" (did you mean {n}?)"))
                                .unwrap_or_default(),
                            if known.is_empty() {
                                "none".to_string()
                            } else {
                                known.iter().cloned().collect::<Vec<_>>().join(", ")
                            }
                        );
                    }
                }
                eprintln!(
                    "linewarden: no records match (the filters are valid; the window or the kinds hold none)"
                );
            }
            Ok(())
        }
        ArchiveCommand::Stats { dir, json } => {
            let s = reader::stats(&dir)?;
            if json {
                println!("{}", serde_json::to_string_pretty(&s)?);
                return Ok(());
            }
            println!("{}", dir.display());
            println!(
                "  segments        {} ({} sealed), {} bytes",
                s.segments, s.sealed, s.bytes
            );
            println!("  records         {}", s.records);
            if let (Some(a), Some(b)) = (s.first_seq, s.last_seq) {
                println!("  sequence        {a} to {b}");
            }
            if let (Some(a), Some(b)) = (s.first_time_ms, s.last_time_ms) {
                println!("  time            {} to {}", format_ms(a), format_ms(b));
            }
            println!("  by kind");
            for (k, n) in &s.by_kind {
                println!("    {k:<22} {n}");
            }
            if !s.by_characteristic.is_empty() {
                println!("  by characteristic");
                for (k, n) in &s.by_characteristic {
                    println!("    {k:<22} {n}");
                }
            }
            Ok(())
        }
    }
}

/// value, unit, source, part, detail for one CSV row.
/// The CSV export's columns, for a spreadsheet: every field its own column.
const CSV_COLUMNS: [&str; 20] = [
    "seq",
    "time",
    "kind",
    "characteristic",
    "value",
    "unit",
    "source",
    "part",
    "subgroup",
    "n",
    "spread",
    "lcl",
    "center",
    "ucl",
    "verdict",
    "alert",
    "event",
    "rule",
    "severity",
    "detail",
];

/// One record as a CSV row (see [`CSV_COLUMNS`]); `units` gives a characteristic's unit where
/// the record itself carries none.
fn csv_row(
    e: &linewarden::archive::Envelope,
    units: &std::collections::HashMap<String, String>,
) -> Vec<String> {
    use linewarden::archive::Record as R;
    let mut row = vec![String::new(); CSV_COLUMNS.len()];
    let col = |name: &str| CSV_COLUMNS.iter().position(|c| *c == name).unwrap_or(0);
    let mut set = |name: &str, v: String| row[col(name)] = v;
    set("seq", e.seq.to_string());
    set("time", format_ms(e.time_ms));
    set("kind", e.record.kind().to_string());
    let ch = e.record.characteristic().unwrap_or("").to_string();
    let unit_of = |given: &Option<String>| {
        given
            .clone()
            .filter(|u| !u.is_empty())
            .or_else(|| units.get(&ch).cloned())
            .unwrap_or_default()
    };
    set("characteristic", ch.clone());
    match &e.record {
        R::ReadingAccepted {
            value,
            unit,
            source,
            part,
            ..
        } => {
            set("value", value.to_string());
            set("unit", unit_of(unit));
            set("source", source.clone());
            set("part", part.clone().unwrap_or_default());
        }
        R::ReadingRejected {
            source,
            raw,
            reason,
            ..
        } => {
            set("source", source.clone());
            set("detail", format!("{reason} (raw: {raw})"));
        }
        R::SubgroupResult {
            subgroup,
            location,
            violations,
            partial,
            ..
        } => {
            set("value", subgroup.mean.to_string());
            set("unit", unit_of(&None));
            set("subgroup", subgroup.number.to_string());
            set("n", subgroup.n.to_string());
            set(
                "spread",
                subgroup
                    .dispersion
                    .map(|d| d.to_string())
                    .unwrap_or_default(),
            );
            if let Some(l) = location {
                set("lcl", l.lcl.to_string());
                set("center", l.center.to_string());
                set("ucl", l.ucl.to_string());
            }
            set(
                "verdict",
                if location.is_none() {
                    "learning".to_string()
                } else if violations.is_empty() {
                    "in control".to_string()
                } else {
                    format!(
                        "signal: {}",
                        violations
                            .iter()
                            .map(|v| v.rule.as_str())
                            .collect::<Vec<_>>()
                            .join(", ")
                    )
                },
            );
            if *partial {
                set("detail", "partial subgroup (its wait ran out)".into());
            }
        }
        R::Alert {
            alert_id, event, ..
        } => {
            set("alert", alert_id.clone());
            let v = serde_json::to_value(event).unwrap_or_default();
            let text = |k: &str| v.get(k).and_then(|x| x.as_str()).unwrap_or("").to_string();
            set("event", text("event"));
            set("rule", text("rule"));
            set("severity", text("severity"));
            let detail = match text("event").as_str() {
                "acknowledged" => format!("by {}{}", text("by"), {
                    let n = text("note");
                    if n.is_empty() { n } else { format!(": {n}") }
                }),
                "delivered" => format!("to {} (version {})", text("output"), v["version"]),
                _ => text("message"),
            };
            set("detail", detail);
        }
        other => {
            set("detail", serde_json::to_string(other).unwrap_or_default());
        }
    }
    row
}

fn check_cmd(path: &std::path::Path) -> Result<()> {
    let c = linewarden::config::load(path)?;
    println!("{}: valid", path.display());
    println!("  archive      {}", c.archive_dir.display());
    for ch in &c.characteristics {
        let missing = ch
            .configured_limits
            .as_ref()
            .filter(|f| Some(*f) != ch.limits_path.as_ref());
        let limits = match (&ch.limits, &ch.limits_path) {
            (Some(l), Some(p)) if Some(p) != ch.configured_limits.as_ref() => {
                let state = if l.is_provisional() {
                    "provisional".to_string()
                } else if let Some(a) = &l.approved {
                    format!("approved by {} at {}", a.by, a.at)
                } else {
                    "approved".to_string()
                };
                if let Some(f) = missing {
                    eprintln!(
                        "warning: {}: characteristic \"{}\": the limits file {} does not exist; the limits learned at {} ({state}) in {} are used",
                        path.display(),
                        ch.id,
                        f.display(),
                        l.provenance.computed_at,
                        p.display()
                    );
                }
                format!("learned limits ({state}) from {}", p.display())
            }
            (Some(_), Some(p)) => format!("limits from {}", p.display()),
            (None, Some(p)) => {
                // A typo in the path would quietly switch the characteristic to learning: say it.
                if let Some(f) = ch.configured_limits.as_ref() {
                    let dir = p.parent().filter(|d| !d.as_os_str().is_empty());
                    eprintln!(
                        "warning: {}: characteristic \"{}\": the limits file {} does not exist, so it will learn provisional limits from its first {} subgroups and write them to {}{}",
                        path.display(),
                        ch.id,
                        f.display(),
                        ch.baseline_subgroups,
                        if f == p {
                            "it".to_string()
                        } else {
                            p.display().to_string()
                        },
                        match dir {
                            Some(d) if !d.is_dir() => format!(
                                " (its directory {} does not exist yet; the daemon creates it)",
                                d.display()
                            ),
                            _ => String::new(),
                        }
                    );
                }
                format!(
                    "learning: limits after {} subgroups, written to {}",
                    ch.baseline_subgroups,
                    p.display()
                )
            }
            _ => format!(
                "learning: provisional limits after {} subgroups",
                ch.baseline_subgroups
            ),
        };
        println!(
            "  {:<12} {} chart, rules: {}; {limits}",
            ch.id,
            ch.chart.name(),
            if ch.rules.rules.is_empty() {
                "none".to_string()
            } else {
                ch.rules.ids().join(", ")
            }
        );
    }
    for s in &c.sources {
        match s {
            linewarden::config::Source::Replay { id, file, speed } => {
                println!("  source {id}: replay of {} at {speed}x", file.display())
            }
            linewarden::config::Source::Serial(g) => {
                println!(
                    "  source {}: serial gauge on {} at {} baud",
                    g.id, g.port, g.baud
                )
            }
            linewarden::config::Source::Folder { id, path, .. } => {
                println!("  source {id}: CSV reports dropped into {}", path.display())
            }
            linewarden::config::Source::Mqtt(m) => println!(
                "  source {}: MQTT {} as {}, QoS {}, topics {}",
                m.id,
                m.broker.url(),
                m.broker.client_id,
                m.qos,
                m.topics
                    .iter()
                    .map(|t| t.template.as_str())
                    .collect::<Vec<_>>()
                    .join(", ")
            ),
        }
    }
    // What the daemon writes must be writable by the user running this (the unit runs check as
    // the service user): the archive, and where learned limits go.
    let mut places = vec![("the archive", c.archive_dir.clone())];
    for ch in &c.characteristics {
        if let (None, Some(p)) = (&ch.limits, &ch.limits_path)
            && let Some(d) = p.parent()
            && !places.iter().any(|(_, q)| q == d)
        {
            places.push(("learned limits", d.to_path_buf()));
        }
    }
    for (what, dir) in places {
        if let Err(e) = writable(&dir) {
            eprintln!(
                "warning: {}: {what}: {} cannot be written by this user ({e}); the daemon, running as this user, could not write there",
                path.display(),
                dir.display()
            );
        }
    }
    Ok(())
}

/// Whether this user can create or write in `dir`: the directory itself when it exists, else
/// the nearest existing directory above it (where the daemon would create it).
fn writable(dir: &std::path::Path) -> std::result::Result<(), String> {
    use std::os::unix::ffi::OsStrExt;
    let mut at = if dir.as_os_str().is_empty() {
        std::path::Path::new(".")
    } else {
        dir
    };
    while !at.exists() {
        match at.parent() {
            Some(p) if !p.as_os_str().is_empty() => at = p,
            _ => {
                at = std::path::Path::new(".");
                break;
            }
        }
    }
    if !at.is_dir() {
        return Err(format!("{} is not a directory", at.display()));
    }
    let c = std::ffi::CString::new(at.as_os_str().as_bytes()).map_err(|e| e.to_string())?;
    // SAFETY: a NUL-terminated path; access(2) only reads it.
    let r = unsafe { libc::access(c.as_ptr(), libc::W_OK | libc::X_OK) };
    if r == 0 {
        Ok(())
    } else {
        let e = std::io::Error::last_os_error();
        Err(if at == dir {
            e.to_string()
        } else {
            format!("{e} in {}, where it would be created", at.display())
        })
    }
}

fn status_cmd(to: &DaemonArgs, json: bool, brief: bool) -> Result<()> {
    use linewarden::daemon::control::{ClientRequest, ask};
    let v = ask(&to.socket()?, &ClientRequest::Status { brief }).map_err(anyhow::Error::msg)?;
    if json {
        println!("{}", serde_json::to_string_pretty(&v)?);
        return Ok(());
    }
    if v.get("ok") == Some(&serde_json::Value::Bool(false)) {
        anyhow::bail!("{}", v["error"].as_str().unwrap_or("the daemon refused"));
    }
    let r: linewarden::daemon::hub::StatusReport = serde_json::from_value(v)?;
    print!("{}", linewarden::report::status(&r));
    Ok(())
}

fn ack_cmd(
    to: &DaemonArgs,
    alert: String,
    by: String,
    note: Option<String>,
    json: bool,
) -> Result<()> {
    use linewarden::daemon::control::{ClientRequest, ask};
    // Said here first, so a mistake is answered without a round trip; the daemon checks again.
    linewarden::alerts::check_ack_text(&by, note.as_deref())?;
    let v =
        ask(&to.socket()?, &ClientRequest::Ack { alert, by, note }).map_err(anyhow::Error::msg)?;
    if json {
        println!("{}", serde_json::to_string_pretty(&v)?);
    }
    let r: linewarden::daemon::hub::AckReply = serde_json::from_value(v)?;
    if !r.ok {
        anyhow::bail!("{}", r.error.unwrap_or_else(|| "refused".into()));
    }
    if !json {
        println!("acknowledged: {}", r.acknowledged.join(", "));
    }
    Ok(())
}

fn approve_cmd(
    to: &DaemonArgs,
    characteristic: String,
    by: String,
    note: Option<String>,
) -> Result<()> {
    use linewarden::daemon::control::{ClientRequest, ask};
    linewarden::alerts::check_ack_text(&by, note.as_deref())?;
    let req = ClientRequest::Approve {
        characteristic: characteristic.clone(),
        by,
        note,
    };
    let v = ask(&to.socket()?, &req).map_err(anyhow::Error::msg)?;
    let r: linewarden::daemon::hub::ApproveReply = serde_json::from_value(v)?;
    if !r.ok {
        anyhow::bail!("{}", r.error.unwrap_or_else(|| "refused".into()));
    }
    println!(
        "approved: the limits of {characteristic} (recorded in the archive and written to its limits file)"
    );
    Ok(())
}

fn run_cmd(path: &std::path::Path) -> Result<()> {
    tracing_subscriber::fmt()
        .with_writer(std::io::stderr)
        .with_env_filter(
            tracing_subscriber::EnvFilter::try_from_default_env()
                .unwrap_or_else(|_| tracing_subscriber::EnvFilter::new("info")),
        )
        .with_target(false)
        .with_ansi(std::io::IsTerminal::is_terminal(&std::io::stderr()))
        .init();
    let cfg = linewarden::config::load(path)?;
    let rt = tokio::runtime::Builder::new_multi_thread()
        .worker_threads(2)
        .enable_all()
        .build()
        .context("cannot start the async runtime")?;
    rt.block_on(async move {
        let (stop_tx, stop_rx) = tokio::sync::watch::channel(false);
        let (reload_tx, reload_rx) = tokio::sync::mpsc::channel(4);
        tokio::spawn(async move {
            use tokio::signal::unix::{SignalKind, signal};
            let (Ok(mut term), Ok(mut int), Ok(mut hup)) = (
                signal(SignalKind::terminate()),
                signal(SignalKind::interrupt()),
                signal(SignalKind::hangup()),
            ) else {
                tracing::error!(component = "daemon", "cannot install signal handlers");
                return;
            };
            let which = loop {
                tokio::select! {
                    _ = term.recv() => break "SIGTERM",
                    _ = int.recv() => break "SIGINT",
                    _ = hup.recv() => {
                        tracing::info!(component = "daemon", "SIGHUP received; reloading the configuration");
                        let _ = reload_tx.try_send(());
                    }
                }
            };
            tracing::info!(component = "daemon", "{which} received; stopping the sources");
            let _ = stop_tx.send(true);
        });
        let s = linewarden::daemon::run(cfg, stop_rx, reload_rx).await?;
        tracing::info!(
            component = "daemon",
            "stopped: {} readings accepted, {} rejected, {} subgroups checked, {} violations; archive durable to sequence {}",
            s.accepted,
            s.rejected,
            s.subgroups,
            s.violations,
            s.last_seq
        );
        Ok(())
    })
}
