//! HTTP: `/metrics` (Prometheus text format 0.0.4), `/livez`, `/readyz` (`?verbose` lists the checks).
//!
//! Served by axum on the configured address (loopback by default). Status codes are what machines read:
//! `/readyz` answers 200 only when every readiness check passes, else 503.
//!
//! Connections are capped and idle ones closed (`http.max_connections`, `http.idle_timeout_secs`; see
//! [`crate::conn`]), so idle clients cannot use up the daemon's file descriptors; accept errors back off.

use std::net::SocketAddr;
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::Arc;

use axum::extract::{Query, State};
use axum::http::{header, StatusCode};
use axum::response::IntoResponse;
use axum::routing::get;
use axum::Router;

use crate::conn::{fd_share, Backoff, Idle, Slots};
use crate::metrics::Metrics;

/// Readiness checks, set by the daemon as it starts and runs.
#[derive(Debug, Default)]
pub struct Readiness {
    /// The store is open.
    pub store: AtomicBool,
    /// The workspace folders exist.
    pub folders: AtomicBool,
    /// The filesystem watcher is running.
    pub watcher: AtomicBool,
    /// The first full rescan finished.
    pub first_rescan: AtomicBool,
    /// Free space is above `ingest.min_free_bytes`.
    pub disk: AtomicBool,
    /// The scoring worker is running.
    pub worker: AtomicBool,
    /// Shutdown has begun.
    pub stopping: AtomicBool,
    /// The pipeline threads are alive, the last claim succeeded and no filing waits for a retry.
    pub pipeline: AtomicBool,
}

impl Readiness {
    /// Each check with its state.
    pub fn checks(&self) -> Vec<(&'static str, bool)> {
        vec![
            ("store", self.store.load(Ordering::SeqCst)),
            ("folders", self.folders.load(Ordering::SeqCst)),
            ("watcher", self.watcher.load(Ordering::SeqCst)),
            ("first_rescan", self.first_rescan.load(Ordering::SeqCst)),
            ("disk_space", self.disk.load(Ordering::SeqCst)),
            ("scoring_worker", self.worker.load(Ordering::SeqCst)),
            ("not_stopping", !self.stopping.load(Ordering::SeqCst)),
            ("pipeline", self.pipeline.load(Ordering::SeqCst)),
        ]
    }

    /// All checks pass.
    pub fn is_ready(&self) -> bool {
        self.checks().iter().all(|(_, ok)| *ok)
    }
}

#[derive(Clone)]
struct AppState {
    metrics: Arc<Metrics>,
    ready: Arc<Readiness>,
}

/// The router (exposed for tests).
fn router(metrics: Arc<Metrics>, ready: Arc<Readiness>) -> Router {
    Router::new()
        .route("/metrics", get(metrics_handler))
        .route("/livez", get(|| async { "ok\n" }))
        .route("/readyz", get(readyz))
        .with_state(AppState { metrics, ready })
}

async fn metrics_handler(State(s): State<AppState>) -> impl IntoResponse {
    s.metrics.ready(s.ready.is_ready());
    (
        [(
            header::CONTENT_TYPE,
            "text/plain; version=0.0.4; charset=utf-8",
        )],
        s.metrics.render(),
    )
}

async fn readyz(
    State(s): State<AppState>,
    Query(q): Query<std::collections::HashMap<String, String>>,
) -> impl IntoResponse {
    let ok = s.ready.is_ready();
    s.metrics.ready(ok);
    let code = if ok {
        StatusCode::OK
    } else {
        StatusCode::SERVICE_UNAVAILABLE
    };
    let body = if q.contains_key("verbose") {
        let mut b = String::new();
        for (name, pass) in s.ready.checks() {
            b.push_str(&format!("[{}] {name}\n", if pass { "+" } else { "-" }));
        }
        b.push_str(if ok { "ready\n" } else { "not ready\n" });
        b
    } else if ok {
        "ready\n".to_string()
    } else {
        "not ready\n".to_string()
    };
    (code, body)
}

/// Bind the listener (errors surface at startup, before readiness).
pub async fn bind(addr: SocketAddr) -> std::io::Result<tokio::net::TcpListener> {
    tokio::net::TcpListener::bind(addr).await
}

/// Connection limits of the HTTP listener.
#[derive(Debug, Clone, Copy)]
pub struct Limits {
    /// Most connections open at once.
    pub max_connections: usize,
    /// Close a connection idle this long.
    pub idle: std::time::Duration,
}

/// The TCP listener with a slot per connection, an idle timeout on each and backoff on accept errors.
struct Capped {
    inner: tokio::net::TcpListener,
    slots: Slots,
    idle: std::time::Duration,
    backoff: Backoff,
}

impl axum::serve::Listener for Capped {
    type Io = Idle<tokio::net::TcpStream>;
    type Addr = SocketAddr;

    async fn accept(&mut self) -> (Self::Io, Self::Addr) {
        loop {
            // The slot first: beyond the cap, clients wait in the kernel's backlog, not in our fds.
            let Some(slot) = self.slots.take().await else {
                std::future::pending::<()>().await;
                continue;
            };
            match self.inner.accept().await {
                Ok((s, a)) => {
                    self.backoff.succeeded();
                    return (Idle::new(s, self.idle, Some(slot)), a);
                }
                Err(e) => {
                    drop(slot);
                    self.backoff.failed(&e).await;
                }
            }
        }
    }

    fn local_addr(&self) -> std::io::Result<Self::Addr> {
        self.inner.local_addr()
    }
}

/// Serve until `shutdown` resolves, with at most `limits.max_connections` connections (and at most a
/// quarter of the open-file limit) open at once.
pub async fn serve(
    listener: tokio::net::TcpListener,
    metrics: Arc<Metrics>,
    ready: Arc<Readiness>,
    limits: Limits,
    shutdown: impl std::future::Future<Output = ()> + Send + 'static,
) -> std::io::Result<()> {
    let max = fd_share(limits.max_connections, 4);
    tracing::debug!(max_connections = max, "http connection cap");
    let capped = Capped {
        inner: listener,
        slots: Slots::new(max),
        idle: limits.idle,
        backoff: Backoff::new("http"),
    };
    axum::serve(capped, router(metrics, ready))
        .with_graceful_shutdown(shutdown)
        .await
}
