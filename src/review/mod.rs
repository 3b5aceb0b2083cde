//! Quarantine review and trusted-set upkeep: the reviewers' side of labelweir.
//!
//! A flag is a suspicion for human review, not proof: everything here exists so that a person decides,
//! and every decision records who made it, when and why in the audit trail.
//!
//! # One implementation, two ways in
//!
//! Every operation is a function of a [`ReviewEnv`] (workspace folders, configuration, the open store,
//! what `init` fixed, and [`ReviewHooks`] to tell a running daemon what changed). The store has one owner
//! per process (sled's file lock):
//!
//! * while the daemon runs, the CLI sends a [`Request`] over the admin socket (`DIR/admin.sock`, see
//!   [`crate::admin`]) and the daemon runs [`handle`] against its own store, then tells its scoring worker
//!   that the pool or the trusted set changed (so the in-memory pool summary follows);
//! * while it is stopped, the CLI opens the store itself and runs the same [`handle`] with
//!   [`NoHooks`]; the daemon catches up from the store at its next start.
//!
//! # Decisions
//!
//! A decision is one store transition ([`Store::transition`]) that checks the batch's current state
//! inside the transaction, so of two reviewers deciding the same batch at once the second is refused
//! ([`ReviewError::Refused`]) and nothing is released twice. Side effects follow the flushed transition:
//! the file moves out of `quarantine/` (release → `accepted/`, reject and withdraw → `rejected/`, with its
//! report), then the vendor notice is written (and recorded in the audit trail). The notice is stored with
//! the decision, in the same transaction (an outbox), so if the process dies in between, the next review
//! command or daemon start finishes the move and sends the notice ([`finish_pending`]).
//!
//! # Trusted set
//!
//! Only these functions write trusted items (through [`Store::update_trusted`]); nothing on the ingest
//! path can. Each item keeps its provenance (who verified it, when, from what source). After every change
//! the rolling window ([`TrustedSettings`]) is applied, class balance is checked, and the most recently
//! accepted batches are re-scored against the new set ([`rescan`]); batches that would now be
//! quarantined are reported with the command that pulls them out of the pool (`quarantine withdraw`).

use std::collections::{BTreeMap, HashMap, HashSet};
use std::path::{Path, PathBuf};

use chrono::{DateTime, Duration as ChronoDuration, SecondsFormat, Utc};
use ndarray::{Array1, Array2, ArrayView2, Axis};
use serde::{Deserialize, Serialize};

use crate::config::{Config, TrustedSettings};
use crate::data::{self, Classes, Format, Table};
use crate::model::{self, PoolInput, TrustedInput};
use crate::notice::{
    self, item_codes, BatchRef, DecidedBy, Notice, NoticeItem, NoticeReason, NoticeVerdict,
};
use crate::policy::{self, Baseline, Reason, Verdict};
use crate::store::{
    AuditRecord, BatchRecord, BatchState, PoolChange, PoolEntry, Store, StoreError, TrustedItem,
    WorkspaceMeta, RECORD_VERSION,
};
use crate::text::html_escape;
use crate::workspace::Workspace;

/// Pools up to this many items are re-scored exactly (pool minus the batch); larger ones through the
/// saved pool summary (which still contains the batch: the re-check is then conservative).
pub const RESCORE_EXACT_POOL_MAX: u64 = 50_000;

/// Most points drawn per group in the HTML projection.
pub const PROJECTION_MAX_POINTS: usize = 4000;

// ------------------------------------------------------------------------------------------------
// Errors and environment
// ------------------------------------------------------------------------------------------------

/// Why a review operation failed.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum ReviewError {
    /// No such batch or item.
    #[error("{0}")]
    NotFound(String),
    /// The batch is not in a state that allows the decision (e.g. another reviewer decided it first).
    #[error("refused: {0}")]
    Refused(String),
    /// Bad arguments or a bad input file.
    #[error("{0}")]
    Invalid(String),
    /// The store failed. The cause is kept when the store was opened in this process (not across the
    /// admin socket, where only the message travels).
    #[error("store: {message}")]
    Store {
        /// What failed.
        message: String,
        /// The cause.
        #[source]
        source: Option<StoreError>,
    },
    /// A filesystem operation failed (the cause kept as for [`ReviewError::Store`]).
    #[error("{message}")]
    Io {
        /// What failed.
        message: String,
        /// The cause.
        #[source]
        source: Option<std::io::Error>,
    },
    /// The engine could not score.
    #[error("engine: {0}")]
    Model(String),
}

impl ReviewError {
    /// Stable snake_case kind (used on the admin channel).
    pub fn kind(&self) -> &'static str {
        match self {
            Self::NotFound(_) => "not_found",
            Self::Refused(_) => "refused",
            Self::Invalid(_) => "invalid",
            Self::Store { .. } => "store",
            Self::Io { .. } => "io",
            Self::Model(_) => "model",
        }
    }

    /// Rebuild from a kind and message (the admin client's side).
    pub fn from_kind(kind: &str, message: String) -> Self {
        match kind {
            "not_found" => Self::NotFound(message),
            "refused" => Self::Refused(message),
            "invalid" => Self::Invalid(message),
            "store" => Self::Store {
                message,
                source: None,
            },
            "io" => Self::Io {
                message,
                source: None,
            },
            _ => Self::Model(message),
        }
    }
}

impl From<StoreError> for ReviewError {
    fn from(e: StoreError) -> Self {
        match e {
            StoreError::Conflict { .. } => Self::Refused(e.to_string()),
            StoreError::NotFound { .. } => Self::NotFound(e.to_string()),
            other => Self::Store {
                message: other.to_string(),
                source: Some(other),
            },
        }
    }
}

fn io_err(what: impl std::fmt::Display) -> impl FnOnce(std::io::Error) -> ReviewError {
    move |e| ReviewError::Io {
        message: format!("{what}: {e}"),
        source: Some(e),
    }
}

/// What a running daemon does when a review operation changes the pool or the trusted set.
pub trait ReviewHooks: Send + Sync {
    /// The pool changed (release, withdraw): update the in-memory pool summary.
    fn pool_changed(&self) {}
    /// The trusted set changed: reload it before the next batch.
    fn trusted_changed(&self) {}
}

/// Hooks for a stopped daemon: nothing to tell (it catches up from the store at its next start).
#[derive(Debug, Default, Clone, Copy)]
pub struct NoHooks;

impl ReviewHooks for NoHooks {}

/// Who is asking, as far as the process can tell (recorded in the audit trail beside `--by`).
#[derive(Debug, Clone, Default, PartialEq, Serialize, Deserialize)]
pub struct Caller {
    /// The OS user id of the requesting process (from the socket's peer credentials, or our own).
    pub uid: Option<u32>,
    /// `admin_socket` or `direct`.
    pub via: String,
}

/// Everything a review operation needs.
pub struct ReviewEnv<'a> {
    /// Workspace folders.
    pub ws: &'a Workspace,
    /// Configuration.
    pub config: &'a Config,
    /// The store (the daemon's, or opened by the command).
    pub store: &'a Store,
    /// What `init` fixed.
    pub meta: &'a WorkspaceMeta,
    /// What to tell a running daemon.
    pub hooks: &'a dyn ReviewHooks,
    /// Who is asking.
    pub caller: Caller,
}

// ------------------------------------------------------------------------------------------------
// Requests (the admin channel's vocabulary, also used directly)
// ------------------------------------------------------------------------------------------------

/// Release a quarantined batch into the pool.
#[derive(Debug, Clone, Default, PartialEq, Serialize, Deserialize)]
pub struct ReleaseRequest {
    /// The batch.
    pub batch: String,
    /// Reviewer.
    pub by: String,
    /// Why (required).
    pub reason: String,
    /// Item ids left out of the pool.
    #[serde(default)]
    pub exclude: Vec<String>,
    /// `(item id, class name)`: labels the reviewer sets.
    #[serde(default)]
    pub relabel: Vec<(String, String)>,
    /// Accept the engine's proposed label for every item whose label the repair moved (explicit
    /// `exclude` and `relabel` win).
    #[serde(default)]
    pub accept_proposed: bool,
    /// Item ids the reviewer verified: they join the trusted set with their final label.
    #[serde(default)]
    pub promote: Vec<String>,
}

/// Reject a quarantined batch.
#[derive(Debug, Clone, Default, PartialEq, Serialize, Deserialize)]
pub struct RejectRequest {
    /// The batch.
    pub batch: String,
    /// Reviewer.
    pub by: String,
    /// Why (required).
    pub reason: String,
    /// Include the proposed labels of the flagged items in the vendor notice.
    #[serde(default)]
    pub disclose_proposed: bool,
}

/// Pull an accepted (or released) batch back out of the pool.
#[derive(Debug, Clone, Default, PartialEq, Serialize, Deserialize)]
pub struct WithdrawRequest {
    /// The batch.
    pub batch: String,
    /// Reviewer.
    pub by: String,
    /// Why (required).
    pub reason: String,
}

/// Add trusted items from a file.
#[derive(Debug, Clone, Default, PartialEq, Serialize, Deserialize)]
pub struct TrustedAddRequest {
    /// The file's name (its extension gives the format: `.csv` or `.jsonl`).
    pub file_name: String,
    /// The file's content (sent over the admin channel; the daemon may not be able to read the
    /// reviewer's files).
    pub content: String,
    /// Who verified the items.
    pub by: String,
    /// Where they come from (recorded as provenance).
    pub source: String,
    /// Replace items whose ids already exist (otherwise that is an error).
    #[serde(default)]
    pub replace: bool,
}

/// Remove trusted items.
#[derive(Debug, Clone, Default, PartialEq, Serialize, Deserialize)]
pub struct TrustedRemoveRequest {
    /// Item ids.
    pub ids: Vec<String>,
    /// Reviewer.
    pub by: String,
    /// Why (required).
    pub reason: String,
}

/// One request; `op` names it on the wire.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(tag = "op", rename_all = "snake_case")]
pub enum Request {
    /// Is the daemon there?
    Ping,
    /// Quarantined batches waiting for review.
    QuarantineList,
    /// Explain one batch's hold.
    QuarantineShow {
        /// The batch.
        batch: String,
    },
    /// Release.
    Release(ReleaseRequest),
    /// Reject.
    Reject(RejectRequest),
    /// Withdraw.
    Withdraw(WithdrawRequest),
    /// The trusted set with provenance.
    TrustedList,
    /// Add trusted items.
    TrustedAdd(TrustedAddRequest),
    /// Remove trusted items.
    TrustedRemove(TrustedRemoveRequest),
    /// Every trusted item (with features) for export.
    TrustedExport,
    /// Re-score recently accepted batches against the current trusted set.
    Rescan {
        /// Who asked.
        by: String,
    },
    /// The audit trail, filtered.
    Audit {
        /// Only records at or after this time.
        since: Option<DateTime<Utc>>,
        /// Only records about this vendor.
        vendor: Option<String>,
        /// Only records about this batch.
        batch: Option<String>,
    },
}

