//! `limits` and `capability`: baseline studies from CSV files.

use std::path::PathBuf;

use anyhow::{Context, Result, bail};
use clap::{Args, ValueEnum};
use serde_json::json;

use linewarden::input::{self, InputOptions, Layout};
use linewarden::limits_file::{StoredLimits, valid_id};
use linewarden::report;
use linewarden::stats::capability::{self, Capability, Spec};
use linewarden::stats::study::{self, Study, StudyOptions};
use linewarden::stats::variables::{SigmaEstimator, VariablesChart};

#[derive(Clone, Copy, ValueEnum)]
pub(crate) enum ChartArg {
    XbarR,
    XbarS,
    Individuals,
    /// Fraction nonconforming (count and size columns).
    P,
    /// Number nonconforming at a constant size.
    Np,
    /// Defects per inspection unit.
    C,
    /// Defects per unit, sizes may vary.
    U,
}

impl ChartArg {
    /// The variables chart, when it names one.
    pub(crate) fn variables(self) -> Option<VariablesChart> {
        match self {
            ChartArg::XbarR => Some(VariablesChart::XbarR),
            ChartArg::XbarS => Some(VariablesChart::XbarS),
            ChartArg::Individuals => Some(VariablesChart::Individuals),
            _ => None,
        }
    }

    /// The attribute chart, when it names one.
    pub(crate) fn attribute(self) -> Option<linewarden::stats::attributes::AttributeChart> {
        use linewarden::stats::attributes::AttributeChart;
        match self {
            ChartArg::P => Some(AttributeChart::P),
            ChartArg::Np => Some(AttributeChart::Np),
            ChartArg::C => Some(AttributeChart::C),
            ChartArg::U => Some(AttributeChart::U),
            _ => None,
        }
    }
}

#[derive(Args)]
pub(crate) struct InputArgs {
    /// CSV file with the readings.
    #[arg(long, value_name = "FILE")]
    pub(crate) input: PathBuf,
    /// wide: a row per subgroup; long: subgroup and value columns; single: a reading per row.
    #[arg(long, value_enum, default_value = "wide")]
    pub(crate) layout: Layout,
    /// Column(s) holding readings, by header name (wide: several, comma-separated; long and
    /// single: one). Long layout default: "value".
    #[arg(long, value_name = "NAME", value_delimiter = ',')]
    pub(crate) value_column: Vec<String>,
    /// Column holding the subgroup key (long layout).
    #[arg(long, value_name = "NAME", default_value = "subgroup")]
    pub(crate) subgroup_column: String,
    /// Consecutive readings per subgroup (single layout).
    #[arg(long, value_name = "N")]
    pub(crate) subgroup_size: Option<usize>,
    /// Field separator: one character, or `tab` (also `\t`), `semicolon`, `comma`.
    #[arg(long, default_value = ",", value_name = "CHAR")]
    pub(crate) delimiter: String,
    /// Readings use a decimal comma (`12,0026`), as semicolon-separated spreadsheet exports
    /// in many countries do.
    #[arg(long)]
    pub(crate) decimal_comma: bool,
    /// Chart to estimate sigma with. Default: individuals for single readings, X̄-R for
    /// subgroups up to 10, X̄-S above. p, np, c, u: an attribute chart, whose file has a row
    /// per sample with a count column and a size column (limits and capability).
    #[arg(long, value_enum)]
    pub(crate) chart: Option<ChartArg>,
    /// Attribute charts: the column with the count found (nonconforming parts or defects).
    /// Default: "count".
    #[arg(long, value_name = "NAME")]
    pub(crate) count_column: Option<String>,
    /// Attribute charts: the column with the units inspected. Default: "size" (a c chart
    /// needs none).
    #[arg(long, value_name = "NAME")]
    pub(crate) size_column: Option<String>,
}

#[derive(Args)]
pub(crate) struct SpecArgs {
    /// Lower specification limit.
    #[arg(long, allow_hyphen_values = true)]
    pub(crate) lsl: Option<f64>,
    /// Upper specification limit.
    #[arg(long, allow_hyphen_values = true)]
    pub(crate) usl: Option<f64>,
    /// Nominal (target) value, for Cpm.
    #[arg(long, allow_hyphen_values = true)]
    pub(crate) target: Option<f64>,
    /// Cpk a capable process must reach.
    #[arg(long, default_value_t = capability::DEFAULT_THRESHOLD)]
    pub(crate) capable_at: f64,
    /// Pp, Ppk and ppm by the percentile method (ISO 22514-2) from a fitted model: normal,
    /// lognormal, weibull, box-cox, or best (the smallest Anderson–Darling statistic).
    #[arg(long, value_name = "NAME")]
    pub(crate) distribution: Option<String>,
}

