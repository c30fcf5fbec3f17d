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
