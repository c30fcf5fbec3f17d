//! The engineer's desk on a real archive: the README's demo run at full speed into a temporary
//! directory, then `chart` and `limits --archive` on what it recorded, and their bad inputs.

use std::path::{Path, PathBuf};

mod common;
use common::peers::cli;

/// The demo's archive (and limits) in `dir`, made by running the demo config at full speed.
fn demo_archive(dir: &Path) -> PathBuf {
    common::run_daemon(common::demo_config(dir));
    dir.join("archive")
}

fn s(p: &Path) -> &str {
    p.to_str().unwrap()
}

/// Every `<text>` element's content, and the fill colours of every circle.
fn svg_parts(svg: &str) -> (Vec<String>, Vec<String>) {
    let doc = roxmltree::Document::parse(svg).expect("the SVG is well-formed XML");
    assert_eq!(doc.root_element().tag_name().name(), "svg");
    let texts = doc
        .descendants()
        .filter(|n| n.has_tag_name("text"))
        .map(|n| n.text().unwrap_or("").trim().to_string())
        .collect();
    let circles = doc
        .descendants()
        .filter(|n| n.has_tag_name("circle"))
        .map(|n| {
            format!(
                "fill={} stroke={}",
                n.attribute("fill").unwrap_or("-"),
                n.attribute("stroke").unwrap_or("-")
            )
        })
        .collect();
    (texts, circles)
}

/// SIGNAL in src/chart.rs (200, 30, 30).
const SIGNAL_FILL: &str = "#C81E1E";

