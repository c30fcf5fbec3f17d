//! Reload (SIGHUP in the daemon): a bad config is rejected whole and the running one keeps
//! working; a good one is swapped in, and the changed rules apply from then on.

use std::time::Duration;

use linewarden::archive::Record;
use linewarden::archive::reader::{Filter, Reader};
use linewarden::config;

mod common;
use common::BORE_LIMITS;

fn config_text(extra_rule: &str) -> String {
    format!(
        r#"[daemon]
archive_dir = "archive"
flush_interval_ms = 2

[[characteristic]]
id = "bore"
limits = "bore.toml"
subgroup = {{ size = 4 }}
[[characteristic.rules.rule]]
kind = "beyond-limits"
{extra_rule}

[[source]]
id = "feed"
kind = "replay"
file = "feed.jsonl"
speed = 1
"#
    )
}

#[test]
fn a_bad_reload_is_rejected_and_a_good_one_applies() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    std::fs::write(d.join("bore.toml"), BORE_LIMITS).unwrap();
    let mut feed = String::new();
    for i in 0..200 {
        let v = 12.001 + if i % 2 == 0 { 0.0005 } else { -0.0005 };
        feed.push_str(&format!(
            "{{\"t_ms\": {}, \"characteristic\": \"bore\", \"value\": {v}}}\n",
            i * 15
        ));
    }
    std::fs::write(d.join("feed.jsonl"), feed).unwrap();
    let path = d.join("cell.toml");
    std::fs::write(&path, config_text("")).unwrap();
    let cfg = config::load(&path).unwrap();

    let rt = tokio::runtime::Builder::new_multi_thread()
        .worker_threads(2)
        .enable_all()
        .build()
        .unwrap();
    let summary = rt.block_on(async {
        let (_stop, stop_rx) = tokio::sync::watch::channel(false);
        let (reload, reload_rx) = tokio::sync::mpsc::channel(4);
        let daemon = tokio::spawn(linewarden::daemon::run(cfg, stop_rx, reload_rx));
        tokio::time::sleep(Duration::from_millis(700)).await;
        // A broken file: rejected whole, the daemon goes on.
        std::fs::write(&path, "[daemon]\narchive_dir = 5\n").unwrap();
        reload.send(()).await.unwrap();
        tokio::time::sleep(Duration::from_millis(400)).await;
        assert!(
            !daemon.is_finished(),
            "a bad reload must not stop the daemon"
        );
        // A good file with a run rule added.
        std::fs::write(
            &path,
            config_text("[[characteristic.rules.rule]]\nkind = \"one-side-run\"\nlength = 5\n"),
        )
        .unwrap();
        reload.send(()).await.unwrap();
        daemon.await.unwrap().unwrap()
    });
    assert_eq!(summary.accepted, 200);

    let r = Reader::open(&d.join("archive")).unwrap();
    let mut loads = Vec::new();
    let mut runs = Vec::new();
    for e in r.iter(&Filter::default()) {
        let e = e.unwrap();
        match &e.record {
            Record::ConfigLoaded { .. } => loads.push(e.seq),
            Record::SubgroupResult { violations, .. }
                if violations.iter().any(|v| v.rule == "one-side-run") =>
            {
                runs.push(e.seq);
            }
            _ => {}
        }
    }
    assert_eq!(
        loads.len(),
        2,
        "the start and the good reload; the bad one loaded nothing"
    );
    assert!(!runs.is_empty(), "the added rule fires");
    assert!(
        runs.iter().all(|s| *s > loads[1]),
        "and only after the reload"
    );
}
