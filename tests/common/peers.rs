//! Real peers for the tests: free ports, a Mosquitto child, the daemon as a child process.
#![allow(dead_code)]

use std::io::Read;
use std::net::TcpListener;
use std::path::{Path, PathBuf};
use std::process::{Child, Command, Stdio};
use std::time::{Duration, Instant};

pub fn free_port() -> u16 {
    TcpListener::bind("127.0.0.1:0")
        .unwrap()
        .local_addr()
        .unwrap()
        .port()
}

/// A broker for one test: rumqttd in a thread of this process, or a Mosquitto child.
pub enum Broker {
    Rumqttd,
    Mosquitto(Child),
}

impl Drop for Broker {
    fn drop(&mut self) {
        if let Broker::Mosquitto(c) = self {
            let _ = c.kill();
            let _ = c.wait();
        }
    }
}

pub fn wait_for_port(port: u16) {
    let start = Instant::now();
    while std::net::TcpStream::connect(("127.0.0.1", port)).is_err() {
        assert!(
            start.elapsed() < Duration::from_secs(10),
            "the broker did not open port {port}"
        );
        std::thread::sleep(Duration::from_millis(20));
    }
}

/// The Mosquitto binary, or None when it is not installed (and CI does not require it).
pub fn mosquitto_bin() -> Option<&'static str> {
    let bin = ["/usr/sbin/mosquitto", "/usr/bin/mosquitto"]
        .into_iter()
        .find(|p| Path::new(p).exists());
    if bin.is_none() {
        assert!(
            std::env::var_os("LINEWARDEN_REQUIRE_MOSQUITTO").is_none(),
            "LINEWARDEN_REQUIRE_MOSQUITTO is set but mosquitto is not installed"
        );
        eprintln!("mosquitto is not installed; skipping");
    }
    bin
}

/// A Mosquitto that keeps its sessions and retained messages in `dir` across a stop and start.
pub struct PersistentMosquitto {
    bin: &'static str,
    conf: PathBuf,
    pub port: u16,
    child: Option<Child>,
}

impl PersistentMosquitto {
    pub fn new(dir: &Path) -> Option<Self> {
        let bin = mosquitto_bin()?;
        let port = free_port();
        let data = dir.join("mosquitto-data");
        std::fs::create_dir_all(&data).unwrap();
        let conf = dir.join("mosquitto-persistent.conf");
        std::fs::write(
            &conf,
            format!(
                "listener {port} 127.0.0.1\nallow_anonymous true\npersistence true\npersistence_location {}/\nmax_queued_messages 0\nlog_dest stderr\n",
                data.display()
            ),
        )
        .unwrap();
        let mut m = PersistentMosquitto {
            bin,
            conf,
            port,
            child: None,
        };
        m.start();
        Some(m)
    }

    pub fn start(&mut self) {
        let child = Command::new(self.bin)
            .arg("-c")
            .arg(&self.conf)
            .stdout(Stdio::null())
            .stderr(Stdio::null())
            .spawn()
            .unwrap();
        self.child = Some(child);
        wait_for_port(self.port);
    }

    /// A clean stop (SIGTERM): Mosquitto saves its sessions first.
    pub fn stop(&mut self) {
        if let Some(mut c) = self.child.take() {
            unsafe {
                libc::kill(c.id() as i32, libc::SIGTERM);
            }
            c.wait().unwrap();
        }
    }
}

impl Drop for PersistentMosquitto {
    fn drop(&mut self) {
        if let Some(mut c) = self.child.take() {
            let _ = c.kill();
            let _ = c.wait();
        }
    }
}

/// A Python module run as a peer (`python3 -m ...`), or None when it is not installed and CI
/// (LINEWARDEN_REQUIRE_PYTHON_PEERS) does not require it.
pub fn python_peer(module: &str, args: &[&str], log: &Path) -> Option<Child> {
    let have = Command::new("python3")
        .args(["-c", &format!("import {module}")])
        .stdout(Stdio::null())
        .stderr(Stdio::null())
        .status()
        .map(|s| s.success())
        .unwrap_or(false);
    if !have {
        assert!(
            std::env::var_os("LINEWARDEN_REQUIRE_PYTHON_PEERS").is_none(),
            "LINEWARDEN_REQUIRE_PYTHON_PEERS is set but the Python module {module} is missing"
        );
        eprintln!("the Python module {module} is not installed; skipping");
        return None;
    }
    let f = std::fs::File::create(log).unwrap();
    Some(
        Command::new("python3")
            .args(args)
            .stdout(f.try_clone().unwrap())
            .stderr(f)
            .spawn()
            .unwrap(),
    )
}

/// Runs the linewarden binary with `args`; (success, stdout, stderr).
pub fn cli(args: &[&str]) -> (bool, String, String) {
    let o = Command::new(env!("CARGO_BIN_EXE_linewarden"))
        .args(args)
        .output()
        .unwrap();
    (
        o.status.success(),
        String::from_utf8_lossy(&o.stdout).into_owned(),
        String::from_utf8_lossy(&o.stderr).into_owned(),
    )
}

