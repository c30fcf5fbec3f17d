//! Helpers shared by the daemon and engine tests.
#![allow(dead_code)]

pub mod peers;
pub mod pty;

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

/// The README's demo (config/demo.toml) with its archive, socket and learned limits in `dir`
/// and its replay at full speed.
pub fn demo_config(dir: &std::path::Path) -> linewarden::config::Config {
    let root = std::path::Path::new(env!("CARGO_MANIFEST_DIR"));
    let mut cfg = linewarden::config::load(&root.join("config/demo.toml")).unwrap();
    cfg.archive_dir = dir.join("archive");
    // Tests run side by side: none of them takes the demo's fixed port.
    cfg.web = None;
    if let Some(c) = &mut cfg.control {
        c.socket = dir.join("control.sock");
    }
    for c in &mut cfg.characteristics {
        // The characteristics that learn write under target/demo; an earlier demo run may have
        // left learned limits there. Start them afresh in the temporary directory.
        if c.limits_path
            .as_ref()
            .is_some_and(|p| p.to_string_lossy().contains("target/demo"))
        {
            let c = std::sync::Arc::make_mut(c);
            c.limits = None;
            c.limits_path = Some(dir.join(format!("limits/{}.toml", c.id)));
        }
    }
    for s in &mut cfg.sources {
        if let linewarden::config::Source::Replay { speed, .. } = s {
            *speed = 0.0;
        }
    }
    cfg
}

/// Runs the daemon on `cfg` until its sources end, on a two-worker runtime as in production.
pub fn run_daemon(cfg: linewarden::config::Config) -> linewarden::daemon::Summary {
    try_run_daemon(cfg).unwrap()
}

/// [`run_daemon`], giving back the daemon's error (one that refuses to start).
pub fn try_run_daemon(
    cfg: linewarden::config::Config,
) -> Result<linewarden::daemon::Summary, linewarden::daemon::DaemonError> {
    let rt = tokio::runtime::Builder::new_multi_thread()
        .worker_threads(2)
        .enable_all()
        .build()
        .unwrap();
    let (_stop, stop_rx) = tokio::sync::watch::channel(false);
    let (_reload, reload_rx) = tokio::sync::mpsc::channel(1);
    rt.block_on(linewarden::daemon::run(cfg, stop_rx, reload_rx))
}

/// The daemon running in this process on a two-worker runtime, as in production, until
/// [`InProcess::stop`].
pub struct InProcess {
    rt: tokio::runtime::Runtime,
    stop: tokio::sync::watch::Sender<bool>,
    daemon: tokio::task::JoinHandle<
        Result<linewarden::daemon::Summary, linewarden::daemon::DaemonError>,
    >,
    _reload: tokio::sync::mpsc::Sender<()>,
}

impl InProcess {
    /// Loads the config at `path` and starts the daemon on it.
    pub fn start(path: &std::path::Path) -> InProcess {
        let cfg = linewarden::config::load(path).unwrap();
        let rt = tokio::runtime::Builder::new_multi_thread()
            .worker_threads(2)
            .enable_all()
            .build()
            .unwrap();
        let (stop, stop_rx) = tokio::sync::watch::channel(false);
        let (reload, reload_rx) = tokio::sync::mpsc::channel(1);
        let daemon = rt.spawn(linewarden::daemon::run(cfg, stop_rx, reload_rx));
        InProcess {
            rt,
            stop,
            daemon,
            _reload: reload,
        }
    }

    pub fn is_finished(&self) -> bool {
        self.daemon.is_finished()
    }

    /// Asks for a reload of the config, as SIGHUP does.
    pub fn reload(&self) {
        self._reload.try_send(()).unwrap();
    }

    /// Stops it as SIGTERM would, and waits for a clean end.
    pub fn stop(self) -> linewarden::daemon::Summary {
        self.stop.send(true).unwrap();
        self.rt.block_on(self.daemon).unwrap().unwrap()
    }
}

/// Waits until `f` holds, polling; fails the test after `limit`.
pub fn wait(what: &str, limit: std::time::Duration, f: impl Fn() -> bool) {
    let start = std::time::Instant::now();
    while !f() {
        assert!(start.elapsed() < limit, "timed out waiting for {what}");
        std::thread::sleep(std::time::Duration::from_millis(20));
    }
}

/// A small filesystem, or None after saying why the test is skipped (a failure where CI sets
/// LINEWARDEN_REQUIRE_SMALL_FS).
pub fn small_fs_or_skip(
    base: &std::path::Path,
    size: &str,
) -> Option<(std::path::PathBuf, Option<Mount>)> {
    let fs = small_fs(base, size);
    if fs.is_none() {
        assert!(
            std::env::var("LINEWARDEN_REQUIRE_SMALL_FS").is_err(),
            "no small filesystem could be mounted, and CI requires one"
        );
        eprintln!("skipped: no small filesystem (run as root, or set LINEWARDEN_SMALL_FS)");
    }
    fs
}

/// A small filesystem mounted for a test, unmounted when dropped.
pub struct Mount(std::path::PathBuf);

impl Drop for Mount {
    fn drop(&mut self) {
        let _ = std::process::Command::new("umount")
            .arg("-l")
            .arg(&self.0)
            .status();
    }
}

/// A directory on a filesystem of `size` bytes (a tmpfs the test mounts as root, or the one CI
/// names in LINEWARDEN_SMALL_FS), or None when none can be had.
pub fn small_fs(base: &std::path::Path, size: &str) -> Option<(std::path::PathBuf, Option<Mount>)> {
    if let Ok(p) = std::env::var("LINEWARDEN_SMALL_FS") {
        let dir = std::path::PathBuf::from(p).join(format!("t{}", std::process::id()));
        std::fs::create_dir_all(&dir).ok()?;
        return Some((dir, None));
    }
    let mnt = base.join("fs");
    std::fs::create_dir_all(&mnt).ok()?;
    let ok = std::process::Command::new("mount")
        .args(["-t", "tmpfs", "-o", &format!("size={size}"), "tmpfs"])
        .arg(&mnt)
        .status()
        .is_ok_and(|s| s.success());
    ok.then(|| (mnt.clone(), Some(Mount(mnt))))
}

/// Fills the filesystem holding `dir` with a ballast file until writing fails; returns it.
pub fn fill_disk(dir: &std::path::Path) -> std::path::PathBuf {
    use std::io::Write;
    let ballast = dir.join("ballast");
    let mut f = std::fs::File::create(&ballast).unwrap();
    let chunk = vec![0u8; 4096];
    while f.write_all(&chunk).is_ok() {}
    let _ = f.sync_all();
    ballast
}