/// The trusted set with features, for `trusted export`.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct TrustedExport {
    /// Feature column names, in the order of each item's `features`.
    pub features: Vec<String>,
    /// Every trusted item with provenance.
    pub items: Vec<TrustedItem>,
}

/// Run one request. The result is the operation's report as JSON.
pub fn handle(env: &ReviewEnv<'_>, req: Request) -> Result<serde_json::Value, ReviewError> {
    fn json<T: Serialize>(v: T) -> Result<serde_json::Value, ReviewError> {
        serde_json::to_value(v).map_err(|e| ReviewError::Io {
            message: format!("encode: {e}"),
            source: None,
        })
    }
    match req {
        Request::Ping => json(serde_json::json!({ "pong": true })),
        Request::QuarantineList => json(list(env)?),
        Request::QuarantineShow { batch } => json(show(env, &batch)?),
        Request::Release(r) => json(release(env, &r)?),
        Request::Reject(r) => json(reject(env, &r)?),
        Request::Withdraw(r) => json(withdraw(env, &r)?),
        Request::TrustedList => json(trusted_list(env)?),
        Request::TrustedAdd(r) => json(trusted_add(env, &r)?),
        Request::TrustedRemove(r) => json(trusted_remove(env, &r)?),
        Request::TrustedExport => json(TrustedExport {
            features: env.meta.features.clone(),
            items: env.store.trusted_items()?,
        }),
        Request::Rescan { by } => json(rescan(env, &by)?),
        Request::Audit {
            since,
            vendor,
            batch,
        } => json(audit(env, since, vendor.as_deref(), batch.as_deref())?),
    }
}

// ------------------------------------------------------------------------------------------------
// Quarantine list / show
// ------------------------------------------------------------------------------------------------

/// One batch waiting for review.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct QueueEntry {
    /// Batch id.
    pub batch_id: String,
    /// Vendor.
    pub vendor: String,
    /// The file's name as delivered (vendor-supplied, escaped by the store; sanitise before printing).
    pub original_name: String,
    /// When it was claimed.
    pub received_at: DateTime<Utc>,
    /// When the policy held it.
    pub decided_at: Option<DateTime<Utc>>,
    /// Items in the batch.
    pub items: Option<usize>,
    /// Repair cost.
    pub repair_cost: Option<f64>,
    /// Damage (nats).
    pub damage: Option<f64>,
    /// Items whose label the repair moved.
    pub flagged_items: Option<usize>,
    /// The policy's reason codes.
    pub reasons: Vec<String>,
}

/// Quarantined batches, oldest first.
pub fn list(env: &ReviewEnv<'_>) -> Result<Vec<QueueEntry>, ReviewError> {
    // Best effort: a move a crash interrupted; each decision reports problems with its own move.
    let _ = finish_moves(env);
    Ok(env
        .store
        .batches_in(&[BatchState::Quarantined])?
        .into_iter()
        .map(|r| QueueEntry {
            reasons: r
                .decision
                .as_ref()
                .map(|d| {
                    d.reasons
                        .iter()
                        .map(|x| x.code.as_str().to_string())
                        .collect()
                })
                .unwrap_or_default(),
            repair_cost: r.scores.as_ref().map(|s| s.repair_cost),
            damage: r.scores.as_ref().map(|s| s.damage),
            flagged_items: r.scores.as_ref().map(|s| s.flagged_items),
            batch_id: r.id,
            vendor: r.vendor,
            original_name: r.original_name,
            received_at: r.claimed_at,
            decided_at: r.decided_at,
            items: r.items,
        })
        .collect())
}

/// An item whose label the repair moved.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct MovedItem {
    /// Item id as delivered.
    pub id: String,
    /// Given label.
    pub label: String,
    /// Proposed label.
    pub proposed_label: String,
    /// Suspicion in `[0, 1]` (a suspicion for review, not proof).
    pub suspicion: f64,
    /// Confidence in the proposed label.
    pub confidence: f64,
}

/// A trusted item the batch as delivered would have broken.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct BrokenTrusted {
    /// Trusted item id.
    pub id: String,
    /// Its verified label (when known).
    pub label: Option<String>,
    /// What the model trained with the batch as delivered predicts (when known).
    pub predicted_with_batch: Option<String>,
    /// The probability that model gives the verified label (when known).
    pub prob_with_batch: Option<f64>,
    /// Whether the model trained with the repaired batch gets it right again (when known).
    pub repaired_correct: Option<bool>,
}

/// The vendor's standing, for context.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct VendorStanding {
    /// Accepted batches ever.
    pub accepted_total: u64,
    /// Accepted batches in the baseline window now.
    pub baseline_batches: usize,
    /// Median repair cost of the baseline now.
    pub baseline_median: f64,
    /// CUSUM now.
    pub cusum: f64,
    /// Quarantined batches of this vendor waiting for review (this one included).
    pub waiting_for_review: usize,
}

/// A 2-D projection of the batch's items beside the trusted items.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Projection {
    /// How the axes were computed.
    pub method: String,
    /// Share of the variance each axis explains.
    pub explained: [f64; 2],
    /// The batch's items (`group` = `batch`) and the trusted items (`group` = `trusted`).
    pub points: Vec<ProjectedPoint>,
    /// Points left out to keep the page small.
    pub omitted: usize,
}

/// One point of the projection.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ProjectedPoint {
    /// `batch` or `trusted`.
    pub group: String,
    /// Item id.
    pub id: String,
    /// Label (given, for batch items; verified, for trusted ones).
    pub label: String,
    /// Proposed label, for batch items the repair moved.
    pub proposed_label: Option<String>,
    /// Suspicion (batch items; `None` when unknown).
    pub suspicion: Option<f64>,
    /// Coordinates.
    pub x: f64,
    /// Coordinates.
    pub y: f64,
}

/// Everything `quarantine show` says about a batch.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ShowReport {
    /// The batch's record.
    pub batch: BatchRecord,
    /// The policy's reasons.
    pub reasons: Vec<Reason>,
    /// The baseline it was judged against.
    pub baseline: Option<Baseline>,
    /// The vendor's standing now.
    pub vendor: VendorStanding,
    /// Items whose labels the repair moved, most suspicious first.
    pub moved_items: Vec<MovedItem>,
    /// Trusted items the batch as delivered would have broken.
    pub broken_trusted: Vec<BrokenTrusted>,
    /// The batch's audit trail.
    pub history: Vec<AuditRecord>,
    /// The projection for the HTML page (absent when the batch file cannot be read).
    pub projection: Option<Projection>,
    /// Why there is no projection, or what it leaves out.
    pub projection_note: Option<String>,
    /// [`notice::SUSPICION_SENTENCE`].
    pub note: String,
}

/// Explain a batch's hold (any scored batch can be shown; quarantined ones carry the full report).
pub fn show(env: &ReviewEnv<'_>, batch: &str) -> Result<ShowReport, ReviewError> {
    let rec = get_batch(env.store, batch)?;
    let classes = &env.meta.classes;
    let assessment = env.store.assessment(&rec.id)?;
    let moved_items: Vec<MovedItem> = rec
        .suspects
        .iter()
        .filter(|s| s.proposed_label != s.label)
        .map(|s| MovedItem {
            id: s.id.clone(),
            label: s.label.clone(),
            proposed_label: s.proposed_label.clone(),
            suspicion: s.suspicion,
            confidence: s.confidence,
        })
        .collect();
    let trusted = env.store.trusted_items()?;
    let trusted_label: HashMap<&str, &str> = trusted
        .iter()
        .map(|t| (t.id.as_str(), t.label.as_str()))
        .collect();
    let name = |k: usize| classes.get(k).cloned().unwrap_or_else(|| k.to_string());
    let broken_trusted: Vec<BrokenTrusted> = match &assessment {
        Some(a) if a.broken_trusted.len() == rec.broken_trusted.len() => rec
            .broken_trusted
            .iter()
            .zip(&a.broken_trusted)
            .map(|(id, b)| BrokenTrusted {
                id: id.clone(),
                label: Some(name(b.label)),
                predicted_with_batch: Some(name(b.predicted_with_batch)),
                prob_with_batch: Some(b.prob_with_batch),
                repaired_correct: Some(b.repaired_correct),
            })
            .collect(),
        _ => rec
            .broken_trusted
            .iter()
            .map(|id| BrokenTrusted {
                id: id.clone(),
                label: trusted_label.get(id.as_str()).map(|s| s.to_string()),
                predicted_with_batch: None,
                prob_with_batch: None,
                repaired_correct: None,
            })
            .collect(),
    };
    let history = env
        .store
        .audit_since(0)?
        .into_iter()
        .filter(|a| a.batch_id.as_deref() == Some(rec.id.as_str()))
        .collect();
    let h = env.store.vendor_history(&rec.vendor)?;
    let now_baseline = policy::Baseline::compute(&env.config.policy, &h, 0.0);
    let waiting = env
        .store
        .batches_in(&[BatchState::Quarantined])?
        .iter()
        .filter(|b| b.vendor == rec.vendor)
        .count();
    let vendor = VendorStanding {
        accepted_total: h.accepted_total,
        baseline_batches: h.accepted_costs.len(),
        baseline_median: now_baseline.median,
        cusum: h.cusum,
        waiting_for_review: waiting,
    };
    // The projection needs the batch's features: read its file where its state says it is.
    let (projection, projection_note) = match read_batch_table(env, &rec) {
        Ok(table) => {
            let suspicion: Vec<Option<f64>> = match &assessment {
                Some(a) if a.items.len() == table.len() => {
                    let mut v = vec![None; table.len()];
                    for s in &a.items {
                        if let Some(slot) = v.get_mut(s.index) {
                            *slot = Some(s.suspicion);
                        }
                    }
                    v
                }
                _ => {
                    let by_id: HashMap<&str, f64> = rec
                        .suspects
                        .iter()
                        .map(|s| (s.id.as_str(), s.suspicion))
                        .collect();
                    table
                        .ids
                        .iter()
                        .map(|id| by_id.get(id.as_str()).copied())
                        .collect()
                }
            };
            let proposed: HashMap<&str, &str> = moved_items
                .iter()
                .map(|m| (m.id.as_str(), m.proposed_label.as_str()))
                .collect();
            match build_projection(env.meta, &table, &suspicion, &proposed, &trusted) {
                Ok(p) => {
                    let note = (p.omitted > 0).then(|| {
                        format!(
                            "{} points left out (at most {PROJECTION_MAX_POINTS} per group are drawn; the most suspicious batch items are kept)",
                            p.omitted
                        )
                    });
                    (Some(p), note)
                }
                Err(e) => (None, Some(format!("no projection: {e}"))),
            }
        }
        Err(e) => (None, Some(format!("no projection: {e}"))),
    };
    Ok(ShowReport {
        reasons: rec
            .decision
            .as_ref()
            .map(|d| d.reasons.clone())
            .unwrap_or_default(),
        baseline: rec.decision.as_ref().map(|d| d.baseline.clone()),
        batch: rec,
        vendor,
        moved_items,
        broken_trusted,
        history,
        projection,
        projection_note,
        note: notice::SUSPICION_SENTENCE.to_string(),
    })
}

