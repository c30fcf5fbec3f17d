//! `report`: one self-contained HTML file about a characteristic over a window of the archive,
//! to hand to an auditor or a customer: the specification, the limits in force and where they
//! came from, the charts, the study and capability of the window, every alert's life, the
//! rejected readings, and the archive's own check, tied to its chain hash.

use std::collections::BTreeMap;
use std::fmt::Write as _;
use std::path::PathBuf;

use anyhow::{Context, Result, bail};
use clap::Args;

use linewarden::alerts::AlertEvent;
use linewarden::archive::reader::{self, Filter, Reader};
use linewarden::archive::record::Record;
use linewarden::chart::Picture;
use linewarden::format::{fixed, local_ms};
use linewarden::stats::capability::Spec;

use super::chart::histogram;
use super::study::{
    ArchiveWindowArgs, ExcludeArgs, InputArgs, SpecArgs, capability_of, load_and_study,
    read_window, study_of_window,
};

#[derive(Args)]
pub(crate) struct ReportArgs {
    /// Where to write the report (HTML, one file, nothing outside it). Written whole or not
    /// at all.
    #[arg(long, short, value_name = "FILE")]
    pub(crate) output: PathBuf,
    #[command(flatten)]
    pub(crate) input: Option<InputArgs>,
    #[command(flatten)]
    pub(crate) window: ArchiveWindowArgs,
    /// The characteristic the report is about (required with --archive; with --input, names
    /// the study's characteristic in the config).
    #[arg(long, value_name = "ID")]
    pub(crate) characteristic: Option<String>,
    /// The daemon's config, for the plant and cell names, the characteristic's name, unit and
    /// specification, and the plant's time zone.
    #[arg(long, value_name = "FILE")]
    pub(crate) config: Option<PathBuf>,
    #[command(flatten)]
    pub(crate) exclude: ExcludeArgs,
    #[command(flatten)]
    pub(crate) spec: SpecArgs,
}

use linewarden::format::html as esc;

/// One alert's life, from its records.
#[derive(Default)]
struct Life {
    rule: String,
    severity: String,
    raised_ms: i64,
    message: String,
    repeats: u64,
    acknowledged: Vec<(i64, String, Option<String>)>,
    escalated: Vec<i64>,
    gone_ms: Option<i64>,
    cleared_ms: Option<i64>,
}

