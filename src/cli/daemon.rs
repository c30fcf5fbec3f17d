//! `run`, `check`, `status`, `ack` and `approve`: the daemon and talking to it.

use std::path::PathBuf;

use anyhow::{Context, Result, bail};

/// Which daemon to talk to.
#[derive(clap::Args)]
pub(crate) struct DaemonArgs {
    /// The control socket.
    #[arg(long, value_name = "PATH", conflicts_with = "config")]
    pub(crate) socket: Option<PathBuf>,
    /// The daemon's config file (its [control] socket is used). Default: LINEWARDEN_CONFIG,
    /// else /etc/linewarden/cell.toml, else the socket /run/linewarden/control.sock.
    #[arg(long, value_name = "FILE")]
    pub(crate) config: Option<PathBuf>,
}

/// Where the installed daemon's config and control socket are (systemd/linewarden.service).
pub(crate) const INSTALLED_CONFIG: &str = "/etc/linewarden/cell.toml";
pub(crate) const INSTALLED_SOCKET: &str = "/run/linewarden/control.sock";

impl DaemonArgs {
    pub(crate) fn socket(&self) -> Result<PathBuf> {
        if let Some(s) = &self.socket {
            return Ok(s.clone());
        }
        let given = self
            .config
            .clone()
            .or_else(|| std::env::var_os("LINEWARDEN_CONFIG").map(PathBuf::from));
        let path = match given {
            Some(p) => p,
            None => {
                // As installed: the unit's config, else (a user who may use the socket but
                // not read the config) the socket where the unit's runtime directory puts it.
                let installed = PathBuf::from(INSTALLED_CONFIG);
                match linewarden::config::load(&installed) {
                    Ok(cfg) => {
                        if let Some(c) = cfg.control {
                            return Ok(c.socket);
                        }
                        bail!("{INSTALLED_CONFIG} has no [control] socket = \"...\"")
                    }
                    Err(e) => {
                        let socket = PathBuf::from(INSTALLED_SOCKET);
                        if socket.exists() {
                            return Ok(socket);
                        }
                        bail!(
                            "no daemon to talk to: {e:#}, and there is no {INSTALLED_SOCKET}; say --config FILE or --socket PATH"
                        )
                    }
                }
            }
        };
        let cfg = linewarden::config::load(&path)?;
        cfg.control
            .map(|c| c.socket)
            .ok_or_else(|| anyhow::anyhow!("{} has no [control] socket = \"...\"", path.display()))
    }
}

pub(crate) fn check_cmd(path: &std::path::Path) -> Result<()> {
    let c = linewarden::config::load(path)?;
    println!("{}: valid", path.display());
    println!("  archive      {}", c.archive_dir.display());
    for ch in &c.characteristics {
        let missing = ch
            .configured_limits
            .as_ref()
            .filter(|f| Some(*f) != ch.limits_path.as_ref());
        let limits = match (&ch.limits, &ch.limits_path) {
            (Some(l), Some(p)) if Some(p) != ch.configured_limits.as_ref() => {
                let state = if l.is_provisional() {
                    "provisional".to_string()
                } else if let Some(a) = &l.approved {
                    format!("approved by {} at {}", a.by, a.at)
                } else {
                    "approved".to_string()
                };
                if let Some(f) = missing {
                    eprintln!(
                        "warning: {}: characteristic \"{}\": the limits file {} does not exist; the limits learned at {} ({state}) in {} are used",
                        path.display(),
                        ch.id,
                        f.display(),
                        l.provenance.computed_at,
                        p.display()
                    );
                }
                format!("learned limits ({state}) from {}", p.display())
            }
            (Some(_), Some(p)) => format!("limits from {}", p.display()),
            (None, Some(p)) => {
                // A typo in the path would quietly switch the characteristic to learning: say it.
                if let Some(f) = ch.configured_limits.as_ref() {
                    let dir = p.parent().filter(|d| !d.as_os_str().is_empty());
                    eprintln!(
                        "warning: {}: characteristic \"{}\": the limits file {} does not exist, so it will learn provisional limits from its first {} subgroups and write them to {}{}",
                        path.display(),
                        ch.id,
                        f.display(),
                        ch.baseline_subgroups,
                        if f == p {
                            "it".to_string()
                        } else {
                            p.display().to_string()
                        },
                        match dir {
                            Some(d) if !d.is_dir() => format!(
                                " (its directory {} does not exist yet; the daemon creates it)",
                                d.display()
                            ),
                            _ => String::new(),
                        }
                    );
                }
                format!(
                    "learning: limits after {} subgroups, written to {}",
                    ch.baseline_subgroups,
                    p.display()
                )
            }
            _ => format!(
                "learning: provisional limits after {} subgroups",
                ch.baseline_subgroups
            ),
        };
        for w in ch.warnings() {
            eprintln!("warning: {}: {w}", path.display());
        }
        println!(
            "  {:<12} {} chart, rules: {}; {limits}",
            ch.id,
            ch.chart.name(),
            if ch.rules.rules.is_empty() {
                "none".to_string()
            } else {
                ch.rules.ids().join(", ")
            }
        );
    }
    for s in &c.sources {
        match s {
            linewarden::config::Source::Replay { id, file, speed } => {
                println!("  source {id}: replay of {} at {speed}x", file.display())
            }
            linewarden::config::Source::Serial(g) => {
                println!(
                    "  source {}: serial gauge on {} at {} baud",
                    g.id, g.port, g.baud
                )
            }
            linewarden::config::Source::Folder { id, path, .. } => {
                println!("  source {id}: CSV reports dropped into {}", path.display())
            }
            linewarden::config::Source::Mqtt(m) => println!(
                "  source {}: MQTT {} as {}, QoS {}, topics {}",
                m.id,
                m.broker.url(),
                m.broker.client_id,
                m.qos,
                m.topics
                    .iter()
                    .map(|t| t.template.as_str())
                    .collect::<Vec<_>>()
                    .join(", ")
            ),
        }
    }
    if let Some(w) = &c.web {
        println!(
            "  web          {}://{}/{}",
            if w.tls.is_some() { "https" } else { "http" },
            w.listen,
            match (&w.users, w.acknowledging()) {
                (Some(u), Ok(())) => format!(
                    "; acknowledging after a login ({} users in {})",
                    linewarden::config::web::read_users(u).map_or(0, |l| l.len()),
                    u.display()
                ),
                _ => "; showing only".to_string(),
            }
        );
        for warning in w.warnings() {
            eprintln!("warning: {}: {warning}", path.display());
        }
    }
    // What the daemon writes must be writable by the user running this (the unit runs check as
    // the service user): the archive, and where learned limits go.
    let mut places = vec![("the archive", c.archive_dir.clone())];
    for ch in &c.characteristics {
        if let (None, Some(p)) = (&ch.limits, &ch.limits_path)
            && let Some(d) = p.parent()
            && !places.iter().any(|(_, q)| q == d)
        {
            places.push(("learned limits", d.to_path_buf()));
        }
    }
    for (what, dir) in places {
        if let Err(e) = writable(&dir) {
            eprintln!(
                "warning: {}: {what}: {} cannot be written by this user ({e}); the daemon, running as this user, could not write there",
                path.display(),
                dir.display()
            );
        }
    }
    Ok(())
}