fn get_batch(store: &Store, batch: &str) -> Result<BatchRecord, ReviewError> {
    store
        .batch(batch)?
        .ok_or_else(|| ReviewError::NotFound(format!("no batch {}", crate::text::sanitize(batch))))
}

/// The folder a batch's file is in for its state (`None` when it has none).
pub fn folder_for_state(state: BatchState) -> Option<&'static str> {
    match state {
        BatchState::Accepted | BatchState::Released => Some("accepted"),
        BatchState::Quarantined => Some("quarantine"),
        BatchState::Rejected
        | BatchState::Duplicate
        | BatchState::ReviewRejected
        | BatchState::Withdrawn => Some("rejected"),
        BatchState::Claimed | BatchState::Decided | BatchState::Vanished => None,
    }
}

fn read_batch_table(env: &ReviewEnv<'_>, rec: &BatchRecord) -> Result<Table, ReviewError> {
    let folder = folder_for_state(rec.state)
        .ok_or_else(|| ReviewError::Invalid(format!("batch {} is {}", rec.id, rec.state)))?;
    let mut path = env.ws.folder(folder).join(&rec.file_name);
    if !path.exists() {
        // A decision whose file move did not happen yet: the file is still in quarantine/.
        let q = env.ws.folder("quarantine").join(&rec.file_name);
        if q.exists() {
            path = q;
        }
    }
    let bytes = std::fs::read(&path).map_err(io_err(path.display()))?;
    let format = Format::from_path(&path)
        .ok_or_else(|| ReviewError::Invalid(format!("{} is not a batch file", rec.file_name)))?;
    data::parse_table(
        &bytes,
        format,
        &rec.file_name,
        &env.config.table_options(),
        Some(&env.meta.features),
    )
    .map_err(|e| ReviewError::Invalid(e.to_string()))
}

// ------------------------------------------------------------------------------------------------
// Projection (PCA by power iteration)
// ------------------------------------------------------------------------------------------------

/// The two leading principal axes of the rows of `z` (standardised features), by power iteration.
///
/// With `Z̄` the column-centred data and `C = Z̄ᵀ Z̄ / n` its covariance, the first axis is the unit
/// eigenvector `v₁` of `C` with the largest eigenvalue `λ₁`: iterate `v ← C v / ‖C v‖` (computed as
/// `Z̄ᵀ (Z̄ v) / n`, never forming `C`) until `‖v_new − v_old‖ < tol`. The second axis iterates the
/// same map with `v₁` projected out after every step (`v ← v − (v₁ᵀ v) v₁`, deflation by
/// Gram–Schmidt). `λ_i = v_iᵀ C v_i`; the explained share is `λ_i / tr C` with `tr C = Σ_ij z̄_ij² / n`.
///
/// Returns `(axes as a d × 2 matrix, [λ₁, λ₂], tr C, column means)`.
pub fn principal_axes(z: ArrayView2<'_, f64>) -> (Array2<f64>, [f64; 2], f64, Array1<f64>) {
    let (n, d) = z.dim();
    let mean = if n > 0 {
        z.mean_axis(Axis(0)).unwrap_or_else(|| Array1::zeros(d))
    } else {
        Array1::zeros(d)
    };
    let zc = &z - &mean.view().insert_axis(Axis(0));
    let nn = n.max(1) as f64;
    let trace = zc.iter().map(|v| v * v).sum::<f64>() / nn;
    let apply = |v: &Array1<f64>| -> Array1<f64> { zc.t().dot(&zc.dot(v)) / nn };
    let mut axes = Array2::zeros((d, 2));
    let mut lambdas = [0.0; 2];
    for (k, lambda_k) in lambdas.iter_mut().enumerate().take(d.min(2)) {
        // Deterministic start, not orthogonal to any axis in general.
        let mut v = Array1::from_iter((0..d).map(|j| 1.0 + 0.1 * ((j * 7 + k * 3) % 11) as f64));
        let project_out = |v: &mut Array1<f64>, axes: &Array2<f64>| {
            for p in 0..k {
                let a = axes.column(p);
                let c = a.dot(v);
                v.scaled_add(-c, &a);
            }
        };
        project_out(&mut v, &axes);
        let norm = v.dot(&v).sqrt();
        if norm == 0.0 {
            break;
        }
        v /= norm;
        for _ in 0..1000 {
            let mut w = apply(&v);
            project_out(&mut w, &axes);
            let nw = w.dot(&w).sqrt();
            if nw <= 1e-300 {
                break;
            }
            w /= nw;
            // Fix the sign so that convergence is measured on the direction.
            if w.dot(&v) < 0.0 {
                w.mapv_inplace(|x| -x);
            }
            let diff = (&w - &v).mapv(|x| x * x).sum().sqrt();
            v = w;
            if diff < 1e-10 {
                break;
            }
        }
        *lambda_k = v.dot(&apply(&v));
        axes.column_mut(k).assign(&v);
    }
    (axes, lambdas, trace, mean)
}

fn build_projection(
    meta: &WorkspaceMeta,
    table: &Table,
    suspicion: &[Option<f64>],
    proposed: &HashMap<&str, &str>,
    trusted: &[TrustedItem],
) -> Result<Projection, ReviewError> {
    let d = meta.features.len();
    let std = &meta.feature_map.standardizer;
    // Batch items: keep the most suspicious when there are too many.
    let mut order: Vec<usize> = (0..table.len()).collect();
    order.sort_by(|&a, &b| {
        let sa = suspicion.get(a).copied().flatten().unwrap_or(-1.0);
        let sb = suspicion.get(b).copied().flatten().unwrap_or(-1.0);
        sb.total_cmp(&sa).then(a.cmp(&b))
    });
    let mut omitted = 0;
    if order.len() > PROJECTION_MAX_POINTS {
        omitted += order.len() - PROJECTION_MAX_POINTS;
        order.truncate(PROJECTION_MAX_POINTS);
    }
    order.sort_unstable();
    let usable: Vec<&TrustedItem> = trusted.iter().filter(|t| t.features.len() == d).collect();
    let step = usable.len().div_ceil(PROJECTION_MAX_POINTS).max(1);
    let shown: Vec<&TrustedItem> = usable.iter().step_by(step).copied().collect();
    omitted += usable.len() - shown.len();
    let nb = order.len();
    let mut raw = Array2::zeros((nb + shown.len(), d));
    for (r, &i) in order.iter().enumerate() {
        raw.row_mut(r).assign(&table.features.row(i));
    }
    for (r, t) in shown.iter().enumerate() {
        raw.row_mut(nb + r)
            .assign(&ndarray::ArrayView1::from(&t.features[..]));
    }
    let z = std
        .transform(raw.view())
        .map_err(|e| ReviewError::Model(e.to_string()))?;
    let (axes, lambdas, trace, mean) = principal_axes(z.view());
    let coords = (&z - &mean.view().insert_axis(Axis(0))).dot(&axes);
    let mut points = Vec::with_capacity(coords.nrows());
    for (r, &i) in order.iter().enumerate() {
        let id = &table.ids[i];
        points.push(ProjectedPoint {
            group: "batch".into(),
            id: id.clone(),
            label: table.labels[i].clone(),
            proposed_label: proposed.get(id.as_str()).map(|s| s.to_string()),
            suspicion: suspicion.get(i).copied().flatten(),
            x: coords[[r, 0]],
            y: coords[[r, 1]],
        });
    }
    for (r, t) in shown.iter().enumerate() {
        points.push(ProjectedPoint {
            group: "trusted".into(),
            id: t.id.clone(),
            label: t.label.clone(),
            proposed_label: None,
            suspicion: None,
            x: coords[[nb + r, 0]],
            y: coords[[nb + r, 1]],
        });
    }
    let share = |l: f64| if trace > 0.0 { l / trace } else { 0.0 };
    Ok(Projection {
        method: "principal components of the standardised features (power iteration), batch and trusted items together".into(),
        explained: [share(lambdas[0]), share(lambdas[1])],
        points,
        omitted,
    })
}

// ------------------------------------------------------------------------------------------------
// HTML page
// ------------------------------------------------------------------------------------------------

/// Colour for a suspicion in `[0, 1]`: a linear blend from blue (`#2166ac`, low) to red (`#b2182b`,
/// high); grey when unknown.
fn suspicion_colour(s: Option<f64>) -> String {
    match s {
        None => "#9e9e9e".into(),
        Some(s) => {
            let t = if s.is_finite() {
                s.clamp(0.0, 1.0)
            } else {
                0.0
            };
            let mix = |a: u8, b: u8| (a as f64 + (b as f64 - a as f64) * t).round() as u8;
            format!(
                "#{:02x}{:02x}{:02x}",
                mix(0x21, 0xb2),
                mix(0x66, 0x18),
                mix(0xac, 0x2b)
            )
        }
    }
}

