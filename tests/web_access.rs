//! Acknowledging from the page against hostile clients, over real HTTP and TLS connections: a
//! foreign site's form (cross-origin), a foreign name for this box (DNS rebinding: wrong Host),
//! a form without its CSRF token, no session, a guessed password again and again, a removed
//! user, an oversized form, plain HTTP beyond loopback; and the same login and acknowledgement
//! over TLS. Each refusal leaves the alert open, and only the one real acknowledgement reaches
//! the archive, with the user's name.

use std::io::{Read, Write};
use std::net::TcpStream;
use std::path::Path;
use std::time::Duration;

use linewarden::alerts::AlertEvent;
use linewarden::archive::reader::{Filter, Reader};
use linewarden::archive::record::Record;

mod common;
use common::peers::{free_port, wait_for_port};

const PASSWORD: &str = "night-shift-7";

/// A cell with the bore on stored limits, fed by a folder, the page on `listen`, `web` added
/// to `[web]`; the users file holds dana.
fn cell(dir: &Path, listen: &str, web: &str) -> std::path::PathBuf {
    std::fs::write(dir.join("bore.toml"), common::BORE_LIMITS).unwrap();
    std::fs::create_dir_all(dir.join("inbox")).unwrap();
    let hash = linewarden::daemon::access::hash_password(PASSWORD).unwrap();
    std::fs::write(dir.join("users"), format!("dana:{hash}\n")).unwrap();
    let text = format!(
        r#"[daemon]
archive_dir = "archive"
flush_interval_ms = 2

[[characteristic]]
id = "bore"
unit = "mm"
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
settle_ms = 20

[web]
listen = "{listen}"
users = "users"
{web}
"#
    );
    let p = dir.join("cell.toml");
    std::fs::write(&p, text).unwrap();
    p
}

/// Two subgroups, the second far above the limits: alert bore-2-beyond-limits-up opens.
fn shift(dir: &Path) {
    for (name, from, bore) in [("r1", 0, 12.001), ("r2", 4, 12.02)] {
        let mut s = String::from("Serial,Bore\n");
        for i in from..from + 4 {
            s.push_str(&format!("VB{i:04},{bore}\n"));
        }
        std::fs::write(dir.join("inbox").join(format!("{name}.tmp")), s).unwrap();
        std::fs::rename(
            dir.join("inbox").join(format!("{name}.tmp")),
            dir.join("inbox").join(format!("{name}.csv")),
        )
        .unwrap();
    }
    common::wait("both reports", Duration::from_secs(20), || {
        dir.join("inbox/done/r2.csv").exists()
    });
}

const ALERT: &str = "bore-2-beyond-limits-up";

#[derive(Debug)]
struct Answer {
    status: u16,
    head: String,
    body: String,
}

impl Answer {
    /// Every `Set-Cookie` value's `name=value` part, and the whole header line.
    fn cookie(&self, name: &str) -> Option<(String, String)> {
        self.head.lines().find_map(|l| {
            let (k, v) = l.split_once(':')?;
            if !k.eq_ignore_ascii_case("set-cookie") {
                return None;
            }
            let v = v.trim();
            let (nv, _) = v.split_once(';').unwrap_or((v, ""));
            let (n, val) = nv.split_once('=')?;
            (n == name).then(|| (val.to_string(), v.to_string()))
        })
    }

    fn header(&self, name: &str) -> Option<String> {
        self.head.lines().find_map(|l| {
            let (k, v) = l.split_once(':')?;
            k.eq_ignore_ascii_case(name).then(|| v.trim().to_string())
        })
    }

    /// The CSRF token of the first form on the page.
    fn csrf(&self) -> String {
        let at = self
            .body
            .find("name=\"csrf\" value=\"")
            .unwrap_or_else(|| panic!("no form on {}", self.body))
            + "name=\"csrf\" value=\"".len();
        self.body[at..at + 64].to_string()
    }
}

/// One request over `s`, the answer read to the end.
fn exchange(mut s: impl Read + Write, req: &str) -> Answer {
    s.write_all(req.as_bytes()).unwrap();
    let mut buf = Vec::new();
    // A TLS peer may close without a close_notify: what came is the answer.
    let _ = s.read_to_end(&mut buf);
    let text = String::from_utf8_lossy(&buf).into_owned();
    let (head, body) = text.split_once("\r\n\r\n").unwrap_or((&text, ""));
    Answer {
        status: head
            .split_whitespace()
            .nth(1)
            .and_then(|c| c.parse().ok())
            .unwrap_or(0),
        head: head.to_string(),
        body: body.to_string(),
    }
}

