//! The verdict step, pure: from what ingest found, the engine's assessment and the policy's decision it
//! builds everything one store transaction records — the decided batch record (scores, suspects, broken
//! trusted items, outcome), the `verdict` audit record, the vendor's new history (accepted batches only)
//! and the pool entry (accepted batches only). No store, no files, no clock beyond what the records
//! stamp, no metrics: the scoring worker persists what this returns.

use crate::config::Config;
use crate::data::Table;
use crate::model::Assessment;
use crate::policy::VendorHistory;
use crate::policy::{
    self, BatchSignals, Decision, Reason, ReasonCode, ShiftReport, Verdict as PolicyVerdict,
};
use crate::store::{
    AuditRecord, BatchRecord, BatchScores, HeldItem, HeldState, HeldWhy, Outcome, PoolEntry,
    RejectReason, SpotCheck, SpotItem, Suspect,
};

/// What the engine said about a batch: its assessment, or why there is none (an engine error or panic).
pub type Scored = Result<Assessment, String>;

/// Everything one verdict transaction records (see [`crate::store::Store::record_verdict`]).
#[derive(Debug)]
pub struct Verdict {
    /// The batch record with its outcome (the store sets the state and time).
    pub record: BatchRecord,
    /// The `verdict` audit record.
    pub audit: AuditRecord,
    /// Whether the `(vendor, sha256)` key is indexed (scored batches only).
    pub index_hash: bool,
    /// The vendor's history after an accepted batch.
    pub history: Option<VendorHistory>,
    /// The assessment kept for review (quarantined batches only).
    pub assessment: Option<Assessment>,
    /// The items entering the pool (accepted batches only).
    pub pool: Option<PoolEntry>,
}

impl Verdict {
    /// Whether the batch goes into the pool.
    pub fn accepted(&self) -> bool {
        self.record.outcome == Some(Outcome::Accepted)
    }
}

/// A batch that is not usable input: rejected with its reason.
pub fn rejected(
    mut record: BatchRecord,
    reason: RejectReason,
    bytes: Option<usize>,
    sha256: Option<String>,
) -> Verdict {
    record.outcome = Some(Outcome::Rejected);
    record.bytes = bytes.map(|n| n as u64);
    record.sha256 = sha256;
    let audit = AuditRecord::new("daemon", "verdict")
        .batch(&record.id, &record.vendor)
        .outcome(Outcome::Rejected.as_str())
        .reason(reason.code.clone())
        .detail(serde_json::json!({ "detail": reason.detail, "row": reason.row, "column": reason.column, "original_name": record.original_name }));
    record.reject = Some(reason);
    unscored(record, audit)
}

/// A re-delivery of the bytes of batch `first` (same vendor, same SHA-256).
pub fn duplicate(mut record: BatchRecord, first: String) -> Verdict {
    record.outcome = Some(Outcome::Duplicate);
    let audit = AuditRecord::new("daemon", "verdict")
        .batch(&record.id, &record.vendor)
        .outcome(Outcome::Duplicate.as_str())
        .reason("duplicate")
        .detail(serde_json::json!({ "duplicate_of": first, "sha256": record.sha256 }));
    record.duplicate_of = Some(first);
    unscored(record, audit)
}

fn unscored(record: BatchRecord, audit: AuditRecord) -> Verdict {
    Verdict {
        record,
        audit,
        index_hash: false,
        history: None,
        assessment: None,
        pool: None,
    }
}

/// The policy's decision on a scored batch against the vendor's history; a batch the engine could not
/// score is quarantined with reason `score_invalid` (held for a person, never silently accepted).
///
/// `shift` is the shift check's finding for the batch ([`shift_check`]); without it every item is judged.
/// `classes` are the workspace's class names by index (reasons name a class by its name).
pub fn decide(
    config: &Config,
    history: &VendorHistory,
    scored: &Scored,
    shift: Option<&ShiftReport>,
    classes: &[String],
) -> Decision {
    match scored {
        Ok(a) => {
            let t = config.model.flag_threshold;
            let mut signals = BatchSignals::from_assessment(a, t).named(classes);
            if let Some(r) = shift {
                signals = signals.with_shift(a, t, r);
            }
            policy::decide_batch(&config.policy, history, &signals)
        }
        Err(msg) => {
            let mut d = policy::decide(&config.policy, history, f64::NAN, f64::NAN);
            d.verdict = PolicyVerdict::Quarantine;
            d.reasons = vec![Reason {
                code: ReasonCode::ScoreInvalid,
                detail: msg.clone(),
            }];
            d
        }
    }
}