/// The self-contained review page: no scripts, no network (a Content-Security-Policy of
/// `default-src 'none'` forbids both), styles inline, the projection as inline SVG. Well-formed XML
/// (XHTML syntax), so that tests can parse it.
pub fn render_html(report: &ShowReport) -> String {
    use std::fmt::Write as _;
    let b = &report.batch;
    let mut h = String::new();
    let _ = writeln!(h, "<!DOCTYPE html>");
    let _ = writeln!(
        h,
        "<html xmlns=\"http://www.w3.org/1999/xhtml\" lang=\"en\">"
    );
    let _ = writeln!(h, "<head>");
    let _ = writeln!(h, "<meta charset=\"utf-8\"/>");
    let _ = writeln!(
        h,
        "<meta http-equiv=\"Content-Security-Policy\" content=\"default-src 'none'; style-src 'unsafe-inline'; img-src data:\"/>"
    );
    let _ = writeln!(
        h,
        "<title>labelweir review: batch {} from {}</title>",
        html_escape(&b.id),
        html_escape(&b.vendor)
    );
    let _ = writeln!(
        h,
        "<style>body{{font-family:sans-serif;margin:1.5em;max-width:70em}}table{{border-collapse:collapse;margin:0.5em 0}}td,th{{border:1px solid #bbb;padding:0.2em 0.5em;text-align:left}}.note{{background:#fff6d5;padding:0.5em;border-left:4px solid #e0b000}}svg{{border:1px solid #ccc;background:#fff}}</style>"
    );
    let _ = writeln!(h, "</head>");
    let _ = writeln!(h, "<body>");
    let _ = writeln!(
        h,
        "<h1>Batch {} from vendor {}</h1>",
        html_escape(&b.id),
        html_escape(&b.vendor)
    );
    let _ = writeln!(h, "<p class=\"note\">{}</p>", html_escape(&report.note));
    let _ = writeln!(h, "<table>");
    let row = |h: &mut String, k: &str, v: &str| {
        let _ = writeln!(h, "<tr><th>{}</th><td>{}</td></tr>", html_escape(k), v);
    };
    row(&mut h, "State", &html_escape(b.state.as_str()));
    row(&mut h, "File as delivered", &html_escape(&b.original_name));
    row(
        &mut h,
        "SHA-256",
        &html_escape(b.sha256.as_deref().unwrap_or("")),
    );
    row(
        &mut h,
        "Received",
        &html_escape(&b.claimed_at.to_rfc3339_opts(SecondsFormat::Secs, true)),
    );
    if let Some(n) = b.items {
        row(&mut h, "Items", &n.to_string());
    }
    if let Some(s) = &b.scores {
        row(&mut h, "Repair cost", &format!("{:.4}", s.repair_cost));
        row(&mut h, "Damage (nats)", &format!("{:.4}", s.damage));
    }
    if let Some(bl) = &report.baseline {
        row(
            &mut h,
            "Vendor baseline",
            &html_escape(&format!(
                "median {:.4} over {} accepted batches{}; modified z {:.2}; CUSUM {:.2} (h = {:.1})",
                bl.median,
                bl.n_history,
                if bl.cold_start { " (cold start)" } else { "" },
                bl.modified_z,
                bl.cusum,
                bl.cusum_h
            )),
        );
    }
    let _ = writeln!(h, "</table>");
    let _ = writeln!(h, "<h2>Why it was held</h2>\n<ul>");
    for r in &report.reasons {
        let _ = writeln!(
            h,
            "<li><code>{}</code>: {}</li>",
            html_escape(r.code.as_str()),
            html_escape(&r.detail)
        );
    }
    let _ = writeln!(h, "</ul>");
    let _ = writeln!(h, "<h2>Projection</h2>");
    match &report.projection {
        Some(p) => {
            render_svg(&mut h, p);
            let _ = writeln!(
                h,
                "<p>{}; axis 1 explains {:.1} %, axis 2 {:.1} % of the variance. Circles: this batch's items, coloured from blue (low suspicion) to red (high); circles with a black ring: items whose label the repair moved. Grey squares: trusted items.</p>",
                html_escape(&p.method),
                100.0 * p.explained[0],
                100.0 * p.explained[1]
            );
        }
        None => {
            let _ = writeln!(h, "<p>No projection available.</p>");
        }
    }
    if let Some(n) = &report.projection_note {
        let _ = writeln!(h, "<p>{}</p>", html_escape(n));
    }
    let _ = writeln!(
        h,
        "<h2>Items whose labels the repair moved ({})</h2>",
        report.moved_items.len()
    );
    let _ = writeln!(
        h,
        "<table><tr><th>Item</th><th>Given label</th><th>Proposed label</th><th>Suspicion</th></tr>"
    );
    for m in &report.moved_items {
        let _ = writeln!(
            h,
            "<tr><td>{}</td><td>{}</td><td>{}</td><td>{:.3}</td></tr>",
            html_escape(&m.id),
            html_escape(&m.label),
            html_escape(&m.proposed_label),
            m.suspicion
        );
    }
    let _ = writeln!(h, "</table>");
    let _ = writeln!(
        h,
        "<h2>Trusted items the batch as delivered would break ({})</h2>",
        report.broken_trusted.len()
    );
    let _ = writeln!(
        h,
        "<table><tr><th>Trusted item</th><th>Verified label</th><th>Predicted with the batch</th></tr>"
    );
    for t in &report.broken_trusted {
        let _ = writeln!(
            h,
            "<tr><td>{}</td><td>{}</td><td>{}</td></tr>",
            html_escape(&t.id),
            html_escape(t.label.as_deref().unwrap_or("")),
            html_escape(t.predicted_with_batch.as_deref().unwrap_or(""))
        );
    }
    let _ = writeln!(h, "</table>");
    let _ = writeln!(h, "<h2>History</h2>");
    let _ = writeln!(
        h,
        "<table><tr><th>When</th><th>Who</th><th>What</th><th>Outcome</th><th>Reason</th></tr>"
    );
    for a in &report.history {
        let _ = writeln!(
            h,
            "<tr><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td></tr>",
            html_escape(&a.at.to_rfc3339_opts(SecondsFormat::Secs, true)),
            html_escape(&a.actor),
            html_escape(&a.action),
            html_escape(a.outcome.as_deref().unwrap_or("")),
            html_escape(a.reason.as_deref().unwrap_or(""))
        );
    }
    let _ = writeln!(h, "</table>");
    let _ = writeln!(h, "</body>\n</html>");
    h
}

fn render_svg(h: &mut String, p: &Projection) {
    use std::fmt::Write as _;
    const W: f64 = 640.0;
    const H: f64 = 480.0;
    const M: f64 = 24.0;
    let (mut x0, mut x1, mut y0, mut y1) = (f64::MAX, f64::MIN, f64::MAX, f64::MIN);
    for q in &p.points {
        x0 = x0.min(q.x);
        x1 = x1.max(q.x);
        y0 = y0.min(q.y);
        y1 = y1.max(q.y);
    }
    if p.points.is_empty() {
        (x0, x1, y0, y1) = (-1.0, 1.0, -1.0, 1.0);
    }
    let sx = (W - 2.0 * M) / (x1 - x0).max(1e-12);
    let sy = (H - 2.0 * M) / (y1 - y0).max(1e-12);
    let px = |x: f64| M + (x - x0) * sx;
    let py = |y: f64| H - M - (y - y0) * sy;
    let _ = writeln!(
        h,
        "<svg xmlns=\"http://www.w3.org/2000/svg\" width=\"{W}\" height=\"{H}\" viewBox=\"0 0 {W} {H}\" role=\"img\" aria-label=\"projection of the batch items beside the trusted items\">"
    );
    // Trusted items first (underneath).
    for q in p.points.iter().filter(|q| q.group == "trusted") {
        let _ = writeln!(
            h,
            "<rect class=\"trusted\" x=\"{:.1}\" y=\"{:.1}\" width=\"5\" height=\"5\" fill=\"#bdbdbd\" stroke=\"#616161\" stroke-width=\"0.5\"><title>trusted {} ({})</title></rect>",
            px(q.x) - 2.5,
            py(q.y) - 2.5,
            html_escape(&q.id),
            html_escape(&q.label)
        );
    }
    for q in p.points.iter().filter(|q| q.group == "batch") {
        let moved = q.proposed_label.is_some();
        let title = match &q.proposed_label {
            Some(pl) => format!(
                "{}: given {}, proposed {}, suspicion {}",
                q.id,
                q.label,
                pl,
                q.suspicion.map_or("?".into(), |s| format!("{s:.3}"))
            ),
            None => format!(
                "{}: given {}, suspicion {}",
                q.id,
                q.label,
                q.suspicion.map_or("?".into(), |s| format!("{s:.3}"))
            ),
        };
        let _ = writeln!(
            h,
            "<circle class=\"batch{}\" cx=\"{:.1}\" cy=\"{:.1}\" r=\"{}\" fill=\"{}\" stroke=\"{}\" stroke-width=\"{}\"><title>{}</title></circle>",
            if moved { " moved" } else { "" },
            px(q.x),
            py(q.y),
            if moved { 4.5 } else { 3.5 },
            suspicion_colour(q.suspicion),
            if moved { "#000000" } else { "none" },
            if moved { 1.5 } else { 0.0 },
            html_escape(&title)
        );
    }
    let _ = writeln!(h, "</svg>");
}

// ------------------------------------------------------------------------------------------------
// Decisions
// ------------------------------------------------------------------------------------------------

/// What a decision did.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct DecisionReport {
    /// The batch.
    pub batch_id: String,
    /// Vendor.
    pub vendor: String,
    /// The new state.
    pub state: BatchState,
    /// Reviewer.
    pub by: String,
    /// Why.
    pub reason: String,
    /// Items that went into the pool (release).
    pub items_into_pool: usize,
    /// Items left out (release).
    pub excluded: Vec<String>,
    /// `(id, from, to)` label changes (release).
    pub relabeled: Vec<(String, String, String)>,
    /// Items added to the trusted set (release with promotion).
    pub promoted: Vec<String>,
    /// Where the batch file is now.
    pub file: Option<PathBuf>,
    /// Notice files written.
    pub notices: Vec<String>,
    /// Problems after the decision was recorded (the decision stands; rerun a review command to finish
    /// moving files).
    pub warnings: Vec<String>,
}

impl DecisionReport {
    /// A report for a decision just recorded on `settled`, with nothing moved or written yet.
    fn new(settled: &BatchRecord, by: &str, reason: &str) -> Self {
        Self {
            batch_id: settled.id.clone(),
            vendor: settled.vendor.clone(),
            state: settled.state,
            by: by.to_string(),
            reason: reason.to_string(),
            items_into_pool: 0,
            excluded: Vec::new(),
            relabeled: Vec::new(),
            promoted: Vec::new(),
            file: None,
            notices: Vec::new(),
            warnings: Vec::new(),
        }
    }
}

fn require_reason(reason: &str) -> Result<(), ReviewError> {
    if reason.trim().is_empty() {
        return Err(ReviewError::Invalid(
            "a decision needs a reason (--reason)".into(),
        ));
    }
    Ok(())
}

fn require_by(by: &str) -> Result<(), ReviewError> {
    if by.trim().is_empty() {
        return Err(ReviewError::Invalid(
            "a decision needs a reviewer (--by)".into(),
        ));
    }
    Ok(())
}

fn expect_state(rec: &BatchRecord, allowed: &[BatchState], what: &str) -> Result<(), ReviewError> {
    if allowed.contains(&rec.state) {
        Ok(())
    } else {
        Err(ReviewError::Refused(format!(
            "batch {} is {}; only {} batches can be {what}",
            rec.id,
            rec.state,
            allowed
                .iter()
                .map(|s| s.as_str())
                .collect::<Vec<_>>()
                .join(" or ")
        )))
    }
}

fn caller_detail(env: &ReviewEnv<'_>) -> serde_json::Value {
    serde_json::json!({ "os_uid": env.caller.uid, "via": env.caller.via })
}

