//! `[web]`: the daemon's HTTP endpoint: metrics and health checks, the live page, and, when a
//! users file is named, acknowledging alerts from the page after a login.
//!
//! Checked here, as the rest of the config, before anything listens: the address, the names the
//! page may be reached by (the `Host` and `Origin` of every request are held against them, so a
//! foreign web site cannot reach the page through a name of its own that resolves to this box),
//! the users file (every line), the TLS certificate and key (parsed), and the combinations that
//! would make acknowledging from the page unsafe.

use std::net::SocketAddr;
use std::path::{Path, PathBuf};
use std::sync::Arc;

use serde::{Deserialize, Serialize};

use crate::diag::{Locator, Problem};

/// `[web]` as written.
#[derive(Debug, Clone, PartialEq, Deserialize, Serialize)]
#[serde(deny_unknown_fields)]
pub struct RawWeb {
    /// Address and port to listen on, such as "127.0.0.1:9630".
    pub listen: String,
    /// The names (or addresses) people reach the page by, such as "cell4-spc.plant.example";
    /// with a port ("name:8443") only that port. Loopback names are always accepted when the
    /// page listens on loopback, and the listen address itself always.
    #[serde(default)]
    pub hosts: Vec<String>,
    /// A file of the people who may acknowledge from the page: one `name:hash` per line, the
    /// hash an argon2 hash (`linewarden web-user NAME` makes the line). Without it the page
    /// only shows.
    pub users: Option<String>,
    /// PEM files of the page's TLS certificate chain and its private key: both or neither.
    pub tls_certificate: Option<String>,
    pub tls_key: Option<String>,
    /// How long a login lasts, in hours (default 12, a shift and a half).
    #[serde(default = "default_session_hours")]
    pub session_hours: f64,
}

fn default_session_hours() -> f64 {
    12.0
}

/// One name the page answers to: a host name or address (lowercase, IPv6 without brackets),
/// and a port when only that one is meant.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct HostName {
    pub host: String,
    pub port: Option<u16>,
}

/// The TLS certificate chain and key files.
#[derive(Debug, Clone, PartialEq)]
pub struct Tls {
    pub certificate: PathBuf,
    pub key: PathBuf,
}

/// One person who may acknowledge from the page.
#[derive(Debug, Clone, PartialEq)]
pub struct WebUser {
    pub name: String,
    /// An argon2 hash in the PHC string form (`$argon2id$v=19$m=...`).
    pub hash: String,
}

/// The daemon's HTTP endpoint, checked.
#[derive(Debug, Clone, PartialEq)]
pub struct Web {
    pub listen: SocketAddr,
    /// The names a request's `Host` (and a POST's `Origin`) must be one of; empty when any name
    /// is taken (listening on every address with no `hosts`, and no login).
    pub hosts: Vec<HostName>,
    /// The users file, when acknowledging from the page is configured.
    pub users: Option<PathBuf>,
    pub tls: Option<Tls>,
    pub session_ms: i64,
}

impl Web {
    /// Whether the page listens only on this machine's loopback.
    pub fn loopback_only(&self) -> bool {
        self.listen.ip().is_loopback()
    }

    /// Whether a login and an acknowledgement may travel over this endpoint: configured, and
    /// either encrypted or never leaving the machine. The reason when not.
    pub fn acknowledging(&self) -> Result<(), String> {
        if self.users.is_none() {
            return Err("acknowledging from the page is not configured ([web] users)".into());
        }
        if self.tls.is_none() && !self.loopback_only() {
            return Err(format!(
                "acknowledging from the page is refused: it listens on {} beyond this machine without TLS, so passwords would cross the network in plain text ([web] tls_certificate and tls_key)",
                self.listen
            ));
        }
        Ok(())
    }

    /// Whether a request's `Host` (or the host of its `Origin`) is one this page answers to.
    pub fn host_allowed(&self, host_header: &str) -> bool {
        if self.hosts.is_empty() {
            return true;
        }
        let Some(h) = parse_host(host_header) else {
            return false;
        };
        self.hosts
            .iter()
            .any(|a| a.host == h.host && (a.port.is_none() || a.port == h.port))
    }

    /// What `check` and the daemon's start say about this endpoint without refusing it.
    pub fn warnings(&self) -> Vec<String> {
        let mut w = Vec::new();
        if self.tls.is_none() && !self.loopback_only() {
            w.push(format!(
                "web.listen: the page and the metrics are served on {} beyond this machine without TLS: anyone on that network can read them in transit",
                self.listen
            ));
            if self.users.is_some() {
                w.push(
                    "web.users: acknowledging from the page is refused over plain HTTP beyond loopback; set tls_certificate and tls_key to allow it"
                        .to_string(),
                );
            }
        }
        if let Some(u) = &self.users {
            use std::os::unix::fs::PermissionsExt;
            if let Ok(m) = std::fs::metadata(u)
                && m.permissions().mode() & 0o004 != 0
            {
                w.push(format!(
                    "web.users: {} can be read by every user of this machine; make it readable only by the daemon's user (chmod 0640)",
                    u.display()
                ));
            }
        }
        w
    }
}

