//! The local control socket: `linewarden status`, `ack` and `approve` talk to the running
//! daemon over a Unix-domain socket, one JSON line each way. Who may connect is decided by the
//! socket's permissions and group (from `[control]`).

use std::os::unix::fs::PermissionsExt;
use std::path::{Path, PathBuf};
use std::time::Duration;

use serde::{Deserialize, Serialize};
use tokio::io::{AsyncBufReadExt, AsyncReadExt, AsyncWriteExt};
use tokio::sync::{mpsc, oneshot, watch};

use super::hub::Request;
use crate::config::Control;

/// What a client asks.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(tag = "request", rename_all = "kebab-case")]
pub enum ClientRequest {
    Status {
        /// Sources, the light and the alerts, without every characteristic.
        #[serde(default)]
        brief: bool,
    },
    Ack {
        alert: String,
        by: String,
        #[serde(default, skip_serializing_if = "Option::is_none")]
        note: Option<String>,
    },
    /// Approve a characteristic's provisional (learned) limits.
    Approve {
        characteristic: String,
        by: String,
        #[serde(default, skip_serializing_if = "Option::is_none")]
        note: Option<String>,
    },
}

/// The longest request line taken.
const MAX_LINE: usize = 16 * 1024;

/// Opens the socket (replacing a stale one), sets its mode and group.
pub fn bind(c: &Control) -> std::io::Result<tokio::net::UnixListener> {
    if let Some(dir) = c.socket.parent() {
        std::fs::create_dir_all(dir)?;
    }
    match std::os::unix::net::UnixStream::connect(&c.socket) {
        Ok(_) => {
            return Err(std::io::Error::new(
                std::io::ErrorKind::AddrInUse,
                format!(
                    "{} is in use: is another linewarden running?",
                    c.socket.display()
                ),
            ));
        }
        Err(_) => {
            let _ = std::fs::remove_file(&c.socket);
        }
    }
    let l = tokio::net::UnixListener::bind(&c.socket)?;
    std::fs::set_permissions(&c.socket, std::fs::Permissions::from_mode(c.mode))?;
    if let Some(g) = &c.group {
        let gid = group_id(g).ok_or_else(|| {
            std::io::Error::new(
                std::io::ErrorKind::NotFound,
                format!("there is no group \"{g}\""),
            )
        })?;
        std::os::unix::fs::chown(&c.socket, None, Some(gid))?;
    }
    Ok(l)
}

fn group_id(name: &str) -> Option<u32> {
    let c = std::ffi::CString::new(name).ok()?;
    // SAFETY: getgrnam reads a NUL-terminated name and returns a pointer into static storage
    // (or null); the gid is copied out at once.
    let g = unsafe { libc::getgrnam(c.as_ptr()) };
    if g.is_null() {
        None
    } else {
        Some(unsafe { (*g).gr_gid })
    }
}

/// Serves connections until shutdown; each one asks one question.
pub async fn serve(
    listener: tokio::net::UnixListener,
    path: PathBuf,
    requests: mpsc::Sender<Request>,
    mut shutdown: watch::Receiver<bool>,
) {
    loop {
        let conn = tokio::select! {
            c = listener.accept() => c,
            _ = shutdown.changed() => break,
        };
        match conn {
            Ok((stream, _)) => {
                tokio::spawn(answer(stream, requests.clone()));
            }
            Err(e) => {
                tracing::warn!(component = "control", "cannot accept a connection: {e}");
                tokio::time::sleep(Duration::from_millis(100)).await;
            }
        }
    }
    let _ = std::fs::remove_file(&path);
}

async fn answer(stream: tokio::net::UnixStream, requests: mpsc::Sender<Request>) {
    let (r, mut w) = stream.into_split();
    let mut line = String::new();
    // One byte past the limit tells a request that is too long from one that fits exactly.
    let mut reader = tokio::io::BufReader::new(r.take(MAX_LINE as u64 + 1));
    let read = tokio::time::timeout(Duration::from_secs(5), reader.read_line(&mut line)).await;
    let reply = match read {
        Ok(Ok(n)) if n > MAX_LINE => serde_json::json!({
            "ok": false,
            "error": format!("the request is longer than {MAX_LINE} bytes; a name or note that long is not taken")
        }),
        Ok(Ok(_)) => match serde_json::from_str::<ClientRequest>(line.trim()) {
            Ok(req) => handle(req, &requests).await,
            Err(e) => serde_json::json!({"ok": false, "error": format!("not a request: {e}")}),
        },
        Ok(Err(e)) => {
            serde_json::json!({"ok": false, "error": format!("the request cannot be read: {e}")})
        }
        Err(_) => return,
    };
    let mut text = reply.to_string();
    text.push('\n');
    let _ = w.write_all(text.as_bytes()).await;
}

async fn handle(req: ClientRequest, requests: &mpsc::Sender<Request>) -> serde_json::Value {
    let via = || "the control socket".to_string();
    match req {
        ClientRequest::Status { brief } => {
            engine_answer(requests, |reply| Request::Status { brief, reply }).await
        }
        ClientRequest::Ack { alert, by, note } => {
            engine_answer(requests, |reply| Request::Ack {
                target: alert,
                by,
                note,
                via: via(),
                reply,
            })
            .await
        }
        ClientRequest::Approve {
            characteristic,
            by,
            note,
        } => {
            engine_answer(requests, |reply| Request::Approve {
                characteristic,
                by,
                note,
                via: via(),
                reply,
            })
            .await
        }
    }
}

/// Sends the engine the request `make` builds around a reply channel, and gives its answer as
/// JSON (or that the daemon is stopping).
pub(crate) async fn engine_answer<T: Serialize>(
    requests: &mpsc::Sender<Request>,
    make: impl FnOnce(oneshot::Sender<T>) -> Request,
) -> serde_json::Value {
    let gone = || serde_json::json!({"ok": false, "error": "the daemon is stopping"});
    let (tx, rx) = oneshot::channel();
    if requests.send(make(tx)).await.is_err() {
        return gone();
    }
    match rx.await {
        Ok(a) => serde_json::to_value(a).unwrap_or_else(|_| gone()),
        Err(_) => gone(),
    }
}

/// Asks the daemon listening on `socket` (for the CLI): one request, one JSON answer.
pub fn ask(socket: &Path, req: &ClientRequest) -> Result<serde_json::Value, String> {
    use std::io::{BufRead, Write};
    let mut s = std::os::unix::net::UnixStream::connect(socket).map_err(|e| {
        format!(
            "cannot reach the daemon at {}: {e} (is it running, and may this user use the socket?)",
            socket.display()
        )
    })?;
    s.set_read_timeout(Some(Duration::from_secs(10))).ok();
    let mut line = serde_json::to_string(req).map_err(|e| e.to_string())?;
    line.push('\n');
    s.write_all(line.as_bytes()).map_err(|e| e.to_string())?;
    let mut answer = String::new();
    std::io::BufReader::new(s)
        .read_line(&mut answer)
        .map_err(|e| format!("no answer from the daemon: {e}"))?;
    serde_json::from_str(answer.trim()).map_err(|e| format!("a bad answer from the daemon: {e}"))
}
