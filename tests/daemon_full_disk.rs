//! The daemon on a full disk. The regression: with the archive on a full filesystem the daemon
//! exited with status 1 within a millisecond of the first ENOSPC (under systemd, a restart loop
//! while the disk stays full). Now it holds its sources back, shows attention on the light,
//! says why in `status`, answers acknowledgements, and resumes by itself when space is back,
//! with every reading of the reports that waited archived exactly once.

use std::path::Path;
use std::time::Duration;

use linewarden::archive::Record;
use linewarden::archive::reader::{self, Filter, Reader};
use linewarden::daemon::control::{ClientRequest, ask};
use linewarden::daemon::hub::{Light, StatusReport};

mod common;
use common::{InProcess, fill_disk, small_fs_or_skip, wait};

fn report(first: usize) -> String {
    let mut s = String::from("Serial,Bore\n");
    for i in first..first + 20 {
        s.push_str(&format!("VB{i:05},{}\n", 12.0 + (i % 4) as f64 * 0.001));
    }
    s
}

fn status(socket: &Path) -> StatusReport {
    let v = ask(socket, &ClientRequest::Status { brief: true }).expect("status answers");
    serde_json::from_value(v).unwrap()
}

#[test]
fn a_full_disk_holds_the_sources_back_and_the_daemon_resumes_by_itself() {
    let base = tempfile::tempdir().unwrap();
    let Some((root, _mount)) = small_fs_or_skip(base.path(), "4m") else {
        return;
    };
    let d = base.path();
    std::fs::write(d.join("bore.toml"), common::BORE_LIMITS).unwrap();
    std::fs::create_dir_all(d.join("inbox")).unwrap();
    let archive = root.join("archive");
    let socket = d.join("control.sock");
    let text = format!(
        r#"[daemon]
archive_dir = "{}"
flush_interval_ms = 5

[[characteristic]]
id = "bore"
limits = "bore.toml"
subgroup = {{ size = 4 }}

[[source]]
id = "cmm"
kind = "folder"
path = "inbox"
rows = "per-part"
columns = {{ "Bore" = "bore" }}
part_column = "Serial"
settle_ms = 50

[control]
socket = "{}"
mode = "0600"
"#,
        archive.display(),
        socket.display()
    );
    let cfg_path = d.join("cell.toml");
    std::fs::write(&cfg_path, text).unwrap();
    let daemon = InProcess::start(&cfg_path);
    let inbox = d.join("inbox");
    wait("the control socket", Duration::from_secs(10), || {
        socket.exists()
    });
    std::fs::write(inbox.join("r1.csv"), report(0)).unwrap();
    wait("the first report", Duration::from_secs(10), || {
        inbox.join("done/r1.csv").exists()
    });

    // The disk fills; two reports arrive.
    let ballast = fill_disk(&root);
    std::fs::write(inbox.join("r2.csv"), report(100)).unwrap();
    wait(
        "the archive to report the full disk",
        Duration::from_secs(20),
        || status(&socket).archive.state.starts_with("disk-full"),
    );
    std::fs::write(inbox.join("r3.csv"), report(200)).unwrap();
    std::thread::sleep(Duration::from_millis(800));
    assert!(!daemon.is_finished(), "the daemon is still running");
    let s = status(&socket);
    assert!(
        s.archive.state.contains("the disk is full"),
        "{}",
        s.archive.state
    );
    assert_eq!(s.light, Light::Attention, "the light shows attention");
    assert!(
        !inbox.join("done/r2.csv").exists(),
        "not moved before it is durable"
    );
    assert!(
        inbox.join("r3.csv").exists(),
        "the next report waits where it was dropped"
    );
    // Acknowledgements are still answered (there is nothing to acknowledge: a clear refusal).
    let v = ask(
        &socket,
        &ClientRequest::Ack {
            alert: "bore".into(),
            by: "Nightshift Lead".into(),
            note: None,
        },
    )
    .unwrap();
    assert_eq!(v["ok"], false, "{v}");

    // Space is back: everything resumes by itself.
    std::fs::remove_file(&ballast).unwrap();
    wait("the waiting reports", Duration::from_secs(30), || {
        inbox.join("done/r2.csv").exists() && inbox.join("done/r3.csv").exists()
    });
    wait("the archive to run again", Duration::from_secs(10), || {
        status(&socket).archive.state == "running"
    });
    assert_eq!(status(&socket).light, Light::Normal);
    daemon.stop();

    let r = Reader::open(&archive).unwrap();
    let mut parts = std::collections::BTreeMap::<String, usize>::new();
    for e in r.iter(&Filter::default()) {
        if let Record::ReadingAccepted { part: Some(p), .. } = e.unwrap().record {
            *parts.entry(p).or_default() += 1;
        }
    }
    assert_eq!(parts.len(), 60, "every reading of the three reports");
    assert!(parts.values().all(|n| *n == 1), "none twice");
    let v = reader::verify(&archive).unwrap();
    assert!(v.problems.is_empty(), "{:?}", v.problems);
}

