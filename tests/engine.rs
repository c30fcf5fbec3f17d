//! The engine of a cell, driven as the daemon drives it: readings archived then accepted,
//! ticks, learning, and a restart rebuilt from the archive's tail.

use std::path::Path;

use linewarden::archive::record::{Envelope, Record, Tail};
use linewarden::config;
use linewarden::engine::{Engine, Incoming, Output};

mod common;

const T0: i64 = 1_796_112_000_000;

/// A tiny stand-in for the archive: numbers records and keeps the tail.
struct Log {
    seq: u64,
    tail: Tail,
    records: Vec<Envelope>,
}

impl Log {
    fn new() -> Self {
        Log {
            seq: 0,
            tail: Tail::new(30),
            records: Vec::new(),
        }
    }
    fn append(&mut self, r: Record) -> u64 {
        self.seq += 1;
        let e = Envelope {
            v: 1,
            seq: self.seq,
            time_ms: T0,
            record: r,
        };
        self.tail.apply(&e);
        self.records.push(e);
        self.seq
    }
}

/// Feeds one reading through check, archive and engine; returns the violations' rule ids.
fn feed(engine: &mut Engine, log: &mut Log, c: &str, v: f64, t: i64) -> Vec<String> {
    let inc = Incoming {
        source: "test".into(),
        characteristic: c.into(),
        value: v,
        unit: Some("mm".into()),
        source_time_ms: Some(t),
        source_time_ignored: false,
        arrival_ms: t,
        part: None,
        source_key: None,
        word: None,
        inspected: None,
        sent: None,
    };
    if let Err(reason) = engine.check(&inc) {
        log.append(Record::ReadingRejected {
            source: inc.source.clone(),
            characteristic: Some(c.into()),
            raw: v.to_string(),
            reason,
            arrival_ms: t,
            source_key: None,
        });
        return vec!["rejected".into()];
    }
    let seq = log.append(inc.record());
    let mut fired = Vec::new();
    for o in engine.accept(seq, &inc) {
        match o {
            Output::Record(r) => {
                log.append(r);
            }
            Output::Violation { violation, .. } => fired.push(violation.rule),
            _ => {}
        }
    }
    fired
}

fn config_with_limits(dir: &Path) -> config::Config {
    std::fs::write(dir.join("bore.toml"), common::BORE_LIMITS).unwrap();
    let text = r#"
[daemon]
archive_dir = "archive"

[[characteristic]]
id = "bore"
unit = "mm"
limits = "bore.toml"
valid_min = 11.0
valid_max = 13.0
subgroup = { size = 4 }
spec = { lsl = 11.985, usl = 12.015 }
[characteristic.rules]
preset = "western-electric"
[[characteristic.rules.rule]]
kind = "outside-spec"
"#;
    let path = dir.join("cell.toml");
    std::fs::write(&path, text).unwrap();
    config::load(&path).unwrap()
}

#[test]
fn readings_form_subgroups_and_rules_fire() {
    let dir = tempfile::tempdir().unwrap();
    let cfg = config_with_limits(dir.path());
    let mut e = Engine::new(&cfg, T0);
    let mut log = Log::new();
    assert_eq!(feed(&mut e, &mut log, "bore", 20.0, T0), ["rejected"]);
    assert_eq!(feed(&mut e, &mut log, "nope", 12.0, T0), ["rejected"]);
    // A bad part is flagged at once.
    assert_eq!(feed(&mut e, &mut log, "bore", 12.016, T0), ["outside-spec"]);
    for i in 1..4 {
        feed(&mut e, &mut log, "bore", 12.0, T0 + i);
    }
    // One subgroup far above the UCL: the mean of 4 readings at 12.008.
    let mut fired = Vec::new();
    for i in 0..4 {
        fired.extend(feed(&mut e, &mut log, "bore", 12.008, T0 + 10 + i));
    }
    assert_eq!(fired, ["beyond-limits"]);
    let results: Vec<&Envelope> = log
        .records
        .iter()
        .filter(|r| matches!(r.record, Record::SubgroupResult { .. }))
        .collect();
    assert_eq!(results.len(), 2);
    if let Record::SubgroupResult {
        readings,
        violations,
        subgroup,
        ..
    } = &results[1].record
    {
        assert_eq!(readings.len(), 4);
        assert_eq!(subgroup.number, 2);
        assert!(
            violations[0].message.starts_with(
                "subgroup mean 12.0080 mm is above the upper control limit 12.0060 mm"
            ),
            "{}",
            violations[0].message
        );
    }
}

