//! `archive verify|export|stats`: reading the record.

use std::path::PathBuf;

use anyhow::{Context, Result, bail};
use clap::{Subcommand, ValueEnum};

use super::nearest;

#[derive(Subcommand)]
pub(crate) enum ArchiveCommand {
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
pub(crate) enum ExportFormat {
    Csv,
    Jsonl,
}

/// Each characteristic's unit, as its readings or its limits in the archive give it, for CSV
/// rows whose record carries none.
pub(crate) fn archived_units(
    dir: &std::path::Path,
) -> Result<std::collections::HashMap<String, String>> {
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
pub(crate) fn archived_characteristics(
    dir: &std::path::Path,
) -> Result<std::collections::BTreeSet<String>> {
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

pub(crate) fn parse_time(option: &str, t: &str) -> Result<i64> {
    let st = humantime::parse_rfc3339_weak(t)
        .with_context(|| format!("{option} {t:?} is not a time such as 2026-12-01T06:00:00Z"))?;
    Ok(st
        .duration_since(std::time::UNIX_EPOCH)
        .map(|d| d.as_millis() as i64)
        .unwrap_or(0))
}

pub(crate) fn format_ms(ms: i64) -> String {
    let t = std::time::UNIX_EPOCH + std::time::Duration::from_millis(ms.max(0) as u64);
    humantime::format_rfc3339_millis(t).to_string()
}

pub(crate) fn archive_cmd(a: ArchiveCommand) -> Result<()> {
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
            for u in &r.unreadable {
                println!("  UNREADABLE: {u}");
            }
            if !r.unreadable.is_empty() {
                println!(
                    "  {} intact record(s) cannot be read by this build: their bytes are those written (CRC and chain hold), and every reader skips them (docs: the archive, unreadable records)",
                    r.unreadable.len()
                );
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
            let unreadable = r.unreadable();
            if !unreadable.is_empty() {
                eprintln!(
                    "linewarden: {} intact record(s) this build cannot read were skipped (sequence {}); `archive verify` names them",
                    unreadable.len(),
                    linewarden::limits_file::ranges(
                        &unreadable.iter().map(|s| *s as usize).collect::<Vec<_>>()
                    )
                );
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
pub(crate) const CSV_COLUMNS: [&str; 20] = [
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
pub(crate) fn csv_row(
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
