//! systemd notifications: READY once the sources are up, WATCHDOG while the pipeline moves,
//! STOPPING at the end, over a real datagram socket as systemd provides it.

use std::os::unix::net::UnixDatagram;
use std::time::Duration;

mod common;

#[test]
fn ready_watchdog_and_stopping_reach_the_notify_socket() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let sock_path = d.join("notify.sock");
    let sock = UnixDatagram::bind(&sock_path).unwrap();
    sock.set_read_timeout(Some(Duration::from_millis(500)))
        .unwrap();
    // Read as systemd does, all the time, until the daemon says it is stopping.
    let reader = std::thread::spawn(move || {
        let mut got = Vec::new();
        let mut buf = [0u8; 512];
        let deadline = std::time::Instant::now() + Duration::from_secs(30);
        while std::time::Instant::now() < deadline {
            if let Ok(n) = sock.recv(&mut buf) {
                let m = String::from_utf8_lossy(&buf[..n]).into_owned();
                let stop = m.starts_with("STOPPING=1");
                got.push(m);
                if stop {
                    break;
                }
            }
        }
        got
    });
    // SAFETY: this test file has this one test, and the variables are set before the runtime
    // or any other thread that could read the environment starts.
    unsafe {
        std::env::set_var("NOTIFY_SOCKET", &sock_path);
        std::env::set_var("WATCHDOG_USEC", "100000");
    }
    let mut feed = String::new();
    for i in 0..40 {
        feed.push_str(&format!(
            "{{\"t_ms\": {}, \"characteristic\": \"c\", \"value\": {}}}\n",
            i * 20,
            1.0 + (i % 3) as f64 * 0.1
        ));
    }
    std::fs::write(d.join("feed.jsonl"), feed).unwrap();
    std::fs::write(
        d.join("cell.toml"),
        "[daemon]\narchive_dir = \"archive\"\n[[characteristic]]\nid = \"c\"\nsubgroup = { size = 2 }\n[[source]]\nid = \"f\"\nkind = \"replay\"\nfile = \"feed.jsonl\"\nspeed = 1\n",
    )
    .unwrap();
    let cfg = linewarden::config::load(&d.join("cell.toml")).unwrap();
    common::run_daemon(cfg);
    let got = reader.join().unwrap();
    let text = got.join("|");
    assert!(
        got[0].starts_with("READY=1\nSTATUS=monitoring 1 characteristic(s)"),
        "{text}"
    );
    assert!(got.iter().any(|m| m == "WATCHDOG=1"), "{text}");
    assert!(got.last().unwrap().starts_with("STOPPING=1"), "{text}");
}
