//! The install as the README gives it: `systemd/install.sh` into a temporary root, then `check`
//! and the daemon run as an unprivileged user with only what the unit grants (the config
//! read-only, the state directory writable, umask 0027), in a mount namespace where the
//! config tree is mounted read-only as `ProtectSystem=strict` makes it.
//!
//! Needs root (to set owners and to switch user); CI runs as root and sets
//! LINEWARDEN_REQUIRE_ROOT=1 so that a skip there is a failure. systemd itself is not run
//! here (a container has none): the unit's other sandboxing is not exercised.

mod common;

use std::os::unix::fs::{MetadataExt, PermissionsExt};
use std::path::{Path, PathBuf};
use std::process::{Child, Command, Output, Stdio};
use std::time::Duration;

const USER: &str = "nobody";
const GROUP: &str = "nogroup";

fn root_or_skip(test: &str) -> bool {
    if unsafe { libc::geteuid() } == 0 {
        return true;
    }
    assert!(
        std::env::var_os("LINEWARDEN_REQUIRE_ROOT").is_none(),
        "{test} needs root and LINEWARDEN_REQUIRE_ROOT is set"
    );
    eprintln!("skipping {test}: needs root (owners, switching user)");
    false
}

fn ids() -> (u32, u32) {
    let id = |args: &[&str]| -> u32 {
        let o = Command::new("id").args(args).output().unwrap();
        String::from_utf8_lossy(&o.stdout).trim().parse().unwrap()
    };
    (id(&["-u", USER]), id(&["-g", USER]))
}

fn script() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("systemd/install.sh")
}

/// A temporary root others can traverse (the service user must reach its directories).
fn temp_root() -> tempfile::TempDir {
    let dir = tempfile::tempdir().unwrap();
    std::fs::set_permissions(dir.path(), std::fs::Permissions::from_mode(0o755)).unwrap();
    dir
}

fn install(root: &Path) -> Output {
    let o = Command::new("sh")
        .arg(script())
        .args(["--root"])
        .arg(root)
        .args(["--binary", env!("CARGO_BIN_EXE_linewarden")])
        .args(["--user", USER, "--group", GROUP])
        .output()
        .unwrap();
    assert!(
        o.status.success(),
        "install.sh failed:\n{}{}",
        String::from_utf8_lossy(&o.stdout),
        String::from_utf8_lossy(&o.stderr)
    );
    o
}

fn mode_owner(p: &Path) -> (u32, u32, u32) {
    let m = std::fs::metadata(p).unwrap_or_else(|e| panic!("{}: {e}", p.display()));
    (m.mode() & 0o7777, m.uid(), m.gid())
}

/// `args` of the installed binary as the service user, umask 0027, with `read_only` mounted
/// read-only in a private mount namespace when this machine allows one (said when not).
fn as_service(root: &Path, read_only: &Path, args: &[&str]) -> Command {
    let bin = root.join("usr/local/bin/linewarden");
    let run = format!(
        "umask 0027; exec setpriv --reuid={USER} --regid={GROUP} --clear-groups --inh-caps=-all {} {}",
        bin.display(),
        args.iter()
            .map(|a| format!("'{a}'"))
            .collect::<Vec<_>>()
            .join(" ")
    );
    let namespaced = Command::new("unshare")
        .args(["-m", "true"])
        .status()
        .is_ok_and(|s| s.success());
    let mut c;
    if namespaced {
        let ro = read_only.display();
        c = Command::new("unshare");
        c.args([
            "-m",
            "--propagation",
            "private",
            "sh",
            "-c",
            &format!("mount --bind '{ro}' '{ro}' && mount -o remount,bind,ro '{ro}' && {run}"),
        ]);
    } else {
        eprintln!(
            "no mount namespace here: {} is read-only by its owner and mode only",
            read_only.display()
        );
        c = Command::new("sh");
        c.args(["-c", &run]);
    }
    c
}

