//! The embedded store: batch states, the audit trail, the trusted set, the accepted pool, vendor history.
//!
//! One sled database (`DIR/state/`, pinned `sled = "=0.34.7"`) per process. sled takes a file lock, so
//! while the daemon runs, review commands reach the store through the daemon's admin socket; when the daemon
//! is stopped they open it directly with [`Store::open`] (which fails with [`StoreError::Locked`] if another
//! process holds it).
//!
//! # What is durable when
//!
//! * Every method that changes state runs **one multi-tree transaction and flushes it** (sled
//!   `TransactionalTree::flush`, an fsync of sled's log) before it returns `Ok`. Callers perform the side
//!   effect a transition enables (renaming a file, writing a notice) only after that `Ok`. No I/O happens
//!   inside transaction closures (they may be retried).
//! * A batch is recorded as [`BatchState::Claimed`] *before* its file is renamed into `processing/`, so
//!   the vendor and original name survive a crash; at startup the daemon reconciles every non-terminal
//!   record with the folders (see `daemon::reconcile`).
//! * The verdict is recorded ([`BatchState::Decided`]) in the same transaction as everything it implies:
//!   the audit record, the idempotency key (`by_hash`), the vendor's history, and the accepted items in
//!   the pool. Moving the file and writing the notice come after; the terminal state
//!   ([`BatchState::Accepted`] and friends) is recorded once both are done. Redoing them after a crash is
//!   idempotent, and the verdict's audit record is written exactly once.
//! * The pool tree is the truth about the accepted pool. The pool *summary* is a cache saved every
//!   `pool.summary_save_interval_secs` and at shutdown with a watermark (the last pool sequence number it
//!   covers) and the pool epoch (bumped whenever items leave the pool); on restart the daemon absorbs the
//!   entries past the watermark, or rebuilds the summary exactly when the epoch changed.
//! * sled's background flush (`store.flush_every_ms`) stays on as insurance.
//!
//! # Trees
//!
//! `batches` (batch id → [`BatchRecord`]), `by_hash` (`vendor \0 sha256` → batch id), `audit`
//! (big-endian `generate_id` → [`AuditRecord`], append-only), `trusted` (item id → [`TrustedItem`]),
//! `pool` (big-endian sequence → [`PoolEntry`], binary), `pool_index` (batch id → sequence), `assessments`
//! (batch id → the engine's full report, kept for quarantined batches), `vendor_history` (vendor →
//! `policy::VendorHistory`), `summary` (the saved pool summary), `meta` (schema version, the workspace's
//! classes, feature schema and feature map, the pool epoch). Every value carries a version number.

use std::path::{Path, PathBuf};

use chrono::{DateTime, Utc};
use serde::de::DeserializeOwned;
use serde::{Deserialize, Serialize};
use sled::transaction::{ConflictableTransactionError, TransactionError, TransactionalTree};
use sled::Transactional;

use crate::config::StoreSettings;
use crate::model::{Assessment, FeatureMap, PoolSummary};
use crate::policy::VendorHistory;

pub mod batch;
mod error;
mod features;
mod pool;
mod trusted;

pub use batch::{
    AuditRecord, BatchRecord, BatchScores, BatchState, HeldItem, HeldState, HeldWhy, Outcome,
    Recall, RejectReason, SpotAnswers, SpotCheck, SpotItem, Suspect,
};
pub use error::{storage_full_in, StoreError};
pub use features::{FeatureImport, PoolImport, Provenance, POOL_IMPORT_CHUNK};

/// Version of the store layout; a store with another version is refused.
pub const SCHEMA_VERSION: u32 = 1;
/// Version written into every record type defined here.
pub const RECORD_VERSION: u32 = 1;

/// A trusted (expert-verified) item with its provenance. Nothing from the inbox ever writes these.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct TrustedItem {
    /// Record version.
    pub version: u32,
    /// Item id (unique in the trusted set).
    pub id: String,
    /// Verified class name (one of the workspace's classes).
    pub label: String,
    /// Raw features in the workspace's schema order.
    pub features: Vec<f64>,
    /// Confidence weight (1.0 when unknown).
    pub weight: f64,
    /// Who verified it.
    pub added_by: String,
    /// When it entered the trusted set.
    pub added_at: DateTime<Utc>,
    /// Where it came from (a file name, a review of batch X, ...).
    pub source: String,
}

