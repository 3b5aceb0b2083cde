//! Expert spot checks, the reviewer's side: list the accepted batches whose picked items wait for the
//! experts' labels, and record the answers (`labelweir spot-check list` / `answer`).
//!
//! An answer file carries the id and label columns (the spot-check file with its label column filled in
//! is one; other columns are ignored). Every picked item must be answered, with one of the workspace's
//! classes. Recording the answers, in one store transaction with the batch's record:
//!
//! 1. each answer is compared with the vendor's label and taken into the vendor's spot-check charts
//!    ([`crate::policy::spot`]); a chart that reaches its limit sets the vendor's spot-check hold, so its
//!    later batches are held (`spot_check_disagreement`) until a reviewer clears it (`vendor
//!    reset-drift`);
//! 2. then, on a signal, the vendor's batches in that chart's run that are still accepted are recalled for
//!    review (the same path as a stream rule's recall: out of the pool, into `quarantine/`, a notice
//!    that names no item);
//! 3. with `[spot_checks] trusted_max` above 0 (off by default, see [`crate::policy::spot::SpotSettings`]),
//!    the answered items join the trusted set (ids `spot:<batch>:<item>`, so a vendor's item id can never
//!    replace a trusted item; source "spot check of batch …"); past the cap the oldest answered items
//!    retire (never the team's own items).
//!
//! A disagreement is a suspicion for review, not proof: experts err too.

use std::collections::HashMap;
use std::sync::Mutex;

use chrono::Utc;
use serde::{Deserialize, Serialize};

use super::decide::{caller_detail, require_by};
use super::show::get_batch;
use super::{
    trusted_add, trusted_remove, ReviewEnv, ReviewError, TrustedAddRequest, TrustedRemoveRequest,
};
use crate::pipeline::recall::{recall_records, Cause, RECALLED_ON_SPOT_CHECK};
use crate::policy::spot::{PendingRecall, SpotHold, SpotOutcome, Stratum};
use crate::store::{
    AuditRecord, BatchState, HeldItem, HeldState, HeldWhy, PoolChange, SpotAnswers,
};

/// A batch whose spot check waits for the experts.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct SpotPending {
    /// The batch.
    pub batch_id: String,
    /// Its vendor.
    pub vendor: String,
    /// Its state now.
    pub state: BatchState,
    /// Items picked: least sure, at random.
    pub hard: usize,
    /// See `hard`.
    pub random: usize,
    /// The experts' file, relative to the workspace.
    pub file: String,
}

/// Record the experts' answers to one batch's spot check.
#[derive(Debug, Clone, Default, PartialEq, Serialize, Deserialize)]
pub struct SpotAnswerRequest {
    /// The batch.
    pub batch: String,
    /// Who answered (the expert, or the reviewer recording for them).
    pub by: String,
    /// The answer file's name (for messages).
    pub file_name: String,
    /// Its content: CSV with the id and label columns.
    pub content: String,
}

/// What recording the answers did.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct SpotAnswered {
    /// The batch.
    pub batch_id: String,
    /// Its vendor.
    pub vendor: String,
    /// Items answered.
    pub checked: usize,
    /// Of those, the vendor's label differed from the expert's.
    pub disagreed: usize,
    /// The vendor's charts after the answers: `(hard, random)` statistic and limit.
    pub hard_statistic: f64,
    /// See `hard_statistic`.
    pub random_statistic: f64,
    /// The chart that reached its limit on these answers, if one did.
    pub signal: Option<Stratum>,
    /// Whether the vendor is now held for spot checks (set by these answers or earlier).
    pub vendor_held: bool,
    /// Accepted batches recalled for review because of the signal.
    pub recalled: Vec<String>,
    /// Items of this batch that sat in the pool with a label the experts contradicted: out of the pool
    /// now, waiting for a reviewer (`labelweir quarantine held`).
    #[serde(default)]
    pub held_for_review: Vec<String>,
    /// Items that joined the trusted set.
    pub trusted_added: usize,
    /// Why they did not, when adding them failed (the answers are recorded all the same; add them with
    /// `labelweir trusted add`).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub trusted_error: Option<String>,
}

/// What the charts did with one batch's answers: the outcome, the hold it sets, both statistics after it,
/// and whether the vendor is held.
type ChartsAfter = (SpotOutcome, Option<SpotHold>, f64, f64, bool);