/// Release a quarantined batch into the pool, possibly with items excluded or relabeled, and optionally
/// promote verified items into the trusted set.
pub fn release(env: &ReviewEnv<'_>, req: &ReleaseRequest) -> Result<DecisionReport, ReviewError> {
    require_reason(&req.reason)?;
    require_by(&req.by)?;
    // Best effort: a move a crash interrupted; each decision reports problems with its own move.
    let _ = finish_moves(env);
    let rec = get_batch(env.store, &req.batch)?;
    expect_state(&rec, &[BatchState::Quarantined], "released")?;
    let table = match read_batch_table(env, &rec) {
        Ok(t) => t,
        Err(e) => {
            // Another reviewer may have just decided it and moved the file.
            let now = get_batch(env.store, &req.batch)?;
            expect_state(&now, &[BatchState::Quarantined], "released")?;
            return Err(e);
        }
    };
    let classes = Classes::from_labels(&env.meta.classes);
    let index: HashMap<&str, usize> = table
        .ids
        .iter()
        .enumerate()
        .map(|(i, id)| (id.as_str(), i))
        .collect();
    let find = |id: &str| {
        index.get(id).copied().ok_or_else(|| {
            ReviewError::Invalid(format!(
                "batch {} has no item {}",
                rec.id,
                crate::text::sanitize(id)
            ))
        })
    };
    let mut labels: Vec<String> = table.labels.clone();
    let mut excluded = HashSet::new();
    for id in &req.exclude {
        excluded.insert(find(id)?);
    }
    let mut explicit = HashSet::new();
    let mut relabeled = Vec::new();
    for (id, label) in &req.relabel {
        let i = find(id)?;
        if excluded.contains(&i) {
            return Err(ReviewError::Invalid(format!(
                "item {} is both excluded and relabeled",
                crate::text::sanitize(id)
            )));
        }
        if classes.index_of(label).is_none() {
            return Err(ReviewError::Invalid(format!(
                "unknown class {} (classes: {})",
                crate::text::sanitize(label),
                env.meta.classes.join(", ")
            )));
        }
        explicit.insert(i);
        if labels[i] != *label {
            relabeled.push((id.clone(), labels[i].clone(), label.clone()));
            labels[i] = label.clone();
        }
    }
    if req.accept_proposed {
        let proposals = proposals_for(env, &rec, &table)?;
        for (i, proposed) in proposals {
            if excluded.contains(&i) || explicit.contains(&i) || labels[i] == proposed {
                continue;
            }
            relabeled.push((table.ids[i].clone(), labels[i].clone(), proposed.clone()));
            labels[i] = proposed;
        }
    }
    let mut promote = Vec::new();
    for id in &req.promote {
        let i = find(id)?;
        if excluded.contains(&i) {
            return Err(ReviewError::Invalid(format!(
                "item {} is excluded and cannot be promoted",
                crate::text::sanitize(id)
            )));
        }
        promote.push(i);
    }
    let keep: Vec<usize> = (0..table.len()).filter(|i| !excluded.contains(i)).collect();
    let d = table.features.ncols();
    let entry = PoolEntry {
        batch_id: rec.id.clone(),
        vendor: rec.vendor.clone(),
        ids: keep.iter().map(|&i| table.ids[i].clone()).collect(),
        labels: keep
            .iter()
            .map(|&i| classes.index_of(&labels[i]).unwrap_or(0))
            .collect(),
        x: keep
            .iter()
            .flat_map(|&i| table.features.row(i).to_vec())
            .collect(),
        n_features: d,
    };
    let mut excluded_ids: Vec<String> = excluded.iter().map(|&i| table.ids[i].clone()).collect();
    excluded_ids.sort();
    let n_pool = entry.ids.len();
    let mut detail = caller_detail(env);
    detail["excluded"] = serde_json::json!(excluded_ids);
    detail["relabeled"] = serde_json::json!(relabeled);
    detail["accept_proposed"] = serde_json::json!(req.accept_proposed);
    detail["items_into_pool"] = serde_json::json!(n_pool);
    let audit = AuditRecord::new(&req.by, "release")
        .batch(&rec.id, &rec.vendor)
        .outcome(BatchState::Released.as_str())
        .reason(req.reason.clone())
        .detail(detail);
    let pool = if n_pool > 0 {
        PoolChange::Add(entry)
    } else {
        PoolChange::None
    };
    // The vendor notice is recorded with the decision (an outbox: see `finish_pending`).
    let items: Vec<NoticeItem> = excluded_ids
        .iter()
        .map(|id| NoticeItem {
            id: id.clone(),
            reasons: vec![item_codes::EXCLUDED_BY_REVIEWER.into()],
            proposed_label: None,
            suspicion: None,
        })
        .chain(relabeled.iter().map(|(id, _, to)| NoticeItem {
            id: id.clone(),
            reasons: vec![item_codes::RELABELED_BY_REVIEWER.into()],
            proposed_label: Some(to.clone()),
            suspicion: None,
        }))
        .collect();
    let mut n = review_notice(
        &rec,
        NoticeVerdict::Released,
        NoticeReason::new(
            "released_on_review",
            "A reviewer checked the flagged items and released the batch.",
        ),
    );
    n.items_total = rec.items.map(|x| x as u64);
    n.items_listed_total = items.len() as u64;
    n.items = items;
    let settled = env.store.transition(
        &rec.id,
        &[BatchState::Quarantined],
        BatchState::Released,
        pool,
        vec![audit],
        |r| r.pending_notices.push(n.clone()),
    )?;
    env.hooks.pool_changed();
    let mut report = DecisionReport::new(&settled, &req.by, &req.reason);
    report.items_into_pool = n_pool;
    report.excluded = excluded_ids.clone();
    report.relabeled = relabeled.clone();
    // Promotion: the verified items join the trusted set with their final labels.
    if !promote.is_empty() {
        let now = Utc::now();
        let items: Vec<TrustedItem> = promote
            .iter()
            .map(|&i| TrustedItem {
                version: RECORD_VERSION,
                id: table.ids[i].clone(),
                label: labels[i].clone(),
                features: table.features.row(i).to_vec(),
                weight: 1.0,
                added_by: req.by.clone(),
                added_at: now,
                source: format!("review of batch {} (vendor {})", rec.id, rec.vendor),
            })
            .collect();
        let existing: HashSet<String> = env
            .store
            .trusted_items()?
            .into_iter()
            .map(|t| t.id)
            .collect();
        let fresh: Vec<TrustedItem> = items
            .into_iter()
            .filter(|t| {
                let dup = existing.contains(&t.id);
                if dup {
                    report.warnings.push(format!(
                        "item {} not promoted: the trusted set already has an item with that id",
                        crate::text::sanitize(&t.id)
                    ));
                }
                !dup
            })
            .collect();
        if !fresh.is_empty() {
            let ids: Vec<String> = fresh.iter().map(|t| t.id.clone()).collect();
            let mut detail = caller_detail(env);
            detail["ids"] = serde_json::json!(ids);
            detail["source"] = serde_json::json!(fresh[0].source);
            let audit = AuditRecord::new(&req.by, "trusted_promote")
                .batch(&rec.id, &rec.vendor)
                .reason(req.reason.clone())
                .detail(detail);
            match env.store.update_trusted(&fresh, &[], vec![audit]) {
                Ok(()) => {
                    env.hooks.trusted_changed();
                    report.promoted = ids;
                }
                Err(e) => report
                    .warnings
                    .push(format!("promotion to the trusted set failed: {e}")),
            }
        }
    }
    // Side effects after the flushed decision.
    finish_decision(env, &settled, &req.by, &mut report);
    Ok(report)
}

/// `(row, proposed class name)` for every item whose label the repair moved: from the full report when
/// it was kept, else from the record's suspects.
fn proposals_for(
    env: &ReviewEnv<'_>,
    rec: &BatchRecord,
    table: &Table,
) -> Result<Vec<(usize, String)>, ReviewError> {
    if let Some(a) = env.store.assessment(&rec.id)? {
        if a.items.len() == table.len() {
            return Ok(a
                .items
                .iter()
                .filter(|s| s.proposed_label != s.label)
                .filter_map(|s| {
                    env.meta
                        .classes
                        .get(s.proposed_label)
                        .map(|c| (s.index, c.clone()))
                })
                .collect());
        }
    }
    let index: HashMap<&str, usize> = table
        .ids
        .iter()
        .enumerate()
        .map(|(i, id)| (id.as_str(), i))
        .collect();
    Ok(rec
        .suspects
        .iter()
        .filter(|s| s.proposed_label != s.label)
        .filter_map(|s| {
            index
                .get(s.id.as_str())
                .map(|&i| (i, s.proposed_label.clone()))
        })
        .collect())
}

/// Reject a quarantined batch: it stays out of the pool and the vendor is told.
pub fn reject(env: &ReviewEnv<'_>, req: &RejectRequest) -> Result<DecisionReport, ReviewError> {
    require_reason(&req.reason)?;
    require_by(&req.by)?;
    // Best effort: a move a crash interrupted; each decision reports problems with its own move.
    let _ = finish_moves(env);
    let rec = get_batch(env.store, &req.batch)?;
    expect_state(&rec, &[BatchState::Quarantined], "rejected")?;
    let mut detail = caller_detail(env);
    detail["disclose_proposed"] = serde_json::json!(req.disclose_proposed);
    let audit = AuditRecord::new(&req.by, "reject")
        .batch(&rec.id, &rec.vendor)
        .outcome(BatchState::ReviewRejected.as_str())
        .reason(req.reason.clone())
        .detail(detail);
    let mut n = review_notice(
        &rec,
        NoticeVerdict::Rejected,
        NoticeReason::new(
            "rejected_on_review",
            "A reviewer checked the flagged items and rejected the batch.",
        ),
    );
    let items: Vec<NoticeItem> = rec
        .suspects
        .iter()
        .filter(|s| s.proposed_label != s.label)
        .map(|s| NoticeItem {
            id: s.id.clone(),
            reasons: vec![item_codes::LABEL_SUSPECTED.into()],
            proposed_label: Some(s.proposed_label.clone()),
            suspicion: Some(s.suspicion),
        })
        .collect();
    n.items_total = rec.items.map(|x| x as u64);
    n.items_listed_total =
        rec.scores
            .as_ref()
            .map_or(items.len(), |s| s.flagged_items.max(items.len())) as u64;
    n.items = items;
    n.disclosure.by_reviewer = req.disclose_proposed;
    n.disclosure.proposed_labels = req.disclose_proposed;
    let settled = env.store.transition(
        &rec.id,
        &[BatchState::Quarantined],
        BatchState::ReviewRejected,
        PoolChange::None,
        vec![audit],
        |r| r.pending_notices.push(n.clone()),
    )?;
    let mut report = DecisionReport::new(&settled, &req.by, &req.reason);
    finish_decision(env, &settled, &req.by, &mut report);
    Ok(report)
}

