//! The watching daemon, the composition root: it opens the workspace (`startup`), starts the pipeline
//! threads (`pipeline`), the HTTP server, the admin socket ([`crate::admin::server`]), SIGHUP
//! reloads (`reload`) and housekeeping (`housekeeping`), feeds systemd's `watchdog`, and stops them
//! in order.
//!
//! [`run`] runs until its `shutdown` future resolves (the CLI passes "first SIGINT or SIGTERM"; tests pass a
//! channel), so shutdown is testable. Threads and queues:
//!
//! * the **tokio runtime** serves HTTP (`/metrics`, `/livez`, `/readyz`), the admin socket, and a
//!   housekeeping tick that refreshes gauges (blocking calls go through `spawn_blocking`);
//! * the **notify** thread (owned by the watcher) turns filesystem events into "vendor folder dirty" marks;
//! * the **ingest** thread (`labelweir-ingest`) waits for dirty marks, the rescan timer or a quiet-period
//!   deadline, lists folders, claims, reads, hashes and parses files, and sends jobs into
//! * the **bounded channel** (`ingest.queue_capacity`) to the **scoring** thread (`labelweir-scoring`,
//!   see `pipeline::score`), which scores, decides and persists each batch in turn, and hands it to the
//!   **filing** thread (`labelweir-filing`) that moves the file and writes the notice;
//! * an occasional **refresh** thread rebuilds the pool summary exactly.
//!
//! Startup: config and folder checks (exit 78), store (74), reconciliation of `processing/` (batches
//! found `Decided` are filed; batches found `Claimed` are re-processed first), pool summary, worker, ingest
//! thread, watcher, first full rescan; then `READY=1` to systemd and `/readyz` 200.
//!
//! Shutdown (first signal): stop claiming, finish the batch in hand (queued ones stay in `processing/` and
//! are redone at the next start), save the pool summary, flush the store, `STOPPING=1`, return. The CLI
//! exits at once on a second signal.

use std::future::Future;
use std::net::SocketAddr;
use std::sync::atomic::Ordering;
use std::sync::Arc;
use std::thread::JoinHandle;
use std::time::{Duration, Instant};

use crate::admin;
use crate::config::Config;
use crate::data::Classes;
use crate::http::Readiness;
use crate::metrics::{self, Metrics};
use crate::pipeline::ingest::{self, Ingest, IngestError};
use crate::pipeline::score::Worker;
use crate::pipeline::watch::{self, AnyWatcher};
use crate::pipeline::{self, IngestCtl, Observer, ScoringError, ScoringHandle, Shared};
use crate::review::ReviewHooks;
use crate::store::{Store, StoreError, WorkspaceMeta};
use crate::workspace::{Workspace, WorkspaceError};

mod housekeeping;
mod reload;
mod startup;
mod watchdog;

use watchdog::{Ping, Watchdog};

