//! A serial gauge through a pseudo-terminal pair: frames are read and converted, garbage is
//! rejected, and when the "adapter" is unplugged (the pty's other end closes) the source
//! reopens the port once it is back and goes on.

use std::path::Path;
use std::time::{Duration, Instant};

use linewarden::archive::Record;
use linewarden::archive::reader::{Filter, Reader};
use linewarden::config;

mod common;
use common::pty::Pty;

fn relink(link: &Path, target: &str) {
    let _ = std::fs::remove_file(link);
    std::os::unix::fs::symlink(target, link).unwrap();
}

fn accepted(archive: &Path) -> Vec<f64> {
    let Ok(r) = Reader::open(archive) else {
        return Vec::new();
    };
    r.iter(&Filter::default())
        .filter_map(|e| match e.ok()?.record {
            Record::ReadingAccepted { value, .. } => Some(value),
            _ => None,
        })
        .collect()
}

#[test]
fn a_serial_gauge_is_read_converted_and_survives_an_unplug() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    std::fs::write(d.join("bore.toml"), common::BORE_LIMITS).unwrap();
    let link = d.join("gauge");
    let first = Pty::open();
    relink(&link, &first.path);
    let text = format!(
        r#"[daemon]
archive_dir = "archive"
flush_interval_ms = 2

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
"#,
        link.display()
    );
    std::fs::write(d.join("cell.toml"), text).unwrap();
    let cfg = config::load(&d.join("cell.toml")).unwrap();
    let archive = d.join("archive");
    let rt = tokio::runtime::Builder::new_multi_thread()
        .worker_threads(2)
        .enable_all()
        .build()
        .unwrap();
    rt.block_on(async {
        let (stop, stop_rx) = tokio::sync::watch::channel(false);
        let (_reload, reload_rx) = tokio::sync::mpsc::channel(1);
        let daemon = tokio::spawn(linewarden::daemon::run(cfg, stop_rx, reload_rx));
        let wait_for = |n: usize| {
            let archive = archive.clone();
            async move {
                let start = Instant::now();
                while accepted(&archive).len() < n && start.elapsed() < Duration::from_secs(15) {
                    tokio::time::sleep(Duration::from_millis(50)).await;
                }
            }
        };
        tokio::time::sleep(Duration::from_millis(500)).await;
        // A number too large for a double: what broke was its record saying "inf".
        first.write(&format!(
            "12.001\r\n12.002 mm\r\nERR 7\r\n{}20.0008\r\n0.4725 in\r\n",
            "9".repeat(320)
        ));
        wait_for(3).await;
        // Unplug, and plug a new adapter in at the same name.
        first.unplug();
        tokio::time::sleep(Duration::from_millis(300)).await;
        let second = Pty::open();
        relink(&link, &second.path);
        let start = Instant::now();
        // Keep sending until the reopened port delivers (the source backs off between tries).
        while accepted(&archive).len() < 5 && start.elapsed() < Duration::from_secs(15) {
            second.write("12.003\r\n");
            tokio::time::sleep(Duration::from_millis(300)).await;
        }
        stop.send(true).unwrap();
        daemon.await.unwrap().unwrap();
        second.unplug();
    });
    let values = accepted(&archive);
    assert!(values.len() >= 5, "{values:?}");
    assert_eq!(&values[..2], &[12.001, 12.002]);
    assert!(
        (values[2] - 12.0015).abs() < 1e-9,
        "0.4725 in is 12.0015 mm: {}",
        values[2]
    );
    assert!(
        values[3..].iter().all(|v| *v == 12.003),
        "after the replug: {values:?}"
    );
    let r = Reader::open(&archive).unwrap();
    let rejected: Vec<String> = r
        .iter(&Filter {
            kinds: vec!["reading-rejected".into()],
            ..Filter::default()
        })
        .filter_map(|e| match e.unwrap().record {
            Record::ReadingRejected { raw, .. } => Some(raw),
            _ => None,
        })
        .collect();
    assert_eq!(
        rejected,
        [
            "ERR 7".to_string(),
            format!("{}… (327 bytes in all)", "9".repeat(200))
        ]
    );
}