/// A `Host` header value (or an origin's host part): name or address, port.
pub fn parse_host(text: &str) -> Option<HostName> {
    let t = text.trim();
    if t.is_empty() || t.contains(['/', '@', ' ', '\\']) {
        return None;
    }
    let (host, port) = if let Some(rest) = t.strip_prefix('[') {
        let (h, after) = rest.split_once(']')?;
        h.parse::<std::net::Ipv6Addr>().ok()?;
        let port = match after {
            "" => None,
            p => Some(p.strip_prefix(':')?.parse::<u16>().ok()?),
        };
        (h.to_string(), port)
    } else if t.parse::<std::net::Ipv6Addr>().is_ok() {
        (t.to_string(), None)
    } else {
        match t.rsplit_once(':') {
            Some((h, p)) => (h.to_string(), Some(p.parse::<u16>().ok()?)),
            None => (t.to_string(), None),
        }
    };
    let host = host.to_ascii_lowercase();
    let host = host.strip_suffix('.').unwrap_or(&host).to_string();
    let ok = !host.is_empty()
        && host
            .chars()
            .all(|c| c.is_ascii_alphanumeric() || matches!(c, '.' | '-' | '_' | ':'));
    ok.then_some(HostName { host, port })
}

/// Reads a users file: every problem, each with its line.
pub fn read_users(path: &Path) -> Result<Vec<WebUser>, Vec<String>> {
    let text = std::fs::read_to_string(path).map_err(|e| {
        vec![format!(
            "cannot read the users file {}: {e}",
            path.display()
        )]
    })?;
    parse_users(&text, path)
}

/// A users file's text (`path` only names it in the problems).
pub fn parse_users(text: &str, path: &Path) -> Result<Vec<WebUser>, Vec<String>> {
    let mut users: Vec<WebUser> = Vec::new();
    let mut problems = Vec::new();
    for (i, line) in text.lines().enumerate() {
        let n = i + 1;
        let l = line.trim();
        if l.is_empty() || l.starts_with('#') {
            continue;
        }
        let Some((name, hash)) = l.split_once(':') else {
            problems.push(format!(
                "{} line {n}: expected NAME:HASH (make the line with `linewarden web-user NAME`)",
                path.display()
            ));
            continue;
        };
        if let Err(e) = check_user_name(name) {
            problems.push(format!("{} line {n}: {e}", path.display()));
            continue;
        }
        match argon2::PasswordHash::new(hash) {
            Ok(h) if h.algorithm.as_str().starts_with("argon2") => {}
            Ok(h) => {
                problems.push(format!(
                    "{} line {n}: user \"{name}\": the hash is {}, not argon2",
                    path.display(),
                    h.algorithm
                ));
                continue;
            }
            Err(e) => {
                problems.push(format!(
                    "{} line {n}: user \"{name}\": the hash is not an argon2 hash string ({e})",
                    path.display()
                ));
                continue;
            }
        }
        if users.iter().any(|u| u.name == name) {
            problems.push(format!(
                "{} line {n}: user \"{name}\" is listed twice",
                path.display()
            ));
            continue;
        }
        users.push(WebUser {
            name: name.to_string(),
            hash: hash.to_string(),
        });
    }
    if problems.is_empty() && users.is_empty() {
        problems.push(format!(
            "{} names no user: add one with `linewarden web-user NAME >> {}`",
            path.display(),
            path.display()
        ));
    }
    if problems.is_empty() {
        Ok(users)
    } else {
        Err(problems)
    }
}

/// A user name: what the archive records as who acknowledged.
pub fn check_user_name(name: &str) -> Result<(), String> {
    if name.is_empty() || name.len() > 64 {
        return Err(format!(
            "the user name \"{name}\" must have 1 to 64 characters"
        ));
    }
    if !name
        .chars()
        .all(|c| c.is_alphanumeric() || matches!(c, '.' | '-' | '_'))
    {
        return Err(format!(
            "the user name \"{name}\" may hold letters, digits, '.', '-' and '_' only"
        ));
    }
    Ok(())
}

impl Tls {
    /// The TLS server configuration from the files (read and parsed now).
    pub fn load(&self) -> Result<Arc<rustls::ServerConfig>, String> {
        use rustls::pki_types::pem::PemObject;
        use rustls::pki_types::{CertificateDer, PrivateKeyDer};
        let certs: Vec<CertificateDer<'static>> = CertificateDer::pem_file_iter(&self.certificate)
            .and_then(|i| i.collect::<Result<Vec<_>, _>>())
            .map_err(|e| {
                format!(
                    "cannot read the certificate chain {}: {e}",
                    self.certificate.display()
                )
            })?;
        if certs.is_empty() {
            return Err(format!(
                "{} holds no PEM certificate",
                self.certificate.display()
            ));
        }
        let key = PrivateKeyDer::from_pem_file(&self.key).map_err(|e| {
            format!(
                "cannot read a PEM private key from {}: {e}",
                self.key.display()
            )
        })?;
        let provider = Arc::new(rustls::crypto::aws_lc_rs::default_provider());
        let cfg = rustls::ServerConfig::builder_with_provider(provider)
            .with_safe_default_protocol_versions()
            .map_err(|e| e.to_string())?
            .with_no_client_auth()
            .with_single_cert(certs, key)
            .map_err(|e| {
                format!(
                    "the certificate {} and the key {} do not make a TLS identity: {e}",
                    self.certificate.display(),
                    self.key.display()
                )
            })?;
        let mut cfg = cfg;
        cfg.alpn_protocols = vec![b"http/1.1".to_vec()];
        Ok(Arc::new(cfg))
    }
}

