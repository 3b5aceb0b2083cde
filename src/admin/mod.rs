//! The admin channel: how review commands reach a running daemon.
//!
//! sled allows one open instance of the store, and the daemon holds it while it runs. Review commands
//! therefore send their [`Request`] to the daemon over a Unix socket in the workspace, `DIR/admin.sock`;
//! when no daemon answers there, they open the store themselves (the binary does the choosing).
//!
//! * **Who may use it**: root, the daemon's own user and the members of `[admin] reviewer_group`, checked
//!   on the peer's credentials (`SO_PEERCRED`) for every connection ([`peer`]); anyone else gets a
//!   `denied` answer with the reason. The socket file's mode (`0660`, created by the daemon) and the
//!   workspace folder's permissions are a second fence on top. The peer's user id and name are recorded
//!   in the audit trail beside the `--by` name the command gives.
//! * **Limits**: at most `[admin] max_connections` connections at once (more wait in the backlog), a
//!   request must arrive within `[admin] request_timeout_secs`, and accept errors back off. The client
//!   gives up after [`CONNECT_TIMEOUT`] to connect and [`client_timeout`] to get its answer
//!   ([`AdminError::Timeout`]).
//! * **Protocol**: one request per connection, one JSON object per line each way. The request is a
//!   [`Request`] (tagged by `op`); the response is [`Response`] — `{"ok": true, "result": ...}` or
//!   `{"ok": false, "error": {"kind": ..., "message": ...}}`. A request that asks for progress (a pool
//!   sweep with `"progress": true`) gets [`ProgressLine`]s first, `{"progress": {"done": N, "total":
//!   M}}`, at most five a second. A request line may be at most 64 MiB long.
//! * **Threads**: each request runs on its own short-lived thread (review operations read files, use the
//!   store and may re-score batches), never on the runtime's worker threads; the async side only moves
//!   bytes.
//!
//! [`server`] runs inside the daemon on its own [`server::Context`]; [`client`] is what review commands
//! call. Neither knows the daemon: the daemon builds the context.

use std::time::Duration;

use serde::{Deserialize, Serialize};

pub use crate::review::Request;
use crate::review::ReviewError;

pub mod client;
pub mod peer;
pub mod server;

pub use client::{call, call_with_progress, daemon_answers};

/// Longest request line accepted (a `trusted add` carries its file): 64 MiB.
pub(crate) const MAX_REQUEST_BYTES: usize = 64 * 1024 * 1024;

/// Permissions of the socket file: owner and group may connect.
pub(crate) const SOCKET_MODE: u32 = 0o660;

/// How long a client waits for an answer by default (a trusted-set change re-scores recent batches).
pub const CLIENT_TIMEOUT: Duration = Duration::from_secs(900);

/// How long a client waits for the daemon to take its connection.
pub const CONNECT_TIMEOUT: Duration = Duration::from_secs(10);

/// The environment variable that overrides [`CLIENT_TIMEOUT`], in seconds.
pub const TIMEOUT_ENV: &str = "LABELWEIR_ADMIN_TIMEOUT_SECS";

/// How long a client waits for an answer: `LABELWEIR_ADMIN_TIMEOUT_SECS` when set to a positive number,
/// else [`CLIENT_TIMEOUT`].
pub fn client_timeout() -> Duration {
    std::env::var(TIMEOUT_ENV)
        .ok()
        .and_then(|v| v.trim().parse::<u64>().ok())
        .filter(|s| *s > 0)
        .map_or(CLIENT_TIMEOUT, Duration::from_secs)
}

/// The error kind of a refused peer.
pub(crate) const DENIED: &str = "denied";

/// An error on the wire.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct WireError {
    /// [`ReviewError::kind`].
    pub kind: String,
    /// The message.
    pub message: String,
}

/// How far a long operation has come (see the protocol in the module docs).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
pub struct Progress {
    /// Units done (items scored).
    pub done: usize,
    /// Units in all.
    pub total: usize,
}

/// A progress line, sent before the response to a request that asked for progress.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
pub struct ProgressLine {
    /// How far the operation has come.
    pub progress: Progress,
}

/// Least time between two progress lines on one connection.
pub(crate) const PROGRESS_EVERY: Duration = Duration::from_millis(200);

