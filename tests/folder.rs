//! The watched-folder source in a temporary directory: a report is read once complete, archived
//! durably, moved to done/; a bad report goes to rejected/ with its reason; a report cut short by
//! a crash is finished after the restart without archiving anything twice.

use std::path::Path;
use std::time::{Duration, Instant};

use linewarden::archive::Record;
use linewarden::archive::reader::{Filter, Reader};
use linewarden::config;

mod common;

fn cell(dir: &Path) -> std::path::PathBuf {
    std::fs::write(dir.join("bore.toml"), common::BORE_LIMITS).unwrap();
    std::fs::create_dir_all(dir.join("inbox")).unwrap();
    let text = r#"[daemon]
archive_dir = "archive"
flush_interval_ms = 2

[[characteristic]]
id = "bore"
limits = "bore.toml"
subgroup = { size = 4 }
[characteristic.rules]
preset = "western-electric"

[[characteristic]]
id = "face"
subgroup = { size = 1 }

[[source]]
id = "cmm"
kind = "folder"
path = "inbox"
rows = "per-part"
columns = { "Bore" = "bore", "Face" = "face" }
part_column = "Serial"
settle_ms = 100
"#;
    let p = dir.join("cell.toml");
    std::fs::write(&p, text).unwrap();
    p
}

fn report() -> String {
    let mut s = String::from("Serial,Bore,Face,Operator\n");
    for i in 0..8 {
        let face = if i == 3 {
            String::new()
        } else {
            format!("{}", 38.2 + i as f64 * 0.001)
        };
        s.push_str(&format!(
            "VB{i:03},{},{face},night\n",
            12.0 + (i % 4) as f64 * 0.001
        ));
    }
    s.push_str("VB009,12.0O1,38.2,night\n");
    s
}

/// Runs the daemon until `until` holds (or 20 s pass), then stops it.
fn run_until(cfg_path: &Path, until: impl Fn() -> bool) {
    let cfg = config::load(cfg_path).unwrap();
    let rt = tokio::runtime::Builder::new_multi_thread()
        .worker_threads(2)
        .enable_all()
        .build()
        .unwrap();
    rt.block_on(async {
        let (stop, stop_rx) = tokio::sync::watch::channel(false);
        let (_reload, reload_rx) = tokio::sync::mpsc::channel(1);
        let daemon = tokio::spawn(linewarden::daemon::run(cfg, stop_rx, reload_rx));
        let start = Instant::now();
        while !until() && start.elapsed() < Duration::from_secs(20) {
            tokio::time::sleep(Duration::from_millis(20)).await;
        }
        stop.send(true).unwrap();
        daemon.await.unwrap().unwrap();
    });
}

fn readings(archive: &Path) -> Vec<(String, String)> {
    let r = Reader::open(archive).unwrap();
    r.iter(&Filter::default())
        .filter_map(|e| match e.unwrap().record {
            Record::ReadingAccepted {
                characteristic,
                source_key,
                ..
            } => Some((characteristic, source_key.unwrap_or_default())),
            _ => None,
        })
        .collect()
}

