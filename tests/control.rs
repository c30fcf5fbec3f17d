//! The control socket against a hostile client. The regression: `ack --by $'Eve\n… INFO alert …
//! cleared'` wrote a genuine-looking line into the log, and a 100 kB name got "EOF while
//! parsing". Names and notes with any control character are refused with a clear message,
//! lengths are bounded, an over-long or malformed request gets an answer that says what is
//! wrong, and the daemon goes on answering.

use std::io::{BufRead, BufReader, Write};
use std::os::unix::net::UnixStream;
use std::path::Path;
use std::time::Duration;

mod common;

/// Sends `line` as it is and returns the daemon's one-line answer.
fn raw(socket: &Path, line: &[u8]) -> serde_json::Value {
    let mut s = UnixStream::connect(socket).unwrap();
    s.set_read_timeout(Some(Duration::from_secs(10))).unwrap();
    // A hostile client writes on; the daemon stops reading at its limit, answers and closes,
    // so the rest of an over-long request may meet a closed pipe. The answer is still there.
    let _ = s.write_all(line).and_then(|_| s.write_all(b"\n"));
    let mut answer = String::new();
    BufReader::new(s).read_line(&mut answer).unwrap();
    serde_json::from_str(answer.trim()).unwrap_or_else(|e| panic!("{e}: {answer:?}"))
}

fn ack(socket: &Path, by: &str, note: Option<&str>) -> serde_json::Value {
    let req = serde_json::json!({"request": "ack", "alert": "bore", "by": by, "note": note});
    raw(socket, req.to_string().as_bytes())
}

