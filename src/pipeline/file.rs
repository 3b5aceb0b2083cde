//! Actions after a verdict: the file goes to its folder, a report goes beside it, the vendor gets a notice,
//! and the store records the batch as settled.
//!
//! Order (see `store` for what is durable when): the verdict is already recorded (state `Decided`) when
//! [`settle`] runs; [`settle`] then
//!
//! 1. puts the bytes in the terminal folder: the in-memory copy the daemon hashed and parsed is written
//!    as a new daemon-owned file (temp → fsync → rename); without a copy (after a restart, or for entries
//!    that were never read) the entry itself is renamed. Quarantined files are made read-only (`0440`);
//!    symbolic links are removed (their target is never followed; the report says what it was);
//! 2. writes `<batch id>.report.json` beside it (quarantine and rejected): hash, vendor, scores, top
//!    suspects with proposed labels, reasons, timestamps. The terminal folder is fsynced **once** for
//!    steps 1 and 2, and only then is the claimed original unlinked from `processing/` (then fsynced), so
//!    after a crash the bytes are in `processing/`, or in the terminal folder, or durably in both (the
//!    redo then unlinks the original) — never in neither;
//! 3. writes the vendor notice into `notices/<vendor>/` through [`crate::notice`] (atomic; every notice says
//!    that a flag is a suspicion pending review, not proof);
//! 4. for a batch held by a stream rule, recalls the vendor's batches accepted since that rule's
//!    statistic was last 0 ([`super::recall::recall_accepted`]; idempotent);
//! 5. records the terminal state with an audit record naming the folder, the notice files and the
//!    recalled batches (flushed).
//!
//! Every step is idempotent, so the daemon redoes [`settle`] for batches it finds `Decided` at startup.

use std::fs;
use std::os::unix::fs::{MetadataExt, PermissionsExt};
use std::path::{Path, PathBuf};

use chrono::Utc;
use std::sync::atomic::Ordering;
use std::sync::mpsc::{Receiver, RecvTimeoutError};
use std::sync::Arc;
use std::time::{Duration, Instant};

use super::{Filing, Observer, Shared};
use crate::config::Config;
use crate::metrics::Metrics;
use crate::notice::{self, BatchRef, Notice, NoticeReason};
use crate::store::{AuditRecord, BatchRecord, BatchState, Outcome, PoolChange, Store, StoreError};
use crate::workspace::Workspace;

