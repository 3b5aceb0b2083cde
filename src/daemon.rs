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
//!   see [`crate::scoring`]), which scores, decides and persists each batch in turn, and hands it to the
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

/// Filesystems on which inotify does not see files written elsewhere (by other clients of a network share,
/// or through a FUSE daemon), by their `statfs` magic number. Values of Linux's `include/uapi/linux/magic.h`
/// as the statfs(2) manual page lists them, written here from memory; `NFS_SUPER_MAGIC` is checked against
/// rustix's constant in a test.
const REMOTE_FILESYSTEMS: [(u64, &str); 8] = [
    (0x6969, "NFS"),
    (0x517B, "SMB"),
    (0xFF53_4D42, "CIFS"),
    (0xFE53_4D42, "SMB2"),
    (0x6573_5546, "FUSE"),
    (0x0102_1997, "9p"),
    (0x00C3_6400, "Ceph"),
    (0x5346_414F, "AFS"),
];

/// The kind of network or FUSE filesystem holding `path`, if it is one (`None` also when `statfs` fails).
pub fn remote_filesystem(path: &Path) -> Option<&'static str> {
    let st = rustix::fs::statfs(path).ok()?;
    // `f_type` is a C long; the magic numbers are 32-bit.
    let magic = (st.f_type as u64) & 0xFFFF_FFFF;
    REMOTE_FILESYSTEMS
        .iter()
        .find(|(m, _)| *m == magic)
        .map(|(_, name)| *name)
}