/// A request: `extra` header lines (each ending in \r\n), a form body when given.
fn request(method: &str, path: &str, host: &str, extra: &str, form: Option<&str>) -> String {
    let body = form.unwrap_or("");
    let form_headers = if form.is_some() {
        format!(
            "Content-Type: application/x-www-form-urlencoded\r\nContent-Length: {}\r\n",
            body.len()
        )
    } else {
        String::new()
    };
    format!(
        "{method} {path} HTTP/1.1\r\nHost: {host}\r\n{extra}{form_headers}Connection: close\r\n\r\n{body}"
    )
}

fn plain(port: u16, req: &str) -> Answer {
    let s = TcpStream::connect(("127.0.0.1", port)).unwrap();
    s.set_read_timeout(Some(Duration::from_secs(20))).unwrap();
    exchange(s, req)
}

fn enc(v: &str) -> String {
    v.bytes()
        .map(|b| {
            if b.is_ascii_alphanumeric() || b == b'-' || b == b'_' || b == b'.' {
                (b as char).to_string()
            } else {
                format!("%{b:02X}")
            }
        })
        .collect()
}

/// Logs in as a browser would: the form (its cookie and token), then the POST from this page.
/// The session cookie, or the refusal.
fn login(
    send: &dyn Fn(&str) -> Answer,
    host: &str,
    origin: &str,
    password: &str,
) -> Result<String, Answer> {
    let form = send(&request("GET", "/login?next=/c/bore", host, "", None));
    assert_eq!(form.status, 200, "{}", form.body);
    let (pre, _) = form.cookie("linewarden_login").expect("the login cookie");
    let a = send(&request(
        "POST",
        "/login",
        host,
        &format!("Origin: {origin}\r\nCookie: linewarden_login={pre}\r\n"),
        Some(&format!(
            "csrf={}&next=%2Fc%2Fbore&user=dana&password={}",
            form.csrf(),
            enc(password)
        )),
    ));
    match a.cookie("linewarden_session") {
        Some((session, _)) if a.status == 303 => Ok(session),
        _ => Err(a),
    }
}

/// The acknowledgements the archive holds: (alert, by).
fn archived_acks(dir: &Path) -> Vec<(String, String)> {
    Reader::open(&dir.join("archive"))
        .unwrap()
        .iter(&Filter::default())
        .flatten()
        .filter_map(|e| match e.record {
            Record::Alert {
                alert_id,
                event: AlertEvent::Acknowledged { by, .. },
                ..
            } => Some((alert_id, by)),
            _ => None,
        })
        .collect()
}

