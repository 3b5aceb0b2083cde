//! The daemon's side of the admin socket: one request per connection, each run on its own thread.

use std::os::unix::fs::{FileTypeExt, PermissionsExt};
use std::sync::Arc;
use std::time::Duration;

use tokio::io::{AsyncBufReadExt, AsyncReadExt, AsyncWriteExt};
use tokio::net::UnixListener;

use tokio::sync::OwnedSemaphorePermit;

use super::{
    peer, Progress, ProgressLine, Request, Response, MAX_REQUEST_BYTES, PROGRESS_EVERY, SOCKET_MODE,
};
use crate::config::Config;
use crate::conn::{fd_share, Backoff, Idle, Slots};
use crate::review::{self, Caller, ReviewEnv, ReviewError, ReviewHooks};
use crate::store::{Store, WorkspaceMeta};
use crate::workspace::Workspace;

/// The current configuration: the one of the last successful reload, or the one the process started with.
pub type CurrentConfig = Arc<dyn Fn() -> Arc<Config> + Send + Sync>;

/// What the server needs from the process it runs in (the daemon builds it).
#[derive(Clone)]
pub struct Context {
    /// Workspace folders.
    pub ws: Workspace,
    /// The store (the only open instance in this process).
    pub store: Store,
    /// What init fixed.
    pub meta: WorkspaceMeta,
    /// The configuration in use, read for each request.
    pub config: CurrentConfig,
    /// Told when a request changed the pool or the trusted set.
    pub hooks: Arc<dyn ReviewHooks>,
}

/// Serve the admin socket of a running daemon until `stop` turns true. Removes a stale socket file
/// first (the store's lock guarantees no other daemon runs on this workspace) and the socket file at the
/// end.
pub async fn serve(ctx: Context, mut stop: tokio::sync::watch::Receiver<bool>) {
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
    give_to_reviewers(&path, &(ctx.config)().admin.reviewer_group);
    tracing::info!(path = %path.display(), "admin socket listening");
    let max = fd_share((ctx.config)().admin.max_connections, 8);
    let slots = Slots::new(max);
    let mut backoff = Backoff::new("admin");
    let ctx = Arc::new(ctx);
    let mut stopped = std::pin::pin!(async move {
        let _ = stop.wait_for(|s| *s).await;
    });
    loop {
        // A slot first: beyond the cap, clients wait in the socket's backlog, holding none of our fds.
        let slot = tokio::select! {
            _ = &mut stopped => break,
            slot = slots.take() => match slot {
                Some(s) => s,
                None => break,
            },
        };
        tokio::select! {
            _ = &mut stopped => break,
            accepted = listener.accept() => match accepted {
                Ok((stream, _)) => {
                    backoff.succeeded();
                    let ctx = ctx.clone();
                    tokio::spawn(async move {
                        if let Err(e) = serve_one(ctx, stream, slot).await {
                            tracing::warn!(error = %e, "admin connection failed");
                        }
                    });
                }
                Err(e) => {
                    drop(slot);
                    backoff.failed(&e).await;
                }
            }
        }
    }
    let _ = std::fs::remove_file(&path);
}

/// Give the socket file the reviewer group, so reviewers can connect as themselves (the daemon's user
/// must be a member: `SupplementaryGroups=` in the unit). A failure is logged; the socket then keeps the
/// daemon's own group.
fn give_to_reviewers(path: &std::path::Path, reviewer_group: &str) {
    let spec = reviewer_group.trim();
    if spec.is_empty() {
        return;
    }
    let group = std::fs::read_to_string("/etc/group").unwrap_or_default();
    let Some((gid, _)) = peer::group_in(&group, spec) else {
        tracing::warn!(
            group = spec,
            "the reviewer group does not exist; the admin socket keeps the daemon's group"
        );
        return;
    };
    if let Err(e) = std::os::unix::fs::chown(path, None, Some(gid)) {
        tracing::warn!(group = spec, error = %e, "cannot give the admin socket to the reviewer group (is the daemon's user a member?); it keeps the daemon's group");
    }
}

