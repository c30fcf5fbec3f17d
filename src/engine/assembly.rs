//! Subgroup assembly: readings of one characteristic gathered into subgroups by count, by time
//! window, or by part id, with a maximum wait after which an incomplete subgroup is evaluated
//! as it is or discarded. Pure: time comes in with each reading and each tick.

use std::collections::BTreeMap;

use serde::{Deserialize, Serialize};

use crate::archive::record::PendingReading;
use crate::config::{Grouping, OnTimeout};

/// A subgroup that is ready, or given up.
#[derive(Debug, Clone, PartialEq)]
pub enum Assembled {
    /// Readings to evaluate; `partial` when the maximum wait cut it short.
    Complete {
        readings: Vec<PendingReading>,
        partial: bool,
    },
    Discarded {
        readings: Vec<PendingReading>,
        reason: String,
    },
}

/// The assembler of one characteristic; its open readings are plain data.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Assembler {
    grouping: Grouping,
    max_wait_ms: Option<i64>,
    on_timeout: OnTimeout,
    /// The open subgroup (count and window grouping).
    open: Vec<PendingReading>,
    /// Open subgroups by part id (part grouping).
    parts: BTreeMap<String, Vec<PendingReading>>,
}

impl Assembler {
    pub fn new(grouping: Grouping, max_wait_ms: Option<i64>, on_timeout: OnTimeout) -> Self {
        Assembler {
            grouping,
            max_wait_ms,
            on_timeout,
            open: Vec::new(),
            parts: BTreeMap::new(),
        }
    }

    /// Puts back readings that were waiting before a restart, oldest first.
    pub fn restore(&mut self, pending: impl IntoIterator<Item = PendingReading>) {
        for r in pending {
            match (&self.grouping, &r.part) {
                (Grouping::Part { .. }, Some(p)) => {
                    self.parts.entry(p.clone()).or_default().push(r)
                }
                (Grouping::Part { .. }, None) => {}
                _ => self.open.push(r),
            }
        }
    }

    /// Readings waiting, oldest first.
    pub fn waiting(&self) -> Vec<&PendingReading> {
        let mut v: Vec<&PendingReading> = self
            .open
            .iter()
            .chain(self.parts.values().flatten())
            .collect();
        v.sort_by_key(|r| r.seq);
        v
    }

    /// Adds a reading; returns what it completes (a window it closes, a subgroup it fills).
    pub fn push(&mut self, r: PendingReading) -> Vec<Assembled> {
        let mut out = Vec::new();
        match self.grouping.clone() {
            Grouping::Count { size } => {
                self.open.push(r);
                if self.open.len() >= size {
                    out.push(Assembled::Complete {
                        readings: std::mem::take(&mut self.open),
                        partial: false,
                    });
                }
            }
            Grouping::Window { window_ms } => {
                if let Some(first) = self.open.first()
                    && r.time_ms >= first.time_ms + window_ms
                {
                    out.extend(self.close_window());
                }
                self.open.push(r);
            }
            Grouping::Part { size } => {
                let key = r.part.clone().unwrap_or_default();
                let group = self.parts.entry(key.clone()).or_default();
                group.push(r);
                if group.len() >= size {
                    let readings = self.parts.remove(&key).unwrap_or_default();
                    out.push(Assembled::Complete {
                        readings,
                        partial: false,
                    });
                }
            }
        }
        out
    }

    fn close_window(&mut self) -> Option<Assembled> {
        let readings = std::mem::take(&mut self.open);
        (!readings.is_empty()).then_some(Assembled::Complete {
            readings,
            partial: false,
        })
    }

    /// The earliest time at which [`Assembler::tick`] would do anything (a window closing, a
    /// maximum wait running out); None when nothing waits. Before it, a tick changes nothing.
    pub fn next_due_ms(&self) -> Option<i64> {
        let first = |g: &Vec<PendingReading>| g.first().map(|f| f.time_ms);
        let mut due: Option<i64> = None;
        let mut at = |t: i64| due = Some(due.map_or(t, |d| d.min(t)));
        if let Grouping::Window { window_ms } = self.grouping
            && let Some(f) = first(&self.open)
        {
            at(f.saturating_add(window_ms));
        }
        if let Some(wait) = self.max_wait_ms {
            if !matches!(self.grouping, Grouping::Window { .. })
                && let Some(f) = first(&self.open)
            {
                at(f.saturating_add(wait));
            }
            for g in self.parts.values() {
                if let Some(f) = first(g) {
                    at(f.saturating_add(wait));
                }
            }
        }
        due
    }