#[test]
fn a_run_that_starts_before_a_restart_fires_after_it() {
    let dir = tempfile::tempdir().unwrap();
    let cfg = config_with_limits(dir.path());
    let mut e = Engine::new(&cfg, T0);
    let mut log = Log::new();
    // 7 subgroups a little above the centre (inside all other rules), then a restart.
    let mut t = T0;
    for _ in 0..7 {
        for v in [12.0005, 12.0010, 12.0008, 12.0003] {
            t += 1000;
            assert!(feed(&mut e, &mut log, "bore", v, t).is_empty());
        }
    }
    // Two readings of the 8th subgroup arrive before the restart.
    feed(&mut e, &mut log, "bore", 12.0006, t + 1);
    feed(&mut e, &mut log, "bore", 12.0009, t + 2);
    drop(e);
    let mut e = Engine::new(&cfg, t + 10);
    let logs = e.restore(&log.tail);
    assert!(logs.iter().any(|o| matches!(o, Output::Log { message, .. } if message.contains("resumed at subgroup 7 with 2 reading(s) waiting"))), "{logs:?}");
    feed(&mut e, &mut log, "bore", 12.0004, t + 20);
    let fired = feed(&mut e, &mut log, "bore", 12.0007, t + 21);
    assert_eq!(fired, ["one-side-run"], "8 in a row across the restart");
}

#[test]
fn a_characteristic_without_limits_learns_them() {
    let dir = tempfile::tempdir().unwrap();
    let text = r#"
[daemon]
archive_dir = "archive"
[[characteristic]]
id = "face"
unit = "mm"
limits = "face.toml"
subgroup = { size = 3 }
learning = { subgroups = 20 }
[characteristic.rules]
preset = "nelson"
"#;
    let path = dir.path().join("cell.toml");
    std::fs::write(&path, text).unwrap();
    let cfg = config::load(&path).unwrap();
    let mut e = Engine::new(&cfg, T0);
    assert_eq!(e.characteristics(), [("face".to_string(), true)]);
    let mut log = Log::new();
    let mut outputs = Vec::new();
    let mut x = 0.37f64;
    for i in 0..60 {
        x = (x * 3.7 + 0.11).fract(); // deterministic spread
        let inc = Incoming {
            source: "t".into(),
            characteristic: "face".into(),
            value: 5.0 + x * 0.01,
            unit: None,
            source_time_ms: Some(T0 + i),
            source_time_ignored: false,
            arrival_ms: T0 + i,
            part: None,
            source_key: None,
            word: None,
            inspected: None,
            sent: None,
        };
        let seq = log.append(inc.record());
        outputs.extend(e.accept(seq, &inc));
    }
    let learned = outputs.iter().find_map(|o| match o {
        Output::WriteLimits { path, limits } => Some((path.clone(), limits.clone())),
        _ => None,
    });
    let (p, limits) = learned.expect("limits are learned after 20 subgroups");
    assert_eq!(p, dir.path().join("face.toml"));
    assert_eq!(limits.provenance.source, "learning");
    assert_eq!(limits.provenance.subgroups_total, 20);
    assert!(
        outputs
            .iter()
            .any(|o| matches!(o, Output::Record(Record::LimitsInstalled { .. })))
    );
    assert_eq!(e.characteristics(), [("face".to_string(), false)]);

    // The limits file was never written (as when its directory is read-only): a restart
    // installs the learned limits from the archive instead of learning again, and tries to
    // write the file once more.
    for o in &outputs {
        if let Output::Record(r) = o {
            log.append(r.clone());
        }
    }
    assert!(!dir.path().join("face.toml").exists());
    let mut again = Engine::new(&cfg, T0 + 1000);
    assert_eq!(again.characteristics(), [("face".to_string(), true)]);
    let restored = again.restore(&log.tail);
    assert_eq!(again.characteristics(), [("face".to_string(), false)]);
    assert!(
        restored
            .iter()
            .any(|o| matches!(o, Output::WriteLimits { .. }))
    );
    assert!(
        restored
            .iter()
            .any(|o| matches!(o, Output::Log { message, .. }
        if message.contains("from the archive") && message.contains("face.toml")))
    );
    // Pointed at a new file name, the characteristic learns afresh.
    std::fs::write(&path, text.replace("face.toml", "face-2.toml")).unwrap();
    let renamed = config::load(&path).unwrap();
    let mut fresh = Engine::new(&renamed, T0 + 2000);
    fresh.restore(&log.tail);
    assert_eq!(fresh.characteristics(), [("face".to_string(), true)]);
}

