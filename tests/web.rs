//! The daemon's HTTP endpoint with real peers: the metrics a monitoring system scrapes (checked
//! by `promtool` when it is installed), the health checks, and clients that misbehave.

use std::io::{Read, Write};
use std::net::TcpStream;
use std::path::Path;
use std::time::Duration;

mod common;
use common::peers::{free_port, wait_for_port};

fn cell(dir: &Path, port: u16, light_port: u16) -> std::path::PathBuf {
    std::fs::write(dir.join("bore.toml"), common::BORE_LIMITS).unwrap();
    std::fs::create_dir_all(dir.join("inbox")).unwrap();
    let text = format!(
        r#"[daemon]
archive_dir = "archive"
flush_interval_ms = 2

[[characteristic]]
id = "bore"
limits = "bore.toml"
subgroup = {{ size = 4 }}
[characteristic.rules]
preset = "western-electric"

[[source]]
id = "cmm"
kind = "folder"
path = "inbox"
rows = "per-part"
columns = {{ "Bore" = "bore" }}
part_column = "Serial"
settle_ms = 50

# Nothing listens here: every attempt to reach the light fails, and is counted.
[[output]]
id = "light"
kind = "stack-light"
modbus = "tcp://127.0.0.1:{light_port}"
unit_id = 1
coils = {{ red = 0, yellow = 1, green = 2 }}

[web]
listen = "127.0.0.1:{port}"
"#
    );
    let p = dir.join("cell.toml");
    std::fs::write(&p, text).unwrap();
    p
}

/// A plain HTTP/1.1 GET; (status, body).
fn get(port: u16, path: &str) -> (u16, String) {
    get_with(port, path, "")
}

/// A GET with extra header lines (each ending in \r\n).
fn get_with(port: u16, path: &str, headers: &str) -> (u16, String) {
    let mut s = TcpStream::connect(("127.0.0.1", port)).unwrap();
    s.set_read_timeout(Some(Duration::from_secs(10))).unwrap();
    write!(
        s,
        "GET {path} HTTP/1.1\r\nHost: 127.0.0.1:{port}\r\n{headers}Connection: close\r\n\r\n"
    )
    .unwrap();
    let mut text = String::new();
    s.read_to_string(&mut text).unwrap();
    let status = text
        .split_whitespace()
        .nth(1)
        .and_then(|c| c.parse().ok())
        .unwrap_or(0);
    let body = text.split_once("\r\n\r\n").map_or("", |(_, b)| b);
    (status, body.to_string())
}

/// The value of the sample `name{labels}` (labels as written), if present.
fn sample(text: &str, series: &str) -> Option<f64> {
    text.lines()
        .find_map(|l| l.strip_prefix(series)?.strip_prefix(' ')?.parse().ok())
}