pub(crate) fn report_cmd(a: ReportArgs) -> Result<()> {
    let ext = a.output.extension().and_then(|e| e.to_str()).unwrap_or("");
    if !ext.eq_ignore_ascii_case("html") && !ext.eq_ignore_ascii_case("htm") {
        bail!(
            "--output {}: the report is one HTML file; name it .html",
            a.output.display()
        );
    }
    if a.input.is_some() && a.window.archive.is_some() {
        bail!("--input and --archive: give one source of readings, not both");
    }
    let cfg = match &a.config {
        Some(p) => Some(
            linewarden::config::load(p)
                .map_err(|e| anyhow::anyhow!("{e}"))
                .with_context(|| format!("--config {}", p.display()))?,
        ),
        None => None,
    };
    if let Some(input) = &a.input {
        return report_file(&a, input, cfg.as_ref());
    }
    let Some(dir) = a.window.archive.clone() else {
        bail!(
            "nothing to report on: give --archive DIR --characteristic ID (a window of the record) or --input FILE (a study)"
        );
    };
    let Some(id) = a.characteristic.as_deref() else {
        bail!("--archive needs --characteristic ID: the characteristic the report is about");
    };
    let ch = cfg
        .as_ref()
        .and_then(|c| c.characteristics.iter().find(|c| c.id == id).cloned());
    if let (Some(c), None) = (&cfg, &ch) {
        bail!(
            "--characteristic {id:?} is not in {} (it has: {})",
            c.path.display(),
            c.characteristics
                .iter()
                .map(|c| c.id.as_str())
                .collect::<Vec<_>>()
                .join(", ")
        );
    }
    let tz = cfg
        .as_ref()
        .map_or_else(jiff::tz::TimeZone::system, |c| c.tz());
    let win = read_window(&a.window, &dir, Some(id))?;
    let limits = win.limits.clone();
    let unit = ch
        .as_ref()
        .map(|c| c.unit.clone())
        .or_else(|| limits.as_ref().and_then(|l| l.unit.clone()))
        .unwrap_or_default();
    let name = ch
        .as_ref()
        .map_or_else(|| id.to_string(), |c| c.name.clone());
    // The specification: given on the command line, else the config's, else the limits'.
    let spec: Option<Spec> = match super::study::spec_of(&a.spec)? {
        Some(s) => Some(s),
        None => ch
            .as_ref()
            .and_then(|c| c.spec)
            .or_else(|| limits.as_ref().and_then(|l| l.spec)),
    };
    let (first_ms, last_ms) = win.time_range();
    let mut picture = Picture::of_window(
        &win,
        &format!("{name} ({id})"),
        &unit,
        ch.as_ref().is_some_and(|c| c.rules.has_zone_rules()),
        &tz,
    );
    let attribute = limits.as_ref().and_then(|l| l.chart.attribute());
    let (study_text, svg, d, caption) = match attribute {
        // An attribute characteristic: the counts' study and the chart of its fraction (or
        // count, or rate), no histogram, no specification.
        Some(chart) => {
            if super::study::spec_of(&a.spec)?.is_some() {
                bail!(
                    "--lsl, --usl and --target do not apply to {id}, a {} chart of counts",
                    chart.name()
                );
            }
            let text = super::attribute::window_text(&win, chart, &a.exclude)?;
            let svg = charts_svg(&mut picture, &[], "", None)?;
            (
                text,
                svg,
                4,
                "Points of every violation in red, each rule named where it starts to fire; each point has the limits of its own number of units inspected.".to_string(),
            )
        }
        None => {
            let (study, subgroups, source) = study_of_window(&win, &a.exclude)?;
            let cap = match &spec {
                Some(s) => Some(capability_of(&study, &subgroups, s, &a.spec)?),
                None => None,
            };
            let text = linewarden::report::study(&source, &study, spec.as_ref().zip(cap.as_ref()));
            // The charts, with the histogram of the window's readings.
            let readings: Vec<f64> = subgroups.iter().flatten().copied().collect();
            let svg = charts_svg(&mut picture, &readings, &unit, spec)?;
            let d = linewarden::format::decimals_for(study.estimate.sigma_within / 6.0).max(3);
            (
                text,
                svg,
                d,
                format!(
                    "Points of every violation in red, each rule named where it starts to fire; the histogram holds the window's {} readings with the normal fitted to them.",
                    readings.len()
                ),
            )
        }
    };
    let spec = if attribute.is_some() { None } else { spec };

    // Alerts and rejected readings in the window, and the archive's own check.
    let reader = Reader::open(&dir)?;
    let (a_ms, b_ms) = (first_ms, last_ms + 1);
    let window_filter = Filter {
        since_ms: a.window.since_ms(),
        until_ms: a.window.until_ms(),
        kinds: vec!["alert".into(), "reading-rejected".into()],
        ..Filter::default()
    };
    let mut lives: BTreeMap<String, Life> = BTreeMap::new();
    let mut rejected: BTreeMap<String, u64> = BTreeMap::new();
    for e in reader.iter(&window_filter) {
        let e = e?;
        if a.window.last.is_some() && (e.time_ms < a_ms || e.time_ms >= b_ms + 1000) {
            continue;
        }
        match e.record {
            Record::Alert {
                alert_id,
                characteristic,
                event,
            } if characteristic == id => {
                let l = lives.entry(alert_id).or_default();
                match event {
                    AlertEvent::Raised {
                        rule,
                        severity,
                        message,
                        at_ms,
                        ..
                    } => {
                        l.rule = rule;
                        l.severity = severity.name().to_string();
                        l.message = message;
                        l.raised_ms = at_ms;
                    }
                    AlertEvent::Repeated { .. } => l.repeats += 1,
                    AlertEvent::Gone { at_ms, .. } => l.gone_ms = Some(at_ms),
                    AlertEvent::Acknowledged {
                        by, note, at_ms, ..
                    } => l.acknowledged.push((at_ms, by, note)),
                    AlertEvent::Cleared { at_ms, .. } => l.cleared_ms = Some(at_ms),
                    AlertEvent::Escalated { at_ms, .. } => l.escalated.push(at_ms),
                    _ => {}
                }
            }
            Record::ReadingRejected {
                characteristic,
                reason,
                ..
            } if characteristic.as_deref().is_none_or(|c| c == id) => {
                // The reason without the value itself, so that the same cause counts once.
                let key = reason
                    .split(':')
                    .next()
                    .unwrap_or(&reason)
                    .trim()
                    .to_string();
                *rejected.entry(key).or_default() += 1;
            }
            _ => {}
        }
    }
    let verify = reader::verify(&dir)?;
    let chain = reader.segments().iter().rev().find_map(|s| {
        s.seal
            .as_ref()
            .map(|seal| (seal.segment, seal.chain.clone()))
    });

    let t = |ms: i64| esc(&local_ms(ms, &tz));
    let mut h = String::new();
    let plant = cfg
        .as_ref()
        .and_then(|c| c.plant.clone())
        .unwrap_or_default();
    let cell = cfg
        .as_ref()
        .and_then(|c| c.cell.clone())
        .unwrap_or_default();
    let generated = now_words(&tz);
    h.push_str(&page_head(
        &format!("Process control report: {name} ({id})"),
        &plant,
        &cell,
        &format!(
            "Window: {} to {} ({} subgroups). Made {} by linewarden {}.",
            t(first_ms),
            t(last_ms),
            win.subgroups.len(),
            esc(&generated),
            env!("CARGO_PKG_VERSION")
        ),
    ));

    // The characteristic and its specification.
    let f = |v: Option<f64>| v.map_or("—".to_string(), linewarden::format::num);
    let _ = writeln!(
        h,
        "<h2>Characteristic</h2><table><tr><th>Identifier</th><td>{}</td><th>Name</th><td>{}</td></tr><tr><th>Unit</th><td>{}</td><th>Specification</th><td>LSL {} · target {} · USL {}</td></tr></table>",
        esc(id),
        esc(&name),
        esc(if unit.is_empty() { "—" } else { &unit }),
        f(spec.and_then(|s| s.lsl)),
        f(spec.and_then(|s| s.target)),
        f(spec.and_then(|s| s.usl)),
    );

    // The limits in force at the end of the window.
    h.push_str("<h2>Limits in force</h2>\n");
    match &limits {
        None => h.push_str("<p>No limits were in force: the daemon was still learning them.</p>\n"),
        Some(l) => {
            let standing = match (&l.approved, l.provenance.provisional) {
                (Some(ap), _) => format!(
                    "approved by {} at {}{}",
                    esc(&ap.by),
                    esc(&ap.at),
                    ap.note
                        .as_ref()
                        .map_or(String::new(), |n| format!(": {}", esc(n)))
                ),
                (None, true) => {
                    "PROVISIONAL: learned by the daemon, not yet approved by an engineer".into()
                }
                (None, false) => "stored from a baseline study".into(),
            };
            let _ = writeln!(
                h,
                "<table><tr><th>Chart</th><td>{chart}, subgroups of {n}</td></tr>\
                 <tr><th>Location</th><td>centre {c} · UCL {u} · LCL {lo}</td></tr>\
                 <tr><th>{sigma_words}</th><td>{s} ({m})</td></tr>\
                 <tr><th>Computed</th><td>{at}, from {src}; {used} of {total} subgroups used ({which})</td></tr>\
                 <tr><th>Standing</th><td>{standing}</td></tr></table>",
                chart = esc(super::chart::chart_words(l.chart)),
                sigma_words = if l.chart.attribute().is_some() {
                    "Sigma of a point"
                } else {
                    "Sigma within"
                },
                n = l.subgroup_size,
                c = fixed(l.location.center, d),
                u = fixed(l.location.ucl, d),
                lo = fixed(l.location.lcl, d),
                s = fixed(l.sigma.within, d + 1),
                m = esc(&l.sigma.method),
                at = esc(&l.provenance.computed_at),
                src = esc(&l.provenance.source),
                used = l.provenance.subgroups_used,
                total = l.provenance.subgroups_total,
                which = esc(&l.provenance.used),
            );
        }
    }

    let _ = write!(
        h,
        "<h2>Control charts</h2><div class=\"charts\">{svg}</div>\n<p class=\"meta\">{}</p>\n",
        esc(&caption)
    );
    let _ = write!(
        h,
        "<h2>Study and capability of this window</h2>\n<p class=\"meta\">The window's subgroups studied as a baseline (the same figures as <code>linewarden limits --archive</code>).</p><pre>{}</pre>\n",
        esc(&study_text)
    );

    h.push_str("<h2>Alerts</h2>\n");
    if lives.is_empty() {
        h.push_str("<p>No alerts on this characteristic in the window.</p>\n");
    } else {
        h.push_str("<table><tr><th>Alert</th><th>Raised</th><th>What</th><th>Acknowledged</th><th>Ended</th></tr>\n");
        for (aid, l) in &lives {
            let acks = if l.acknowledged.is_empty() {
                "not acknowledged".to_string()
            } else {
                l.acknowledged
                    .iter()
                    .map(|(ms, by, note)| {
                        format!(
                            "{} by {}{}",
                            t(*ms),
                            esc(by),
                            note.as_ref()
                                .map_or(String::new(), |n| format!(": “{}”", esc(n)))
                        )
                    })
                    .collect::<Vec<_>>()
                    .join("<br>")
            };
            let ended = match (l.cleared_ms, l.gone_ms) {
                (Some(c), _) => format!("cleared {}", t(c)),
                (None, Some(g)) => format!("condition gone {}, not cleared", t(g)),
                (None, None) => "open at the end of the window".into(),
            };
            let escalated = if l.escalated.is_empty() {
                String::new()
            } else {
                format!(
                    "<br>escalated {}",
                    l.escalated
                        .iter()
                        .map(|ms| t(*ms))
                        .collect::<Vec<_>>()
                        .join(", ")
                )
            };
            let _ = writeln!(
                h,
                "<tr><td>{}<br>{} · {}</td><td>{}</td><td>{}{}</td><td>{}</td><td>{}{}</td></tr>",
                esc(aid),
                esc(&l.rule),
                esc(&l.severity),
                t(l.raised_ms),
                esc(&l.message),
                if l.repeats > 0 {
                    format!(" (again {} times)", l.repeats)
                } else {
                    String::new()
                },
                acks,
                ended,
                escalated
            );
        }
        h.push_str("</table>\n");
    }

    h.push_str("<h2>Rejected readings</h2>\n");
    if rejected.is_empty() {
        h.push_str("<p>No reading for this characteristic (or naming none) was rejected in the window.</p>\n");
    } else {
        h.push_str("<table><tr><th>Reason</th><th>Readings</th></tr>\n");
        for (reason, n) in &rejected {
            let _ = writeln!(h, "<tr><td>{}</td><td>{n}</td></tr>", esc(reason));
        }
        h.push_str("</table>\n");
    }

    let (sa, sb) = win.seq_range();
    let _ = writeln!(
        h,
        "<h2>The record</h2><table>\
         <tr><th>Archive</th><td>{dir}</td></tr>\
         <tr><th>This report's subgroups</th><td>records {sa} to {sb}</td></tr>\
         <tr><th>Check of the whole archive</th><td>{verdict}: {segs} segments ({sealed} sealed), {records} records, the last numbered {last}</td></tr>\
         <tr><th>Chain hash</th><td><code>{chain}</code></td></tr></table>",
        dir = esc(&dir.display().to_string()),
        verdict = if verify.problems.is_empty() {
            "intact".to_string()
        } else {
            format!(
                "{} PROBLEMS: {}",
                verify.problems.len(),
                esc(&verify.problems.join("; "))
            )
        },
        segs = verify.segments,
        sealed = verify.sealed,
        records = verify.records,
        last = verify.last_seq,
        chain = chain.map_or("no sealed segment yet".to_string(), |(seg, c)| format!(
            "{} (after segment {seg})",
            esc(&c)
        )),
    );
    h.push_str("</body></html>\n");
    write_report(&a.output, &h)
}

