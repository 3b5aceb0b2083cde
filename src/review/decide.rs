//! Review decisions: release, reject, withdraw; their file moves and vendor notices, and finishing what a
//! crash interrupted.

use std::collections::{HashMap, HashSet};
use std::path::PathBuf;

use chrono::Utc;
use serde::{Deserialize, Serialize};

use crate::config::Config;
use crate::data::{Classes, Table};
use crate::notice;
use crate::notice::{item_codes, DecidedBy, Notice, NoticeItem, NoticeReason, NoticeVerdict};
use crate::policy::Verdict;
use crate::store::{
    AuditRecord, BatchRecord, BatchState, PoolChange, PoolEntry, Store, TrustedItem, RECORD_VERSION,
};
use crate::workspace::Workspace;

use crate::pipeline::outbox::{batch_ref_now, move_for_state, send_pending_notice};

use super::{
    folder_for_state, get_batch, read_batch_table, RejectRequest, ReleaseRequest, ReviewEnv,
    ReviewError, WithdrawRequest,
};

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
    /// A preview (`--dry-run`): nothing was recorded, moved or written.
    #[serde(default)]
    pub dry_run: bool,
    /// Proposed labels not taken because their confidence was below the floor (release with
    /// `accept_proposed`): the item kept its given label, or was left out with `exclude_flagged`.
    #[serde(default)]
    pub skipped_weak: Vec<SkippedProposal>,
    /// The confidence floor applied to proposed labels (release with `accept_proposed`).
    #[serde(default)]
    pub min_confidence: Option<f64>,
    /// Items of a recalled batch that the experts' spot-check answers had taken out of the pool: a
    /// release that neither relabels nor excludes them by name leaves them out, still waiting for a
    /// reviewer (`quarantine held`, `quarantine admit`), instead of putting them back with the vendor's
    /// label.
    #[serde(default)]
    pub held_waiting: Vec<String>,
}

/// A proposed label a release did not take because the engine was not confident enough in it.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct SkippedProposal {
    /// Item id as delivered.
    pub id: String,
    /// The given label.
    pub label: String,
    /// The label the repair proposed.
    pub proposed_label: String,
    /// The engine's confidence in it.
    pub confidence: f64,
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
            dry_run: false,
            skipped_weak: Vec::new(),
            min_confidence: None,
            held_waiting: Vec::new(),
        }
    }
}

pub(super) fn require_reason(reason: &str) -> Result<(), ReviewError> {
    if reason.trim().is_empty() {
        return Err(ReviewError::Invalid(
            "a decision needs a reason (--reason)".into(),
        ));
    }
    Ok(())
}

pub(super) fn require_by(by: &str) -> Result<(), ReviewError> {
    if by.trim().is_empty() {
        return Err(ReviewError::Invalid(
            "a decision needs a reviewer (--by)".into(),
        ));
    }
    Ok(())
}