#[test]
fn forged_and_foreign_posts_are_refused_and_only_the_real_acknowledgement_is_archived() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let port = free_port();
    let cfg = cell(d, &format!("127.0.0.1:{port}"), "");
    let daemon = common::InProcess::start(&cfg);
    wait_for_port(port);
    shift(d);
    let host = format!("127.0.0.1:{port}");
    let origin = format!("http://{host}");
    let send = |r: &str| plain(port, r);
    let session = login(&send, &host, &origin, PASSWORD).unwrap_or_else(|a| {
        panic!("login refused: {} {}", a.status, a.body);
    });
    let me = format!("Cookie: linewarden_session={session}\r\n");
    common::wait("the alert on the page", Duration::from_secs(10), || {
        send(&request("GET", "/c/bore", &host, &me, None))
            .body
            .contains("Acknowledge as dana")
    });
    let page = send(&request("GET", "/c/bore", &host, &me, None));
    // The first form on the page is the logout's; the acknowledgement's carries the same token.
    let csrf = page.csrf();
    let ack_form = |token: &str| format!("csrf={token}&alert={ALERT}&back=bore&note=checked");
    let post_ack =
        |extra: &str, form: &str| send(&request("POST", "/ack", &host, extra, Some(form)));

    // A foreign site's form, with the technician's cookie (as a browser would attach it, were
    // it not SameSite): refused for its origin.
    let a = post_ack(
        &format!("{me}Origin: http://evil.example\r\n"),
        &ack_form(&csrf),
    );
    assert_eq!(a.status, 403, "{}", a.body);
    assert!(a.body.contains("evil.example"), "{}", a.body);
    // The same with Origin "null" (a sandboxed frame), and with neither Origin nor Referer.
    let a = post_ack(&format!("{me}Origin: null\r\n"), &ack_form(&csrf));
    assert_eq!(a.status, 403);
    let a = post_ack(&me, &ack_form(&csrf));
    assert_eq!(a.status, 403);
    assert!(a.body.contains("no Origin or Referer"), "{}", a.body);
    // From this page but without the token, or with another one.
    let o = format!("{me}Origin: {origin}\r\n");
    let a = post_ack(&o, &format!("alert={ALERT}&back=bore"));
    assert_eq!(a.status, 403, "{}", a.body);
    assert!(a.body.contains("token"), "{}", a.body);
    let a = post_ack(&o, &ack_form(&"0".repeat(64)));
    assert_eq!(a.status, 403);
    // No session at all.
    let a = post_ack(&format!("Origin: {origin}\r\n"), &ack_form(&csrf));
    assert_eq!(a.status, 401, "{}", a.body);
    // A foreign name for this box (DNS rebinding): refused before anything is read, for the
    // page and for the form; the metrics answer to any name (machines scrape them).
    let evil = format!("evil.example:{port}");
    let a = send(&request(
        "POST",
        "/ack",
        &evil,
        &format!("{me}Origin: http://{evil}\r\n"),
        Some(&ack_form(&csrf)),
    ));
    assert_eq!(a.status, 421, "{}", a.body);
    assert_eq!(send(&request("GET", "/", &evil, "", None)).status, 421);
    assert_eq!(
        send(&request("GET", "/c/bore", &evil, &me, None)).status,
        421
    );
    assert_eq!(
        send(&request("GET", "/metrics", &evil, "", None)).status,
        200
    );
    // A login form posted without its cookie.
    let a = send(&request(
        "POST",
        "/login",
        &host,
        &format!("Origin: {origin}\r\n"),
        Some(&format!(
            "csrf={}&user=dana&password={PASSWORD}",
            "1".repeat(64)
        )),
    ));
    assert_eq!(a.status, 403, "{}", a.body);
    assert!(a.cookie("linewarden_session").is_none());
    // An oversized form, and a note over the limit.
    let a = post_ack(
        &o,
        &format!("{}&note={}", ack_form(&csrf), "n".repeat(100_000)),
    );
    assert_eq!(a.status, 413);
    let a = post_ack(&o, &format!("{}{}", ack_form(&csrf), "n".repeat(2001)));
    assert_eq!(a.status, 400, "{}", a.body);
    // An alert that does not exist: the engine's answer, in words.
    let a = post_ack(&o, &format!("csrf={csrf}&alert=bore-99-nothing&back=bore"));
    assert_eq!(a.status, 409, "{}", a.body);

    // Still open after all that.
    let page = send(&request("GET", "/c/bore", &host, &me, None));
    assert!(page.body.contains("Acknowledge as dana"), "{}", page.body);
    // The real one, from this page (a browser that sends only a Referer is taken too).
    let a = post_ack(
        &format!("{me}Referer: {origin}/c/bore\r\n"),
        &ack_form(&csrf),
    );
    assert_eq!(a.status, 303, "{}", a.body);
    assert_eq!(
        a.header("location").as_deref(),
        Some(&*format!("/c/bore?acked={ALERT}"))
    );
    // Logged out, the session is gone.
    let a = send(&request(
        "POST",
        "/logout",
        &host,
        &format!("{me}Origin: {origin}\r\n"),
        Some(&format!("csrf={csrf}")),
    ));
    assert_eq!(a.status, 303);
    let page = send(&request("GET", "/c/bore", &host, &me, None));
    assert!(page.body.contains("Log in to acknowledge"), "{}", page.body);
    // And the daemon took no harm.
    assert_eq!(
        send(&request("GET", "/healthz", &host, "", None)).status,
        200
    );
    daemon.stop();
    assert_eq!(
        archived_acks(d),
        vec![(ALERT.to_string(), "dana".to_string())]
    );
}

