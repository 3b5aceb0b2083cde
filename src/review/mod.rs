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
//! ([`ReviewError::Refused`]) and nothing is released twice. A change prepared from what a request read
//! before its transaction — a spot-check answer taking contradicted items out of a batch's pool entry, a
//! held-item decision putting items in — is written only if that entry (its pool sequence number) and the
//! held items it decides are still as read ([`Store::transition_unless`]); otherwise it is prepared again
//! from the store as it now is (up to three times), so two requests on one batch never overwrite each other's
//! change. Side effects follow the flushed transition:
//! the file moves out of `quarantine/` (release → `accepted/`, reject and withdraw → `rejected/`, with its
//! report), then the vendor notice is written (and recorded in the audit trail). The notice is stored with
//! the decision, in the same transaction (an outbox), so if the process dies in between, the next review
//! command or daemon start finishes the move and sends the notice (`finish_pending`).
//!
//! # Trusted set
//!
//! Only these functions write trusted items (through [`Store::update_trusted`]); nothing on the ingest
//! path can. Each item keeps its provenance (who verified it, when, from what source). After every change
//! the rolling window ([`crate::config::TrustedSettings`]) is applied, class balance is checked, and the most recently
//! accepted batches are re-scored against the new set ([`rescan`]); batches that would now be
//! quarantined are reported with the command that pulls them out of the pool (`quarantine withdraw`).

use chrono::{DateTime, Utc};
use serde::{Deserialize, Serialize};

use crate::config::Config;
use crate::store::{AuditRecord, Store, StoreError, TrustedItem, WorkspaceMeta};
use crate::workspace::Workspace;

mod decide;
mod drift;
mod explain;
mod held;
mod page;
mod page_parts;
mod projection;
mod rescan;
mod show;
mod spot;
mod sweep;
mod trusted;

pub use decide::*;
pub use drift::*;
pub use explain::*;
pub use held::*;
pub use page::*;
use projection::*;
pub use rescan::*;
pub use show::*;
pub use spot::*;
pub use sweep::*;
pub use trusted::*;

/// Pools up to this many items are re-scored exactly (pool minus the batch); larger ones through the
/// saved pool summary (which still contains the batch: the re-check is then conservative).
pub(crate) const RESCORE_EXACT_POOL_MAX: u64 = 50_000;

