//! Helpers shared by the daemon and engine tests.
#![allow(dead_code)]

pub mod peers;

/// Stored limits of a characteristic "bore": centre 12.000, sigma 0.004, subgroups of 4.
pub const BORE_LIMITS: &str = r#"format = 1
characteristic = "bore"
chart = "xbar-r"
subgroup_size = 4
unit = "mm"
[sigma]
within = 0.004
overall = 0.004
method = "average range / d2"
[location]
center = 12.0
ucl = 12.006
lcl = 11.994
[dispersion]
kind = "range"
center = 0.008236
ucl = 0.018792
lcl = 0.0
[provenance]
computed_at = "2026-12-01T08:00:00Z"
source = "test"
tool = "linewarden test"
subgroups_total = 25
subgroups_used = 25
used = "1-25"
"#;

/// Runs the daemon on `cfg` until its sources end, on a two-worker runtime as in production.
pub fn run_daemon(cfg: linewarden::config::Config) -> linewarden::daemon::Summary {
    let rt = tokio::runtime::Builder::new_multi_thread()
        .worker_threads(2)
        .enable_all()
        .build()
        .unwrap();
    let (_stop, stop_rx) = tokio::sync::watch::channel(false);
    let (_reload, reload_rx) = tokio::sync::mpsc::channel(1);
    rt.block_on(linewarden::daemon::run(cfg, stop_rx, reload_rx))
        .unwrap()
}
