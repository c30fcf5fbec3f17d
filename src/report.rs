//! Readable text reports of studies and capability analyses.

use std::fmt::Write as _;

use crate::format::{num, sig};
use crate::stats::Limits;
use crate::stats::capability::{Capability, Spec, Verdict};
use crate::stats::study::Study;
use crate::stats::variables::{DispersionKind, VariablesChart};

/// The chart's name as people write it.
pub fn chart_title(chart: VariablesChart) -> &'static str {
    match chart {
        VariablesChart::XbarR => "X̄-R",
        VariablesChart::XbarS => "X̄-S",
        VariablesChart::Individuals => "individuals and moving range",
    }
}

fn limits_line(out: &mut String, label: &str, l: &Limits) {
    let _ = writeln!(
        out,
        "  {label:<20} centre {:<12} UCL {:<12} LCL {}",
        num(l.center),
        num(l.ucl),
        num(l.lcl)
    );
}

/// The report of a baseline study, with capability when specs were given.
pub fn study(source: &str, s: &Study, cap: Option<(&Spec, &Capability)>) -> String {
    let mut out = String::new();
    let size = match s.subgroup_size_range {
        (a, b) if a == b => format!("subgroups of {a}"),
        (a, b) => format!(
            "subgroups of {a} to {b} (limits shown for {})",
            s.subgroup_size
        ),
    };
    let _ = writeln!(
        out,
        "Baseline study: {} chart, {size}",
        chart_title(s.chart)
    );
    let _ = writeln!(out, "  {:<24} {source}", "source");
    let _ = writeln!(
        out,
        "  {:<24} {} read, {} used, {} excluded",
        "subgroups",
        s.subgroups_total,
        s.subgroups_used,
        s.excluded.len()
    );
    let _ = writeln!(
        out,
        "  {:<24} {}, from {}",
        "spread inside subgroups",
        num(s.estimate.sigma_within),
        s.estimate.sigma_method
    );
    let _ = writeln!(
        out,
        "  {:<24} {}, the standard deviation of all {} used readings together",
        "spread of all readings",
        num(s.estimate.sigma_overall),
        s.estimate.readings
    );
    let beyond = &s.stability.beyond_trial_limits;
    let _ = writeln!(
        out,
        "  {:<24} {}",
        "stable?",
        match (beyond.is_empty(), s.stability.judged) {
            (true, true) => "no used subgroup is beyond these limits".to_string(),
            (true, false) => format!(
                "no used subgroup is beyond these limits, but {} subgroups are too few to judge (20 or more, common practice)",
                s.subgroups_used
            ),
            (false, _) => format!(
                "no: subgroup(s) {} beyond these limits",
                beyond
                    .iter()
                    .map(|n| n.to_string())
                    .collect::<Vec<_>>()
                    .join(", ")
            ),
        }
    );
    if let Some(a) = &s.autocorrelation {
        // The larger lag sets the digits, so that "beyond" or "within" reads true.
        let big = if a.lag1.abs() >= a.lag2.abs() {
            a.lag1
        } else {
            a.lag2
        };
        let digits = crate::format::pair_digits(big.abs(), a.bound, 3);
        let bound = crate::format::sig(a.bound, digits);
        let _ = writeln!(
            out,
            "  {:<24} {} {} at lag 1 and {} at lag 2, {} ±{bound} (the 95% bound for independent points)",
            "independent?",
            if a.significant {
                "no: the plotted points are autocorrelated,"
            } else {
                "no sign of dependence: autocorrelation"
            },
            crate::format::sig(a.lag1, digits),
            crate::format::sig(a.lag2, digits),
            if a.significant { "beyond" } else { "within" },
        );
    }
    let _ = writeln!(out, "\nControl limits");
    let loc_label = if s.chart == VariablesChart::Individuals {
        "individuals chart"
    } else {
        "mean chart"
    };
    limits_line(&mut out, loc_label, &s.location);
    let disp_label = match s.dispersion_kind {
        DispersionKind::Range => "range chart",
        DispersionKind::StdDev => "std-dev chart",
        DispersionKind::MovingRange => "moving-range chart",
    };
    limits_line(&mut out, disp_label, &s.dispersion);

    if !s.excluded.is_empty() {
        let _ = writeln!(out, "\nExcluded subgroups");
        for e in &s.excluded {
            let round = if e.iteration == 0 {
                "on request".to_string()
            } else {
                format!("round {}", e.iteration)
            };
            let _ = writeln!(out, "  #{:<4} {round:<11} {}", e.subgroup, e.reason);
        }
    }
    if s.trials.len() > 1 {
        let _ = writeln!(out, "\nRounds of trial limits");
        for t in &s.trials {
            let _ = writeln!(
                out,
                "  round {:<3} {:>3} subgroups  sigma {:<10} {loc_label} {} .. {}",
                t.iteration,
                t.subgroups_used,
                num(t.sigma_within),
                num(t.location.lcl),
                num(t.location.ucl)
            );
        }
    }
    if let Some((spec, c)) = cap {
        out.push('\n');
        out.push_str(&capability(spec, c));
    }
    warnings(
        &mut out,
        s.warnings
            .iter()
            .chain(cap.iter().flat_map(|(_, c)| &c.warnings)),
    );
    out
}