pub(super) fn expect_state(
    rec: &BatchRecord,
    allowed: &[BatchState],
    what: &str,
) -> Result<(), ReviewError> {
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

pub(super) fn caller_detail(env: &ReviewEnv<'_>) -> serde_json::Value {
    serde_json::json!({ "os_uid": env.caller.uid, "os_user": env.caller.user, "via": env.caller.via })
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
    let plan = plan_release(env, &rec, &table, req)?;
    let entry = plan.pool_entry(env, &rec, &table);
    let n_pool = entry.ids.len();
    if req.dry_run {
        let mut report = DecisionReport::new(&rec, &req.by, &req.reason);
        report.dry_run = true;
        report.items_into_pool = n_pool;
        report.excluded = plan.excluded_ids;
        report.relabeled = plan.relabeled;
        report.skipped_weak = plan.skipped_weak;
        report.min_confidence = plan.min_confidence;
        report.held_waiting = plan.waiting_ids.clone();
        report.promoted = plan.promote.iter().map(|&i| table.ids[i].clone()).collect();
        return Ok(report);
    }
    let mut detail = caller_detail(env);
    detail["excluded"] = serde_json::json!(plan.excluded_ids);
    detail["relabeled"] = serde_json::json!(plan.relabeled);
    detail["accept_proposed"] = serde_json::json!(req.accept_proposed);
    detail["min_confidence"] = serde_json::json!(plan.min_confidence);
    detail["exclude_flagged"] = serde_json::json!(req.exclude_flagged);
    detail["skipped_weak"] = serde_json::json!(plan.skipped_weak.len());
    detail["items_into_pool"] = serde_json::json!(n_pool);
    detail["held_waiting"] = serde_json::json!(plan.waiting_ids);
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
    let n = release_notice(&rec, &table, &plan);
    // A released batch joins its vendor's record (so a vendor whose honest batches the computed limits
    // hold is not stuck in cold start), in the same transaction as the release; a recalled batch was
    // counted there when it was accepted.
    let released = released_signals(&rec, &table, &plan).filter(|_| rec.recalled.is_none());
    let waiting: HashSet<&str> = plan.waiting_ids.iter().map(String::as_str).collect();
    let policy = &env.config.policy;
    let settled = env.store.transition_with_history(
        &rec.id,
        &[BatchState::Quarantined],
        BatchState::Released,
        pool,
        vec![audit],
        |r| {
            r.pending_notices.push(n.clone());
            // A recalled batch's items held back at its acceptance: this release decides every item
            // (the plan above), so none stays waiting for `quarantine admit`, which would add it twice —
            // but for the items the experts contradicted, which the plan leaves out and waiting.
            if r.recalled.is_some() {
                r.held.retain(|h| waiting.contains(h.id.as_str()));
            }
        },
        |h| {
            if let Some(s) = &released {
                h.record_released(policy, s);
            }
        },
    )?;
    env.hooks.pool_changed();
    let mut report = DecisionReport::new(&settled, &req.by, &req.reason);
    report.items_into_pool = n_pool;
    report.excluded = plan.excluded_ids.clone();
    report.relabeled = plan.relabeled.clone();
    report.skipped_weak = plan.skipped_weak.clone();
    report.min_confidence = plan.min_confidence;
    report.held_waiting = plan.waiting_ids.clone();
    if !plan.promote.is_empty() {
        promote(env, req, &rec, &table, &plan, &mut report)?;
    }
    // Side effects after the flushed decision.
    finish_decision(env, &settled, &req.by, &mut report);
    Ok(report)
}

/// What a released batch teaches its vendor's record: the signals it was decided on, without the items
/// the reviewer left out or corrected (those were errors, not the vendor's usual level). `None` for
/// records decided before the signals were kept.
fn released_signals(
    rec: &BatchRecord,
    table: &Table,
    plan: &ReleasePlan,
) -> Option<crate::policy::BatchSignals> {
    let signals = rec.decision.as_ref()?.signals.clone()?;
    let flagged: HashSet<&str> = rec
        .suspects
        .iter()
        .filter(|s| s.proposed_label != s.label)
        .map(|s| s.id.as_str())
        .collect();
    let mut removed: HashSet<&str> = plan
        .excluded
        .iter()
        .filter_map(|&i| table.ids.get(i).map(String::as_str))
        .collect();
    removed.extend(plan.relabeled.iter().map(|(id, _, _)| id.as_str()));
    let removed_flagged = removed.iter().filter(|id| flagged.contains(*id)).count();
    Some(signals.without_items(plan.excluded.len(), removed_flagged))
}

/// A release's edits to the batch, checked against it.
struct ReleasePlan {
    /// The final label of every row.
    labels: Vec<String>,
    /// Rows left out of the pool.
    excluded: HashSet<usize>,
    /// Their ids, sorted.
    excluded_ids: Vec<String>,
    /// `(id, from, to)` for every relabeled item.
    relabeled: Vec<(String, String, String)>,
    /// Rows promoted into the trusted set.
    promote: Vec<usize>,
    /// Proposals below the confidence floor, not taken.
    skipped_weak: Vec<SkippedProposal>,
    /// The floor (with `accept_proposed`).
    min_confidence: Option<f64>,
    /// Rows of a recalled batch that the experts contradicted (held, waiting) and that this release does
    /// not name: out of the pool, still waiting.
    waiting: HashSet<usize>,
    /// Their ids, sorted.
    waiting_ids: Vec<String>,
}

impl ReleasePlan {
    /// The pool entry: every row not excluded, with its final label.
    fn pool_entry(&self, env: &ReviewEnv<'_>, rec: &BatchRecord, table: &Table) -> PoolEntry {
        let classes = Classes::from_labels(&env.meta.classes);
        let keep: Vec<usize> = (0..table.len())
            .filter(|i| !self.excluded.contains(i) && !self.waiting.contains(i))
            .collect();
        PoolEntry {
            batch_id: rec.id.clone(),
            vendor: rec.vendor.clone(),
            ids: keep.iter().map(|&i| table.ids[i].clone()).collect(),
            labels: keep
                .iter()
                .map(|&i| classes.index_of(&self.labels[i]).unwrap_or(0))
                .collect(),
            x: keep
                .iter()
                .flat_map(|&i| table.features.row(i).to_vec())
                .collect(),
            n_features: table.features.ncols(),
        }
    }
}

/// Check the release's exclusions, relabelings (explicit, then the repair's proposals when asked) and
/// promotions against the batch.
fn plan_release(
    env: &ReviewEnv<'_>,
    rec: &BatchRecord,
    table: &Table,
    req: &ReleaseRequest,
) -> Result<ReleasePlan, ReviewError> {
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
    let min_confidence = req
        .accept_proposed
        .then(|| req.min_confidence.unwrap_or(super::DEFAULT_MIN_CONFIDENCE));
    if let Some(floor) = min_confidence {
        if !(0.0..=1.0).contains(&floor) {
            return Err(ReviewError::Invalid(format!(
                "--min-confidence {floor}: expected a number from 0 to 1"
            )));
        }
    }
    // The items the experts contradicted while the batch was in the pool keep waiting for a reviewer,
    // unless this release names them (a relabel or an exclusion is that reviewer's decision).
    let mut waiting = HashSet::new();
    if rec.recalled.is_some() {
        for h in &rec.held {
            if h.state != crate::store::HeldState::Waiting
                || h.why != crate::store::HeldWhy::ExpertDisagreed
            {
                continue;
            }
            if let Some(&i) = index.get(h.id.as_str()) {
                if !excluded.contains(&i) && !explicit.contains(&i) {
                    waiting.insert(i);
                }
            }
        }
    }
    let mut skipped_weak = Vec::new();
    let proposals = if req.accept_proposed || req.exclude_flagged {
        proposals_for(env, rec, table)?
    } else {
        Vec::new()
    };
    for (i, proposed, confidence) in proposals {
        if excluded.contains(&i)
            || explicit.contains(&i)
            || waiting.contains(&i)
            || labels[i] == proposed
        {
            continue;
        }
        match min_confidence {
            Some(floor) if confidence >= floor => {
                relabeled.push((table.ids[i].clone(), labels[i].clone(), proposed.clone()));
                labels[i] = proposed;
                continue;
            }
            Some(_) => skipped_weak.push(SkippedProposal {
                id: table.ids[i].clone(),
                label: labels[i].clone(),
                proposed_label: proposed,
                confidence,
            }),
            None => {}
        }
        if req.exclude_flagged {
            excluded.insert(i);
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
    let mut excluded_ids: Vec<String> = excluded.iter().map(|&i| table.ids[i].clone()).collect();
    excluded_ids.sort();
    let mut waiting_ids: Vec<String> = waiting.iter().map(|&i| table.ids[i].clone()).collect();
    waiting_ids.sort();
    Ok(ReleasePlan {
        labels,
        excluded,
        excluded_ids,
        relabeled,
        promote,
        skipped_weak,
        min_confidence,
        waiting,
        waiting_ids,
    })
}

/// The vendor notice of a release: the excluded and the relabeled items, with their data rows.
fn release_notice(rec: &BatchRecord, table: &Table, plan: &ReleasePlan) -> Notice {
    let rows: HashMap<&str, u64> = table
        .ids
        .iter()
        .enumerate()
        .map(|(i, id)| (id.as_str(), i as u64 + 1))
        .collect();
    let items: Vec<NoticeItem> = plan
        .excluded_ids
        .iter()
        .map(|id| NoticeItem {
            id: id.clone(),
            row: rows.get(id.as_str()).copied(),
            reasons: vec![item_codes::EXCLUDED_BY_REVIEWER.into()],
            proposed_label: None,
            suspicion: None,
        })
        .chain(plan.relabeled.iter().map(|(id, _, to)| NoticeItem {
            id: id.clone(),
            row: rows.get(id.as_str()).copied(),
            reasons: vec![item_codes::RELABELED_BY_REVIEWER.into()],
            proposed_label: Some(to.clone()),
            suspicion: None,
        }))
        .collect();
    let mut n = review_notice(
        rec,
        NoticeVerdict::Released,
        NoticeReason::new(
            "released_on_review",
            "A reviewer checked the flagged items and released the batch.",
        ),
    );
    n.items_total = rec.items.map(|x| x as u64);
    n.items_listed_total = items.len() as u64;
    n.items = items;
    n
}

/// Promotion: the verified items join the trusted set with their final labels (ids already trusted are
/// skipped with a warning; a failed promotion is a warning, the release stands).
fn promote(
    env: &ReviewEnv<'_>,
    req: &ReleaseRequest,
    rec: &BatchRecord,
    table: &Table,
    plan: &ReleasePlan,
    report: &mut DecisionReport,
) -> Result<(), ReviewError> {
    let now = Utc::now();
    let existing: HashSet<String> = env
        .store
        .trusted_items()?
        .into_iter()
        .map(|t| t.id)
        .collect();
    let fresh: Vec<TrustedItem> = plan
        .promote
        .iter()
        .map(|&i| TrustedItem {
            version: RECORD_VERSION,
            id: table.ids[i].clone(),
            label: plan.labels[i].clone(),
            features: table.features.row(i).to_vec(),
            weight: 1.0,
            added_by: req.by.clone(),
            added_at: now,
            source: format!("review of batch {} (vendor {})", rec.id, rec.vendor),
        })
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
    if fresh.is_empty() {
        return Ok(());
    }
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
    Ok(())
}

/// `(row, proposed class name, confidence)` for every item whose label the repair moved: from the full
/// report when it was kept, else from the record's suspects.
pub(super) fn proposals_for(
    env: &ReviewEnv<'_>,
    rec: &BatchRecord,
    table: &Table,
) -> Result<Vec<(usize, String, f64)>, ReviewError> {
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
                        .map(|c| (s.index, c.clone(), s.confidence))
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
                .map(|&i| (i, s.proposed_label.clone(), s.confidence))
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
    let disclose_items = req.disclose_items || req.disclose_proposed;
    detail["disclose_items"] = serde_json::json!(disclose_items);
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
    // Each named item with its data row and finding codes, from the full report where it was kept.
    let findings = reject_findings(env, &rec);
    let items: Vec<NoticeItem> = rec
        .suspects
        .iter()
        .filter(|s| disclose_items && s.proposed_label != s.label)
        .map(|s| {
            let (row, reasons) = findings
                .get(s.id.as_str())
                .cloned()
                .unwrap_or_else(|| (None, vec![item_codes::LABEL_SUSPECTED.into()]));
            NoticeItem {
                id: s.id.clone(),
                row,
                reasons,
                proposed_label: Some(s.proposed_label.clone()),
                suspicion: Some(s.suspicion),
            }
        })
        .collect();
    n.items_total = rec.items.map(|x| x as u64);
    // The count of flagged items always; their ids only where the reviewer discloses them.
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

/// Item id → (data row, finding codes) for a batch whose full report and file are at hand (empty when
/// either is missing: the notice then falls back to the plain code).
fn reject_findings(
    env: &ReviewEnv<'_>,
    rec: &BatchRecord,
) -> HashMap<String, (Option<u64>, Vec<String>)> {
    let (Ok(Some(a)), Ok(table)) = (env.store.assessment(&rec.id), read_batch_table(env, rec))
    else {
        return HashMap::new();
    };
    a.items
        .iter()
        .filter_map(|s| {
            let id = table.ids.get(s.index)?;
            Some((
                id.clone(),
                (Some(s.index as u64 + 1), notice::finding_codes(s)),
            ))
        })
        .collect()
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

pub(super) fn review_notice(
    rec: &BatchRecord,
    verdict: NoticeVerdict,
    reason: NoticeReason,
) -> Notice {
    let mut n = Notice::new(verdict, DecidedBy::Reviewer, batch_ref_now(rec));
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
pub(super) fn finish_decision(
    env: &ReviewEnv<'_>,
    rec: &BatchRecord,
    by: &str,
    report: &mut DecisionReport,
) {
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

/// Finish what a crash interrupted after a review decision was recorded: file moves and vendor notices.
pub(super) fn finish_moves(env: &ReviewEnv<'_>) -> Result<usize, ReviewError> {
    finish_pending(env.ws, env.config, env.store)
}

/// Finish what a crash interrupted after review decisions were recorded: move each decided file into
/// the folder its state calls for, and write each notice still pending in its record (an outbox: the
/// notice is stored in the same transaction as the decision, so it cannot be lost). Returns how many
/// moves and notices it did. Run by every review command and at the daemon's start.
pub(crate) fn finish_pending(
    ws: &Workspace,
    config: &Config,
    store: &Store,
) -> Result<usize, ReviewError> {
    let mut n = 0;
    let recalled = store
        .batches_in(&[BatchState::Quarantined])?
        .into_iter()
        .filter(|r| r.recalled.is_some());
    for rec in store
        .batches_in(&[
            BatchState::Released,
            BatchState::ReviewRejected,
            BatchState::Withdrawn,
        ])?
        .into_iter()
        .chain(recalled)
    {
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