/// Whether this user can create or write in `dir`: the directory itself when it exists, else
/// the nearest existing directory above it (where the daemon would create it).
pub(crate) fn writable(dir: &std::path::Path) -> std::result::Result<(), String> {
    use std::os::unix::ffi::OsStrExt;
    let mut at = if dir.as_os_str().is_empty() {
        std::path::Path::new(".")
    } else {
        dir
    };
    while !at.exists() {
        match at.parent() {
            Some(p) if !p.as_os_str().is_empty() => at = p,
            _ => {
                at = std::path::Path::new(".");
                break;
            }
        }
    }
    if !at.is_dir() {
        return Err(format!("{} is not a directory", at.display()));
    }
    let c = std::ffi::CString::new(at.as_os_str().as_bytes()).map_err(|e| e.to_string())?;
    // SAFETY: a NUL-terminated path; access(2) only reads it.
    let r = unsafe { libc::access(c.as_ptr(), libc::W_OK | libc::X_OK) };
    if r == 0 {
        Ok(())
    } else {
        let e = std::io::Error::last_os_error();
        Err(if at == dir {
            e.to_string()
        } else {
            format!("{e} in {}, where it would be created", at.display())
        })
    }
}

pub(crate) fn status_cmd(to: &DaemonArgs, json: bool, brief: bool) -> Result<()> {
    use linewarden::daemon::control::{ClientRequest, ask};
    let v = ask(&to.socket()?, &ClientRequest::Status { brief }).map_err(anyhow::Error::msg)?;
    if json {
        println!("{}", serde_json::to_string_pretty(&v)?);
        return Ok(());
    }
    if v.get("ok") == Some(&serde_json::Value::Bool(false)) {
        anyhow::bail!("{}", v["error"].as_str().unwrap_or("the daemon refused"));
    }
    let r: linewarden::daemon::hub::StatusReport = serde_json::from_value(v)?;
    print!("{}", linewarden::report::status(&r));
    Ok(())
}

pub(crate) fn ack_cmd(
    to: &DaemonArgs,
    alert: String,
    by: String,
    note: Option<String>,
    json: bool,
) -> Result<()> {
    use linewarden::daemon::control::{ClientRequest, ask};
    // Said here first, so a mistake is answered without a round trip; the daemon checks again.
    linewarden::alerts::check_ack_text(&by, note.as_deref())?;
    let v =
        ask(&to.socket()?, &ClientRequest::Ack { alert, by, note }).map_err(anyhow::Error::msg)?;
    if json {
        println!("{}", serde_json::to_string_pretty(&v)?);
    }
    let r: linewarden::daemon::hub::AckReply = serde_json::from_value(v)?;
    if !r.ok {
        anyhow::bail!("{}", r.error.unwrap_or_else(|| "refused".into()));
    }
    if !json {
        println!("acknowledged: {}", r.acknowledged.join(", "));
    }
    Ok(())
}