/// Why the daemon stopped with an error. The binary picks the exit code from [`DaemonError::kind`].
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum DaemonError {
    /// The configuration or workspace layout is unusable.
    #[error("configuration: {0}")]
    Config(String),
    /// The workspace's folders could not be prepared.
    #[error(transparent)]
    Workspace(#[from] WorkspaceError),
    /// Filesystem or socket error.
    #[error("i/o: {what}: {source}")]
    Io {
        /// What was being done.
        what: String,
        /// The cause.
        #[source]
        source: std::io::Error,
    },
    /// The filesystem watcher could not start.
    #[error("filesystem watcher: {0}")]
    Watcher(#[source] notify::Error),
    /// Store error.
    #[error(transparent)]
    Store(#[from] StoreError),
    /// The scoring or filing thread stopped on an error.
    #[error(transparent)]
    Scoring(#[from] ScoringError),
    /// The ingest thread stopped on an error.
    #[error(transparent)]
    Ingest(#[from] IngestError),
    /// A bug, or a thread that stopped or panicked.
    #[error("internal: {0}")]
    Internal(String),
}

/// The kind of a [`DaemonError`], for the binary's exit code.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum ErrorKind {
    /// The configuration or the workspace layout (sysexits EX_CONFIG).
    Config,
    /// Filesystem or store (EX_IOERR).
    Io,
    /// A bug or an engine failure on the workspace's own data (EX_SOFTWARE).
    Internal,
}

impl DaemonError {
    /// Whether the failure is a full storage (no space, quota, file size limit) anywhere in its chain of
    /// causes; the binary then says "storage full" and exits 74.
    pub fn storage_full(&self) -> bool {
        crate::store::storage_full_in(self)
    }

    /// What kind of failure this is.
    pub fn kind(&self) -> ErrorKind {
        if self.storage_full() {
            return ErrorKind::Io;
        }
        match self {
            Self::Config(_) => ErrorKind::Config,
            Self::Workspace(e) => match e {
                WorkspaceError::Io { .. } | WorkspaceError::Store(_) => ErrorKind::Io,
                _ => ErrorKind::Config,
            },
            Self::Io { .. } | Self::Watcher(_) | Self::Store(_) => ErrorKind::Io,
            Self::Scoring(ScoringError::Store(_) | ScoringError::Filing(_))
            | Self::Ingest(IngestError::Store(_) | IngestError::Io { .. }) => ErrorKind::Io,
            Self::Scoring(_) | Self::Ingest(_) | Self::Internal(_) => ErrorKind::Internal,
        }
    }
}

/// Options beyond the configuration.
#[derive(Default, Clone)]
pub struct RunOptions {
    /// Overrides `http.listen`.
    pub listen: Option<SocketAddr>,
    /// Allow `listen` on an address other than loopback (the endpoints have no authentication).
    pub allow_remote_listen: bool,
    /// Called after every settled batch.
    pub observer: Option<Observer>,
    /// Called once when the daemon is ready, with the HTTP address actually bound (if serving).
    pub on_ready: Option<Arc<dyn Fn(Option<SocketAddr>) + Send + Sync>>,
}

fn io(what: &str) -> impl FnOnce(std::io::Error) -> DaemonError + '_ {
    move |source| DaemonError::Io {
        what: what.to_string(),
        source,
    }
}

/// A reviewer's change reaches the scoring worker.
struct WorkerHooks(ScoringHandle);

impl ReviewHooks for WorkerHooks {
    fn pool_changed(&self) {
        self.0.pool_changed();
    }

    fn trusted_changed(&self) {
        self.0.trusted_changed();
    }
}

/// The running pipeline: its threads and what stops them.
struct Pipeline {
    handle: ScoringHandle,
    shared: Arc<Shared>,
    ctl: Arc<IngestCtl>,
    watcher: AnyWatcher,
    worker: JoinHandle<Result<(), ScoringError>>,
    ingest: JoinHandle<Result<(), IngestError>>,
}

/// Start the scoring and filing threads, the watcher and the ingest thread.
fn start_pipeline(
    ws: &Workspace,
    config: &Arc<Config>,
    opened: startup::Opened,
    metrics: &Arc<Metrics>,
    ready: &Arc<Readiness>,
    observer: Option<Observer>,
) -> Result<Pipeline, DaemonError> {
    let startup::Opened {
        store,
        meta,
        redo,
        pool,
        trusted,
    } = opened;
    let shared = Arc::new(Shared::default());
    let reread: pipeline::Reread = {
        let (ws, config, store) = (ws.clone(), config.clone(), store.clone());
        let (features, classes) = (meta.features.clone(), Classes::from_labels(&meta.classes));
        Arc::new(move |rec| {
            // A store that cannot say which mode it is in: by reference, whose lookup then fails and
            // rejects the batch with a written reason (never judged on features it may not carry).
            let source = match store.feature_schema() {
                Ok(None) => ingest::FeatureSource::InFile,
                _ => ingest::FeatureSource::Table(&store),
            };
            ingest::prepare(&ws, &config, &features, &classes, rec, &source)
        })
    };
    let (handle, worker) = pipeline::spawn(Worker {
        ws: ws.clone(),
        config: config.clone(),
        store: store.clone(),
        meta: meta.clone(),
        metrics: metrics.clone(),
        observer,
        trusted,
        pool,
        shared: shared.clone(),
        reread: Some(reread),
    })
    .map_err(io("start scoring thread"))?;
    ready.worker.store(true, Ordering::SeqCst);
    let ctl = Arc::new(IngestCtl::default());
    let watcher = watch::start_watcher(ws, config, ctl.clone(), metrics.clone())
        .map_err(DaemonError::Watcher)?;
    ready.watcher.store(true, Ordering::SeqCst);
    ready.pipeline.store(true, Ordering::SeqCst);
    let ingest = Ingest {
        ws: ws.clone(),
        config: config.clone(),
        store,
        classes: Classes::from_labels(&meta.classes),
        meta,
        metrics: metrics.clone(),
        ready: ready.clone(),
        scoring: handle.clone(),
        ctl: ctl.clone(),
        seen: Default::default(),
        claim_backoff: Default::default(),
    };
    let ingest = std::thread::Builder::new()
        .name("labelweir-ingest".into())
        .spawn(move || ingest.run(redo))
        .map_err(io("start ingest thread"))?;
    Ok(Pipeline {
        handle,
        shared,
        ctl,
        watcher,
        worker,
        ingest,
    })
}

/// Bind the HTTP listener (`--listen`, else `http.listen` when enabled).
///
/// `/metrics`, `/livez` and `/readyz` have no authentication: a `listen` override on an address other
/// than loopback is refused unless `allow_remote` says so, and any non-loopback address (also from
/// `http.listen`) is logged as a warning.
async fn bind_http(
    config: &Config,
    listen: Option<SocketAddr>,
    allow_remote: bool,
) -> Result<Option<tokio::net::TcpListener>, DaemonError> {
    if let Some(a) = listen {
        if !a.ip().is_loopback() && !allow_remote {
            return Err(DaemonError::Config(format!(
                "--listen {a} is not a loopback address and the metrics endpoint has no authentication; \
                 pass --allow-remote-listen to serve it there anyway (and restrict who can connect)"
            )));
        }
    }
    let listen = match listen {
        Some(a) => Some(a),
        None if config.http.enabled => Some(
            config
                .listen_addr()
                .map_err(|e| DaemonError::Config(e.to_string()))?,
        ),
        None => None,
    };
    if let Some(a) = listen.filter(|a| !a.ip().is_loopback()) {
        tracing::warn!(listen = %a, "serving /metrics, /livez and /readyz without authentication on a non-loopback address");
    }
    match listen {
        Some(a) => crate::http::bind(a)
            .await
            .map(Some)
            .map_err(|source| DaemonError::Io {
                what: format!("cannot listen on {a}"),
                source,
            }),
        None => Ok(None),
    }
}

/// Wait for `shutdown` or a dead pipeline thread, feeding systemd's watchdog meanwhile (when the unit sets
/// `WatchdogSec`): a ping every half interval while both pipeline threads are alive and the scoring loop
/// has come round within the stall limit. Returns the fatal error, if a thread died.
async fn supervise(
    shutdown: impl Future<Output = ()>,
    p: &Pipeline,
    ready: &Readiness,
    watchdog: Option<Watchdog>,
) -> Option<DaemonError> {
    let mut shutdown = std::pin::pin!(shutdown);
    let mut check = tokio::time::interval(Duration::from_millis(250));
    let mut last_ping: Option<Instant> = None;
    let mut stalled = false;
    loop {
        tokio::select! {
            _ = &mut shutdown => return None,
            _ = check.tick() => {}
        }
        let dead = if p.shared.filing_stopped.load(Ordering::SeqCst) {
            Some("filing")
        } else if p.worker.is_finished() {
            Some("scoring")
        } else if p.ingest.is_finished() {
            Some("ingest")
        } else {
            None
        };
        if let Some(thread) = dead {
            ready.pipeline.store(false, Ordering::SeqCst);
            tracing::error!(
                thread,
                "a pipeline thread stopped; the daemon stops too (a service manager restarts it, and the next start redoes unfinished batches)"
            );
            return Some(DaemonError::Internal(format!(
                "the {thread} thread stopped"
            )));
        }
        let failing = p.shared.filing_failing.load(Ordering::SeqCst)
            || p.shared.claims_failing.load(Ordering::SeqCst);
        ready.pipeline.store(!failing, Ordering::SeqCst);
        let Some(w) = &watchdog else { continue };
        let since_beat = Duration::from_millis(
            pipeline::now_ms().saturating_sub(p.shared.heartbeat_ms.load(Ordering::SeqCst)),
        );
        match w.due(last_ping.map(|t| t.elapsed()), since_beat) {
            Ping::Now => {
                let _ = sd_notify::notify(false, &[sd_notify::NotifyState::Watchdog]);
                last_ping = Some(Instant::now());
                stalled = false;
            }
            Ping::Stalled if !stalled => {
                stalled = true;
                tracing::error!(
                    silent_secs = since_beat.as_secs(),
                    "the scoring loop has not come round within the stall limit; watchdog pings stop and systemd will restart the daemon"
                );
            }
            _ => {}
        }
    }
}

/// Stop the pipeline threads: no new claims, the batch in hand finishes, queued ones stay in
/// `processing/`. Returns each thread's result.
async fn stop_pipeline(
    p: Pipeline,
    ready: &Readiness,
) -> Result<(Result<(), ScoringError>, Result<(), IngestError>), DaemonError> {
    tracing::info!("shutting down: no new claims; finishing the batch in hand");
    let _ = sd_notify::notify(false, &[sd_notify::NotifyState::Stopping]);
    ready.stopping.store(true, Ordering::SeqCst);
    p.shared.cancel.store(true, Ordering::SeqCst);
    p.ctl.stop();
    drop(p.handle);
    let (worker, ingest) = (p.worker, p.ingest);
    let (w, i) = tokio::task::spawn_blocking(move || (worker.join(), ingest.join()))
        .await
        .map_err(|e| DaemonError::Internal(e.to_string()))?;
    drop(p.watcher);
    let w = w.map_err(|_| DaemonError::Internal("the scoring thread panicked".into()))?;
    let i = i.map_err(|_| DaemonError::Internal("the ingest thread panicked".into()))?;
    Ok((w, i))
}

/// Wait a little for a server task to finish its open connections, then abort it.
async fn finish_or_abort(mut task: tokio::task::JoinHandle<()>, what: &str) {
    if tokio::time::timeout(Duration::from_secs(5), &mut task)
        .await
        .is_err()
    {
        tracing::warn!(
            server = what,
            "connections still open at shutdown; closing them"
        );
        task.abort();
        let _ = task.await;
    }
}

/// Run the daemon on workspace `ws` until `shutdown` resolves. Must be called inside a tokio runtime.
pub async fn run(
    ws: Workspace,
    config: Config,
    opts: RunOptions,
    shutdown: impl Future<Output = ()>,
) -> Result<(), DaemonError> {
    config
        .validate()
        .map_err(|e| DaemonError::Config(e.to_string()))?;
    // Absolute paths: the watcher reports absolute paths, and vendor folders are matched against these.
    let ws = Workspace::new(
        std::fs::canonicalize(&ws.root)
            .map_err(|e| DaemonError::Config(format!("workspace {}: {e}", ws.root.display())))?,
    );
    let config = Arc::new(config);
    let metrics = metrics::install(&config.vendors);
    let ready = Arc::new(Readiness::default());
    let listener = bind_http(&config, opts.listen, opts.allow_remote_listen).await?;
    let bound = listener.as_ref().and_then(|l| l.local_addr().ok());

    // Blocking startup work off the runtime's workers.
    let (ws2, config2, metrics2) = (ws.clone(), config.clone(), metrics.clone());
    let opened = tokio::task::spawn_blocking(move || startup::open(&ws2, &config2, &metrics2))
        .await
        .map_err(|e| DaemonError::Internal(format!("startup task failed: {e}")))??;
    ready.folders.store(true, Ordering::SeqCst);
    ready.store.store(true, Ordering::SeqCst);
    tracing::info!(
        pool_items = opened.pool.summary.len(),
        trusted_items = opened.trusted.ids.len(),
        recovered = opened.redo.len(),
        "store open"
    );
    let (store, meta): (Store, WorkspaceMeta) = (opened.store.clone(), opened.meta.clone());
    let p = start_pipeline(
        &ws,
        &config,
        opened,
        &metrics,
        &ready,
        opts.observer.clone(),
    )?;

    let (stop_tx, stop_rx) = tokio::sync::watch::channel(false);
    let http_task = listener.map(|l| {
        let mut rx = stop_rx.clone();
        let (m, r) = (metrics.clone(), ready.clone());
        let limits = crate::http::Limits {
            max_connections: config.http.max_connections,
            idle: Duration::from_secs(config.http.idle_timeout_secs),
        };
        tokio::spawn(async move {
            let stop = async move {
                let _ = rx.wait_for(|s| *s).await;
            };
            if let Err(e) = crate::http::serve(l, m, r, limits, stop).await {
                tracing::error!(error = %e, "http server failed");
            }
        })
    });
    let admin_ctx = admin::server::Context {
        ws: ws.clone(),
        store: store.clone(),
        meta,
        config: {
            let (shared, started_with) = (p.shared.clone(), config.clone());
            Arc::new(move || {
                shared
                    .reload
                    .current()
                    .unwrap_or_else(|| started_with.clone())
            })
        },
        hooks: Arc::new(WorkerHooks(p.handle.clone())),
    };
    let admin_task = tokio::spawn(admin::server::serve(admin_ctx, stop_rx.clone()));
    let hup = tokio::spawn(reload::run(
        ws.config_file(),
        config.clone(),
        p.shared.clone(),
        metrics.clone(),
        stop_rx.clone(),
    ));
    let hk = tokio::spawn(housekeeping::run(
        ws.clone(),
        store.clone(),
        metrics.clone(),
        ready.clone(),
        bound,
        opts.on_ready.clone(),
        stop_rx.clone(),
    ));

    let fatal = supervise(shutdown, &p, &ready, Watchdog::from_env(&config)).await;
    let (worker_res, ingest_res) = stop_pipeline(p, &ready).await?;
    let _ = stop_tx.send(true);
    // Open connections get a few seconds to finish their answer; then they are dropped.
    if let Some(t) = http_task {
        finish_or_abort(t, "http server").await;
    }
    finish_or_abort(admin_task, "admin socket").await;
    let _ = hk.await;
    let _ = hup.await;
    let flush = tokio::task::spawn_blocking(move || store.flush())
        .await
        .map_err(|e| DaemonError::Internal(e.to_string()))?;
    if let Some(e) = fatal {
        // The thread that died is the cause; what the others reported on the way down is logged.
        if let Err(w) = &worker_res {
            tracing::error!(error = %w, "the scoring thread on the way down");
        }
        if let Err(i) = &ingest_res {
            tracing::error!(error = %i, "the ingest thread on the way down");
        }
        flush?;
        return Err(e);
    }
    worker_res?;
    ingest_res?;
    flush?;
    tracing::info!("stopped cleanly");
    Ok(())
}