#[test]
fn charts_and_limits_from_the_record_of_the_demo() {
    let dir = tempfile::tempdir().unwrap();
    let archive = demo_archive(dir.path());

    // The bore's charts: its stored limits, the alerts' points marked and labelled.
    let svg_path = dir.path().join("bore.svg");
    let (ok, _, err) = cli(&[
        "chart",
        "--archive",
        s(&archive),
        "--characteristic",
        "vb210-bore",
        "--zones",
        "--output",
        s(&svg_path),
    ]);
    assert!(ok, "{err}");
    let svg = std::fs::read_to_string(&svg_path).unwrap();
    let (texts, circles) = svg_parts(&svg);
    for want in [
        "UCL 12.0059",
        "CL 12.0012",
        "LCL 11.9966",
        "+2σ",
        "subgroup mean (mm)",
    ] {
        assert!(
            texts.iter().any(|t| t.starts_with(want)),
            "no {want:?} among {texts:?}"
        );
    }
    assert!(
        texts.iter().any(|t| t.contains("beyond-limits")),
        "the signalling points are labelled with their rule: {texts:?}"
    );
    let marked = circles.iter().filter(|c| c.contains(SIGNAL_FILL)).count();
    assert!(marked >= 5, "{marked} marked points");
    assert!(
        circles.len() > 2 * marked,
        "{} points in all",
        circles.len()
    );

    // Every point names its subgroup, time, value and parts on hover.
    let doc = roxmltree::Document::parse(&svg).unwrap();
    let titles: Vec<&str> = doc
        .descendants()
        .filter(|n| n.has_tag_name("circle"))
        .map(|c| {
            c.children()
                .find(|n| n.has_tag_name("title"))
                .and_then(|t| t.text())
                .unwrap_or("")
        })
        .collect();
    assert!(
        titles.iter().all(|t| t.starts_with("subgroup ")),
        "{titles:?}"
    );
    assert!(
        titles.iter().any(
            |t| t.contains("parts VB00156, VB00157, VB00158, VB00159, VB00160")
                && t.contains("fired: beyond-limits")
        ),
        "{titles:?}"
    );

    // The port depth learned provisional limits: the picture says so.
    let port = dir.path().join("port.svg");
    let (ok, _, err) = cli(&[
        "chart",
        "--archive",
        s(&archive),
        "--characteristic",
        "vb210-port",
        "--output",
        s(&port),
    ]);
    assert!(ok, "{err}");
    let (texts, _) = svg_parts(&std::fs::read_to_string(&port).unwrap());
    assert!(
        texts.iter().any(|t| t.starts_with("PROVISIONAL limits")),
        "{texts:?}"
    );

    // A PNG of the newest 40 subgroups decodes at the size asked for.
    let png_path = dir.path().join("bore.png");
    let (ok, _, err) = cli(&[
        "chart",
        "--archive",
        s(&archive),
        "--characteristic",
        "vb210-bore",
        "--last",
        "40",
        "--width",
        "900",
        "--height",
        "520",
        "--output",
        s(&png_path),
    ]);
    assert!(ok, "{err}");
    let decoder = png::Decoder::new(std::io::BufReader::new(
        std::fs::File::open(&png_path).unwrap(),
    ));
    let reader = decoder.read_info().unwrap();
    assert_eq!((reader.info().width, reader.info().height), (900, 520));

    // Limits from the record equal limits from the same readings exported to CSV.
    let (ok, from_archive, err) = cli(&[
        "limits",
        "--archive",
        s(&archive),
        "--characteristic",
        "vb210-bore",
        "--json",
    ]);
    assert!(ok, "{err}");
    let from_archive: serde_json::Value = serde_json::from_str(&from_archive).unwrap();
    let (ok, csv, err) = cli(&[
        "archive",
        "export",
        s(&archive),
        "--format",
        "csv",
        "--characteristic",
        "vb210-bore",
        "--kind",
        "reading-accepted",
    ]);
    assert!(ok, "{err}");
    // Only the readings that completed a subgroup (the last few may still be waiting).
    let subgroups = from_archive["subgroups_total"].as_u64().unwrap() as usize;
    let lines: Vec<&str> = csv.lines().take(1 + 5 * subgroups).collect();
    let csv_path = dir.path().join("bore.csv");
    std::fs::write(&csv_path, lines.join("\n")).unwrap();
    let (ok, from_csv, err) = cli(&[
        "limits",
        "--input",
        s(&csv_path),
        "--layout",
        "single",
        "--value-column",
        "value",
        "--subgroup-size",
        "5",
        "--json",
    ]);
    assert!(ok, "{err}");
    let from_csv: serde_json::Value = serde_json::from_str(&from_csv).unwrap();
    for key in [
        "chart",
        "subgroups_total",
        "sigma_within",
        "location",
        "dispersion",
        "points",
        "stability",
    ] {
        assert_eq!(from_archive[key], from_csv[key], "{key}");
    }

    // Written to a limits file, the provenance names the archive and the records.
    let written = dir.path().join("bore-from-record.toml");
    let (ok, _, err) = cli(&[
        "limits",
        "--archive",
        s(&archive),
        "--characteristic",
        "vb210-bore",
        "--until",
        "2100-01-01T00:00:00Z",
        "--auto-exclude",
        "--write",
        s(&written),
        "--approved-by",
        "Q. Engineer",
        "--approval-note",
        "reset after the insert change",
    ]);
    assert!(ok, "{err}");
    let text = std::fs::read_to_string(&written).unwrap();
    let stored = linewarden::limits_file::StoredLimits::parse(&text, s(&written)).unwrap();
    assert!(
        stored.provenance.source.starts_with(&format!(
            "archive {}, characteristic vb210-bore, subgroups 1 to",
            archive.display()
        )),
        "{}",
        stored.provenance.source
    );
    assert!(stored.provenance.source.contains("(records "));
    assert_eq!(stored.unit.as_deref(), Some("mm"));
    let approval = stored.approved.expect("the approval is in the file");
    assert_eq!(approval.by, "Q. Engineer");
    assert_eq!(
        approval.note.as_deref(),
        Some("reset after the insert change")
    );
}

