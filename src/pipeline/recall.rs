//! Recall: when a stream rule holds a vendor's batch, the vendor's batches accepted since that rule's
//! statistic was last 0 are taken back out of the pool and quarantined for review.
//!
//! A CUSUM that signals also dates the change: it most likely began just after the last batch at which
//! the statistic stood at 0 (see [`crate::policy::ItemJudgement::recall`]). The batches accepted since were
//! judged while the evidence was building; a drip, or a delivery cut into small files, gets its first
//! files in that way. The policy's decision carries how many to reach back over
//! ([`crate::policy::Decision::recall`]); this module does it, in the store, for the batches still
//! accepted:
//!
//! 1. each moves `accepted → quarantined` with its pool entry removed (the pool epoch changes, so the
//!    scoring worker rebuilds its summary exactly), an audit record `recall` naming the held batch, the
//!    record's [`crate::store::Recall`], and a vendor notice `recalled` stored in the same transaction
//!    (the outbox of review decisions, [`super::outbox`]: `review::finish_pending` sends what a crash left);
//! 2. then, best effort, the file moves to `quarantine/` and the notice is written.
//!
//! Idempotent: a batch no longer accepted (already recalled, withdrawn) is left alone, so the daemon can
//! redo it after a crash. A reviewer then releases or rejects each recalled batch like any held one; a
//! release does not count the batch in the vendor's record a second time (it was counted when accepted).
//! The notice names no item: a recall is a suspicion about the vendor's stream, not a finding about items.

use chrono::Utc;

use crate::config::Config;
use crate::notice::{DecidedBy, Notice, NoticeReason, NoticeVerdict};
use crate::policy::Verdict;
use crate::store::{AuditRecord, BatchRecord, BatchState, PoolChange, Recall, Store, StoreError};
use crate::workspace::Workspace;

use super::outbox::{batch_ref_now, move_for_state, send_pending_notice};

/// The reason code of a recall by a stream rule in notices and the audit trail.
pub const RECALLED_ON_DRIFT: &str = "recalled_on_drift";

/// The reason code of a recall set off by the experts' spot-check answers ([`crate::policy::spot`]).
pub const RECALLED_ON_SPOT_CHECK: &str = "recalled_on_spot_check";

/// The reason code of a recorded recall: [`RECALLED_ON_SPOT_CHECK`] when the spot-check rule set it off,
/// else [`RECALLED_ON_DRIFT`].
pub fn code_of(r: &Recall) -> &'static str {
    let spot = crate::policy::ReasonCode::SpotCheckDisagreement.as_str();
    if r.rules.iter().any(|c| c == spot) {
        RECALLED_ON_SPOT_CHECK
    } else {
        RECALLED_ON_DRIFT
    }
}

/// The vendor's batches a hold on `held` reaches back over: the `held.decision.recall` most recent
/// batches of the same vendor that the policy accepted before it (newest first), whatever their state
/// now. Empty when the decision asks for no recall.
///
/// "Most recent" is by arrival (batch ids are handed out in arrival order), which is the order the
/// policy judged them in: one scoring worker takes claimed batches first in, first out. The scan walks
/// back from the held batch and stops at the `n`-th match, so a recall costs the vendor's recent
/// history, not the store's.
pub fn recall_targets(store: &Store, held: &BatchRecord) -> Result<Vec<BatchRecord>, StoreError> {
    let n = held.decision.as_ref().map_or(0, |d| d.recall) as usize;
    let mut found = Vec::with_capacity(n);
    if n == 0 {
        return Ok(found);
    }
    for rec in store.batches_before(&held.id) {
        let rec = rec?;
        let accepted = rec
            .decision
            .as_ref()
            .is_some_and(|d| d.verdict == Verdict::Accept);
        if rec.vendor == held.vendor && accepted {
            found.push(rec);
            if found.len() == n {
                break;
            }
        }
    }
    Ok(found)
}

/// Recall the batches [`recall_targets`] names that are still accepted (module documentation). Returns
/// the ids recalled now; problems with a file move or a notice are logged and left to
/// `review::finish_pending`.
pub fn recall_accepted(
    ws: &Workspace,
    config: &Config,
    store: &Store,
    held: &BatchRecord,
) -> Result<Vec<String>, StoreError> {
    let targets = recall_targets(store, held)?;
    let rules: Vec<String> = held
        .decision
        .iter()
        .flat_map(|d| d.reasons.iter().map(|r| r.code))
        .filter(|c| c.is_stream_rule())
        .map(|c| c.as_str().to_string())
        .collect();
    let cause = Cause {
        batch: held.id.clone(),
        audit_reason: format!(
            "{RECALLED_ON_DRIFT}: batch {} of this vendor was held by {}; this batch was accepted after \
             that statistic last stood at 0",
            held.id,
            rules.join(", ")
        ),
        notice: format!(
            "A later batch from this vendor folder (batch {}) was held by a check across the vendor's recent \
             items; this batch was accepted after that check began to rise, so it is reviewed too.",
            held.id
        ),
        code: RECALLED_ON_DRIFT,
        rules,
    };
    recall_records(ws, config, store, &targets, &cause, "daemon")
}

