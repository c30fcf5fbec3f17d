//! `limits --chart p|np|c|u` and `capability --chart p|np|c|u`: attribute charts at the desk, from a
//! file of samples (a count column and a size column).

use anyhow::{Context, Result, bail};
use serde_json::json;

use linewarden::format::{fixed, fixed_pair};
use linewarden::input::{CountOptions, ParsedCounts};
use linewarden::limits_file::StoredLimits;
use linewarden::stats::attributes::{
    self, AttributeCapability, AttributeChart, AttributeStudy, DefectRate,
};

use super::study::{
    CapabilityArgs, ExcludeArgs, InputArgs, LimitsArgs, delimiter_byte, write_limits,
};

/// Reads the samples of an attribute chart from the file `input` names.
fn read_samples(input: &InputArgs, chart: AttributeChart) -> Result<ParsedCounts> {
    let name = input.input.display().to_string();
    let text = std::fs::read_to_string(&input.input)
        .with_context(|| format!("cannot read input file {name}"))?;
    let delimiter = delimiter_byte(&input.delimiter)?;
    if input.decimal_comma && delimiter == b',' {
        bail!(
            "--decimal-comma with ',' between fields cannot tell a field from a decimal; such files use ';' (--delimiter ';')"
        );
    }
    let size_column = match (&input.size_column, chart) {
        (Some(c), _) => Some(c.clone()),
        // A c chart's samples are inspection units of one size: a size column is optional.
        (None, AttributeChart::C) => None,
        (None, _) => Some("size".to_string()),
    };
    let opts = CountOptions {
        count_column: input
            .count_column
            .clone()
            .unwrap_or_else(|| "count".to_string()),
        size_column,
        proportion: matches!(chart, AttributeChart::P | AttributeChart::Np),
        delimiter,
        decimal_comma: input.decimal_comma,
    };
    Ok(linewarden::input::parse_counts(&text, &name, &opts)?)
}

/// The study of an attribute chart with the exclusions asked for.
fn run(
    chart: AttributeChart,
    parsed: &ParsedCounts,
    exclude: &ExcludeArgs,
    name: &str,
) -> Result<AttributeStudy> {
    if exclude.sigma_estimator != "auto" {
        bail!(
            "--sigma-estimator applies to measured subgroups; an attribute chart's sigma follows from its centre"
        );
    }
    attributes::study(
        chart,
        &parsed.samples,
        &exclude.exclude,
        exclude.auto_exclude,
        exclude.max_iterations,
    )
    .with_context(|| format!("{name}: the study failed"))
}

/// The size most samples have (the limits file's nominal size).
fn nominal_size(parsed: &ParsedCounts) -> usize {
    let mut sizes: Vec<u64> = parsed
        .samples
        .iter()
        .map(|s| s.size.round() as u64)
        .collect();
    sizes.sort_unstable();
    sizes
        .chunk_by(|a, b| a == b)
        .max_by_key(|c| c.len())
        .map_or(1, |c| c[0])
        .max(1) as usize
}

/// Decimals for a chart's plotted values: fractions and rates to four, counts to two.
fn decimals(chart: AttributeChart) -> usize {
    match chart {
        AttributeChart::P | AttributeChart::U => 4,
        AttributeChart::Np | AttributeChart::C => 2,
    }
}

fn chart_words(chart: AttributeChart) -> &'static str {
    match chart {
        AttributeChart::P => "p chart (fraction nonconforming)",
        AttributeChart::Np => "np chart (number nonconforming)",
        AttributeChart::C => "c chart (defects per inspection)",
        AttributeChart::U => "u chart (defects per unit)",
    }
}

/// What the process makes, from the samples used: the fraction nonconforming (p, np) or the
/// defects per unit (c, u), each with its exact interval.
enum Capability {
    Fraction(AttributeCapability),
    Rate(DefectRate),
}

