//! Acknowledging from the live page: who may, and the checks every request that changes
//! something passes.
//!
//! * **Who**: the people in the users file `[web] users` names (argon2 hashes), re-read at each
//!   login and each acknowledgement, so a person taken out of the file can do nothing more
//!   from their next request on.
//! * **Login**: a session cookie (random, `HttpOnly`, `SameSite=Strict`, `Secure` over TLS) that
//!   lasts `session_hours`; sessions live in memory (a restart logs everyone out). Failed logins
//!   are limited per client address and per user name; password checks run two at a time off
//!   the runtime's threads, so a flood of logins cannot take the engine's time.
//! * **Every POST**: the `Host` is one the page answers to (checked for every page request, see
//!   [`super::web`]), the `Origin` (or, without one, the `Referer`) is this same page, and the
//!   form carries the session's CSRF token (the login form: the token of a short-lived cookie).
//! * **Transport**: none of it over plain HTTP beyond loopback ([`Web::acknowledging`]).
//!
//! The acknowledgement itself goes to the engine task as from the control socket: the archive
//! records it with the user's name.

use std::collections::{HashMap, VecDeque};
use std::net::{IpAddr, SocketAddr};
use std::sync::Mutex;
use std::time::Duration;

use argon2::password_hash::rand_core::{OsRng, RngCore};
use argon2::{Argon2, PasswordHash, PasswordHasher, PasswordVerifier};
use axum::http::HeaderMap;
use tokio::sync::{Semaphore, mpsc, oneshot};

use super::clock::now_ms;
use super::hub;
use crate::config::Web;
use crate::config::web::{WebUser, read_users};

/// The session cookie's name.
pub const SESSION_COOKIE: &str = "linewarden_session";
/// The login form's cookie (its CSRF token before there is a session).
pub const LOGIN_COOKIE: &str = "linewarden_login";

/// Failed logins remembered this long.
const FAIL_WINDOW_MS: i64 = 10 * 60 * 1000;
/// Failed logins allowed per client address within the window, then refused until the oldest
/// leaves it.
const FAILS_PER_ADDRESS: usize = 5;
/// Failed logins allowed per user name within the window, from any address.
const FAILS_PER_USER: usize = 10;
/// Addresses and names remembered at most (older ones are forgotten first).
const MAX_TRACKED: usize = 10_000;
/// Sessions at most; the one closest to its end goes first.
const MAX_SESSIONS: usize = 1_000;
/// An acknowledgement note's length at most, in characters.
pub const MAX_NOTE: usize = 2000;

/// One logged-in browser.
#[derive(Debug, Clone)]
pub struct Session {
    pub user: String,
    /// Sent back in every form; a POST without it is refused.
    pub csrf: String,
    pub expires_ms: i64,
}

#[derive(Default)]
struct Failures {
    by_address: HashMap<IpAddr, VecDeque<i64>>,
    by_user: HashMap<String, VecDeque<i64>>,
}

fn prune<K: std::hash::Hash + Eq + Clone>(m: &mut HashMap<K, VecDeque<i64>>, now: i64) {
    for q in m.values_mut() {
        while q.front().is_some_and(|t| *t <= now - FAIL_WINDOW_MS) {
            q.pop_front();
        }
    }
    m.retain(|_, q| !q.is_empty());
    if m.len() > MAX_TRACKED {
        let mut by_last: Vec<(i64, K)> = m
            .iter()
            .map(|(k, q)| (*q.back().unwrap_or(&0), k.clone()))
            .collect();
        by_last.sort_by_key(|(t, _)| *t);
        for (_, k) in by_last.into_iter().take(m.len() - MAX_TRACKED) {
            m.remove(&k);
        }
    }
}

/// Takes back one attempt counted at `at` (a login that succeeded).
fn forget_one(q: Option<&mut VecDeque<i64>>, at: i64) {
    if let Some(q) = q
        && let Some(i) = q.iter().rposition(|t| *t == at)
    {
        q.remove(i);
    }
}

/// Why a login was refused.
#[derive(Debug, PartialEq)]
pub enum LoginRefused {
    /// Too many failures lately: try again after this many seconds.
    TooMany { retry_after_s: u64 },
    /// Wrong name or password (which of the two is not said).
    Wrong,
    /// The users file cannot be read now.
    Unavailable(String),
}

/// The page's access control: the users file, the sessions, the failed logins.
pub struct Access {
    pub web: Web,
    sessions: Mutex<HashMap<String, Session>>,
    failures: Mutex<Failures>,
    /// Password checks at once (each takes ~19 MiB and tens of milliseconds).
    checking: Semaphore,
    /// Checked in place of a hash when the name is unknown, so that the answer takes as long.
    decoy: String,
    requests: mpsc::Sender<hub::Request>,
}

/// A random token: 32 bytes from the operating system, as hex.
pub fn token() -> String {
    let mut b = [0u8; 32];
    OsRng.fill_bytes(&mut b);
    b.iter().map(|x| format!("{x:02x}")).collect()
}