#[test]
fn metrics_count_what_the_cell_did_and_pass_promtool() {
    let dir = tempfile::tempdir().unwrap();
    let port = free_port();
    let cfg = cell(dir.path(), port, free_port());
    let daemon = common::InProcess::start(&cfg);
    wait_for_port(port);
    // Eight parts: the first four in control, the last four far above the limits.
    let mut report = String::from("Serial,Bore\n");
    for i in 0..8 {
        let v = if i < 4 { 12.001 } else { 12.02 };
        report.push_str(&format!("VB{i:03},{v}\n"));
    }
    report.push_str("VB099,12.0O1\n");
    std::fs::write(dir.path().join("inbox/r1.csv"), report).unwrap();
    common::wait(
        "two subgroups in the metrics",
        Duration::from_secs(20),
        || {
            let text = get(port, "/metrics").1;
            sample(
                &text,
                "linewarden_subgroups_checked_total{characteristic=\"bore\"}",
            ) == Some(2.0)
        },
    );
    let text = get(port, "/metrics").1;
    for (series, want) in [
        (
            "linewarden_readings_accepted_total{source=\"folder:cmm\"}",
            8.0,
        ),
        (
            "linewarden_readings_rejected_total{source=\"folder:cmm\"}",
            1.0,
        ),
        ("linewarden_source_up{source=\"folder:cmm\"}", 1.0),
        (
            "linewarden_violations_total{characteristic=\"bore\",rule=\"beyond-limits\",severity=\"stop\"}",
            1.0,
        ),
        ("linewarden_open_alerts{severity=\"stop\"}", 1.0),
        ("linewarden_unacknowledged_stop_alerts", 1.0),
        ("linewarden_archive_writable", 1.0),
        ("linewarden_build_info{version=\"0.1.0\"}", 1.0),
    ] {
        assert_eq!(sample(&text, series), Some(want), "{series} in\n{text}");
    }
    for series in [
        "linewarden_archive_durable_sequence",
        "linewarden_archive_size_bytes",
        "linewarden_archive_disk_free_bytes",
        "linewarden_engine_loop_lag_seconds",
    ] {
        let v = sample(&text, series).unwrap_or_else(|| panic!("{series} in\n{text}"));
        assert!(v >= 0.0, "{series} {v}");
    }
    common::wait("the readings durable", Duration::from_secs(20), || {
        // (The folder source makes each report durable with an explicit flush: that moves
        // the durable sequence as well as the group commit's syncs.)
        sample(
            &get(port, "/metrics").1,
            "linewarden_archive_durable_sequence",
        )
        .is_some_and(|n| n >= 9.0)
    });
    common::wait("a failed delivery counted", Duration::from_secs(20), || {
        sample(
            &get(port, "/metrics").1,
            "linewarden_output_delivery_failures_total{output=\"light\"}",
        )
        .is_some_and(|n| n >= 1.0)
    });
    // No value, part or subgroup number is ever a label (cardinality stays bounded).
    for l in text.lines().filter(|l| !l.starts_with('#')) {
        assert!(!l.contains("VB0") && !l.contains("12.02"), "{l}");
    }
    promtool_check(&get(port, "/metrics").1);
    // A scraper that asks for OpenMetrics gets it.
    let om = get_with(
        port,
        "/metrics",
        "Accept: application/openmetrics-text;version=1.0.0,text/plain;q=0.5\r\n",
    )
    .1;
    assert!(om.ends_with("# EOF\n"), "{om}");
    assert!(om.contains("# TYPE linewarden_build info"), "{om}");

    assert_eq!(get(port, "/healthz"), (200, "alive\n".to_string()));
    assert_eq!(get(port, "/readyz"), (200, "ready\n".to_string()));
    assert_eq!(get(port, "/no-such-page").0, 404);
    daemon.stop();
}

/// `promtool check metrics` on the text, when promtool is installed (CI installs it and sets
/// LINEWARDEN_REQUIRE_PROMTOOL=1).
fn promtool_check(text: &str) {
    let Ok(mut child) = std::process::Command::new("promtool")
        .args(["check", "metrics"])
        .stdin(std::process::Stdio::piped())
        .stdout(std::process::Stdio::piped())
        .stderr(std::process::Stdio::piped())
        .spawn()
    else {
        assert!(
            std::env::var("LINEWARDEN_REQUIRE_PROMTOOL").is_err(),
            "promtool is required here (apt-get install prometheus)"
        );
        eprintln!("promtool not installed: the metrics text was not checked by it");
        return;
    };
    child
        .stdin
        .take()
        .unwrap()
        .write_all(text.as_bytes())
        .unwrap();
    let out = child.wait_with_output().unwrap();
    assert!(
        out.status.success(),
        "promtool check metrics:\n{}{}\non\n{text}",
        String::from_utf8_lossy(&out.stdout),
        String::from_utf8_lossy(&out.stderr)
    );
}