/// Batches (in any state) with a spot check that has not been answered, oldest first.
pub fn spot_list(env: &ReviewEnv<'_>) -> Result<Vec<SpotPending>, ReviewError> {
    let mut out = Vec::new();
    for r in env.store.batches()? {
        let Some(check) = r.spot_check.as_ref().filter(|c| c.answered.is_none()) else {
            continue;
        };
        let count = |s: Stratum| check.items.iter().filter(|i| i.stratum == s).count();
        out.push(SpotPending {
            batch_id: r.id.clone(),
            vendor: r.vendor.clone(),
            state: r.state,
            hard: count(Stratum::Hard),
            random: count(Stratum::Random),
            file: format!("spot-checks/{}", crate::pipeline::spot::file_name(&r.id)),
        });
    }
    Ok(out)
}

/// Read the answer file: item id → label, for CSV with the configured id and label columns.
fn parse_answers(
    env: &ReviewEnv<'_>,
    req: &SpotAnswerRequest,
) -> Result<HashMap<String, String>, ReviewError> {
    let bad =
        |m: String| ReviewError::Invalid(format!("{}: {m}", crate::text::sanitize(&req.file_name)));
    let mut r = csv::ReaderBuilder::new()
        .trim(csv::Trim::All)
        .from_reader(req.content.as_bytes());
    let header = r.headers().map_err(|e| bad(e.to_string()))?.clone();
    let col = |name: &str| {
        header
            .iter()
            .position(|h| h == name)
            .ok_or_else(|| bad(format!("no {name:?} column")))
    };
    let (id_col, label_col) = (
        col(&env.config.schema.id_column)?,
        col(&env.config.schema.label_column)?,
    );
    let mut out = HashMap::new();
    for (row, rec) in r.records().enumerate() {
        let rec = rec.map_err(|e| bad(e.to_string()))?;
        let (id, label) = (
            rec.get(id_col).unwrap_or(""),
            rec.get(label_col).unwrap_or(""),
        );
        if out.insert(id.to_string(), label.to_string()).is_some() {
            return Err(bad(format!(
                "row {}: item {} answered twice",
                row + 2,
                crate::text::sanitize(id)
            )));
        }
    }
    Ok(out)
}

/// Record the answers (module documentation).
pub fn spot_answer(
    env: &ReviewEnv<'_>,
    req: &SpotAnswerRequest,
) -> Result<SpotAnswered, ReviewError> {
    super::retrying(|| spot_answer_once(env, req))
}

