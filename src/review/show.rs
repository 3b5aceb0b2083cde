//! The review queue and one batch explained: `quarantine list` and `quarantine show`.

use std::collections::HashMap;

use chrono::{DateTime, Utc};
use serde::{Deserialize, Serialize};

use crate::data;
use crate::data::{Format, Table};
use crate::notice;
use crate::policy;
use crate::policy::{Baseline, Reason};
use crate::store::{AuditRecord, BatchRecord, BatchState, Store};

use super::{
    build_projection, finish_moves, io_err, ReviewEnv, ReviewError, PROJECTION_MAX_POINTS,
};

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
    /// The policy's reason codes (`recalled_on_drift` or `recalled_on_spot_check` for an accepted batch
    /// recalled for review).
    pub reasons: Vec<String>,
    /// For a recalled batch: the later batch whose hold recalled it.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub recalled_by: Option<String>,
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
            reasons: match (&r.recalled, &r.decision) {
                (Some(c), _) => vec![crate::pipeline::recall::code_of(c).to_string()],
                (None, Some(d)) => d
                    .reasons
                    .iter()
                    .map(|x| x.code.as_str().to_string())
                    .collect(),
                (None, None) => Vec::new(),
            },
            recalled_by: r.recalled.as_ref().map(|c| c.held_batch.clone()),
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
    /// The flagged items (proposed label differs from the given one), most suspicious first.
    pub moved_items: Vec<MovedItem>,
    /// The items the repair itself moved (most of their label mass), most suspicious first; empty when
    /// the repair cost is negligible or the full report was not kept.
    #[serde(default)]
    pub repair_moved: Vec<MovedItem>,
    /// The flagged items grouped by (given → proposed).
    #[serde(default)]
    pub suspect_groups: Vec<super::SuspectGroup>,
    /// The most suspicious flagged items explained: features against class profiles, nearest trusted
    /// items, the engine's signals.
    #[serde(default)]
    pub suspect_details: Vec<super::SuspectDetail>,
    /// The engine's signals in plain words.
    #[serde(default)]
    pub signals: Vec<super::SignalNote>,
    /// The workspace folder (for the commands the page shows).
    #[serde(default)]
    pub workspace: Option<std::path::PathBuf>,
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
    let table = read_batch_table(env, &rec);
    let suspect_details = match &table {
        Ok(t) => super::suspect_details(env.meta, t, &trusted, &moved_items, assessment.as_ref()),
        Err(_) => Vec::new(),
    };
    let suspect_groups = super::suspect_groups(&moved_items, &suspect_details);
    let repair_moved = super::repair_moved(&rec, table.as_ref().ok(), assessment.as_ref(), classes);
    let signals = super::signal_notes(&rec, assessment.as_ref());
    let (projection, projection_note) = match table {
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
        repair_moved,
        suspect_groups,
        suspect_details,
        signals,
        workspace: Some(env.ws.root.clone()),
        broken_trusted,
        history,
        projection,
        projection_note,
        note: notice::SUSPICION_SENTENCE.to_string(),
    })
}

/// A batch by its id, or by the reference a vendor quotes from its notice: the notice's file stem
/// (`<file>.<batch id>[.<verdict>]`, also with `.json`/`.md` after it) or its `instance`
/// (`urn:labelweir:batch:<batch id>:<verdict>`).
pub(super) fn get_batch(store: &Store, batch: &str) -> Result<BatchRecord, ReviewError> {
    if let Some(r) = store.batch(batch)? {
        return Ok(r);
    }
    let reference = batch.trim();
    let reference = reference
        .strip_prefix("urn:labelweir:batch:")
        .map(|rest| rest.split(':').next().unwrap_or(rest))
        .unwrap_or(reference);
    let file = reference.rsplit('/').next().unwrap_or(reference);
    // From the end: the batch id comes after the delivered file's stem, which a vendor chose.
    for part in file.split('.').rev() {
        if notice::is_safe_batch_id(part) {
            if let Some(r) = store.batch(part)? {
                return Ok(r);
            }
        }
    }
    Err(ReviewError::NotFound(format!(
        "no batch {} (give a batch id from `quarantine list`, or the reference a vendor quotes from its notice)",
        crate::text::sanitize(batch)
    )))
}

pub use crate::pipeline::outbox::folder_for_state;

pub(super) fn read_batch_table(
    env: &ReviewEnv<'_>,
    rec: &BatchRecord,
) -> Result<Table, ReviewError> {
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