#[derive(Args)]
pub(crate) struct ExcludeArgs {
    /// Subgroups (numbered from 1 in file order) to leave out, for known assignable causes.
    #[arg(long, value_name = "LIST", value_delimiter = ',')]
    pub(crate) exclude: Vec<usize>,
    /// Exclude subgroups beyond the trial limits and recompute until none remain.
    #[arg(long)]
    pub(crate) auto_exclude: bool,
    /// Cap on rounds of automatic exclusion.
    #[arg(long, default_value_t = 10)]
    pub(crate) max_iterations: usize,
    /// How sigma is estimated from the subgroups: auto (the chart's published estimator),
    /// mean-range or burr-weighted-range (X̄-R), mean-sd or pooled-sd (X̄-S). They differ only
    /// when subgroup sizes vary.
    #[arg(long, value_name = "NAME", default_value = "auto")]
    pub(crate) sigma_estimator: String,
}

#[derive(Args)]
pub(crate) struct LimitsArgs {
    #[command(flatten)]
    pub(crate) input: Option<InputArgs>,
    #[command(flatten)]
    pub(crate) window: ArchiveWindowArgs,
    #[command(flatten)]
    pub(crate) exclude: ExcludeArgs,
    #[command(flatten)]
    pub(crate) spec: SpecArgs,
    /// Store the limits in this file (written atomically).
    #[arg(long, value_name = "FILE", requires = "characteristic")]
    pub(crate) write: Option<PathBuf>,
    /// Identifier of the characteristic the limits belong to (with --archive, also the one
    /// whose subgroups are read).
    #[arg(long, value_name = "ID")]
    pub(crate) characteristic: Option<String>,
    /// With --write: the engineer who approves these limits, recorded in the file's
    /// `[approved]` table (and in the archive when the daemon loads them).
    #[arg(long, value_name = "NAME", requires = "write")]
    pub(crate) approved_by: Option<String>,
    /// With --approved-by: a note on the approval (why the limits were reset, say).
    #[arg(long, value_name = "TEXT", requires = "approved_by")]
    pub(crate) approval_note: Option<String>,
    /// Unit of the readings, recorded in the limits file (with --archive, default: the unit of
    /// the limits in force).
    #[arg(long)]
    pub(crate) unit: Option<String>,
    /// Print JSON instead of the report.
    #[arg(long)]
    pub(crate) json: bool,
}

#[derive(Args)]
pub(crate) struct CapabilityArgs {
    #[command(flatten)]
    pub(crate) input: InputArgs,
    #[command(flatten)]
    pub(crate) exclude: ExcludeArgs,
    #[command(flatten)]
    pub(crate) spec: SpecArgs,
    /// Print JSON instead of the report.
    #[arg(long)]
    pub(crate) json: bool,
}