/// Feeds `n` readings of a stable pattern then `shifted` readings far above it; returns every
/// output, the records appended to `log`.
fn feed_face(e: &mut Engine, log: &mut Log, from: i64, n: i64, level: f64) -> Vec<Output> {
    let mut outputs = Vec::new();
    let mut x = 0.37f64;
    for i in from..from + n {
        x = (x * 3.7 + 0.11).fract();
        let inc = Incoming {
            source: "t".into(),
            characteristic: "face".into(),
            value: level + x * 0.01,
            unit: None,
            source_time_ms: Some(T0 + i * 1000),
            source_time_ignored: false,
            arrival_ms: T0 + i * 1000,
            part: Some(format!("P{i}")),
            source_key: None,
            word: None,
            inspected: None,
            sent: None,
        };
        let seq = log.append(inc.record());
        let out = e.accept(seq, &inc);
        for o in &out {
            if let Output::Record(r) = o {
                log.append(r.clone());
            }
        }
        outputs.extend(out);
    }
    outputs
}

fn raised(
    outputs: &[Output],
) -> Vec<(
    String,
    linewarden::rules::Severity,
    bool,
    Option<linewarden::rules::Severity>,
)> {
    use linewarden::alerts::AlertEvent;
    outputs
        .iter()
        .filter_map(|o| match o {
            Output::Record(Record::Alert {
                alert_id,
                event:
                    AlertEvent::Raised {
                        severity,
                        provisional,
                        capped_from,
                        ..
                    },
                ..
            }) => Some((alert_id.clone(), *severity, *provisional, *capped_from)),
            _ => None,
        })
        .collect()
}

