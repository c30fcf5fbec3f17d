//! The daemon end to end on real files: a feed with a known shift gives exactly the expected
//! violations in the archive, and a run of points that starts before a restart fires after it.

use std::path::Path;

use linewarden::archive::Record;
use linewarden::archive::reader::{Filter, Reader};
use linewarden::config;

mod common;
use common::{BORE_LIMITS, run_daemon};

/// Writes a feed of subgroups of 4 with the given means (each subgroup 4 readings spread
/// ±0.001 around its mean, so ranges stay in control).
fn feed(path: &Path, means: &[f64], first_part: usize) {
    let mut text = String::new();
    let mut t = 0;
    for (i, m) in means.iter().enumerate() {
        for (j, d) in [-0.001, 0.001, -0.0005, 0.0005].iter().enumerate() {
            t += 100;
            text.push_str(&format!(
                "{{\"t_ms\": {t}, \"characteristic\": \"bore\", \"value\": {}, \"part\": \"P{}\"}}\n",
                m + d,
                first_part + i * 4 + j
            ));
        }
    }
    text.push_str("{\"t_ms\": 99999, \"characteristic\": \"bore\", \"raw\": \"12.0O4\"}\n");
    std::fs::write(path, text).unwrap();
}

fn cell(dir: &Path, feed_file: &str) -> std::path::PathBuf {
    std::fs::write(dir.join("bore.toml"), BORE_LIMITS).unwrap();
    let text = format!(
        r#"[daemon]
archive_dir = "archive"
flush_interval_ms = 2

[[characteristic]]
id = "bore"
unit = "mm"
limits = "bore.toml"
subgroup = {{ size = 4 }}
[characteristic.rules]
preset = "western-electric"

[[source]]
id = "feed"
kind = "replay"
file = "{feed_file}"
speed = 0
"#
    );
    let p = dir.join("cell.toml");
    std::fs::write(&p, text).unwrap();
    p
}

fn run(path: &Path) -> linewarden::daemon::Summary {
    run_daemon(config::load(path).unwrap())
}

/// (subgroup number, rule) of every violation archived.
fn violations(archive: &Path) -> Vec<(u64, String)> {
    let r = Reader::open(archive).unwrap();
    let mut out = Vec::new();
    for e in r.iter(&Filter::default()) {
        if let Record::SubgroupResult {
            subgroup,
            violations,
            ..
        } = e.unwrap().record
        {
            for v in violations {
                out.push((subgroup.number, v.rule));
            }
        }
    }
    out
}

// Subgroups 1-3 on the centre; 4 far above the UCL (z = 4); 5-12 slightly above (z = 0.5):
// a run above the centre starts at 4 and reaches 8 at subgroup 11.
const MEANS: [f64; 12] = [
    12.0, 12.0, 12.0, 12.008, 12.001, 12.001, 12.001, 12.001, 12.001, 12.001, 12.001, 12.001,
];

#[test]
fn a_known_shift_gives_exactly_the_expected_violations() {
    let dir = tempfile::tempdir().unwrap();
    feed(&dir.path().join("feed.jsonl"), &MEANS, 1);
    let s = run(&cell(dir.path(), "feed.jsonl"));
    assert_eq!(s.accepted, 48);
    assert_eq!(s.rejected, 1);
    assert_eq!(s.subgroups, 12);
    let got = violations(&dir.path().join("archive"));
    assert_eq!(
        got,
        [
            (4, "beyond-limits".to_string()),
            (11, "one-side-run".to_string()),
            (12, "one-side-run".to_string())
        ]
    );
    let v = linewarden::archive::reader::verify(&dir.path().join("archive")).unwrap();
    assert!(v.problems.is_empty(), "{:?}", v.problems);
}

#[test]
fn a_run_continues_across_a_restart() {
    let dir = tempfile::tempdir().unwrap();
    // First run: subgroups 1-9 and half of the 10th; second run: the rest.
    let mut first = String::new();
    let mut second = String::new();
    feed(&dir.path().join("all.jsonl"), &MEANS, 1);
    let all = std::fs::read_to_string(dir.path().join("all.jsonl")).unwrap();
    for (i, line) in all.lines().enumerate() {
        if line.contains("raw") {
            continue;
        }
        if i < 38 {
            first.push_str(line);
            first.push('\n');
        } else {
            second.push_str(line);
            second.push('\n');
        }
    }
    std::fs::write(dir.path().join("a.jsonl"), first).unwrap();
    std::fs::write(dir.path().join("b.jsonl"), second).unwrap();
    let s1 = run(&cell(dir.path(), "a.jsonl"));
    assert_eq!(s1.subgroups, 9);
    let s2 = run(&cell(dir.path(), "b.jsonl"));
    assert_eq!(
        s2.subgroups, 3,
        "the half subgroup waiting at the restart is completed"
    );
    let got = violations(&dir.path().join("archive"));
    assert_eq!(
        got,
        [
            (4, "beyond-limits".to_string()),
            (11, "one-side-run".to_string()),
            (12, "one-side-run".to_string())
        ],
        "the same verdicts as one uninterrupted run"
    );
}
