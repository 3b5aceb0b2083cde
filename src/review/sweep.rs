//! `pool sweep`: every accepted item debugged against the current trusted set, grouped by vendor and
//! batch, with the batches worth withdrawing first.
//!
//! The scoring is the engine's [`model::SweepScorer`]: the pool model's in-sample doubt beside the
//! trusted-anchored model's, weighted per item by the trusted audit. The pool is read one stored entry
//! (one accepted batch) at a time, so memory follows the largest batch, not the pool. Nothing is changed:
//! withdrawing a batch stays a reviewer's decision, and a suspect is a suspicion for review, not proof.

use std::collections::BTreeMap;

use serde::{Deserialize, Serialize};

use super::{ReviewEnv, ReviewError};
use crate::model;
use crate::model::TrustedInput;
use crate::store::AuditRecord;

/// What to sweep.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct SweepRequest {
    /// Who asked.
    pub by: String,
    /// Suspects listed per batch (the counts cover all of them).
    pub top: usize,
}

/// One suspect item.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct SweepSuspect {
    /// Item id.
    pub id: String,
    /// Its label in the pool.
    pub label: String,
    /// The class the trusted-anchored model prefers.
    pub proposed_label: String,
    /// Fused suspicion.
    pub suspicion: f64,
    /// The pool model's doubt (in-sample).
    pub learner_doubt: f64,
    /// The trusted-anchored model's doubt.
    pub anchored_doubt: f64,
}

/// One accepted batch in the sweep.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct SweepBatch {
    /// Batch id.
    pub batch_id: String,
    /// Vendor.
    pub vendor: String,
    /// Its items in the pool.
    pub items: usize,
    /// Items at or above the flag threshold.
    pub suspects: usize,
    /// `suspects / items`.
    pub suspect_share: f64,
    /// Mean suspicion of its items.
    pub mean_suspicion: f64,
    /// Whether the sweep lists it among the batches worth withdrawing (see [`SweepReport::withdraw`]).
    pub withdraw_candidate: bool,
    /// The most suspicious items, highest first (at most the request's `top`).
    pub top: Vec<SweepSuspect>,
}

/// Per vendor.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct SweepVendor {
    /// Vendor.
    pub vendor: String,
    /// Accepted batches.
    pub batches: usize,
    /// Items in the pool.
    pub items: usize,
    /// Suspect items.
    pub suspects: usize,
    /// `suspects / items`.
    pub suspect_share: f64,
}

/// The sweep's report.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct SweepReport {
    /// Pool items swept.
    pub items: usize,
    /// Suspect items (suspicion ≥ `[model] flag_threshold`).
    pub suspects: usize,
    /// The pool-wide suspect share.
    pub suspect_share: f64,
    /// Vendors, highest suspect share first.
    pub vendors: Vec<SweepVendor>,
    /// Batches, withdrawal candidates first, then by suspect share.
    pub batches: Vec<SweepBatch>,
    /// Batches worth withdrawing: a suspect share at least `[policy] cold_start_max_flagged_share` and at least
    /// twice the share of the rest of the pool, with three suspects or more.
    pub withdraw: Vec<String>,
    /// What the trusted set says about the pool model (the audit of the last chunk's scoring).
    pub trusted_audit: String,
    /// Where the pool model came from.
    pub pool_model: String,
    /// Wall time (ms).
    pub elapsed_ms: f64,
    /// The caution.
    pub note: String,
}

