//! Re-scoring the most recently accepted batches after the trusted set changed.

use chrono::{DateTime, Duration as ChronoDuration, Utc};
use ndarray::Array2;
use serde::{Deserialize, Serialize};

use crate::model;
use crate::model::{PoolInput, TrustedInput};
use crate::policy;
use crate::policy::Verdict;
use crate::store::{AuditRecord, BatchState};

use super::{ReviewEnv, ReviewError, RESCORE_EXACT_POOL_MAX};

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
/// 50,000 items (exact mode), else against the saved pool summary. Nothing is
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
                    &policy::BatchSignals::from_assessment(&a, env.config.model.flag_threshold)
                        .named(&env.meta.classes),
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