fn capability(
    chart: AttributeChart,
    s: &AttributeStudy,
    parsed: &ParsedCounts,
) -> Result<Capability> {
    let used = |i: &usize| !s.excluded.iter().any(|e| e.subgroup == i + 1);
    let (x, n) = (0..parsed.samples.len())
        .filter(used)
        .fold((0.0, 0.0), |(x, n), i| {
            let sm = &parsed.samples[i];
            (x + sm.count, n + sm.size)
        });
    // Counts and (for parts) sizes are whole: checked when the file was read.
    Ok(match chart {
        AttributeChart::P | AttributeChart::Np => {
            Capability::Fraction(attributes::attribute_capability(x as u64, n as u64, 0.95)?)
        }
        AttributeChart::C | AttributeChart::U => {
            Capability::Rate(attributes::defect_rate(x as u64, n, 0.95)?)
        }
    })
}

fn capability_text(c: &Capability) -> String {
    match c {
        Capability::Fraction(f) => fraction_text(f),
        Capability::Rate(r) => format!(
            "\nCapability (attribute data: the samples used)\n  defects per unit        {} in {} units = {}, 95% exact interval (Poisson) {} to {}\n",
            r.defects,
            linewarden::format::num(r.units),
            fixed(r.rate, 4),
            fixed(r.rate_low, 4),
            fixed(r.rate_high, 4),
        ),
    }
}

fn capability_json(c: &Capability) -> serde_json::Value {
    match c {
        Capability::Fraction(f) => fraction_json(f),
        Capability::Rate(r) => json!({
            "defects": r.defects,
            "units": r.units,
            "confidence": r.confidence,
            "defects_per_unit": r.rate,
            "defects_per_unit_low": r.rate_low,
            "defects_per_unit_high": r.rate_high,
        }),
    }
}

fn fraction_text(c: &AttributeCapability) -> String {
    let pct = |p: f64| format!("{}%", fixed(100.0 * p, 2));
    let z = |v: f64| {
        if v.is_infinite() {
            "infinite".to_string()
        } else {
            fixed(v, 2)
        }
    };
    format!(
        "\nCapability (attribute data: the samples used)\n  fraction nonconforming  {} of {} = {} ({}), 95% exact interval (Clopper-Pearson) {} to {}\n  ppm                     {} (95%: {} to {})\n  equivalent normal Z     {} (95%: {} to {}); the Z a normal process would have with this fraction beyond one specification limit, Φ⁻¹(1 − p). Not a Cpk: no measurement stands behind it\n",
        c.nonconforming,
        c.inspected,
        fixed(c.fraction, 4),
        pct(c.fraction),
        pct(c.fraction_low),
        pct(c.fraction_high),
        fixed(c.ppm, 0),
        fixed(c.ppm_low, 0),
        fixed(c.ppm_high, 0),
        z(c.z),
        z(c.z_low),
        z(c.z_high),
    )
}

fn fraction_json(c: &AttributeCapability) -> serde_json::Value {
    // JSON has no infinity: no nonconforming part gives a null Z.
    let z = |v: f64| if v.is_finite() { json!(v) } else { json!(null) };
    json!({
        "nonconforming": c.nonconforming,
        "inspected": c.inspected,
        "confidence": c.confidence,
        "fraction": c.fraction,
        "fraction_low": c.fraction_low,
        "fraction_high": c.fraction_high,
        "ppm": c.ppm,
        "ppm_low": c.ppm_low,
        "ppm_high": c.ppm_high,
        "equivalent_normal_z": z(c.z),
        "equivalent_normal_z_low": z(c.z_low),
        "equivalent_normal_z_high": z(c.z_high),
    })
}

/// The samples of `input` and their study, for the picture.
pub(crate) fn study_of_file(
    input: &InputArgs,
    exclude: &ExcludeArgs,
    chart: AttributeChart,
) -> Result<(AttributeStudy, ParsedCounts)> {
    let name = input.input.display().to_string();
    let parsed = read_samples(input, chart)?;
    let s = run(chart, &parsed, exclude, &name)?;
    Ok((s, parsed))
}