#[test]
fn reports_are_read_archived_and_moved_and_never_twice() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let cfg = cell(d);
    let inbox = d.join("inbox");
    // The machine writes under another name and renames the finished file into place.
    std::fs::write(inbox.join("r1.tmp"), report()).unwrap();
    std::fs::rename(inbox.join("r1.tmp"), inbox.join("r1.csv")).unwrap();
    std::fs::write(inbox.join("bad.csv"), "Serial,Diameter\nVB1,12.0\n").unwrap();
    run_until(&cfg, || {
        inbox.join("done/r1.csv").exists() && inbox.join("rejected/bad.csv").exists()
    });
    assert!(inbox.join("done/r1.csv").exists());
    assert!(!inbox.join("r1.csv").exists());
    let why = std::fs::read_to_string(inbox.join("rejected/bad.csv.error")).unwrap();
    assert!(why.contains("bad.csv: no column \"Bore\""), "{why}");
    let got = readings(&d.join("archive"));
    assert_eq!(got.iter().filter(|(c, _)| c == "bore").count(), 8);
    // Seven of the first eight parts have a face height (an empty cell is not a reading), and
    // the last part has one though its bore cell is unreadable.
    assert_eq!(got.iter().filter(|(c, _)| c == "face").count(), 8);
    let r = Reader::open(&d.join("archive")).unwrap();
    let rejected: Vec<String> = r
        .iter(&Filter {
            kinds: vec!["reading-rejected".into()],
            ..Filter::default()
        })
        .filter_map(|e| match e.unwrap().record {
            Record::ReadingRejected { reason, .. } => Some(reason),
            _ => None,
        })
        .collect();
    assert_eq!(rejected.len(), 1);
    assert!(
        rejected[0].contains("r1.csv:10:2: \"12.0O1\" is not a reading"),
        "{rejected:?}"
    );

    // A crash after the readings were archived but before the move: the report is back in
    // processing/. After the restart it is finished, and nothing is archived twice.
    std::fs::copy(inbox.join("done/r1.csv"), inbox.join("processing/r1.csv")).unwrap();
    std::fs::remove_file(inbox.join("done/r1.csv")).unwrap();
    run_until(&cfg, || inbox.join("done/r1.csv").exists());
    assert!(inbox.join("done/r1.csv").exists());
    let got = readings(&d.join("archive"));
    assert_eq!(got.len(), 16);
    let keys: std::collections::HashSet<_> = got.iter().map(|(_, k)| k.clone()).collect();
    assert_eq!(keys.len(), 16, "no reading archived twice");
}

fn rejected_reasons(archive: &Path) -> Vec<String> {
    let r = Reader::open(archive).unwrap();
    r.iter(&Filter {
        kinds: vec!["reading-rejected".into()],
        ..Filter::default()
    })
    .filter_map(|e| match e.unwrap().record {
        Record::ReadingRejected { reason, .. } => Some(reason),
        _ => None,
    })
    .collect()
}

/// The regression: a per-part row with one field more than the header (a decimal comma,
/// `VB3,12,003,38.2,21.45` under four columns) was read by position, every value shifted one
/// column. Swept over every field count from 1 to 8 under a four-column header: only rows of
/// exactly four fields give readings; every other row is rejected whole with its file and line,
/// and no value from it reaches a characteristic.
#[test]
fn a_row_whose_field_count_differs_from_the_header_is_never_read_by_position() {
    use linewarden::config::ReportRows;
    use linewarden::daemon::sources::folder::parse;
    let rows = ReportRows::PerPart {
        columns: vec![
            ("Bore".into(), "bore".into()),
            ("Face".into(), "face".into()),
            ("Port".into(), "port".into()),
        ],
    };
    for fields in 1..=8usize {
        let cells: Vec<String> = (0..fields)
            .map(|i| {
                if i == 0 {
                    "VB3".into()
                } else {
                    format!("{}", 10 + i)
                }
            })
            .collect();
        let text = format!(
            "Serial,Bore,Face,Port\nVB1,12.001,38.2,21.45\n{}\n",
            cells.join(",")
        );
        let (readings, bad) = parse(&text, "r.csv", &rows, Some("Serial")).unwrap();
        let from_row3: Vec<_> = readings.iter().filter(|r| r.0.starts_with("3:")).collect();
        if fields == 4 {
            assert_eq!(from_row3.len(), 3, "{fields} fields");
            assert!(bad.is_empty());
        } else {
            assert!(from_row3.is_empty(), "{fields} fields: read {from_row3:?}");
            assert_eq!(bad.len(), 1, "{fields} fields");
            let reason = &bad[0].2;
            assert!(
                reason.contains(&format!(
                    "r.csv:3: the row has {fields} field(s) where the header has 4"
                )),
                "{reason}"
            );
        }
        // The good row is read whatever the bad one holds.
        assert_eq!(readings.iter().filter(|r| r.0.starts_with("2:")).count(), 3);
    }
    // The example from the field, and its hint.
    let (readings, bad) = parse(
        "Serial,Bore,Face,Port\nVB3,12,003,38.2,21.45\n",
        "r.csv",
        &rows,
        Some("Serial"),
    )
    .unwrap();
    assert!(readings.is_empty());
    assert!(bad[0].2.contains("decimal comma"), "{}", bad[0].2);
    // A semicolon file says so; a lone decimal-comma cell says so.
    let e = parse(
        "Serial;Bore;Face;Port\nVB3;12,003;38,2;21,45\n",
        "s.csv",
        &rows,
        Some("Serial"),
    )
    .unwrap_err();
    assert!(e.contains("separated by ';'"), "{e}");
    let (_, bad) = parse(
        "Serial,Bore,Face,Port\nVB3,\"12,003\",38.2,21.45\n",
        "q.csv",
        &rows,
        Some("Serial"),
    )
    .unwrap();
    assert!(
        bad[0].2.contains("q.csv:2:2") && bad[0].2.contains("decimal comma"),
        "{bad:?}"
    );
    // The last row cut short while the file was written: rejected, and said so.
    let (readings, bad) = parse(
        "Serial,Bore,Face,Port\nVB1,12.001,38.2,21.45\nVB2,12.00",
        "w.csv",
        &rows,
        Some("Serial"),
    )
    .unwrap();
    assert_eq!(readings.len(), 3);
    assert!(bad[0].2.contains("still being written"), "{bad:?}");
    // A whole last row without a line ending is read (many machines write files that way).
    let (readings, bad) = parse(
        "Serial,Bore,Face,Port\nVB1,12.001,38.2,21.45",
        "n.csv",
        &rows,
        Some("Serial"),
    )
    .unwrap();
    assert_eq!((readings.len(), bad.len()), (3, 0));
    // Per-reading rows: a row with the value missing is rejected, not skipped.
    let per = ReportRows::PerReading {
        characteristic_column: "Feature".into(),
        value_column: "Value".into(),
    };
    let (readings, bad) = parse(
        "Serial,Feature,Value\nVB1,bore,12.001\nVB2,bore\nVB3,bore,\n",
        "p.csv",
        &per,
        Some("Serial"),
    )
    .unwrap();
    assert_eq!(readings.len(), 1);
    assert_eq!(bad.len(), 2, "{bad:?}");
}