/// The shift check ([`policy::shift`]) of a batch: its items' distances from the reference sample made of
/// the trusted items and the pool reservoir, all in the workspace's standardised features. `None` when
/// the check cannot run (a non-finite value, a reference sample too small), in which case every item
/// is judged.
pub fn shift_check(
    config: &Config,
    standardizer: &crate::model::Standardizer,
    trusted_x: ndarray::ArrayView2<'_, f64>,
    reservoir_phi: ndarray::ArrayView2<'_, f64>,
    batch_x: ndarray::ArrayView2<'_, f64>,
) -> Option<ShiftReport> {
    let tz = standardizer.transform(trusted_x).ok()?;
    let bz = standardizer.transform(batch_x).ok()?;
    let reference = policy::shift::reference_sample(tz.view(), reservoir_phi);
    let reach = policy::Reach::fit(&config.policy, reference.view())?;
    Some(reach.check(bz.view()))
}

/// What a scored batch brings to its verdict besides the record.
pub struct ScoredBatch<'a> {
    /// The parsed table (ids and features).
    pub table: &'a Table,
    /// Class index per item.
    pub labels: &'a [usize],
    /// The engine's answer.
    pub scored: Scored,
    /// Seconds the engine took.
    pub score_seconds: f64,
    /// The workspace's class names, by index.
    pub classes: &'a [String],
    /// The trusted items' ids, by index.
    pub trusted_ids: &'a [String],
    /// Seed of the spot check's random draw: unpredictable in the daemon (the operating system's
    /// randomness), so a vendor cannot know which items will be checked; fixed in a replay.
    pub spot_seed: u64,
}

/// Rows of an accepted batch's items that were kept out of the pool (held for review or dropped, not
/// entered under the proposed label) and may join the clean level's labels model: those whose given label
/// the trusted-anchored model does not doubt (see [`crate::model::summary::kept_out_for_labels_model`]).
/// `ids` are the batch's item ids in row order, `items` the engine's item scores.
pub fn kept_out_rows(
    record: &BatchRecord,
    ids: &[String],
    items: &[crate::model::ItemScore],
) -> Vec<usize> {
    let row_of: std::collections::HashMap<&str, usize> = ids
        .iter()
        .enumerate()
        .map(|(i, id)| (id.as_str(), i))
        .collect();
    crate::model::summary::kept_out_for_labels_model(
        items,
        record
            .held
            .iter()
            .filter(|h| h.state != HeldState::AdmittedProposed)
            .filter_map(|h| row_of.get(h.id.as_str()).copied()),
    )
}

/// The verdict of a scored batch under `decision`; `history` is the vendor's history the decision was
/// made against.
pub fn scored(
    config: &Config,
    mut record: BatchRecord,
    batch: ScoredBatch<'_>,
    decision: Decision,
    mut history: VendorHistory,
) -> Verdict {
    let accept = decision.verdict == PolicyVerdict::Accept;
    if let Ok(a) = &batch.scored {
        describe(&mut record, a, &batch);
    }
    record.outcome = Some(if accept {
        Outcome::Accepted
    } else {
        Outcome::Quarantined
    });
    let codes: Vec<&str> = decision.reasons.iter().map(|r| r.code.as_str()).collect();
    let audit = AuditRecord::new("daemon", "verdict")
        .batch(&record.id, &record.vendor)
        .outcome(if accept { "accepted" } else { "quarantined" })
        .reason(codes.join(","))
        .detail(serde_json::json!({
            "sha256": record.sha256,
            "items": record.items,
            "repair_cost": record.scores.as_ref().map(|s| s.repair_cost),
            "damage": record.scores.as_ref().map(|s| s.damage),
            "baseline_median": decision.baseline.median,
            "reasons": decision.reasons,
        }));
    record.decision = Some(decision);
    let pool = if accept {
        let (entry, held) = admit(config, &record, &batch);
        record.held = held;
        record.spot_check = spot_check(config, &batch);
        (!entry.ids.is_empty()).then_some(entry)
    } else {
        None
    };
    if accept {
        // The signals the decision read (with the shift check's findings), else the assessment's.
        let signals = record
            .decision
            .as_ref()
            .and_then(|d| d.signals.clone())
            .or_else(|| {
                batch
                    .scored
                    .as_ref()
                    .ok()
                    .map(|a| BatchSignals::from_assessment(a, config.model.flag_threshold))
            });
        if let Some(s) = signals {
            history.record_accepted(&config.policy, &s);
        }
    }
    Verdict {
        record,
        audit,
        index_hash: true,
        history: accept.then_some(history),
        assessment: if accept { None } else { batch.scored.ok() },
        pool,
    }
}