/// Accepted items of one batch, as stored in the pool.
#[derive(Debug, Clone, PartialEq)]
pub struct PoolEntry {
    /// The batch they came from.
    pub batch_id: String,
    /// Its vendor.
    pub vendor: String,
    /// Item ids.
    pub ids: Vec<String>,
    /// Class indices (into the workspace's classes).
    pub labels: Vec<usize>,
    /// Raw features, row-major, `ids.len() × n_features`.
    pub x: Vec<f64>,
    /// Feature count.
    pub n_features: usize,
}

#[derive(Serialize, Deserialize)]
struct PoolHeader {
    version: u32,
    batch_id: String,
    vendor: String,
    ids: Vec<String>,
    labels: Vec<usize>,
    n_features: usize,
}

impl PoolEntry {
    /// The features as an `n × d` array.
    pub fn features(&self) -> ndarray::Array2<f64> {
        ndarray::Array2::from_shape_vec((self.ids.len(), self.n_features), self.x.clone())
            .unwrap_or_else(|_| ndarray::Array2::zeros((0, self.n_features)))
    }

    /// Binary encoding: `u32 header length (LE) | JSON header | f64 LE features` (features as JSON text
    /// would cost more time than scoring).
    fn encode(&self) -> Result<Vec<u8>, StoreError> {
        let header = serde_json::to_vec(&PoolHeader {
            version: RECORD_VERSION,
            batch_id: self.batch_id.clone(),
            vendor: self.vendor.clone(),
            ids: self.ids.clone(),
            labels: self.labels.clone(),
            n_features: self.n_features,
        })
        .map_err(|e| StoreError::Encode {
            what: "pool entry",
            message: e.to_string(),
        })?;
        let mut out = Vec::with_capacity(4 + header.len() + 8 * self.x.len());
        out.extend_from_slice(&(header.len() as u32).to_le_bytes());
        out.extend_from_slice(&header);
        for v in &self.x {
            out.extend_from_slice(&v.to_le_bytes());
        }
        Ok(out)
    }

    fn decode(key: &str, bytes: &[u8]) -> Result<Self, StoreError> {
        let corrupt = |m: &str| StoreError::Corrupt {
            what: "pool",
            key: key.to_string(),
            message: m.to_string(),
        };
        if bytes.len() < 4 {
            return Err(corrupt("short value"));
        }
        let hl = u32::from_le_bytes([bytes[0], bytes[1], bytes[2], bytes[3]]) as usize;
        let header: PoolHeader = bytes
            .get(4..4 + hl)
            .ok_or_else(|| corrupt("short header"))
            .and_then(|h| serde_json::from_slice(h).map_err(|e| corrupt(&e.to_string())))?;
        let rest = &bytes[4 + hl..];
        if rest.len() != 8 * header.ids.len() * header.n_features
            || header.labels.len() != header.ids.len()
        {
            return Err(corrupt("feature block does not match the header"));
        }
        let x = rest
            .chunks_exact(8)
            .map(|c| f64::from_le_bytes(c.try_into().unwrap_or([0; 8])))
            .collect();
        Ok(Self {
            batch_id: header.batch_id,
            vendor: header.vendor,
            ids: header.ids,
            labels: header.labels,
            x,
            n_features: header.n_features,
        })
    }
}

/// What the workspace fixed at `init`: classes, feature schema, feature map.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct WorkspaceMeta {
    /// Record version.
    pub version: u32,
    /// Class names in index order (sorted, from the trusted set).
    pub classes: Vec<String>,
    /// Feature column names in order.
    pub features: Vec<String>,
    /// The learner's feature map (standardiser fit on the trusted set at init, random features if any).
    pub feature_map: FeatureMap,
    /// The `[model] feature_map` setting it was built from, as JSON (changing it later is refused).
    pub feature_map_setting: serde_json::Value,
    /// When the workspace was created.
    pub created_at: DateTime<Utc>,
}

/// The saved pool summary with its watermark.
#[derive(Debug, Clone, Serialize, Deserialize)]
pub struct SavedSummary {
    /// Record version.
    pub version: u32,
    /// The pool epoch it was built in (see [`Store::pool_epoch`]).
    pub epoch: u64,
    /// Highest pool sequence number absorbed (0: none).
    pub through_seq: u64,
    /// The summary.
    pub summary: PoolSummary,
}

/// A change to the pool made together with a batch transition.
#[derive(Debug, Clone)]
pub enum PoolChange {
    /// Leave the pool alone.
    None,
    /// Add these items (a new sequence number is assigned and stored in the record's `pool_seq`).
    Add(PoolEntry),
    /// Remove the batch's items (bumps the pool epoch, so the summary is rebuilt exactly).
    Remove,
    /// Replace the batch's items (if any) by these: a removal then an addition, in that order.
    Replace(PoolEntry),
}