fn spot_answer_once(
    env: &ReviewEnv<'_>,
    req: &SpotAnswerRequest,
) -> Result<SpotAnswered, ReviewError> {
    require_by(&req.by)?;
    let rec = get_batch(env.store, &req.batch)?;
    let check = rec
        .spot_check
        .clone()
        .ok_or_else(|| ReviewError::NotFound(format!("batch {} has no spot check", rec.id)))?;
    if let Some(why) = answered_already(&rec) {
        return Err(ReviewError::Refused(format!("batch {}: {why}", rec.id)));
    }
    let labels = expert_labels(env, req, &rec.id, &check.items)?;
    let outcomes: Vec<(Stratum, bool)> = check
        .items
        .iter()
        .zip(&labels)
        .map(|(it, l)| (it.stratum, it.label != *l))
        .collect();
    let disagreed = outcomes.iter().filter(|(_, x)| *x).count();
    let settings = &env.config.spot_checks;
    // What the charts did, from inside the transaction (the closure may run again on a retry).
    let seen: Mutex<Option<ChartsAfter>> = Mutex::new(None);
    let mut detail = caller_detail(env);
    detail["checked"] = serde_json::json!(outcomes.len());
    detail["disagreed"] = serde_json::json!(disagreed);
    let audit = AuditRecord::new(&req.by, "spot_check_answer")
        .batch(&rec.id, &rec.vendor)
        .reason(format!(
            "{disagreed} of {} picked items differ from the vendor's labels",
            outcomes.len()
        ))
        .detail(detail);
    let now = Utc::now();
    let batch_id = rec.id.clone();
    // Items in the pool whose label the experts contradicted leave it and wait for a reviewer.
    let (pool, contradicted) = contradicted_items(env, &rec, &check.items, &labels)?;
    let entry_seq = rec.pool_seq;
    env.hooks.before_pool_edit(&rec.id);
    let settled = env.store.transition_with_history_unless(
        &rec.id,
        &[rec.state],
        rec.state,
        pool,
        vec![audit],
        |r| answered_already(r).or_else(|| super::pool_entry_moved(entry_seq, r)),
        |r| {
            if let Some(c) = r.spot_check.as_mut() {
                c.answered = Some(SpotAnswers {
                    by: req.by.clone(),
                    at: now,
                    labels: labels.clone(),
                    disagreed,
                    signal: None,
                });
            }
            file_held(r, &contradicted);
        },
        |h| {
            let o = h.spot.take(&batch_id, &outcomes, settings);
            let hold = h.spot.hold(&batch_id, &o);
            if h.spot_hold.is_none() {
                h.spot_hold.clone_from(&hold);
            }
            if hold.is_some() {
                h.spot_recall = Some(PendingRecall {
                    cause: batch_id.clone(),
                    batches: o.reach.clone(),
                });
            }
            if let Ok(mut s) = seen.lock() {
                *s = Some((
                    o,
                    hold,
                    h.spot.hard.s,
                    h.spot.random.s,
                    h.spot_hold.is_some(),
                ));
            }
        },
    )?;
    let (outcome, hold, hard_s, random_s, vendor_held) = seen
        .into_inner()
        .ok()
        .flatten()
        .ok_or_else(|| ReviewError::Store {
            message: "the vendor's history was not updated".into(),
            source: None,
        })?;
    // The record is edited before the vendor's history in the transaction, so the signal goes into the
    // answers afterwards (informational: the hold is in the vendor's history already, so a failure here is
    // logged, not returned).
    if let Some(fired) = outcome.fired {
        note_signal(env, &settled, fired);
    }
    if !contradicted.is_empty() {
        env.hooks.pool_changed();
    }
    if let Some(m) = crate::metrics::get() {
        let n = outcomes.len() as u64;
        m.spot_check_answered(
            &rec.vendor,
            n - disagreed as u64,
            disagreed as u64,
            hold.is_some(),
        );
        m.admission(&rec.vendor, contradicted.iter().map(|_| "held"));
    }
    let recalled = match &hold {
        Some(hold) => recall_run(env, &req.by, &rec, &outcome.reach, Some(hold))?,
        None => Vec::new(),
    };
    // With `trusted_max` above 0 the answered items join the trusted set under ids no vendor can choose;
    // the answers are recorded whatever happens there, so a failure is reported, not returned.
    let (trusted_added, trusted_error) = match add_to_trusted(
        env,
        req,
        &settled.id,
        &check.items,
        &labels,
    ) {
        Ok(n) => (n, None),
        Err(e) => {
            tracing::warn!(batch_id = %settled.id, error = %e, "spot-check items did not join the trusted set");
            (0, Some(e.to_string()))
        }
    };
    let _ = std::fs::remove_file(
        env.ws
            .spot_checks()
            .join(crate::pipeline::spot::file_name(&settled.id)),
    );
    Ok(SpotAnswered {
        batch_id: settled.id.clone(),
        vendor: settled.vendor.clone(),
        checked: outcomes.len(),
        disagreed,
        hard_statistic: hard_s,
        random_statistic: random_s,
        signal: outcome.fired,
        vendor_held,
        recalled,
        held_for_review: contradicted.iter().map(|h| h.id.clone()).collect(),
        trusted_added,
        trusted_error,
    })
}

/// File the contradicted items among the batch's held items. An item held before and admitted by a
/// reviewer is in the pool again; its entry waits anew.
fn file_held(r: &mut crate::store::BatchRecord, contradicted: &[HeldItem]) {
    for h in contradicted {
        match r.held.iter_mut().find(|x| x.id == h.id) {
            Some(x) => *x = h.clone(),
            None => r.held.push(h.clone()),
        }
    }
}

/// Note the chart that signalled on the answered batch's record (informational: the hold is in the
/// vendor's history already, so a failure is logged, not returned).
fn note_signal(env: &ReviewEnv<'_>, settled: &crate::store::BatchRecord, fired: Stratum) {
    if let Err(e) = env.store.transition(
        &settled.id,
        &[settled.state],
        settled.state,
        PoolChange::None,
        vec![],
        |r| {
            if let Some(a) = r.spot_check.as_mut().and_then(|c| c.answered.as_mut()) {
                a.signal = Some(fired);
            }
        },
    ) {
        tracing::warn!(batch_id = %settled.id, error = %e, "noting the spot-check signal on the batch record failed");
    }
}