/// Each bad request: a clear error naming the value, a non-zero exit, and no file left.
#[test]
fn bad_requests_to_the_desk_leave_no_file() {
    let dir = tempfile::tempdir().unwrap();
    let archive = demo_archive(dir.path());
    let out = dir.path().join("never.svg");
    let cases: Vec<(Vec<&str>, &str)> = vec![
        (
            vec!["--characteristic", "vb210-bor"],
            "holds no subgroups of characteristic \"vb210-bor\" (it holds subgroups of: vb210-bore, vb210-face, vb210-leak, vb210-port)",
        ),
        (
            vec![
                "--characteristic",
                "vb210-bore",
                "--since",
                "2100-01-01T00:00:00Z",
            ],
            "no subgroups of \"vb210-bore\" in the window asked for (2100-01-01T00:00:00.000Z to now)",
        ),
        (
            vec!["--characteristic", "vb210-bore", "--since", "yesterday"],
            "--since \"yesterday\" is not a time",
        ),
        (
            vec![
                "--characteristic",
                "vb210-bore",
                "--since",
                "2026-12-02T00:00:00Z",
                "--until",
                "2026-12-01T00:00:00Z",
            ],
            "--since 2026-12-02T00:00:00Z is not before --until 2026-12-01T00:00:00Z",
        ),
        (
            vec!["--characteristic", "vb210-bore", "--last", "0"],
            "--last 0 takes no subgroups",
        ),
    ];
    for (args, want) in cases {
        let mut all = vec!["chart", "--archive", s(&archive), "--output", s(&out)];
        all.extend(args.iter().copied());
        let (ok, _, err) = cli(&all);
        assert!(!ok, "{args:?} succeeded");
        assert!(err.contains(want), "{args:?}: {err}");
        assert!(!out.exists(), "{args:?} left a file");
    }
    // Too few subgroups for a study.
    let (ok, _, err) = cli(&[
        "limits",
        "--archive",
        s(&archive),
        "--characteristic",
        "vb210-bore",
        "--last",
        "1",
    ]);
    assert!(!ok);
    assert!(err.contains("the study failed"), "{err}");
    // An output the command cannot tell the format of.
    let (ok, _, err) = cli(&[
        "chart",
        "--archive",
        s(&archive),
        "--characteristic",
        "vb210-bore",
        "--output",
        s(&dir.path().join("bore.pdf")),
    ]);
    assert!(!ok);
    assert!(err.contains("use .svg or .png"), "{err}");
    // A damaged archive: one byte changed in the middle of a segment.
    let seg = std::fs::read_dir(&archive)
        .unwrap()
        .map(|e| e.unwrap().path())
        .filter(|p| p.extension().is_some_and(|e| e == "lwseg"))
        .min()
        .unwrap();
    let mut bytes = std::fs::read(&seg).unwrap();
    let mid = bytes.len() / 2;
    bytes[mid] ^= 0x20;
    std::fs::write(&seg, bytes).unwrap();
    let (ok, _, err) = cli(&[
        "chart",
        "--archive",
        s(&archive),
        "--characteristic",
        "vb210-bore",
        "--output",
        s(&out),
    ]);
    assert!(!ok);
    assert!(
        err.contains(s(&seg)),
        "the error names the damaged segment: {err}"
    );
    assert!(!out.exists());
}

/// Chromium, for printing the report; None when not installed and CI does not require it.
fn chromium() -> Option<&'static str> {
    for c in ["chromium", "chromium-browser", "/usr/bin/chromium"] {
        if std::process::Command::new(c)
            .arg("--version")
            .output()
            .is_ok_and(|o| o.status.success())
        {
            return Some(c);
        }
    }
    assert!(
        std::env::var_os("LINEWARDEN_REQUIRE_CHROMIUM").is_none(),
        "chromium is required (apt-get install chromium)"
    );
    eprintln!("SKIPPED the print check: chromium is not installed (apt-get install chromium)");
    None
}

