//! `arl`: average run lengths of a rule set.

use std::path::PathBuf;

use anyhow::{Context, Result, bail};
use clap::Args;
use serde_json::json;

#[derive(Args)]
pub(crate) struct ArlArgs {
    /// A published rule set to start from.
    #[arg(long, value_enum)]
    pub(crate) preset: Option<linewarden::rules::Preset>,
    /// A TOML file with a [rules] table (preset, off, [[rules.rule]]), as in a characteristic.
    #[arg(long, value_name = "FILE", conflicts_with = "config")]
    pub(crate) rules: Option<PathBuf>,
    /// A daemon config file; the rules of --characteristic are used.
    #[arg(long, value_name = "FILE", requires = "characteristic")]
    pub(crate) config: Option<PathBuf>,
    /// The characteristic of --config whose rules to evaluate.
    #[arg(long, value_name = "ID", requires = "config")]
    pub(crate) characteristic: Option<String>,
    /// Mean shifts to evaluate, in sigmas of the plotted point.
    #[arg(
        long,
        value_delimiter = ',',
        allow_hyphen_values = true,
        default_value = "0,0.5,1,1.5,2,3"
    )]
    pub(crate) shift: Vec<f64>,
    /// Time between subgroups (e.g. 1h, 30min, 90s), to state the ARL as a time.
    #[arg(long, value_name = "DURATION")]
    pub(crate) interval: Option<String>,
    /// Simulated runs per shift, when simulation is needed.
    #[arg(long, default_value_t = 20_000)]
    pub(crate) runs: u64,
    /// Seed for the simulation.
    #[arg(long, default_value_t = 1984)]
    pub(crate) seed: u64,
    /// Print JSON instead of the table.
    #[arg(long)]
    pub(crate) json: bool,
    /// An attribute chart instead of a rule set: the beyond-limits rule's ARL from exact
    /// binomial (p, np) or Poisson (c, u) probabilities, with --p0 and --n.
    #[arg(long, value_enum, conflicts_with_all = ["preset", "rules", "config"])]
    pub(crate) chart: Option<AttributeKind>,
    /// The in-control fraction nonconforming (p, np) or defects per unit (c, u) the limits
    /// are set from.
    #[arg(long, value_name = "X", requires = "chart")]
    pub(crate) p0: Option<f64>,
    /// Parts per sample (p, np) or inspection units per sample (u; c: 1).
    #[arg(long, value_name = "N", requires = "chart")]
    pub(crate) n: Option<f64>,
    /// True fractions or rates to evaluate (default: p0 and 1.5, 2 and 3 times it).
    #[arg(long, value_delimiter = ',', value_name = "X,...", requires = "chart")]
    pub(crate) at: Vec<f64>,
}

/// An attribute chart on the command line.
#[derive(Clone, Copy, clap::ValueEnum)]
pub(crate) enum AttributeKind {
    P,
    Np,
    C,
    U,
}

/// A TOML file holding just a `[rules]` table.
#[derive(serde::Deserialize)]
#[serde(deny_unknown_fields)]
pub(crate) struct RulesFile {
    pub(crate) rules: linewarden::rules::RulesConfig,
}