fn warnings<'a>(out: &mut String, list: impl Iterator<Item = &'a String>) {
    let list: Vec<_> = list.collect();
    if !list.is_empty() {
        let _ = writeln!(out, "\nWarnings");
        for w in list {
            let _ = writeln!(out, "  - {w}");
        }
    }
}

fn ci(c: Option<[f64; 2]>) -> String {
    c.map(|[lo, hi]| format!("(95% CI {} to {})", sig(lo, 3), sig(hi, 3)))
        .unwrap_or_default()
}

/// The capability section of a report.
pub fn capability(spec: &Spec, c: &Capability) -> String {
    let mut out = String::new();
    let mut specs = Vec::new();
    if let Some(l) = spec.lsl {
        specs.push(format!("LSL {}", num(l)));
    }
    if let Some(u) = spec.usl {
        specs.push(format!("USL {}", num(u)));
    }
    if let Some(t) = spec.target {
        specs.push(format!("target {}", num(t)));
    }
    let _ = writeln!(
        out,
        "Capability against {} ({} readings, mean {})",
        specs.join(", "),
        c.n,
        num(c.mean)
    );
    let row =
        |out: &mut String, name: &str, v: Option<f64>, interval: Option<[f64; 2]>, note: &str| {
            if let Some(v) = v {
                let _ = writeln!(
                    out,
                    "  {name:<5} {:<7} {:<24} {note}",
                    sig(v, 3),
                    ci(interval)
                );
            }
        };
    row(
        &mut out,
        "Cp",
        c.cp,
        c.cp_ci95,
        "from the spread inside subgroups",
    );
    row(
        &mut out,
        "Cpk",
        Some(c.cpk),
        Some(c.cpk_ci95),
        "from the spread inside subgroups",
    );
    row(&mut out, "Cpu", c.cpu, None, "");
    row(&mut out, "Cpl", c.cpl, None, "");
    let overall_note = match &c.distribution {
        Some(d) => format!(
            "from the fitted {} model's quantiles (percentile method, ISO 22514-2; bootstrap interval)",
            family_words(d.name)
        ),
        None => "from the spread of all readings".to_string(),
    };
    row(&mut out, "Pp", c.pp, c.pp_ci95, &overall_note);
    row(
        &mut out,
        "Ppk",
        Some(c.ppk),
        Some(c.ppk_ci95),
        &overall_note,
    );
    row(
        &mut out,
        "Cpm",
        c.cpm,
        None,
        "from the spread of all readings and the distance from target",
    );
    // Only the sides the specification has: a one-sided specification has no ppm on the other.
    let sides = |below: Option<f64>, above: Option<f64>, long: bool| {
        let (b, a) = if long {
            ("below the LSL", "above the USL")
        } else {
            ("below", "above")
        };
        let parts: Vec<String> = [(below, b), (above, a)]
            .into_iter()
            .filter_map(|(v, side)| v.map(|v| format!("{} ppm {side}", crate::format::ppm(v))))
            .collect();
        parts.join(" and ")
    };
    let overall = sides(c.ppm_below, c.ppm_above, true);
    let _ = match &c.distribution {
        Some(d) => writeln!(
            out,
            "  parts outside the specification, from the fitted {} model: {overall}",
            family_words(d.name),
        ),
        None => writeln!(
            out,
            "  parts outside the specification, if the readings are normal: {overall}, judged from the spread of all readings",
        ),
    };
    let _ = writeln!(
        out,
        "  judged from the spread inside subgroups instead (what the process would give without the variation between subgroups): {}",
        sides(c.ppm_below_within, c.ppm_above_within, false)
    );
    match &c.normality {
        Some(ad) => {
            let verdict = if ad.doubtful() {
                "the normal model is doubtful"
            } else {
                "no evidence against the normal model"
            };
            let _ = writeln!(
                out,
                "  normality: Anderson–Darling A² = {} (adjusted {}), p {}: {verdict}",
                sig(ad.a2, 4),
                sig(ad.a2_adjusted, 4),
                crate::format::p_words(ad.p_value)
            );
        }
        None => {
            let _ = writeln!(out, "  normality: not checked (too few readings)");
        }
    }
    if let Some(d) = &c.distribution {
        model_lines(&mut out, d);
    }
    // Each figure printed with as many digits as its comparison needs to read true.
    let (index, value, lower, head) = match c.distribution {
        Some(_) => ("Ppk", c.ppk, c.ppk_ci95[0], "verdict (percentile method)"),
        None => ("Cpk", c.cpk, c.cpk_ci95[0], "verdict"),
    };
    let (value, t) = crate::format::sig_pair_at(value, c.threshold, 3);
    let (lower, _) = crate::format::sig_pair_at(lower, c.threshold, 3);
    let _ = match c.verdict {
        Verdict::Capable => writeln!(
            out,
            "  {head}: capable: {index} {value} reaches {t}, and so does its 95% lower bound {lower}"
        ),
        Verdict::CapableUnproven => writeln!(
            out,
            "  {head}: capable but not yet proven: {index} {value} reaches {t}, but its 95% lower bound {lower} does not; collect more data"
        ),
        Verdict::NotCapable => {
            writeln!(out, "  {head}: not capable: {index} {value} is below {t}")
        }
    };
    out
}