#[test]
fn garbage_oversized_and_silent_clients_do_not_stop_the_endpoint() {
    let dir = tempfile::tempdir().unwrap();
    let port = free_port();
    let cfg = cell(dir.path(), port, free_port());
    let daemon = common::InProcess::start(&cfg);
    wait_for_port(port);
    // A client that connects and says nothing, kept open throughout.
    let _silent = TcpStream::connect(("127.0.0.1", port)).unwrap();
    // Bytes that are not HTTP.
    let mut g = TcpStream::connect(("127.0.0.1", port)).unwrap();
    g.set_read_timeout(Some(Duration::from_secs(10))).unwrap();
    g.write_all(b"\x16\x03\x01\x02\x00\x01\x00\x01\xfc\x03\x03 not http\r\n\r\n")
        .unwrap();
    let mut answer = Vec::new();
    let _ = g.read_to_end(&mut answer);
    let answer = String::from_utf8_lossy(&answer);
    assert!(
        answer.is_empty() || answer.starts_with("HTTP/1.1 400"),
        "{answer}"
    );
    // A header of a megabyte.
    let mut big = TcpStream::connect(("127.0.0.1", port)).unwrap();
    big.set_read_timeout(Some(Duration::from_secs(10))).unwrap();
    let head = format!(
        "GET /metrics HTTP/1.1\r\nHost: x\r\nX-Filler: {}\r\n\r\n",
        "a".repeat(1 << 20)
    );
    let _ = big.write_all(head.as_bytes());
    let mut answer = Vec::new();
    let _ = big.read_to_end(&mut answer);
    let answer = String::from_utf8_lossy(&answer);
    assert!(
        answer.is_empty()
            || answer.starts_with("HTTP/1.1 431")
            || answer.starts_with("HTTP/1.1 400"),
        "{}",
        &answer[..answer.len().min(200)]
    );
    // A hundred requests at once, and the daemon still answers and still works.
    let many: Vec<_> = (0..100)
        .map(|_| std::thread::spawn(move || get(port, "/metrics").0))
        .collect();
    for t in many {
        assert_eq!(t.join().unwrap(), 200);
    }
    assert_eq!(get(port, "/healthz").0, 200);
    assert!(!daemon.is_finished());
    daemon.stop();
}

#[test]
fn a_port_already_taken_stops_the_start_with_the_address_named() {
    let dir = tempfile::tempdir().unwrap();
    let taken = std::net::TcpListener::bind("127.0.0.1:0").unwrap();
    let port = taken.local_addr().unwrap().port();
    let cfg = cell(dir.path(), port, free_port());
    let cfg = linewarden::config::load(&cfg).unwrap();
    let err = common::try_run_daemon(cfg).unwrap_err().to_string();
    assert!(
        err.contains(&format!("127.0.0.1:{port}")) && err.contains("[web]"),
        "{err}"
    );
}

/// Reads from an event stream until `want` appears or `limit` passes; what was read.
fn read_for(s: &mut TcpStream, want: &str, limit: Duration) -> String {
    let start = std::time::Instant::now();
    let mut got = Vec::new();
    let mut buf = [0u8; 4096];
    s.set_read_timeout(Some(Duration::from_millis(100)))
        .unwrap();
    while start.elapsed() < limit {
        match s.read(&mut buf) {
            Ok(0) => break,
            Ok(n) => got.extend_from_slice(&buf[..n]),
            Err(_) => {}
        }
        if String::from_utf8_lossy(&got).contains(want) {
            break;
        }
    }
    String::from_utf8_lossy(&got).into_owned()
}

fn open_events(port: u16, last: Option<&str>) -> TcpStream {
    let mut s = TcpStream::connect(("127.0.0.1", port)).unwrap();
    let resume = last.map_or(String::new(), |id| format!("Last-Event-ID: {id}\r\n"));
    write!(
        s,
        "GET /events HTTP/1.1\r\nHost: 127.0.0.1:{port}\r\nAccept: text/event-stream\r\n{resume}\r\n"
    )
    .unwrap();
    s
}

