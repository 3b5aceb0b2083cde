//! Held items: the flagged and unsure items of accepted batches that wait for a reviewer (see
//! [`crate::policy::AdmissionSettings`]), and the items the trusted-set experts' spot checks contradicted
//! (`spot-check answer` takes them out of the pool). A reviewer lists them and admits them (with the given or the
//! proposed label) or drops them; each decision is one audited store transition that also replaces the
//! batch's pool entry. A flag is a suspicion for review, not proof.

use super::*;
use std::collections::HashSet;

use crate::data::Classes;
use crate::store::{BatchState, HeldItem, HeldState, HeldWhy, PoolChange, PoolEntry};

/// One accepted batch with held items.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct HeldBatch {
    /// The batch.
    pub batch_id: String,
    /// Vendor.
    pub vendor: String,
    /// Its state (`accepted` or `released`).
    pub state: BatchState,
    /// Items in the batch.
    pub items: Option<usize>,
    /// Items in the pool from this batch.
    pub in_pool: usize,
    /// Held items still waiting for a reviewer.
    pub waiting: usize,
    /// Items that entered with the proposed label.
    pub admitted_proposed: usize,
    /// Items a reviewer admitted with their given label.
    pub admitted: usize,
    /// Items kept out for good.
    pub dropped: usize,
    /// Of the held items, those kept out as unsure rather than flagged (see
    /// [`crate::policy::unsure_items`]).
    #[serde(default)]
    pub unsure: usize,
    /// Of the held items, those kept out as in doubt: not flagged, but at or above `[admission]
    /// hold_suspicion` (see [`crate::policy::doubtful_items`]).
    #[serde(default)]
    pub in_doubt: usize,
    /// Of the held items, those taken out of the pool because the trusted-set experts' spot check gave
    /// another label.
    #[serde(default)]
    pub expert_disagreed: usize,
    /// Every held item and where it stands.
    pub held: Vec<HeldItem>,
}

/// Accepted and released batches with flagged items that did not enter the pool as delivered, oldest
/// first.
pub fn held_list(env: &ReviewEnv<'_>) -> Result<Vec<HeldBatch>, ReviewError> {
    let mut out = Vec::new();
    for r in env
        .store
        .batches_in(&[BatchState::Accepted, BatchState::Released])?
    {
        if r.held.is_empty() {
            continue;
        }
        let count = |s: HeldState| r.held.iter().filter(|h| h.state == s).count();
        let in_pool = env.store.pool_entry_of(&r.id)?.map_or(0, |e| e.ids.len());
        out.push(HeldBatch {
            batch_id: r.id.clone(),
            vendor: r.vendor.clone(),
            state: r.state,
            items: r.items,
            in_pool,
            waiting: count(HeldState::Waiting),
            admitted_proposed: count(HeldState::AdmittedProposed),
            admitted: count(HeldState::Admitted),
            dropped: count(HeldState::Dropped),
            unsure: r.held.iter().filter(|h| h.why == HeldWhy::Unsure).count(),
            in_doubt: r.held.iter().filter(|h| h.why == HeldWhy::InDoubt).count(),
            expert_disagreed: r
                .held
                .iter()
                .filter(|h| h.why == HeldWhy::ExpertDisagreed)
                .count(),
            held: r.held.clone(),
        });
    }
    Ok(out)
}

/// What a reviewer does with held items.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum HeldAction {
    /// Into the pool with the given label.
    #[default]
    Admit,
    /// Into the pool with the proposed label.
    AdmitProposed,
    /// Out of the pool for good.
    Drop,
}

impl HeldAction {
    fn state(self) -> HeldState {
        match self {
            Self::Admit => HeldState::Admitted,
            Self::AdmitProposed => HeldState::AdmittedProposed,
            Self::Drop => HeldState::Dropped,
        }
    }
}

/// Decide held items of one accepted or released batch.
#[derive(Debug, Clone, Default, PartialEq, Serialize, Deserialize)]
pub struct HeldRequest {
    /// The batch.
    pub batch: String,
    /// Reviewer.
    pub by: String,
    /// Why (required).
    pub reason: String,
    /// What to do.
    pub action: HeldAction,
    /// Item ids (each must be waiting); empty means every waiting item.
    #[serde(default)]
    pub items: Vec<String>,
}

/// What a held-item decision did.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct HeldReport {
    /// The batch.
    pub batch_id: String,
    /// What was done.
    pub action: HeldAction,
    /// The items decided.
    pub items: Vec<String>,
    /// Items of the batch in the pool now.
    pub in_pool: usize,
    /// Held items still waiting.
    pub waiting: usize,
}

