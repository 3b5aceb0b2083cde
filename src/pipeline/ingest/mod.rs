//! The drop folder: finding, claiming, reading and parsing vendor files.
//!
//! # The delivery contract (for vendors)
//!
//! A vendor uploads into its own folder `inbox/<vendor>/` under a **temporary name** — a name starting with
//! `.`, or ending in `.part`, `.filepart` or `.tmp`, or anywhere under `inbox/<vendor>/tmp/` — and then
//! renames the file to its final `NAME.csv` or `NAME.jsonl`. Temporary names, the `tmp/` folder and
//! `*.done` marker files are never touched. For tools that cannot rename, a file is only picked up once
//! its modification time is older than `ingest.quiet_period_ms`. Everything else found in the folder is
//! claimed and, if it is not a usable batch, rejected with a written reason.
//!
//! # How a file is taken
//!
//! 1. **Find.** Filesystem events (notify, non-recursive, symlinks not followed) only mark a vendor
//!    folder dirty; the folder is then *listed*. A full rescan runs at startup and every
//!    `ingest.rescan_interval_secs`, so lost or coalesced events lose nothing.
//! 2. **Claim.** A [`BatchRecord`] in state `Claimed` (vendor, escaped original name, generated file name)
//!    is flushed to the store, then the entry is renamed with `renameat2(RENAME_NOREPLACE)` into the
//!    daemon-private `processing/<batch id>.<ext>`; both folders are fsynced. The vendor is the folder the
//!    file was found in. The original name is kept only as escaped metadata, never used as a path. A
//!    folder the daemon's account cannot move (a vendor-owned folder: the move would rewrite its `..`) is
//!    renamed in place to the hidden `.<batch id>.folder-not-a-batch` instead; either way it is rejected
//!    once, unread, as `folder_not_a_batch`.
//! 3. **Read.** The claimed entry is opened with `O_NOFOLLOW | O_NONBLOCK | O_CLOEXEC` and checked with
//!    `fstat` on the open descriptor: a regular file, one link, at most `ingest.max_file_bytes`. Its bytes
//!    are read (bounded) into memory and hashed (SHA-256); everything after this works on that copy. A
//!    file whose size or modification time changes while it is read is read again (a few times); the
//!    stamp taken with the bytes ([`FileStamp`]) goes with the job, and the scoring worker compares it with
//!    the file right before the verdict (a writer may go on appending after the claim).
//!    Symlinks are never followed (they are removed and reported), directories, FIFOs and devices are
//!    never read.
//! 4. **Parse** with [`crate::data::parse_table`] against the workspace's feature schema and classes.
//!
//! Any failure in 2–4 that is about the input becomes a [`RejectReason`]; the daemon never crashes on
//! input. Nothing here writes to the trusted set, and no path is built from vendor data.

use std::collections::HashSet;
use std::ffi::OsStr;
use std::fs::File;
use std::os::unix::ffi::OsStrExt;
use std::path::Path;
use std::sync::atomic::Ordering;
use std::sync::Arc;
use std::time::{Duration, Instant, SystemTime};

use rustix::fs::{Mode, OFlags, RenameFlags};

use super::{FileStamp, IngestCtl, Job, JobInput, ScoringHandle};
use crate::config::Config;
use crate::data::{self, Classes, Format, Table};
use crate::http::Readiness;
use crate::metrics::Metrics;
use crate::store::{BatchRecord, RejectReason, Store, StoreError, WorkspaceMeta};
use crate::text::{escape_name, is_unsafe_char};
use crate::workspace::{free_bytes, Workspace};

mod read;
pub use read::read_claimed;

fn reject(code: &str, detail: impl Into<String>) -> RejectReason {
    RejectReason {
        code: code.to_string(),
        detail: detail.into(),
        row: None,
        column: None,
    }
}

/// Suffixes of temporary upload names (ignored).
pub const TEMP_SUFFIXES: [&str; 3] = [".part", ".filepart", ".tmp"];
/// Suffix of optional completion markers (ignored).
pub const MARKER_SUFFIX: &str = ".done";
/// Name of the staging sub-folder inside a vendor folder (ignored).
pub const STAGING_DIR: &str = "tmp";

