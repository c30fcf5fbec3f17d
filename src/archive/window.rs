//! One characteristic's subgroups over a window of the archive, with the readings each was
//! formed from and the limits recorded in force: what the engineer's commands (`chart`,
//! `limits --archive`) read.

use std::collections::{BTreeSet, HashMap};
use std::path::{Path, PathBuf};

use super::reader::{Filter, Reader};
use super::record::{Record, SubgroupSummary};
use crate::limits_file::StoredLimits;
use crate::rules::Violation;
use crate::stats::Limits;

/// Which subgroups: those completed in `[since_ms, until_ms)`, then at most the `last` newest.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct Window {
    pub since_ms: Option<i64>,
    pub until_ms: Option<i64>,
    pub last: Option<usize>,
}

/// One subgroup as the daemon formed and judged it.
#[derive(Debug, Clone, PartialEq)]
pub struct ArchivedSubgroup {
    /// Sequence number of its `subgroup-result` record.
    pub seq: u64,
    pub summary: SubgroupSummary,
    /// Its readings, as archived, in the order they were taken.
    pub readings: Vec<f64>,
    /// The part of each reading, where the source named it.
    pub parts: Vec<Option<String>>,
    pub partial: bool,
    /// The limits in force when it was judged (none while learning).
    pub location: Option<Limits>,
    pub dispersion: Option<Limits>,
    pub violations: Vec<Violation>,
}

/// A characteristic's window of the archive.
#[derive(Debug, Clone, PartialEq)]
pub struct CharacteristicWindow {
    pub archive: PathBuf,
    pub characteristic: String,
    pub subgroups: Vec<ArchivedSubgroup>,
    /// The limits the archive recorded in force at the end of the window (with any approval
    /// recorded since they were installed), if any.
    pub limits: Option<StoredLimits>,
}

impl CharacteristicWindow {
    /// Sequence numbers of the first and last subgroup records.
    pub fn seq_range(&self) -> (u64, u64) {
        (
            self.subgroups.first().map_or(0, |s| s.seq),
            self.subgroups.last().map_or(0, |s| s.seq),
        )
    }

    /// Times of the first and last subgroup.
    pub fn time_range(&self) -> (i64, i64) {
        (
            self.subgroups.first().map_or(0, |s| s.summary.time_ms),
            self.subgroups.last().map_or(0, |s| s.summary.time_ms),
        )
    }
}

/// Why a window could not be read.
#[derive(Debug, thiserror::Error)]
pub enum WindowError {
    #[error(transparent)]
    Archive(#[from] super::ArchiveError),
    #[error("{dir} holds no subgroups of characteristic {id:?}{known}")]
    Unknown {
        dir: PathBuf,
        id: String,
        known: String,
    },
    #[error(
        "no subgroups of {id:?} in the window asked for ({asked}); its subgroups in the archive run from {first} to {last}"
    )]
    Empty {
        id: String,
        asked: String,
        first: String,
        last: String,
    },
}

/// Reads `id`'s subgroups in `window` from the archive at `dir`. Any damage the reader finds
/// (a record that does not check, a segment missing) is an error: a window is never partial.
pub fn read(dir: &Path, id: &str, window: &Window) -> Result<CharacteristicWindow, WindowError> {
    let reader = Reader::open(dir)?;
    let filter = Filter {
        kinds: [
            "reading-accepted",
            "subgroup-result",
            "limits-installed",
            "limits-approved",
        ]
        .map(String::from)
        .to_vec(),
        until_ms: window.until_ms.map(|t| t.saturating_add(3_600_000)),
        ..Filter::default()
    };
    let mut known: BTreeSet<String> = BTreeSet::new();
    let mut pending: HashMap<u64, (f64, Option<String>)> = HashMap::new();
    let mut subgroups: Vec<ArchivedSubgroup> = Vec::new();
    let mut all = 0usize;
    let (mut first_ms, mut last_ms) = (i64::MAX, i64::MIN);
    let mut limits: Option<StoredLimits> = None;
    let inside =
        |t: i64| window.since_ms.is_none_or(|s| t >= s) && window.until_ms.is_none_or(|u| t < u);
    for e in reader.iter(&filter) {
        let e = e?;
        match e.record {
            Record::ReadingAccepted {
                characteristic,
                value,
                part,
                ..
            } if characteristic == id => {
                pending.insert(e.seq, (value, part));
            }
            Record::SubgroupResult {
                characteristic,
                subgroup,
                readings,
                partial,
                location,
                dispersion,
                violations,
            } => {
                if characteristic != id {
                    known.insert(characteristic);
                    continue;
                }
                all += 1;
                first_ms = first_ms.min(subgroup.time_ms);
                last_ms = last_ms.max(subgroup.time_ms);
                let taken: Vec<(f64, Option<String>)> =
                    readings.iter().filter_map(|s| pending.remove(s)).collect();
                if !inside(subgroup.time_ms) {
                    continue;
                }
                subgroups.push(ArchivedSubgroup {
                    seq: e.seq,
                    summary: subgroup,
                    readings: taken.iter().map(|r| r.0).collect(),
                    parts: taken.into_iter().map(|r| r.1).collect(),
                    partial,
                    location,
                    dispersion,
                    violations,
                });
            }
            Record::LimitsInstalled {
                characteristic,
                new,
                ..
            } if characteristic == id && window.until_ms.is_none_or(|u| e.time_ms < u) => {
                limits = Some(*new);
            }
            Record::LimitsApproved {
                characteristic,
                approval,
                ..
            } if characteristic == id && window.until_ms.is_none_or(|u| e.time_ms < u) => {
                if let Some(l) = limits.as_mut() {
                    l.approved = Some(approval);
                }
            }
            _ => {}
        }
        // Readings that never joined a subgroup (discarded ones) must not pile up.
        if pending.len() > 100_000 {
            let keep_from = e.seq.saturating_sub(50_000);
            pending.retain(|s, _| *s >= keep_from);
        }
    }
    if all == 0 {
        let known = if known.is_empty() {
            String::new()
        } else {
            let list: Vec<&str> = known.iter().map(String::as_str).take(20).collect();
            format!(" (it holds subgroups of: {})", list.join(", "))
        };
        return Err(WindowError::Unknown {
            dir: dir.to_path_buf(),
            id: id.to_string(),
            known,
        });
    }
    if let Some(n) = window.last
        && subgroups.len() > n
    {
        subgroups.drain(..subgroups.len() - n);
    }
    if subgroups.is_empty() {
        let t = |ms: Option<i64>| ms.map_or("the start".to_string(), crate::format::utc_ms);
        return Err(WindowError::Empty {
            id: id.to_string(),
            asked: format!(
                "{} to {}",
                t(window.since_ms),
                window
                    .until_ms
                    .map_or("now".to_string(), crate::format::utc_ms)
            ),
            first: crate::format::utc_ms(first_ms),
            last: crate::format::utc_ms(last_ms),
        });
    }
    Ok(CharacteristicWindow {
        archive: dir.to_path_buf(),
        characteristic: id.to_string(),
        subgroups,
        limits,
    })
}
