//! The admin channel: how review commands reach a running daemon.
//!
//! sled allows one open instance of the store, and the daemon holds it while it runs. Review commands
//! therefore send their [`Request`] to the daemon over a Unix socket in the workspace, `DIR/admin.sock`;
//! when no daemon answers there, they open the store themselves ([`crate::cli`] does the choosing).
//!
//! * **Who may use it** is decided by the socket file's permissions: the daemon creates it with mode
//!   `0660` (owner and group may connect; put reviewers in the daemon's group), and the workspace
//!   folder's own permissions apply on top. The peer's user id (`SO_PEERCRED`) is recorded in the audit
//!   trail beside the `--by` name the command gives.
//! * **Protocol**: one request per connection, one JSON object per line each way. The request is a
//!   [`Request`] (tagged by `op`); the response is [`Response`] — `{"ok": true, "result": ...}` or
//!   `{"ok": false, "error": {"kind": ..., "message": ...}}`. A request line may be at most
//!   [`MAX_REQUEST_BYTES`] long.
//! * **Threads**: each request runs on its own short-lived thread (review operations read files, use the
//!   store and may re-score batches), never on the runtime's worker threads; the async side only moves
//!   bytes.

use std::io::{BufRead, BufReader, Read, Write};
use std::os::unix::fs::{FileTypeExt, PermissionsExt};
use std::os::unix::net::UnixStream as StdUnixStream;
use std::path::Path;
use std::sync::Arc;
use std::time::Duration;

use serde::{Deserialize, Serialize};
use tokio::io::{AsyncBufReadExt, AsyncReadExt, AsyncWriteExt};
use tokio::net::UnixListener;

use crate::config::Workspace;
use crate::daemon::DaemonContext;
pub use crate::review::Request;
use crate::review::{self, Caller, ReviewEnv, ReviewError, ReviewHooks};
use crate::scoring::ScoringHandle;

/// Longest request line accepted (a `trusted add` carries its file): 64 MiB.
pub const MAX_REQUEST_BYTES: usize = 64 * 1024 * 1024;

/// Permissions of the socket file: owner and group may connect.
pub const SOCKET_MODE: u32 = 0o660;

/// How long a client waits for an answer (a trusted-set change re-scores recent batches).
pub const CLIENT_TIMEOUT: Duration = Duration::from_secs(900);

/// An error on the wire.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct WireError {
    /// [`ReviewError::kind`].
    pub kind: String,
    /// The message.
    pub message: String,
}

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
    fn from_result(r: Result<serde_json::Value, ReviewError>) -> Self {
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
                    message: e.to_string(),
                }),
            },
        }
    }
}

impl ReviewHooks for ScoringHandle {
    fn pool_changed(&self) {
        ScoringHandle::pool_changed(self);
    }

    fn trusted_changed(&self) {
        ScoringHandle::trusted_changed(self);
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
        source: std::io::Error,
    },
    /// The socket's permissions do not let this user connect.
    #[error("no permission to use the admin socket {0}: ask for membership in the daemon's group")]
    Denied(String),
    /// The daemon's answer could not be read.
    #[error("admin socket: bad response: {0}")]
    Protocol(String),
}

/// Serve the admin socket of a running daemon until `stop` turns true. Removes a stale socket file
/// first (the store's lock guarantees no other daemon runs on this workspace) and the socket file at the
/// end.
pub async fn serve(ctx: DaemonContext, mut stop: tokio::sync::watch::Receiver<bool>) {
    let path = ctx.ws.admin_socket();
    if let Ok(m) = std::fs::symlink_metadata(&path) {
        if m.file_type().is_socket() {
            let _ = std::fs::remove_file(&path);
        } else {
            tracing::error!(path = %path.display(), "admin socket path exists and is not a socket; review commands will work only with the daemon stopped");
            return;
        }
    }
    let listener = match UnixListener::bind(&path) {
        Ok(l) => l,
        Err(e) => {
            tracing::error!(path = %path.display(), error = %e, "cannot bind the admin socket");
            return;
        }
    };
    if let Err(e) = std::fs::set_permissions(&path, std::fs::Permissions::from_mode(SOCKET_MODE)) {
        tracing::error!(error = %e, "cannot set the admin socket's permissions; closing it");
        let _ = std::fs::remove_file(&path);
        return;
    }
    tracing::info!(path = %path.display(), "admin socket listening");
    let ctx = Arc::new(ctx);
    let mut stopped = std::pin::pin!(async move {
        let _ = stop.wait_for(|s| *s).await;
    });
    loop {
        tokio::select! {
            _ = &mut stopped => break,
            accepted = listener.accept() => match accepted {
                Ok((stream, _)) => {
                    let ctx = ctx.clone();
                    tokio::spawn(async move {
                        if let Err(e) = serve_one(ctx, stream).await {
                            tracing::warn!(error = %e, "admin connection failed");
                        }
                    });
                }
                Err(e) => {
                    tracing::warn!(error = %e, "admin socket accept failed");
                    tokio::time::sleep(Duration::from_millis(100)).await;
                }
            }
        }
    }
    let _ = std::fs::remove_file(&path);
}