/// Pull an accepted or released batch back out of the pool (e.g. after a re-scan flagged it).
pub fn withdraw(env: &ReviewEnv<'_>, req: &WithdrawRequest) -> Result<DecisionReport, ReviewError> {
    require_reason(&req.reason)?;
    require_by(&req.by)?;
    // Best effort: a move a crash interrupted; each decision reports problems with its own move.
    let _ = finish_moves(env);
    let rec = get_batch(env.store, &req.batch)?;
    let allowed = [BatchState::Accepted, BatchState::Released];
    expect_state(&rec, &allowed, "withdrawn")?;
    let audit = AuditRecord::new(&req.by, "withdraw")
        .batch(&rec.id, &rec.vendor)
        .outcome(BatchState::Withdrawn.as_str())
        .reason(req.reason.clone())
        .detail(caller_detail(env));
    let mut n = review_notice(
        &rec,
        NoticeVerdict::Withdrawn,
        NoticeReason::new(
            "withdrawn_on_review",
            "After a re-check, a reviewer took the batch back out of the training pool.",
        ),
    );
    n.items_total = rec.items.map(|x| x as u64);
    let settled = env.store.transition(
        &rec.id,
        &allowed,
        BatchState::Withdrawn,
        PoolChange::Remove,
        vec![audit],
        |r| r.pending_notices.push(n.clone()),
    )?;
    env.hooks.pool_changed();
    let mut report = DecisionReport::new(&settled, &req.by, &req.reason);
    finish_decision(env, &settled, &req.by, &mut report);
    Ok(report)
}

fn review_notice(rec: &BatchRecord, verdict: NoticeVerdict, reason: NoticeReason) -> Notice {
    let mut n = Notice::new(
        verdict,
        DecidedBy::Reviewer,
        BatchRef {
            batch_id: rec.id.clone(),
            vendor: rec.vendor.clone(),
            file_name: Some(rec.original_name.clone()),
            sha256: rec.sha256.clone(),
            received_at: rec.claimed_at,
            decided_at: Utc::now(),
        },
    );
    n.reasons.push(reason);
    // The policy's original reasons (their numbers are removed unless scores are disclosed).
    if let Some(d) = &rec.decision {
        if d.verdict == Verdict::Quarantine {
            n.reasons.extend(
                d.reasons
                    .iter()
                    .map(|r| NoticeReason::new(r.code.as_str(), r.detail.clone())),
            );
        }
    }
    n
}

/// Move the file, then write the notice recorded with the decision and clear it from the record (with an
/// audit entry). Failures become warnings: the decision itself is already recorded, and the next review
/// command or daemon start finishes what is left ([`finish_pending`]).
fn finish_decision(env: &ReviewEnv<'_>, rec: &BatchRecord, by: &str, report: &mut DecisionReport) {
    match move_for_state(env.ws, rec) {
        Ok(p) => report.file = p,
        Err(e) => report.warnings.push(format!(
            "moving the batch file failed ({e}); the next review command retries"
        )),
    }
    match send_pending_notice(env.ws, env.config, env.store, rec, by) {
        Ok(files) => report.notices = files,
        Err(e) => report.warnings.push(format!(
            "writing the vendor notice failed ({e}); the next review command retries"
        )),
    }
}

/// Write a record's pending vendor notices, then remove them from the record in the store together with
/// an audit entry each naming the files ([`Store::notices_sent`]). Writing is idempotent (same file
/// names), so a crash between the two, or two processes finishing the same decision, only writes the
/// same files again. Returns the file names (none when nothing was pending).
fn send_pending_notice(
    ws: &Workspace,
    config: &Config,
    store: &Store,
    rec: &BatchRecord,
    by: &str,
) -> Result<Vec<String>, ReviewError> {
    if rec.pending_notices.is_empty() {
        return Ok(Vec::new());
    }
    let dir = ws.notices(&rec.vendor);
    let mut files = Vec::new();
    let mut audits = Vec::new();
    for pending in &rec.pending_notices {
        let paths =
            notice::write_notice(&dir, pending, &config.notices).map_err(io_err(dir.display()))?;
        let these: Vec<String> = paths
            .iter()
            .filter_map(|p| p.file_name().map(|s| s.to_string_lossy().into_owned()))
            .collect();
        audits.push(
            AuditRecord::new(by, "notice")
                .batch(&rec.id, &rec.vendor)
                .outcome(pending.verdict.as_str())
                .detail(serde_json::json!({ "files": these })),
        );
        files.extend(these);
    }
    // Recorded only if still pending: whoever sent them first keeps the single audit entry.
    store.notices_sent(&rec.id, &rec.pending_notices, &files, audits)?;
    Ok(files)
}

/// Move a decided batch's file (and its report) out of `quarantine/` or `accepted/` into the folder its
/// state calls for. Idempotent; returns where the file is.
fn move_for_state(ws: &Workspace, rec: &BatchRecord) -> Result<Option<PathBuf>, ReviewError> {
    let Some(dest) = folder_for_state(rec.state) else {
        return Ok(None);
    };
    let dest_dir = ws.folder(dest);
    let target = dest_dir.join(&rec.file_name);
    let report_name = crate::pipeline::file::report_name(rec);
    for src in ["quarantine", "accepted"] {
        if src == dest {
            continue;
        }
        let src_dir = ws.folder(src);
        let mut moved = false;
        for name in [rec.file_name.as_str(), report_name.as_str()] {
            let from = src_dir.join(name);
            if std::fs::symlink_metadata(&from).is_ok() {
                let to = dest_dir.join(name);
                if std::fs::symlink_metadata(&to).is_ok() {
                    // A previous attempt already put a copy there.
                    std::fs::remove_file(&from).map_err(io_err(from.display()))?;
                } else {
                    std::fs::rename(&from, &to).map_err(io_err(from.display()))?;
                }
                moved = true;
            }
        }
        if moved {
            crate::fsx::sync_dir(&dest_dir).map_err(io_err(dest_dir.display()))?;
            crate::fsx::sync_dir(&src_dir).map_err(io_err(src_dir.display()))?;
        }
    }
    Ok(target.exists().then_some(target))
}

/// Finish what a crash interrupted after a review decision was recorded: file moves and vendor notices.
fn finish_moves(env: &ReviewEnv<'_>) -> Result<usize, ReviewError> {
    finish_pending(env.ws, env.config, env.store)
}

/// Finish what a crash interrupted after review decisions were recorded: move each decided file into
/// the folder its state calls for, and write each notice still pending in its record (an outbox: the
/// notice is stored in the same transaction as the decision, so it cannot be lost). Returns how many
/// moves and notices it did. Run by every review command and at the daemon's start.
pub fn finish_pending(
    ws: &Workspace,
    config: &Config,
    store: &Store,
) -> Result<usize, ReviewError> {
    let mut n = 0;
    for rec in store.batches_in(&[
        BatchState::Released,
        BatchState::ReviewRejected,
        BatchState::Withdrawn,
    ])? {
        let dest = folder_for_state(rec.state).unwrap_or("rejected");
        if !ws.folder(dest).join(&rec.file_name).exists() {
            move_for_state(ws, &rec)?;
            n += 1;
        }
        if !rec.pending_notices.is_empty() {
            send_pending_notice(ws, config, store, &rec, "labelweir")?;
            n += 1;
        }
    }
    Ok(n)
}

// ------------------------------------------------------------------------------------------------
// Trusted set
// ------------------------------------------------------------------------------------------------

/// A trusted item with its provenance (no features).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct TrustedView {
    /// Item id.
    pub id: String,
    /// Verified label.
    pub label: String,
    /// Who verified it.
    pub added_by: String,
    /// When it entered the set.
    pub added_at: DateTime<Utc>,
    /// Where it came from.
    pub source: String,
}

/// Class balance of the trusted set.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Balance {
    /// `(class, items)` in class order.
    pub per_class: Vec<(String, usize)>,
    /// Total items.
    pub total: usize,
    /// Warnings: classes with too few items to judge batches against, strong imbalance.
    pub warnings: Vec<String>,
}

/// Check size and class balance: a class below `min_items_per_class` gets a warning; so does a ratio of
/// more than 10 between the largest and the smallest class.
pub fn balance(classes: &[String], items: &[TrustedItem], settings: &TrustedSettings) -> Balance {
    let mut count: BTreeMap<&str, usize> = classes.iter().map(|c| (c.as_str(), 0)).collect();
    for t in items {
        if let Some(c) = count.get_mut(t.label.as_str()) {
            *c += 1;
        }
    }
    let per_class: Vec<(String, usize)> = classes
        .iter()
        .map(|c| (c.clone(), count.get(c.as_str()).copied().unwrap_or(0)))
        .collect();
    let mut warnings = Vec::new();
    for (c, n) in &per_class {
        if *n < settings.min_items_per_class {
            warnings.push(format!(
                "class {} has {n} trusted item(s), fewer than min_items_per_class = {}: batches cannot be judged reliably on this class",
                crate::text::sanitize(c),
                settings.min_items_per_class
            ));
        }
    }
    let max = per_class.iter().map(|p| p.1).max().unwrap_or(0);
    let min = per_class.iter().map(|p| p.1).min().unwrap_or(0);
    if min > 0 && max > 10 * min {
        warnings.push(format!(
            "the trusted set is strongly imbalanced: {max} items in the largest class, {min} in the smallest"
        ));
    }
    Balance {
        total: items.len(),
        per_class,
        warnings,
    }
}

/// The items the rolling window removes, oldest first within each class:
///
/// * with `max_age_days > 0`, items verified more than that many days before `now`, while the class
///   keeps more than `min_items_per_class` items;
/// * with `max_items_per_class > 0`, the oldest items beyond that many per class.
pub fn window_removals(
    items: &[TrustedItem],
    settings: &TrustedSettings,
    now: DateTime<Utc>,
) -> Vec<String> {
    let mut by_class: BTreeMap<&str, Vec<&TrustedItem>> = BTreeMap::new();
    for t in items {
        by_class.entry(t.label.as_str()).or_default().push(t);
    }
    let mut out = Vec::new();
    for (_, mut v) in by_class {
        v.sort_by(|a, b| a.added_at.cmp(&b.added_at).then(a.id.cmp(&b.id)));
        let mut left = v.len();
        let mut start = 0;
        if settings.max_age_days > 0 {
            let cutoff = now - ChronoDuration::days(settings.max_age_days as i64);
            while start < v.len()
                && v[start].added_at < cutoff
                && left > settings.min_items_per_class
            {
                out.push(v[start].id.clone());
                start += 1;
                left -= 1;
            }
        }
        if settings.max_items_per_class > 0 {
            while left > settings.max_items_per_class {
                out.push(v[start].id.clone());
                start += 1;
                left -= 1;
            }
        }
    }
    out
}

/// The trusted set with provenance and balance.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct TrustedReport {
    /// Items, in id order.
    pub items: Vec<TrustedView>,
    /// Balance and warnings.
    pub balance: Balance,
}

/// List the trusted set.
pub fn trusted_list(env: &ReviewEnv<'_>) -> Result<TrustedReport, ReviewError> {
    let items = env.store.trusted_items()?;
    let balance = balance(&env.meta.classes, &items, &env.config.trusted);
    Ok(TrustedReport {
        items: items
            .into_iter()
            .map(|t| TrustedView {
                id: t.id,
                label: t.label,
                added_by: t.added_by,
                added_at: t.added_at,
                source: t.source,
            })
            .collect(),
        balance,
    })
}

