//! The watching daemon: drop folder → verdict.
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
//!   see [`crate::scoring`]), which scores, decides, persists and files each batch in turn;
//! * an occasional **refresh** thread rebuilds the pool summary exactly.
//!
//! Startup: config and folder checks (exit 78), store (74), reconciliation of `processing/` (batches
//! found `Decided` are filed; batches found `Claimed` are re-processed first), pool summary, worker, ingest
//! thread, watcher, first full rescan; then `READY=1` to systemd and `/readyz` 200.
//!
//! Shutdown (first signal): stop claiming, finish the batch in hand (queued ones stay in `processing/` and
//! are redone at the next start), save the pool summary, flush the store, `STOPPING=1`, return. The CLI
//! exits at once on a second signal.

use std::collections::{BTreeSet, HashSet};
use std::future::Future;
use std::net::SocketAddr;
use std::os::unix::fs::MetadataExt;
use std::path::Path;
use std::sync::atomic::Ordering;
use std::sync::{Arc, Condvar, Mutex};
use std::time::{Duration, Instant, SystemTime};

use crate::config::{Config, WatcherKind, Workspace};
use crate::data::Classes;
use crate::http::Readiness;
use crate::metrics::{self, Metrics};
use crate::scoring::{self, Job, Observer, ScoringHandle, Shared, TrustedArrays, Worker};
use crate::store::{BatchRecord, BatchState, Store, StoreError, WorkspaceMeta};

/// Why the daemon stopped with an error; [`DaemonError::exit_code`] maps it to the process exit code.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum DaemonError {
    /// The configuration or workspace layout is unusable (exit 78).
    #[error("configuration: {0}")]
    Config(String),
    /// Filesystem error (exit 74).
    #[error("i/o: {0}")]
    Io(String),
    /// Store error (exit 74).
    #[error(transparent)]
    Store(#[from] StoreError),
    /// A bug or an engine failure on the workspace's own data (exit 70).
    #[error("internal: {0}")]
    Internal(String),
}

impl DaemonError {
    /// sysexits-style exit code: 78 config, 74 I/O or storage, 70 internal.
    pub fn exit_code(&self) -> u8 {
        match self {
            Self::Config(_) => crate::cli::exit::CONFIG,
            Self::Io(_) | Self::Store(_) => crate::cli::exit::IO,
            Self::Internal(_) => crate::cli::exit::INTERNAL,
        }
    }
}

/// Options beyond the configuration.
#[derive(Default, Clone)]
pub struct RunOptions {
    /// Overrides `http.listen`.
    pub listen: Option<SocketAddr>,
    /// Called after every settled batch.
    pub observer: Option<Observer>,
    /// Called once when the daemon is ready, with the HTTP address actually bound (if serving).
    pub on_ready: Option<Arc<dyn Fn(Option<SocketAddr>) + Send + Sync>>,
}

/// What a running daemon shares with its admin server and other in-process helpers.
#[derive(Clone)]
pub struct DaemonContext {
    /// Workspace folders.
    pub ws: Workspace,
    /// Configuration in use.
    pub config: Arc<Config>,
    /// The store (the only open instance in this process).
    pub store: Store,
    /// What init fixed.
    pub meta: WorkspaceMeta,
    /// The scoring worker: call `pool_changed()` after a pool transition, `trusted_changed()` after a
    /// trusted-set change.
    pub scoring: ScoringHandle,
    /// Metrics.
    pub metrics: Arc<Metrics>,
    /// Readiness checks.
    pub ready: Arc<Readiness>,
}

fn io(what: &str) -> impl FnOnce(std::io::Error) -> DaemonError + '_ {
    move |e| DaemonError::Io(format!("{what}: {e}"))
}

/// Create missing folders (vendors may have been added to the config) and check that every folder is on
/// one filesystem (renames between them must be atomic). Network mounts are not detected; use
/// `ingest.watcher = "poll"` there.
pub fn prepare_folders(ws: &Workspace, config: &Config) -> Result<(), DaemonError> {
    if !ws.root.is_dir() {
        return Err(DaemonError::Config(format!(
            "{} is not a workspace folder",
            ws.root.display()
        )));
    }
    let mut dirs = vec![
        ws.inbox(),
        ws.processing(),
        ws.folder("accepted"),
        ws.folder("quarantine"),
        ws.folder("rejected"),
        ws.root.join("notices"),
        ws.state(),
    ];
    for v in &config.vendors {
        dirs.push(ws.vendor_inbox(v));
        dirs.push(ws.notices(v));
    }
    let mut dev = None;
    for d in &dirs {
        std::fs::create_dir_all(d).map_err(io(&d.display().to_string()))?;
        let m = std::fs::symlink_metadata(d).map_err(io(&d.display().to_string()))?;
        if !m.is_dir() {
            return Err(DaemonError::Config(format!(
                "{} must be a directory, not a link",
                d.display()
            )));
        }
        match dev {
            None => dev = Some(m.dev()),
            Some(x) if x != m.dev() => {
                return Err(DaemonError::Config(format!(
                    "{} is on another filesystem than the rest of the workspace; inbox, processing, accepted, quarantine, rejected, notices and state must share one filesystem",
                    d.display()
                )))
            }
            _ => {}
        }
    }
    Ok(())
}