const T_BATCHES: usize = 0;
const T_BY_HASH: usize = 1;
const T_AUDIT: usize = 2;
const T_TRUSTED: usize = 3;
const T_POOL: usize = 4;
const T_POOL_INDEX: usize = 5;
const T_ASSESS: usize = 6;
const T_HISTORY: usize = 7;
const T_META: usize = 8;
const TREE_NAMES: [&str; 9] = [
    "batches",
    "by_hash",
    "audit",
    "trusted",
    "pool",
    "pool_index",
    "assessments",
    "vendor_history",
    "meta",
];

const META_SCHEMA: &[u8] = b"schema_version";
const META_WORKSPACE: &[u8] = b"workspace";
const META_EPOCH: &[u8] = b"pool_epoch";
const META_POOL_SEQ: &[u8] = b"pool_seq";
const META_BATCH_SEQ: &[u8] = b"batch_seq";
const SUMMARY_KEY: &[u8] = b"current";

type TxResult<T> = Result<T, ConflictableTransactionError<StoreError>>;

fn enc<T: Serialize>(what: &'static str, v: &T) -> Result<Vec<u8>, StoreError> {
    serde_json::to_vec(v).map_err(|e| StoreError::Encode {
        what,
        message: e.to_string(),
    })
}

fn dec<T: DeserializeOwned>(what: &'static str, key: &[u8], v: &[u8]) -> Result<T, StoreError> {
    serde_json::from_slice(v).map_err(|e| StoreError::Corrupt {
        what,
        key: String::from_utf8_lossy(key).into_owned(),
        message: e.to_string(),
    })
}

/// Decode the values of a scan (`Tree::iter` or `range`) as `what`, a sled error naming the scan `op`.
fn decoded<T: DeserializeOwned>(
    scan: impl Iterator<Item = sled::Result<(sled::IVec, sled::IVec)>>,
    op: &'static str,
    what: &'static str,
) -> impl Iterator<Item = Result<T, StoreError>> {
    scan.map(move |kv| {
        let (k, v) = kv.map_err(StoreError::sled(op))?;
        dec(what, &k, &v)
    })
}

/// [`decoded`] with each value's key, read as text: for trees keyed by a name (a vendor, a batch id).
fn decoded_by_name<T: DeserializeOwned>(
    scan: impl Iterator<Item = sled::Result<(sled::IVec, sled::IVec)>>,
    op: &'static str,
    what: &'static str,
) -> impl Iterator<Item = Result<(String, T), StoreError>> {
    scan.map(move |kv| {
        let (k, v) = kv.map_err(StoreError::sled(op))?;
        Ok((String::from_utf8_lossy(&k).into_owned(), dec(what, &k, &v)?))
    })
}

fn u64_of(v: Option<sled::IVec>) -> u64 {
    v.and_then(|v| <[u8; 8]>::try_from(v.as_ref()).ok())
        .map(u64::from_be_bytes)
        .unwrap_or(0)
}

fn hash_key(vendor: &str, sha256: &str) -> Vec<u8> {
    let mut k = vendor.as_bytes().to_vec();
    k.push(0);
    k.extend_from_slice(sha256.as_bytes());
    k
}

/// The store handle; cheap to clone, shareable across threads.
#[derive(Clone)]
pub struct Store {
    db: sled::Db,
    trees: [sled::Tree; 9],
    summary: sled::Tree,
    path: PathBuf,
}

impl std::fmt::Debug for Store {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("Store").field("path", &self.path).finish()
    }
}

impl Store {
    /// Open (or create) the store in `dir` (a workspace's `state/` folder).
    ///
    /// A store that another handle is still letting go of (its background flusher holds the lock for a
    /// moment after the last drop) is retried for up to a second before [`StoreError::Locked`].
    pub fn open(dir: &Path, settings: &StoreSettings) -> Result<Self, StoreError> {
        let mut tries = 0;
        loop {
            match Self::open_once(dir, settings) {
                Err(StoreError::Locked(_)) if tries < 10 => {
                    tries += 1;
                    std::thread::sleep(std::time::Duration::from_millis(100));
                }
                other => return other,
            }
        }
    }