/// The same daemon, end to end: the misformatted rows are archived as rejected with file, line
/// and hint, no shifted value is archived, and the same report dropped again under another
/// name (and under a third, while the first is still waiting) is recognised by its content and
/// archived once.
#[test]
fn bad_rows_are_archived_as_rejected_and_a_copied_report_is_archived_once() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let cfg = cell(d);
    let inbox = d.join("inbox");
    let text =
        "Serial,Bore,Face,Operator\nVB1,12.001,38.2,night\nVB3,12,003,38.2,night\nVB4,12.002\n";
    std::fs::write(inbox.join("a.csv"), text).unwrap();
    run_until(&cfg, || inbox.join("done/a.csv").exists());
    let got = readings(&d.join("archive"));
    assert_eq!(got.len(), 2, "only VB1's bore and face: {got:?}");
    let reasons = rejected_reasons(&d.join("archive"));
    assert_eq!(reasons.len(), 2, "{reasons:?}");
    assert!(
        reasons[0].contains("a.csv:3: the row has 5 field(s)")
            && reasons[0].contains("decimal comma")
    );
    assert!(
        reasons[1].contains("a.csv:4: the row has 2 field(s)"),
        "{reasons:?}"
    );

    // The same bytes under two new names, one of them after a restart.
    std::fs::write(inbox.join("a-copy.csv"), text).unwrap();
    run_until(&cfg, || inbox.join("rejected/a-copy.csv").exists());
    std::fs::write(inbox.join("again.csv"), text).unwrap();
    run_until(&cfg, || inbox.join("rejected/again.csv").exists());
    let why = std::fs::read_to_string(inbox.join("rejected/again.csv.error")).unwrap();
    assert!(
        why.contains("same content") && why.contains("a.csv"),
        "{why}"
    );
    assert_eq!(
        readings(&d.join("archive")).len(),
        2,
        "nothing archived twice"
    );
    let reasons = rejected_reasons(&d.join("archive"));
    assert_eq!(
        reasons.len(),
        4,
        "the two copies are on record: {reasons:?}"
    );
}