/// Check that the configuration agrees with what `init` fixed.
pub fn check_against_meta(config: &Config, meta: &WorkspaceMeta) -> Result<(), DaemonError> {
    if !config.schema.features.is_empty() && config.schema.features != meta.features {
        return Err(DaemonError::Config(
            "schema.features differs from the feature columns fixed at init".into(),
        ));
    }
    let setting = serde_json::to_value(config.model.feature_map).unwrap_or_default();
    if setting != meta.feature_map_setting {
        return Err(DaemonError::Config(format!(
            "model.feature_map is {setting} but the workspace was created with {}; it cannot change after init",
            meta.feature_map_setting
        )));
    }
    Ok(())
}

/// Reconcile the store with `processing/` after a start: file batches left `Decided`, forget claims
/// whose rename never happened, and return the `Claimed` batches whose files wait in `processing/`.
pub fn reconcile(
    ws: &Workspace,
    config: &Config,
    store: &Store,
    metrics: Option<&Metrics>,
) -> Result<Vec<BatchRecord>, DaemonError> {
    for rec in store.batches_in(&[BatchState::Decided])? {
        tracing::info!(batch_id = %rec.id, vendor = %rec.vendor, "recovery: filing a decided batch");
        crate::actions::settle(ws, config, store, metrics, &rec, None)
            .map_err(|e| DaemonError::Io(e.to_string()))?;
    }
    let mut redo = Vec::new();
    let mut known = HashSet::new();
    for rec in store.batches()? {
        known.insert(rec.file_name.clone());
        if rec.state != BatchState::Claimed {
            continue;
        }
        if std::fs::symlink_metadata(ws.processing().join(&rec.file_name)).is_ok() {
            redo.push(rec);
        } else {
            // Recorded, but the rename into processing/ never happened: the file is still in the inbox
            // and will be found again.
            store.forget_claim(&rec.id)?;
        }
    }
    if let Ok(rd) = std::fs::read_dir(ws.processing()) {
        for e in rd.flatten() {
            let name = e.file_name().to_string_lossy().into_owned();
            if !name.starts_with('.') && !known.contains(&name) {
                tracing::warn!(file = %crate::ingest::escape_name(&e.file_name()), "processing/ holds a file the store does not know; left alone");
            }
        }
    }
    Ok(redo)
}

/// Free bytes available to the daemon on the filesystem holding `path`.
pub fn free_bytes(path: &Path) -> Option<u64> {
    rustix::fs::statvfs(path)
        .ok()
        .map(|s| s.f_bavail.saturating_mul(s.f_frsize))
}

#[derive(Default)]
struct Wake {
    dirty: BTreeSet<String>,
    all: Option<&'static str>,
    stop: bool,
}

/// The ingest thread's wake-up channel (filled by the watcher and by shutdown).
#[derive(Default)]
struct IngestCtl {
    wake: Mutex<Wake>,
    cv: Condvar,
}

impl IngestCtl {
    fn mark(&self, vendor: Option<String>, all: Option<&'static str>) {
        if let Ok(mut w) = self.wake.lock() {
            if let Some(v) = vendor {
                w.dirty.insert(v);
            }
            if all.is_some() {
                w.all = all;
            }
        }
        self.cv.notify_all();
    }

    fn stop(&self) {
        if let Ok(mut w) = self.wake.lock() {
            w.stop = true;
        }
        self.cv.notify_all();
    }
}

struct Ingest {
    ws: Workspace,
    config: Arc<Config>,
    store: Store,
    meta: WorkspaceMeta,
    classes: Classes,
    metrics: Arc<Metrics>,
    ready: Arc<Readiness>,
    scoring: ScoringHandle,
    ctl: Arc<IngestCtl>,
    seen: HashSet<(String, std::ffi::OsString)>,
}