    fn open_once(dir: &Path, settings: &StoreSettings) -> Result<Self, StoreError> {
        let flush = (settings.flush_every_ms > 0).then_some(settings.flush_every_ms);
        let db = sled::Config::new()
            .path(dir)
            .cache_capacity(settings.cache_capacity_bytes)
            .flush_every_ms(flush)
            .open()
            .map_err(|e| match e {
                sled::Error::Io(ref io)
                    if io.kind() == std::io::ErrorKind::WouldBlock
                        || io.to_string().contains("lock") =>
                {
                    StoreError::Locked(dir.to_path_buf())
                }
                other => StoreError::Sled {
                    op: "open",
                    source: other,
                },
            })?;
        let open = |name: &str| db.open_tree(name).map_err(StoreError::sled("open tree"));
        let trees = [
            open(TREE_NAMES[0])?,
            open(TREE_NAMES[1])?,
            open(TREE_NAMES[2])?,
            open(TREE_NAMES[3])?,
            open(TREE_NAMES[4])?,
            open(TREE_NAMES[5])?,
            open(TREE_NAMES[6])?,
            open(TREE_NAMES[7])?,
            open(TREE_NAMES[8])?,
        ];
        let summary = open("summary")?;
        let store = Self {
            db,
            trees,
            summary,
            path: dir.to_path_buf(),
        };
        match store.trees[T_META]
            .get(META_SCHEMA)
            .map_err(StoreError::sled("read meta"))?
        {
            None => {
                store.trees[T_META]
                    .insert(META_SCHEMA, &SCHEMA_VERSION.to_be_bytes())
                    .map_err(StoreError::sled("write meta"))?;
                store.flush()?;
            }
            Some(v) => {
                let found = <[u8; 4]>::try_from(v.as_ref())
                    .map(u32::from_be_bytes)
                    .unwrap_or(0);
                if found != SCHEMA_VERSION {
                    return Err(StoreError::Layout {
                        path: dir.to_path_buf(),
                        message: format!(
                            "store layout version {found}, this labelweir reads version {SCHEMA_VERSION}"
                        ),
                    });
                }
            }
        }
        Ok(store)
    }

    /// Open the store of workspace `dir` (its `state/` folder), which must have been initialised.
    pub fn open_workspace(dir: &Path, settings: &StoreSettings) -> Result<Self, StoreError> {
        let state = dir.join("state");
        if !state.is_dir() {
            return Err(StoreError::Layout {
                path: state,
                message: "no store here: create the workspace with `labelweir init`".into(),
            });
        }
        Self::open(&state, settings)
    }

    /// The store's folder.
    pub fn path(&self) -> &Path {
        &self.path
    }

    /// Flush everything to disk (fsync).
    pub fn flush(&self) -> Result<(), StoreError> {
        self.db.flush().map_err(StoreError::sled("flush"))?;
        Ok(())
    }

    /// Bytes used on disk.
    pub fn size_on_disk(&self) -> u64 {
        self.db.size_on_disk().unwrap_or(0)
    }

    // ----- workspace -----

    /// Record what `init` fixed, and the initial trusted set (one transaction, flushed).
    pub fn initialise(
        &self,
        meta: &WorkspaceMeta,
        trusted: &[TrustedItem],
        audit: AuditRecord,
    ) -> Result<(), StoreError> {
        if self.workspace_meta().is_ok() {
            return Err(StoreError::Layout {
                path: self.path.clone(),
                message: "already initialised".into(),
            });
        }
        let meta_v = enc("workspace", meta)?;
        let items: Vec<(Vec<u8>, Vec<u8>)> = trusted
            .iter()
            .map(|t| Ok((t.id.as_bytes().to_vec(), enc("trusted item", t)?)))
            .collect::<Result<_, StoreError>>()?;
        let audit = self.prepare_audit(audit)?;
        self.run_tx("initialise", |t| {
            t[T_META].insert(META_WORKSPACE, meta_v.as_slice())?;
            for (k, v) in &items {
                t[T_TRUSTED].insert(k.as_slice(), v.as_slice())?;
            }
            t[T_AUDIT].insert(&audit.0, audit.1.as_slice())?;
            Ok(())
        })
    }

    /// What `init` fixed.
    pub fn workspace_meta(&self) -> Result<WorkspaceMeta, StoreError> {
        let v = self.trees[T_META]
            .get(META_WORKSPACE)
            .map_err(StoreError::sled("read meta"))?
            .ok_or_else(|| StoreError::Layout {
                path: self.path.clone(),
                message: "the workspace was never initialised (run `labelweir init`)".into(),
            })?;
        dec("workspace", META_WORKSPACE, &v)
    }

    // ----- batches -----

    /// A new batch id (`b` + 8+ digits; monotonic, unique across restarts).
    pub fn new_batch_id(&self) -> Result<String, StoreError> {
        let n = self.trees[T_META]
            .update_and_fetch(META_BATCH_SEQ, |old| {
                Some(
                    (u64_of(old.map(sled::IVec::from)) + 1)
                        .to_be_bytes()
                        .to_vec(),
                )
            })
            .map_err(StoreError::sled("batch id"))?;
        Ok(format!("b{:08}", u64_of(n)))
    }

