//! The stored limits format: round trip, and validation that reports every problem with its
//! TOML path and line:column.

use linewarden::limits_file::StoredLimits;
use linewarden::stats::study::{self, StudyOptions};
use linewarden::stats::variables::VariablesChart;

fn sample() -> StoredLimits {
    let data: Vec<Vec<f64>> = (0..20)
        .map(|i| {
            (0..4)
                .map(|j| 5.0 + (((i * 4 + j) as f64) * 1.7).sin() * 0.1)
                .collect()
        })
        .collect();
    let s = study::run(&data, &StudyOptions::new(VariablesChart::XbarR)).unwrap();
    StoredLimits::from_study(
        &s,
        "shaft-od",
        Some("mm".into()),
        None,
        "baseline.csv",
        "2026-12-01T08:00:00Z",
    )
}

#[test]
fn round_trips_through_text_and_disk() {
    let l = sample();
    let text = l.to_toml();
    assert!(text.starts_with("# Control limits for characteristic \"shaft-od\""));
    assert_eq!(StoredLimits::parse(&text, "x.toml").unwrap(), l);
    let dir = tempfile::tempdir().unwrap();
    let p = dir.path().join("shaft-od.toml");
    l.write(&p).unwrap();
    assert_eq!(StoredLimits::load(&p).unwrap(), l);
}

#[test]
fn every_problem_is_reported_with_path_and_position() {
    let text = sample()
        .to_toml()
        .replace("chart = \"xbar-r\"", "chart = \"individuals\"")
        .replace(
            "characteristic = \"shaft-od\"",
            "characteristic = \"shaft od\"",
        );
    // Make the location UCL fall below the centre.
    let mut lines: Vec<String> = text.lines().map(str::to_string).collect();
    let loc = lines.iter().position(|l| l == "[location]").unwrap();
    let ucl = (loc..lines.len())
        .find(|&i| lines[i].starts_with("ucl"))
        .unwrap();
    lines[ucl] = "ucl = 1.0".to_string();
    let text = lines.join("\n");
    let err = StoredLimits::parse(&text, "shaft-od.toml").unwrap_err();
    let msg = err.to_string();
    let line_of = |needle: &str| text.lines().position(|l| l.starts_with(needle)).unwrap() + 1;
    assert!(
        msg.contains(&format!(
            "shaft-od.toml:{}:18: characteristic: \"shaft od\" is not a valid identifier",
            line_of("characteristic")
        )),
        "{msg}"
    );
    assert!(
        msg.contains(&format!(
            "shaft-od.toml:{}:17: subgroup_size: 4 does not fit chart = \"individuals\"",
            line_of("subgroup_size")
        )),
        "{msg}"
    );
    assert!(
        msg.contains("dispersion.kind: \"range\" does not go with chart = \"individuals\""),
        "{msg}"
    );
    assert!(
        msg.contains(&format!(
            "shaft-od.toml:{}:7: location.ucl: 1 is not above the centre line",
            ucl + 1
        )),
        "{msg}"
    );
    assert_eq!(err.problems.len(), 4, "{msg}");
}

#[test]
fn unknown_keys_and_bad_types_are_rejected_with_position() {
    let text = sample()
        .to_toml()
        .replace("[sigma]\n", "[sigma]\nwidth = 3\n");
    let err = StoredLimits::parse(&text, "f.toml")
        .unwrap_err()
        .to_string();
    let line = text.lines().position(|l| l == "width = 3").unwrap() + 1;
    assert!(
        err.starts_with(&format!("f.toml:{line}:1: unknown field `width`")),
        "{err}"
    );
    let text = sample()
        .to_toml()
        .replace("subgroup_size = 4", "subgroup_size = \"four\"");
    let err = StoredLimits::parse(&text, "f.toml")
        .unwrap_err()
        .to_string();
    assert!(
        err.contains("subgroup_size") || err.contains("invalid type"),
        "{err}"
    );
}

/// The regression: messages say "centre line" while the file insisted on `center`. Both
/// spellings read the same; the file is written `center`.
#[test]
fn centre_and_center_both_read() {
    let l = sample();
    let text = l.to_toml().replace("center =", "centre =");
    assert!(text.contains("centre ="));
    assert_eq!(StoredLimits::parse(&text, "x.toml").unwrap(), l);
}

/// An approval must say who and when; a malformed one is refused with its place.
#[test]
fn an_approval_names_who_and_when() {
    let mut l = sample();
    l.provenance.source = "learning".into();
    l.provenance.provisional = true;
    assert!(l.is_provisional());
    let text = l.to_toml();
    assert!(text.contains("PROVISIONAL") && text.contains("provisional = true"));
    let approved =
        format!("{text}\n[approved]\nby = \"R. Okafor\"\nat = \"2026-12-02T09:14:03Z\"\n");
    let back = StoredLimits::parse(&approved, "x.toml").unwrap();
    assert!(!back.is_provisional());
    let bad = format!("{text}\n[approved]\nby = \" \"\nat = \"yesterday\"\n");
    let e = StoredLimits::parse(&bad, "x.toml").unwrap_err().to_string();
    assert!(
        e.contains("approved.by") && e.contains("approved.at") && e.contains("\"yesterday\""),
        "{e}"
    );
}
