//! The path of a batch, stage by stage: [`watch`] → [`ingest`] → [`score`] → [`verdict`] → [`file`].
//!
//! * [`watch`] turns filesystem events into "vendor folder dirty" marks on an [`IngestCtl`];
//! * [`ingest`] (thread `labelweir-ingest`) waits for marks, the rescan timer or a quiet-period deadline,
//!   lists, claims, reads, hashes and parses files, and sends [`Job`]s into the bounded channel behind a
//!   [`ScoringHandle`] (when the channel is full, claiming pauses: backpressure);
//! * [`score`] (thread `labelweir-scoring`) runs the engine and the policy and persists the verdict that
//!   [`verdict`] builds (pure: the updated record, the audit record, the pool entry);
//! * [`file`] (thread `labelweir-filing`) moves the file, writes the report and the vendor notice.
//!
//! The hand-over types live here, so no stage imports another; [`spawn`] wires the scoring and filing
//! threads together. The scoring worker in detail:
//!
//! It is the only place where CPU-heavy work runs, on a dedicated `std::thread` fed by a
//! bounded channel (never on the async runtime's threads).
//!
//! The ingest thread sends parsed (or rejected) batches as [`Job`]s; when the channel is full, `send`
//! blocks and claiming pauses (backpressure). For each job the worker, in order:
//!
//! 1. checks the idempotency key (vendor + SHA-256) — a re-delivery is a `duplicate`;
//! 2. **score**: runs the label-repair engine ([`crate::model::assess`], Zhang, Zhu & Wright, "Training Set
//!    Debugging Using Trusted Items", AAAI 2018) in incremental mode against the in-memory pool summary and
//!    the trusted set; a panic or error in the engine is caught and the batch is quarantined with reason
//!    `score_invalid` (held for a person, never silently accepted);
//! 3. **decide**: [`crate::policy::decide`] against the vendor's history;
//! 4. **persist**: one flushed store transaction with the verdict, audit record, idempotency key, new
//!    history and (accepted) the items in the pool; then **absorb**: the pool summary takes in the
//!    accepted batch before the next batch is scored (batches are scored strictly in arrival order, each
//!    against a summary that holds every batch accepted before it). The absorb itself is computed
//!    *speculatively*: while the engine scores batch `i` on this thread, a short-lived
//!    `labelweir-absorb` thread absorbs batch `i` into a copy of the same summary; an accepting verdict
//!    adopts the copy (the same computation on the same numbers as absorbing the stored pool entry), any
//!    other verdict drops it. So on two cores the absorb costs the scoring thread only the wait, if the
//!    copy is not ready when scoring ends;
//! 5. **notice**: hands the decided batch to the filing thread (`labelweir-filing`, bounded channel),
//!    where [`file::settle`] files it and writes the vendor notice while the worker scores the
//!    next batch. The verdict is already durable at hand-over; a filing interrupted by a crash is redone
//!    at the next start.
//!
//! Between jobs (and every half second when idle) it picks up pool changes made by reviewers
//! ([`ScoringHandle::pool_changed`]), trusted-set changes ([`ScoringHandle::trusted_changed`]), the result
//! of a background exact refresh of the pool summary, and saves the summary periodically. On shutdown it
//! finishes the job in hand, leaves queued jobs in `processing/` (the next start re-processes them), saves
//! the summary, and returns.

use std::collections::BTreeSet;
use std::sync::atomic::{AtomicBool, AtomicU64, AtomicUsize, Ordering};
use std::sync::mpsc::SyncSender;
use std::sync::{Arc, Condvar, Mutex};
use std::time::Instant;

use crate::data::Table;
use crate::store::{BatchRecord, RejectReason, StoreError};

pub mod features;
pub mod file;
pub mod ingest;
pub mod outbox;
pub mod recall;
pub mod score;
pub mod spot;
pub mod verdict;
pub mod watch;

use file::{FileError, Filer};
use score::Worker;

/// Called after every settled batch (the demo prints verdicts through it).
pub type Observer = Arc<dyn Fn(&BatchRecord) + Send + Sync>;

/// What the ingest thread hands to the worker.
#[derive(Debug)]
pub enum JobInput {
    /// Read and parsed.
    Parsed {
        /// The bytes that were hashed and parsed.
        bytes: Vec<u8>,
        /// Their SHA-256.
        sha256: String,
        /// The table.
        table: Table,
        /// Class index per item.
        labels: Vec<usize>,
    },
    /// Not a usable batch.
    Rejected {
        /// Why.
        reason: RejectReason,
        /// The bytes, if they were read.
        bytes: Option<Vec<u8>>,
        /// Their SHA-256, if read.
        sha256: Option<String>,
    },
}