/// `limits --chart p|np|c|u --input FILE`.
pub(crate) fn limits(a: &LimitsArgs, chart: AttributeChart) -> Result<()> {
    let Some(input) = &a.input else {
        bail!(
            "--chart {} reads a file of samples (--input FILE with count and size columns); for an attribute characteristic's subgroups in the archive give --archive DIR --characteristic ID without --chart",
            chart.name()
        );
    };
    let name = input.input.display().to_string();
    let parsed = read_samples(input, chart)?;
    limits_of(a, chart, &name, &parsed, "line")
}

/// `limits --archive DIR --characteristic ID` of an attribute characteristic: the subgroups
/// the daemon formed, each the count found in the units inspected.
pub(crate) fn limits_of_window(
    a: &LimitsArgs,
    win: &linewarden::archive::window::CharacteristicWindow,
) -> Result<()> {
    let Some(chart) = win.limits.as_ref().and_then(|l| l.chart.attribute()) else {
        bail!(
            "archive {}: characteristic {} has no limits in force in this window (it was learning them), so the record does not say its chart",
            win.archive.display(),
            win.characteristic
        );
    };
    let (name, parsed) = window_samples(win)?;
    limits_of(a, chart, &name, &parsed, "subgroup")
}

/// The subgroups of a window as samples (count found, units inspected), numbered by subgroup,
/// and the words that say where they came from.
fn window_samples(
    win: &linewarden::archive::window::CharacteristicWindow,
) -> Result<(String, ParsedCounts)> {
    let mut parsed = ParsedCounts {
        samples: Vec::new(),
        lines: Vec::new(),
    };
    for s in &win.subgroups {
        let (Some(count), Some(size)) = (s.summary.found, s.summary.inspected) else {
            bail!(
                "archive {}: subgroup {} of {} (record {}) holds no count and units inspected",
                win.archive.display(),
                s.summary.number,
                win.characteristic,
                s.seq
            );
        };
        parsed
            .samples
            .push(attributes::AttributeSample { count, size });
        parsed.lines.push(s.summary.number);
    }
    let (first, last) = win.time_range();
    let (x, y) = win.seq_range();
    let name = format!(
        "archive {}, characteristic {}, subgroups {} to {} completed {} to {} (records {x} to {y})",
        win.archive.display(),
        win.characteristic,
        parsed.lines.first().copied().unwrap_or(0),
        parsed.lines.last().copied().unwrap_or(0),
        linewarden::format::utc_ms(first),
        linewarden::format::utc_ms(last),
    );
    Ok((name, parsed))
}

/// The attribute study of `parsed` (read from `name`; `label` says what the numbers beside
/// each sample are: its file line, or its subgroup number in the record).
fn limits_of(
    a: &LimitsArgs,
    chart: AttributeChart,
    name: &str,
    parsed: &ParsedCounts,
    label: &str,
) -> Result<()> {
    if a.spec.lsl.is_some() || a.spec.usl.is_some() || a.spec.target.is_some() {
        bail!(
            "--lsl, --usl and --target do not apply to a {} chart: it counts nonconforming parts or defects; its capability is the fraction nonconforming",
            chart.name()
        );
    }
    if a.unit.is_some() {
        bail!(
            "--unit does not apply to a {} chart: its values are counts and fractions",
            chart.name()
        );
    }
    let s = run(chart, parsed, &a.exclude, name)?;
    if s.parameter <= 0.0 {
        bail!(
            "{name}: no nonconformities at all in {} samples: the {} chart's limits collapse to zero and every later find would signal; take a longer baseline",
            s.samples_total,
            chart.name()
        );
    }
    let nominal = nominal_size(parsed);
    let cap = capability(chart, &s, parsed)?;
    write_limits(a, |id, now| {
        StoredLimits::from_attribute_study(&s, nominal, id, name, now)
    })?;
    let plotted: Vec<f64> = parsed.samples.iter().map(|x| chart.plotted(x)).collect();
    let included = |i: usize| !s.excluded.iter().any(|e| e.subgroup == i + 1);
    if a.json {
        for w in &s.warnings {
            eprintln!("warning: {w}");
        }
        let v = json!({
            "chart": chart.name(),
            "parameter": s.parameter,
            "nominal_size": nominal,
            "samples_total": s.samples_total,
            "samples_used": s.samples_used,
            "excluded": s.excluded.iter().map(|e| json!({
                "sample": e.subgroup, label: parsed.lines[e.subgroup - 1],
                "reason": e.reason, "iteration": e.iteration,
            })).collect::<Vec<_>>(),
            "samples": (0..plotted.len()).map(|i| json!({
                "sample": i + 1, label: parsed.lines[i],
                "count": parsed.samples[i].count, "size": parsed.samples[i].size,
                "plotted": plotted[i], "center": s.limits[i].center,
                "ucl": s.limits[i].ucl, "lcl": s.limits[i].lcl,
                "included": included(i), "beyond": s.limits[i].beyond(plotted[i]),
            })).collect::<Vec<_>>(),
            "capability": capability_json(&cap),
            "warnings": s.warnings,
        });
        println!("{}", serde_json::to_string_pretty(&v)?);
        return Ok(());
    }
    print!(
        "{}",
        report_text(chart, name, parsed, &s, &cap, label, nominal)
    );
    Ok(())
}