/// The pool change and the held items for the picked items of `rec` whose experts' label differs from the
/// label they sit in the pool with: each leaves the batch's pool entry and waits for a reviewer
/// (`HeldWhy::ExpertDisagreed`, the experts' label proposed, the engine's suspicion of the vendor's label
/// kept). Nothing changes for a batch out of the pool, for items not in it (held or dropped already),
/// or for items whose pool label the experts confirm.
fn contradicted_items(
    env: &ReviewEnv<'_>,
    rec: &crate::store::BatchRecord,
    items: &[crate::store::SpotItem],
    labels: &[String],
) -> Result<(PoolChange, Vec<HeldItem>), ReviewError> {
    let none = || Ok((PoolChange::None, Vec::new()));
    if !matches!(rec.state, BatchState::Accepted | BatchState::Released) {
        return none();
    }
    let Some(mut entry) = env.store.pool_entry_of(&rec.id)? else {
        return none();
    };
    let classes = crate::data::Classes::from_labels(&env.meta.classes);
    let n_f = entry.n_features;
    let mut held = Vec::new();
    for (it, answer) in items.iter().zip(labels) {
        let Some(pos) = entry.ids.iter().position(|i| *i == it.id) else {
            continue;
        };
        if classes.index_of(answer) == Some(entry.labels[pos]) {
            continue;
        }
        entry.ids.remove(pos);
        entry.labels.remove(pos);
        entry.x.drain(pos * n_f..(pos + 1) * n_f);
        held.push(HeldItem {
            id: it.id.clone(),
            label: it.label.clone(),
            proposed_label: answer.clone(),
            suspicion: it.suspicion,
            confidence: it.confidence,
            state: HeldState::Waiting,
            decided_by: "spot check".into(),
            why: HeldWhy::ExpertDisagreed,
        });
    }
    if held.is_empty() {
        return none();
    }
    Ok((PoolChange::Replace(entry), held))
}

/// Why a batch's spot check takes no (further) answer: it was answered already, by whom and when. Checked
/// before the answer is read and again inside the store's transaction (a racing answer).
fn answered_already(r: &crate::store::BatchRecord) -> Option<String> {
    let a = r.spot_check.as_ref()?.answered.as_ref()?;
    Some(format!(
        "the spot check was answered by {} at {}",
        crate::text::sanitize(&a.by),
        a.at.format("%Y-%m-%d %H:%M:%S UTC")
    ))
}

/// The experts' label per picked item, in the spot check's order: every item answered, with one of the
/// workspace's classes, and nothing else.
fn expert_labels(
    env: &ReviewEnv<'_>,
    req: &SpotAnswerRequest,
    batch: &str,
    items: &[crate::store::SpotItem],
) -> Result<Vec<String>, ReviewError> {
    let mut answers = parse_answers(env, req)?;
    let mut labels = Vec::with_capacity(items.len());
    for it in items {
        let label = answers.remove(&it.id).unwrap_or_default();
        if label.is_empty() {
            return Err(ReviewError::Invalid(format!(
                "item {} of batch {} has no answer: every picked item needs the expert's label",
                crate::text::sanitize(&it.id),
                batch
            )));
        }
        if !env.meta.classes.contains(&label) {
            return Err(ReviewError::Invalid(format!(
                "item {}: {} is not one of the workspace's classes ({})",
                crate::text::sanitize(&it.id),
                crate::text::sanitize(&label),
                env.meta.classes.join(", ")
            )));
        }
        labels.push(label);
    }
    if let Some(extra) = answers.keys().next() {
        return Err(ReviewError::Invalid(format!(
            "item {} was not picked for the spot check of batch {}",
            crate::text::sanitize(extra),
            batch
        )));
    }
    Ok(labels)
}

/// After a signal: recall the vendor's batches of the chart's run that are still accepted (the same path
/// as a stream rule's recall), tell a running daemon the pool changed, count and log it.
fn recall_run(
    env: &ReviewEnv<'_>,
    actor: &str,
    rec: &crate::store::BatchRecord,
    reach: &[String],
    hold: Option<&SpotHold>,
) -> Result<Vec<String>, ReviewError> {
    let mut targets = Vec::new();
    for id in reach {
        if let Some(r) = env.store.batch(id)? {
            targets.push(r);
        }
    }
    let cause = Cause {
        batch: rec.id.clone(),
        rules: vec![crate::policy::ReasonCode::SpotCheckDisagreement.as_str().to_string()],
        audit_reason: format!(
            "{RECALLED_ON_SPOT_CHECK}: the expert's answers to batch {}'s spot check raised a signal; this \
             batch was accepted after that chart last stood at 0",
            rec.id
        ),
        notice: format!(
            "Expert checks of a sample of items from this vendor's recent batches (the last answered for batch \
             {}) disagreed with the labels more often than expected; this batch was accepted while that \
             evidence was building, so it is reviewed too.",
            rec.id
        ),
        code: RECALLED_ON_SPOT_CHECK,
    };
    let recalled = recall_records(env.ws, env.config, env.store, &targets, &cause, actor)
        .map_err(ReviewError::from)?;
    // Done: the pending recall written with the signal is cleared (a stop before this line finishes it
    // at the next start, `resume_spot_recalls`; recalling a batch twice does nothing).
    let cause_id = rec.id.clone();
    env.store.edit_vendor_history(&rec.vendor, |h| {
        if h.spot_recall.as_ref().is_some_and(|p| p.cause == cause_id) {
            h.spot_recall = None;
        }
    })?;
    if !recalled.is_empty() {
        env.hooks.pool_changed();
    }
    if let Some(m) = crate::metrics::get() {
        m.recalled(&rec.vendor, recalled.len() as u64);
    }
    tracing::warn!(
        vendor = %rec.vendor,
        batch_id = %rec.id,
        chart = ?hold.map(|h| h.stratum),
        recalled = recalled.len(),
        "spot-check signal: the vendor's batches wait for review (a suspicion, not proof)"
    );
    Ok(recalled)
}