#[test]
fn guessed_passwords_are_limited_per_address_and_a_removed_user_can_do_nothing_more() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let port = free_port();
    let cfg = cell(d, &format!("127.0.0.1:{port}"), "");
    let daemon = common::InProcess::start(&cfg);
    wait_for_port(port);
    shift(d);
    let host = format!("127.0.0.1:{port}");
    let origin = format!("http://{host}");
    let send = |r: &str| plain(port, r);
    // A session taken before the guessing starts.
    let session = login(&send, &host, &origin, PASSWORD).unwrap();
    for i in 0..5 {
        let a = login(&send, &host, &origin, &format!("guess-{i}")).unwrap_err();
        assert_eq!(a.status, 401, "{}", a.body);
        assert!(a.body.contains("Wrong name or password."), "{}", a.body);
    }
    // The sixth attempt is refused before the password is looked at, even the right one.
    let a = login(&send, &host, &origin, PASSWORD).unwrap_err();
    assert_eq!(a.status, 429, "{}", a.body);
    let wait: u64 = a.header("retry-after").unwrap().parse().unwrap();
    assert!((1..=600).contains(&wait), "{wait}");
    assert!(a.body.contains("Too many failed logins"), "{}", a.body);
    // dana leaves the users file (another person is now the only one): the session she has
    // can acknowledge nothing more.
    let other = linewarden::daemon::access::hash_password("day-shift-3").unwrap();
    std::fs::write(d.join("users"), format!("omar:{other}\n")).unwrap();
    let me = format!("Cookie: linewarden_session={session}\r\n");
    let csrf = send(&request("GET", "/c/bore", &host, &me, None)).csrf();
    let a = send(&request(
        "POST",
        "/ack",
        &host,
        &format!("{me}Origin: {origin}\r\n"),
        Some(&format!("csrf={csrf}&alert={ALERT}&back=bore")),
    ));
    assert_eq!(a.status, 403, "{}", a.body);
    assert!(a.body.contains("no longer in the users file"), "{}", a.body);
    daemon.stop();
    assert!(archived_acks(d).is_empty());
}

/// What broke: the limit was checked before the password and a failure counted after it, so
/// 100 guesses sent at once were all checked, none refused, and the right one logged in. Each
/// attempt is now counted before its check: of 100 at once, at most the limit are checked.
#[test]
fn concurrent_password_guesses_are_counted_before_they_are_checked() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let port = free_port();
    let cfg = cell(d, &format!("127.0.0.1:{port}"), "");
    let daemon = common::InProcess::start(&cfg);
    wait_for_port(port);
    let host = format!("127.0.0.1:{port}");
    let origin = format!("http://{host}");
    // Each guesser takes its login form first, then all post at once; the 80th has the
    // right password.
    let forms: Vec<(String, String)> = (0..100)
        .map(|_| {
            let form = plain(port, &request("GET", "/login", &host, "", None));
            (form.cookie("linewarden_login").unwrap().0, form.csrf())
        })
        .collect();
    let start = std::sync::Barrier::new(forms.len());
    let answers: Vec<(usize, u16)> = std::thread::scope(|s| {
        let handles: Vec<_> = forms
            .iter()
            .enumerate()
            .map(|(i, (pre, csrf))| {
                let (start, host, origin) = (&start, &host, &origin);
                s.spawn(move || {
                    let password = if i == 79 {
                        PASSWORD.to_string()
                    } else {
                        format!("guess-{i}")
                    };
                    let req = request(
                        "POST",
                        "/login",
                        host,
                        &format!("Origin: {origin}\r\nCookie: linewarden_login={pre}\r\n"),
                        Some(&format!(
                            "csrf={csrf}&next=%2F&user=dana&password={}",
                            enc(&password)
                        )),
                    );
                    let s = TcpStream::connect(("127.0.0.1", port)).unwrap();
                    s.set_read_timeout(Some(Duration::from_secs(60))).unwrap();
                    start.wait();
                    (i, exchange(s, &req).status)
                })
            })
            .collect();
        handles.into_iter().map(|h| h.join().unwrap()).collect()
    });
    let checked = answers.iter().filter(|(_, c)| *c != 429).count();
    assert!(checked <= 5, "{checked} of 100 were checked: {answers:?}");
    assert!(
        answers.iter().all(|(_, c)| [401, 429, 303].contains(c)),
        "{answers:?}"
    );
    // The right password got through only if it was among the few checked; otherwise the
    // limit is reached and even the right password waits now.
    let right = answers.iter().find(|(i, _)| *i == 79).unwrap().1;
    if right != 303 {
        let a = login(&|r: &str| plain(port, r), &host, &origin, PASSWORD).unwrap_err();
        assert_eq!(a.status, 429, "{}", a.body);
    }
    daemon.stop();
}

