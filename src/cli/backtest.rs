//! `backtest`: a candidate configuration's rules tried on the archive's readings, beside the
//! signals the record holds.

use std::path::PathBuf;

use anyhow::{Context, Result, bail};
use clap::Args;

use linewarden::archive::reader::Reader;
use linewarden::format::{sig, utc_ms};
use linewarden::rules::reading::duration_words;

use super::archive::parse_time;

#[derive(Args)]
pub(crate) struct BacktestArgs {
    /// The archive whose readings to replay.
    #[arg(long, value_name = "DIR")]
    pub(crate) archive: PathBuf,
    /// The candidate configuration (limits, subgroups, rules, severities).
    #[arg(long, value_name = "FILE")]
    pub(crate) config: PathBuf,
    /// Only these characteristics (repeat, or comma-separated); default: all of the candidate's.
    #[arg(long, value_name = "ID", value_delimiter = ',')]
    pub(crate) characteristic: Vec<String>,
    /// Only records appended at or after this time (RFC 3339).
    #[arg(long, value_name = "TIME")]
    pub(crate) since: Option<String>,
    /// Only records appended before this time.
    #[arg(long, value_name = "TIME")]
    pub(crate) until: Option<String>,
    /// Print JSON instead of the table.
    #[arg(long)]
    pub(crate) json: bool,
    /// Write every signal (record, candidate or both) as a CSV row to this file.
    #[arg(long, value_name = "FILE")]
    pub(crate) signals: Option<PathBuf>,
}

pub(crate) fn backtest_cmd(a: BacktestArgs) -> Result<()> {
    let cfg = linewarden::config::load(&a.config).map_err(|e| anyhow::anyhow!("{e}"))?;
    if !a.archive.is_dir() {
        bail!(
            "--archive {}: not an archive directory",
            a.archive.display()
        );
    }
    let since = a
        .since
        .as_deref()
        .map(|t| parse_time("--since", t))
        .transpose()?;
    let until = a
        .until
        .as_deref()
        .map(|t| parse_time("--until", t))
        .transpose()?;
    let reader = Reader::open(&a.archive)?;
    let a_config = a.config.clone();
    let bt = linewarden::backtest::run(&cfg, &reader, &a.characteristic, since, until)?;
    if let Some(path) = &a.signals {
        let mut w = csv::Writer::from_writer(Vec::new());
        w.write_record([
            "characteristic",
            "rule",
            "level",
            "subgroup",
            "reading_seq",
            "time",
            "in_record",
            "in_candidate",
        ])?;
        for s in &bt.signals {
            w.write_record([
                s.characteristic.clone(),
                s.rule.clone(),
                s.level.name().to_string(),
                s.subgroup.map_or(String::new(), |n| n.to_string()),
                if s.first_reading == u64::MAX {
                    String::new()
                } else {
                    s.first_reading.to_string()
                },
                utc_ms(s.time_ms),
                s.in_record.to_string(),
                s.in_candidate.to_string(),
            ])?;
        }
        let bytes = w.into_inner().map_err(|e| anyhow::anyhow!("{e}"))?;
        linewarden::fsutil::write_atomic(path, &bytes)
            .with_context(|| format!("cannot write {}", path.display()))?;
    }
    if a.json {
        println!("{}", serde_json::to_string_pretty(&bt)?);
        return Ok(());
    }
    let rate = |v: Option<f64>| v.map_or("—".to_string(), |v| sig(v, 3));
    if let (Some(a), Some(b)) = (bt.first_ms, bt.last_ms) {
        println!(
            "Readings from {} to {} ({}), through the candidate {}.",
            utc_ms(a),
            utc_ms(b),
            duration_words((b - a) as f64 / 1000.0),
            a_config.display()
        );
        println!();
    }
    for c in &bt.characteristics {
        println!(
            "{}: {} readings, {} subgroups under the candidate ({} in the record); rejected: {} in the record (they stay rejected), {} more by the candidate's checks",
            c.id,
            c.readings,
            c.subgroups,
            c.record_subgroups,
            c.rejected_in_record,
            c.rejected_by_candidate
        );
        println!(
            "  {:<24} {:>7} {:>9} {:>5} {:>5} {:>5} {:>10} {:>10} {:>9}",
            "rule", "record", "candidate", "kept", "new", "gone", "per 1000", "theory", "per day"
        );
        for r in &c.rules {
            let name = match r.level {
                linewarden::backtest::SignalLevel::Subgroup => r.rule.clone(),
                linewarden::backtest::SignalLevel::Reading => format!("{} (readings)", r.rule),
            };
            println!(
                "  {:<24} {:>7} {:>9} {:>5} {:>5} {:>5} {:>10} {:>10} {:>9}",
                name,
                r.record_signals,
                r.candidate_signals,
                r.kept,
                r.new,
                r.gone,
                sig(r.per_1000_subgroups, 3),
                theory_words(r.theory.as_ref()),
                rate(r.per_day)
            );
        }
        println!("  alerts   record: {}", alert_words(&c.alerts.record));
        println!("        candidate: {}", alert_words(&c.alerts.candidate));
        println!();
    }
    println!("The cell (red while any of these has a stop alert nobody has acknowledged):");
    println!("  record:    {}", alert_words(&bt.alerts.record));
    println!("  candidate: {}", alert_words(&bt.alerts.candidate));
    println!(
        "Per 1000: signals per 1,000 subgroups (per 1,000 readings for a reading rule). Theory: the rule's in-control rate on the chart it runs on, per 1,000 subgroups: exact (the beyond-limits rule on a measured characteristic counts its location and spread charts together, on an attribute chart the exact binomial or Poisson chance at the nominal size); ~ approximate (an individuals chart's moving ranges overlap); sim, simulated with a fixed seed (a run rule on counts, where ties break runs; the 95% interval is in --json); < at most (no signal in the runs simulated). The record's acknowledgements are replayed at their times."
    );
    Ok(())
}