/// Finish the recalls that spot-check signals asked for and that a stop or a crash interrupted (a
/// vendor's history still carries its `spot_recall`): each batch of the chart's run still accepted is
/// recalled, as the answer would have done, and the pending recall is cleared. Run by the daemon at
/// startup, before it scores anything. Returns the batches recalled.
pub fn resume_spot_recalls(env: &ReviewEnv<'_>) -> Result<Vec<String>, ReviewError> {
    let mut all = Vec::new();
    // Every stored history, not only the configured vendors': a vendor taken out of the configuration
    // with a recall pending still has poisoned batches in the pool.
    for (vendor, history) in env.store.vendor_histories()? {
        let Some(pending) = history.spot_recall else {
            continue;
        };
        let Some(cause) = env.store.batch(&pending.cause)? else {
            env.store
                .edit_vendor_history(&vendor, |h| h.spot_recall = None)?;
            continue;
        };
        tracing::info!(vendor = %vendor, batch_id = %cause.id, "recovery: finishing the recall a spot-check signal asked for");
        all.extend(recall_run(env, "daemon", &cause, &pending.batches, None)?);
    }
    Ok(all)
}

/// The trusted-set id of a spot-checked item.
pub fn trusted_id(batch: &str, item: &str) -> String {
    format!("spot:{batch}:{item}")
}

fn add_to_trusted(
    env: &ReviewEnv<'_>,
    req: &SpotAnswerRequest,
    batch: &str,
    items: &[crate::store::SpotItem],
    labels: &[String],
) -> Result<usize, ReviewError> {
    if env.config.spot_checks.trusted_max == 0 {
        return Ok(0);
    }
    let ids: Vec<String> = items.iter().map(|i| trusted_id(batch, &i.id)).collect();
    let width = env.meta.features.len();
    let flat: Vec<f64> = items
        .iter()
        .flat_map(|i| i.features.iter().copied())
        .collect();
    let x = ndarray::Array2::from_shape_vec((ids.len(), width), flat)
        .map_err(|e| ReviewError::Invalid(format!("the spot-check items' features: {e}")))?;
    let mut csv = Vec::new();
    crate::data::write_csv(
        &mut csv,
        (
            env.config.schema.id_column.as_str(),
            env.config.schema.label_column.as_str(),
        ),
        &ids,
        labels,
        &env.meta.features,
        x.view(),
    )
    .map_err(|e| ReviewError::Io {
        message: format!("writing the trusted items: {e}"),
        source: Some(e),
    })?;
    let change = trusted_add(
        env,
        &TrustedAddRequest {
            file_name: format!("spot-check-{batch}.csv"),
            content: String::from_utf8_lossy(&csv).into_owned(),
            by: req.by.clone(),
            source: format!("spot check of batch {batch}"),
            replace: true,
        },
    )?;
    // Past the cap the oldest spot-checked items retire; the team's own trusted items never do.
    let mut spot: Vec<crate::store::TrustedItem> = env
        .store
        .trusted_items()?
        .into_iter()
        .filter(|t| t.id.starts_with("spot:"))
        .collect();
    let max = env.config.spot_checks.trusted_max;
    if spot.len() > max {
        spot.sort_by(|a, b| a.added_at.cmp(&b.added_at).then_with(|| a.id.cmp(&b.id)));
        let ids: Vec<String> = spot[..spot.len() - max]
            .iter()
            .map(|t| t.id.clone())
            .collect();
        trusted_remove(
            env,
            &TrustedRemoveRequest {
                ids,
                by: req.by.clone(),
                reason: format!(
                    "the oldest spot-checked items past [spot_checks] trusted_max = {max}"
                ),
            },
        )?;
    }
    Ok(change.added.len() + change.replaced.len())
}