/// How a directory entry looked when listed (without following links).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum EntryKind {
    /// A regular file.
    File,
    /// A symbolic link (never followed).
    Symlink,
    /// A directory.
    Dir,
    /// A FIFO, socket or device.
    Special,
}

/// A file found in a vendor folder that is ready to be claimed.
#[derive(Debug, Clone)]
pub struct Candidate {
    /// The vendor (the folder it was found in).
    pub vendor: String,
    /// Its name in the folder (raw bytes; may be non-UTF-8).
    pub name: std::ffi::OsString,
    /// What it looked like.
    pub kind: EntryKind,
    /// Its modification time.
    pub mtime: SystemTime,
}

/// Result of listing one vendor folder.
#[derive(Debug, Default)]
pub struct Scan {
    /// Entries old enough to claim, oldest first.
    pub ready: Vec<Candidate>,
    /// Entries still inside their quiet period.
    pub waiting: usize,
    /// When the youngest waiting entry leaves its quiet period.
    pub next_ready: Option<SystemTime>,
    /// Entries counted as backlog (ready + waiting).
    pub backlog: usize,
    /// Age of the oldest backlog entry.
    pub oldest_age: Duration,
}

/// Whether a name is a temporary upload name, a marker, or otherwise never to be touched.
pub fn is_ignored_name(name: &OsStr, kind: EntryKind) -> bool {
    let b = name.as_bytes();
    if b.first() == Some(&b'.') {
        return true;
    }
    if kind == EntryKind::Dir && b == STAGING_DIR.as_bytes() {
        return true;
    }
    let lower = String::from_utf8_lossy(b).to_ascii_lowercase();
    TEMP_SUFFIXES.iter().any(|s| lower.ends_with(s)) || lower.ends_with(MARKER_SUFFIX)
}

/// List a vendor folder. `quiet` is the quiet period; entries younger than it wait.
pub fn scan_vendor(
    dir: &Path,
    vendor: &str,
    quiet: Duration,
    now: SystemTime,
) -> std::io::Result<Scan> {
    let mut scan = Scan::default();
    // A vendor folder replaced by a symbolic link is never followed (its files would be taken in as
    // that vendor's); the caller logs the error and leaves it alone.
    if !std::fs::symlink_metadata(dir)?.file_type().is_dir() {
        return Err(std::io::Error::other(
            "the vendor folder is not a directory (a symbolic link?); it is not followed",
        ));
    }
    for entry in std::fs::read_dir(dir)? {
        let entry = entry?;
        let ft = match entry.file_type() {
            Ok(ft) => ft,
            Err(_) => continue,
        };
        let kind = if ft.is_symlink() {
            EntryKind::Symlink
        } else if ft.is_dir() {
            EntryKind::Dir
        } else if ft.is_file() {
            EntryKind::File
        } else {
            EntryKind::Special
        };
        let name = entry.file_name();
        if is_ignored_name(&name, kind) {
            continue;
        }
        // lstat: the entry itself, never a link's target.
        let meta = match std::fs::symlink_metadata(entry.path()) {
            Ok(m) => m,
            Err(_) => continue,
        };
        let mtime = meta.modified().unwrap_or(now);
        // An mtime in the future (clock skew, or set on purpose) says nothing about ongoing writes;
        // treat it as quiet rather than let the file wait forever.
        let age = now.duration_since(mtime).unwrap_or(quiet);
        scan.backlog += 1;
        scan.oldest_age = scan.oldest_age.max(age);
        if age < quiet {
            scan.waiting += 1;
            let at = mtime + quiet;
            scan.next_ready = Some(scan.next_ready.map_or(at, |t: SystemTime| t.min(at)));
        } else {
            scan.ready.push(Candidate {
                vendor: vendor.to_string(),
                name,
                kind,
                mtime,
            });
        }
    }
    scan.ready
        .sort_by(|a, b| a.mtime.cmp(&b.mtime).then_with(|| a.name.cmp(&b.name)));
    Ok(scan)
}