pub(crate) fn arl_cmd(a: ArlArgs) -> Result<()> {
    use linewarden::rules::{RuleSet, RulesConfig};
    if let Some(kind) = a.chart {
        return attribute_arl(&a, kind);
    }
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

pub(crate) fn arl_report(a: &ArlArgs, set: &linewarden::rules::RuleSet) -> Result<()> {
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

/// `arl --chart p|np|c|u`: the beyond-limits rule on an attribute chart, exactly.
fn attribute_arl(a: &ArlArgs, kind: AttributeKind) -> Result<()> {
    use linewarden::format::sig;
    use linewarden::stats::attributes::{AttributeChart, beyond_limits_probability};
    let chart = match kind {
        AttributeKind::P => AttributeChart::P,
        AttributeKind::Np => AttributeChart::Np,
        AttributeKind::C => AttributeChart::C,
        AttributeKind::U => AttributeChart::U,
    };
    let Some(p0) = a.p0 else {
        bail!(
            "--chart {} needs --p0 (the in-control fraction or rate)",
            chart.name()
        );
    };
    let n = match (chart, a.n) {
        (AttributeChart::C, None) => 1.0,
        (_, Some(n)) => n,
        (_, None) => bail!("--chart {} needs --n (the sample size)", chart.name()),
    };
    let proportion = matches!(chart, AttributeChart::P | AttributeChart::Np);
    let usable = if proportion {
        p0 > 0.0 && p0 < 1.0
    } else {
        p0 > 0.0 && p0.is_finite()
    };
    if !usable {
        bail!(
            "--p0 {p0} is not {}",
            if proportion {
                "a fraction nonconforming between 0 and 1"
            } else {
                "a positive defect rate"
            }
        );
    }
    let limits = chart.limits(p0, n);
    let at: Vec<f64> = if a.at.is_empty() {
        [1.0, 1.5, 2.0, 3.0]
            .iter()
            .map(|k| k * p0)
            .filter(|x| !proportion || *x <= 1.0)
            .collect()
    } else {
        a.at.clone()
    };
    let mut rows = Vec::new();
    for x in &at {
        let (above, below) = beyond_limits_probability(chart, &limits, n, *x)
            .map_err(|e| anyhow::anyhow!("--at {x}: {e}"))?;
        rows.push((*x, above, below, 1.0 / (above + below)));
    }
    if a.json {
        let v = json!({
            "chart": chart.name(),
            "p0": p0,
            "n": n,
            "limits": {"lcl": limits.lcl, "center": limits.center, "ucl": limits.ucl},
            "results": rows.iter().map(|(x, up, down, arl)| json!({
                "true_value": x, "p_above": up, "p_below": down,
                "arl": if arl.is_finite() { json!(arl) } else { json!(null) },
            })).collect::<Vec<_>>(),
        });
        println!("{}", serde_json::to_string_pretty(&v)?);
        return Ok(());
    }
    let what = if proportion {
        "fraction nonconforming"
    } else {
        "defects per unit"
    };
    println!(
        "{} chart, {what} {} in control, n = {}: limits {} to {} (centre {})",
        chart.name(),
        sig(p0, 4),
        linewarden::format::num(n),
        sig(limits.lcl, 5),
        sig(limits.ucl, 5),
        sig(limits.center, 5)
    );
    println!(
        "Beyond-limits rule, exact {} probabilities.",
        if proportion { "binomial" } else { "Poisson" }
    );
    if limits.lcl == 0.0 {
        println!(
            "The lower limit falls below zero by the formula and is set to zero: no sample can signal below it."
        );
    }
    println!();
    println!(
        "  {:<12} {:>12} {:>12} {:>10}  in words",
        "true value", "P(above)", "P(below)", "ARL"
    );
    for (x, up, down, arl) in &rows {
        let words = if !arl.is_finite() {
            "never signalled: no count can fall beyond the limits".to_string()
        } else if (x - p0).abs() <= 1e-12 * p0 {
            format!("one false alarm every {}", samples(*arl))
        } else {
            format!("signalled after {} on average", samples(*arl))
        };
        println!(
            "  {:<12} {:>12} {:>12} {:>10}  {words}",
            sig(*x, 4),
            sig(*up, 4),
            sig(*down, 4),
            if arl.is_finite() {
                sig(*arl, 5)
            } else {
                "infinite".to_string()
            }
        );
    }
    Ok(())
}

/// A run length in samples, the count and the noun agreeing as printed ("1 sample" for an ARL
/// of 1.0001, which prints as 1).
fn samples(arl: f64) -> String {
    let n = linewarden::format::sig(arl, 4);
    if n == "1" {
        "1 sample".to_string()
    } else {
        format!("{n} samples")
    }
}
