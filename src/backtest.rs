//! Trying a rule set on history: the archived accepted readings, in their order and with their
//! times, through a candidate configuration's engine (the daemon's own code), writing nothing;
//! its signals set beside the ones the record holds, subgroup by subgroup.

use std::collections::{BTreeMap, BTreeSet, HashMap};

use serde::Serialize;

use crate::archive::reader::{Filter, Reader};
use crate::archive::record::Record;
use crate::config::Config;
use crate::engine::{Engine, Incoming, Output};
use crate::rules::arl::{ArlOptions, arl};
use crate::rules::config::RuleSet;

/// One subgroup on which one rule signalled, in the record, under the candidate, or both.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Signal {
    pub characteristic: String,
    pub rule: String,
    /// The subgroup as the candidate (else the record) numbered it.
    pub subgroup: u64,
    /// The sequence number of its first reading: what matches a subgroup across the two.
    pub first_reading: u64,
    pub time_ms: i64,
    pub in_record: bool,
    pub in_candidate: bool,
}

/// One rule of one characteristic.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct RuleResult {
    pub rule: String,
    /// Subgroups on which it signalled in the record, and under the candidate.
    pub record_signals: u64,
    pub candidate_signals: u64,
    /// Signalled in both; only under the candidate; only in the record.
    pub kept: u64,
    pub new: u64,
    pub gone: u64,
    /// The candidate's signals per 1,000 of its subgroups, and per day of the window.
    pub per_1000_subgroups: f64,
    pub per_day: Option<f64>,
    /// 1,000 / the in-control ARL of this rule alone (the `arl` machinery), when it is a rule
    /// on plotted subgroups.
    pub theoretical_per_1000: Option<f64>,
    pub first_ms: Option<i64>,
    pub last_ms: Option<i64>,
}

/// One characteristic's backtest.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct CharacteristicResult {
    pub id: String,
    /// Subgroups the candidate formed, and the record holds, in the window.
    pub subgroups: u64,
    pub record_subgroups: u64,
    pub readings: u64,
    /// Readings the record rejected (they stay rejected), and accepted ones the candidate's
    /// checks would reject.
    pub rejected_in_record: u64,
    pub rejected_by_candidate: u64,
    pub rules: Vec<RuleResult>,
}

/// The whole backtest.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Backtest {
    pub characteristics: Vec<CharacteristicResult>,
    #[serde(skip)]
    pub signals: Vec<Signal>,
}