/// Why batches are recalled: the batch that set it off, the rules, and the words for the audit trail and
/// the vendor notice.
pub struct Cause {
    /// The batch whose hold (or whose spot-check answers) reached back.
    pub batch: String,
    /// The rules behind it (reason codes).
    pub rules: Vec<String>,
    /// The audit record's reason.
    pub audit_reason: String,
    /// The vendor notice's sentence (names no item).
    pub notice: String,
    /// The notice's reason code.
    pub code: &'static str,
}

/// Recall `targets` that are still accepted, for `cause`, recorded as done by `actor` (steps 1–2 of the
/// module documentation). Returns the ids recalled now.
pub fn recall_records(
    ws: &Workspace,
    config: &Config,
    store: &Store,
    targets: &[BatchRecord],
    cause: &Cause,
    actor: &str,
) -> Result<Vec<String>, StoreError> {
    let reach = targets.len() as u32;
    let mut done = Vec::new();
    for rec in targets.iter().filter(|r| r.state == BatchState::Accepted) {
        let recall = Recall {
            held_batch: cause.batch.clone(),
            rules: cause.rules.clone(),
            batches: reach,
            at: Utc::now(),
        };
        let audit = AuditRecord::new(actor, "recall")
            .batch(&rec.id, &rec.vendor)
            .outcome(BatchState::Quarantined.as_str())
            .reason(cause.audit_reason.clone())
            .detail(serde_json::json!({
                "held_batch": cause.batch,
                "rules": cause.rules,
                "reach": reach,
            }));
        let notice = recall_notice(rec, cause);
        let settled = match store.transition(
            &rec.id,
            &[BatchState::Accepted],
            BatchState::Quarantined,
            PoolChange::Remove,
            vec![audit],
            |r| {
                r.recalled = Some(recall.clone());
                r.pending_notices.push(notice.clone());
            },
        ) {
            Ok(s) => s,
            // A reviewer withdrew it meanwhile: nothing to recall.
            Err(StoreError::Conflict { .. }) => continue,
            Err(e) => return Err(e),
        };
        if let Err(e) = move_for_state(ws, &settled) {
            tracing::warn!(batch_id = %settled.id, error = %e, "recall: moving the file to quarantine/ failed; retried at the next start or review command");
        }
        if let Err(e) = send_pending_notice(ws, config, store, &settled, actor) {
            tracing::warn!(batch_id = %settled.id, error = %e, "recall: writing the vendor notice failed; retried at the next start or review command");
        }
        tracing::warn!(
            batch_id = %settled.id,
            vendor = %settled.vendor,
            held_batch = %cause.batch,
            "accepted batch recalled for review (a suspicion, not proof)"
        );
        done.push(settled.id);
    }
    Ok(done)
}

/// The vendor notice of a recall: no item is named (module documentation).
fn recall_notice(rec: &BatchRecord, cause: &Cause) -> Notice {
    let mut n = Notice::new(
        NoticeVerdict::Recalled,
        DecidedBy::Policy,
        batch_ref_now(rec),
    );
    n.reasons
        .push(NoticeReason::new(cause.code, cause.notice.clone()));
    n.items_total = rec.items.map(|x| x as u64);
    n
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::config::StoreSettings;
    use crate::policy::{PolicySettings, VendorHistory};

    /// Store a decided record of `vendor` with the next id; `recall` is what its decision asks for.
    fn put(store: &Store, vendor: &str, verdict: Verdict, recall: u32) -> BatchRecord {
        let id = store.new_batch_id().unwrap();
        let mut rec = BatchRecord::claimed(id.clone(), vendor, "x.csv".into(), format!("{id}.csv"));
        let mut d = crate::policy::decide(
            &PolicySettings::default(),
            &VendorHistory::default(),
            0.0,
            0.0,
        );
        d.verdict = verdict;
        d.recall = recall;
        rec.decision = Some(d);
        store.record_claim(&rec).unwrap();
        rec
    }

    #[test]
    fn the_targets_are_the_vendors_newest_accepted_batches_before_the_hold() {
        let d = tempfile::tempdir().unwrap();
        let store = Store::open(&d.path().join("state"), &StoreSettings::default()).unwrap();
        let (a, q) = (Verdict::Accept, Verdict::Quarantine);
        let v1 = put(&store, "v", a, 0);
        let v2 = put(&store, "v", a, 0);
        put(&store, "v", q, 0); // held: not a target
        put(&store, "w", a, 0); // another vendor
        let v5 = put(&store, "v", a, 0);
        let held = put(&store, "v", q, 2);
        put(&store, "v", a, 0); // after the hold
        let ids = |held: &BatchRecord| -> Vec<String> {
            recall_targets(&store, held)
                .unwrap()
                .into_iter()
                .map(|r| r.id)
                .collect()
        };
        assert_eq!(ids(&held), [v5.id.clone(), v2.id.clone()]);
        // Reaching further than the history goes stops at its first batch.
        let mut far = held.clone();
        far.decision.as_mut().unwrap().recall = 10;
        assert_eq!(ids(&far), [v5.id, v2.id, v1.id]);
        let mut none = held;
        none.decision.as_mut().unwrap().recall = 0;
        assert!(ids(&none).is_empty());
    }
}