/// Compares in time that depends on the lengths only.
pub fn same(a: &str, b: &str) -> bool {
    a.len() == b.len()
        && a.bytes()
            .zip(b.bytes())
            .fold(0u8, |acc, (x, y)| acc | (x ^ y))
            == 0
}

/// An argon2id hash of `password` with a fresh salt (the crate's default cost: 19 MiB, two
/// passes, as recommended for interactive logins).
pub fn hash_password(password: &str) -> Result<String, String> {
    let salt = argon2::password_hash::SaltString::generate(&mut OsRng);
    Argon2::default()
        .hash_password(password.as_bytes(), &salt)
        .map(|h| h.to_string())
        .map_err(|e| e.to_string())
}

/// The value of cookie `name` in the request's `Cookie` headers.
pub fn cookie(headers: &HeaderMap, name: &str) -> Option<String> {
    headers
        .get_all(axum::http::header::COOKIE)
        .iter()
        .filter_map(|v| v.to_str().ok())
        .flat_map(|v| v.split(';'))
        .filter_map(|kv| kv.trim().split_once('='))
        .find(|(k, _)| *k == name)
        .map(|(_, v)| v.to_string())
}

impl Access {
    pub fn new(web: Web, requests: mpsc::Sender<hub::Request>) -> Access {
        let decoy = hash_password(&token()).unwrap_or_default();
        Access {
            web,
            sessions: Mutex::new(HashMap::new()),
            failures: Mutex::new(Failures::default()),
            checking: Semaphore::new(2),
            decoy,
            requests,
        }
    }

    /// Whether logins and acknowledgements are possible here; the reason when not.
    pub fn enabled(&self) -> Result<(), String> {
        self.web.acknowledging()
    }

    /// A cookie as this endpoint sets them.
    pub fn set_cookie(&self, name: &str, value: &str, max_age_s: i64) -> String {
        format!(
            "{name}={value}; Path=/; HttpOnly; SameSite=Strict; Max-Age={max_age_s}{}",
            if self.web.tls.is_some() {
                "; Secure"
            } else {
                ""
            }
        )
    }

    /// The session the request's cookie names, while it lasts.
    pub fn session(&self, headers: &HeaderMap) -> Option<Session> {
        let t = cookie(headers, SESSION_COOKIE)?;
        let now = now_ms();
        let mut s = self.sessions.lock().unwrap();
        match s.get(&t) {
            Some(x) if x.expires_ms > now => Some(x.clone()),
            Some(_) => {
                s.remove(&t);
                None
            }
            None => None,
        }
    }

    /// Ends the session the request's cookie names.
    pub fn logout(&self, headers: &HeaderMap) {
        if let Some(t) = cookie(headers, SESSION_COOKIE) {
            self.sessions.lock().unwrap().remove(&t);
        }
    }

    fn users(&self) -> Result<Vec<WebUser>, String> {
        let path = self.web.users.as_ref().ok_or("no users file")?;
        read_users(path).map_err(|e| e.join("; "))
    }

    /// Whether `user` is still in the users file.
    pub fn still_listed(&self, user: &str) -> Result<bool, String> {
        Ok(self.users()?.iter().any(|u| u.name == user))
    }

    /// Checks a name and password; on success a new session and its cookie value.
    pub async fn login(
        &self,
        peer: IpAddr,
        user: &str,
        password: &str,
    ) -> Result<(String, Session), LoginRefused> {
        let now = now_ms();
        {
            let mut f = self.failures.lock().unwrap();
            prune(&mut f.by_address, now);
            prune(&mut f.by_user, now);
            let full = |q: Option<&VecDeque<i64>>, max: usize| {
                q.filter(|q| q.len() >= max)
                    .and_then(|q| q.front())
                    .map(|oldest| ((oldest + FAIL_WINDOW_MS - now).max(1000) / 1000) as u64)
            };
            if let Some(s) = full(f.by_address.get(&peer), FAILS_PER_ADDRESS)
                .or_else(|| full(f.by_user.get(user), FAILS_PER_USER))
            {
                return Err(LoginRefused::TooMany { retry_after_s: s });
            }
            // Counted as a failure now, under the same lock as the check, and given back only
            // if the password turns out right: guesses sent at once cannot all pass the check
            // before any of them is counted.
            f.by_address.entry(peer).or_default().push_back(now);
            // Names that are not users are counted too, but cannot fill the table for good:
            // the oldest are forgotten first.
            f.by_user
                .entry(user.to_string())
                .or_default()
                .push_back(now);
        }
        let users = self.users().map_err(|e| {
            // Not a guess: the attempt is given back.
            let mut f = self.failures.lock().unwrap();
            forget_one(f.by_address.get_mut(&peer), now);
            forget_one(f.by_user.get_mut(user), now);
            LoginRefused::Unavailable(e)
        })?;
        let hash = users
            .iter()
            .find(|u| u.name == user)
            .map_or(self.decoy.clone(), |u| u.hash.clone());
        let known = users.iter().any(|u| u.name == user);
        let password = password.to_string();
        let ok = {
            let _permit = self.checking.acquire().await.ok();
            tokio::task::spawn_blocking(move || {
                PasswordHash::new(&hash).is_ok_and(|h| {
                    Argon2::default()
                        .verify_password(password.as_bytes(), &h)
                        .is_ok()
                })
            })
            .await
            .unwrap_or(false)
        } && known;
        if !ok {
            return Err(LoginRefused::Wrong);
        }
        {
            let mut f = self.failures.lock().unwrap();
            forget_one(f.by_address.get_mut(&peer), now);
            forget_one(f.by_user.get_mut(user), now);
        }
        let now = now_ms();
        let t = token();
        let s = Session {
            user: user.to_string(),
            csrf: token(),
            expires_ms: now + self.web.session_ms,
        };
        let mut all = self.sessions.lock().unwrap();
        all.retain(|_, x| x.expires_ms > now);
        if all.len() >= MAX_SESSIONS
            && let Some(k) = all
                .iter()
                .min_by_key(|(_, x)| x.expires_ms)
                .map(|(k, _)| k.clone())
        {
            all.remove(&k);
        }
        all.insert(t.clone(), s.clone());
        Ok((t, s))
    }