#[test]
fn names_and_notes_that_could_forge_a_log_line_or_flood_are_refused() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    std::fs::write(d.join("bore.toml"), common::BORE_LIMITS).unwrap();
    std::fs::create_dir_all(d.join("inbox")).unwrap();
    let socket = d.join("control.sock");
    let text = format!(
        r#"[daemon]
archive_dir = "archive"

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

[control]
socket = "{}"
mode = "0600"
"#,
        socket.display()
    );
    std::fs::write(d.join("cell.toml"), text).unwrap();
    let daemon = common::InProcess::start(&d.join("cell.toml"));
    common::wait("the control socket", Duration::from_secs(10), || {
        socket.exists()
    });

    let forged = "Eve\n2026-12-02T03:00:00Z INFO alerts: alert bore-1-beyond-limits cleared";
    // Every control character, in the name and in the note.
    for c in (0u8..0x20)
        .chain([0x7f])
        .map(char::from)
        .chain(['\u{85}', '\u{9b}'])
    {
        let name = format!("Eve{c}x");
        let v = ack(&socket, &name, None);
        assert_eq!(v["ok"], false, "{name:?}");
        assert!(
            v["error"].as_str().unwrap().contains("control character"),
            "{name:?}: {v}"
        );
        let v = ack(&socket, "Eve", Some(&format!("insert{c}changed")));
        assert!(
            v["error"]
                .as_str()
                .unwrap()
                .contains("note contains a control character")
        );
    }
    let v = ack(&socket, forged, None);
    assert!(
        v["error"].as_str().unwrap().contains("control character"),
        "{v}"
    );
    // Lengths: at the bound the name is taken (and refused only because nothing is open).
    let v = ack(&socket, &"é".repeat(80), None);
    assert!(
        v["error"].as_str().unwrap().contains("no alert waiting"),
        "{v}"
    );
    let v = ack(&socket, &"é".repeat(81), None);
    assert!(v["error"].as_str().unwrap().contains("at most 80"), "{v}");
    let v = ack(&socket, "Eve", Some(&"n".repeat(2001)));
    assert!(v["error"].as_str().unwrap().contains("at most 2000"), "{v}");
    // A request far over the line limit, one just under it, and bytes that are not a request.
    let v = ack(&socket, &"E".repeat(100_000), None);
    assert!(
        v["error"]
            .as_str()
            .unwrap()
            .contains("longer than 16384 bytes"),
        "{v}"
    );
    let v = raw(&socket, b"\xff\xfe not text");
    assert_eq!(v["ok"], false, "{v}");
    let v = raw(&socket, br#"{"request": "ack", "alert": "bore""#);
    assert!(
        v["error"].as_str().unwrap().contains("not a request"),
        "{v}"
    );
    // The daemon is still there and answers.
    let v = raw(&socket, br#"{"request": "status", "brief": true}"#);
    assert!(v["archive"]["state"].is_string(), "{v}");
    // And the command line refuses the forged name before it reaches the daemon.
    let (ok, _, err) = common::peers::cli(&[
        "ack",
        "bore",
        "--by",
        forged,
        "--socket",
        socket.to_str().unwrap(),
    ]);
    assert!(!ok && err.contains("control character"), "{err}");
    daemon.stop();
}

/// Learned limits approved over the real control socket with the command line, as an engineer
/// would: before approval the status says provisional; the approval is archived with who and
/// when, written into the limits file, and a second approval or an unknown characteristic is
/// refused with the reason.
#[test]
fn learned_limits_are_approved_from_the_command_line_and_the_approval_is_recorded() {
    use linewarden::archive::reader::{Filter, Reader};
    use linewarden::archive::record::Record;
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    std::fs::create_dir_all(d.join("inbox")).unwrap();
    let socket = d.join("control.sock");
    let text = format!(
        r#"[daemon]
archive_dir = "archive"

[[characteristic]]
id = "face"
unit = "mm"
limits = "limits/face.toml"
subgroup = {{ size = 3 }}
learning = {{ subgroups = 20 }}

[[source]]
id = "cmm"
kind = "folder"
path = "inbox"
rows = "per-part"
columns = {{ "Face" = "face" }}

[control]
socket = "{}"
mode = "0600"
"#,
        socket.display()
    );
    std::fs::write(d.join("cell.toml"), text).unwrap();
    let daemon = common::InProcess::start(&d.join("cell.toml"));
    common::wait("the control socket", Duration::from_secs(10), || {
        socket.exists()
    });
    let mut report = String::from("Face\n");
    let mut x = 0.37f64;
    for _ in 0..66 {
        x = (x * 3.7 + 0.11).fract();
        report.push_str(&format!("{:.4}\n", 38.2 + (x - 0.5) * 0.02));
    }
    std::fs::write(d.join("inbox/run-1.csv"), report).unwrap();
    let file = d.join("limits/face.toml");
    common::wait("learned limits", Duration::from_secs(20), || file.exists());
    let s = socket.to_str().unwrap();
    let (ok, out, err) = common::peers::cli(&["status", "--socket", s]);
    assert!(ok, "{err}");
    assert!(
        out.contains("PROVISIONAL") && out.contains("linewarden approve face"),
        "{out}"
    );
    assert!(
        std::fs::read_to_string(&file)
            .unwrap()
            .contains("provisional = true")
    );

    let (ok, _, err) = common::peers::cli(&["approve", "fcae", "--by", "R. Okafor", "--socket", s]);
    assert!(
        !ok && err.contains("no characteristic is called \"fcae\""),
        "{err}"
    );
    let (ok, out, err) = common::peers::cli(&[
        "approve",
        "face",
        "--by",
        "R. Okafor",
        "--note",
        "checked against the setup sheet",
        "--socket",
        s,
    ]);
    assert!(ok, "{err}");
    assert!(out.contains("approved"), "{out}");
    common::wait("the approved file", Duration::from_secs(10), || {
        std::fs::read_to_string(&file).is_ok_and(|t| t.contains("[approved]"))
    });
    let written = linewarden::limits_file::StoredLimits::load(&file).unwrap();
    assert!(!written.is_provisional());
    assert_eq!(written.approved.as_ref().unwrap().by, "R. Okafor");
    let (ok, _, err) = common::peers::cli(&["approve", "face", "--by", "Someone", "--socket", s]);
    assert!(
        !ok && err.contains("already approved by R. Okafor"),
        "{err}"
    );
    let (_, out, _) = common::peers::cli(&["status", "--socket", s]);
    assert!(!out.contains("PROVISIONAL"), "{out}");
    // `--brief` leaves the characteristics out, header and all.
    let (ok, out, _) = common::peers::cli(&["status", "--brief", "--socket", s]);
    assert!(
        ok && out.contains("light:") && !out.contains("characteristics:"),
        "{out}"
    );
    daemon.stop();
    let r = Reader::open(&d.join("archive")).unwrap();
    let approvals: Vec<_> = r
        .iter(&Filter::default())
        .flatten()
        .filter_map(|e| match e.record {
            Record::LimitsApproved { approval, .. } => Some(approval),
            _ => None,
        })
        .collect();
    assert_eq!(approvals.len(), 1);
    assert_eq!(
        approvals[0].note.as_deref(),
        Some("checked against the setup sheet")
    );
}