/// The theory column: the rate at three significant digits, marked by how it was obtained.
fn theory_words(t: Option<&linewarden::rules::theory::Rate>) -> String {
    use linewarden::rules::theory::How;
    let Some(t) = t else {
        return "—".to_string();
    };
    // Three significant digits with their trailing zeros (21.0, 2.00): the figure's precision.
    let decimals = (2 - t.per_1000.abs().log10().floor() as i64).clamp(0, 9) as usize;
    let v = format!("{:.decimals$}", t.per_1000);
    match (t.how, t.at_most) {
        (_, true) => format!("< {v}"),
        (How::Exact, _) => v,
        (How::Approximate, _) => format!("~{v}"),
        (How::Simulated, _) => format!("{v} sim"),
    }
}

/// `2 stops, 5 warnings, 0 notices; 1 escalated; red 3.33 h in 2 stretches (14.1% of the window)`
fn alert_words(t: &linewarden::backtest::AlertTally) -> String {
    let lasting = |ms: i64| duration_words(ms as f64 / 1000.0);
    let plural = |n: u64, one: &str, many: &str| format!("{n} {}", if n == 1 { one } else { many });
    let mut s = format!(
        "{}, {}, {}",
        plural(t.stops, "stop", "stops"),
        plural(t.warnings, "warning", "warnings"),
        plural(t.notices, "notice", "notices")
    );
    if t.escalated > 0 {
        s.push_str(&format!("; {} escalated", t.escalated));
    }
    if t.red_episodes == 0 {
        s.push_str("; never red");
    } else {
        s.push_str(&format!(
            "; red {} in {} ({}% of the window)",
            lasting(t.red_ms),
            plural(t.red_episodes, "stretch", "stretches"),
            sig(t.red_share * 100.0, 3)
        ));
    }
    s
}