    /// Acknowledges `alert` as `user`, as the control socket does.
    pub async fn acknowledge(
        &self,
        alert: &str,
        user: &str,
        note: Option<String>,
        peer: SocketAddr,
    ) -> hub::AckReply {
        let (reply, answer) = oneshot::channel();
        let req = hub::Request::Ack {
            target: alert.to_string(),
            by: user.to_string(),
            note,
            via: format!("the web page from {}", peer.ip()),
            reply,
        };
        let refused = |e: &str| hub::AckReply {
            ok: false,
            acknowledged: Vec::new(),
            error: Some(e.to_string()),
        };
        if self.requests.send(req).await.is_err() {
            return refused("the daemon is stopping");
        }
        match tokio::time::timeout(Duration::from_secs(10), answer).await {
            Ok(Ok(a)) => a,
            _ => refused("the engine did not answer within 10 seconds; try again"),
        }
    }

    /// Whether a POST comes from this page ([`same_origin`]).
    pub fn same_origin(&self, headers: &HeaderMap) -> Result<(), String> {
        same_origin(&self.web, headers)
    }
}

/// Whether a POST comes from this page: its `Origin` (or, when a browser sends none, its
/// `Referer`) names the same scheme and host as the request itself, and that host is one the
/// page answers to. The reason when not.
pub fn same_origin(web: &Web, headers: &HeaderMap) -> Result<(), String> {
    let host = headers
        .get(axum::http::header::HOST)
        .and_then(|h| h.to_str().ok())
        .unwrap_or_default();
    let scheme = if web.tls.is_some() { "https" } else { "http" };
    let from = headers
        .get(axum::http::header::ORIGIN)
        .or_else(|| headers.get(axum::http::header::REFERER))
        .and_then(|h| h.to_str().ok())
        .ok_or("the request names no Origin or Referer, so it cannot be told from a foreign site's; it is refused")?;
    let authority = from
        .strip_prefix(scheme)
        .and_then(|r| r.strip_prefix("://"))
        .map(|r| r.split(['/', '?', '#']).next().unwrap_or(""));
    match authority {
        Some(a) if !a.is_empty() && a.eq_ignore_ascii_case(host) && web.host_allowed(a) => Ok(()),
        _ => Err(format!(
            "the request comes from {from:?}, not from this page ({scheme}://{host}); it is refused"
        )),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn tokens_are_random_and_comparisons_exact() {
        let a = token();
        assert_eq!(a.len(), 64);
        assert_ne!(a, token());
        assert!(same(&a, &a.clone()));
        assert!(!same(&a, &token()));
        assert!(!same("abc", "abcd"));
    }

    #[test]
    fn cookies_are_found_among_others() {
        let mut h = HeaderMap::new();
        h.append("cookie", "a=1; linewarden_session=xyz".parse().unwrap());
        h.append("cookie", "b=2".parse().unwrap());
        assert_eq!(cookie(&h, SESSION_COOKIE).as_deref(), Some("xyz"));
        assert_eq!(cookie(&h, "b").as_deref(), Some("2"));
        assert_eq!(cookie(&h, "c"), None);
    }

    #[test]
    fn a_hash_made_here_verifies_its_password_only() {
        let h = hash_password("correct horse").unwrap();
        let p = PasswordHash::new(&h).unwrap();
        assert_eq!(p.algorithm.as_str(), "argon2id");
        assert!(
            Argon2::default()
                .verify_password(b"correct horse", &p)
                .is_ok()
        );
        assert!(
            Argon2::default()
                .verify_password(b"correct horsf", &p)
                .is_err()
        );
    }
}