/// Why a name is unsafe, if it is: not UTF-8, control or bidi characters, backslashes (a name that
/// reads as a path elsewhere), or longer than 200 bytes.
pub fn unsafe_name(name: &OsStr) -> Option<&'static str> {
    let Some(s) = name.to_str() else {
        return Some("the file name is not valid UTF-8");
    };
    if s.chars().any(is_unsafe_char) {
        return Some("the file name contains control or bidirectional-override characters");
    }
    if s.contains('\\') || s.contains("..") {
        return Some("the file name contains a backslash or '..' and reads like a path");
    }
    if s.len() > 200 {
        return Some("the file name is longer than 200 bytes");
    }
    None
}

/// The file's format from its name, if the name is one the contract allows.
pub fn format_of(name: &OsStr) -> Option<Format> {
    Path::new(name)
        .extension()
        .and_then(|e| e.to_str())
        .and_then(Format::from_extension)
}

/// A claimed entry.
#[derive(Debug, Clone)]
pub struct Claimed {
    /// Its record (state `Claimed`).
    pub record: BatchRecord,
}

/// Errors that stop claiming (not input problems).
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum IngestError {
    /// Filesystem error on a daemon folder.
    #[error("{op} {path}: {source}")]
    Io {
        /// What was being done.
        op: &'static str,
        /// The path (daemon folders only, never vendor names).
        path: String,
        /// The cause.
        source: std::io::Error,
    },
    /// Store error.
    #[error(transparent)]
    Store(#[from] StoreError),
    /// The wake-up lock was poisoned by a panic (a bug).
    #[error("ingest lock poisoned")]
    Poisoned,
}

/// Claim a candidate: record it, then rename it into `processing/` without replacing anything.
/// Returns `None` if the entry vanished before the rename (nothing recorded).
pub fn claim(ws: &Workspace, store: &Store, c: &Candidate) -> Result<Option<Claimed>, IngestError> {
    let id = store.new_batch_id()?;
    let ext = match (c.kind, format_of(&c.name)) {
        (EntryKind::File, Some(f)) if unsafe_name(&c.name).is_none() => f.extension(),
        (EntryKind::Dir, _) => "dir",
        _ => "bin",
    };
    let file_name = format!("{id}.{ext}");
    let mut record = BatchRecord::claimed(
        id.clone(),
        &c.vendor,
        escape_name(&c.name),
        file_name.clone(),
    );
    record.discovered_at = c.mtime.into();
    store.record_claim(&record)?;
    let from = ws.vendor_inbox(&c.vendor);
    let to = ws.processing();
    let io = |op, path: &Path| {
        let path = path.display().to_string();
        move |source| IngestError::Io { op, path, source }
    };
    // The source folder without following a link: a vendor folder swapped for a link after the listing
    // fails here instead of lending its files to this vendor.
    let from_dir = rustix::fs::open(
        &from,
        OFlags::RDONLY | OFlags::DIRECTORY | OFlags::NOFOLLOW | OFlags::CLOEXEC,
        Mode::empty(),
    )
    .map(File::from)
    .map_err(|e| IngestError::Io {
        op: "open",
        path: from.display().to_string(),
        source: e.into(),
    })?;
    let to_dir = File::open(&to).map_err(io("open", &to))?;
    match rustix::fs::renameat_with(
        &from_dir,
        c.name.as_os_str(),
        &to_dir,
        file_name.as_str(),
        RenameFlags::NOREPLACE,
    ) {
        Ok(()) => {}
        Err(e) if e == rustix::io::Errno::NOENT => {
            store.forget_claim(&id)?;
            return Ok(None);
        }
        // A folder owned by the vendor cannot be moved to another parent by the service user (the move
        // rewrites its `..`, which needs write permission on the folder itself). Renamed in place under a
        // hidden name instead (only the daemon-owned vendor folder changes), it is out of the listings and
        // is still rejected once, with a notice.
        Err(_) if c.kind == EntryKind::Dir => {
            let hidden = folder_left_in_place(&id);
            if let Err(e) = rustix::fs::renameat_with(
                &from_dir,
                c.name.as_os_str(),
                &from_dir,
                hidden.as_str(),
                RenameFlags::NOREPLACE,
            ) {
                store.forget_claim(&id)?;
                if e == rustix::io::Errno::NOENT {
                    return Ok(None);
                }
                return Err(IngestError::Io {
                    op: "claim (rename a folder in place)",
                    path: from.display().to_string(),
                    source: e.into(),
                });
            }
        }
        Err(e) => {
            store.forget_claim(&id)?;
            return Err(IngestError::Io {
                op: "claim (rename into processing/)",
                path: from.display().to_string(),
                source: e.into(),
            });
        }
    }
    drop((from_dir, to_dir));
    crate::fsx::sync_dir(&to).map_err(io("fsync", &to))?;
    crate::fsx::sync_dir(&from).map_err(io("fsync", &from))?;
    Ok(Some(Claimed { record }))
}

/// The hidden name a folder found in a vendor folder gets when it cannot be moved into `processing/`
/// (it stays in the vendor folder under this name, which listings skip).
pub fn folder_left_in_place(batch_id: &str) -> String {
    format!(".{batch_id}.folder-not-a-batch")
}

/// Whether a claimed entry was a folder (its generated name ends in `.dir`).
pub fn is_claimed_folder(record: &BatchRecord) -> bool {
    record.file_name.ends_with(".dir")
}

/// Why a folder found in a vendor folder is rejected, and where it went.
pub fn folder_reason(ws: &Workspace, record: &BatchRecord) -> RejectReason {
    let moved = std::fs::symlink_metadata(ws.processing().join(&record.file_name)).is_ok();
    let whereabouts = if moved {
        "it was moved out of your folder".to_string()
    } else {
        format!(
            "it could not be moved and was renamed in your folder to {}; remove it",
            folder_left_in_place(&record.id)
        )
    };
    reject(
        "folder_not_a_batch",
        format!(
            "a folder is not a batch: deliver each batch as one file directly in your folder ({whereabouts})"
        ),
    )
}

/// A parsed batch ready for scoring.
#[derive(Debug)]
pub struct Parsed {
    /// The table.
    pub table: Table,
    /// Class index per item.
    pub labels: Vec<usize>,
}

/// Why a claimed entry whose generated name has no batch extension was not a batch: an unsafe original
/// name (its escaped form shows `\\x..` or `\\u{..}` escapes, a backslash or `..`), or an unsupported type.
pub fn name_problem(escaped_original: &str) -> RejectReason {
    if escaped_original.contains("\\x")
        || escaped_original.contains("\\u{")
        || escaped_original.contains("..")
        || escaped_original.chars().count() > 200
    {
        reject(
            "unsafe_name",
            "the file name is not valid UTF-8, contains control, bidirectional-override or path characters, or is too long; rename it",
        )
    } else {
        reject(
            "unsupported_type",
            "the file name does not end in .csv, .jsonl or .parquet",
        )
    }
}

/// Where a batch's features come from.
pub enum FeatureSource<'a> {
    /// From the delivered file itself (its feature columns must be the workspace's schema).
    InFile,
    /// From the workspace's feature table (by-reference mode): the file is `id,label` only and every id
    /// must have a row in the table.
    Table(&'a Store),
}

/// Parse the bytes against the schema and classes.
///
/// In by-reference mode ([`FeatureSource::Table`]) a delivery is `id,label` only: a file that carries any
/// other column is **refused** (reason `parse_error`, naming the column; a vendor file never supplies or
/// overrides a feature), and a file with ids the feature table does not have is **refused whole** (reason
/// `unknown_ids`, with the count and the first ten ids by row), so a batch is judged on all of its items
/// or not at all.
pub fn parse_claimed(
    format: Format,
    escaped_name: &str,
    bytes: &[u8],
    config: &Config,
    features: &[String],
    classes: &Classes,
    source: &FeatureSource<'_>,
) -> Result<Parsed, RejectReason> {
    let opts = config.table_options();
    let from_data = |e: data::DataError| RejectReason {
        code: "parse_error".into(),
        detail: e.to_string(),
        row: e.row,
        column: e.column.clone(),
    };
    let table = match source {
        FeatureSource::InFile => {
            data::parse_table(bytes, format, escaped_name, &opts, Some(features))
        }
        FeatureSource::Table(_) => data::parse_labels(bytes, format, escaped_name, &opts),
    }
    .map_err(from_data)?;
    let labels = table.class_indices(classes).map_err(|e| RejectReason {
        code: "unknown_label".into(),
        ..from_data(e)
    })?;
    let table = match source {
        FeatureSource::InFile => table,
        FeatureSource::Table(store) => {
            let lookup = store.feature_lookup().map_err(|e| {
                reject(
                    "unreadable",
                    format!("the feature table could not be read: {e}"),
                )
            })?;
            data::join_features(table, features, lookup).map_err(|e| RejectReason {
                code: "unknown_ids".into(),
                detail: format!(
                    "{escaped_name}: {e}; only items whose features the team has registered can be delivered"
                ),
                row: e.first.first().map(|(r, _)| *r),
                column: Some(opts.id_column.clone()),
            })?
        }
    };
    Ok(Parsed { table, labels })
}

/// Read, hash and parse a claimed entry (`processing/<file_name>`) into a job input for the scoring
/// worker, with the file's stamp when its bytes were read. `None` when the entry is gone (nothing to do;
/// the caller forgets the claim).
pub fn prepare(
    ws: &Workspace,
    config: &Config,
    features: &[String],
    classes: &Classes,
    record: &BatchRecord,
    source: &FeatureSource<'_>,
) -> Option<(JobInput, Option<FileStamp>)> {
    if is_claimed_folder(record) {
        let input = JobInput::Rejected {
            reason: folder_reason(ws, record),
            bytes: None,
            sha256: None,
        };
        return Some((input, None));
    }
    let path = ws.processing().join(&record.file_name);
    let read = match read_claimed(&path, config.ingest.max_file_bytes) {
        Ok(r) => r,
        Err(Ok(reason)) => {
            let input = JobInput::Rejected {
                reason,
                bytes: None,
                sha256: None,
            };
            return Some((input, None));
        }
        Err(Err(e)) if e.kind() == std::io::ErrorKind::NotFound => return None,
        Err(Err(e)) => {
            let input = JobInput::Rejected {
                reason: reject("unreadable", format!("the file could not be read: {e}")),
                bytes: None,
                sha256: None,
            };
            return Some((input, None));
        }
    };
    let stamp = Some(read.stamp);
    let format = format_of(OsStr::new(&record.file_name));
    let parsed = match format {
        Some(f) => parse_claimed(
            f,
            &record.original_name,
            &read.bytes,
            config,
            features,
            classes,
            source,
        ),
        None => Err(name_problem(&record.original_name)),
    };
    let input = match parsed {
        Ok(p) => JobInput::Parsed {
            bytes: read.bytes,
            sha256: read.sha256,
            table: p.table,
            labels: p.labels,
        },
        Err(reason) => JobInput::Rejected {
            reason,
            bytes: Some(read.bytes),
            sha256: Some(read.sha256),
        },
    };
    Some((input, stamp))
}

/// The ingest thread (`labelweir-ingest`): waits for marks on its [`IngestCtl`], the rescan timer or a
/// quiet-period deadline; lists vendor folders, claims ready files, reads and parses them, and submits each
/// as a [`Job`] to the scoring worker.
pub struct Ingest {
    pub(crate) ws: Workspace,
    pub(crate) config: Arc<Config>,
    pub(crate) store: Store,
    pub(crate) meta: WorkspaceMeta,
    pub(crate) classes: Classes,
    pub(crate) metrics: Arc<Metrics>,
    pub(crate) ready: Arc<Readiness>,
    pub(crate) scoring: ScoringHandle,
    pub(crate) ctl: Arc<IngestCtl>,
    pub(crate) seen: HashSet<(String, std::ffi::OsString)>,
    pub(crate) claim_backoff: ClaimBackoff,
}

/// The wait before a failed claim is tried again: 0.5 s, doubling after each failure in a row, at most
/// 30 s; back to 0.5 s after a claim succeeds.
#[derive(Debug, Default)]
pub struct ClaimBackoff {
    failures: u32,
}

impl ClaimBackoff {
    /// The first wait.
    pub const FIRST: Duration = Duration::from_millis(500);
    /// The longest wait.
    pub const MAX: Duration = Duration::from_secs(30);

    /// A claim failed: the wait before the next try.
    pub fn failed(&mut self) -> Duration {
        let wait = Self::FIRST
            .saturating_mul(1u32 << self.failures.min(16))
            .min(Self::MAX);
        self.failures = self.failures.saturating_add(1);
        wait
    }

    /// A claim succeeded.
    pub fn succeeded(&mut self) {
        self.failures = 0;
    }
}

enum Flow {
    Continue,
    Stop,
}

impl Ingest {
    fn stopping(&self) -> bool {
        self.ctl.wake.lock().map(|w| w.stop).unwrap_or(true)
    }

    fn submit(&self, record: BatchRecord, input: JobInput, stamp: Option<FileStamp>) -> Flow {
        match self.scoring.submit(Job {
            record,
            input,
            stamp,
        }) {
            Ok(()) => {
                self.metrics
                    .queue_depth(self.scoring.shared.queue_depth.load(Ordering::SeqCst));
                Flow::Continue
            }
            Err(_) => Flow::Stop, // the worker stopped: the claim stays in processing/ for the next start
        }
    }

    fn process_claimed(&self, record: BatchRecord) -> Result<Flow, IngestError> {
        let t = Instant::now();
        let source = if self.store.feature_schema()?.is_some() {
            FeatureSource::Table(&self.store)
        } else {
            FeatureSource::InFile
        };
        let input = prepare(
            &self.ws,
            &self.config,
            &self.meta.features,
            &self.classes,
            &record,
            &source,
        );
        self.metrics.stage("parse", t.elapsed());
        match input {
            Some((input, stamp)) => Ok(self.submit(record, input, stamp)),
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

    /// Import the team's files from `features/incoming/` (by-reference mode only), before the vendors'
    /// folders are taken, so a batch delivered after its features were dropped in finds them.
    fn take_feature_files(&self) -> Result<(), IngestError> {
        if self.store.feature_schema()?.is_none() {
            return Ok(());
        }
        super::features::take_incoming(&self.ws, &self.store, &self.config, SystemTime::now())?;
        Ok(())
    }

    fn scan_unknown(&self) {
        let known: HashSet<&str> = self.config.vendors.iter().map(|s| s.as_str()).collect();
        let mut unknown = 0;
        if let Ok(rd) = std::fs::read_dir(self.ws.inbox()) {
            for e in rd.flatten() {
                let name = e.file_name();
                if !known.contains(name.to_string_lossy().as_ref()) {
                    unknown += 1;
                    tracing::warn!(entry = %escape_name(&name), "inbox/ entry is not a configured vendor; ignored");
                }
            }
        }
        self.metrics.unknown_inbox_folders(unknown);
    }

    /// Scan one vendor and take its ready files. Returns when the next waiting file becomes ready.
    fn scan_and_take(&mut self, vendor: &str) -> Result<(Flow, Option<SystemTime>), IngestError> {
        let quiet = Duration::from_millis(self.config.ingest.quiet_period_ms);
        let dir = self.ws.vendor_inbox(vendor);
        let scan = match scan_vendor(&dir, vendor, quiet, SystemTime::now()) {
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
            let claimed = match claim(&self.ws, &self.store, &c) {
                Ok(Some(c)) => c,
                Ok(None) => continue,
                Err(IngestError::Store(e)) => return Err(e.into()),
                Err(e) => {
                    let full = crate::store::storage_full_in(&e);
                    let wait = self.claim_backoff.failed();
                    tracing::error!(
                        vendor,
                        error = %e,
                        storage_full = full,
                        retry_in_ms = wait.as_millis() as u64,
                        "{}",
                        if full { "storage full: claim failed" } else { "claim failed" }
                    );
                    self.metrics.error("claim", "rename");
                    self.scoring
                        .shared
                        .claims_failing
                        .store(true, Ordering::SeqCst);
                    // Retried with backoff, not only at the next rescan.
                    return Ok((Flow::Continue, Some(SystemTime::now() + wait)));
                }
            };
            self.claim_backoff.succeeded();
            self.scoring
                .shared
                .claims_failing
                .store(false, Ordering::SeqCst);
            self.metrics.stage("claim", t.elapsed());
            tracing::info!(batch_id = %claimed.record.id, vendor, original_name = %claimed.record.original_name, stage = "claim", "claimed");
            if let Flow::Stop = self.process_claimed(claimed.record)? {
                return Ok((Flow::Stop, None));
            }
        }
        Ok((Flow::Continue, scan.next_ready))
    }

    /// Run until asked to stop: first the batches recovered from `processing/`, then the scan loop.
    pub fn run(mut self, recovered: Vec<BatchRecord>) -> Result<(), IngestError> {
        // The first full listing (backlog gauges, unknown folders, disk) makes the daemon ready; taking the
        // backlog, which may be long, happens after.
        let quiet = Duration::from_millis(self.config.ingest.quiet_period_ms);
        for v in &self.config.vendors {
            if let Ok(scan) = scan_vendor(&self.ws.vendor_inbox(v), v, quiet, SystemTime::now()) {
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
                let mut w = self.ctl.wake.lock().map_err(|_| IngestError::Poisoned)?;
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
                        .map_err(|_| IngestError::Poisoned)?;
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
                self.take_feature_files()?;
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

#[cfg(test)]
mod tests {
    use super::*;
    use std::ffi::OsString;
    use std::os::unix::ffi::OsStringExt;

    proptest::proptest! {
        /// Any byte string as a name: escaping never panics and never lets a control or bidi character
        /// through, and a name with one of them, a backslash, or invalid UTF-8 is reported unsafe.
        #[test]
        fn escaping_any_name_is_printable(bytes in proptest::collection::vec(proptest::num::u8::ANY, 1..80)) {
            let name = OsString::from_vec(bytes.clone());
            let e = escape_name(&name);
            proptest::prop_assert!(!e.chars().any(is_unsafe_char));
            let s = String::from_utf8(bytes);
            let risky = match &s {
                Err(_) => true,
                Ok(s) => s.chars().any(|c| is_unsafe_char(c) || c == '\\'),
            };
            if risky {
                proptest::prop_assert!(unsafe_name(&name).is_some());
            }
        }
    }

    #[test]
    fn claim_backoff_doubles_from_half_a_second_to_thirty() {
        let mut b = ClaimBackoff::default();
        let waits: Vec<u64> = (0..9).map(|_| b.failed().as_millis() as u64).collect();
        assert_eq!(
            waits,
            [500, 1000, 2000, 4000, 8000, 16000, 30000, 30000, 30000]
        );
        b.succeeded();
        assert_eq!(b.failed(), ClaimBackoff::FIRST);
    }

    #[test]
    fn temporary_names_are_ignored() {
        for n in [
            ".x.csv",
            "a.csv.part",
            "a.CSV.PART",
            "b.filepart",
            "c.tmp",
            "d.csv.done",
        ] {
            assert!(is_ignored_name(OsStr::new(n), EntryKind::File), "{n}");
        }
        assert!(is_ignored_name(OsStr::new("tmp"), EntryKind::Dir));
        assert!(!is_ignored_name(OsStr::new("tmp"), EntryKind::File));
        assert!(!is_ignored_name(OsStr::new("batch.csv"), EntryKind::File));
    }

    #[test]
    fn hostile_names_are_flagged_and_escaped() {
        let bad = OsString::from_vec(vec![b'a', 0xff, b'.', b'c', b's', b'v']);
        assert!(unsafe_name(&bad).is_some());
        assert_eq!(escape_name(&bad), "a\\xff.csv");
        let ctl = OsStr::new("evil\u{1b}[31m.csv");
        assert!(unsafe_name(ctl).is_some());
        assert!(!escape_name(ctl).contains('\u{1b}'));
        assert!(unsafe_name(OsStr::new("..\\..\\etc\\passwd.csv")).is_some());
        assert!(unsafe_name(OsStr::new("x\u{202e}vsc.exe")).is_some());
        assert!(unsafe_name(OsStr::new("week 12 batch.csv")).is_none());
    }
}