fn family_words(key: &str) -> &'static str {
    crate::stats::distributions::Family::from_key(key)
        .map(|f| f.words())
        .unwrap_or("fitted")
}

/// The fitted model of the percentile method: parameters, quantiles, and how well each
/// candidate fitted.
fn model_lines(out: &mut String, d: &crate::stats::capability::DistributionFit) {
    let params: Vec<String> = d
        .parameters
        .iter()
        .map(|(k, v)| format!("{} {}", k.replace('_', " "), sig(*v, 4)))
        .collect();
    let how = if d.chosen_by == "named" {
        "as asked"
    } else {
        "the best fit of those tried"
    };
    let _ = writeln!(
        out,
        "  model: {} ({}), {how}; Anderson–Darling A² {} against it",
        family_words(d.name),
        params.join(", "),
        sig(d.ad_statistic, 3)
    );
    let [lo, mid, hi] = d.quantiles;
    let _ = writeln!(
        out,
        "    its 0.135% point {}, median {}, 99.865% point {}",
        sig(lo, 4),
        sig(mid, 4),
        sig(hi, 4)
    );
    let fits: Vec<String> = d
        .candidates
        .iter()
        .map(|c| match c.ad_statistic {
            Some(a) => format!("{} {}", family_words(c.name), sig(a, 3)),
            None => format!("{} not fitted", family_words(c.name)),
        })
        .collect();
    let _ = writeln!(
        out,
        "    A² of each model tried (smaller fits better): {}",
        fits.join(", ")
    );
    let _ = writeln!(out, "    intervals: {}", d.interval_method);
}

/// A standalone capability report (the `capability` command), with its warnings.
pub fn capability_report(source: &str, spec: &Spec, c: &Capability, extra: &[String]) -> String {
    let mut out = format!("Source: {source}\n");
    out.push_str(&capability(spec, c));
    warnings(&mut out, extra.iter().chain(&c.warnings));
    out
}