/// Errors while filing a batch (daemon-side; never about the input).
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum FileError {
    /// Filesystem error on a daemon folder.
    #[error("{op} {path}: {source}")]
    Io {
        /// What was being done.
        op: &'static str,
        /// The path.
        path: PathBuf,
        /// The cause.
        source: std::io::Error,
    },
    /// Store error.
    #[error(transparent)]
    Store(#[from] StoreError),
    /// The filing thread panicked (a bug).
    #[error("the filing thread panicked")]
    Panicked,
}

pub(crate) fn io_err(op: &'static str, path: &Path) -> impl FnOnce(std::io::Error) -> FileError {
    let path = path.to_path_buf();
    move |source| FileError::Io { op, path, source }
}

/// The report written beside quarantined and rejected files.
pub fn report_name(record: &BatchRecord) -> String {
    format!("{}.report.json", record.id)
}

/// Steps 1 and 2: the bytes (or the entry itself) and, for quarantine and rejected, the report go into
/// the terminal folder, which is fsynced once for both; only then is the claimed original unlinked and
/// `processing/` fsynced. Idempotent: an entry already gone from `processing/` was moved by an earlier
/// attempt (the report is rewritten, with the same content).
fn file_into_folder(
    ws: &Workspace,
    record: &BatchRecord,
    outcome: Outcome,
    bytes: Option<&[u8]>,
    report: Option<&[u8]>,
    max_bytes: u64,
) -> Result<(), FileError> {
    let src_dir = ws.processing();
    let src = src_dir.join(&record.file_name);
    let dst_dir = ws.folder(outcome.folder());
    let mode = super::outbox::mode_for_folder(outcome.folder());
    let report_name = report_name(record);
    let copied: Vec<u8>;
    let mut writes: Vec<(&str, &[u8])> = Vec::with_capacity(2);
    // What to do with the claimed entry once the terminal folder is durable.
    let mut unlink_src = false;
    let mut remove_dir = false;
    let mut touched_src_dir = true;
    match fs::symlink_metadata(&src) {
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => touched_src_dir = false, // already moved
        Err(e) => return Err(io_err("stat", &src)(e)),
        Ok(m) if m.file_type().is_symlink() => {
            // Never keep a link that points anywhere: remove it; the report records that it was one.
            fs::remove_file(&src).map_err(io_err("remove symlink", &src))?;
        }
        Ok(m) if m.file_type().is_file() && bytes.is_some() => {
            writes.push((record.file_name.as_str(), bytes.unwrap_or_default()));
            unlink_src = true;
        }
        Ok(m) => {
            let dst = dst_dir.join(&record.file_name);
            // No copy in hand (after a restart, or an entry that was never read): the entry is the
            // vendor's inode, whose owner, mode and other links are not ours to change. A regular file we
            // can read is copied into a file the daemon owns; only what cannot be read is moved as it is,
            // and changed only when it is ours alone.
            let copy = if m.is_file() {
                crate::fsx::read_untrusted(&src, max_bytes).ok()
            } else {
                None
            };
            if let Some(copy) = copy {
                copied = copy;
                writes.push((record.file_name.as_str(), copied.as_slice()));
                unlink_src = true;
            } else if fs::symlink_metadata(&dst).is_ok() {
                // A previous attempt got this far; the destination is complete (its folder is fsynced
                // below before the original goes).
                unlink_src = !m.is_dir();
                remove_dir = m.is_dir();
            } else {
                fs::rename(&src, &dst).map_err(io_err("move", &src))?;
                let ours = m.uid() == rustix::process::geteuid().as_raw() && m.nlink() == 1;
                if m.is_file() && ours {
                    fs::set_permissions(&dst, fs::Permissions::from_mode(mode))
                        .map_err(io_err("chmod", &dst))?;
                }
            }
        }
    }
    if let Some(r) = report {
        writes.push((report_name.as_str(), r));
    }
    // One fsync of the terminal folder covers the renamed entry, the copied bytes and the report.
    if !writes.is_empty() {
        crate::fsx::write_atomic_all(&dst_dir, &writes, Some(mode))
            .map_err(io_err("write", &dst_dir))?;
    } else if touched_src_dir {
        crate::fsx::sync_dir(&dst_dir).map_err(io_err("fsync", &dst_dir))?;
    }
    if remove_dir {
        fs::remove_dir_all(&src).map_err(io_err("remove", &src))?;
    } else if unlink_src {
        fs::remove_file(&src).map_err(io_err("remove", &src))?;
    }
    if touched_src_dir {
        crate::fsx::sync_dir(&src_dir).map_err(io_err("fsync", &src_dir))?;
    }
    Ok(())
}

/// The notice for a decided batch, built from its record alone (so it can be rebuilt after a restart).
pub fn notice_for(record: &BatchRecord) -> Option<Notice> {
    let outcome = record.outcome?;
    let batch = BatchRef {
        batch_id: record.id.clone(),
        vendor: record.vendor.clone(),
        file_name: Some(record.original_name.clone()),
        sha256: record.sha256.clone(),
        received_at: record.claimed_at,
        decided_at: record.decided_at.unwrap_or_else(Utc::now),
    };
    Some(match outcome {
        Outcome::Accepted | Outcome::Quarantined => {
            // Counts, never item ids: naming the flagged items of a batch would tell a poisoner which of
            // its items were seen, so it could resend the others (threat model in the README). The notice
            // has the same shape whether or not items were held back; only a reviewer names items.
            // Flagged items the label rules judged: items beyond the trusted set's reach are not
            // counted (a shift is not a finding about the labels).
            let flagged = record
                .decision
                .as_ref()
                .and_then(|d| d.signals.as_ref())
                .filter(|s| s.unlike_tail > 0.0)
                .map_or(record.scores.as_ref().map_or(0, |s| s.flagged_items), |s| {
                    s.judged_flagged()
                }) as u64;
            match &record.decision {
                Some(d) => {
                    let mut n = Notice::for_decision(
                        batch,
                        d,
                        record.scores.as_ref().map_or(f64::NAN, |s| s.repair_cost),
                        record.items.unwrap_or(0) as u64,
                        Vec::new(),
                    );
                    n.items_listed_total = flagged;
                    n
                }
                None => return None,
            }
        }
        Outcome::Rejected => {
            let r = record.reject.clone().unwrap_or(crate::store::RejectReason {
                code: "rejected".into(),
                detail: "rejected".into(),
                row: None,
                column: None,
            });
            Notice::malformed(
                batch,
                vec![NoticeReason {
                    code: r.code,
                    detail: r.detail,
                    row: r.row.map(|x| x as u64),
                    column: r.column,
                }],
            )
        }
        Outcome::Duplicate => {
            Notice::duplicate(batch, record.duplicate_of.as_deref().unwrap_or("unknown"))
        }
    })
}

/// File a decided batch (steps 1–4 above). `bytes` is the copy that was hashed and parsed, when the
/// caller has it. Returns the settled record. Calling it again for a settled batch does nothing.
pub fn settle(
    ws: &Workspace,
    config: &Config,
    store: &Store,
    metrics: Option<&Metrics>,
    record: &BatchRecord,
    bytes: Option<&[u8]>,
) -> Result<BatchRecord, FileError> {
    if record.state != BatchState::Decided {
        return Ok(record.clone());
    }
    let Some(outcome) = record.outcome else {
        return Ok(record.clone());
    };
    let report = (outcome != Outcome::Accepted).then(|| {
        let mut report = serde_json::to_value(record).unwrap_or_default();
        if let Some(obj) = report.as_object_mut() {
            obj.insert(
                "note".into(),
                serde_json::Value::String(notice::SUSPICION_SENTENCE.to_string()),
            );
        }
        serde_json::to_vec_pretty(&report).unwrap_or_default()
    });
    file_into_folder(
        ws,
        record,
        outcome,
        bytes,
        report.as_deref(),
        config.ingest.max_file_bytes,
    )?;
    let mut written = Vec::new();
    if let Some(n) = notice_for(record) {
        let dir = ws.notices(&record.vendor);
        let paths = notice::write_notice(&dir, &n, &config.notices)
            .map_err(io_err("write notice", &dir))?;
        for p in &paths {
            let name = p
                .file_name()
                .map(|s| s.to_string_lossy().into_owned())
                .unwrap_or_default();
            if let Some(m) = metrics {
                let fmt = if name.ends_with(".json") {
                    "json"
                } else if name.ends_with(".md") {
                    "markdown"
                } else {
                    "csv"
                };
                m.notice_written(&record.vendor, fmt);
            }
            written.push(name);
        }
    }
    // The experts' copy of an accepted batch's spot-check items; best effort (the store keeps them, and
    // `spot-check list` names them), so a full disk delays it without holding up the filing.
    let picked = outcome == Outcome::Accepted && record.spot_check.is_some();
    if let (Some(m), true) = (metrics, picked) {
        m.spot_check_picked(&record.vendor);
    }
    let spot_file = if picked {
        let names = store
            .workspace_meta()
            .map(|m| m.features)
            .unwrap_or_default();
        match super::spot::write_request(ws, config, &names, record) {
            Ok(p) => p.and_then(|p| p.file_name().map(|n| n.to_string_lossy().into_owned())),
            Err(e) => {
                tracing::warn!(batch_id = %record.id, error = %e, "writing the spot-check file failed; `labelweir spot-check list` still names the batch");
                None
            }
        }
    } else {
        None
    };
    // A hold by a stream rule reaches back over the vendor's batches accepted since the rule's statistic
    // was last 0 (`recall::recall_accepted`); before the batch is settled, so a crash redoes it.
    let recalled = if outcome == Outcome::Quarantined {
        super::recall::recall_accepted(ws, config, store, record)?
    } else {
        Vec::new()
    };
    if let Some(m) = metrics {
        m.recalled(&record.vendor, recalled.len() as u64);
    }
    let audit = AuditRecord::new("daemon", "filed")
        .batch(&record.id, &record.vendor)
        .outcome(outcome.as_str())
        .detail(serde_json::json!({
            "folder": outcome.folder(),
            "file": record.file_name,
            "notices": written,
            "recalled": recalled,
            "spot_check": spot_file,
        }));
    let settled = store.transition(
        &record.id,
        &[BatchState::Decided],
        outcome.settled_state(),
        PoolChange::None,
        vec![audit],
        |r| r.notices = written.clone(),
    )?;
    Ok(settled)
}
/// The filing thread: [`settle`], then metrics, log line and observer.
pub(crate) struct Filer {
    pub(crate) ws: Workspace,
    pub(crate) config: Arc<Config>,
    pub(crate) store: Store,
    pub(crate) metrics: Arc<Metrics>,
    pub(crate) observer: Option<Observer>,
    pub(crate) shared: Arc<Shared>,
}

/// Fault injection for the tests, in debug builds only: with `LABELWEIR_FAULT=filing-panic` the filing
/// thread panics on its first batch, as a bug would, so a test can show that a dead filing thread stops the
/// daemon (exit 70, the batch redone at the next start) instead of leaving it claiming batches it never
/// files. Release builds carry no such hook.
fn fault_hook() {
    #[cfg(debug_assertions)]
    if std::env::var("LABELWEIR_FAULT").as_deref() == Ok("filing-panic") {
        panic!("fault injected by LABELWEIR_FAULT=filing-panic");
    }
}

impl Filer {
    /// File batches until the channel closes. A batch whose filing fails (a daemon-side error: the disk,
    /// a folder) is logged, counted and kept for a retry every few seconds; it never stops the thread,
    /// and its verdict is already durable (the next start redoes it in any case). While any batch waits
    /// for a retry, [`Shared::filing_failing`] is set and `/readyz` answers 503.
    pub(crate) fn run(mut self, rx: Receiver<Filing>) -> Result<(), FileError> {
        let mut config_seen = 0;
        let mut pending: Vec<Filing> = Vec::new();
        loop {
            let next = match rx.recv_timeout(Duration::from_secs(if pending.is_empty() {
                3600
            } else {
                2
            })) {
                Ok(f) => Some(f),
                Err(RecvTimeoutError::Timeout) => None,
                Err(RecvTimeoutError::Disconnected) => break,
            };
            if let Some(c) = self.shared.reload.newer(&mut config_seen) {
                self.config = c;
            }
            let mut todo = std::mem::take(&mut pending);
            todo.extend(next);
            for f in todo {
                if let Some(f) = self.file_one(f) {
                    pending.push(f);
                }
            }
            self.shared
                .filing_failing
                .store(!pending.is_empty(), Ordering::SeqCst);
        }
        // What still fails at shutdown stays `Decided`; the next start files it.
        Ok(())
    }

    /// [`settle`] one batch, then metrics, log line and observer; gives the batch back on an error.
    fn file_one(&mut self, f: Filing) -> Option<Filing> {
        fault_hook();
        let t = Instant::now();
        let settled = match settle(
            &self.ws,
            &self.config,
            &self.store,
            Some(&self.metrics),
            &f.record,
            f.bytes.as_deref(),
        ) {
            Ok(s) => s,
            Err(e) => {
                self.metrics.error("file", "settle");
                let full = crate::store::storage_full_in(&e);
                tracing::error!(
                    batch_id = %f.record.id,
                    vendor = %f.record.vendor,
                    error = %e,
                    storage_full = full,
                    "{}",
                    if full {
                        "storage full: filing failed; the verdict is recorded and filing is retried"
                    } else {
                        "filing failed; the verdict is recorded and filing is retried"
                    }
                );
                return Some(f);
            }
        };
        self.metrics.stage("notice", t.elapsed());
        // A hold that recalled batches took items out of the pool: the scoring worker rebuilds its summary
        // (it catches up only when told, or at its hourly refresh).
        if settled.outcome == Some(Outcome::Quarantined)
            && settled.decision.as_ref().is_some_and(|d| d.recall > 0)
        {
            self.shared.pool_changed.store(true, Ordering::SeqCst);
        }
        let outcome = settled.outcome.map_or("rejected", |o| o.as_str());
        self.metrics.batch_outcome(
            &settled.vendor,
            outcome,
            settled.items.unwrap_or(0) as u64,
            settled.bytes.unwrap_or(0),
            chrono::Utc::now().timestamp_millis() as f64 / 1000.0,
        );
        self.shared.settled.fetch_add(1, Ordering::SeqCst);
        // Cost, damage and the reason codes, so a log reader sees why without opening the store.
        let reasons: Vec<&str> = match (&settled.decision, &settled.reject) {
            (Some(d), _) => d.reasons.iter().map(|r| r.code.as_str()).collect(),
            (None, Some(r)) => vec![r.code.as_str()],
            (None, None) => settled
                .duplicate_of
                .as_ref()
                .map_or(Vec::new(), |_| vec!["duplicate"]),
        };
        let num = |v: Option<f64>| {
            v.filter(|x| x.is_finite())
                .map_or("-".to_string(), |x| format!("{x:.4}"))
        };
        tracing::info!(
            batch_id = %settled.id,
            vendor = %settled.vendor,
            sha256 = settled.sha256.as_deref().unwrap_or(""),
            outcome,
            repair_cost = %num(settled.scores.as_ref().map(|s| s.repair_cost)),
            damage = %num(settled.scores.as_ref().map(|s| s.damage)),
            reason = %reasons.join(","),
            stage = "notice",
            "batch settled"
        );
        if let Some(obs) = &self.observer {
            obs(&settled);
        }
        None
    }
}
