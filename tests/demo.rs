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
    assert_eq!(s.rejected, 2, "the two unreadable gauge outputs");
    assert!(s.subgroups > 200);
    assert!(dir.path().join("limits/vb210-face.toml").exists());
    assert!(dir.path().join("limits/vb210-port.toml").exists());
    let r = Reader::open(&dir.path().join("archive")).unwrap();
    let mut bore_alerts = 0;
    let mut installed = 0;
    let mut stored = 0;
    let mut stops = std::collections::BTreeSet::new();
    for e in r.iter(&Filter::default()) {
        match e.unwrap().record {
            Record::Alert {
                characteristic,
                event:
                    linewarden::alerts::AlertEvent::Raised {
                        severity,
                        provisional,
                        ..
                    },
                ..
            } => {
                if severity == linewarden::rules::Severity::Stop {
                    stops.insert(characteristic.clone());
                }
                // The learning characteristics' alerts are all on provisional limits.
                if characteristic != "vb210-bore" {
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
            Record::LimitsInstalled {
                characteristic,
                new,
                reason,
                ..
            } => {
                // The bore's stored limits are recorded as read at start; the others learn.
                if characteristic == "vb210-bore" {
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
        ["vb210-bore"],
        "stop-level alerts only where the demo injects a cause"
    );
    assert!(
        bore_alerts > 10,
        "{bore_alerts} bore subgroups with violations"
    );
    assert_eq!((installed, stored), (2, 1));
}