#[test]
fn acknowledging_is_refused_over_plain_http_beyond_loopback_and_check_says_so() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let port = free_port();
    // Every address, no names: a config error (a foreign name could reach the login).
    let cfg = cell(d, &format!("0.0.0.0:{port}"), "");
    let (ok, _, err) = common::peers::cli(&["check", "--config", cfg.to_str().unwrap()]);
    assert!(!ok, "{err}");
    assert!(
        err.contains("web.hosts") && err.contains("needs the names"),
        "{err}"
    );
    // With its names, valid, with the warnings.
    let cfg = cell(d, &format!("0.0.0.0:{port}"), "hosts = [\"127.0.0.1\"]");
    let (ok, out, err) = common::peers::cli(&["check", "--config", cfg.to_str().unwrap()]);
    assert!(ok, "{err}");
    assert!(out.contains("showing only"), "{out}");
    assert!(err.contains("beyond this machine without TLS"), "{err}");
    assert!(
        err.contains("refused over plain HTTP beyond loopback"),
        "{err}"
    );
    let daemon = common::InProcess::start(&cfg);
    wait_for_port(port);
    let host = format!("127.0.0.1:{port}");
    let a = plain(port, &request("GET", "/login", &host, "", None));
    assert_eq!(a.status, 403, "{}", a.body);
    assert!(a.body.contains("without TLS"), "{}", a.body);
    let a = plain(
        port,
        &request(
            "POST",
            "/login",
            &host,
            &format!("Origin: http://{host}\r\n"),
            Some(&format!("user=dana&password={PASSWORD}")),
        ),
    );
    assert_eq!(a.status, 403);
    assert!(a.cookie("linewarden_session").is_none());
    // The page itself still shows, without the way to log in.
    let a = plain(port, &request("GET", "/", &host, "", None));
    assert_eq!(a.status, 200);
    assert!(!a.body.contains("Log in"), "{}", a.body);
    daemon.stop();
}

/// A self-signed certificate for 127.0.0.1, made with openssl.
fn certificate(dir: &Path) -> (std::path::PathBuf, std::path::PathBuf) {
    let ok = std::process::Command::new("openssl")
        .args([
            "req",
            "-x509",
            "-newkey",
            "rsa:2048",
            "-nodes",
            "-keyout",
            "key.pem",
            "-out",
            "cert.pem",
            "-days",
            "2",
            "-subj",
            "/CN=127.0.0.1",
            "-addext",
            "subjectAltName=IP:127.0.0.1",
            "-addext",
            "basicConstraints=critical,CA:FALSE",
            "-addext",
            "extendedKeyUsage=serverAuth",
        ])
        .current_dir(dir)
        .output()
        .is_ok_and(|o| o.status.success());
    assert!(ok, "openssl could not make the test certificate");
    (dir.join("cert.pem"), dir.join("key.pem"))
}

fn tls(port: u16, cert: &Path, req: &str) -> Answer {
    use rustls::pki_types::{CertificateDer, ServerName, pem::PemObject};
    let mut roots = rustls::RootCertStore::empty();
    roots
        .add(CertificateDer::from_pem_file(cert).unwrap())
        .unwrap();
    let cfg = rustls::ClientConfig::builder_with_provider(std::sync::Arc::new(
        rustls::crypto::aws_lc_rs::default_provider(),
    ))
    .with_safe_default_protocol_versions()
    .unwrap()
    .with_root_certificates(roots)
    .with_no_client_auth();
    let conn = rustls::ClientConnection::new(
        std::sync::Arc::new(cfg),
        ServerName::try_from("127.0.0.1").unwrap().to_owned(),
    )
    .unwrap();
    let tcp = TcpStream::connect(("127.0.0.1", port)).unwrap();
    tcp.set_read_timeout(Some(Duration::from_secs(20))).unwrap();
    exchange(rustls::StreamOwned::new(conn, tcp), req)
}