    /// Record a claim (state `Claimed`) and flush, before the file is renamed into `processing/`.
    /// The batch counter is flushed with it, so an id is never handed out twice.
    pub fn record_claim(&self, record: &BatchRecord) -> Result<(), StoreError> {
        let v = enc("batch", record)?;
        let id = record.id.clone();
        self.run_tx("record claim", |t| {
            t[T_BATCHES].insert(id.as_bytes(), v.as_slice())?;
            Ok(())
        })
    }

    /// Remove a `Claimed` record whose rename never happened (the file is still in the inbox).
    pub fn forget_claim(&self, batch_id: &str) -> Result<(), StoreError> {
        let id = batch_id.to_string();
        self.run_tx("forget claim", |t| {
            if let Some(v) = t[T_BATCHES].get(id.as_bytes())? {
                let rec: BatchRecord =
                    dec("batch", id.as_bytes(), &v).map_err(ConflictableTransactionError::Abort)?;
                if rec.state == BatchState::Claimed {
                    t[T_BATCHES].remove(id.as_bytes())?;
                }
            }
            Ok(())
        })
    }

    /// One batch.
    pub fn batch(&self, batch_id: &str) -> Result<Option<BatchRecord>, StoreError> {
        self.trees[T_BATCHES]
            .get(batch_id.as_bytes())
            .map_err(StoreError::sled("read batch"))?
            .map(|v| dec("batch", batch_id.as_bytes(), &v))
            .transpose()
    }

    /// All batches, in id order (= arrival order).
    pub fn batches(&self) -> Result<Vec<BatchRecord>, StoreError> {
        decoded(self.trees[T_BATCHES].iter(), "scan batches", "batch").collect()
    }