pub(crate) fn approve_cmd(
    to: &DaemonArgs,
    characteristic: String,
    by: String,
    note: Option<String>,
) -> Result<()> {
    use linewarden::daemon::control::{ClientRequest, ask};
    linewarden::alerts::check_ack_text(&by, note.as_deref())?;
    let req = ClientRequest::Approve {
        characteristic: characteristic.clone(),
        by,
        note,
    };
    let v = ask(&to.socket()?, &req).map_err(anyhow::Error::msg)?;
    let r: linewarden::daemon::hub::ApproveReply = serde_json::from_value(v)?;
    if !r.ok {
        anyhow::bail!("{}", r.error.unwrap_or_else(|| "refused".into()));
    }
    println!(
        "approved: the limits of {characteristic} (recorded in the archive and written to its limits file)"
    );
    Ok(())
}

pub(crate) fn run_cmd(path: &std::path::Path) -> Result<()> {
    tracing_subscriber::fmt()
        .with_writer(std::io::stderr)
        .with_env_filter(
            tracing_subscriber::EnvFilter::try_from_default_env()
                .unwrap_or_else(|_| tracing_subscriber::EnvFilter::new("info")),
        )
        .with_target(false)
        .with_ansi(std::io::IsTerminal::is_terminal(&std::io::stderr()))
        .init();
    let cfg = linewarden::config::load(path)?;
    let rt = tokio::runtime::Builder::new_multi_thread()
        .worker_threads(2)
        .enable_all()
        .build()
        .context("cannot start the async runtime")?;
    rt.block_on(async move {
        let (stop_tx, stop_rx) = tokio::sync::watch::channel(false);
        let (reload_tx, reload_rx) = tokio::sync::mpsc::channel(4);
        tokio::spawn(async move {
            use tokio::signal::unix::{SignalKind, signal};
            let (Ok(mut term), Ok(mut int), Ok(mut hup)) = (
                signal(SignalKind::terminate()),
                signal(SignalKind::interrupt()),
                signal(SignalKind::hangup()),
            ) else {
                tracing::error!(component = "daemon", "cannot install signal handlers");
                return;
            };
            let which = loop {
                tokio::select! {
                    _ = term.recv() => break "SIGTERM",
                    _ = int.recv() => break "SIGINT",
                    _ = hup.recv() => {
                        tracing::info!(component = "daemon", "SIGHUP received; reloading the configuration");
                        let _ = reload_tx.try_send(());
                    }
                }
            };
            tracing::info!(component = "daemon", "{which} received; stopping the sources");
            let _ = linewarden::daemon::STOP_CAUSE.set(which);
            let _ = stop_tx.send(true);
        });
        let s = linewarden::daemon::run(cfg, stop_rx, reload_rx).await?;
        tracing::info!(
            component = "daemon",
            "stopped: {} readings accepted, {} rejected, {} subgroups checked, {} violations; archive durable to sequence {}",
            s.accepted,
            s.rejected,
            s.subgroups,
            s.violations,
            s.last_seq
        );
        Ok(())
    })
}

/// `linewarden web-user NAME`: prints `NAME:HASH` for the users file.
pub(crate) fn web_user_cmd(name: &str) -> Result<()> {
    use std::io::{BufRead, IsTerminal};
    linewarden::config::web::check_user_name(name).map_err(|e| anyhow::anyhow!(e))?;
    let stdin = std::io::stdin();
    let tty = stdin.is_terminal();
    let read = |prompt: &str| -> Result<String> {
        if tty {
            eprint!("{prompt}");
        }
        let _quiet = tty.then(Unechoed::new).flatten();
        let mut line = String::new();
        stdin.lock().read_line(&mut line)?;
        if tty {
            eprintln!();
        }
        Ok(line.trim_end_matches(['\r', '\n']).to_string())
    };
    let password = read(&format!("Password for {name}: "))?;
    if password.is_empty() {
        anyhow::bail!("no password given (one line on standard input)");
    }
    if password.chars().count() < 8 {
        anyhow::bail!("the password has fewer than 8 characters; choose a longer one");
    }
    if tty && read("Again: ")? != password {
        anyhow::bail!("the two passwords differ; nothing was made");
    }
    let hash =
        linewarden::daemon::access::hash_password(&password).map_err(|e| anyhow::anyhow!(e))?;
    println!("{name}:{hash}");
    Ok(())
}

/// The terminal's echo off while it lives.
struct Unechoed(libc::termios);

impl Unechoed {
    fn new() -> Option<Unechoed> {
        // SAFETY: tcgetattr and tcsetattr on standard input with a termios we own.
        unsafe {
            let mut t: libc::termios = std::mem::zeroed();
            if libc::tcgetattr(0, &mut t) != 0 {
                return None;
            }
            let saved = t;
            t.c_lflag &= !libc::ECHO;
            (libc::tcsetattr(0, libc::TCSANOW, &t) == 0).then_some(Unechoed(saved))
        }
    }
}

impl Drop for Unechoed {
    fn drop(&mut self) {
        // SAFETY: restores the settings read in `new`.
        unsafe {
            libc::tcsetattr(0, libc::TCSANOW, &self.0);
        }
    }
}