/// The items of an accepted batch to send to the experts ([`policy::spot::pick`] on the reference
/// model's margins), with the vendor's labels and the features; `None` when spot checks are off or the
/// batch has no assessment.
fn spot_check(config: &Config, batch: &ScoredBatch<'_>) -> Option<SpotCheck> {
    let s = &config.spot_checks;
    let a = batch.scored.as_ref().ok().filter(|_| s.enabled)?;
    let n = batch.table.ids.len();
    let mut margins = vec![f64::MAX; n];
    let mut scores = vec![(0.0, 0.0); n];
    for it in a.items.iter().filter(|it| it.index < n) {
        margins[it.index] = it.reference_margin;
        scores[it.index] = (it.suspicion, it.confidence);
    }
    // Rows without a score (none in practice) are never the least sure.
    let items: Vec<SpotItem> = policy::spot::pick(&margins, s, batch.spot_seed)
        .into_iter()
        .map(|(i, stratum)| SpotItem {
            id: batch.table.ids[i].clone(),
            stratum,
            label: batch.table.labels[i].clone(),
            features: batch.table.features.row(i).to_vec(),
            suspicion: scores[i].0,
            confidence: scores[i].1,
        })
        .collect();
    (!items.is_empty()).then_some(SpotCheck {
        items,
        answered: None,
    })
}

/// The pool entry of an accepted batch and its flagged items that did not enter as delivered, under
/// `[admission]` ([`policy::item_fate`]): unflagged items enter with their given label; flagged ones are
/// held, enter with the proposed label, or are dropped. Without an assessment (never the case for an
/// accepted batch) every item enters as delivered.
fn admit(
    config: &Config,
    record: &BatchRecord,
    batch: &ScoredBatch<'_>,
) -> (PoolEntry, Vec<HeldItem>) {
    let n = batch.table.ids.len();
    let mut fate = vec![(policy::ItemFate::Enter, 0usize); n];
    let mut held = Vec::new();
    if let Ok(a) = &batch.scored {
        let flagged: Vec<bool> = a
            .items
            .iter()
            .map(|s| s.proposed_label != s.label)
            .collect();
        let suspicion: Vec<f64> = a.items.iter().map(|s| s.suspicion).collect();
        let unsure = policy::unsure_items(&config.admission, &suspicion, &flagged);
        let doubt = policy::doubtful_items(&config.admission, &suspicion, &flagged);
        for (k, s) in a.items.iter().enumerate() {
            let (f, why) = if doubt[k] {
                (policy::unsure_fate(&config.admission), HeldWhy::InDoubt)
            } else if unsure[k] {
                (policy::unsure_fate(&config.admission), HeldWhy::Unsure)
            } else {
                let f = policy::item_fate(&config.admission, flagged[k], s.confidence);
                (f, HeldWhy::Flagged)
            };
            let Some(slot) = fate.get_mut(s.index) else {
                continue;
            };
            *slot = (f, s.proposed_label);
            let state = match f {
                policy::ItemFate::Enter => continue,
                policy::ItemFate::EnterProposed => HeldState::AdmittedProposed,
                policy::ItemFate::Held => HeldState::Waiting,
                policy::ItemFate::Dropped => HeldState::Dropped,
            };
            let class = |k: usize| {
                batch
                    .classes
                    .get(k)
                    .cloned()
                    .unwrap_or_else(|| k.to_string())
            };
            held.push(HeldItem {
                id: batch.table.ids[s.index].clone(),
                label: class(s.label),
                proposed_label: class(s.proposed_label),
                suspicion: s.suspicion,
                confidence: s.confidence,
                state,
                decided_by: "daemon".into(),
                why,
            });
        }
    }
    let keep: Vec<usize> = (0..n)
        .filter(|&i| {
            matches!(
                fate[i].0,
                policy::ItemFate::Enter | policy::ItemFate::EnterProposed
            )
        })
        .collect();
    let entry = PoolEntry {
        batch_id: record.id.clone(),
        vendor: record.vendor.clone(),
        ids: keep.iter().map(|&i| batch.table.ids[i].clone()).collect(),
        labels: keep
            .iter()
            .map(|&i| match fate[i] {
                (policy::ItemFate::EnterProposed, p) => p,
                _ => batch.labels[i],
            })
            .collect(),
        x: keep
            .iter()
            .flat_map(|&i| batch.table.features.row(i).to_vec())
            .collect(),
        n_features: batch.table.features.ncols(),
    };
    (entry, held)
}