/// The regression: alerts on limits the daemon learned, with nobody having looked at them,
/// were stop-level and said nothing of it. They are now held at the configured cap and say
/// "provisional" until an engineer approves the limits; the approval is recorded (who, when),
/// written to the file, survives a restart that could not rewrite the file, and from then on
/// alerts take their rules' own severities.
#[test]
fn alerts_on_unapproved_learned_limits_are_capped_and_approval_lifts_the_cap() {
    use linewarden::engine::{ApproveError, LimitsState};
    use linewarden::rules::Severity;
    let dir = tempfile::tempdir().unwrap();
    let text = r#"
[daemon]
archive_dir = "archive"
[[characteristic]]
id = "face"
unit = "mm"
limits = "face.toml"
subgroup = { size = 3 }
learning = { subgroups = 20 }
[characteristic.rules]
preset = "western-electric"
"#;
    let path = dir.path().join("cell.toml");
    std::fs::write(&path, text).unwrap();
    let cfg = config::load(&path).unwrap();
    let mut e = Engine::new(&cfg, T0);
    let mut log = Log::new();
    // Approval before there is anything to approve is refused, with the progress.
    assert!(matches!(
        e.approve("face", "R. Okafor", None, T0),
        Err(ApproveError::Learning {
            have: 0,
            need: 20,
            ..
        })
    ));
    let learned = feed_face(&mut e, &mut log, 0, 60, 5.0);
    let limits = learned
        .iter()
        .find_map(|o| match o {
            Output::WriteLimits { limits, .. } => Some(limits.clone()),
            _ => None,
        })
        .expect("learned");
    assert!(limits.is_provisional());
    assert!(limits.to_toml().contains("provisional = true"));
    assert!(
        limits
            .to_toml()
            .contains("linewarden approve face --by NAME")
    );
    assert!(matches!(
        e.view_of("face").unwrap().limits,
        LimitsState::Provisional {
            cap: Severity::Warn,
            ..
        }
    ));
    // A big shift: beyond-limits (stop by its rule) is raised at warn, marked provisional.
    let shifted = feed_face(&mut e, &mut log, 60, 6, 5.2);
    let r = raised(&shifted);
    let beyond = r
        .iter()
        .find(|(id, ..)| id.contains("beyond-limits-up"))
        .expect("beyond-limits raised");
    assert_eq!(
        (beyond.1, beyond.2, beyond.3),
        (Severity::Warn, true, Some(Severity::Stop))
    );
    let alert = e.alerts().by_characteristic["face"]
        .iter()
        .find(|a| a.id == beyond.0)
        .unwrap()
        .clone();
    let words =
        linewarden::daemon::outputs::plain_words(&alert, "mm", Some(4), &jiff::tz::TimeZone::UTC);
    assert!(words.contains("PROVISIONAL"), "{words}");
    assert!(
        words.contains("held at warn") && words.contains("its rule says stop"),
        "{words}"
    );

    // Approval: checked text, recorded with who and when, written to the file.
    assert!(matches!(
        e.approve("face", "line\nforged", None, T0),
        Err(ApproveError::BadText(_))
    ));
    assert!(matches!(
        e.approve("fcae", "R. Okafor", None, T0),
        Err(ApproveError::Unknown(_))
    ));
    let at = T0 + 100_000;
    let out = e
        .approve(
            "face",
            "R. Okafor",
            Some("checked against the setup sheet"),
            at,
        )
        .unwrap();
    let approval = out
        .iter()
        .find_map(|o| match o {
            Output::Record(Record::LimitsApproved { approval, file, .. }) => {
                assert_eq!(
                    file.as_deref(),
                    Some(dir.path().join("face.toml").to_str().unwrap())
                );
                Some(approval.clone())
            }
            _ => None,
        })
        .expect("the approval is archived");
    assert_eq!(approval.by, "R. Okafor");
    assert_eq!(approval.at, linewarden::format::utc_ms(at));
    let written = out
        .iter()
        .find_map(|o| match o {
            Output::WriteLimits { limits, .. } => Some(limits.clone()),
            _ => None,
        })
        .expect("the file is rewritten");
    assert!(!written.is_provisional());
    let reread = linewarden::limits_file::StoredLimits::parse(&written.to_toml(), "face.toml")
        .expect("an approved file parses");
    assert_eq!(
        reread.approved.as_ref().map(|a| a.by.as_str()),
        Some("R. Okafor")
    );
    assert!(matches!(
        e.approve("face", "Someone Else", None, at),
        Err(ApproveError::Already { .. })
    ));
    for o in &out {
        if let Output::Record(r) = o {
            log.append(r.clone());
        }
    }
    // The next firing takes the rule's own severity: a new alert, not a repeat of the
    // provisional one.
    let after = feed_face(&mut e, &mut log, 66, 30, 5.0);
    let after = [after, feed_face(&mut e, &mut log, 96, 6, 5.2)].concat();
    let r = raised(&after);
    let beyond = r
        .iter()
        .find(|(id, ..)| id.contains("beyond-limits-up"))
        .expect("beyond-limits raised again");
    assert_eq!(
        (beyond.1, beyond.2, beyond.3),
        (Severity::Stop, false, None)
    );

    // A restart whose limits file still says provisional (the rewrite failed) keeps the
    // approval the archive records, and writes the file again.
    std::fs::write(dir.path().join("face.toml"), limits.to_toml()).unwrap();
    let cfg = config::load(&path).unwrap();
    let mut again = Engine::new(&cfg, T0 + 200_000);
    assert!(matches!(
        again.view_of("face").unwrap().limits,
        LimitsState::Provisional { .. }
    ));
    let restored = again.restore(&log.tail);
    assert!(matches!(
        again.view_of("face").unwrap().limits,
        LimitsState::Approved { ref by, .. } if by == "R. Okafor"
    ));
    assert!(
        restored
            .iter()
            .any(|o| matches!(o, Output::WriteLimits { limits, .. } if limits.approved.is_some()))
    );

    // Limits from an engineer's study are not provisional: nothing to approve.
    let studied = config_with_limits(dir.path());
    let mut e = Engine::new(&studied, T0);
    assert!(matches!(
        e.approve("bore", "R. Okafor", None, T0),
        Err(ApproveError::NotProvisional { .. })
    ));
}