#[test]
fn over_tls_beyond_loopback_a_technician_logs_in_and_acknowledges() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let (cert, key) = certificate(d);
    let port = free_port();
    let cfg = cell(
        d,
        &format!("0.0.0.0:{port}"),
        &format!(
            "hosts = [\"127.0.0.1\"]\ntls_certificate = \"{}\"\ntls_key = \"{}\"",
            cert.display(),
            key.display()
        ),
    );
    let (ok, out, err) = common::peers::cli(&["check", "--config", cfg.to_str().unwrap()]);
    assert!(ok, "{err}");
    assert!(
        out.contains("https://") && out.contains("acknowledging after a login"),
        "{out}"
    );
    assert!(!err.contains("without TLS"), "{err}");
    let daemon = common::InProcess::start(&cfg);
    wait_for_port(port);
    shift(d);
    // A client that connects and says nothing, and one that speaks plain HTTP to the TLS port,
    // hold up no one.
    let _silent = TcpStream::connect(("127.0.0.1", port)).unwrap();
    let host = format!("127.0.0.1:{port}");
    let a = plain(port, &request("GET", "/", &host, "", None));
    assert_ne!(a.status, 200);
    let send = |r: &str| tls(port, &cert, r);
    let form = send(&request("GET", "/login", &host, "", None));
    let (_, line) = form.cookie("linewarden_login").unwrap();
    assert!(
        line.contains("HttpOnly") && line.contains("SameSite=Strict") && line.contains("Secure"),
        "{line}"
    );
    // An Origin of the plain-HTTP page is another origin.
    let a = login(&send, &host, &format!("http://{host}"), PASSWORD).unwrap_err();
    assert_eq!(a.status, 403, "{}", a.body);
    let origin = format!("https://{host}");
    let session = login(&send, &host, &origin, PASSWORD).unwrap();
    let me = format!("Cookie: linewarden_session={session}\r\n");
    let csrf = send(&request("GET", "/c/bore", &host, &me, None)).csrf();
    let a = send(&request(
        "POST",
        "/ack",
        &host,
        &format!("{me}Origin: {origin}\r\n"),
        Some(&format!(
            "csrf={csrf}&alert={ALERT}&back=bore&note=over+TLS"
        )),
    ));
    assert_eq!(a.status, 303, "{}", a.body);
    daemon.stop();
    assert_eq!(
        archived_acks(d),
        vec![(ALERT.to_string(), "dana".to_string())]
    );
}

/// `linewarden web-user NAME` makes a line the users file takes and the login accepts; a short
/// password, a bad name and no password are refused.
#[test]
fn the_users_file_line_from_the_command_line_logs_in() {
    use std::process::{Command, Stdio};
    let run = |args: &[&str], input: &str| {
        let mut c = Command::new(env!("CARGO_BIN_EXE_linewarden"))
            .args(args)
            .stdin(Stdio::piped())
            .stdout(Stdio::piped())
            .stderr(Stdio::piped())
            .spawn()
            .unwrap();
        c.stdin.take().unwrap().write_all(input.as_bytes()).unwrap();
        let o = c.wait_with_output().unwrap();
        (
            o.status.success(),
            String::from_utf8_lossy(&o.stdout).into_owned(),
            String::from_utf8_lossy(&o.stderr).into_owned(),
        )
    };
    let (ok, line, err) = run(&["web-user", "dana"], &format!("{PASSWORD}\n"));
    assert!(ok, "{err}");
    assert!(line.starts_with("dana:$argon2id$"), "{line}");
    let (ok, _, err) = run(&["web-user", "dana"], "short\n");
    assert!(!ok && err.contains("fewer than 8 characters"), "{err}");
    let (ok, _, err) = run(&["web-user", "da:na"], &format!("{PASSWORD}\n"));
    assert!(!ok && err.contains("letters, digits"), "{err}");
    let (ok, _, err) = run(&["web-user", "dana"], "");
    assert!(!ok && err.contains("no password"), "{err}");

    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let port = free_port();
    let cfg = cell(d, &format!("127.0.0.1:{port}"), "");
    std::fs::write(d.join("users"), &line).unwrap();
    let daemon = common::InProcess::start(&cfg);
    wait_for_port(port);
    let host = format!("127.0.0.1:{port}");
    let send = |r: &str| plain(port, r);
    assert!(login(&send, &host, &format!("http://{host}"), PASSWORD).is_ok());
    // Where to go after the login, hostile: another site, a header break, bytes no header
    // may hold. Each goes to the overview instead (and the daemon answers on).
    for next in [
        "%2F%2Fevil.example",
        "%2Fc%2F%0D%0ASet-Cookie:x=1",
        "%2Fc%2F%C3%A9%01",
        "http%3A%2F%2Fevil.example",
    ] {
        let form = send(&request("GET", "/login", &host, "", None));
        let (pre, _) = form.cookie("linewarden_login").unwrap();
        let a = send(&request(
            "POST",
            "/login",
            &host,
            &format!("Origin: http://{host}\r\nCookie: linewarden_login={pre}\r\n"),
            Some(&format!(
                "csrf={}&next={next}&user=dana&password={PASSWORD}",
                form.csrf()
            )),
        ));
        assert_eq!(a.status, 303, "{next}: {}", a.body);
        assert_eq!(a.header("location").as_deref(), Some("/"), "{next}");
    }
    assert_eq!(
        send(&request("GET", "/healthz", &host, "", None)).status,
        200
    );
    daemon.stop();
}