#[test]
fn event_streams_resume_by_id_and_a_stalled_one_holds_nothing_up() {
    let dir = tempfile::tempdir().unwrap();
    let port = free_port();
    let cfg = cell(dir.path(), port, free_port());
    let daemon = common::InProcess::start(&cfg);
    wait_for_port(port);
    // A fresh stream is told where things stand at once, with an id.
    let mut first = open_events(port, None);
    let text = read_for(&mut first, "\n\n", Duration::from_secs(5));
    assert!(text.contains("event: changed"), "{text}");
    let id = text
        .lines()
        .find_map(|l| l.strip_prefix("id: "))
        .unwrap_or_else(|| panic!("an id in {text}"))
        .trim()
        .to_string();
    // Resuming from that id: nothing new, nothing sent; from an old id: told at once.
    let mut same = open_events(port, Some(&id));
    let quiet = read_for(&mut same, "event: changed", Duration::from_millis(1500));
    assert!(!quiet.contains("event: changed"), "{quiet}");
    let mut old = open_events(port, Some("1"));
    assert!(
        read_for(&mut old, "event: changed", Duration::from_secs(5)).contains("event: changed")
    );

    // Fifty streams that never read, while a report goes through: the cell carries on, and
    // a stream that reads hears of it.
    let _stalled: Vec<TcpStream> = (0..50).map(|_| open_events(port, None)).collect();
    let mut report = String::from("Serial,Bore\n");
    for i in 0..400 {
        report.push_str(&format!("VB{i:04},{}\n", 12.0 + (i % 5) as f64 * 0.001));
    }
    std::fs::write(dir.path().join("inbox/big.csv"), report).unwrap();
    common::wait("the report through", Duration::from_secs(30), || {
        sample(
            &get(port, "/metrics").1,
            "linewarden_subgroups_checked_total{characteristic=\"bore\"}",
        ) == Some(100.0)
    });
    let news = read_for(&mut same, "event: changed", Duration::from_secs(5));
    assert!(news.contains("event: changed"), "{news}");
    daemon.stop();
}

#[test]
fn after_a_reload_the_page_shows_the_characteristics_configured_now() {
    let dir = tempfile::tempdir().unwrap();
    let port = free_port();
    let cfg = cell(dir.path(), port, free_port());
    let text = std::fs::read_to_string(&cfg).unwrap();
    let with_face = text.replace(
        "[[source]]",
        "[[characteristic]]\nid = \"face\"\nname = \"Face height\"\nsubgroup = { size = 1 }\nlearning = { subgroups = 20 }\n\n[[source]]",
    );
    std::fs::write(&cfg, &with_face).unwrap();
    let daemon = common::InProcess::start(&cfg);
    wait_for_port(port);
    let page = get(port, "/").1;
    assert!(
        page.contains("data-characteristic=\"face\"")
            && page.contains("data-characteristic=\"bore\""),
        "{page}"
    );
    // The face height goes, the port depth comes.
    std::fs::write(
        &cfg,
        with_face
            .replace("id = \"face\"", "id = \"port\"")
            .replace("Face height", "Port depth"),
    )
    .unwrap();
    daemon.reload();
    common::wait(
        "the page follows the reload",
        Duration::from_secs(10),
        || {
            let page = get(port, "/").1;
            page.contains("data-characteristic=\"port\"")
                && !page.contains("data-characteristic=\"face\"")
        },
    );
    assert_eq!(get(port, "/c/face").0, 404);
    assert_eq!(get(port, "/c/port").0, 200);
    daemon.stop();
}