/// The record's scores, suspects (the most suspicious items: every flagged one, at least 20, at most
/// 1,000) and the trusted items the batch would break.
fn describe(record: &mut BatchRecord, a: &Assessment, batch: &ScoredBatch<'_>) {
    let class = |k: usize| {
        batch
            .classes
            .get(k)
            .cloned()
            .unwrap_or_else(|| k.to_string())
    };
    let flagged = a
        .items
        .iter()
        .filter(|s| s.proposed_label != s.label)
        .count();
    record.scores = Some(BatchScores {
        repair_cost: a.repair_cost,
        damage: a.damage,
        target_reached: a.target_reached,
        converged: a.convergence.inner_converged && a.convergence.linear_converged,
        score_seconds: batch.score_seconds,
        flagged_items: flagged,
    });
    let keep = flagged.clamp(20, 1000);
    record.suspects = a
        .ranked()
        .iter()
        .take(keep)
        .map(|s| Suspect {
            id: batch.table.ids.get(s.index).cloned().unwrap_or_default(),
            label: class(s.label),
            proposed_label: class(s.proposed_label),
            suspicion: s.suspicion,
            confidence: s.confidence,
        })
        .collect();
    record.broken_trusted = a
        .broken_trusted
        .iter()
        .filter_map(|b| batch.trusted_ids.get(b.index).cloned())
        .collect();
}

#[cfg(test)]
mod tests {
    use super::*;

    fn claimed() -> BatchRecord {
        BatchRecord::claimed("b1".into(), "v", "x.csv".into(), "b1.csv".into())
    }

    #[test]
    fn rejected_and_duplicate_batches_are_never_indexed_nor_pooled() {
        let reason = RejectReason {
            code: "bad_header".into(),
            detail: "no id column".into(),
            row: None,
            column: None,
        };
        let v = rejected(claimed(), reason, Some(12), Some("ab".into()));
        assert_eq!(v.record.outcome, Some(Outcome::Rejected));
        assert_eq!(v.record.bytes, Some(12));
        assert_eq!(v.audit.reason.as_deref(), Some("bad_header"));
        assert!(!v.index_hash && v.pool.is_none() && v.history.is_none());
        let mut rec = claimed();
        rec.sha256 = Some("cd".into());
        let v = duplicate(rec, "b0".into());
        assert_eq!(v.record.duplicate_of.as_deref(), Some("b0"));
        assert_eq!(v.audit.detail["sha256"], "cd");
        assert!(!v.accepted() && !v.index_hash && v.pool.is_none());
    }

    #[test]
    fn an_engine_failure_quarantines_as_score_invalid_and_keeps_the_history() {
        let config = Config::default();
        let history = VendorHistory::default();
        let scored: Scored = Err("the engine failed".into());
        let d = decide(&config, &history, &scored, None, &[]);
        assert_eq!(d.verdict, PolicyVerdict::Quarantine);
        assert_eq!(d.reasons[0].code, ReasonCode::ScoreInvalid);
        let table = Table {
            source: "t.csv".into(),
            ids: vec!["i1".into()],
            labels: vec!["a".into()],
            feature_names: vec!["f".into()],
            features: ndarray::Array2::zeros((1, 1)),
        };
        let v = super::scored(
            &config,
            claimed(),
            ScoredBatch {
                table: &table,
                labels: &[0],
                scored,
                score_seconds: 0.1,
                classes: &["a".into()],
                trusted_ids: &[],
                spot_seed: 0,
            },
            d,
            history,
        );
        assert_eq!(v.record.outcome, Some(Outcome::Quarantined));
        assert!(v.record.scores.is_none());
        assert!(v.index_hash);
        assert!(v.pool.is_none() && v.history.is_none() && v.assessment.is_none());
        assert_eq!(v.audit.reason.as_deref(), Some("score_invalid"));
    }
}