/// What a trusted-set change did.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct TrustedChange {
    /// Items added.
    pub added: Vec<String>,
    /// Items replaced (same id, new content).
    pub replaced: Vec<String>,
    /// Items removed on request.
    pub removed: Vec<String>,
    /// Items the rolling window removed.
    pub expired: Vec<String>,
    /// Balance after the change.
    pub balance: Balance,
    /// The re-check of recently accepted batches.
    pub rescan: RescanReport,
}

/// Add trusted items from a file (CSV or JSON Lines in the workspace's schema, labels among the
/// workspace's classes), with provenance, then apply the window and re-check recent batches.
pub fn trusted_add(
    env: &ReviewEnv<'_>,
    req: &TrustedAddRequest,
) -> Result<TrustedChange, ReviewError> {
    require_by(&req.by)?;
    if req.source.trim().is_empty() {
        return Err(ReviewError::Invalid(
            "trusted items need a source (--source): where were they verified?".into(),
        ));
    }
    let format = Format::from_path(Path::new(&req.file_name)).ok_or_else(|| {
        ReviewError::Invalid(format!(
            "{}: expected a .csv or .jsonl file",
            crate::text::sanitize(&req.file_name)
        ))
    })?;
    let table = data::parse_table(
        req.content.as_bytes(),
        format,
        &crate::text::sanitize(&req.file_name),
        &env.config.table_options(),
        Some(&env.meta.features),
    )
    .map_err(|e| ReviewError::Invalid(e.to_string()))?;
    let classes = Classes::from_labels(&env.meta.classes);
    table
        .class_indices_in(&classes, &env.config.schema.label_column)
        .map_err(|e| ReviewError::Invalid(e.to_string()))?;
    let existing = env.store.trusted_items()?;
    let existing_ids: HashSet<&str> = existing.iter().map(|t| t.id.as_str()).collect();
    let mut replaced = Vec::new();
    for id in &table.ids {
        if existing_ids.contains(id.as_str()) {
            if !req.replace {
                return Err(ReviewError::Invalid(format!(
                    "the trusted set already has an item {} (use --replace to replace it)",
                    crate::text::sanitize(id)
                )));
            }
            replaced.push(id.clone());
        }
    }
    let now = Utc::now();
    let new_items: Vec<TrustedItem> = (0..table.len())
        .map(|i| TrustedItem {
            version: RECORD_VERSION,
            id: table.ids[i].clone(),
            label: table.labels[i].clone(),
            features: table.features.row(i).to_vec(),
            weight: 1.0,
            added_by: req.by.clone(),
            added_at: now,
            source: req.source.clone(),
        })
        .collect();
    // The set after the change, for the window.
    let new_ids: HashSet<&str> = new_items.iter().map(|t| t.id.as_str()).collect();
    let mut after: Vec<TrustedItem> = existing
        .iter()
        .filter(|t| !new_ids.contains(t.id.as_str()))
        .cloned()
        .collect();
    after.extend(new_items.iter().cloned());
    let expired = window_removals(&after, &env.config.trusted, now);
    let added: Vec<String> = new_items
        .iter()
        .map(|t| t.id.clone())
        .filter(|id| !replaced.contains(id))
        .collect();
    let mut detail = caller_detail(env);
    detail["file"] = serde_json::json!(crate::text::sanitize(&req.file_name));
    detail["source"] = serde_json::json!(req.source);
    detail["added"] = serde_json::json!(capped(&added));
    detail["replaced"] = serde_json::json!(capped(&replaced));
    detail["count"] = serde_json::json!(new_items.len());
    let mut audits = vec![AuditRecord::new(&req.by, "trusted_add")
        .reason(req.source.clone())
        .detail(detail)];
    if !expired.is_empty() {
        audits.push(
            AuditRecord::new(&req.by, "trusted_expire")
                .reason("rolling window ([trusted] max_items_per_class / max_age_days)")
                .detail(serde_json::json!({ "ids": capped(&expired) })),
        );
    }
    env.store.update_trusted(&new_items, &expired, audits)?;
    env.hooks.trusted_changed();
    let expired_set: HashSet<&str> = expired.iter().map(|s| s.as_str()).collect();
    after.retain(|t| !expired_set.contains(t.id.as_str()));
    let balance = balance(&env.meta.classes, &after, &env.config.trusted);
    let rescan = rescan(env, &req.by)?;
    Ok(TrustedChange {
        added,
        replaced,
        removed: Vec::new(),
        expired,
        balance,
        rescan,
    })
}

fn capped(ids: &[String]) -> Vec<String> {
    ids.iter().take(1000).cloned().collect()
}

/// Remove trusted items (a reason is required), then re-check recent batches. Refuses to empty a class.
pub fn trusted_remove(
    env: &ReviewEnv<'_>,
    req: &TrustedRemoveRequest,
) -> Result<TrustedChange, ReviewError> {
    require_reason(&req.reason)?;
    require_by(&req.by)?;
    let existing = env.store.trusted_items()?;
    let ids: HashSet<&str> = existing.iter().map(|t| t.id.as_str()).collect();
    for id in &req.ids {
        if !ids.contains(id.as_str()) {
            return Err(ReviewError::NotFound(format!(
                "no trusted item {}",
                crate::text::sanitize(id)
            )));
        }
    }
    let gone: HashSet<&str> = req.ids.iter().map(|s| s.as_str()).collect();
    let after: Vec<TrustedItem> = existing
        .iter()
        .filter(|t| !gone.contains(t.id.as_str()))
        .cloned()
        .collect();
    let bal = balance(&env.meta.classes, &after, &env.config.trusted);
    if let Some((c, _)) = bal.per_class.iter().find(|(_, n)| *n == 0) {
        return Err(ReviewError::Refused(format!(
            "removing these items would leave class {} without trusted items",
            crate::text::sanitize(c)
        )));
    }
    let mut detail = caller_detail(env);
    detail["ids"] = serde_json::json!(capped(&req.ids));
    let audit = AuditRecord::new(&req.by, "trusted_remove")
        .reason(req.reason.clone())
        .detail(detail);
    env.store.update_trusted(&[], &req.ids, vec![audit])?;
    env.hooks.trusted_changed();
    let rescan = rescan(env, &req.by)?;
    Ok(TrustedChange {
        added: Vec::new(),
        replaced: Vec::new(),
        removed: req.ids.clone(),
        expired: Vec::new(),
        balance: bal,
        rescan,
    })
}

// ------------------------------------------------------------------------------------------------
// Re-scoring recently accepted batches
// ------------------------------------------------------------------------------------------------

/// One re-checked batch.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct RescanEntry {
    /// Batch id.
    pub batch_id: String,
    /// Vendor.
    pub vendor: String,
    /// When it was accepted.
    pub decided_at: Option<DateTime<Utc>>,
    /// Repair cost when it was accepted.
    pub repair_cost_then: Option<f64>,
    /// Repair cost now.
    pub repair_cost_now: Option<f64>,
    /// Damage now (nats).
    pub damage_now: Option<f64>,
    /// What the policy would decide now.
    pub verdict_now: Option<Verdict>,
    /// The policy's reason codes now.
    pub reasons: Vec<String>,
    /// Why it could not be re-scored, if it could not.
    pub error: Option<String>,
}

/// The re-check after a trusted-set change.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct RescanReport {
    /// Batches re-checked, most recent first.
    pub checked: Vec<RescanEntry>,
    /// Batches the policy would now quarantine: candidates for `labelweir quarantine withdraw`.
    pub now_suspicious: Vec<String>,
    /// How the pool entered the re-check.
    pub pool_mode: String,
}

/// Re-score the most recently accepted batches (`[trusted] rescore_lookback_batches` /
/// `rescore_lookback_days`) against the current trusted set and report those the policy would now
/// quarantine. Each batch is scored against the pool *without* its own items when the pool has at most
/// [`RESCORE_EXACT_POOL_MAX`] items (exact mode), else against the saved pool summary. Nothing is
/// changed: withdrawing a batch is a reviewer's decision.
pub fn rescan(env: &ReviewEnv<'_>, by: &str) -> Result<RescanReport, ReviewError> {
    let s = &env.config.trusted;
    let mut candidates = env
        .store
        .batches_in(&[BatchState::Accepted, BatchState::Released])?;
    candidates.sort_by(|a, b| b.decided_at.cmp(&a.decided_at).then(b.id.cmp(&a.id)));
    let cutoff = (s.rescore_lookback_days > 0)
        .then(|| Utc::now() - ChronoDuration::days(s.rescore_lookback_days as i64));
    candidates.retain(|b| match (cutoff, b.decided_at) {
        (Some(c), Some(t)) => t >= c,
        _ => true,
    });
    candidates.truncate(s.rescore_lookback_batches);
    let mut report = RescanReport {
        checked: Vec::new(),
        now_suspicious: Vec::new(),
        pool_mode: String::new(),
    };
    if candidates.is_empty() {
        report.pool_mode = "none (no recently accepted batches)".into();
        return Ok(report);
    }
    let trusted = crate::pipeline::score::TrustedArrays::load(env.store, env.meta)?;
    let pool_items = env.store.pool_items()?;
    let exact = pool_items <= RESCORE_EXACT_POOL_MAX;
    // Every pool entry (the re-checked batches' own items come from here too).
    let entries = env.store.pool_entries_after(0)?;
    let summary = if exact {
        None
    } else {
        env.store.saved_summary()?.map(|s| s.summary)
    };
    report.pool_mode = if exact {
        "exact: the pool without the re-checked batch".into()
    } else {
        "summary: the saved pool summary (includes the re-checked batch; conservative)".into()
    };
    let d = env.meta.features.len();
    let k = env.meta.classes.len();
    for rec in candidates {
        let mut entry = RescanEntry {
            batch_id: rec.id.clone(),
            vendor: rec.vendor.clone(),
            decided_at: rec.decided_at,
            repair_cost_then: rec.scores.as_ref().map(|s| s.repair_cost),
            repair_cost_now: None,
            damage_now: None,
            verdict_now: None,
            reasons: Vec::new(),
            error: None,
        };
        // The batch's items as they are in the pool (a release may have edited them).
        let own = entries
            .iter()
            .find(|(_, e)| e.batch_id == rec.id)
            .map(|(_, e)| e.clone());
        let Some(own) = own else {
            entry.error = Some("its items are not in the pool".into());
            report.checked.push(entry);
            continue;
        };
        let bx = own.features();
        let result = std::panic::catch_unwind(std::panic::AssertUnwindSafe(|| {
            let pool_xy = exact.then(|| {
                let mut x = Vec::new();
                let mut y = Vec::new();
                for (_, e) in entries.iter().filter(|(_, e)| e.batch_id != rec.id) {
                    if e.n_features == d {
                        x.extend_from_slice(&e.x);
                        y.extend_from_slice(&e.labels);
                    }
                }
                let n = y.len();
                (
                    Array2::from_shape_vec((n, d), x).unwrap_or_else(|_| Array2::zeros((0, d))),
                    y,
                )
            });
            let pool = match (&pool_xy, &summary) {
                (Some((x, y)), _) if !y.is_empty() => PoolInput::Exact { x: x.view(), y },
                (Some(_), _) => PoolInput::Empty,
                (None, Some(s)) => PoolInput::Summary(s),
                (None, None) => PoolInput::Empty,
            };
            model::assess(
                &env.config.model,
                &env.meta.feature_map.standardizer,
                k,
                TrustedInput {
                    x: trusted.x.view(),
                    y: &trusted.y,
                    weight: trusted.w.view(),
                },
                pool,
                bx.view(),
                &own.labels,
            )
        }));
        match result {
            Ok(Ok(a)) => {
                let h = env.store.vendor_history(&rec.vendor)?;
                let dcs = policy::decide_batch(
                    &env.config.policy,
                    &h,
                    &policy::BatchSignals::from_assessment(&a, env.config.model.flag_threshold),
                );
                entry.repair_cost_now = Some(a.repair_cost);
                entry.damage_now = Some(a.damage);
                entry.verdict_now = Some(dcs.verdict);
                entry.reasons = dcs
                    .reasons
                    .iter()
                    .map(|r| r.code.as_str().to_string())
                    .collect();
                if dcs.verdict == Verdict::Quarantine {
                    report.now_suspicious.push(rec.id.clone());
                }
            }
            Ok(Err(e)) => entry.error = Some(e.to_string()),
            Err(_) => entry.error = Some("the engine failed while re-scoring".into()),
        }
        report.checked.push(entry);
    }
    let audit = AuditRecord::new(by, "rescan").detail(serde_json::json!({
        "checked": report.checked.iter().map(|c| c.batch_id.clone()).collect::<Vec<_>>(),
        "now_suspicious": report.now_suspicious,
        "pool_mode": report.pool_mode,
    }));
    env.store.append_audit(vec![audit])?;
    Ok(report)
}