    /// Batches that arrived before `batch_id`, newest first, read lazily: a caller that needs the last few
    /// of one vendor stops early instead of decoding the whole history.
    pub fn batches_before<'a>(
        &'a self,
        batch_id: &str,
    ) -> impl Iterator<Item = Result<BatchRecord, StoreError>> + 'a {
        decoded(
            self.trees[T_BATCHES].range(..batch_id.as_bytes()).rev(),
            "scan batches",
            "batch",
        )
    }

    /// Batches in any of the given states, in id order.
    pub fn batches_in(&self, states: &[BatchState]) -> Result<Vec<BatchRecord>, StoreError> {
        Ok(self
            .batches()?
            .into_iter()
            .filter(|b| states.contains(&b.state))
            .collect())
    }

    /// The first batch the vendor delivered with these bytes, if any (the idempotency key).
    pub fn batch_by_hash(&self, vendor: &str, sha256: &str) -> Result<Option<String>, StoreError> {
        Ok(self.trees[T_BY_HASH]
            .get(hash_key(vendor, sha256))
            .map_err(StoreError::sled("read by_hash"))?
            .map(|v| String::from_utf8_lossy(&v).into_owned()))
    }

    /// The engine's full report for a batch (kept for quarantined batches).
    pub fn assessment(&self, batch_id: &str) -> Result<Option<Assessment>, StoreError> {
        self.trees[T_ASSESS]
            .get(batch_id.as_bytes())
            .map_err(StoreError::sled("read assessment"))?
            .map(|v| dec("assessment", batch_id.as_bytes(), &v))
            .transpose()
    }

    /// Record a verdict in one flushed transaction: the record (state `Decided`, with its outcome), its
    /// audit record, and as applicable the idempotency key, the vendor's new history, the full assessment,
    /// and the accepted items in the pool. The record must currently be `Claimed`.
    /// Returns the record as stored (with `pool_seq` set when items were added).
    #[allow(clippy::too_many_arguments)]
    pub fn record_verdict(
        &self,
        record: &BatchRecord,
        audit: AuditRecord,
        index_hash: bool,
        history: Option<&VendorHistory>,
        assessment: Option<&Assessment>,
        pool: Option<PoolEntry>,
    ) -> Result<BatchRecord, StoreError> {
        let mut record = record.clone();
        record.state = BatchState::Decided;
        record.decided_at = Some(Utc::now());
        let by_hash = match (&record.sha256, index_hash) {
            (Some(h), true) => Some((hash_key(&record.vendor, h), record.id.as_bytes().to_vec())),
            _ => None,
        };
        let history = history
            .map(|h| Ok::<_, StoreError>((record.vendor.as_bytes().to_vec(), enc("history", h)?)))
            .transpose()?;
        let assessment = assessment
            .map(|a| Ok::<_, StoreError>((record.id.as_bytes().to_vec(), enc("assessment", a)?)))
            .transpose()?;
        let pool_add = pool.map(|p| p.encode()).transpose()?;
        self.apply(
            &record.id,
            &|r: &mut BatchRecord| *r = record.clone(),
            &[BatchState::Claimed],
            vec![audit],
            by_hash,
            history,
            assessment,
            pool_add,
            None,
            None,
            None,
        )
    }

    /// Move a batch from one state to another in one flushed transaction, with its audit records and an
    /// optional pool change. Fails with [`StoreError::Conflict`] if the batch is not in one of `expect`
    /// (so of two concurrent reviewers, the second is refused). `edit` may change any other field; it runs
    /// inside the transaction on the record as stored (and again if the transaction retries), so a
    /// concurrent change to another field is never overwritten.
    ///
    /// This is the pool-mutation path for review decisions: `release` is
    /// `transition(id, &[Quarantined], Released, PoolChange::Add(entry), ...)`; `withdraw` is
    /// `transition(id, &[Accepted, Released], Withdrawn, PoolChange::Remove, ...)`. While the daemon runs,
    /// call it through the daemon (`scoring::ScoringHandle::pool_changed` afterwards) so the in-memory pool
    /// summary follows; when it is stopped, the daemon catches up from the pool at its next start.
    pub fn transition(
        &self,
        batch_id: &str,
        expect: &[BatchState],
        to: BatchState,
        pool: PoolChange,
        audit: Vec<AuditRecord>,
        edit: impl Fn(&mut BatchRecord),
    ) -> Result<BatchRecord, StoreError> {
        self.transition_inner(batch_id, expect, to, pool, audit, &edit, None, None)
    }

    #[allow(clippy::too_many_arguments)]
    pub(crate) fn transition_inner(
        &self,
        batch_id: &str,
        expect: &[BatchState],
        to: BatchState,
        pool: PoolChange,
        audit: Vec<AuditRecord>,
        edit: &dyn Fn(&mut BatchRecord),
        history: Option<&dyn Fn(&mut VendorHistory)>,
        refuse: Option<&Refusal>,
    ) -> Result<BatchRecord, StoreError> {
        let now = Utc::now();
        let (pool_add, pool_remove) = match pool {
            PoolChange::None => (None, None),
            PoolChange::Add(e) => (Some(e.encode()?), None),
            PoolChange::Remove => (None, Some(batch_id)),
            PoolChange::Replace(e) => (Some(e.encode()?), Some(batch_id)),
        };
        self.apply(
            batch_id,
            &|record: &mut BatchRecord| {
                edit(record);
                record.state = to;
                if to.is_settled() && record.settled_at.is_none() {
                    record.settled_at = Some(now);
                }
            },
            expect,
            audit,
            None,
            None,
            None,
            pool_add,
            pool_remove,
            history,
            refuse,
        )
    }

    #[allow(clippy::too_many_arguments)]
    fn apply(
        &self,
        id: &str,
        edit: &dyn Fn(&mut BatchRecord),
        expect: &[BatchState],
        audit: Vec<AuditRecord>,
        by_hash: Option<(Vec<u8>, Vec<u8>)>,
        history: Option<(Vec<u8>, Vec<u8>)>,
        assessment: Option<(Vec<u8>, Vec<u8>)>,
        pool_add: Option<Vec<u8>>,
        pool_remove: Option<&str>,
        history_edit: Option<&dyn Fn(&mut VendorHistory)>,
        refuse: Option<&Refusal>,
    ) -> Result<BatchRecord, StoreError> {
        let mut audits = Vec::with_capacity(audit.len());
        for a in audit {
            audits.push(self.prepare_audit(a)?);
        }
        // The pool sequence number is read and bumped inside the transaction, so pool entries commit in
        // sequence order (two transactions adding to the pool conflict on the counter and one retries):
        // a reader that has seen sequence n has seen every entry below n.
        let stored = self.run_tx("transition", |t| {
            let cur = t[T_BATCHES].get(id.as_bytes())?.ok_or_else(|| {
                ConflictableTransactionError::Abort(StoreError::NotFound {
                    what: "batch",
                    key: id.to_string(),
                })
            })?;
            let cur: BatchRecord =
                dec("batch", id.as_bytes(), &cur).map_err(ConflictableTransactionError::Abort)?;
            if !expect.contains(&cur.state) {
                return Err(ConflictableTransactionError::Abort(conflict(&cur, expect)));
            }
            // Checked on the record as stored, inside the transaction: of two concurrent changes that
            // each read the record before the other wrote, the second is refused here.
            if let Some(why) = refuse.and_then(|f| f(&cur)) {
                return Err(ConflictableTransactionError::Abort(StoreError::Refused {
                    batch: id.to_string(),
                    why,
                }));
            }
            let mut record = cur;
            edit(&mut record);
            // Removal first, so a replacement keeps the new entry.
            if let Some(bid) = pool_remove {
                if let Some(seq) = t[T_POOL_INDEX].remove(bid.as_bytes())? {
                    t[T_POOL].remove(seq)?;
                    let epoch = u64_of(t[T_META].get(META_EPOCH)?) + 1;
                    t[T_META].insert(META_EPOCH, &epoch.to_be_bytes())?;
                }
                record.pool_seq = None;
            }
            if let Some(v) = &pool_add {
                let seq = u64_of(t[T_META].get(META_POOL_SEQ)?) + 1;
                t[T_META].insert(META_POOL_SEQ, &seq.to_be_bytes())?;
                t[T_POOL].insert(&seq.to_be_bytes(), v.as_slice())?;
                t[T_POOL_INDEX].insert(id.as_bytes(), &seq.to_be_bytes())?;
                record.pool_seq = Some(seq);
            }
            let rv = enc("batch", &record).map_err(ConflictableTransactionError::Abort)?;
            t[T_BATCHES].insert(id.as_bytes(), rv)?;
            for (k, v) in &audits {
                t[T_AUDIT].insert(k, v.as_slice())?;
            }
            if let Some((k, v)) = &by_hash {
                if t[T_BY_HASH].get(k.as_slice())?.is_none() {
                    t[T_BY_HASH].insert(k.as_slice(), v.as_slice())?;
                }
            }
            if let Some((k, v)) = &history {
                // The spot-check state is written by `spot-check answer` and `vendor reset-drift` alone
                // (the scoring worker's copy may predate an answer): keep the stored one.
                let stored: Option<VendorHistory> = t[T_HISTORY]
                    .get(k.as_slice())?
                    .map(|cur| dec("history", k, &cur))
                    .transpose()
                    .map_err(ConflictableTransactionError::Abort)?;
                match stored {
                    Some(cur) => {
                        let mut h: VendorHistory =
                            dec("history", k, v).map_err(ConflictableTransactionError::Abort)?;
                        h.spot = cur.spot;
                        h.spot_hold = cur.spot_hold;
                        h.spot_recall = cur.spot_recall;
                        let v = enc("history", &h).map_err(ConflictableTransactionError::Abort)?;
                        t[T_HISTORY].insert(k.as_slice(), v)?;
                    }
                    None => {
                        t[T_HISTORY].insert(k.as_slice(), v.as_slice())?;
                    }
                }
            }
            if let Some(f) = history_edit {
                edit_history_in(&t[T_HISTORY], &record.vendor, f)?;
            }
            if let Some((k, v)) = &assessment {
                t[T_ASSESS].insert(k.as_slice(), v.as_slice())?;
            }
            Ok(record)
        })?;
        Ok(stored)
    }

    /// Record that a batch's pending vendor notices were written: remove `sent` from its pending list, add
    /// `files` to its notice files and append `audit`, in one transaction, and only if every one of `sent`
    /// is still pending (notices are matched by their file stem: batch id and verdict). Another process
    /// may have sent the same notices first (two review commands finishing the same interrupted
    /// decision); then nothing is written and the result is `false`.
    pub fn notices_sent(
        &self,
        batch_id: &str,
        sent: &[crate::notice::Notice],
        files: &[String],
        audit: Vec<AuditRecord>,
    ) -> Result<bool, StoreError> {
        let mut audits = Vec::with_capacity(audit.len());
        for a in audit {
            audits.push(self.prepare_audit(a)?);
        }
        self.run_tx("notices sent", |t| {
            let cur = t[T_BATCHES].get(batch_id.as_bytes())?.ok_or_else(|| {
                ConflictableTransactionError::Abort(StoreError::NotFound {
                    what: "batch",
                    key: batch_id.to_string(),
                })
            })?;
            let mut record: BatchRecord = dec("batch", batch_id.as_bytes(), &cur)
                .map_err(ConflictableTransactionError::Abort)?;
            // A notice is known by its file stem (batch id and verdict), which names its files.
            let stems: Vec<String> = sent.iter().map(|n| n.file_stem()).collect();
            let pending: Vec<String> = record
                .pending_notices
                .iter()
                .map(|n| n.file_stem())
                .collect();
            if !stems.iter().all(|st| pending.contains(st)) {
                return Ok(false);
            }
            record
                .pending_notices
                .retain(|n| !stems.contains(&n.file_stem()));
            for f in files {
                if !record.notices.contains(f) {
                    record.notices.push(f.clone());
                }
            }
            let rv = enc("batch", &record).map_err(ConflictableTransactionError::Abort)?;
            t[T_BATCHES].insert(batch_id.as_bytes(), rv)?;
            for (k, v) in &audits {
                t[T_AUDIT].insert(k, v.as_slice())?;
            }
            Ok(true)
        })
    }

    /// Highest pool sequence number handed out so far.
    pub fn pool_seq(&self) -> Result<u64, StoreError> {
        Ok(u64_of(
            self.trees[T_META]
                .get(META_POOL_SEQ)
                .map_err(StoreError::sled("read pool seq"))?,
        ))
    }

    // ----- audit -----

    fn prepare_audit(&self, mut a: AuditRecord) -> Result<([u8; 8], Vec<u8>), StoreError> {
        // generate_id starts at 0; audit sequence numbers start at 1 so that `audit_since(0)` is "all".
        let id = self
            .db
            .generate_id()
            .map_err(StoreError::sled("audit id"))?
            + 1;
        a.seq = id;
        Ok((id.to_be_bytes(), enc("audit", &a)?))
    }

    /// Append audit records (one flushed transaction). Returns their sequence numbers.
    pub fn append_audit(&self, records: Vec<AuditRecord>) -> Result<Vec<u64>, StoreError> {
        let mut prepared = Vec::with_capacity(records.len());
        for r in records {
            prepared.push(self.prepare_audit(r)?);
        }
        self.run_tx("append audit", |t| {
            for (k, v) in &prepared {
                t[T_AUDIT].insert(k, v.as_slice())?;
            }
            Ok(())
        })?;
        Ok(prepared
            .iter()
            .map(|(k, _)| u64::from_be_bytes(*k))
            .collect())
    }

    /// The sequence number of the newest audit record (0 when the trail is empty).
    pub fn last_audit_seq(&self) -> Result<u64, StoreError> {
        Ok(u64_of(
            self.trees[T_AUDIT]
                .last()
                .map_err(StoreError::sled("read audit"))?
                .map(|(k, _)| k),
        ))
    }

    /// The audit trail in order, starting after sequence number `after` (0: from the start).
    pub fn audit_since(&self, after: u64) -> Result<Vec<AuditRecord>, StoreError> {
        decoded(
            self.trees[T_AUDIT].range((after + 1).to_be_bytes()..),
            "scan audit",
            "audit",
        )
        .collect()
    }

    fn run_tx<R>(
        &self,
        op: &'static str,
        f: impl Fn(&[TransactionalTree]) -> TxResult<R>,
    ) -> Result<R, StoreError> {
        let trees: Vec<&sled::Tree> = self.trees.iter().collect();
        let started = std::time::Instant::now();
        let r = trees.as_slice().transaction(|t| {
            let r = f(t)?;
            t[0].flush();
            Ok(r)
        });
        crate::metrics::store_flush_observed(started.elapsed());
        match r {
            Ok(r) => Ok(r),
            Err(TransactionError::Abort(e)) => Err(e),
            Err(TransactionError::Storage(e)) => {
                crate::metrics::store_error(op);
                Err(StoreError::Sled { op, source: e })
            }
        }
    }
}