/// `[web]` checked.
pub(super) fn build_web(
    raw: &Option<RawWeb>,
    resolve: &dyn Fn(&str) -> PathBuf,
    loc: &Locator,
    p: &mut Vec<Problem>,
) -> Option<Web> {
    let w = raw.as_ref()?;
    let listen = match w.listen.trim().parse::<SocketAddr>() {
        Ok(l) => Some(l),
        Err(_) => {
            p.push(loc.problem(
                "web.listen",
                format!(
                    "\"{}\" is not an address and port such as \"127.0.0.1:9630\" or \"[::1]:9630\" (numbers, not a host name)",
                    w.listen
                ),
            ));
            None
        }
    };
    let mut hosts = Vec::new();
    for (i, h) in w.hosts.iter().enumerate() {
        match parse_host(h) {
            Some(n) if !hosts.contains(&n) => hosts.push(n),
            Some(_) => p.push(loc.problem(
                &format!("web.hosts[{i}]"),
                format!("\"{h}\" is listed twice"),
            )),
            None => p.push(loc.problem(
                &format!("web.hosts[{i}]"),
                format!(
                    "\"{h}\" is not a host name or address (such as \"cell4-spc.plant.example\", \"10.4.0.20\" or \"cell4-spc:8443\"; no scheme, no path)"
                ),
            )),
        }
    }
    let users = w.users.as_deref().map(|u| {
        let path = resolve(u);
        if let Err(list) = read_users(&path) {
            for e in list {
                p.push(loc.problem("web.users", e));
            }
        }
        path
    });
    let tls = match (&w.tls_certificate, &w.tls_key) {
        (Some(c), Some(k)) => {
            let t = Tls {
                certificate: resolve(c),
                key: resolve(k),
            };
            if let Err(e) = t.load() {
                p.push(loc.problem("web.tls_certificate", e));
            }
            Some(t)
        }
        (None, None) => None,
        (Some(_), None) => {
            p.push(loc.problem(
                "web.tls_key",
                "tls_certificate is set without tls_key: give both PEM files, or neither",
            ));
            None
        }
        (None, Some(_)) => {
            p.push(loc.problem(
                "web.tls_certificate",
                "tls_key is set without tls_certificate: give both PEM files, or neither",
            ));
            None
        }
    };
    if !(w.session_hours > 0.0 && w.session_hours <= 168.0) {
        p.push(loc.problem(
            "web.session_hours",
            format!(
                "{} is not a login's length in hours between 0 and 168 (a week)",
                w.session_hours
            ),
        ));
    }
    let listen = listen?;
    if listen.ip().is_unspecified() {
        if hosts.is_empty() && users.is_some() {
            p.push(loc.problem(
                "web.hosts",
                format!(
                    "acknowledging from the page on {listen} (every address of this machine) needs the names people reach it by, such as hosts = [\"cell4-spc.plant.example\"], so that a foreign web site cannot reach it under a name of its own"
                ),
            ));
        }
    } else {
        let own = HostName {
            host: listen.ip().to_string(),
            port: None,
        };
        if !hosts.contains(&own) {
            hosts.push(own);
        }
    }
    if listen.ip().is_loopback() {
        for name in ["localhost", "127.0.0.1", "::1"] {
            let n = HostName {
                host: name.to_string(),
                port: None,
            };
            if !hosts.contains(&n) {
                hosts.push(n);
            }
        }
    }
    Some(Web {
        listen,
        hosts,
        users,
        tls,
        session_ms: (w.session_hours * 3_600_000.0) as i64,
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn host_headers_parse_as_browsers_send_them() {
        let h = |s: &str| parse_host(s).map(|n| (n.host, n.port));
        assert_eq!(
            h("Cell4-SPC.example:9630"),
            Some(("cell4-spc.example".into(), Some(9630)))
        );
        assert_eq!(h("10.4.0.20"), Some(("10.4.0.20".into(), None)));
        assert_eq!(h("[::1]:9630"), Some(("::1".into(), Some(9630))));
        assert_eq!(h("::1"), Some(("::1".into(), None)));
        assert_eq!(h("example.com."), Some(("example.com".into(), None)));
        for bad in [
            "",
            "a b",
            "x:99999",
            "[::1",
            "user@host",
            "http://x",
            "[zz]:1",
        ] {
            assert_eq!(h(bad), None, "{bad}");
        }
    }
}