/// Admit or drop held items (audited as `held_decision`; the pool entry is replaced in the same
/// transaction, so the pool summary is rebuilt exactly).
pub fn held_decide(env: &ReviewEnv<'_>, req: &HeldRequest) -> Result<HeldReport, ReviewError> {
    super::retrying(|| held_decide_once(env, req))
}

fn held_decide_once(env: &ReviewEnv<'_>, req: &HeldRequest) -> Result<HeldReport, ReviewError> {
    require_reason(&req.reason)?;
    require_by(&req.by)?;
    let rec = get_batch(env.store, &req.batch)?;
    let states = [BatchState::Accepted, BatchState::Released];
    expect_state(&rec, &states, "given held-item decisions")?;
    let waiting: Vec<&HeldItem> = rec
        .held
        .iter()
        .filter(|h| h.state == HeldState::Waiting)
        .collect();
    let chosen: Vec<String> = if req.items.is_empty() {
        waiting.iter().map(|h| h.id.clone()).collect()
    } else {
        for id in &req.items {
            if !waiting.iter().any(|h| &h.id == id) {
                return Err(ReviewError::Invalid(format!(
                    "batch {} has no held item {} waiting for review",
                    rec.id,
                    crate::text::sanitize(id)
                )));
            }
        }
        req.items.clone()
    };
    if chosen.is_empty() {
        return Err(ReviewError::Invalid(format!(
            "batch {} has no held items waiting for review",
            rec.id
        )));
    }
    let chosen_set: HashSet<&str> = chosen.iter().map(String::as_str).collect();
    let pool = if req.action == HeldAction::Drop {
        PoolChange::None
    } else {
        let table = read_batch_table(env, &rec)?;
        let classes = Classes::from_labels(&env.meta.classes);
        let mut entry = env.store.pool_entry_of(&rec.id)?.unwrap_or(PoolEntry {
            batch_id: rec.id.clone(),
            vendor: rec.vendor.clone(),
            ids: Vec::new(),
            labels: Vec::new(),
            x: Vec::new(),
            n_features: table.features.ncols(),
        });
        for h in rec
            .held
            .iter()
            .filter(|h| chosen_set.contains(h.id.as_str()))
        {
            let row = table.ids.iter().position(|i| *i == h.id).ok_or_else(|| {
                ReviewError::Invalid(format!(
                    "item {} is not in the batch file",
                    crate::text::sanitize(&h.id)
                ))
            })?;
            let label = if req.action == HeldAction::AdmitProposed {
                &h.proposed_label
            } else {
                &h.label
            };
            let k = classes
                .index_of(label)
                .ok_or_else(|| ReviewError::Invalid(format!("unknown class {label}")))?;
            entry.ids.push(h.id.clone());
            entry.labels.push(k);
            entry.x.extend(table.features.row(row).iter().copied());
        }
        PoolChange::Replace(entry)
    };
    let mut detail = caller_detail(env);
    detail["action"] = serde_json::json!(req.action);
    detail["items"] = serde_json::json!(chosen);
    let audit = AuditRecord::new(&req.by, "held_decision")
        .batch(&rec.id, &rec.vendor)
        .outcome(req.action.state().as_str())
        .reason(req.reason.clone())
        .detail(detail);
    let by = req.by.clone();
    let to = req.action.state();
    let seen = rec.pool_seq;
    env.hooks.before_pool_edit(&rec.id);
    // Prepared from the pool entry and the held items as read above: refused (and prepared again) when
    // another request changed either meanwhile, so no decision overwrites another's.
    let refuse = |r: &crate::store::BatchRecord| {
        let still_waiting = r
            .held
            .iter()
            .filter(|h| h.state == HeldState::Waiting && chosen_set.contains(h.id.as_str()))
            .count();
        super::pool_entry_moved(seen, r).or_else(|| {
            (still_waiting != chosen_set.len()).then(|| super::HELD_ITEMS_MOVED.to_string())
        })
    };
    let settled = env.store.transition_unless(
        &rec.id,
        &[rec.state],
        rec.state,
        pool,
        vec![audit],
        refuse,
        |r| {
            for h in r.held.iter_mut() {
                if h.state == HeldState::Waiting && chosen_set.contains(h.id.as_str()) {
                    h.state = to;
                    h.decided_by = by.clone();
                }
            }
        },
    )?;
    if req.action != HeldAction::Drop {
        env.hooks.pool_changed();
    }
    Ok(HeldReport {
        batch_id: settled.id.clone(),
        action: req.action,
        items: chosen,
        in_pool: env
            .store
            .pool_entry_of(&settled.id)?
            .map_or(0, |e| e.ids.len()),
        waiting: settled.held_waiting(),
    })
}
