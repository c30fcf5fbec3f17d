//! The systemd notification protocol: `READY=1` once the sources are up, `WATCHDOG=1` while the
//! pipeline makes progress, `STOPPING=1` and a `STATUS=` line. Without `NOTIFY_SOCKET` (not
//! started by systemd) every call does nothing.

use std::os::unix::net::UnixDatagram;

/// A connection to systemd's notification socket, if there is one.
pub struct Notifier {
    socket: Option<(UnixDatagram, String)>,
}

impl Notifier {
    /// From the environment (`NOTIFY_SOCKET`).
    pub fn from_env() -> Self {
        let socket = std::env::var("NOTIFY_SOCKET")
            .ok()
            .filter(|p| !p.is_empty())
            .and_then(|p| UnixDatagram::unbound().ok().map(|s| (s, p)))
            // Never block the runtime on a slow reader: a message that does not fit is dropped
            // (the next watchdog ping follows shortly).
            .filter(|(s, _)| s.set_nonblocking(true).is_ok());
        Notifier { socket }
    }

    /// Whether a notification socket is set.
    pub fn enabled(&self) -> bool {
        self.socket.is_some()
    }

    /// Sends one message (`READY=1`, `WATCHDOG=1`, `STATUS=...`); errors are logged, not fatal.
    pub fn send(&self, message: &str) {
        let Some((sock, path)) = &self.socket else {
            return;
        };
        let result = if let Some(name) = path.strip_prefix('@') {
            use std::os::linux::net::SocketAddrExt;
            std::os::unix::net::SocketAddr::from_abstract_name(name.as_bytes())
                .and_then(|addr| sock.send_to_addr(message.as_bytes(), &addr))
        } else {
            sock.send_to(message.as_bytes(), path)
        };
        if let Err(e) = result {
            tracing::warn!(
                component = "daemon",
                "cannot notify systemd ({message}): {e}"
            );
        }
    }

    /// The watchdog interval systemd asks for (`WATCHDOG_USEC`), if any.
    pub fn watchdog() -> Option<std::time::Duration> {
        let usec: u64 = std::env::var("WATCHDOG_USEC").ok()?.parse().ok()?;
        let pid_ok = std::env::var("WATCHDOG_PID")
            .ok()
            .and_then(|p| p.parse::<u32>().ok())
            .is_none_or(|p| p == std::process::id());
        (usec > 0 && pid_ok).then(|| std::time::Duration::from_micros(usec))
    }
}
