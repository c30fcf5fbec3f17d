//! The daemon config: every example in config/ is valid, and a bad file is rejected whole with
//! every problem located.

use std::path::Path;

use linewarden::config;

#[test]
fn every_example_config_is_valid() {
    let dir = Path::new(env!("CARGO_MANIFEST_DIR")).join("config");
    let mut n = 0;
    for entry in std::fs::read_dir(&dir).unwrap() {
        let p = entry.unwrap().path();
        if p.extension().and_then(|e| e.to_str()) == Some("toml") {
            config::load(&p).unwrap_or_else(|e| panic!("{}:\n{e}", p.display()));
            n += 1;
        }
    }
    assert!(n >= 1, "no example configs found in {}", dir.display());
}

#[test]
fn a_bad_config_reports_every_problem_with_its_place() {
    let dir = tempfile::tempdir().unwrap();
    let text = r#"[daemon]
archive_dir = "archive"
max_segment_mb = 0

[[characteristic]]
id = "bore-a"
subgroup = { size = 1 }
learning = { chart = "xbar-r" }

[[characteristic]]
id = "bore a"
subgroup = { size = 5, window_s = 60 }
valid_min = 5.0
valid_max = 1.0
spec = { lsl = 12.1, usl = 11.9 }

[[characteristic]]
id = "face"
subgroup = { size = 3 }
[characteristic.rules]
preset = "nelson"
[[characteristic.rules.rule]]
kind = "coarse-resolution"
window = 50

[[source]]
id = "feed"
kind = "carrier-pigeon"
"#;
    let path = dir.path().join("cell.toml");
    std::fs::write(&path, text).unwrap();
    let err = config::load(&path).unwrap_err().to_string();
    let f = path.display().to_string();
    let expect = [
        format!("{f}:3:18: daemon.max_segment_mb: 0 is out of range; use 1 to 4096"),
        format!(
            "{f}:7:21: characteristic[0].subgroup.size: characteristic \"bore-a\": subgroup.size = 1 needs chart = \"individuals\""
        ),
        format!("{f}:11:6: characteristic[1].id: \"bore a\" is not a valid identifier"),
        format!(
            "{f}:12:12: characteristic[1].subgroup: characteristic \"bore a\": say how readings form subgroups with exactly one of size, window_s or by_part = true"
        ),
        format!(
            "{f}:14:13: characteristic[1].valid_max: characteristic \"bore a\": valid_max = 1 must be above valid_min = 5"
        ),
        format!(
            "{f}:15:8: characteristic[1].spec: characteristic \"bore a\": the lower specification 12.1 is not below the upper specification 11.9"
        ),
        format!(
            "{f}:22:1: characteristic[2].rules.rule[0]: characteristic \"face\": kind = \"coarse-resolution\" needs a two-sided spec"
        ),
        format!("{f}:28:8: source[0].kind: \"carrier-pigeon\" is not a source kind this build has"),
    ];
    for e in &expect {
        assert!(err.contains(e.as_str()), "missing\n  {e}\nin\n{err}");
    }
    assert_eq!(err.lines().count(), expect.len(), "{err}");
}

#[test]
fn unknown_keys_are_rejected_with_their_position() {
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("cell.toml");
    std::fs::write(&path, "[daemon]\narchive_dir = \"a\"\nflush_ms = 5\n").unwrap();
    let err = config::load(&path).unwrap_err().to_string();
    assert!(
        err.contains("cell.toml:3:1: unknown field `flush_ms`"),
        "{err}"
    );
}