/// A serial gauge cannot be paused. While the disk is full its readings are dropped once the
/// queue to the engine is full, counted, and the count archived as soon as there is room:
/// every frame the gauge sent is either an accepted reading or in that count, none twice.
#[test]
fn a_serial_gauge_on_a_full_disk_counts_what_it_drops_and_the_count_is_archived() {
    let base = tempfile::tempdir().unwrap();
    let Some((root, _mount)) = small_fs_or_skip(base.path(), "4m") else {
        return;
    };
    let d = base.path();
    std::fs::write(d.join("bore.toml"), common::BORE_LIMITS).unwrap();
    let gauge = common::pty::Pty::open();
    let archive = root.join("archive");
    let socket = d.join("control.sock");
    let text = format!(
        r#"[daemon]
archive_dir = "{}"
flush_interval_ms = 5

[[characteristic]]
id = "bore"
unit = "mm"
limits = "bore.toml"
subgroup = {{ size = 4 }}

[[source]]
id = "caliper"
kind = "serial"
port = "{}"
baud = 9600
characteristic = "bore"

[control]
socket = "{}"
mode = "0600"
"#,
        archive.display(),
        gauge.path,
        socket.display()
    );
    std::fs::write(d.join("cell.toml"), text).unwrap();
    let daemon = InProcess::start(&d.join("cell.toml"));
    wait("the control socket", Duration::from_secs(10), || {
        socket.exists()
    });
    let counts = || {
        let (mut accepted, mut dropped) = (0u64, 0u64);
        if let Ok(r) = Reader::open(&archive) {
            for e in r.iter(&Filter::default()).flatten() {
                match e.record {
                    Record::ReadingAccepted { .. } => accepted += 1,
                    Record::ReadingRejected { raw, reason, .. } if reason.contains("dropped") => {
                        dropped += raw.split(' ').next().unwrap().parse::<u64>().unwrap();
                    }
                    _ => {}
                }
            }
        }
        (accepted, dropped)
    };
    let mut sent = 0u64;
    let mut send = |n: u64| {
        for _ in 0..n {
            gauge.write(&format!("{:.3}\r\n", 12.0 + (sent % 4) as f64 * 0.001));
            sent += 1;
        }
    };
    wait("the port to open", Duration::from_secs(10), || {
        status(&socket).sources.iter().any(|s| s.state == "up")
    });
    send(8);
    wait("the first readings", Duration::from_secs(10), || {
        counts().0 == 8
    });

    let ballast = fill_disk(&root);
    // Enough to need a new page of the filesystem (a record or two fit in the last one).
    send(40);
    wait(
        "the archive to report the full disk",
        Duration::from_secs(20),
        || status(&socket).archive.state.starts_with("disk-full"),
    );
    // Far more than the queue to the engine holds.
    for _ in 0..30 {
        send(100);
        std::thread::sleep(Duration::from_millis(20));
    }
    std::thread::sleep(Duration::from_millis(500));
    assert!(!daemon.is_finished());
    std::fs::remove_file(&ballast).unwrap();
    wait("the archive to run again", Duration::from_secs(15), || {
        status(&socket).archive.state == "running"
    });
    // The next reading after the pause carries the count with it.
    send(4);
    wait("every frame accounted for", Duration::from_secs(20), || {
        let (a, dr) = counts();
        a + dr == sent
    });
    let (accepted, dropped) = counts();
    assert!(
        dropped > 0,
        "nothing was dropped: the test did not fill the queue"
    );
    assert!(
        accepted >= 1024,
        "the queue's readings were kept: {accepted}"
    );
    eprintln!("{sent} frames: {accepted} archived, {dropped} dropped and counted");
    daemon.stop();
}