/// A check on a batch's record as stored, run inside a transition's transaction: `Some(why)` refuses
/// the transition ([`StoreError::Refused`]).
pub(crate) type Refusal<'a> = dyn Fn(&BatchRecord) -> Option<String> + 'a;

/// Edit a vendor's history as stored (the default history when there is none), inside a transaction on
/// the history tree.
pub(crate) fn edit_history_in(
    tree: &TransactionalTree,
    vendor: &str,
    edit: &dyn Fn(&mut VendorHistory),
) -> TxResult<()> {
    let key = vendor.as_bytes();
    let mut h: VendorHistory = match tree.get(key)? {
        Some(v) => dec("history", key, &v).map_err(ConflictableTransactionError::Abort)?,
        None => VendorHistory::default(),
    };
    edit(&mut h);
    let v = enc("history", &h).map_err(ConflictableTransactionError::Abort)?;
    tree.insert(key, v)?;
    Ok(())
}

fn conflict(rec: &BatchRecord, expect: &[BatchState]) -> StoreError {
    StoreError::Conflict {
        batch: rec.id.clone(),
        found: rec.state.to_string(),
        expected: expect
            .iter()
            .map(|s| s.as_str())
            .collect::<Vec<_>>()
            .join(", "),
    }
}

#[cfg(test)]
mod tests;