/// The installed config with the system paths moved under the temporary root and the
/// control socket's group set to the test's service group: the only edits made.
fn point_into(root: &Path) {
    let cfg = root.join("etc/linewarden/cell.toml");
    let text = std::fs::read_to_string(&cfg).unwrap();
    let r = root.display().to_string();
    let text = text
        .replace(
            "\"/var/lib/linewarden",
            &format!("\"{r}/var/lib/linewarden"),
        )
        .replace("\"/run/linewarden", &format!("\"{r}/run/linewarden"))
        .replace("group = \"linewarden\"", &format!("group = \"{GROUP}\""));
    std::fs::write(&cfg, text).unwrap();
    // systemd's RuntimeDirectory=linewarden, RuntimeDirectoryMode=0750.
    let run = root.join("run/linewarden");
    std::fs::create_dir_all(&run).unwrap();
    let (uid, gid) = ids();
    std::os::unix::fs::chown(&run, Some(uid), Some(gid)).unwrap();
    std::fs::set_permissions(&run, std::fs::Permissions::from_mode(0o750)).unwrap();
}

/// A temporary root with linewarden installed and its config pointed into it, or `None` when
/// `test` must skip (not root).
fn installed(test: &str) -> Option<tempfile::TempDir> {
    if !root_or_skip(test) {
        return None;
    }
    let dir = temp_root();
    install(dir.path());
    point_into(dir.path());
    Some(dir)
}

#[test]
fn install_script_lays_out_owners_and_modes_and_is_idempotent() {
    if !root_or_skip("install_script_lays_out_owners_and_modes_and_is_idempotent") {
        return;
    }
    let dir = temp_root();
    let r = dir.path();
    let (uid, gid) = ids();
    let first = install(r);
    let said = String::from_utf8_lossy(&first.stdout).to_string();
    assert!(said.contains("the starting one"), "{said}");
    assert_eq!(mode_owner(&r.join("etc/linewarden")), (0o750, 0, gid));
    assert_eq!(
        mode_owner(&r.join("etc/linewarden/cell.toml")),
        (0o640, 0, gid)
    );
    for d in [
        "var/lib/linewarden",
        "var/lib/linewarden/archive",
        "var/lib/linewarden/limits",
    ] {
        assert_eq!(mode_owner(&r.join(d)), (0o750, uid, gid), "{d}");
    }
    assert_eq!(mode_owner(&r.join("usr/local/bin/linewarden")).0, 0o755);
    assert!(r.join("etc/systemd/system/linewarden.service").is_file());
    // What broke: the unit set no LimitNOFILE, so the soft limit was 1024 and 1100 idle page
    // connections left the archive writer without a descriptor. The installed unit sets one
    // under which page clients (a quarter at most, capped) leave the rest room.
    let unit = std::fs::read_to_string(r.join("etc/systemd/system/linewarden.service")).unwrap();
    let nofile: u64 = unit
        .lines()
        .find_map(|l| l.trim().strip_prefix("LimitNOFILE="))
        .expect("the unit sets LimitNOFILE")
        .parse()
        .unwrap();
    let pages = linewarden::daemon::web::connection_cap(nofile) as u64;
    assert_eq!(pages as usize, linewarden::daemon::web::MAX_CONNECTIONS);
    assert!(
        nofile - pages >= 4096,
        "LimitNOFILE={nofile} leaves too little"
    );
    let shipped =
        std::fs::read(Path::new(env!("CARGO_MANIFEST_DIR")).join("config/cell.toml")).unwrap();
    assert_eq!(
        std::fs::read(r.join("etc/linewarden/cell.toml")).unwrap(),
        shipped
    );

    // Again: nothing changes.
    let again = install(r);
    assert!(String::from_utf8_lossy(&again.stdout).contains("unchanged"));
    assert!(!r.join("etc/linewarden/cell.toml.example").exists());

    // An edited config is kept, byte for byte; the shipped one goes beside it.
    let mut edited = shipped.clone();
    edited.extend_from_slice(b"# tuned for cell 4 by the quality engineer\n");
    std::fs::write(r.join("etc/linewarden/cell.toml"), &edited).unwrap();
    let third = install(r);
    assert!(String::from_utf8_lossy(&third.stdout).contains("was kept"));
    assert_eq!(
        std::fs::read(r.join("etc/linewarden/cell.toml")).unwrap(),
        edited
    );
    assert_eq!(
        std::fs::read(r.join("etc/linewarden/cell.toml.example")).unwrap(),
        shipped
    );
}