/// The charts with the readings' histogram under them, as SVG that scales to the page.
fn charts_svg(
    picture: &mut Picture,
    readings: &[f64],
    unit: &str,
    spec: Option<Spec>,
) -> Result<String> {
    picture.histogram = histogram(
        readings,
        unit,
        spec.and_then(|s| s.lsl),
        spec.and_then(|s| s.usl),
    );
    let svg = picture
        .svg(1000, 900)
        .map_err(|e| anyhow::anyhow!("cannot draw the charts: {e}"))?;
    Ok(if svg.contains("viewBox") {
        svg
    } else {
        svg.replacen("<svg ", "<svg viewBox=\"0 0 1000 900\" ", 1)
    })
}

/// Writes the report whole or not at all.
fn write_report(path: &std::path::Path, html: &str) -> Result<()> {
    linewarden::fsutil::write_atomic(path, html.as_bytes())
        .with_context(|| format!("cannot write {}", path.display()))?;
    eprintln!("wrote {} ({} bytes)", path.display(), html.len());
    Ok(())
}

/// The document's start: its style (A4 or Letter from a browser's print), title and header.
fn page_head(title: &str, plant: &str, cell: &str, meta: &str) -> String {
    format!(
        r#"<!DOCTYPE html>
<html lang="en"><head><meta charset="utf-8">
<title>{title}</title>
<style>
@page {{ margin: 14mm 12mm; }}
body {{ font-family: "DejaVu Sans", Arial, sans-serif; font-size: 10pt; color: #1e1e1e; margin: 0 auto; max-width: 186mm; }}
h1 {{ font-size: 15pt; margin: 0 0 2mm; }}
h2 {{ font-size: 12pt; margin: 6mm 0 2mm; border-bottom: 1px solid #999; break-after: avoid; }}
table {{ border-collapse: collapse; width: 100%; }}
th, td {{ text-align: left; vertical-align: top; padding: 1mm 2mm; border-bottom: 1px solid #ddd; }}
th {{ background: #f0f0f0; }}
pre {{ font-size: 8pt; white-space: pre-wrap; word-break: break-word; }}
svg {{ width: 100%; height: auto; }}
.meta {{ color: #555; }}
.charts, tr {{ break-inside: avoid; page-break-inside: avoid; }}
</style></head><body>
<header><h1>{title}</h1>
<p class="meta">{plantcell}{meta}</p></header>
"#,
        title = esc(title),
        plantcell = if plant.is_empty() && cell.is_empty() {
            String::new()
        } else {
            format!("{} · {}<br>", esc(plant), esc(cell))
        },
    )
}

fn now_words(tz: &jiff::tz::TimeZone) -> String {
    local_ms(
        std::time::SystemTime::now()
            .duration_since(std::time::UNIX_EPOCH)
            .map_or(0, |d| d.as_millis() as i64),
        tz,
    )
}

/// A report on a study from a file: the study, its limits and capability, the charts and the
/// histogram (no record: no alerts, rejections or archive check apply).
fn report_file(
    a: &ReportArgs,
    input: &InputArgs,
    cfg: Option<&linewarden::config::Config>,
) -> Result<()> {
    let ch = match (cfg, a.characteristic.as_deref()) {
        (Some(c), Some(id)) => Some(
            c.characteristics
                .iter()
                .find(|c| c.id == id)
                .cloned()
                .with_context(|| {
                    format!("--characteristic {id:?} is not in {}", c.path.display())
                })?,
        ),
        _ => None,
    };
    let tz = cfg.map_or_else(jiff::tz::TimeZone::system, |c| c.tz());
    let spec: Option<Spec> = match super::study::spec_of(&a.spec)? {
        Some(s) => Some(s),
        None => ch.as_ref().and_then(|c| c.spec),
    };
    let (study, subgroups, mut warnings) = load_and_study(input, &a.exclude)?;
    let cap = match &spec {
        Some(s) => Some(capability_of(&study, &subgroups, s, &a.spec)?),
        None => None,
    };
    let source = input.input.display().to_string();
    warnings.extend(study.warnings.iter().cloned());
    let study_text = linewarden::report::study(&source, &study, spec.as_ref().zip(cap.as_ref()));
    let unit = ch.as_ref().map(|c| c.unit.clone()).unwrap_or_default();
    let name = ch
        .as_ref()
        .map_or_else(|| source.clone(), |c| format!("{} ({})", c.name, c.id));
    let mut picture = Picture::of_study(&study, &name, &unit, false, None);
    let readings = study.included_readings(&subgroups);
    let svg = charts_svg(&mut picture, &readings, &unit, spec)?;
    let mut h = page_head(
        &format!("Baseline study report: {name}"),
        cfg.and_then(|c| c.plant.as_deref()).unwrap_or_default(),
        cfg.and_then(|c| c.cell.as_deref()).unwrap_or_default(),
        &format!(
            "Study of {} subgroups from {}. Made {} by linewarden {}.",
            study.subgroups_total,
            esc(&source),
            esc(&now_words(&tz)),
            env!("CARGO_PKG_VERSION")
        ),
    );
    let _ = write!(
        h,
        "<h2>Control charts</h2><div class=\"charts\">{svg}</div>\n<p class=\"meta\">Subgroups beyond the final limits in red, excluded ones hollow; the histogram holds the {} readings the limits were computed from, with the normal fitted to them.</p>\n<h2>Study and capability</h2><pre>{}</pre>\n",
        readings.len(),
        esc(&study_text)
    );
    let input_warnings = &warnings[..warnings.len() - study.warnings.len()];
    if !input_warnings.is_empty() {
        h.push_str("<h2>Warnings about the input</h2><ul>\n");
        for w in input_warnings {
            let _ = writeln!(h, "<li>{}</li>", esc(w));
        }
        h.push_str("</ul>\n");
    }
    h.push_str("<p class=\"meta\">From a file: there are no alerts, rejected readings or archive check to report; a report on a window of the archive has them.</p>\n</body></html>\n");
    write_report(&a.output, &h)
}