/// One claimed batch on its way to a verdict.
#[derive(Debug)]
pub struct Job {
    /// Its record (state `Claimed`).
    pub record: BatchRecord,
    /// What ingest found.
    pub input: JobInput,
    /// The claimed file's stamp when its bytes were read (`None` when it was not read).
    pub stamp: Option<FileStamp>,
}

/// Size, modification time and inode of a claimed file, taken with `fstat` right after its bytes were
/// read. The scoring worker compares it with the file in `processing/` before recording a verdict: a
/// vendor's writer that kept its file open past the quiet period can still append after the claim (the
/// rename does not stop it), and a batch is judged on the whole file, never on a prefix.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct FileStamp {
    /// Size in bytes.
    pub size: u64,
    /// Modification time, seconds since the epoch.
    pub mtime_sec: i64,
    /// Modification time, nanoseconds within the second.
    pub mtime_nsec: i64,
    /// Inode number.
    pub ino: u64,
}

impl FileStamp {
    /// The stamp of the entry at `path` (not following a link), if it exists.
    pub fn of(path: &std::path::Path) -> Option<Self> {
        use std::os::unix::fs::MetadataExt;
        let m = std::fs::symlink_metadata(path).ok()?;
        Some(Self {
            size: m.size(),
            mtime_sec: m.mtime(),
            mtime_nsec: m.mtime_nsec(),
            ino: m.ino(),
        })
    }

    /// How long ago the file was last modified (zero for a modification time in the future).
    pub fn age(&self, now: std::time::SystemTime) -> std::time::Duration {
        let mtime = if self.mtime_sec >= 0 {
            std::time::UNIX_EPOCH
                + std::time::Duration::new(self.mtime_sec as u64, self.mtime_nsec.max(0) as u32)
        } else {
            std::time::UNIX_EPOCH
        };
        now.duration_since(mtime).unwrap_or_default()
    }
}

/// Reads a claimed batch again (its file changed after it was read): what ingest hands over for it now,
/// or `None` when the file is gone. Set by the composition root, so the scoring stage does not import the
/// ingest stage.
pub type Reread = Arc<dyn Fn(&BatchRecord) -> Option<(JobInput, Option<FileStamp>)> + Send + Sync>;

/// Flags and counters shared between the worker and the rest of the daemon.
#[derive(Debug, Default)]
pub struct Shared {
    /// Stop after the job in hand.
    pub cancel: AtomicBool,
    /// A reviewer changed the pool.
    pub pool_changed: AtomicBool,
    /// A reviewer changed the trusted set.
    pub trusted_changed: AtomicBool,
    /// Jobs waiting in the channel.
    pub queue_depth: AtomicUsize,
    /// Batches settled since start.
    pub settled: AtomicU64,
    /// Items in the pool summary.
    pub pool_items: AtomicU64,
    /// Accepted batches whose speculative absorb was adopted (the others went through [`score::catch_up`]).
    pub speculative_absorbs: AtomicU64,
    /// A configuration published by a SIGHUP reload (the worker, the filer, the ingest thread and the
    /// admin socket pick it up between batches).
    pub reload: crate::config::ConfigSlot,
    /// When the scoring loop last came round ([`now_ms`]): every 500 ms while idle, and after each batch.
    /// The systemd watchdog pings only while this is recent.
    pub heartbeat_ms: AtomicU64,
    /// A decided batch waits for a retry of its filing (`/readyz` answers 503 meanwhile).
    pub filing_failing: AtomicBool,
    /// The last claim failed on a daemon-side error (`/readyz` answers 503 until one succeeds).
    pub claims_failing: AtomicBool,
    /// The filing thread has ended (normally only at shutdown; before it, `/readyz` answers 503 and the
    /// daemon stops with an error).
    pub filing_stopped: AtomicBool,
}

/// Sets a flag when dropped: when the thread that holds it ends, by returning or by a panic.
struct SetOnDrop<'a>(&'a AtomicBool);

impl Drop for SetOnDrop<'_> {
    fn drop(&mut self) {
        self.0.store(true, Ordering::SeqCst);
    }
}

/// Milliseconds on a monotonic clock since the first call in this process (a wall-clock step, e.g. from
/// NTP, neither fakes nor hides a stalled scoring loop).
pub fn now_ms() -> u64 {
    static START: std::sync::OnceLock<Instant> = std::sync::OnceLock::new();
    START.get_or_init(Instant::now).elapsed().as_millis() as u64
}