/// What broke: `install -D -m 640 config/demo.toml /etc/linewarden/cell.toml` left the config
/// root:root 0640 and the service user could not read it. The script makes an existing config
/// (and a limits file beside it) readable by the service group, without changing a byte.
#[test]
fn config_left_root_only_is_made_readable_by_the_service_group() {
    if !root_or_skip("config_left_root_only_is_made_readable_by_the_service_group") {
        return;
    }
    let dir = temp_root();
    let r = dir.path();
    let (_, gid) = ids();
    let etc = r.join("etc/linewarden");
    std::fs::create_dir_all(etc.join("limits")).unwrap();
    std::fs::set_permissions(&etc, std::fs::Permissions::from_mode(0o700)).unwrap();
    let own = b"# an engineer's config, installed by hand as root\n";
    std::fs::write(etc.join("cell.toml"), own).unwrap();
    std::fs::set_permissions(
        etc.join("cell.toml"),
        std::fs::Permissions::from_mode(0o600),
    )
    .unwrap();
    std::fs::write(etc.join("limits/bore.toml"), "x").unwrap();
    std::fs::set_permissions(
        etc.join("limits/bore.toml"),
        std::fs::Permissions::from_mode(0o600),
    )
    .unwrap();
    install(r);
    assert_eq!(std::fs::read(etc.join("cell.toml")).unwrap(), own);
    let (mode, _, g) = mode_owner(&etc.join("cell.toml"));
    assert_eq!((mode & 0o047, g), (0o040, gid));
    let (mode, _, g) = mode_owner(&etc.join("limits/bore.toml"));
    assert_eq!((mode & 0o047, g), (0o040, gid));
    let (mode, _, g) = mode_owner(&etc);
    assert_eq!((mode, g), (0o750, gid));
}

fn report(parts: std::ops::Range<usize>) -> String {
    let mut s = String::from("Serial,Bore\n");
    let mut x = 0.41f64;
    for i in parts {
        for _ in 0..=i % 7 {
            x = (x * 3.7 + 0.13).fract();
        }
        s.push_str(&format!("P{i:05},{:.4}\n", 12.0 + (x - 0.5) * 0.006));
    }
    s
}

fn spawn_logged(mut c: Command, log: &Path) -> Child {
    let f = std::fs::File::create(log).unwrap();
    c.env("RUST_LOG", "info")
        .stdout(Stdio::null())
        .stderr(f)
        .spawn()
        .unwrap()
}