/// The report on the demo's bore: self-contained, the same figures as `limits --archive
/// --json`, the alerts' lives and the archive's check; printed by a real headless browser to a
/// PDF of a few A4 pages.
#[test]
fn the_report_is_self_contained_agrees_with_the_study_and_prints() {
    let dir = tempfile::tempdir().unwrap();
    let archive = demo_archive(dir.path());
    let root = Path::new(env!("CARGO_MANIFEST_DIR"));
    let html_path = dir.path().join("bore.html");
    let (ok, _, err) = cli(&[
        "report",
        "--archive",
        s(&archive),
        "--characteristic",
        "vb210-bore",
        "--config",
        s(&root.join("config/demo.toml")),
        "--output",
        s(&html_path),
    ]);
    assert!(ok, "{err}");
    let html = std::fs::read_to_string(&html_path).unwrap();
    // Nothing outside the file: no scripts, links, images or fonts fetched.
    for outside in ["src=", "href=", "url(", "<script", "<link", "<img"] {
        assert!(
            !html.contains(outside),
            "the report refers outside itself: {outside}"
        );
    }
    for want in [
        "Fernmoor Valve Works (invented) · Cell 4, VB-210 valve body",
        "VB-210 bore diameter (vb210-bore)",
        "LSL 11.985 · target 12 · USL 12.015",
        "stored from a baseline study",
        "<svg",
        "vb210-bore-32-beyond-limits-up",
        "Check of the whole archive</th><td>intact",
        "Chain hash",
    ] {
        assert!(html.contains(want), "no {want:?} in the report");
    }
    // The figures are the study's own: those `limits --archive --json` gives.
    let (ok, json, err) = cli(&[
        "limits",
        "--archive",
        s(&archive),
        "--characteristic",
        "vb210-bore",
        "--lsl",
        "11.985",
        "--usl",
        "12.015",
        "--target",
        "12",
        "--json",
    ]);
    assert!(ok, "{err}");
    let v: serde_json::Value = serde_json::from_str(&json).unwrap();
    let sig = |x: &serde_json::Value, d: usize| linewarden::format::sig(x.as_f64().unwrap(), d);
    let c = &v["capability"];
    for (name, value) in [
        ("Cp", &c["cp"]),
        ("Cpk", &c["cpk"]),
        ("Pp", &c["pp"]),
        ("Ppk", &c["ppk"]),
    ] {
        let shown = format!("{name:<5} {}", sig(value, 3));
        assert!(html.contains(&shown), "no {shown:?} in the report");
    }
    let within = format!("spread inside subgroups  {}", sig(&v["sigma_within"], 6));
    assert!(html.contains(&within), "no {within:?}");

    // A real browser prints it: a few pages, every one of them used.
    if let Some(chrome) = chromium() {
        let pdf = dir.path().join("bore.pdf");
        let out = std::process::Command::new(chrome)
            .args([
                "--headless",
                "--no-sandbox",
                "--disable-gpu",
                "--no-pdf-header-footer",
                &format!("--print-to-pdf={}", pdf.display()),
                &format!("file://{}", html_path.display()),
            ])
            .output()
            .unwrap();
        assert!(
            pdf.exists(),
            "chromium printed nothing: {}",
            String::from_utf8_lossy(&out.stderr)
        );
        let bytes = std::fs::read(&pdf).unwrap();
        let text = String::from_utf8_lossy(&bytes);
        let pages = text
            .match_indices("/Type /Page")
            .filter(|(i, _)| !text[i + 10..].starts_with('s'))
            .count()
            + text
                .match_indices("/Type/Page")
                .filter(|(i, _)| !text[i + 10..].starts_with('s'))
                .count();
        assert!((2..=6).contains(&pages), "{pages} pages");
    }

    // Bad requests: nothing written.
    let never = dir.path().join("never.html");
    for (args, want) in [
        (
            vec![
                "--characteristic",
                "vb210-bor",
                "--config",
                s(&root.join("config/demo.toml")),
            ],
            "--characteristic \"vb210-bor\" is not in",
        ),
        (
            vec!["--characteristic", "vb210-bore", "--last", "1"],
            "the study failed",
        ),
    ] {
        let mut all = vec!["report", "--archive", s(&archive), "--output", s(&never)];
        all.extend(args.iter().copied());
        let (ok, _, err) = cli(&all);
        assert!(!ok && err.contains(want), "{args:?}: {err}");
        assert!(!never.exists());
    }
    let (ok, _, err) = cli(&[
        "report",
        "--archive",
        s(&archive),
        "--characteristic",
        "vb210-bore",
        "--output",
        s(&dir.path().join("bore.pdf.txt")),
    ]);
    assert!(!ok && err.contains("name it .html"), "{err}");
}

/// A study from a file: its final limits, the excluded subgroup hollow and labelled, subgroup
/// numbers on the axis, and the histogram against the specification.
#[test]
fn the_chart_of_a_study_from_a_file_shows_its_exclusions_and_histogram() {
    let dir = tempfile::tempdir().unwrap();
    let root = Path::new(env!("CARGO_MANIFEST_DIR"));
    let input = root.join("demo-feeds/vb210-bore-baseline.csv");
    let out = dir.path().join("study.svg");
    let (ok, _, err) = cli(&[
        "chart",
        "--input",
        s(&input),
        "--auto-exclude",
        "--unit",
        "mm",
        "--histogram",
        "--lsl",
        "11.985",
        "--usl",
        "12.015",
        "--output",
        s(&out),
    ]);
    assert!(ok, "{err}");
    let (texts, circles) = svg_parts(&std::fs::read_to_string(&out).unwrap());
    for want in [
        "UCL 12.0059",
        "CL 12.0012",
        "LCL 11.9966",
        "beyond limits (excluded)",
        "1 of 25 subgroups excluded from the limits (drawn hollow)",
        "subgroup",
        "LSL 11.9850",
        "USL 12.0150",
        "curve: fitted normal",
        "reading (mm)",
    ] {
        assert!(
            texts.iter().any(|t| t == want),
            "no {want:?} among {texts:?}"
        );
    }
    // 25 means and 25 ranges; subgroup 9 hollow in both charts.
    assert_eq!(circles.len(), 50);
    assert_eq!(
        circles
            .iter()
            .filter(|c| c.starts_with("fill=none"))
            .count(),
        2
    );
    // --lsl above --usl, and both sources at once, are refused.
    let (ok, _, err) = cli(&[
        "chart",
        "--input",
        s(&input),
        "--lsl",
        "12.1",
        "--usl",
        "12.0",
        "--output",
        s(&out),
    ]);
    assert!(
        !ok && err.contains("--lsl 12.1 must be below --usl 12"),
        "{err}"
    );
}