/// Milliseconds since 1970 as UTC RFC 3339, to the second.
fn utc(ms: i64) -> String {
    let t = std::time::UNIX_EPOCH + std::time::Duration::from_millis(ms.max(0) as u64);
    humantime::format_rfc3339_seconds(t).to_string()
}

/// `linewarden status` as text: the light, the sources, the characteristics, the alerts.
pub fn status(r: &crate::daemon::hub::StatusReport) -> String {
    let mut s = String::new();
    let up = (r.now_ms - r.started_ms).max(0) / 1000;
    let _ = writeln!(
        s,
        "linewarden {} monitoring since {} ({}h {:02}m), config {}",
        r.version,
        utc(r.started_ms),
        up / 3600,
        (up / 60) % 60,
        r.config
    );
    let _ = writeln!(s, "light: {}", r.light.name());
    let _ = writeln!(
        s,
        "archive: {} ({}), durable up to record {}",
        r.archive.dir, r.archive.state, r.archive.durable_seq
    );
    let _ = writeln!(s, "\nsources:");
    for h in &r.sources {
        let _ = writeln!(
            s,
            "  {:<24} {:<10} since {}  readings {}  rejected {}{}{}",
            h.source,
            h.state,
            utc(h.since_ms),
            h.readings,
            h.rejected,
            h.last_reading_ms
                .map(|t| format!("  last {}", utc(t)))
                .unwrap_or_default(),
            if h.detail.is_empty() {
                String::new()
            } else {
                format!("  ({})", h.detail)
            }
        );
    }
    if !r.characteristics.is_empty() {
        let _ = writeln!(s, "\ncharacteristics:");
    }
    for c in &r.characteristics {
        let fmt = |v: f64| match c.decimals {
            Some(d) => crate::format::fixed(v, d),
            None => num(v),
        };
        let last = match &c.last_subgroup {
            Some(g) => match g.attribute_words(c.decimals.unwrap_or(4)) {
                Some(words) => format!("subgroup {} {words}", g.number),
                None => format!("subgroup {} mean {} {}", g.number, fmt(g.mean), c.unit),
            },
            None => "no subgroup yet".into(),
        };
        let extra = match (c.baseline, c.limits) {
            (Some((have, need)), _) => format!("  baseline {have}/{need}"),
            (None, Some(l)) => format!(
                "  limits {} / {} / {}",
                fmt(l.lcl),
                fmt(l.center),
                fmt(l.ucl)
            ),
            _ => String::new(),
        };
        let _ = writeln!(s, "  {:<20} {:<13} {last}{extra}", c.id, c.state);
        if matches!(
            c.limits_state,
            crate::engine::LimitsState::Provisional { .. }
        ) {
            let _ = writeln!(
                s,
                "  {:<20} limits {} (approve: linewarden approve {} --by NAME)",
                "",
                c.limits_state.words(),
                c.id
            );
        }
    }
    let active: Vec<_> = r
        .alerts
        .iter()
        .filter(|a| a.status != crate::alerts::Status::Cleared)
        .collect();
    let _ = writeln!(s, "\nalerts: {} active", active.len());
    for a in active {
        let _ = writeln!(
            s,
            "  {}  {} {}  {}  raised {}{}{}",
            a.id,
            a.severity.name().to_uppercase(),
            a.status.name(),
            a.message,
            utc(a.raised_ms),
            if a.count > 1 {
                format!(", {} times", a.count)
            } else {
                String::new()
            },
            a.ack
                .as_ref()
                .map(|k| format!(", acknowledged by {}", k.by))
                .unwrap_or_default()
        );
        if a.provisional {
            let _ = writeln!(
                s,
                "      on provisional limits (learned, not yet approved){}",
                a.capped_from
                    .map(|f| format!("; the rule's own severity is {}", f.name()))
                    .unwrap_or_default()
            );
        }
        if let Some(p) = &a.reaction_plan {
            let _ = writeln!(s, "      what to check first: {p}");
        }
    }
    s
}