/// What was missing: limits read from a file at start were in no record, so a verdict could not
/// be traced to its limits, and limits taken as stored left their reason only in the config.
/// Now the first start records them, a restart with the same limits records nothing, a changed
/// file is recorded with the old and the new, and an as-stored reason is in the record.
#[test]
fn limits_in_force_are_recorded_once_and_again_when_they_change() {
    let dir = tempfile::tempdir().unwrap();
    let cfg = config_with_limits(dir.path());
    let mut log = Log::new();
    let e = Engine::new(&cfg, T0);
    let first = e.limits_records(&log.tail);
    assert_eq!(first.len(), 1);
    for o in first {
        match o {
            Output::Record(r @ Record::LimitsInstalled { .. }) => {
                if let Record::LimitsInstalled { old, reason, .. } = &r {
                    assert!(old.is_none());
                    assert!(reason.starts_with("read from the limits file"), "{reason}");
                }
                log.append(r);
            }
            other => panic!("{other:?}"),
        }
    }
    // A restart on the same file: nothing new.
    let again = Engine::new(&config::load(&cfg.path).unwrap(), T0);
    assert!(again.limits_records(&log.tail).is_empty());

    // The engineer widens the limits on purpose and says why.
    let widened = common::BORE_LIMITS
        .replace("ucl = 12.006", "ucl = 12.008")
        .replace("lcl = 11.994", "lcl = 11.992");
    std::fs::write(dir.path().join("bore.toml"), widened).unwrap();
    let text = std::fs::read_to_string(&cfg.path).unwrap().replace(
        "limits = \"bore.toml\"",
        "limits = \"bore.toml\"\nlimits_policy = \"as-stored\"\nlimits_reason = \"customer agreed wider limits, deviation D-17\"",
    );
    std::fs::write(&cfg.path, text).unwrap();
    let changed = Engine::new(&config::load(&cfg.path).unwrap(), T0);
    let out = changed.limits_records(&log.tail);
    assert_eq!(out.len(), 1);
    match &out[0] {
        Output::Record(Record::LimitsInstalled {
            old, new, reason, ..
        }) => {
            assert_eq!(old.as_ref().unwrap().location.ucl, 12.006);
            assert_eq!(new.location.ucl, 12.008);
            assert!(
                reason.contains("replacing the limits recorded before")
                    && reason.contains("taken as stored")
                    && reason.contains("deviation D-17"),
                "{reason}"
            );
        }
        other => panic!("{other:?}"),
    }
}