/// The installed starting config, checked and run as the service user with the config tree
/// read-only: it starts, learns limits from a measuring machine's reports into the state
/// directory, is approved over the control socket, and records it all in the archive.
#[test]
fn installed_daemon_runs_as_the_service_user_with_a_read_only_config() {
    use linewarden::archive::reader::{Filter, Reader};
    use linewarden::archive::record::Record;
    let Some(dir) = installed("installed_daemon_runs_as_the_service_user_with_a_read_only_config")
    else {
        return;
    };
    let r = dir.path();
    let cfg = r.join("etc/linewarden/cell.toml");
    let cfg_s = cfg.to_str().unwrap();
    let etc = r.join("etc");

    let o = as_service(r, &etc, &["check", "--config", cfg_s])
        .output()
        .unwrap();
    let (out, err) = (
        String::from_utf8_lossy(&o.stdout),
        String::from_utf8_lossy(&o.stderr),
    );
    assert!(o.status.success(), "{out}{err}");
    assert!(out.contains("valid"), "{out}");
    assert!(!err.contains("cannot be written"), "{err}");
    assert!(
        err.contains("write them to") && err.contains("var/lib/linewarden/limits/bore.toml"),
        "{err}"
    );

    // The installed config serves metrics on a fixed port; here on a free one, so the test
    // never meets another daemon (a demo running beside it).
    let web = common::peers::free_port();
    let text = std::fs::read_to_string(&cfg).unwrap();
    assert!(text.contains("listen = \"127.0.0.1:9630\""), "{text}");
    std::fs::write(
        &cfg,
        text.replace("127.0.0.1:9630", &format!("127.0.0.1:{web}")),
    )
    .unwrap();
    let log = dir.path().join("daemon.log");
    let mut daemon = spawn_logged(as_service(r, &etc, &["run", "--config", cfg_s]), &log);
    let socket = r.join("run/linewarden/control.sock");
    common::wait("the control socket", Duration::from_secs(20), || {
        socket.exists()
    });
    assert_eq!(mode_owner(&socket).0 & 0o777, 0o660);
    common::peers::wait_for_port(web);
    let mut probe = std::net::TcpStream::connect(("127.0.0.1", web)).unwrap();
    std::io::Write::write_all(
        &mut probe,
        b"GET /healthz HTTP/1.1\r\nHost: x\r\nConnection: close\r\n\r\n",
    )
    .unwrap();
    let mut answer = String::new();
    std::io::Read::read_to_string(&mut probe, &mut answer).unwrap();
    assert!(
        answer.starts_with("HTTP/1.1 200") && answer.ends_with("alive\n"),
        "{answer}"
    );
    // The measuring machine's reports: 25 subgroups of 5 and a few more.
    let inbox = r.join("var/lib/linewarden/inbox");
    std::fs::write(inbox.join("batch-1.csv"), report(0..140)).unwrap();
    let learned = r.join("var/lib/linewarden/limits/bore.toml");
    common::wait(
        "learned limits in the state directory",
        Duration::from_secs(30),
        || learned.exists(),
    );
    let (uid, _) = ids();
    assert_eq!(mode_owner(&learned).1, uid, "written by the service user");
    assert_eq!(
        mode_owner(&learned).0 & 0o007,
        0,
        "umask 0027: not world-readable"
    );
    assert!(!r.join("etc/linewarden/limits/bore.toml").exists());

    let s = socket.to_str().unwrap();
    let status = as_service(r, &etc, &["status", "--socket", s])
        .output()
        .unwrap();
    assert!(
        String::from_utf8_lossy(&status.stdout).contains("PROVISIONAL"),
        "{}{}",
        String::from_utf8_lossy(&status.stdout),
        String::from_utf8_lossy(&status.stderr)
    );
    let ok = as_service(
        r,
        &etc,
        &["approve", "bore", "--by", "Q. Engineer", "--socket", s],
    )
    .output()
    .unwrap();
    assert!(
        ok.status.success(),
        "{}",
        String::from_utf8_lossy(&ok.stderr)
    );
    common::wait(
        "the approval in the learned file",
        Duration::from_secs(10),
        || std::fs::read_to_string(&learned).is_ok_and(|t| t.contains("[approved]")),
    );
    unsafe {
        libc::kill(daemon.id() as i32, libc::SIGTERM);
    }
    let st = daemon.wait().unwrap();
    let text = std::fs::read_to_string(&log).unwrap();
    assert!(st.success(), "{text}");
    assert!(!text.contains("ERROR"), "{text}");

    // Started again (as after a reboot): it reads the approved learned limits from the state
    // directory and does not learn again; check says where they come from.
    let o = as_service(r, &etc, &["check", "--config", cfg_s])
        .output()
        .unwrap();
    let err = String::from_utf8_lossy(&o.stderr);
    let out = String::from_utf8_lossy(&o.stdout);
    assert!(
        o.status.success() && out.contains("learned limits (approved by Q. Engineer"),
        "{out}{err}"
    );

    let a = Reader::open(&r.join("var/lib/linewarden/archive")).unwrap();
    let records: Vec<Record> = a
        .iter(&Filter::default())
        .flatten()
        .map(|e| e.record)
        .collect();
    let installed = records
        .iter()
        .filter(|r| matches!(r, Record::LimitsInstalled { .. }))
        .count();
    let approved = records
        .iter()
        .filter(|r| matches!(r, Record::LimitsApproved { .. }))
        .count();
    assert_eq!((installed, approved), (1, 1));
    let moved = std::fs::read_dir(inbox.join("done")).unwrap().count();
    assert_eq!(moved, 1, "the report was moved to done/");
}

/// What broke: learned limits were written beside the config, in /etc, which the unit makes
/// read-only. With no `learned_limits_dir`, `check` (run by the unit as the service user) says
/// the service cannot write there.
#[test]
fn check_warns_when_learned_limits_would_go_where_the_service_cannot_write() {
    let Some(dir) =
        installed("check_warns_when_learned_limits_would_go_where_the_service_cannot_write")
    else {
        return;
    };
    let r = dir.path();
    let cfg = r.join("etc/linewarden/cell.toml");
    let text = std::fs::read_to_string(&cfg).unwrap();
    let text: String = text
        .lines()
        .filter(|l| !l.starts_with("learned_limits_dir"))
        .map(|l| format!("{l}\n"))
        .collect();
    std::fs::write(&cfg, text).unwrap();
    let o = as_service(
        r,
        &r.join("etc"),
        &["check", "--config", cfg.to_str().unwrap()],
    )
    .output()
    .unwrap();
    let err = String::from_utf8_lossy(&o.stderr);
    assert!(o.status.success(), "{err}");
    assert!(
        err.contains("learned limits")
            && err.contains("etc/linewarden/limits cannot be written by this user"),
        "{err}"
    );
}