/// Most points drawn per group in the HTML projection.
pub(crate) const PROJECTION_MAX_POINTS: usize = 4000;

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
    pub(crate) fn from_kind(kind: &str, message: String) -> Self {
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

impl From<crate::pipeline::file::FileError> for ReviewError {
    fn from(e: crate::pipeline::file::FileError) -> Self {
        match e {
            crate::pipeline::file::FileError::Store(s) => s.into(),
            crate::pipeline::file::FileError::Io { op, path, source } => Self::Io {
                message: format!("{op} {}: {source}", path.display()),
                source: Some(source),
            },
            other => Self::Io {
                message: other.to_string(),
                source: None,
            },
        }
    }
}

impl From<StoreError> for ReviewError {
    fn from(e: StoreError) -> Self {
        match e {
            StoreError::Conflict { .. } | StoreError::Refused { .. } => {
                Self::Refused(e.to_string())
            }
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
    /// A long operation (the pool sweep) has done `done` of `total` units (items scored): for a progress
    /// display, directly or as progress lines on the admin channel. Called often; keep it cheap.
    fn progress(&self, _done: usize, _total: usize) {}
    /// A request has read `batch`'s pool entry and held items and is about to write the change it
    /// prepared from them (a spot-check answer, a held-item decision). Nothing to do in the daemon; a seam
    /// where a test runs a second request at the worst moment.
    fn before_pool_edit(&self, _batch: &str) {}
}

/// Why a change prepared from a batch's pool entry as read at sequence `seen` must not be written: the
/// entry stored now is another (another request replaced or removed it meanwhile). Checked inside the
/// store's transaction ([`Store::transition_unless`]), so of two requests that each read the entry before
/// the other wrote it, the second is refused instead of overwriting the first's change; [`retrying`] then
/// prepares it again from the entry as it now is.
fn pool_entry_moved(seen: Option<u64>, r: &crate::store::BatchRecord) -> Option<String> {
    (r.pool_seq != seen).then(|| POOL_ENTRY_MOVED.to_string())
}

const POOL_ENTRY_MOVED: &str =
    "the batch's pool entry changed while this request was prepared (another review request on the \
     same batch); nothing was changed";

/// Why a held-item decision prepared from the held items as read must not be written: another reviewer
/// decided some of the same items meanwhile.
const HELD_ITEMS_MOVED: &str =
    "some of these held items were decided while this request was prepared (another reviewer); nothing \
     was changed";

/// Run `op` again (up to three times in all) while the store refuses it because what it was prepared
/// from changed under it ([`pool_entry_moved`], [`HELD_ITEMS_MOVED`]); any other outcome is returned as
/// it is.
fn retrying<T>(mut op: impl FnMut() -> Result<T, ReviewError>) -> Result<T, ReviewError> {
    let stale = |why: &str| why.contains(POOL_ENTRY_MOVED) || why.contains(HELD_ITEMS_MOVED);
    let mut tries = 1;
    loop {
        match op() {
            Err(ReviewError::Refused(why)) if stale(&why) && tries < 3 => {
                tries += 1;
            }
            other => return other,
        }
    }
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
    /// That user's name on this machine, if it has one.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub user: Option<String>,
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
    /// With `accept_proposed`: the least confidence a proposed label needs to be taken; weaker proposals
    /// keep the given label (or are left out with `exclude_flagged`) and are listed in the report.
    /// `None`: [`DEFAULT_MIN_CONFIDENCE`].
    #[serde(default)]
    pub min_confidence: Option<f64>,
    /// Leave out every flagged item (label moved by the repair) that no explicit relabel or accepted
    /// proposal covers.
    #[serde(default)]
    pub exclude_flagged: bool,
    /// Work out and report what the release would do, and record nothing.
    #[serde(default)]
    pub dry_run: bool,
}

/// The default confidence floor for `quarantine release --accept-proposed`. Measured on the shipped
/// fixtures against `fixtures/truth/` (README, "Safe fixes"): at 0.7 every fixture batch gets more labels
/// fixed than broken; taking every proposal broke more than it fixed on the wet-cardboard batch.
pub const DEFAULT_MIN_CONFIDENCE: f64 = 0.7;

/// Reject a quarantined batch.
#[derive(Debug, Clone, Default, PartialEq, Serialize, Deserialize)]
pub struct RejectRequest {
    /// The batch.
    pub batch: String,
    /// Reviewer.
    pub by: String,
    /// Why (required).
    pub reason: String,
    /// Include the proposed labels of the flagged items in the vendor notice (implies `disclose_items`).
    #[serde(default)]
    pub disclose_proposed: bool,
    /// Name the flagged items in the vendor notice (otherwise it gives their count only).
    #[serde(default)]
    pub disclose_items: bool,
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
    /// Reset a vendor's drift statistic.
    DriftReset(DriftResetRequest),
    /// Debug every accepted item against the current trusted set.
    PoolSweep(SweepRequest),
    /// Accepted batches with held items.
    HeldList,
    /// Admit or drop held items.
    HeldDecide(HeldRequest),
    /// Re-score recently accepted batches against the current trusted set.
    Rescan {
        /// Who asked.
        by: String,
    },
    /// Accepted batches whose spot check waits for the experts.
    SpotList,
    /// Record the experts' answers to a spot check.
    SpotAnswer(SpotAnswerRequest),
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
        Request::DriftReset(r) => json(drift_reset(env, &r)?),
        Request::HeldList => json(held_list(env)?),
        Request::SpotList => json(spot_list(env)?),
        Request::SpotAnswer(r) => json(spot_answer(env, &r)?),
        Request::HeldDecide(r) => json(held_decide(env, &r)?),
        Request::Rescan { by } => json(rescan(env, &by)?),
        Request::PoolSweep(r) => json(pool_sweep(env, &r)?),
        Request::Audit {
            since,
            vendor,
            batch,
        } => json(audit(env, since, vendor.as_deref(), batch.as_deref())?),
    }
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
    use chrono::{Duration as ChronoDuration, TimeZone};
    use ndarray::{Array2, Axis};

    use crate::config::TrustedSettings;
    use crate::notice;
    use crate::store::{BatchRecord, BatchState};

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
            repair_moved: Vec::new(),
            suspect_groups: Vec::new(),
            suspect_details: Vec::new(),
            signals: Vec::new(),
            workspace: None,
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