/// The study of an attribute chart in words: the samples, the centre, the limits (the lower
/// clamped, said), the exclusions, the samples beyond, a table where sizes differ, the
/// capability and the warnings.
fn report_text(
    chart: AttributeChart,
    name: &str,
    parsed: &ParsedCounts,
    s: &AttributeStudy,
    cap: &Capability,
    label: &str,
    nominal: usize,
) -> String {
    let d = decimals(chart);
    let plotted: Vec<f64> = parsed.samples.iter().map(|x| chart.plotted(x)).collect();
    let included = |i: usize| !s.excluded.iter().any(|e| e.subgroup == i + 1);
    // Included samples still beyond the final limits (kept on request or after the last round).
    let beyond: Vec<usize> = (0..plotted.len())
        .filter(|&i| included(i) && s.limits[i].beyond(plotted[i]))
        .collect();
    let used = |i: &usize| included(*i);
    let found: f64 = (0..plotted.len())
        .filter(used)
        .map(|i| parsed.samples[i].count)
        .sum();
    let units: f64 = (0..plotted.len())
        .filter(used)
        .map(|i| parsed.samples[i].size)
        .sum();
    let mut out = String::new();
    out.push_str(&format!("Attribute study: {}\n", chart_words(chart)));
    out.push_str(&format!("  source      {name}\n"));
    out.push_str(&format!(
        "  samples     {} ({} used, {} excluded)\n",
        s.samples_total,
        s.samples_used,
        s.excluded.len()
    ));
    let centre = match chart {
        AttributeChart::P | AttributeChart::Np => format!(
            "p̄ = {} ({} nonconforming of {} inspected)",
            fixed(s.parameter, 4),
            linewarden::format::num(found),
            linewarden::format::num(units)
        ),
        AttributeChart::C => format!(
            "c̄ = {} ({} defects in {} samples)",
            fixed(s.parameter, 4),
            linewarden::format::num(found),
            s.samples_used
        ),
        AttributeChart::U => format!(
            "ū = {} defects per unit ({} defects in {} units)",
            fixed(s.parameter, 4),
            linewarden::format::num(found),
            linewarden::format::num(units)
        ),
    };
    out.push_str(&format!("  centre      {centre}\n"));
    let at = chart.limits(s.parameter, nominal as f64);
    let varies = parsed
        .samples
        .iter()
        .any(|x| x.size != parsed.samples[0].size);
    out.push_str(&format!(
        "  limits      at {nominal} unit(s): centre {}, UCL {}, LCL {}{}\n",
        fixed(at.center, d),
        fixed(at.ucl, d),
        fixed(at.lcl, d),
        if varies {
            "; each sample has the limits of its own size (below)"
        } else {
            ""
        }
    ));
    let raw_lcl = 2.0 * at.center - at.ucl;
    if at.lcl == 0.0 && raw_lcl < 0.0 {
        out.push_str(&format!(
            "              the lower limit by the formula, {}, is below zero and is set to zero: no sample can fall below it\n",
            fixed(raw_lcl, d)
        ));
    }
    for e in &s.excluded {
        out.push_str(&format!(
            "  excluded    sample {} ({label} {}): {}\n",
            e.subgroup,
            parsed.lines[e.subgroup - 1],
            e.reason
        ));
    }
    for &i in &beyond {
        let lim = s.limits[i];
        let (word, limit) = if plotted[i] > lim.ucl {
            ("above the upper", lim.ucl)
        } else {
            ("below the lower", lim.lcl)
        };
        let (v, l) = fixed_pair(plotted[i], limit, d);
        out.push_str(&format!(
            "  beyond      sample {} ({label} {}): {} {v} is {word} limit {l}, and is kept in the limits\n",
            i + 1,
            parsed.lines[i],
            chart.name()
        ));
    }
    if varies {
        out.push_str("\n  sample  {label:>8}     count      size   plotted       LCL       UCL\n");
        for (i, (&value, lim)) in plotted.iter().zip(&s.limits).enumerate() {
            out.push_str(&format!(
                "  {:>6}  {:>8}  {:>8}  {:>8}  {:>8}  {:>8}  {:>8}{}\n",
                i + 1,
                parsed.lines[i],
                linewarden::format::num(parsed.samples[i].count),
                linewarden::format::num(parsed.samples[i].size),
                fixed(value, d),
                fixed(lim.lcl, d),
                fixed(lim.ucl, d),
                if !included(i) {
                    "  excluded"
                } else if lim.beyond(value) {
                    "  beyond"
                } else {
                    ""
                }
            ));
        }
    }
    out.push_str(&capability_text(cap));
    if !s.warnings.is_empty() {
        out.push_str("\nWarnings\n");
        for w in &s.warnings {
            out.push_str(&format!("  {w}\n"));
        }
    }
    out
}