fn config_with_cusum(dir: &Path, restart: &str) -> config::Config {
    std::fs::write(dir.join("bore.toml"), common::BORE_LIMITS).unwrap();
    let text = format!(
        r#"
[daemon]
archive_dir = "archive"

[[characteristic]]
id = "bore"
unit = "mm"
limits = "bore.toml"
subgroup = {{ size = 4 }}
[characteristic.rules]
[[characteristic.rules.rule]]
kind = "cusum"
k = 0.5
h = 5
{restart}
"#
    );
    let path = dir.join("cell.toml");
    std::fs::write(&path, text).unwrap();
    config::load(&path).unwrap()
}

/// The CUSUM after a signal: acknowledging its alert (the corrective action) restarts both
/// sums at the head start, so the next subgroup on target ends the condition and the alert
/// clears; with `restart = "never"` the old evidence holds the sum above h for several more
/// subgroups. The restart is saved at once, so an engine rebuilt from the record agrees.
#[test]
fn acknowledging_a_cusum_alert_restarts_its_sums() {
    for (restart, fires_after_ack) in [("", false), ("restart = \"never\"", true)] {
        let dir = tempfile::tempdir().unwrap();
        let cfg = config_with_cusum(dir.path(), restart);
        let mut e = Engine::new(&cfg, T0);
        let mut log = Log::new();
        let mut t = T0;
        let mut subgroup = |e: &mut Engine, log: &mut Log, mean: f64| {
            let mut fired = Vec::new();
            for _ in 0..4 {
                t += 1;
                fired.extend(feed(e, log, "bore", mean, t));
            }
            fired
        };
        // Means 2 standard errors high (SE = 0.004/√4): the upper sum gains 1.5 a subgroup and
        // passes h = 5 at the fourth.
        let mut fired = Vec::new();
        for _ in 0..4 {
            fired = subgroup(&mut e, &mut log, 12.004);
        }
        assert_eq!(fired, ["cusum"], "{restart}");
        let id = e
            .alerts()
            .active()
            .find(|a| a.rule == "cusum")
            .map(|a| a.id.clone())
            .unwrap();
        let (_, outs) = e
            .acknowledge(&id, "R. Tech", Some("insert changed"), T0 + 100)
            .unwrap();
        let saved = outs
            .iter()
            .any(|o| matches!(o, Output::Record(Record::EngineState { .. })));
        assert_eq!(saved, !fires_after_ack, "{restart}");
        for o in outs {
            if let Output::Record(r) = o {
                log.append(r);
            }
        }
        // Back on target.
        let fired = subgroup(&mut e, &mut log, 12.0);
        assert_eq!(!fired.is_empty(), fires_after_ack, "{restart}: {fired:?}");
        // Rebuilt from the record, the engine is where this one is.
        let mut again = Engine::new(&cfg, T0);
        again.restore(&log.tail);
        let one = subgroup(&mut e, &mut log, 12.004);
        let mut log2 = Log::new();
        log2.tail = log.tail.clone();
        let mut t2 = t;
        let mut two = Vec::new();
        for _ in 0..4 {
            t2 += 1;
            two.extend(feed(&mut again, &mut log2, "bore", 12.004, t2));
        }
        assert_eq!(one, two, "{restart}");
    }
}