/// The byte a `--delimiter` value names.
pub(crate) fn delimiter_byte(given: &str) -> Result<u8> {
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
pub(crate) fn load_and_study(
    input: &InputArgs,
    exclude: &ExcludeArgs,
) -> Result<(Study, Vec<Vec<f64>>, Vec<String>)> {
    let name = input.input.display().to_string();
    if let Some(a) = input.chart.and_then(ChartArg::attribute) {
        bail!(
            "--chart {}: this command reads measured subgroups; for an attribute chart use linewarden limits, chart or capability with --chart {}",
            a.name(),
            a.name()
        );
    }
    if input.count_column.is_some() || input.size_column.is_some() {
        bail!("--count-column and --size-column are for attribute charts (--chart p, np, c or u)");
    }
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
    let s = run_study(
        &parsed.subgroups,
        input.chart.and_then(ChartArg::variables),
        exclude,
        &name,
    )?;
    Ok((s, parsed.subgroups, parsed.warnings))
}

/// The baseline study of `subgroups` (read from `name`) with the chart given, or the one their
/// sizes call for.
pub(crate) fn run_study(
    subgroups: &[Vec<f64>],
    chart: Option<VariablesChart>,
    exclude: &ExcludeArgs,
    name: &str,
) -> Result<Study> {
    let chart = chart.unwrap_or_else(|| match subgroups.iter().map(Vec::len).max().unwrap_or(1) {
        1 => VariablesChart::Individuals,
        2..=10 => VariablesChart::XbarR,
        _ => VariablesChart::XbarS,
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
    study::run(subgroups, &options).with_context(|| format!("{name}: the study failed"))
}

/// Where a study's subgroups come from when they are the daemon's own: a window of the
/// archive.
#[derive(Args)]
pub(crate) struct ArchiveWindowArgs {
    /// Take the subgroups the daemon formed (their readings, as archived) from this archive
    /// directory instead of a file; the characteristic is --characteristic.
    #[arg(long, value_name = "DIR", conflicts_with = "input")]
    pub(crate) archive: Option<PathBuf>,
    /// Only subgroups completed at or after this time (RFC 3339, e.g. 2026-12-01T06:00:00Z).
    #[arg(long, value_name = "TIME", requires = "archive")]
    pub(crate) since: Option<String>,
    /// Only subgroups completed before this time.
    #[arg(long, value_name = "TIME", requires = "archive")]
    pub(crate) until: Option<String>,
    /// Only the newest N subgroups of the window.
    #[arg(long, value_name = "N", requires = "archive")]
    pub(crate) last: Option<usize>,
}

impl ArchiveWindowArgs {
    /// `--since` in ms (None when absent or not a time: [`read_window`] reports that).
    pub(crate) fn since_ms(&self) -> Option<i64> {
        let t = self.since.as_deref()?;
        super::archive::parse_time("--since", t).ok()
    }

    /// `--until` in ms.
    pub(crate) fn until_ms(&self) -> Option<i64> {
        let t = self.until.as_deref()?;
        super::archive::parse_time("--until", t).ok()
    }
}

/// Reads the window of the archive the arguments name, for characteristic `id`.
pub(crate) fn read_window(
    a: &ArchiveWindowArgs,
    dir: &std::path::Path,
    id: Option<&str>,
) -> Result<linewarden::archive::window::CharacteristicWindow> {
    use super::archive::parse_time;
    let Some(id) = id else {
        bail!("--archive needs --characteristic ID: the characteristic whose subgroups to read");
    };
    if a.last == Some(0) {
        bail!("--last 0 takes no subgroups; give the number of newest subgroups to take");
    }
    if !dir.is_dir() {
        bail!("--archive {}: not an archive directory", dir.display());
    }
    let w = linewarden::archive::window::Window {
        since_ms: a
            .since
            .as_deref()
            .map(|t| parse_time("--since", t))
            .transpose()?,
        until_ms: a
            .until
            .as_deref()
            .map(|t| parse_time("--until", t))
            .transpose()?,
        last: a.last,
    };
    if let (Some(s), Some(u)) = (w.since_ms, w.until_ms)
        && s >= u
    {
        bail!(
            "--since {} is not before --until {}",
            a.since.as_deref().unwrap_or_default(),
            a.until.as_deref().unwrap_or_default()
        );
    }
    Ok(linewarden::archive::window::read(dir, id, &w)?)
}

/// The study of a window of the archive: the subgroups' readings as archived, on the chart of
/// the limits in force (or the one their sizes call for). Returns the study, its subgroups and
/// the source words for the limits file's provenance.
pub(crate) fn study_of_window(
    win: &linewarden::archive::window::CharacteristicWindow,
    exclude: &ExcludeArgs,
) -> Result<(Study, Vec<Vec<f64>>, String)> {
    let subgroups: Vec<Vec<f64>> = win.subgroups.iter().map(|s| s.readings.clone()).collect();
    if let Some(s) = win
        .subgroups
        .iter()
        .find(|s| s.readings.len() != s.summary.n)
    {
        bail!(
            "archive {}: subgroup {} of {} lists {} readings but {} of them are in the archive (record {}); the archive is incomplete there",
            win.archive.display(),
            s.summary.number,
            win.characteristic,
            s.summary.n,
            s.readings.len(),
            s.seq
        );
    }
    let (first, last) = win.time_range();
    let (a, b) = win.seq_range();
    let source = format!(
        "archive {}, characteristic {}, subgroups {} to {} completed {} to {} (records {a} to {b})",
        win.archive.display(),
        win.characteristic,
        win.subgroups[0].summary.number,
        win.subgroups[win.subgroups.len() - 1].summary.number,
        linewarden::format::utc_ms(first),
        linewarden::format::utc_ms(last),
    );
    let chart = match win.limits.as_ref().map(|l| l.chart) {
        Some(linewarden::limits_file::ChartKind::Attribute(a)) => bail!(
            "characteristic {} is an attribute characteristic ({} chart): its subgroups are counts, not measured readings",
            win.characteristic,
            a.name()
        ),
        _ if win.subgroups.iter().any(|s| s.summary.found.is_some()) => bail!(
            "characteristic {} is an attribute characteristic with no limits in force in this window (it was learning them), so the record does not say its chart; take a window after its limits were learned",
            win.characteristic
        ),
        Some(linewarden::limits_file::ChartKind::Variables(v)) => Some(v),
        None => None,
    };
    let s = run_study(&subgroups, chart, exclude, &source)?;
    Ok((s, subgroups, source))
}

pub(crate) fn spec_of(a: &SpecArgs) -> Result<Option<Spec>> {
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

pub(crate) fn capability_of(
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

/// With `--write FILE --characteristic ID`: the limits `make(id, now)` gives, with the approval
/// `--approved-by` asks for, written to the file.
pub(crate) fn write_limits(
    a: &LimitsArgs,
    make: impl FnOnce(&str, &str) -> StoredLimits,
) -> Result<()> {
    let (Some(path), Some(id)) = (&a.write, &a.characteristic) else {
        return Ok(());
    };
    let now = humantime::format_rfc3339_seconds(std::time::SystemTime::now()).to_string();
    let mut stored = make(id, &now);
    if let Some(by) = &a.approved_by {
        if by.trim().is_empty() {
            bail!("--approved-by is empty; give the name of the engineer who approves the limits");
        }
        stored.approved = Some(linewarden::limits_file::Approval {
            by: by.trim().to_string(),
            at: now.clone(),
            note: a.approval_note.clone(),
        });
    }
    stored.write(path)?;
    eprintln!("wrote limits for {id} to {}", path.display());
    Ok(())
}

pub(crate) fn limits(a: LimitsArgs) -> Result<()> {
    if let Some(id) = &a.characteristic
        && !valid_id(id)
    {
        bail!(
            "--characteristic {id:?} is not a valid identifier; use letters, digits, '-', '_' and '.'"
        );
    }
    if let Some(chart) = a
        .input
        .as_ref()
        .and_then(|i| i.chart)
        .and_then(ChartArg::attribute)
    {
        return super::attribute::limits(&a, chart);
    }
    let spec = spec_of(&a.spec)?;
    let mut unit = a.unit.clone();
    let (s, subgroups, mut warnings, source) = match (&a.input, &a.window.archive) {
        (Some(_), Some(_)) => bail!("--input and --archive: give one source of readings, not both"),
        (Some(input), None) => {
            let (s, subgroups, warnings) = load_and_study(input, &a.exclude)?;
            (s, subgroups, warnings, input.input.display().to_string())
        }
        (None, Some(dir)) => {
            let win = read_window(&a.window, dir, a.characteristic.as_deref())?;
            if win
                .limits
                .as_ref()
                .is_some_and(|l| l.chart.attribute().is_some())
                || win.subgroups.iter().any(|s| s.summary.found.is_some())
            {
                return super::attribute::limits_of_window(&a, &win);
            }
            if unit.is_none() {
                unit = win.limits.as_ref().and_then(|l| l.unit.clone());
            }
            let (s, subgroups, source) = study_of_window(&win, &a.exclude)?;
            (s, subgroups, Vec::new(), source)
        }
        (None, None) => bail!(
            "no readings: give --input FILE, or --archive DIR --characteristic ID for the subgroups the daemon formed"
        ),
    };
    let cap = match &spec {
        Some(spec) => Some(capability_of(&s, &subgroups, spec, &a.spec)?),
        None => None,
    };
    write_limits(&a, |id, now| {
        StoredLimits::from_study(&s, id, unit.clone(), spec, &source, now)
    })?;
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

pub(crate) fn capability_cmd(a: CapabilityArgs) -> Result<()> {
    if let Some(chart) = a.input.chart.and_then(ChartArg::attribute) {
        return super::attribute::capability_cmd(&a, chart);
    }
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

pub(crate) fn study_json(s: &Study) -> serde_json::Value {
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

pub(crate) fn capability_json(c: &Capability) -> serde_json::Value {
    let mut v = serde_json::to_value(c).unwrap_or(serde_json::Value::Null);
    // Keep the documented keys present even where an index does not apply.
    for key in ["cp", "cpm", "cp_ci95", "ppm_below", "ppm_above"] {
        if v.get(key).is_none() {
            v[key] = serde_json::Value::Null;
        }
    }
    v
}