    /// Closes windows that have ended and applies the maximum wait, at time `now_ms`.
    pub fn tick(&mut self, now_ms: i64) -> Vec<Assembled> {
        let mut out = Vec::new();
        if let Grouping::Window { window_ms } = self.grouping
            && self
                .open
                .first()
                .is_some_and(|f| now_ms >= f.time_ms + window_ms)
        {
            out.extend(self.close_window());
        }
        let Some(wait) = self.max_wait_ms else {
            return out;
        };
        let expired =
            |g: &Vec<PendingReading>| g.first().is_some_and(|f| now_ms >= f.time_ms + wait);
        let mut timed_out = Vec::new();
        if expired(&self.open) && !matches!(self.grouping, Grouping::Window { .. }) {
            timed_out.push(std::mem::take(&mut self.open));
        }
        let keys: Vec<String> = self
            .parts
            .iter()
            .filter(|(_, g)| expired(g))
            .map(|(k, _)| k.clone())
            .collect();
        for k in keys {
            timed_out.push(self.parts.remove(&k).unwrap_or_default());
        }
        for readings in timed_out {
            let n = readings.len();
            out.push(match self.on_timeout {
                OnTimeout::Evaluate => Assembled::Complete {
                    readings,
                    partial: true,
                },
                OnTimeout::Discard => Assembled::Discarded {
                    readings,
                    reason: format!(
                        "only {n} reading(s) arrived within the maximum wait of {} s",
                        crate::format::num(wait as f64 / 1000.0)
                    ),
                },
            });
        }
        out
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn r(seq: u64, t: i64, part: Option<&str>) -> PendingReading {
        PendingReading {
            seq,
            value: seq as f64,
            time_ms: t,
            part: part.map(str::to_string),
            inspected: None,
        }
    }

    #[test]
    fn by_count_with_a_maximum_wait() {
        let mut a = Assembler::new(
            Grouping::Count { size: 3 },
            Some(60_000),
            OnTimeout::Evaluate,
        );
        assert!(a.push(r(1, 0, None)).is_empty());
        assert!(a.push(r(2, 1000, None)).is_empty());
        let done = a.push(r(3, 2000, None));
        assert!(
            matches!(&done[..], [Assembled::Complete { readings, partial: false }] if readings.len() == 3)
        );
        a.push(r(4, 3000, None));
        assert!(a.tick(62_999).is_empty());
        let late = a.tick(63_000);
        assert!(
            matches!(&late[..], [Assembled::Complete { readings, partial: true }] if readings.len() == 1)
        );
    }

    #[test]
    fn by_window_closes_on_the_first_later_reading_or_tick() {
        let mut a = Assembler::new(
            Grouping::Window { window_ms: 10_000 },
            None,
            OnTimeout::Evaluate,
        );
        a.push(r(1, 0, None));
        a.push(r(2, 9_999, None));
        let done = a.push(r(3, 10_000, None));
        assert!(matches!(&done[..], [Assembled::Complete { readings, .. }] if readings.len() == 2));
        let done = a.tick(20_000);
        assert!(matches!(&done[..], [Assembled::Complete { readings, .. }] if readings.len() == 1));
    }

    #[test]
    fn by_part_with_discard_on_timeout() {
        let mut a = Assembler::new(Grouping::Part { size: 2 }, Some(1000), OnTimeout::Discard);
        a.push(r(1, 0, Some("A")));
        a.push(r(2, 10, Some("B")));
        let done = a.push(r(3, 20, Some("A")));
        assert!(
            matches!(&done[..], [Assembled::Complete { readings, .. }] if readings.iter().map(|x| x.seq).collect::<Vec<_>>() == [1, 3])
        );
        let gone = a.tick(1010);
        assert!(
            matches!(&gone[..], [Assembled::Discarded { readings, .. }] if readings[0].seq == 2)
        );
    }
}