enum Flow {
    Continue,
    Stop,
}

impl Ingest {
    fn stopping(&self) -> bool {
        self.ctl.wake.lock().map(|w| w.stop).unwrap_or(true)
    }

    fn submit(&self, record: BatchRecord, input: scoring::JobInput) -> Flow {
        match self.scoring.submit(Job { record, input }) {
            Ok(()) => {
                self.metrics
                    .queue_depth(self.scoring.shared.queue_depth.load(Ordering::SeqCst));
                Flow::Continue
            }
            Err(_) => Flow::Stop, // the worker stopped: the claim stays in processing/ for the next start
        }
    }

    fn process_claimed(&self, record: BatchRecord) -> Result<Flow, DaemonError> {
        let t = Instant::now();
        let input = crate::ingest::prepare(
            &self.ws,
            &self.config,
            &self.meta.features,
            &self.classes,
            &record,
        );
        self.metrics.stage("parse", t.elapsed());
        match input {
            Some(input) => Ok(self.submit(record, input)),
            None => {
                self.store.forget_claim(&record.id)?;
                Ok(Flow::Continue)
            }
        }
    }

    fn disk_ok(&self) -> bool {
        let min = self.config.ingest.min_free_bytes;
        let mut ok = true;
        for (mount, p) in [("inbox", self.ws.inbox()), ("state", self.ws.state())] {
            if let Some(free) = free_bytes(&p) {
                self.metrics.free_bytes(mount, free);
                ok &= free >= min;
            }
        }
        self.ready.disk.store(ok, Ordering::SeqCst);
        ok
    }

    fn scan_unknown(&self) {
        let known: HashSet<&str> = self.config.vendors.iter().map(|s| s.as_str()).collect();
        let mut unknown = 0;
        if let Ok(rd) = std::fs::read_dir(self.ws.inbox()) {
            for e in rd.flatten() {
                let name = e.file_name();
                if !known.contains(name.to_string_lossy().as_ref()) {
                    unknown += 1;
                    tracing::warn!(entry = %crate::ingest::escape_name(&name), "inbox/ entry is not a configured vendor; ignored");
                }
            }
        }
        self.metrics.unknown_inbox_folders(unknown);
    }

    /// Scan one vendor and take its ready files. Returns when the next waiting file becomes ready.
    fn scan_and_take(&mut self, vendor: &str) -> Result<(Flow, Option<SystemTime>), DaemonError> {
        let quiet = Duration::from_millis(self.config.ingest.quiet_period_ms);
        let dir = self.ws.vendor_inbox(vendor);
        let scan = match crate::ingest::scan_vendor(&dir, vendor, quiet, SystemTime::now()) {
            Ok(s) => s,
            Err(e) => {
                tracing::error!(vendor, error = %e, "cannot list vendor folder");
                self.metrics.error("claim", "list");
                return Ok((Flow::Continue, None));
            }
        };
        self.metrics
            .inbox_backlog(vendor, scan.backlog as i64, scan.oldest_age.as_secs_f64());
        for c in &scan.ready {
            let key = (vendor.to_string(), c.name.clone());
            if self.seen.insert(key) {
                self.metrics.file_discovered(vendor);
            }
        }
        if !scan.ready.is_empty() && !self.disk_ok() {
            tracing::warn!("free space below ingest.min_free_bytes; not claiming");
            return Ok((
                Flow::Continue,
                Some(SystemTime::now() + Duration::from_secs(5)),
            ));
        }
        for c in scan.ready {
            if self.stopping() {
                return Ok((Flow::Stop, None));
            }
            self.seen.remove(&(vendor.to_string(), c.name.clone()));
            let t = Instant::now();
            let claimed = match crate::ingest::claim(&self.ws, &self.store, &c) {
                Ok(Some(c)) => c,
                Ok(None) => continue,
                Err(crate::ingest::IngestError::Store(e)) => return Err(e.into()),
                Err(e) => {
                    tracing::error!(vendor, error = %e, "claim failed");
                    self.metrics.error("claim", "rename");
                    continue;
                }
            };
            self.metrics.stage("claim", t.elapsed());
            tracing::info!(batch_id = %claimed.record.id, vendor, original_name = %claimed.record.original_name, stage = "claim", "claimed");
            if let Flow::Stop = self.process_claimed(claimed.record)? {
                return Ok((Flow::Stop, None));
            }
        }
        Ok((Flow::Continue, scan.next_ready))
    }