/// Runs `readings` (arrival time, characteristic, value) through an engine, ticking at the
/// daemon's one-second pace; with `skip`, leaving out the ticks before `next_due_ms`.
fn drive(cfg: &config::Config, readings: &[(i64, &str, f64)], skip: bool) -> Vec<Output> {
    let mut e = Engine::new(cfg, T0);
    let mut all = Vec::new();
    let mut due = e.next_due_ms();
    let mut seq = 0;
    let mut now = T0;
    let end = readings.last().unwrap().0 + 600_000;
    let mut next = readings.iter().peekable();
    while now <= end {
        while let Some(&&(t, c, v)) = next.peek()
            && t <= now
        {
            next.next();
            seq += 1;
            let inc = Incoming {
                source: "test".into(),
                characteristic: c.into(),
                value: v,
                unit: Some("mm".into()),
                source_time_ms: None,
                source_time_ignored: false,
                arrival_ms: t,
                part: None,
                source_key: None,
                word: None,
                inspected: None,
                sent: None,
            };
            let out = e.accept(seq, &inc);
            let raised = out.iter().any(|o| {
                matches!(
                    o,
                    Output::Record(Record::Alert {
                        event: linewarden::alerts::AlertEvent::Raised { .. },
                        ..
                    })
                )
            });
            all.extend(out);
            due = due
                .into_iter()
                .chain(e.next_due_of(c))
                .chain(if raised { e.alerts_due_ms() } else { None })
                .min();
        }
        if !skip || due.is_some_and(|d| now >= d) {
            all.extend(e.tick(now));
            due = e.next_due_ms();
        }
        now += 1000;
    }
    all
}

#[test]
fn ticks_left_out_before_anything_is_due_change_nothing() {
    // Every kind of deadline: a time window, a maximum wait on a count, a silent feed, and the
    // escalation of a stop alert nobody acknowledges.
    let dir = tempfile::tempdir().unwrap();
    std::fs::write(dir.path().join("bore.toml"), common::BORE_LIMITS).unwrap();
    let path = dir.path().join("cell.toml");
    std::fs::write(
        &path,
        r#"
[daemon]
archive_dir = "archive"

[alerts]
stop = { acknowledge = true, escalate_after = "90 s" }

[[characteristic]]
id = "bore"
unit = "mm"
limits = "bore.toml"
subgroup = { size = 4, max_wait_s = 20, on_timeout = "evaluate" }

[characteristic.rules]
preset = "western-electric"

[[characteristic.rules.rule]]
kind = "stale-feed"
max_silence_s = 45.5

[[characteristic]]
id = "face"
unit = "mm"
subgroup = { window_s = 30 }
learning = { subgroups = 5 }
"#,
    )
    .unwrap();
    let cfg = config::load(&path).unwrap();
    let mut readings = Vec::new();
    let mut t = T0 + 500;
    for i in 0..300i64 {
        // Bursts and gaps: some subgroups time out, the feed goes silent twice, the bore
        // shifts once (a stop alert that escalates).
        let gap = match i {
            50 | 51 => 61_000,
            120 => 130_000,
            _ if i % 7 == 0 => 23_000,
            _ => 3_000 + (i % 5) * 700,
        };
        t += gap;
        let shift = if (150..170).contains(&i) { 0.009 } else { 0.0 };
        let wobble = ((i * 37) % 11) as f64 * 0.0004 - 0.002;
        readings.push((t, "bore", 12.0 + shift + wobble));
        if i % 3 == 0 {
            readings.push((t + 200, "face", 38.2 + wobble));
        }
    }
    let every = drive(&cfg, &readings, false);
    let skipping = drive(&cfg, &readings, true);
    let kinds = |o: &[Output]| {
        let mut k: Vec<&str> = o
            .iter()
            .filter_map(|o| match o {
                Output::Record(r) => Some(r.kind()),
                _ => None,
            })
            .collect();
        k.sort();
        k.dedup();
        k
    };
    for want in ["subgroup-result", "flagged", "alert"] {
        assert!(kinds(&every).contains(&want), "the feed exercises {want}");
    }
    let escalated = every.iter().any(|o| {
        matches!(
            o,
            Output::Record(Record::Alert {
                event: linewarden::alerts::AlertEvent::Escalated { .. },
                ..
            })
        )
    });
    assert!(escalated, "a stop alert escalates");
    assert_eq!(every.len(), skipping.len());
    assert!(every == skipping, "the same outputs in the same order");
}