// ------------------------------------------------------------------------------------------------
// Audit
// ------------------------------------------------------------------------------------------------

/// The audit trail, oldest first, filtered by time, vendor and batch.
pub fn audit(
    env: &ReviewEnv<'_>,
    since: Option<DateTime<Utc>>,
    vendor: Option<&str>,
    batch: Option<&str>,
) -> Result<Vec<AuditRecord>, ReviewError> {
    Ok(env
        .store
        .audit_since(0)?
        .into_iter()
        .filter(|a| since.is_none_or(|t| a.at >= t))
        .filter(|a| vendor.is_none_or(|v| a.vendor.as_deref() == Some(v)))
        .filter(|a| batch.is_none_or(|b| a.batch_id.as_deref() == Some(b)))
        .collect())
}

#[cfg(test)]
mod tests {
    use super::*;
    use approx::assert_relative_eq;
    use chrono::TimeZone;

    fn item(id: &str, label: &str, days_ago: i64, now: DateTime<Utc>) -> TrustedItem {
        TrustedItem {
            version: 1,
            id: id.into(),
            label: label.into(),
            features: vec![0.0],
            weight: 1.0,
            added_by: "expert".into(),
            added_at: now - ChronoDuration::days(days_ago),
            source: "lab".into(),
        }
    }

    #[test]
    fn window_caps_per_class_oldest_first() {
        let now = Utc.with_ymd_and_hms(2026, 3, 1, 0, 0, 0).unwrap();
        let items: Vec<_> = (0..8)
            .map(|i| item(&format!("pet{i}"), "PET", 10 - i, now))
            .chain((0..3).map(|i| item(&format!("gl{i}"), "glass", 5, now)))
            .collect();
        let s = TrustedSettings {
            max_items_per_class: 5,
            ..TrustedSettings::default()
        };
        let out = window_removals(&items, &s, now);
        assert_eq!(out, ["pet0", "pet1", "pet2"]);
    }

    #[test]
    fn window_age_limit_keeps_the_class_minimum() {
        let now = Utc.with_ymd_and_hms(2026, 3, 1, 0, 0, 0).unwrap();
        // 7 old items (100+ days) and 1 fresh one; min_items_per_class = 5 keeps 4 old ones.
        let items: Vec<_> = (0..7)
            .map(|i| item(&format!("old{i}"), "PET", 100 + i, now))
            .chain(std::iter::once(item("new", "PET", 1, now)))
            .collect();
        let s = TrustedSettings {
            max_age_days: 30,
            ..TrustedSettings::default()
        };
        let out = window_removals(&items, &s, now);
        // Oldest first: old6 (106 days), old5, old4.
        assert_eq!(out, ["old6", "old5", "old4"]);
    }

    #[test]
    fn balance_warns_on_thin_and_imbalanced_classes() {
        let now = Utc::now();
        let classes = vec!["PET".to_string(), "glass".to_string(), "paper".to_string()];
        let items: Vec<_> = (0..60)
            .map(|i| item(&format!("p{i}"), "PET", 0, now))
            .chain((0..3).map(|i| item(&format!("g{i}"), "glass", 0, now)))
            .chain((0..6).map(|i| item(&format!("x{i}"), "paper", 0, now)))
            .collect();
        let b = balance(&classes, &items, &TrustedSettings::default());
        assert_eq!(b.per_class[1], ("glass".to_string(), 3));
        assert_eq!(b.warnings.len(), 2, "{:?}", b.warnings);
        assert!(b.warnings[0].contains("glass"));
        assert!(b.warnings[1].contains("imbalanced"));
    }

    #[test]
    fn power_iteration_finds_the_principal_axes() {
        // Data on an ellipse-like cloud: a known covariance diag(9, 4, 1) rotated by 30° in the first
        // two coordinates. Invariant checks: C v = λ v for both axes, v₁ ⟂ v₂, λ₁ ≥ λ₂, and
        // λ₁ + λ₂ + λ₃ = tr C.
        let n = 400;
        let mut z = Array2::zeros((n, 3));
        let (c, s) = (30f64.to_radians().cos(), 30f64.to_radians().sin());
        for i in 0..n {
            // Deterministic, well-spread scores (a low-discrepancy sequence).
            let u = ((i as f64 * 0.618_033_988_7) % 1.0) * 2.0 - 1.0;
            let v = ((i as f64 * 0.414_213_562_3) % 1.0) * 2.0 - 1.0;
            let w = ((i as f64 * 0.732_050_807_6) % 1.0) * 2.0 - 1.0;
            let (a, b) = (3.0 * u, 2.0 * v);
            z[[i, 0]] = c * a - s * b + 5.0;
            z[[i, 1]] = s * a + c * b - 1.0;
            z[[i, 2]] = w;
        }
        let (axes, lambdas, trace, mean) = principal_axes(z.view());
        let zc = &z - &mean.view().insert_axis(Axis(0));
        let cov = zc.t().dot(&zc) / n as f64;
        for (k, &lambda) in lambdas.iter().enumerate() {
            let v = axes.column(k).to_owned();
            let r = cov.dot(&v) - &v * lambda;
            assert!(r.dot(&r).sqrt() < 1e-6 * lambda, "residual for axis {k}");
            assert_relative_eq!(v.dot(&v), 1.0, epsilon = 1e-9);
        }
        assert!(axes.column(0).dot(&axes.column(1)).abs() < 1e-8);
        assert!(lambdas[0] >= lambdas[1]);
        assert_relative_eq!(trace, cov.diag().sum(), max_relative = 1e-12);
        // The first axis is the 30° direction (up to sign).
        assert!((axes[[0, 0]] * c + axes[[1, 0]] * s).abs() > 0.99);
    }

    #[test]
    fn the_page_escapes_vendor_strings_and_loads_nothing() {
        let mut rec = BatchRecord::claimed(
            "b00000001".into(),
            "north-sort",
            "<script>alert(1)</script>.csv".into(),
            "b00000001.csv".into(),
        );
        rec.state = BatchState::Quarantined;
        let hostile = "\"><img src=x onerror=alert(1)>\u{202E}";
        let report = ShowReport {
            batch: rec,
            reasons: Vec::new(),
            baseline: None,
            vendor: VendorStanding {
                accepted_total: 0,
                baseline_batches: 0,
                baseline_median: 0.0,
                cusum: 0.0,
                waiting_for_review: 1,
            },
            moved_items: vec![MovedItem {
                id: hostile.into(),
                label: "paper".into(),
                proposed_label: "pet".into(),
                suspicion: 0.9,
                confidence: 0.8,
            }],
            broken_trusted: Vec::new(),
            history: Vec::new(),
            projection: Some(Projection {
                method: "test".into(),
                explained: [0.5, 0.2],
                points: vec![ProjectedPoint {
                    group: "batch".into(),
                    id: hostile.into(),
                    label: "paper".into(),
                    proposed_label: Some("pet".into()),
                    suspicion: Some(0.9),
                    x: 0.0,
                    y: 1.0,
                }],
                omitted: 0,
            }),
            projection_note: None,
            note: notice::SUSPICION_SENTENCE.into(),
        };
        let html = render_html(&report);
        assert!(!html.contains("<script"), "{html}");
        assert!(!html.contains("<img"), "{html}");
        assert!(!html.contains('\u{202E}'));
        assert!(html.contains("&lt;img src=x onerror=alert(1)&gt;"));
        assert!(html.contains("default-src 'none'"));
        assert_eq!(html.matches("<circle").count(), 1);
    }

    #[test]
    fn suspicion_colour_runs_blue_to_red() {
        assert_eq!(suspicion_colour(Some(0.0)), "#2166ac");
        assert_eq!(suspicion_colour(Some(1.0)), "#b2182b");
        assert_eq!(suspicion_colour(None), "#9e9e9e");
    }

    #[test]
    fn folders_follow_states() {
        assert_eq!(folder_for_state(BatchState::Released), Some("accepted"));
        assert_eq!(
            folder_for_state(BatchState::ReviewRejected),
            Some("rejected")
        );
        assert_eq!(folder_for_state(BatchState::Withdrawn), Some("rejected"));
        assert_eq!(
            folder_for_state(BatchState::Quarantined),
            Some("quarantine")
        );
    }

    #[test]
    fn review_errors_round_trip_over_the_wire() {
        for e in [
            ReviewError::NotFound("a".into()),
            ReviewError::Refused("b".into()),
            ReviewError::Invalid("c".into()),
            ReviewError::Store {
                message: "d".into(),
                source: None,
            },
            ReviewError::Io {
                message: "e".into(),
                source: None,
            },
            ReviewError::Model("f".into()),
        ] {
            let back = ReviewError::from_kind(e.kind(), "m".into());
            assert_eq!(back.kind(), e.kind());
            assert_eq!(std::mem::discriminant(&back), std::mem::discriminant(&e));
        }
    }
}