/// What broke: a `*.csv` symbolic link to a file outside the folder was followed, its cells
/// archived as rejected readings, and for /etc/passwd the `.error` file written back into the
/// share showed its first line. Every kind of entry that is not a regular file of its own (a
/// link to a file, to a directory, dangling; a named pipe; a directory; a hard link) is moved
/// aside with the reason, and nothing of what it points to reaches the archive or any file in
/// the share. A regular report beside them is read as ever.
#[test]
fn a_link_or_other_entry_dropped_as_a_report_is_never_followed() {
    use std::os::unix::fs::symlink;
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let cfg = cell(d);
    let inbox = d.join("inbox");
    // A secret outside the folder, shaped like a report so that reading it would show.
    let secret = d.join("secret.txt");
    std::fs::write(&secret, "Serial,Bore,Face\nSECRET-LINE,12.001,38.2\n").unwrap();
    std::fs::create_dir_all(d.join("elsewhere")).unwrap();
    symlink(&secret, inbox.join("to-secret.csv")).unwrap();
    symlink("/etc/passwd", inbox.join("passwd.csv")).unwrap();
    symlink(d.join("elsewhere"), inbox.join("to-dir.csv")).unwrap();
    symlink(d.join("nowhere"), inbox.join("dangling.csv")).unwrap();
    std::fs::create_dir(inbox.join("folder.csv")).unwrap();
    let fifo = std::ffi::CString::new(inbox.join("pipe.csv").to_str().unwrap()).unwrap();
    // SAFETY: mkfifo with a valid NUL-terminated path.
    assert_eq!(unsafe { libc::mkfifo(fifo.as_ptr(), 0o644) }, 0);
    std::fs::hard_link(&secret, inbox.join("hard.csv")).unwrap();
    std::fs::write(inbox.join("good.csv"), report()).unwrap();
    let refused = [
        ("to-secret.csv", "a symbolic link"),
        ("passwd.csv", "a symbolic link"),
        ("to-dir.csv", "a symbolic link"),
        ("dangling.csv", "a symbolic link"),
        ("folder.csv", "a directory"),
        ("pipe.csv", "a named pipe"),
        ("hard.csv", "hard links"),
    ];
    let archive = d.join("archive");
    run_until(&cfg, || {
        inbox.join("done/good.csv").exists()
            && refused
                .iter()
                .all(|(n, _)| inbox.join(format!("rejected/{n}.error")).exists())
    });
    assert!(inbox.join("done/good.csv").exists());
    for (name, kind) in refused {
        let why = std::fs::read_to_string(inbox.join(format!("rejected/{name}.error"))).unwrap();
        assert!(why.contains(kind), "{name}: {why}");
        assert!(
            !why.contains("SECRET") && !why.contains("root:"),
            "{name}: {why}"
        );
        // The link itself was moved, never what it points to.
        assert!(
            std::fs::symlink_metadata(inbox.join("rejected").join(name)).is_ok(),
            "{name} not moved aside"
        );
    }
    assert_eq!(
        std::fs::read_to_string(&secret).unwrap(),
        "Serial,Bore,Face\nSECRET-LINE,12.001,38.2\n",
        "the file a link points to is untouched"
    );
    // Nothing of the secret or of /etc/passwd in the archive, the ledger or any file left in
    // the share.
    let (ok, out, err) = common::peers::cli(&["archive", "export", archive.to_str().unwrap()]);
    assert!(ok, "{err}");
    assert!(!out.contains("SECRET") && !out.contains("root:"), "{out}");
    for e in walk(&inbox) {
        if e.is_file() && std::fs::symlink_metadata(&e).unwrap().file_type().is_file() {
            let text = String::from_utf8_lossy(&std::fs::read(&e).unwrap()).into_owned();
            if e.file_name().unwrap() != "hard.csv" {
                assert!(!text.contains("SECRET"), "{}: {text}", e.display());
            }
            assert!(!text.contains("root:"), "{}: {text}", e.display());
        }
    }
    assert_eq!(readings(&archive).len(), 16, "the good report's readings");
}

fn walk(dir: &Path) -> Vec<std::path::PathBuf> {
    let mut out = Vec::new();
    for e in std::fs::read_dir(dir).unwrap().flatten() {
        let p = e.path();
        if e.file_type().unwrap().is_dir() {
            out.extend(walk(&p));
        } else {
            out.push(p);
        }
    }
    out
}