/// Create missing folders (vendors may have been added to the config) and check that every folder is on
/// one filesystem (renames between them must be atomic), and that this filesystem is not a network or FUSE
/// mount unless `ingest.watcher = "poll"` (inotify does not see remote writes there).
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
    if config.ingest.watcher == WatcherKind::Native {
        if let Some(kind) = remote_filesystem(&ws.inbox()) {
            return Err(DaemonError::Config(format!(
                "{} is on a {kind} filesystem, where inotify does not see files written by other machines or through the FUSE daemon; set [ingest] watcher = \"poll\" in labelweir.toml",
                ws.inbox().display()
            )));
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

/// Reconcile the store with the folders after a start: file batches left `Decided`, finish review
/// decisions a crash interrupted (file moves, pending vendor notices), forget claims whose rename never
/// happened, and return the `Claimed` batches whose files wait in `processing/`.
pub fn reconcile(
    ws: &Workspace,
    config: &Config,
    store: &Store,
    metrics: Option<&Metrics>,
) -> Result<Vec<BatchRecord>, DaemonError> {
    match crate::review::finish_pending(ws, config, store) {
        Ok(0) => {}
        Ok(n) => tracing::info!(done = n, "recovery: finished interrupted review decisions"),
        Err(e) => {
            tracing::warn!(error = %e, "recovery: finishing interrupted review decisions failed; the next review command retries")
        }
    }
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
            let escaped = rec.original_name.contains("\\x") || rec.original_name.contains("\\u{");
            let in_inbox =
                std::fs::symlink_metadata(ws.vendor_inbox(&rec.vendor).join(&rec.original_name))
                    .is_ok();
            if escaped || in_inbox {
                // Recorded, but the rename into processing/ never happened: the file is still in the
                // inbox and will be found again (an escaped name cannot be looked up; assume the same).
                store.forget_claim(&rec.id)?;
            } else {
                // Claimed and renamed, then removed from processing/ by someone before a verdict.
                tracing::warn!(batch_id = %rec.id, vendor = %rec.vendor, "a claimed file vanished from processing/ before its verdict");
                let audit = crate::store::AuditRecord::new("daemon", "vanished")
                    .batch(&rec.id, &rec.vendor)
                    .outcome(BatchState::Vanished.as_str())
                    .reason("the claimed file was removed from processing/ before a verdict");
                store.transition(
                    &rec.id,
                    &[BatchState::Claimed],
                    BatchState::Vanished,
                    crate::store::PoolChange::None,
                    vec![audit],
                    |_| {},
                )?;
            }
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

/// The systemd watchdog, when the unit asks for one (`WatchdogSec` sets `WATCHDOG_USEC` and
/// `WATCHDOG_PID` for the main process).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Watchdog {
    /// Ping at least this often: half of `WATCHDOG_USEC` (sd_watchdog_enabled(3) asks for a ping within
    /// the interval and recommends half of it).
    pub every: Duration,
    /// Stop pinging once the scoring loop has been silent this long: twice the engine's per-batch time
    /// budget plus a minute for parsing, filing and the store (the loop otherwise comes round every 500 ms).
    pub stall_limit: Duration,
}

/// What the watchdog should do now.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Ping {
    /// Send `WATCHDOG=1`.
    Now,
    /// Not yet: the last ping is recent.
    Wait,
    /// The scoring loop is stalled: no ping, so systemd restarts the daemon (recovery redoes the batch).
    Stalled,
}

impl Watchdog {
    /// From the environment systemd sets, for this configuration; `None` when no watchdog is asked for.
    pub fn from_env(config: &Config) -> Option<Self> {
        let mut usec = 0;
        sd_notify::watchdog_enabled(false, &mut usec)
            .then(|| Self::new(Duration::from_micros(usec), config))
    }

    /// For an interval of `interval` (`WATCHDOG_USEC`).
    pub fn new(interval: Duration, config: &Config) -> Self {
        Self {
            every: interval / 2,
            stall_limit: Duration::from_millis(2 * config.model.time_budget_ms)
                + Duration::from_secs(60),
        }
    }

    /// Whether to ping, given the time since the last ping (`None`: never pinged) and since the scoring
    /// loop last came round.
    pub fn due(&self, since_ping: Option<Duration>, since_beat: Duration) -> Ping {
        if since_beat > self.stall_limit {
            Ping::Stalled
        } else if since_ping.is_none_or(|d| d >= self.every) {
            Ping::Now
        } else {
            Ping::Wait
        }
    }
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
        // The first full listing (backlog gauges, unknown folders, disk) makes the daemon ready; taking the
        // backlog, which may be long, happens after.
        let quiet = Duration::from_millis(self.config.ingest.quiet_period_ms);
        for v in &self.config.vendors {
            if let Ok(scan) =
                crate::ingest::scan_vendor(&self.ws.vendor_inbox(v), v, quiet, SystemTime::now())
            {
                self.metrics
                    .inbox_backlog(v, scan.backlog as i64, scan.oldest_age.as_secs_f64());
            }
        }
        self.scan_unknown();
        self.disk_ok();
        self.ready.first_rescan.store(true, Ordering::SeqCst);
        for rec in recovered {
            tracing::info!(batch_id = %rec.id, vendor = %rec.vendor, "recovery: re-processing a claimed batch");
            if let Flow::Stop = self.process_claimed(rec)? {
                return Ok(());
            }
        }
        let mut interval = Duration::from_secs(self.config.ingest.rescan_interval_secs);
        let vendors = self.config.vendors.clone();
        let mut next_timer = Instant::now();
        let mut reason: &'static str = "startup";
        let mut next_ready: Option<SystemTime> = None;
        let mut first = true;
        let mut config_seen = 0;
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
            // A reloaded configuration applies from this scan (vendors cannot change at runtime; a new
            // rescan interval from the next timer).
            if let Some(c) = self.scoring.shared.reload.newer(&mut config_seen) {
                self.config = c;
                interval = Duration::from_secs(self.config.ingest.rescan_interval_secs);
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
            first = false;
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

/// Count review decisions (`release`, `withdraw`) as `labelweir_batches_total{outcome="released"|"withdrawn"}`
/// by tailing the audit trail, so they are counted whichever path (admin socket or a stopped-daemon
/// command) recorded them. The first call only sets the starting point (`u64::MAX` = not yet set).
fn count_review_outcomes(store: &Store, metrics: &Metrics, seen: &std::sync::atomic::AtomicU64) {
    let after = seen.load(Ordering::SeqCst);
    if after == u64::MAX {
        let last = store.last_audit_seq().unwrap_or(0);
        seen.store(last, Ordering::SeqCst);
        return;
    }
    let Ok(records) = store.audit_since(after) else {
        return;
    };
    let now = chrono::Utc::now().timestamp_millis() as f64 / 1000.0;
    for a in &records {
        let outcome = match a.action.as_str() {
            "release" => "released",
            "withdraw" => "withdrawn",
            _ => continue,
        };
        let (Some(vendor), Some(id)) = (&a.vendor, &a.batch_id) else {
            continue;
        };
        let items = a.detail["items_into_pool"].as_u64().or_else(|| {
            store
                .batch(id)
                .ok()
                .flatten()
                .and_then(|b| b.items.map(|n| n as u64))
        });
        metrics.batch_outcome(vendor, outcome, items.unwrap_or(0), 0, now);
    }
    if let Some(last) = records.last() {
        seen.store(last.seq, Ordering::SeqCst);
    }
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
    // Absolute paths: the watcher reports absolute paths, and vendor folders are matched against these.
    let ws = Workspace::new(
        std::fs::canonicalize(&ws.root)
            .map_err(|e| DaemonError::Config(format!("workspace {}: {e}", ws.root.display())))?,
    );
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

    // SIGHUP: re-read and validate the configuration. A valid file whose changes are all runtime-safe
    // (`Config::restart_only_changes`) is published to the pipeline threads, which take it between batches;
    // an invalid file, or one that changes restart-only settings, is reported through
    // labelweir_config_last_reload_successful 0 and the error log, and the running config stays in use.
    let hup = {
        let (path, metrics, started_with, shared, mut rx) = (
            ws.config_file(),
            metrics.clone(),
            config.clone(),
            shared.clone(),
            stop_rx.clone(),
        );
        tokio::spawn(async move {
            use tokio::signal::unix::{signal, SignalKind};
            let Ok(mut hup) = signal(SignalKind::hangup()) else {
                return;
            };
            loop {
                tokio::select! {
                    _ = hup.recv() => {}
                    _ = rx.wait_for(|s| *s) => break,
                }
                match Config::from_file(&path) {
                    Ok(c) => {
                        let running = shared
                            .reload
                            .current()
                            .unwrap_or_else(|| started_with.clone());
                        let fixed = running.restart_only_changes(&c);
                        if c == *running {
                            metrics.config_loaded(true);
                            tracing::info!("configuration re-read: unchanged and valid");
                        } else if fixed.is_empty() {
                            shared.reload.publish(Arc::new(c));
                            metrics.config_loaded(true);
                            tracing::info!(
                                "configuration reloaded; it applies from the next batch"
                            );
                        } else {
                            metrics.config_loaded(false);
                            tracing::error!(
                                settings = %fixed.join(", "),
                                "configuration not reloaded: these settings change only at a restart; keeping the running configuration (restart to apply, or undo them and send SIGHUP again)"
                            );
                        }
                    }
                    Err(e) => {
                        metrics.config_loaded(false);
                        tracing::error!(error = %e, "configuration on disk is invalid; keeping the running one");
                    }
                }
            }
        })
    };

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
        let audit_seen = Arc::new(std::sync::atomic::AtomicU64::new(u64::MAX));
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
                    let (ws, store, metrics, seen) = (
                        ws.clone(),
                        store.clone(),
                        metrics.clone(),
                        audit_seen.clone(),
                    );
                    let _ = tokio::task::spawn_blocking(move || {
                        refresh_gauges(&ws, &store, &metrics);
                        count_review_outcomes(&store, &metrics, &seen);
                    })
                    .await;
                }
            }
        })
    };

    // Run until shutdown, or until a worker thread dies. This loop also feeds systemd's watchdog (when the
    // unit sets `WatchdogSec`): a ping every half interval while both pipeline threads are alive and the
    // scoring loop has come round within the stall limit.
    let watchdog = Watchdog::from_env(&config);
    let fatal: Option<DaemonError> = {
        let mut shutdown = std::pin::pin!(shutdown);
        let mut check = tokio::time::interval(Duration::from_millis(250));
        let mut last_ping: Option<Instant> = None;
        let mut stalled = false;
        loop {
            tokio::select! {
                _ = &mut shutdown => break None,
                _ = check.tick() => {
                    if worker_thread.is_finished() || ingest_thread.is_finished() {
                        break Some(DaemonError::Internal("a pipeline thread stopped".into()));
                    }
                    if let Some(w) = &watchdog {
                        let since_beat = Duration::from_millis(
                            crate::scoring::now_ms()
                                .saturating_sub(shared.heartbeat_ms.load(Ordering::SeqCst)),
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
    let _ = hup.await;
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

/// Sustained throughput through the whole path (claim, parse, score, decide, persist, notice), measured,
/// never asserted. Run it with `cargo run --release --example throughput` (or `labelweir bench daemon`
/// where the bench command wires it).
pub mod throughput {
    use std::sync::atomic::{AtomicUsize, Ordering};
    use std::sync::{Arc, Mutex};
    use std::time::{Duration, Instant};

    use super::{DaemonError, RunOptions};
    use crate::config::{Config, Workspace};
    use crate::scenario::{self, Plant};
    use crate::store::{
        AuditRecord, BatchRecord, BatchState, Outcome, PoolChange, PoolEntry, Store,
    };

    /// What to measure.
    #[derive(Debug, Clone)]
    pub struct Options {
        /// Batches dropped at once.
        pub batches: usize,
        /// Items per batch (each with the plant's 32 features).
        pub items: usize,
        /// Items already in the pool when the measurement starts.
        pub pool: usize,
        /// Seed for the generated items.
        pub seed: u64,
        /// Scratch folder (a fresh sub-folder is created and removed); default: the system temp dir.
        pub scratch: Option<std::path::PathBuf>,
        /// Engine settings for the run (default: the workspace defaults). A cheaper setting shows how the
        /// pipeline behaves around a faster scoring stage.
        pub model: Option<crate::model::ModelSettings>,
    }

    impl Default for Options {
        /// 30 batches of 1,000 items × 32 features against a pool of 100,000 (issue 3's case).
        fn default() -> Self {
            Self {
                batches: 30,
                items: 1000,
                pool: 100_000,
                seed: 3,
                scratch: None,
                model: None,
            }
        }
    }

    /// What was measured.
    #[derive(Debug, Clone)]
    pub struct Report {
        /// The options used.
        pub options: Options,
        /// Seconds to build the starting pool and its exact summary (not part of the rate).
        pub setup_seconds: f64,
        /// Seconds from dropping the batches to the last verdict.
        pub wall_seconds: f64,
        /// Items per second through the whole path (first claim to last verdict).
        pub items_per_second: f64,
        /// Items per second once the pipeline is full: from the verdict of batch `warmup` to the last one,
        /// counting the items settled in between.
        pub steady_items_per_second: f64,
        /// Batches left out of the steady rate (pipeline fill).
        pub warmup: usize,
        /// What scoring alone would allow: items per batch / mean `score` seconds.
        pub scoring_bound_items_per_second: f64,
        /// Mean seconds per batch for each stage ([`crate::metrics::STAGES`]).
        pub stage_mean_seconds: Vec<(String, f64)>,
        /// CPU milliseconds per batch between the drop and the last verdict: `("process", total)`, then
        /// per thread (`scoring`, `ingest`, `filing`, `runtime`, `store`), then `other` (the rest,
        /// mostly the short-lived `labelweir-absorb` threads). Empty where `/proc` is not readable.
        pub cpu_ms_per_batch: Vec<(String, f64)>,
        /// Median and 95th percentile of claim → settled, seconds.
        pub latency_p50_p95: (f64, f64),
        /// Verdict counts.
        pub outcomes: Vec<(String, usize)>,
    }

    impl std::fmt::Display for Report {
        fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
            let o = &self.options;
            writeln!(
                f,
                "daemon throughput: {} batches x {} items x 32 features, pool of {} items",
                o.batches, o.items, o.pool
            )?;
            writeln!(
                f,
                "  setup (pool + exact summary, not timed below): {:.1} s",
                self.setup_seconds
            )?;
            writeln!(
                f,
                "  wall time, first drop to last verdict:       {:.2} s",
                self.wall_seconds
            )?;
            writeln!(f, "  sustained rate:                               {:.0} items/s (target >= 20000 on 2 cores)", self.items_per_second)?;
            writeln!(
                f,
                "  steady rate (after the first {} verdicts):    {:.0} items/s",
                self.warmup, self.steady_items_per_second
            )?;
            writeln!(
                f,
                "  scoring alone would allow:                    {:.0} items/s (steady rate is {:.0}% of it)",
                self.scoring_bound_items_per_second,
                100.0 * self.steady_items_per_second / self.scoring_bound_items_per_second
            )?;
            writeln!(
                f,
                "  per batch, claim -> settled: p50 {:.3} s, p95 {:.3} s (includes queueing)",
                self.latency_p50_p95.0, self.latency_p50_p95.1
            )?;
            writeln!(
                f,
                "  mean seconds per batch by stage (thread; stages on different threads overlap):"
            )?;
            for (s, v) in &self.stage_mean_seconds {
                let thread = match s.as_str() {
                    "claim" | "parse" => "ingest",
                    "notice" => "filing",
                    _ => "scoring",
                };
                writeln!(f, "    {s:<8} {v:.4}  ({thread})")?;
            }
            if let Some((_, total)) = self.cpu_ms_per_batch.first() {
                let scoring = self
                    .cpu_ms_per_batch
                    .iter()
                    .find(|(k, _)| k == "scoring")
                    .map_or(f64::NAN, |(_, v)| *v);
                let parts: Vec<String> = self.cpu_ms_per_batch[1..]
                    .iter()
                    .map(|(k, v)| format!("{k} {v:.1}"))
                    .collect();
                writeln!(
                    f,
                    "  CPU ms per batch: {total:.1} in all ({})",
                    parts.join(", ")
                )?;
                // On an otherwise idle machine with two cores a batch needs at least max(scoring
                // thread, all CPU / 2) of wall time; wall time above that is waiting (other load on
                // the machine, or the pipeline stalling).
                let floor_ms = scoring.max(total / 2.0);
                writeln!(
                    f,
                    "  CPU bound on an idle 2-core machine:          {:.0} items/s (max of scoring thread, all CPU / 2 = {floor_ms:.1} ms per batch)",
                    o.items as f64 / floor_ms * 1000.0
                )?;
            }
            let outs: Vec<String> = self
                .outcomes
                .iter()
                .map(|(k, n)| format!("{k} {n}"))
                .collect();
            writeln!(f, "  verdicts: {}", outs.join(", "))
        }
    }

    /// CPU time from `/proc` (Linux): the process (user + system, every thread that ever ran, in
    /// `USER_HZ` ticks of 1/100 s) and each live thread by name (`schedstat`, nanoseconds on the CPU).
    #[derive(Debug, Clone)]
    struct CpuSnapshot {
        process_s: f64,
        threads: Vec<(String, f64)>,
    }

    impl CpuSnapshot {
        fn take() -> Option<Self> {
            let stat = std::fs::read_to_string("/proc/self/stat").ok()?;
            // Fields after the command name's closing parenthesis: state is field 3, utime 14, stime 15.
            let rest = &stat[stat.rfind(')')? + 1..];
            let f: Vec<&str> = rest.split_whitespace().collect();
            let ticks = f.get(11)?.parse::<f64>().ok()? + f.get(12)?.parse::<f64>().ok()?;
            let mut threads = Vec::new();
            for e in std::fs::read_dir("/proc/self/task").ok()?.flatten() {
                let p = e.path();
                let comm = std::fs::read_to_string(p.join("comm")).unwrap_or_default();
                let ns = std::fs::read_to_string(p.join("schedstat"))
                    .ok()
                    .and_then(|t| t.split_whitespace().next()?.parse::<f64>().ok())
                    .unwrap_or(0.0);
                threads.push((comm.trim().to_string(), ns / 1e9));
            }
            Some(Self {
                process_s: ticks / 100.0,
                threads,
            })
        }

        fn group(name: &str) -> &'static str {
            match name {
                "labelweir-scori" | "labelweir-scoring" => "scoring",
                "labelweir-inges" | "labelweir-ingest" => "ingest",
                "labelweir-filin" | "labelweir-filing" => "filing",
                n if n.starts_with("tokio") => "runtime",
                n if n.starts_with("sled") || n == "log flusher" => "store",
                _ => "other",
            }
        }

        /// `self − start`, in ms per batch: the process total first, then by thread group.
        fn per_batch_ms(&self, start: &Self, batches: usize) -> Vec<(String, f64)> {
            let per = |s: f64| 1000.0 * s / batches as f64;
            let total = self.process_s - start.process_s;
            let mut out = vec![("process".to_string(), per(total))];
            let mut named = 0.0;
            for g in ["scoring", "ingest", "filing", "runtime", "store"] {
                let sum = |snap: &Self| -> f64 {
                    snap.threads
                        .iter()
                        .filter(|(n, _)| Self::group(n) == g)
                        .map(|(_, s)| s)
                        .sum()
                };
                let d = (sum(self) - sum(start)).max(0.0);
                named += d;
                out.push((g.to_string(), per(d)));
            }
            out.push(("other".to_string(), per((total - named).max(0.0))));
            out
        }
    }

    fn csv(ids: &[String], y: &[usize], x: &ndarray::Array2<f64>) -> Result<Vec<u8>, DaemonError> {
        let mut out = Vec::new();
        crate::data::write_csv(
            &mut out,
            ("id", "label"),
            ids,
            &scenario::label_names(y),
            &scenario::feature_names(),
            x.view(),
        )
        .map_err(|e| DaemonError::Internal(e.to_string()))?;
        Ok(out)
    }

    /// Seed the pool through the store's own transitions (claim → verdict with pool items → settled).
    fn seed_pool(store: &Store, plant: &Plant, n: usize, seed: u64) -> Result<(), DaemonError> {
        let mut left = n;
        let mut k = 0;
        while left > 0 {
            let m = left.min(5000);
            let (x, y) = plant.sample(m, seed + k);
            let id = store.new_batch_id()?;
            let mut rec = BatchRecord::claimed(
                id.clone(),
                "seed",
                format!("seed-{k}.csv"),
                format!("{id}.csv"),
            );
            store.record_claim(&rec)?;
            rec.outcome = Some(Outcome::Accepted);
            rec.items = Some(m);
            let entry = PoolEntry {
                batch_id: id.clone(),
                vendor: "seed".into(),
                ids: scenario::item_ids(&format!("seed{k}"), m),
                labels: y,
                x: x.iter().copied().collect(),
                n_features: x.ncols(),
            };
            let rec = store.record_verdict(
                &rec,
                AuditRecord::new("bench", "verdict"),
                false,
                None,
                None,
                Some(entry),
            )?;
            store.transition(
                &rec.id,
                &[BatchState::Decided],
                BatchState::Accepted,
                PoolChange::None,
                vec![],
                |_| {},
            )?;
            left -= m;
            k += 1;
        }
        Ok(())
    }

    /// Build a scratch workspace, seed the pool, drop the batches at once into a running daemon, and
    /// measure. The scratch folder is removed afterwards.
    pub fn run(opts: &Options) -> Result<Report, DaemonError> {
        let base = opts.scratch.clone().unwrap_or_else(std::env::temp_dir);
        let root = base.join(format!(
            "labelweir-throughput-{}-{}",
            std::process::id(),
            chrono::Utc::now().timestamp_millis()
        ));
        std::fs::create_dir_all(&root).map_err(|e| DaemonError::Io(e.to_string()))?;
        let result = measure(opts, &root);
        let _ = std::fs::remove_dir_all(&root);
        result
    }

    fn measure(opts: &Options, root: &std::path::Path) -> Result<Report, DaemonError> {
        let t_setup = Instant::now();
        let plant = Plant::new(opts.seed);
        let (tx, ty) = plant.sample_per_class(10, opts.seed + 1);
        let trusted = root.join("trusted.csv");
        std::fs::write(&trusted, csv(&scenario::item_ids("t", ty.len()), &ty, &tx)?)
            .map_err(|e| DaemonError::Io(e.to_string()))?;
        let dir = root.join("ws");
        let vendors = vec!["bench".to_string()];
        crate::cli::init::create_workspace(&dir, &trusted, &vendors, "bench")
            .map_err(|e| DaemonError::Internal(format!("{e:#}")))?;
        let ws = Workspace::new(&dir);
        let text = std::fs::read_to_string(ws.config_file())
            .map_err(|e| DaemonError::Io(e.to_string()))?;
        let text = text
            .replace("quiet_period_ms = 2000", "quiet_period_ms = 0")
            .replace("enabled = true", "enabled = false")
            .replace("queue_capacity = 4", "queue_capacity = 8")
            .replace("min_free_bytes = 67108864", "min_free_bytes = 1");
        std::fs::write(ws.config_file(), text).map_err(|e| DaemonError::Io(e.to_string()))?;
        let mut config =
            Config::from_workspace(&dir).map_err(|e| DaemonError::Config(e.to_string()))?;
        if let Some(m) = &opts.model {
            // The feature map is fixed at init; everything else in [model] may vary per run.
            config.model = crate::model::ModelSettings {
                feature_map: config.model.feature_map,
                ..m.clone()
            };
        }
        {
            let store = Store::open_workspace(&dir, &config.store)?;
            seed_pool(&store, &plant, opts.pool, opts.seed + 100)?;
            let meta = store.workspace_meta()?;
            let mut state = crate::scoring::rebuild_pool(&store, &meta, &config)
                .map_err(|e| DaemonError::Internal(e.to_string()))?;
            crate::scoring::save_pool(&mut state, &store)?;
            store.flush()?;
        }
        let files: Vec<(String, Vec<u8>)> = (0..opts.batches)
            .map(|i| {
                let (x, y) = plant.sample(opts.items, opts.seed + 1000 + i as u64);
                Ok((
                    format!("batch-{i:04}.csv"),
                    csv(&scenario::item_ids(&format!("b{i}"), y.len()), &y, &x)?,
                ))
            })
            .collect::<Result<_, DaemonError>>()?;
        let setup_seconds = t_setup.elapsed().as_secs_f64();

        let total = opts.batches;
        let done = Arc::new(AtomicUsize::new(0));
        let records: Arc<Mutex<Vec<BatchRecord>>> = Arc::default();
        let idle = Arc::new(tokio::sync::Notify::new());
        let started: Arc<Mutex<Option<Instant>>> = Arc::default();
        // CPU time of the process and its threads at the drop and at the last verdict.
        let cpu: Arc<Mutex<(Option<CpuSnapshot>, Option<CpuSnapshot>)>> = Arc::default();
        let observer: crate::scoring::Observer = {
            let (done, idle, records, cpu) =
                (done.clone(), idle.clone(), records.clone(), cpu.clone());
            Arc::new(move |r: &BatchRecord| {
                if let Ok(mut v) = records.lock() {
                    v.push(r.clone());
                }
                if done.fetch_add(1, Ordering::SeqCst) + 1 == total {
                    if let Ok(mut c) = cpu.lock() {
                        c.1 = CpuSnapshot::take();
                    }
                    idle.notify_one();
                }
            })
        };
        let on_ready: Arc<dyn Fn(Option<std::net::SocketAddr>) + Send + Sync> = {
            let (inbox, started, cpu) = (ws.vendor_inbox("bench"), started.clone(), cpu.clone());
            let files = Mutex::new(Some(files));
            Arc::new(move |_| {
                let Some(files) = files.lock().ok().and_then(|mut f| f.take()) else {
                    return;
                };
                if let Ok(mut c) = cpu.lock() {
                    c.0 = CpuSnapshot::take();
                }
                if let Ok(mut s) = started.lock() {
                    *s = Some(Instant::now());
                }
                for (name, bytes) in files {
                    let tmp = inbox.join(format!(".{name}.part"));
                    if std::fs::write(&tmp, &bytes).is_ok() {
                        let _ = std::fs::rename(&tmp, inbox.join(&name));
                    }
                }
            })
        };
        let rt = tokio::runtime::Builder::new_multi_thread()
            .worker_threads(2)
            .enable_all()
            .build()
            .map_err(|e| DaemonError::Internal(e.to_string()))?;
        let wait = {
            let idle = idle.clone();
            async move { idle.notified().await }
        };
        let opts_run = RunOptions {
            listen: None,
            observer: Some(observer),
            on_ready: Some(on_ready),
        };
        rt.block_on(super::run(ws.clone(), config, opts_run, wait))?;
        let t0 = started
            .lock()
            .ok()
            .and_then(|s| *s)
            .unwrap_or_else(Instant::now);
        let recs = records.lock().map(|v| v.clone()).unwrap_or_default();
        let last = recs.iter().filter_map(|r| r.settled_at).max();
        let first_claim = recs.iter().map(|r| r.claimed_at).min();
        // Wall time from the drop (≈ first claim) to the last verdict.
        let wall = match (first_claim, last) {
            (Some(a), Some(b)) => (b - a).to_std().unwrap_or(Duration::ZERO).as_secs_f64(),
            _ => t0.elapsed().as_secs_f64(),
        }
        .max(1e-9);
        let items: usize = recs.iter().filter_map(|r| r.items).sum();
        // Steady state: leave out the first verdicts (the pipeline filling up, first-touch costs), then
        // rate = items settled after verdict `warmup` / time from that verdict to the last one.
        let mut settled: Vec<(chrono::DateTime<chrono::Utc>, usize)> = recs
            .iter()
            .filter_map(|r| r.settled_at.map(|t| (t, r.items.unwrap_or(0))))
            .collect();
        settled.sort_by_key(|(t, _)| *t);
        let warmup = (settled.len() / 5)
            .clamp(1, 5)
            .min(settled.len().saturating_sub(2));
        let steady = match (settled.get(warmup), settled.last()) {
            (Some((a, _)), Some((b, _))) if b > a => {
                let n: usize = settled[warmup + 1..].iter().map(|(_, n)| n).sum();
                n as f64 / (*b - *a).to_std().unwrap_or(Duration::ZERO).as_secs_f64()
            }
            _ => f64::NAN,
        };
        let mut lat: Vec<f64> = recs
            .iter()
            .filter_map(|r| {
                r.settled_at.map(|s| {
                    (s - r.claimed_at)
                        .to_std()
                        .unwrap_or(Duration::ZERO)
                        .as_secs_f64()
                })
            })
            .collect();
        lat.sort_by(f64::total_cmp);
        let pct = |p: f64| {
            lat.get(((lat.len() as f64 - 1.0) * p).round() as usize)
                .copied()
                .unwrap_or(f64::NAN)
        };
        let text = crate::metrics::get()
            .map(|m| m.render())
            .unwrap_or_default();
        let stage_mean_seconds: Vec<(String, f64)> = crate::metrics::STAGES
            .iter()
            .map(|s| {
                let find = |suffix: &str| {
                    text.lines()
                        .find(|l| {
                            l.starts_with(&format!(
                                "labelweir_batch_stage_duration_seconds_{suffix}{{stage=\"{s}\"}}"
                            ))
                        })
                        .and_then(|l| l.rsplit(' ').next())
                        .and_then(|v| v.parse::<f64>().ok())
                        .unwrap_or(0.0)
                };
                let (sum, count) = (find("sum"), find("count"));
                (
                    s.to_string(),
                    if count > 0.0 { sum / count } else { f64::NAN },
                )
            })
            .collect();
        let cpu_ms_per_batch = match cpu.lock().map(|c| c.clone()) {
            Ok((Some(a), Some(b))) => b.per_batch_ms(&a, recs.len().max(1)),
            _ => Vec::new(),
        };
        let score_mean = stage_mean_seconds
            .iter()
            .find(|(s, _)| s == "score")
            .map_or(f64::NAN, |(_, v)| *v);
        let mut outcomes: Vec<(String, usize)> = Vec::new();
        for r in &recs {
            let k = r.outcome.map_or("?", |o| o.as_str()).to_string();
            match outcomes.iter_mut().find(|(o, _)| *o == k) {
                Some((_, n)) => *n += 1,
                None => outcomes.push((k, 1)),
            }
        }
        Ok(Report {
            options: opts.clone(),
            setup_seconds,
            wall_seconds: wall,
            items_per_second: items as f64 / wall,
            steady_items_per_second: steady,
            warmup,
            scoring_bound_items_per_second: opts.items as f64 / score_mean,
            cpu_ms_per_batch,
            stage_mean_seconds,
            latency_p50_p95: (pct(0.5), pct(0.95)),
            outcomes,
        })
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn remote_filesystems_are_told_apart_from_local_ones() {
        // The one magic number rustix exports, against the table written from memory.
        assert_eq!(
            REMOTE_FILESYSTEMS[0].0,
            (rustix::fs::NFS_SUPER_MAGIC as u64) & 0xFFFF_FFFF
        );
        // The test machine's temporary folder is local (ext4, xfs, btrfs, tmpfs or overlayfs).
        let d = tempfile::tempdir().unwrap();
        assert_eq!(remote_filesystem(d.path()), None);
        assert_eq!(remote_filesystem(Path::new("/no/such/folder")), None);
    }

    #[test]
    fn watchdog_pings_every_half_interval_until_scoring_stalls() {
        // sd_watchdog_enabled(3): ping within WATCHDOG_USEC, recommended every half of it.
        let config = Config::default();
        let w = Watchdog::new(Duration::from_secs(30), &config);
        assert_eq!(w.every, Duration::from_secs(15));
        // Default time budget 30 s: stall limit 2 × 30 s + 60 s.
        assert_eq!(w.stall_limit, Duration::from_secs(120));
        let beat = Duration::from_millis(400);
        assert_eq!(w.due(None, beat), Ping::Now);
        assert_eq!(w.due(Some(Duration::from_secs(3)), beat), Ping::Wait);
        assert_eq!(w.due(Some(Duration::from_secs(15)), beat), Ping::Now);
        // A long batch (90 s without a heartbeat) still pings; past the limit nothing does.
        assert_eq!(
            w.due(Some(Duration::from_secs(20)), Duration::from_secs(90)),
            Ping::Now
        );
        assert_eq!(
            w.due(Some(Duration::from_secs(20)), Duration::from_secs(121)),
            Ping::Stalled
        );
    }
}