/// What broke: nothing timed out a half-sent request header and nothing capped connections;
/// 1100 idle connections used up the daemon's descriptors, the archive writer failed with
/// "Too many open files", took it as permanent, and monitoring stopped (at a limit of 256 the
/// daemon exited with no `daemon-stopped` record). Here, under a limit of 256, 400 clients open
/// connections and send half a header while readings stream in: every reading is archived,
/// the daemon runs on, the idle connections are closed within the header timeout, the page
/// still answers, and SIGTERM ends it with `daemon-stopped` as the last record, its reason
/// true, and the log's last durable sequence equal to the archive's last record.
#[test]
fn idle_page_connections_never_starve_the_archive() {
    use linewarden::archive::Record;
    use linewarden::archive::reader::{Filter, Reader};
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let port = free_port();
    // 200 readings over about four seconds.
    let feed: Vec<String> = (0..200)
        .map(|i| {
            format!(
                r#"{{"t_ms": {}, "characteristic": "bore", "value": {}}}"#,
                1000 + 20 * i,
                12.0 + 0.001 * (i % 3) as f64
            )
        })
        .collect();
    std::fs::write(d.join("feed.jsonl"), feed.join("\n") + "\n").unwrap();
    std::fs::write(d.join("bore.toml"), common::BORE_LIMITS).unwrap();
    std::fs::create_dir_all(d.join("inbox")).unwrap();
    let cfg = d.join("cell.toml");
    std::fs::write(
        &cfg,
        format!(
            r#"[daemon]
archive_dir = "archive"
flush_interval_ms = 2

[[characteristic]]
id = "bore"
limits = "bore.toml"
subgroup = {{ size = 4 }}

[[source]]
id = "feed"
kind = "replay"
file = "feed.jsonl"
speed = 1

# A source that never ends, so the daemon runs until it is told to stop.
[[source]]
id = "cmm"
kind = "folder"
path = "inbox"
rows = "per-part"
columns = {{ "Bore" = "bore" }}
part_column = "Serial"

[web]
listen = "127.0.0.1:{port}"
"#
        ),
    )
    .unwrap();
    let log = d.join("daemon.log");
    let mut daemon = common::peers::Daemon::start_limited(&cfg, &log, Some(256));
    wait_for_port(port);
    let mut idle = Vec::new();
    for _ in 0..400 {
        if let Ok(mut s) = TcpStream::connect(("127.0.0.1", port)) {
            let _ = s.write_all(b"GET / HTTP/1.1\r\nHost: 127.0.0.1\r\nX-Slow: ");
            idle.push(s);
        }
    }
    let archive = d.join("archive");
    let accepted = || {
        Reader::open(&archive)
            .map(|r| {
                r.iter(&Filter::default())
                    .flatten()
                    .filter(|e| matches!(e.record, Record::ReadingAccepted { .. }))
                    .count()
            })
            .unwrap_or(0)
    };
    common::wait("every reading archived", Duration::from_secs(30), || {
        accepted() == 200
    });
    assert!(daemon.is_running(), "{}", daemon.log_text());
    // Past the header timeout every idle connection has been closed by the daemon.
    std::thread::sleep(linewarden::daemon::web::HEADER_TIMEOUT + Duration::from_secs(2));
    for s in &mut idle {
        s.set_read_timeout(Some(Duration::from_secs(5))).unwrap();
        let mut buf = [0u8; 512];
        match s.read(&mut buf) {
            // Closed, with or without a 408 first.
            Ok(0) | Err(_) => {}
            Ok(n) => {
                let text = String::from_utf8_lossy(&buf[..n]);
                assert!(text.starts_with("HTTP/1.1 408"), "{text}");
            }
        }
    }
    drop(idle);
    assert_eq!(get(port, "/healthz").0, 200);
    assert!(!daemon.log_text().contains("Too many open files"));
    daemon.stop();

    let records: Vec<_> = Reader::open(&archive)
        .unwrap()
        .iter(&Filter::default())
        .map(|e| e.unwrap())
        .collect();
    let last = records.last().unwrap();
    assert_eq!(
        last.record,
        Record::DaemonStopped {
            reason: "stopped by SIGTERM".into()
        }
    );
    let text = std::fs::read_to_string(&log).unwrap();
    let said = text
        .lines()
        .rev()
        .find_map(|l| l.split("archive durable to sequence ").nth(1))
        .unwrap()
        .split_whitespace()
        .next()
        .unwrap()
        .parse::<u64>()
        .unwrap();
    assert_eq!(said, last.seq, "{text}");
}
