//! `chart`: the control charts of a study from a file, or of a window of the archive, as SVG
//! or PNG.

use std::path::{Path, PathBuf};

use anyhow::{Context, Result, bail};
use clap::Args;

use linewarden::chart::Picture;

use super::study::{ArchiveWindowArgs, ExcludeArgs, InputArgs, load_and_study, read_window};

#[derive(Args)]
pub(crate) struct ChartArgs {
    /// Where to write the picture: `.svg` or `.png` (by the extension). Written whole or not
    /// at all.
    #[arg(long, short, value_name = "FILE")]
    pub(crate) output: PathBuf,
    #[command(flatten)]
    pub(crate) input: Option<InputArgs>,
    #[command(flatten)]
    pub(crate) exclude: ExcludeArgs,
    #[command(flatten)]
    pub(crate) window: ArchiveWindowArgs,
    /// The characteristic to draw (with --archive).
    #[arg(long, value_name = "ID")]
    pub(crate) characteristic: Option<String>,
    /// Add a histogram of the readings (those the limits were computed from, for a study)
    /// against the specification limits, with the fitted normal curve.
    #[arg(long)]
    pub(crate) histogram: bool,
    /// Lower specification limit, for the histogram (from the archive: default the one of the
    /// limits in force).
    #[arg(long, allow_hyphen_values = true)]
    pub(crate) lsl: Option<f64>,
    /// Upper specification limit, for the histogram.
    #[arg(long, allow_hyphen_values = true)]
    pub(crate) usl: Option<f64>,
    /// Draw the 1σ and 2σ lines (for reading zone rules by eye).
    #[arg(long)]
    pub(crate) zones: bool,
    /// Unit of the readings, for the axis (from a file; the archive's limits say it).
    #[arg(long)]
    pub(crate) unit: Option<String>,
    /// Title above the charts.
    #[arg(long)]
    pub(crate) title: Option<String>,
    /// Picture width in pixels.
    #[arg(long, default_value_t = 1000)]
    pub(crate) width: u32,
    /// Picture height in pixels.
    #[arg(long, default_value_t = 640)]
    pub(crate) height: u32,
}

#[derive(Clone, Copy, PartialEq)]
enum Format {
    Svg,
    Png,
}

fn format_of(path: &Path) -> Result<Format> {
    match path
        .extension()
        .and_then(|e| e.to_str())
        .map(str::to_ascii_lowercase)
        .as_deref()
    {
        Some("svg") => Ok(Format::Svg),
        Some("png") => Ok(Format::Png),
        _ => bail!(
            "--output {}: the picture's format is taken from the extension; use .svg or .png",
            path.display()
        ),
    }
}

/// The readings' histogram with the normal fitted to them (their mean and overall standard
/// deviation).
pub(crate) fn histogram(
    readings: &[f64],
    unit: &str,
    lsl: Option<f64>,
    usl: Option<f64>,
) -> Option<linewarden::chart::Histogram> {
    use statrs::distribution::{ContinuousCDF, Normal};
    let n = readings.len() as f64;
    let mean = readings.iter().sum::<f64>() / n;
    let sd = (readings.iter().map(|x| (x - mean).powi(2)).sum::<f64>() / (n - 1.0)).sqrt();
    let normal = Normal::new(mean, sd).ok();
    let cdf = |x: f64| normal.as_ref().map_or(f64::NAN, |d| d.cdf(x));
    let what = if unit.is_empty() {
        "reading".to_string()
    } else {
        format!("reading ({unit})")
    };
    linewarden::chart::Histogram::new(
        readings,
        &what,
        lsl,
        usl,
        normal
            .is_some()
            .then_some(("normal", &cdf as &dyn Fn(f64) -> f64)),
    )
}