/// The handle the rest of the daemon (and the admin server) holds.
#[derive(Clone, Debug)]
pub struct ScoringHandle {
    tx: SyncSender<Job>,
    /// Shared flags.
    pub shared: Arc<Shared>,
}

impl ScoringHandle {
    /// Queue a job, blocking while the channel is full. Gives the job back if the worker has stopped.
    pub fn submit(&self, job: Job) -> Result<(), Box<Job>> {
        self.shared.queue_depth.fetch_add(1, Ordering::SeqCst);
        self.tx.send(job).map_err(|e| {
            self.shared.queue_depth.fetch_sub(1, Ordering::SeqCst);
            Box::new(e.0)
        })
    }

    /// Tell the worker the pool changed outside it (a release or withdrawal went through
    /// `Store::transition`); it absorbs new entries, or rebuilds exactly after a removal.
    pub fn pool_changed(&self) {
        self.shared.pool_changed.store(true, Ordering::SeqCst);
    }

    /// Tell the worker the trusted set changed; it reloads it before the next batch.
    pub fn trusted_changed(&self) {
        self.shared.trusted_changed.store(true, Ordering::SeqCst);
    }
}

/// Errors that stop the worker (store failures; input problems never do).
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum ScoringError {
    /// Store error.
    #[error(transparent)]
    Store(#[from] StoreError),
    /// Filing error.
    #[error(transparent)]
    Filing(#[from] FileError),
    /// The engine rejected the workspace's own data (trusted set, pool).
    #[error("engine: {0}")]
    Model(String),
}

#[derive(Default)]
pub(crate) struct Wake {
    pub(crate) dirty: BTreeSet<String>,
    pub(crate) all: Option<&'static str>,
    pub(crate) stop: bool,
}

/// The ingest thread's wake-up channel (filled by the watcher and by shutdown): the hand-over from
/// [`watch`] to [`ingest`].
#[derive(Default)]
pub struct IngestCtl {
    pub(crate) wake: Mutex<Wake>,
    pub(crate) cv: Condvar,
}

impl IngestCtl {
    /// Mark a vendor folder dirty, or (`all`, with the reason for the metrics) every folder.
    pub fn mark(&self, vendor: Option<String>, all: Option<&'static str>) {
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

    /// Ask the ingest thread to stop.
    pub fn stop(&self) {
        if let Ok(mut w) = self.wake.lock() {
            w.stop = true;
        }
        self.cv.notify_all();
    }
}

/// A decided batch on its way to its folder: the hand-over from [`score`] to [`file`].
pub struct Filing {
    /// Its record, verdict recorded.
    pub record: BatchRecord,
    /// The bytes that were hashed, if they were read.
    pub bytes: Option<Vec<u8>>,
}

/// Start the worker thread. Returns its handle and the thread (which returns the final pool state).
pub fn spawn(
    mut worker: Worker,
) -> std::io::Result<(
    ScoringHandle,
    std::thread::JoinHandle<Result<(), ScoringError>>,
)> {
    // Publish the pool and trusted-set gauges before the daemon reports ready, not whenever the new
    // thread first runs (a scrape right after `/readyz` turned 200 would otherwise see 0).
    worker.publish_pool();
    worker.shared.heartbeat_ms.store(now_ms(), Ordering::SeqCst);
    let cap = worker.config.ingest.queue_capacity;
    let (tx, rx) = std::sync::mpsc::sync_channel::<Job>(cap);
    let handle = ScoringHandle {
        tx,
        shared: worker.shared.clone(),
    };
    // Filing (moving the file, the report, the notice: mostly waiting on fsync) runs on its own thread so
    // it overlaps the next batch's scoring. The verdict is already durable when a batch is handed over.
    let (ftx, frx) = std::sync::mpsc::sync_channel::<Filing>(8);
    let filer = Filer {
        ws: worker.ws.clone(),
        config: worker.config.clone(),
        store: worker.store.clone(),
        metrics: worker.metrics.clone(),
        observer: worker.observer.clone(),
        shared: worker.shared.clone(),
    };
    let filer_thread = std::thread::Builder::new()
        .name("labelweir-filing".into())
        .spawn(move || {
            let shared = filer.shared.clone();
            let _stopped = SetOnDrop(&shared.filing_stopped);
            filer.run(frx)
        })?;
    let thread = std::thread::Builder::new()
        .name("labelweir-scoring".into())
        .spawn(move || {
            let r = worker.run(rx, &ftx);
            // Closing the channel lets the filer drain what it holds and stop.
            drop(ftx);
            let f = filer_thread
                .join()
                .unwrap_or_else(|_| Err(FileError::Panicked));
            r.and(f.map_err(ScoringError::from))
        })?;
    Ok((handle, thread))
}