#[derive(Debug, thiserror::Error)]
pub enum BacktestError {
    #[error(transparent)]
    Archive(#[from] crate::archive::ArchiveError),
    #[error("{0}")]
    Request(String),
}

#[derive(Default)]
struct Tally {
    readings: u64,
    rejected_in_record: u64,
    rejected_by_candidate: u64,
    record_subgroups: u64,
    subgroups: u64,
    first_ms: Option<i64>,
    last_ms: Option<i64>,
    /// (rule, first reading) → (subgroup number, time, in record, in candidate)
    signals: BTreeMap<(String, u64), (u64, i64, bool, bool)>,
}

impl Tally {
    /// Notes the rules that signalled on a subgroup (matched by its first reading), in the
    /// record or under the candidate. The candidate's numbering is the one kept.
    fn note(
        &mut self,
        subgroup: &crate::archive::record::SubgroupSummary,
        readings: &[u64],
        violations: Vec<crate::rules::Violation>,
        in_record: bool,
    ) {
        let Some(&first) = readings.first() else {
            return;
        };
        for v in violations {
            let e = self.signals.entry((v.rule, first)).or_insert((
                subgroup.number,
                subgroup.time_ms,
                false,
                false,
            ));
            if in_record {
                e.2 = true;
            } else {
                e.0 = subgroup.number;
                e.3 = true;
            }
        }
    }
}

/// Runs the backtest of `cfg`'s characteristics `ids` (all of them when empty) over the
/// archive's records appended in `[since_ms, until_ms)`.
pub fn run(
    cfg: &Config,
    reader: &Reader,
    ids: &[String],
    since_ms: Option<i64>,
    until_ms: Option<i64>,
) -> Result<Backtest, BacktestError> {
    let chosen: BTreeSet<String> = if ids.is_empty() {
        cfg.characteristics.iter().map(|c| c.id.clone()).collect()
    } else {
        for id in ids {
            if !cfg.characteristics.iter().any(|c| &c.id == id) {
                return Err(BacktestError::Request(format!(
                    "--characteristic {id:?} is not in the candidate config {} (it has: {})",
                    cfg.path.display(),
                    cfg.characteristics
                        .iter()
                        .map(|c| c.id.as_str())
                        .collect::<Vec<_>>()
                        .join(", ")
                )));
            }
        }
        ids.iter().cloned().collect()
    };
    let filter = Filter {
        since_ms,
        until_ms,
        kinds: ["reading-accepted", "reading-rejected", "subgroup-result"]
            .map(String::from)
            .to_vec(),
        ..Filter::default()
    };
    let mut engine: Option<Engine> = None;
    let mut tallies: HashMap<String, Tally> = chosen
        .iter()
        .map(|id| (id.clone(), Tally::default()))
        .collect();
    let mut next_tick = i64::MIN;
    let take = |tallies: &mut HashMap<String, Tally>, outs: Vec<Output>| {
        for o in outs {
            if let Output::Record(Record::SubgroupResult {
                characteristic,
                subgroup,
                readings,
                violations,
                ..
            }) = o
                && let Some(t) = tallies.get_mut(&characteristic)
            {
                t.subgroups += 1;
                t.note(&subgroup, &readings, violations, false);
            }
        }
    };
    for e in reader.iter(&filter) {
        let e = e?;
        match e.record {
            Record::ReadingAccepted {
                ref characteristic, ..
            } if chosen.contains(characteristic) => {
                let Some(inc) = Incoming::from_record(e.record) else {
                    continue;
                };
                let arrival_ms = inc.arrival_ms;
                let engine = engine.get_or_insert_with(|| Engine::new(cfg, arrival_ms));
                // Time moves as it did: the daemon's one-second tick, on the readings' clock.
                if arrival_ms >= next_tick {
                    let outs = engine.tick(arrival_ms);
                    take(&mut tallies, outs);
                    next_tick = arrival_ms + 1000;
                }
                let Some(t) = tallies.get_mut(&inc.characteristic) else {
                    continue;
                };
                t.readings += 1;
                let time = inc.time_ms();
                t.first_ms = Some(t.first_ms.map_or(time, |f| f.min(time)));
                t.last_ms = Some(t.last_ms.map_or(time, |l| l.max(time)));
                if engine.check(&inc).is_err() {
                    t.rejected_by_candidate += 1;
                    continue;
                }
                let outs = engine.accept(e.seq, &inc);
                take(&mut tallies, outs);
            }
            Record::ReadingRejected {
                characteristic: Some(c),
                ..
            } => {
                if let Some(t) = tallies.get_mut(&c) {
                    t.rejected_in_record += 1;
                }
            }
            Record::SubgroupResult {
                characteristic,
                subgroup,
                readings,
                violations,
                ..
            } => {
                if let Some(t) = tallies.get_mut(&characteristic) {
                    t.record_subgroups += 1;
                    t.note(&subgroup, &readings, violations, true);
                }
            }
            _ => {}
        }
    }
    if tallies.values().all(|t| t.readings == 0) {
        return Err(BacktestError::Request(format!(
            "the archive holds no accepted readings of {} in the window asked for",
            chosen.iter().cloned().collect::<Vec<_>>().join(", ")
        )));
    }
    let mut theoretical: HashMap<String, Option<f64>> = HashMap::new();
    let mut out = Backtest {
        characteristics: Vec::new(),
        signals: Vec::new(),
    };
    for id in &chosen {
        let t = tallies.remove(id).unwrap_or_default();
        let c = cfg
            .characteristics
            .iter()
            .find(|c| &c.id == id)
            .expect("chosen from the config");
        let mut rules: Vec<String> = c.rules.ids();
        for (rule, _) in t.signals.keys() {
            if !rules.contains(rule) {
                rules.push(rule.clone());
            }
        }
        let days = match (t.first_ms, t.last_ms) {
            (Some(a), Some(b)) if b > a => Some((b - a) as f64 / 86_400_000.0),
            _ => None,
        };
        let mut results = Vec::new();
        for rule in rules {
            let mut r = RuleResult {
                rule: rule.clone(),
                record_signals: 0,
                candidate_signals: 0,
                kept: 0,
                new: 0,
                gone: 0,
                per_1000_subgroups: 0.0,
                per_day: None,
                theoretical_per_1000: None,
                first_ms: None,
                last_ms: None,
            };
            for (&(ref rid, first), &(number, time, rec, cand)) in t
                .signals
                .range((rule.clone(), 0)..=(rule.clone(), u64::MAX))
            {
                r.record_signals += u64::from(rec);
                r.candidate_signals += u64::from(cand);
                match (rec, cand) {
                    (true, true) => r.kept += 1,
                    (false, true) => r.new += 1,
                    (true, false) => r.gone += 1,
                    _ => {}
                }
                r.first_ms = Some(r.first_ms.map_or(time, |f| f.min(time)));
                r.last_ms = Some(r.last_ms.map_or(time, |l| l.max(time)));
                out.signals.push(Signal {
                    characteristic: id.clone(),
                    rule: rid.clone(),
                    subgroup: number,
                    first_reading: first,
                    time_ms: time,
                    in_record: rec,
                    in_candidate: cand,
                });
            }
            if t.subgroups > 0 {
                r.per_1000_subgroups = r.candidate_signals as f64 * 1000.0 / t.subgroups as f64;
            }
            r.per_day = days.map(|d| r.candidate_signals as f64 / d);
            if let Some(one) = c.rules.rules.iter().find(|x| x.id == rule) {
                let key = serde_json::to_string(one).unwrap_or_default();
                r.theoretical_per_1000 = *theoretical.entry(key).or_insert_with(|| {
                    let set = RuleSet::new(vec![one.clone()]);
                    arl(&set, &[0.0], &ArlOptions::default())
                        .ok()
                        .and_then(|v| v.first().map(|a| 1000.0 / a.arl))
                });
            }
            results.push(r);
        }
        out.characteristics.push(CharacteristicResult {
            id: id.clone(),
            subgroups: t.subgroups,
            record_subgroups: t.record_subgroups,
            readings: t.readings,
            rejected_in_record: t.rejected_in_record,
            rejected_by_candidate: t.rejected_by_candidate,
            rules: results,
        });
    }
    out.signals.sort_by(|a, b| {
        (a.time_ms, &a.characteristic, &a.rule).cmp(&(b.time_ms, &b.characteristic, &b.rule))
    });
    Ok(out)
}