/// Read one request line (within `[admin] request_timeout_secs` of silence), check the peer, run it,
/// answer.
async fn serve_one(
    ctx: Arc<Context>,
    stream: tokio::net::UnixStream,
    slot: OwnedSemaphorePermit,
) -> std::io::Result<()> {
    let cred = stream.peer_cred().ok();
    let uid = cred.map(|c| c.uid());
    let config = (ctx.config)();
    let idle = Duration::from_secs(config.admin.request_timeout_secs);
    let mut conn = Idle::new(stream, idle, Some(slot));
    let mut line = Vec::new();
    {
        let mut reader = tokio::io::BufReader::new((&mut conn).take(MAX_REQUEST_BYTES as u64 + 1));
        reader.read_until(b'\n', &mut line).await?;
    }
    let daemon_uid = rustix::process::geteuid().as_raw();
    let allowed = match cred {
        Some(c) => peer::check(c.uid(), c.gid(), daemon_uid, &config.admin.reviewer_group),
        None => Err("the peer's credentials cannot be read".to_string()),
    };
    let response = if let Err(why) = allowed {
        tracing::warn!(uid = ?uid, reason = %why, "admin request refused");
        Response::denied(why)
    } else if line.len() > MAX_REQUEST_BYTES {
        Response::from_result(Err(ReviewError::Invalid(format!(
            "request longer than {MAX_REQUEST_BYTES} bytes"
        ))))
    } else {
        match serde_json::from_slice::<Request>(&line) {
            Err(e) => Response::from_result(Err(ReviewError::Invalid(format!("bad request: {e}")))),
            Ok(req) => {
                let wants_progress = matches!(&req, Request::PoolSweep(r) if r.progress);
                let (ptx, mut prx) = tokio::sync::mpsc::unbounded_channel::<Progress>();
                // Review work runs on its own thread, off the runtime's workers.
                let (tx, mut rx) = tokio::sync::oneshot::channel();
                let spawned = std::thread::Builder::new()
                    .name("labelweir-admin".into())
                    .spawn(move || {
                        let r = std::panic::catch_unwind(std::panic::AssertUnwindSafe(|| {
                            // The configuration of the last successful reload, if any.
                            let config = (ctx.config)();
                            let hooks = Reporting {
                                inner: ctx.hooks.as_ref(),
                                tx: wants_progress.then_some(ptx),
                                last: std::sync::Mutex::new(None),
                            };
                            let env = ReviewEnv {
                                ws: &ctx.ws,
                                config: &config,
                                store: &ctx.store,
                                meta: &ctx.meta,
                                hooks: &hooks,
                                caller: Caller {
                                    uid,
                                    user: uid.and_then(peer::user_name),
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
                    Ok(_) => {
                        // Progress lines while the request runs, then its answer.
                        let result = loop {
                            tokio::select! {
                                // Lines already sent by the thread go out before its answer.
                                biased;
                                Some(p) = prx.recv() => {
                                    let mut out = serde_json::to_vec(&ProgressLine { progress: p })
                                        .unwrap_or_default();
                                    out.push(b'\n');
                                    conn.write_all(&out).await?;
                                }
                                r = &mut rx => break r,
                            }
                        };
                        Response::from_result(result.unwrap_or_else(|_| {
                            Err(ReviewError::Model("the request's thread stopped".into()))
                        }))
                    }
                    Err(e) => Response::from_result(Err(ReviewError::Io {
                        message: format!("cannot start a thread: {e}"),
                        source: Some(e),
                    })),
                }
            }
        }
    };
    let mut out = serde_json::to_vec(&response).unwrap_or_else(|_| b"{\"ok\":false}".to_vec());
    out.push(b'\n');
    conn.write_all(&out).await?;
    conn.shutdown().await?;
    Ok(())
}

/// The daemon's hooks, plus progress lines for one request (at most one per [`PROGRESS_EVERY`], and the
/// last step always) when it asked for them.
struct Reporting<'a> {
    inner: &'a dyn ReviewHooks,
    tx: Option<tokio::sync::mpsc::UnboundedSender<Progress>>,
    last: std::sync::Mutex<Option<std::time::Instant>>,
}

impl ReviewHooks for Reporting<'_> {
    fn pool_changed(&self) {
        self.inner.pool_changed();
    }

    fn trusted_changed(&self) {
        self.inner.trusted_changed();
    }

    fn progress(&self, done: usize, total: usize) {
        let Some(tx) = &self.tx else { return };
        let Ok(mut last) = self.last.lock() else {
            return;
        };
        if done < total && last.is_some_and(|t| t.elapsed() < PROGRESS_EVERY) {
            return;
        }
        *last = Some(std::time::Instant::now());
        let _ = tx.send(Progress { done, total });
    }
}