/// Mosquitto on `port`, or None when it is not installed (and CI does not require it).
pub fn start_mosquitto(dir: &Path, port: u16) -> Option<Broker> {
    let bin = ["/usr/sbin/mosquitto", "/usr/bin/mosquitto"]
        .into_iter()
        .find(|p| Path::new(p).exists());
    let Some(bin) = bin else {
        assert!(
            std::env::var_os("LINEWARDEN_REQUIRE_MOSQUITTO").is_none(),
            "LINEWARDEN_REQUIRE_MOSQUITTO is set but mosquitto is not installed"
        );
        eprintln!("mosquitto is not installed; skipping the Mosquitto half");
        return None;
    };
    let conf = dir.join("mosquitto.conf");
    std::fs::write(
        &conf,
        format!(
            "listener {port} 127.0.0.1\nallow_anonymous true\npersistence false\nmax_queued_messages 0\nmax_inflight_messages 100\nlog_dest stderr\n"
        ),
    )
    .unwrap();
    let child = Command::new(bin)
        .arg("-c")
        .arg(&conf)
        .stdout(Stdio::null())
        .stderr(Stdio::null())
        .spawn()
        .unwrap();
    let b = Broker::Mosquitto(child);
    wait_for_port(port);
    Some(b)
}

/// The daemon as a child process, its log going to `log`.
pub struct Daemon {
    child: Child,
    log: PathBuf,
    cfg: PathBuf,
}

impl Daemon {
    pub fn start(cfg: &Path, log: &Path) -> Daemon {
        Daemon::start_limited(cfg, log, None)
    }

    /// [`Daemon::start`] with its open-file limit (soft and hard) set to `nofile`, as a unit's
    /// LimitNOFILE would.
    pub fn start_limited(cfg: &Path, log: &Path, nofile: Option<u64>) -> Daemon {
        use std::os::unix::process::CommandExt;
        let f = std::fs::OpenOptions::new()
            .create(true)
            .append(true)
            .open(log)
            .unwrap();
        let mut cmd = Command::new(env!("CARGO_BIN_EXE_linewarden"));
        cmd.args(["run", "--config"])
            .arg(cfg)
            .env(
                "RUST_LOG",
                std::env::var("TEST_DAEMON_LOG").unwrap_or("info".into()),
            )
            .stdout(Stdio::null())
            .stderr(f);
        if let Some(n) = nofile {
            // SAFETY: setrlimit is async-signal-safe; nothing else runs between fork and exec.
            unsafe {
                cmd.pre_exec(move || {
                    let r = libc::rlimit {
                        rlim_cur: n,
                        rlim_max: n,
                    };
                    if libc::setrlimit(libc::RLIMIT_NOFILE, &r) != 0 {
                        return Err(std::io::Error::last_os_error());
                    }
                    Ok(())
                });
            }
        }
        let child = cmd.spawn().unwrap();
        Daemon {
            child,
            log: log.to_path_buf(),
            cfg: cfg.to_path_buf(),
        }
    }

    pub fn log_text(&self) -> String {
        let mut s = String::new();
        if let Ok(mut f) = std::fs::File::open(&self.log) {
            let _ = f.read_to_string(&mut s);
        }
        s
    }

    /// Waits until the log contains `what` at least `n` times.
    pub fn wait_log(&self, what: &str, n: usize, limit: Duration) {
        let start = Instant::now();
        while self.log_text().matches(what).count() < n {
            assert!(
                start.elapsed() < limit,
                "the daemon's log did not show {what:?}:\n{}",
                self.log_text()
            );
            std::thread::sleep(Duration::from_millis(20));
        }
    }

    /// Waits until the log shows `n` subscriptions in all.
    pub fn wait_subscribed(&self, n: usize) {
        let start = Instant::now();
        while self.log_text().matches("subscribed").count() < n {
            assert!(
                start.elapsed() < Duration::from_secs(20),
                "the daemon did not subscribe:\n{}",
                self.log_text()
            );
            std::thread::sleep(Duration::from_millis(20));
        }
    }

    pub fn kill9(&mut self) {
        self.child.kill().unwrap();
        self.child.wait().unwrap();
    }

    pub fn is_running(&mut self) -> bool {
        matches!(self.child.try_wait(), Ok(None))
    }

    pub fn stop(mut self) {
        unsafe {
            libc::kill(self.child.id() as i32, libc::SIGTERM);
        }
        let status = self.child.wait().unwrap();
        assert!(status.success(), "the daemon failed:\n{}", self.log_text());
        // What broke: a delivery archived at shutdown came after `daemon-stopped`, whose
        // reason said the sources had ended when a signal had stopped them. Every run a test
        // stops ends with `daemon-stopped`, saying why, and the last log line's durable
        // sequence is its number.
        let archive = linewarden::config::load(&self.cfg).unwrap().archive_dir;
        let r = linewarden::archive::reader::Reader::open(&archive).unwrap();
        let last = r
            .iter(&Default::default())
            .last()
            .expect("a record")
            .unwrap();
        match &last.record {
            linewarden::archive::Record::DaemonStopped { reason } => assert!(
                reason == "stopped by SIGTERM" || reason == "every source has ended",
                "{reason}"
            ),
            other => panic!("the last record is {other:?}, not daemon-stopped"),
        }
        let log = self.log_text();
        let said: u64 = log
            .lines()
            .rev()
            .find_map(|l| l.split("archive durable to sequence ").nth(1))
            .and_then(|t| t.split_whitespace().next()?.parse().ok())
            .expect("the last log line says the durable sequence");
        assert_eq!(said, last.seq, "{log}");
    }
}

impl Drop for Daemon {
    fn drop(&mut self) {
        let _ = self.child.kill();
        let _ = self.child.wait();
    }
}

pub fn wait_until(what: &str, limit: Duration, f: impl Fn() -> bool) {
    let start = Instant::now();
    while !f() {
        assert!(start.elapsed() < limit, "timed out waiting for {what}");
        std::thread::sleep(Duration::from_millis(25));
    }
}