async fn serve_one(ctx: Arc<DaemonContext>, stream: tokio::net::UnixStream) -> std::io::Result<()> {
    let uid = stream.peer_cred().ok().map(|c| c.uid());
    let (rd, mut wr) = stream.into_split();
    let mut line = Vec::new();
    let mut reader = tokio::io::BufReader::new(rd.take(MAX_REQUEST_BYTES as u64 + 1));
    reader.read_until(b'\n', &mut line).await?;
    let response = if line.len() > MAX_REQUEST_BYTES {
        Response::from_result(Err(ReviewError::Invalid(format!(
            "request longer than {MAX_REQUEST_BYTES} bytes"
        ))))
    } else {
        match serde_json::from_slice::<Request>(&line) {
            Err(e) => Response::from_result(Err(ReviewError::Invalid(format!("bad request: {e}")))),
            Ok(req) => {
                // Review work runs on its own thread, off the runtime's workers.
                let (tx, rx) = tokio::sync::oneshot::channel();
                let spawned = std::thread::Builder::new()
                    .name("labelweir-admin".into())
                    .spawn(move || {
                        let r = std::panic::catch_unwind(std::panic::AssertUnwindSafe(|| {
                            // The configuration of the last successful reload, if any.
                            let config = ctx
                                .scoring
                                .shared
                                .reload
                                .current()
                                .unwrap_or_else(|| ctx.config.clone());
                            let env = ReviewEnv {
                                ws: &ctx.ws,
                                config: &config,
                                store: &ctx.store,
                                meta: &ctx.meta,
                                hooks: &ctx.scoring,
                                caller: Caller {
                                    uid,
                                    via: "admin_socket".into(),
                                },
                            };
                            review::handle(&env, req)
                        }))
                        .unwrap_or_else(|_| {
                            Err(ReviewError::Model(
                                "internal error while handling the request".into(),
                            ))
                        });
                        let _ = tx.send(r);
                    });
                match spawned {
                    Ok(_) => Response::from_result(rx.await.unwrap_or_else(|_| {
                        Err(ReviewError::Model("the request's thread stopped".into()))
                    })),
                    Err(e) => Response::from_result(Err(ReviewError::Io(format!(
                        "cannot start a thread: {e}"
                    )))),
                }
            }
        }
    };
    let mut out = serde_json::to_vec(&response).unwrap_or_else(|_| b"{\"ok\":false}".to_vec());
    out.push(b'\n');
    wr.write_all(&out).await?;
    wr.shutdown().await?;
    Ok(())
}

/// Send a request to the daemon of workspace `ws`. `Ok(None)` when no daemon listens (no socket file,
/// or a stale one); `Ok(Some(result))` with the operation's own success or failure otherwise.
pub fn call(
    ws: &Workspace,
    req: &Request,
) -> Result<Option<Result<serde_json::Value, ReviewError>>, AdminError> {
    call_at(&ws.admin_socket(), req)
}

/// [`call`] on an explicit socket path.
pub fn call_at(
    path: &Path,
    req: &Request,
) -> Result<Option<Result<serde_json::Value, ReviewError>>, AdminError> {
    let io = |source| AdminError::Io {
        path: path.display().to_string(),
        source,
    };
    let mut stream = match StdUnixStream::connect(path) {
        Ok(s) => s,
        Err(e)
            if matches!(
                e.kind(),
                std::io::ErrorKind::NotFound | std::io::ErrorKind::ConnectionRefused
            ) =>
        {
            return Ok(None)
        }
        Err(e) if e.kind() == std::io::ErrorKind::PermissionDenied => {
            return Err(AdminError::Denied(path.display().to_string()))
        }
        Err(e) => return Err(io(e)),
    };
    stream.set_read_timeout(Some(CLIENT_TIMEOUT)).map_err(io)?;
    let mut line = serde_json::to_vec(req).map_err(|e| AdminError::Protocol(e.to_string()))?;
    line.push(b'\n');
    stream.write_all(&line).map_err(io)?;
    let mut answer = Vec::new();
    BufReader::new(stream.take(MAX_REQUEST_BYTES as u64 * 4))
        .read_until(b'\n', &mut answer)
        .map_err(io)?;
    let r: Response =
        serde_json::from_slice(&answer).map_err(|e| AdminError::Protocol(e.to_string()))?;
    Ok(Some(match (r.ok, r.result, r.error) {
        (true, Some(v), _) => Ok(v),
        (_, _, Some(e)) => Err(ReviewError::from_kind(&e.kind, e.message)),
        _ => Err(ReviewError::Model("empty response".into())),
    }))
}

/// Whether `ws` has a daemon answering on its admin socket.
pub fn daemon_answers(ws: &Workspace) -> bool {
    matches!(call(ws, &Request::Ping), Ok(Some(Ok(_))))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn requests_use_a_stable_wire_format() {
        let r = Request::Reject(review::RejectRequest {
            batch: "b00000001".into(),
            by: "alice".into(),
            reason: "flipped labels".into(),
            disclose_proposed: true,
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
    }
}