/// The study text of an attribute characteristic's window of the archive (for `report`).
pub(crate) fn window_text(
    win: &linewarden::archive::window::CharacteristicWindow,
    chart: AttributeChart,
    exclude: &ExcludeArgs,
) -> Result<String> {
    let (name, parsed) = window_samples(win)?;
    let s = run(chart, &parsed, exclude, &name)?;
    let cap = capability(chart, &s, &parsed)?;
    Ok(report_text(
        chart,
        &name,
        &parsed,
        &s,
        &cap,
        "subgroup",
        nominal_size(&parsed),
    ))
}

/// `capability --chart p|np|c|u`: the fraction nonconforming (p, np) or the defects per unit
/// (c, u) of the samples used, with its exact interval.
pub(crate) fn capability_cmd(a: &CapabilityArgs, chart: AttributeChart) -> Result<()> {
    if a.spec.lsl.is_some() || a.spec.usl.is_some() || a.spec.target.is_some() {
        bail!(
            "--lsl, --usl and --target do not apply to a {} chart: it counts nonconforming parts or defects",
            chart.name()
        );
    }
    let name = a.input.input.display().to_string();
    let parsed = read_samples(&a.input, chart)?;
    let s = run(chart, &parsed, &a.exclude, &name)?;
    let cap = capability(chart, &s, &parsed)?;
    if a.json {
        let mut v = capability_json(&cap);
        v["chart"] = json!(chart.name());
        v["samples_used"] = json!(s.samples_used);
        v["excluded"] = json!(s.excluded.iter().map(|e| e.subgroup).collect::<Vec<_>>());
        println!("{}", serde_json::to_string_pretty(&v)?);
    } else {
        print!(
            "Capability of {name}: {}, {} of {} samples used\n{}",
            chart_words(chart),
            s.samples_used,
            s.samples_total,
            capability_text(&cap)
        );
    }
    Ok(())
}