pub(crate) fn chart_cmd(a: ChartArgs) -> Result<()> {
    let format = format_of(&a.output)?;
    if a.input.is_some() && a.window.archive.is_some() {
        bail!("--input and --archive: give one source of readings, not both");
    }
    if let (Some(l), Some(u)) = (a.lsl, a.usl)
        && l >= u
    {
        bail!("--lsl {l} must be below --usl {u}");
    }
    for (name, v) in [("--width", a.width), ("--height", a.height)] {
        if !(300..=8000).contains(&v) {
            bail!("{name} {v} is outside 300 to 8000 pixels");
        }
    }
    let attribute = a
        .input
        .as_ref()
        .and_then(|i| i.chart)
        .and_then(super::study::ChartArg::attribute);
    let picture = if let (Some(chart), Some(input)) = (attribute, &a.input) {
        if a.histogram || a.lsl.is_some() || a.usl.is_some() || a.unit.is_some() {
            bail!(
                "--histogram, --lsl, --usl and --unit are for measured readings; a {} chart counts",
                chart.name()
            );
        }
        let (study, parsed) = super::attribute::study_of_file(input, &a.exclude, chart)?;
        let title = a.title.clone().unwrap_or_else(|| {
            format!(
                "{} of {} ({} samples)",
                chart_words(linewarden::limits_file::ChartKind::Attribute(chart)),
                input.input.display(),
                study.samples_total
            )
        });
        Picture::of_attribute_study(&study, &parsed.samples, &title, a.zones)
    } else if let Some(dir) = &a.window.archive {
        let id = a.characteristic.as_deref().unwrap_or_default();
        let win = read_window(&a.window, dir, a.characteristic.as_deref())?;
        let unit = a
            .unit
            .clone()
            .or_else(|| win.limits.as_ref().and_then(|l| l.unit.clone()))
            .unwrap_or_default();
        let (first, last) = win.time_range();
        let title = a.title.clone().unwrap_or_else(|| {
            format!(
                "{id}: {} subgroups, {} to {}",
                win.subgroups.len(),
                linewarden::format::utc_ms(first),
                linewarden::format::utc_ms(last)
            )
        });
        let tz = jiff::tz::TimeZone::system();
        let mut p = Picture::of_window(&win, &title, &unit, a.zones, &tz);
        let counts = win.limits.as_ref().and_then(|l| l.chart.attribute());
        if let (Some(c), true) = (counts, a.histogram) {
            bail!(
                "--histogram is for measured readings; {id} is a {} chart of counts",
                c.name()
            );
        }
        if a.histogram {
            let spec = win.limits.as_ref().and_then(|l| l.spec);
            let readings: Vec<f64> = win
                .subgroups
                .iter()
                .flat_map(|s| s.readings.iter().copied())
                .collect();
            p.histogram = histogram(
                &readings,
                &unit,
                a.lsl.or(spec.and_then(|s| s.lsl)),
                a.usl.or(spec.and_then(|s| s.usl)),
            );
        }
        p
    } else if let Some(input) = &a.input {
        let (study, subgroups, _) = load_and_study(input, &a.exclude)?;
        let title = a.title.clone().unwrap_or_else(|| {
            format!(
                "{} chart of {} ({} subgroups)",
                chart_words(study.chart.into()),
                input.input.display(),
                study.subgroups_total
            )
        });
        let mut p = Picture::of_study(
            &study,
            &title,
            a.unit.as_deref().unwrap_or_default(),
            a.zones,
            None,
        );
        if a.histogram {
            p.histogram = histogram(
                &study.included_readings(&subgroups),
                a.unit.as_deref().unwrap_or_default(),
                a.lsl,
                a.usl,
            );
        }
        p
    } else {
        bail!("nothing to draw: give --input FILE (a study) or --archive DIR --characteristic ID");
    };
    let bytes = match format {
        Format::Svg => picture
            .svg(a.width, a.height)
            .map_err(|e| anyhow::anyhow!("cannot draw the chart: {e}"))?
            .into_bytes(),
        Format::Png => picture
            .png(a.width, a.height)
            .map_err(|e| anyhow::anyhow!("cannot draw the chart: {e}"))?,
    };
    linewarden::fsutil::write_atomic(&a.output, &bytes)
        .with_context(|| format!("cannot write {}", a.output.display()))?;
    eprintln!("wrote {} ({} bytes)", a.output.display(), bytes.len());
    Ok(())
}

/// The chart's name as the trade writes it.
pub(crate) fn chart_words(c: linewarden::limits_file::ChartKind) -> &'static str {
    use linewarden::limits_file::ChartKind;
    use linewarden::stats::attributes::AttributeChart;
    use linewarden::stats::variables::VariablesChart;
    match c {
        ChartKind::Variables(VariablesChart::XbarR) => "Xbar-R",
        ChartKind::Variables(VariablesChart::XbarS) => "Xbar-S",
        ChartKind::Variables(VariablesChart::Individuals) => "Individuals and moving range",
        ChartKind::Attribute(AttributeChart::P) => "p (fraction nonconforming)",
        ChartKind::Attribute(AttributeChart::Np) => "np (number nonconforming)",
        ChartKind::Attribute(AttributeChart::C) => "c (defects per inspection)",
        ChartKind::Attribute(AttributeChart::U) => "u (defects per unit)",
    }
}
