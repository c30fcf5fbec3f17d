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
