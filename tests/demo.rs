//! The README's demo, as fast as the machine allows: config/demo.toml with its replay at full
//! speed and the archive in a temporary directory. It must check subgroups, learn the two
//! characteristics without stored limits, and raise alerts on the bore after the insert wears.
//! Stop-level alerts only where a cause is injected (the bore): the regression was seven
//! stop-level alerts on the stable port depth, from learned limits 26% too tight and alerts on
//! unapproved limits at their rules' full severity.

use linewarden::archive::Record;
use linewarden::archive::reader::{Filter, Reader};

mod common;

#[test]
fn the_demo_checks_subgroups_learns_limits_and_raises_alerts() {
    let dir = tempfile::tempdir().unwrap();
    let cfg = common::demo_config(dir.path());
    let s = common::run_daemon(cfg);
    assert_eq!(
        s.rejected, 3,
        "the two unreadable gauge outputs and the leak tester's fault code"
    );
    assert!(s.subgroups > 200);
    assert!(dir.path().join("limits/vb210-face.toml").exists());
    assert!(dir.path().join("limits/vb210-port.toml").exists());
    let r = Reader::open(&dir.path().join("archive")).unwrap();
    let mut bore_alerts = 0;
    let mut installed = 0;
    let mut stored = 0;
    let mut stops = std::collections::BTreeSet::new();
    let mut leak_messages = Vec::new();
    let mut leak_subgroups = Vec::new();
    let mut leak_rejected = Vec::new();
    for e in r.iter(&Filter::default()) {
        match e.unwrap().record {
            Record::Alert {
                characteristic,
                event:
                    linewarden::alerts::AlertEvent::Raised {
                        severity,
                        provisional,
                        message,
                        parts,
                        ..
                    },
                ..
            } => {
                if characteristic == "vb210-leak" {
                    leak_messages.push(message.clone());
                    // The parts of the subgroup, for the technician to pull.
                    assert_eq!(parts.len(), 20, "{parts:?}");
                }
                if severity == linewarden::rules::Severity::Stop {
                    stops.insert(characteristic.clone());
                }
                // The learning characteristics' alerts are all on provisional limits.
                if characteristic != "vb210-bore" && characteristic != "vb210-leak" {
                    assert!(
                        provisional,
                        "{characteristic}: an alert not marked provisional"
                    );
                }
            }
            Record::SubgroupResult {
                characteristic,
                violations,
                subgroup,
                ..
            } if characteristic == "vb210-bore" && !violations.is_empty() => {
                // The insert starts to wear after part 150, in subgroup 30.
                assert!(
                    subgroup.number >= 25,
                    "false alarm at subgroup {}",
                    subgroup.number
                );
                bore_alerts += 1;
            }
            Record::SubgroupResult {
                characteristic,
                violations,
                subgroup,
                ..
            } if characteristic == "vb210-leak" => {
                assert_eq!(subgroup.inspected, Some(20.0));
                if !violations.is_empty() {
                    leak_subgroups.push(subgroup.number);
                }
            }
            Record::ReadingRejected {
                characteristic: Some(c),
                raw,
                reason,
                ..
            } if c == "vb210-leak" => leak_rejected.push((raw, reason)),
            Record::LimitsInstalled {
                characteristic,
                new,
                reason,
                ..
            } => {
                // The stored limits (bore, leak test) are recorded as read at start; the others
                // learn.
                if characteristic == "vb210-bore" || characteristic == "vb210-leak" {
                    assert!(!new.is_provisional());
                    assert!(reason.starts_with("read from the limits file"), "{reason}");
                    stored += 1;
                } else {
                    assert!(new.is_provisional());
                    installed += 1
                }
            }
            _ => {}
        }
    }
    assert_eq!(
        stops.into_iter().collect::<Vec<_>>(),
        ["vb210-bore", "vb210-leak"],
        "stop-level alerts only where the demo injects a cause"
    );
    assert!(
        bore_alerts > 10,
        "{bore_alerts} bore subgroups with violations"
    );
    assert_eq!((installed, stored), (2, 2));
    // The leak test: the fixture's seal wears after part 240 (subgroup 13 on); before it, no
    // signal. The alert says how many of how many leaked, against which limit.
    assert!(
        leak_subgroups.first().is_some_and(|&n| n >= 13),
        "{leak_subgroups:?}"
    );
    assert_eq!(
        leak_messages.len(),
        1,
        "one open alert, repeated: {leak_messages:?}"
    );
    assert!(
        leak_messages[0]
            .starts_with("3 of 20 parts nonconforming (15.0%) is above the upper limit 14.4%"),
        "{}",
        leak_messages[0]
    );
    assert_eq!(leak_rejected.len(), 1);
    assert_eq!(leak_rejected[0].0, "E17");
    assert!(
        leak_rejected[0].1.contains(
            "\"E17\" is neither a conforming word (\"PASS\") nor a nonconforming one (\"LEAK\")"
        ),
        "{}",
        leak_rejected[0].1
    );
}