/// One response line.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Response {
    /// Whether the operation succeeded.
    pub ok: bool,
    /// Its report, when it did.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub result: Option<serde_json::Value>,
    /// What went wrong, when it did not.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub error: Option<WireError>,
}

impl Response {
    /// The answer to a peer that may not use the socket.
    pub(crate) fn denied(why: String) -> Self {
        Self {
            ok: false,
            result: None,
            error: Some(WireError {
                kind: DENIED.into(),
                message: why,
            }),
        }
    }

    /// The response for an operation's result.
    pub(crate) fn from_result(r: Result<serde_json::Value, ReviewError>) -> Self {
        match r {
            Ok(v) => Self {
                ok: true,
                result: Some(v),
                error: None,
            },
            Err(e) => Self {
                ok: false,
                result: None,
                error: Some(WireError {
                    kind: e.kind().into(),
                    message: wire_message(e),
                }),
            },
        }
    }
}

/// The message of an error without the prefix its kind adds when displayed: the client rebuilds the error
/// from kind and message, and displaying it again would say "refused: refused: ...".
fn wire_message(e: ReviewError) -> String {
    match e {
        ReviewError::NotFound(m)
        | ReviewError::Refused(m)
        | ReviewError::Invalid(m)
        | ReviewError::Model(m) => m,
        ReviewError::Store { message, .. } | ReviewError::Io { message, .. } => message,
    }
}

/// Errors of the admin channel itself (not of the operation).
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum AdminError {
    /// Socket I/O.
    #[error("admin socket {path}: {source}")]
    Io {
        /// The socket path.
        path: String,
        /// The cause.
        #[source]
        source: std::io::Error,
    },
    /// This user may not use the socket (its file mode, or the daemon's check of the peer).
    #[error("{0}")]
    Denied(String),
    /// The daemon did not take the connection, or did not answer, in time.
    #[error("admin socket {path}: no answer within {secs} s (the daemon may be overloaded; try again, or raise {TIMEOUT_ENV})")]
    Timeout {
        /// The socket path.
        path: String,
        /// The limit that passed.
        secs: u64,
    },
    /// The daemon closed the connection without answering (it stopped or was killed meanwhile).
    #[error("admin socket {0}: the daemon closed the connection without answering (it may have stopped); the request may or may not have been carried out: check `labelweir audit` (or `quarantine list`) before repeating a decision")]
    NoAnswer(String),
    /// The daemon's answer could not be read.
    #[error("admin socket: bad response: {0}")]
    Protocol(String),
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::review;
    use crate::workspace::Workspace;

    #[test]
    fn requests_use_a_stable_wire_format() {
        let r = Request::Reject(review::RejectRequest {
            batch: "b00000001".into(),
            by: "alice".into(),
            reason: "flipped labels".into(),
            disclose_proposed: true,
            disclose_items: false,
        });
        let v = serde_json::to_value(&r).unwrap();
        assert_eq!(v["op"], "reject");
        assert_eq!(v["batch"], "b00000001");
        let back: Request = serde_json::from_value(v).unwrap();
        assert_eq!(back, r);
        let v = serde_json::to_value(Request::QuarantineList).unwrap();
        assert_eq!(v, serde_json::json!({"op": "quarantine_list"}));
    }

    #[test]
    fn no_socket_means_no_daemon() {
        let d = tempfile::tempdir().unwrap();
        let ws = Workspace::new(d.path());
        assert!(call(&ws, &Request::Ping).unwrap().is_none());
        assert!(!daemon_answers(&ws));
    }

    #[test]
    fn error_responses_carry_kind_and_message() {
        let r = Response::from_result(Err(ReviewError::Refused("batch b1 is released".into())));
        let line = serde_json::to_string(&r).unwrap();
        let back: Response = serde_json::from_str(&line).unwrap();
        let e = back.error.unwrap();
        assert_eq!(e.kind, "refused");
        assert!(e.message.contains("released"));
        // Rebuilt on the client's side, it reads as it did in the daemon: one prefix, not two.
        let shown = ReviewError::from_kind(&e.kind, e.message).to_string();
        assert_eq!(shown, "refused: batch b1 is released");
        let store = Response::from_result(Err(ReviewError::Store {
            message: "disk full".into(),
            source: None,
        }));
        let e = store.error.unwrap();
        let shown = ReviewError::from_kind(&e.kind, e.message).to_string();
        assert_eq!(shown, "store: disk full");
    }
}