    fn run(mut self, recovered: Vec<BatchRecord>) -> Result<(), DaemonError> {
        for rec in recovered {
            tracing::info!(batch_id = %rec.id, vendor = %rec.vendor, "recovery: re-processing a claimed batch");
            if let Flow::Stop = self.process_claimed(rec)? {
                return Ok(());
            }
        }
        let interval = Duration::from_secs(self.config.ingest.rescan_interval_secs);
        let vendors = self.config.vendors.clone();
        let mut next_timer = Instant::now();
        let mut reason: &'static str = "startup";
        let mut next_ready: Option<SystemTime> = None;
        let mut first = true;
        loop {
            let targets: Vec<String>;
            {
                let mut w = self
                    .ctl
                    .wake
                    .lock()
                    .map_err(|_| DaemonError::Internal("ingest lock poisoned".into()))?;
                loop {
                    if w.stop {
                        return Ok(());
                    }
                    let now = Instant::now();
                    if first || now >= next_timer {
                        break;
                    }
                    if w.all.is_some() || !w.dirty.is_empty() {
                        break;
                    }
                    if let Some(t) = next_ready {
                        if SystemTime::now() >= t {
                            break;
                        }
                    }
                    let mut wait = next_timer.saturating_duration_since(now);
                    if let Some(t) = next_ready {
                        wait = wait.min(
                            t.duration_since(SystemTime::now())
                                .unwrap_or(Duration::ZERO)
                                + Duration::from_millis(5),
                        );
                    }
                    let (g, _) = self
                        .ctl
                        .cv
                        .wait_timeout(w, wait)
                        .map_err(|_| DaemonError::Internal("ingest lock poisoned".into()))?;
                    w = g;
                }
                let now = Instant::now();
                let timer = first || now >= next_timer;
                let due = next_ready.is_some_and(|t| SystemTime::now() >= t);
                if timer || w.all.is_some() || due {
                    if !first && timer {
                        reason = "timer";
                    }
                    if let Some(r) = w.all.take() {
                        if !timer {
                            reason = r;
                        }
                    } else if !timer && due {
                        reason = "event";
                    }
                    w.dirty.clear();
                    targets = vendors.clone();
                } else {
                    reason = "event";
                    targets = std::mem::take(&mut w.dirty).into_iter().collect();
                }
                if timer {
                    next_timer = now + interval;
                }
            }
            if targets.len() == vendors.len() {
                self.metrics.rescan(reason);
                self.scan_unknown();
                self.disk_ok();
            } else {
                self.metrics.rescan("event");
            }
            next_ready = None;
            for v in &targets {
                let (flow, nr) = self.scan_and_take(v)?;
                if let Flow::Stop = flow {
                    return Ok(());
                }
                if let Some(t) = nr {
                    next_ready = Some(next_ready.map_or(t, |x: SystemTime| x.min(t)));
                }
            }
            if first {
                first = false;
                self.ready.first_rescan.store(true, Ordering::SeqCst);
            }
        }
    }
}

enum AnyWatcher {
    Native(notify::RecommendedWatcher),
    Poll(notify::PollWatcher),
}

fn start_watcher(
    ws: &Workspace,
    config: &Config,
    ctl: Arc<IngestCtl>,
    metrics: Arc<Metrics>,
) -> notify::Result<AnyWatcher> {
    use notify::Watcher;
    let inbox = ws.inbox();
    let vendors: HashSet<String> = config.vendors.iter().cloned().collect();
    let handler = move |res: notify::Result<notify::Event>| match res {
        Ok(ev) => {
            if ev.need_rescan() {
                ctl.mark(None, Some("overflow"));
                return;
            }
            for p in &ev.paths {
                let vendor = p
                    .parent()
                    .filter(|d| d.parent() == Some(inbox.as_path()))
                    .and_then(|d| d.file_name())
                    .map(|s| s.to_string_lossy().into_owned())
                    .filter(|v| vendors.contains(v));
                if let Some(v) = vendor {
                    ctl.mark(Some(v), None);
                }
            }
        }
        Err(_) => {
            metrics.watcher_error();
            ctl.mark(None, Some("error"));
        }
    };
    let cfg = notify::Config::default().with_follow_symlinks(false);
    let mut w = match config.ingest.watcher {
        WatcherKind::Native => AnyWatcher::Native(notify::RecommendedWatcher::new(handler, cfg)?),
        WatcherKind::Poll => AnyWatcher::Poll(notify::PollWatcher::new(
            handler,
            cfg.with_poll_interval(Duration::from_millis(config.ingest.poll_interval_ms)),
        )?),
    };
    for v in &config.vendors {
        let p = ws.vendor_inbox(v);
        match &mut w {
            AnyWatcher::Native(x) => x.watch(&p, notify::RecursiveMode::NonRecursive)?,
            AnyWatcher::Poll(x) => x.watch(&p, notify::RecursiveMode::NonRecursive)?,
        }
    }
    Ok(w)
}