/// Sweep the pool (see the module docs).
pub fn pool_sweep(env: &ReviewEnv<'_>, req: &SweepRequest) -> Result<SweepReport, ReviewError> {
    let started = std::time::Instant::now();
    let trusted = crate::pipeline::score::TrustedArrays::load(env.store, env.meta)?;
    let d = env.meta.features.len();
    let classes = &env.meta.classes;
    let k = classes.len();
    let settings = &env.config.model;
    let (summary, pool_model) = match env.store.saved_summary()? {
        Some(s) if s.summary.n > 0 && s.epoch == env.store.pool_epoch()? => (
            s.summary,
            format!(
                "the saved pool summary ({} items, through pool entry {})",
                env.store.pool_items()?,
                s.through_seq
            ),
        ),
        _ => {
            let (x, y, _) = env.store.pool_matrix(d)?;
            if y.is_empty() {
                return Ok(SweepReport {
                    items: 0,
                    suspects: 0,
                    suspect_share: 0.0,
                    vendors: Vec::new(),
                    batches: Vec::new(),
                    withdraw: Vec::new(),
                    trusted_audit: String::new(),
                    pool_model: "none: the pool is empty".into(),
                    elapsed_ms: 0.0,
                    note: CAUTION.into(),
                });
            }
            let (s, _) =
                model::PoolSummary::fit(settings, env.meta.feature_map.clone(), k, x.view(), &y)
                    .map_err(engine_error)?;
            (s, "refitted from the stored pool".into())
        }
    };
    let scorer = model::SweepScorer::new(
        settings,
        &summary,
        TrustedInput {
            x: trusted.x.view(),
            y: &trusted.y,
            weight: trusted.w.view(),
        },
    )
    .map_err(engine_error)?;
    let threshold = settings.flag_threshold;
    let total = env.store.pool_items()? as usize;
    let mut batches = Vec::new();
    let mut audit_line = String::new();
    let mut done = 0usize;
    let mut last_log = std::time::Instant::now();
    env.store
        .for_each_pool_entry(|_, e| -> Result<(), ReviewError> {
            if e.n_features != d || e.ids.is_empty() {
                return Ok(());
            }
            let (items, audit) = scorer
                .score(e.features().view(), &e.labels)
                .map_err(engine_error)?;
            audit_line = audit.summary;
            let suspects = items.iter().filter(|i| i.suspicion >= threshold).count();
            let mean = items.iter().map(|i| i.suspicion).sum::<f64>() / items.len() as f64;
            let mut ranked: Vec<&model::SweepItem> = items.iter().collect();
            ranked.sort_by(|a, b| b.suspicion.total_cmp(&a.suspicion));
            let top = ranked
                .into_iter()
                .take(req.top)
                .map(|i| SweepSuspect {
                    id: e.ids[i.index].clone(),
                    label: classes[i.label].clone(),
                    proposed_label: classes[i.proposed_label].clone(),
                    suspicion: i.suspicion,
                    learner_doubt: i.learner_doubt,
                    anchored_doubt: i.anchored_doubt,
                })
                .collect();
            batches.push(SweepBatch {
                batch_id: e.batch_id.clone(),
                vendor: e.vendor.clone(),
                items: items.len(),
                suspects,
                suspect_share: suspects as f64 / items.len() as f64,
                mean_suspicion: mean,
                withdraw_candidate: false,
                top,
            });
            done += items.len();
            if last_log.elapsed() >= std::time::Duration::from_secs(5) {
                tracing::info!(done, total, "pool sweep in progress");
                last_log = std::time::Instant::now();
            }
            Ok(())
        })?;
    let items: usize = batches.iter().map(|b| b.items).sum();
    let suspects: usize = batches.iter().map(|b| b.suspects).sum();
    let share = if items > 0 {
        suspects as f64 / items as f64
    } else {
        0.0
    };
    // A batch is worth withdrawing when its suspect share is at least the policy's ceiling on a batch's
    // flagged share at cold start and at least twice the share of the rest of the pool (leaving the batch out, so that a
    // batch that is most of the pool is not its own yardstick), with three suspects or more.
    for b in &mut batches {
        let rest_items = items - b.items;
        let rest_share = if rest_items > 0 {
            (suspects - b.suspects) as f64 / rest_items as f64
        } else {
            0.0
        };
        let floor = env
            .config
            .policy
            .cold_start_max_flagged_share
            .max(2.0 * rest_share);
        b.withdraw_candidate = b.suspects >= 3 && b.suspect_share >= floor;
    }
    batches.sort_by(|a, b| {
        b.withdraw_candidate
            .cmp(&a.withdraw_candidate)
            .then(b.suspect_share.total_cmp(&a.suspect_share))
            .then(a.batch_id.cmp(&b.batch_id))
    });
    let mut by_vendor: BTreeMap<String, SweepVendor> = BTreeMap::new();
    for b in &batches {
        let v = by_vendor
            .entry(b.vendor.clone())
            .or_insert_with(|| SweepVendor {
                vendor: b.vendor.clone(),
                batches: 0,
                items: 0,
                suspects: 0,
                suspect_share: 0.0,
            });
        v.batches += 1;
        v.items += b.items;
        v.suspects += b.suspects;
    }
    let mut vendors: Vec<SweepVendor> = by_vendor
        .into_values()
        .map(|mut v| {
            v.suspect_share = v.suspects as f64 / v.items.max(1) as f64;
            v
        })
        .collect();
    vendors.sort_by(|a, b| b.suspect_share.total_cmp(&a.suspect_share));
    let withdraw: Vec<String> = batches
        .iter()
        .filter(|b| b.withdraw_candidate)
        .map(|b| b.batch_id.clone())
        .collect();
    let report = SweepReport {
        items,
        suspects,
        suspect_share: share,
        vendors,
        batches,
        withdraw,
        trusted_audit: audit_line,
        pool_model,
        elapsed_ms: started.elapsed().as_secs_f64() * 1e3,
        note: CAUTION.into(),
    };
    let audit = AuditRecord::new(&req.by, "pool_sweep").detail(serde_json::json!({
        "items": report.items,
        "suspects": report.suspects,
        "withdraw": report.withdraw,
        "scorer_converged": scorer.converged(),
    }));
    env.store.append_audit(vec![audit])?;
    Ok(report)
}

/// An engine error during a sweep.
fn engine_error(e: model::ModelError) -> ReviewError {
    ReviewError::Model(format!("the sweep could not score the pool: {e}"))
}

/// The caution every sweep report carries.
const CAUTION: &str = "A suspect is a suspicion for human review, not proof: a high suspicion means an \
     accepted item's label disagrees with what the trusted set implies, not that the vendor made a mistake \
     or acted in bad faith.";