/// Refresh the gauges that are cheaper to read than to track (quarantine queue, store size).
fn refresh_gauges(ws: &Workspace, store: &Store, metrics: &Metrics) {
    let mut n = 0;
    let mut bytes = 0;
    let mut oldest = 0.0f64;
    let now = SystemTime::now();
    if let Ok(rd) = std::fs::read_dir(ws.folder("quarantine")) {
        for e in rd.flatten() {
            let name = e.file_name().to_string_lossy().into_owned();
            if name.starts_with('.') || name.ends_with(".json") {
                continue;
            }
            if let Ok(m) = e.metadata() {
                n += 1;
                bytes += m.len();
                if let Ok(t) = m.modified() {
                    oldest = oldest.max(now.duration_since(t).unwrap_or_default().as_secs_f64());
                }
            }
        }
    }
    metrics.quarantine(n, oldest, bytes);
    metrics.store_size(store.size_on_disk());
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
    let config = Arc::new(config);
    let metrics = metrics::install(&config.vendors);
    let ready = Arc::new(Readiness::default());
    let listen = match opts.listen {
        Some(a) => Some(a),
        None if config.http.enabled => Some(
            config
                .listen_addr()
                .map_err(|e| DaemonError::Config(e.to_string()))?,
        ),
        None => None,
    };
    let listener = match listen {
        Some(a) => Some(
            crate::http::bind(a)
                .await
                .map_err(|e| DaemonError::Io(format!("cannot listen on {a}: {e}")))?,
        ),
        None => None,
    };
    let bound = listener.as_ref().and_then(|l| l.local_addr().ok());

    // Blocking startup work off the runtime's workers.
    let (ws2, config2, metrics2) = (ws.clone(), config.clone(), metrics.clone());
    let started = tokio::task::spawn_blocking(move || -> Result<_, DaemonError> {
        prepare_folders(&ws2, &config2)?;
        let store = Store::open_workspace(&ws2.root, &config2.store)?;
        let meta = store.workspace_meta()?;
        check_against_meta(&config2, &meta)?;
        let redo = reconcile(&ws2, &config2, &store, Some(&metrics2))?;
        let pool = scoring::load_pool(&store, &meta, &config2)
            .map_err(|e| DaemonError::Internal(e.to_string()))?;
        let trusted = TrustedArrays::load(&store, &meta)?;
        Ok((store, meta, redo, pool, trusted))
    })
    .await
    .map_err(|e| DaemonError::Internal(format!("startup task failed: {e}")))??;
    let (store, meta, redo, pool, trusted) = started;
    ready.folders.store(true, Ordering::SeqCst);
    ready.store.store(true, Ordering::SeqCst);
    tracing::info!(
        pool_items = pool.summary.len(),
        trusted_items = trusted.ids.len(),
        recovered = redo.len(),
        "store open"
    );

    let shared = Arc::new(Shared::default());
    let (handle, worker_thread) = scoring::spawn(Worker {
        ws: ws.clone(),
        config: config.clone(),
        store: store.clone(),
        meta: meta.clone(),
        metrics: metrics.clone(),
        observer: opts.observer.clone(),
        trusted,
        pool,
        shared: shared.clone(),
    })
    .map_err(io("start scoring thread"))?;
    ready.worker.store(true, Ordering::SeqCst);

    let ctl = Arc::new(IngestCtl::default());
    let watcher = start_watcher(&ws, &config, ctl.clone(), metrics.clone())
        .map_err(|e| DaemonError::Io(format!("filesystem watcher: {e}")))?;
    ready.watcher.store(true, Ordering::SeqCst);
    let ingest = Ingest {
        ws: ws.clone(),
        config: config.clone(),
        store: store.clone(),
        classes: Classes::from_labels(&meta.classes),
        meta: meta.clone(),
        metrics: metrics.clone(),
        ready: ready.clone(),
        scoring: handle.clone(),
        ctl: ctl.clone(),
        seen: HashSet::new(),
    };
    let ingest_thread = std::thread::Builder::new()
        .name("labelweir-ingest".into())
        .spawn(move || ingest.run(redo))
        .map_err(io("start ingest thread"))?;

    let (stop_tx, stop_rx) = tokio::sync::watch::channel(false);
    let http_task = listener.map(|l| {
        let mut rx = stop_rx.clone();
        let (m, r) = (metrics.clone(), ready.clone());
        tokio::spawn(async move {
            let stop = async move {
                let _ = rx.wait_for(|s| *s).await;
            };
            if let Err(e) = crate::http::serve(l, m, r, stop).await {
                tracing::error!(error = %e, "http server failed");
            }
        })
    });

    // ADMIN HOOK: the admin socket server (src/admin.rs) serves review commands until the stop signal.
    let ctx = DaemonContext {
        ws: ws.clone(),
        config: config.clone(),
        store: store.clone(),
        meta: meta.clone(),
        scoring: handle.clone(),
        metrics: metrics.clone(),
        ready: ready.clone(),
    };
    let admin_task = tokio::spawn(crate::admin::serve(ctx, stop_rx.clone()));

    // Housekeeping: gauges, readiness notification.
    let hk = {
        let (ws, store, metrics, ready, mut rx) = (
            ws.clone(),
            store.clone(),
            metrics.clone(),
            ready.clone(),
            stop_rx.clone(),
        );
        let on_ready = opts.on_ready.clone();
        tokio::spawn(async move {
            let mut notified = false;
            let mut tick = tokio::time::interval(Duration::from_millis(200));
            let mut last_gauges = Instant::now() - Duration::from_secs(60);
            loop {
                tokio::select! {
                    _ = tick.tick() => {}
                    _ = rx.wait_for(|s| *s) => break,
                }
                let ok = ready.is_ready();
                metrics.ready(ok);
                if ok && !notified {
                    notified = true;
                    let _ = sd_notify::notify(false, &[sd_notify::NotifyState::Ready]);
                    tracing::info!(listen = ?bound, "ready");
                    if let Some(f) = &on_ready {
                        f(bound);
                    }
                }
                if last_gauges.elapsed() >= Duration::from_secs(5) {
                    last_gauges = Instant::now();
                    let (ws, store, metrics) = (ws.clone(), store.clone(), metrics.clone());
                    let _ =
                        tokio::task::spawn_blocking(move || refresh_gauges(&ws, &store, &metrics))
                            .await;
                }
            }
        })
    };

    // Run until shutdown, or until a worker thread dies.
    let fatal: Option<DaemonError> = {
        let mut shutdown = std::pin::pin!(shutdown);
        let mut check = tokio::time::interval(Duration::from_millis(250));
        loop {
            tokio::select! {
                _ = &mut shutdown => break None,
                _ = check.tick() => {
                    if worker_thread.is_finished() || ingest_thread.is_finished() {
                        break Some(DaemonError::Internal("a pipeline thread stopped".into()));
                    }
                }
            }
        }
    };
    tracing::info!("shutting down: no new claims; finishing the batch in hand");
    let _ = sd_notify::notify(false, &[sd_notify::NotifyState::Stopping]);
    ready.stopping.store(true, Ordering::SeqCst);
    shared.cancel.store(true, Ordering::SeqCst);
    ctl.stop();
    drop(handle);
    let (worker_res, ingest_res) = tokio::task::spawn_blocking(move || {
        let w = worker_thread.join();
        let i = ingest_thread.join();
        (w, i)
    })
    .await
    .map_err(|e| DaemonError::Internal(e.to_string()))?;
    drop(watcher);
    let _ = stop_tx.send(true);
    if let Some(t) = http_task {
        let _ = t.await;
    }
    let _ = admin_task.await;
    let _ = hk.await;
    let flush = {
        let store = store.clone();
        tokio::task::spawn_blocking(move || store.flush())
            .await
            .map_err(|e| DaemonError::Internal(e.to_string()))?
    };
    let worker_res =
        worker_res.map_err(|_| DaemonError::Internal("the scoring thread panicked".into()))?;
    let ingest_res =
        ingest_res.map_err(|_| DaemonError::Internal("the ingest thread panicked".into()))?;
    worker_res.map_err(|e| match e {
        scoring::ScoringError::Store(s) => DaemonError::Store(s),
        scoring::ScoringError::Action(a) => DaemonError::Io(a.to_string()),
        other => DaemonError::Internal(other.to_string()),
    })?;
    ingest_res?;
    flush?;
    if let Some(e) = fatal {
        return Err(e);
    }
    tracing::info!("stopped cleanly");
    Ok(())
}
