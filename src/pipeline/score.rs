//! The scoring stage: the worker on thread `labelweir-scoring` (engine, policy, the verdict's store
//! transaction, the pool summary kept in step with the pool), the pool summary's loading and exact
//! rebuilds, and the trusted set as arrays.

use std::panic::{catch_unwind, AssertUnwindSafe};
use std::sync::atomic::Ordering;
use std::sync::mpsc::{Receiver, RecvTimeoutError, SyncSender};
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

use ndarray::{Array1, Array2};

use super::verdict;
use super::{now_ms, FileStamp, Filing, Job, JobInput, Observer, Reread, ScoringError, Shared};
use crate::config::Config;
use crate::data::Table;
use crate::metrics::Metrics;
use crate::model::{self, PoolInput, PoolSummary, TrustedInput};
use crate::store::{BatchRecord, SavedSummary, Store, StoreError, WorkspaceMeta, RECORD_VERSION};
use crate::workspace::Workspace;

/// The trusted set as arrays.
#[derive(Debug, Clone)]
pub struct TrustedArrays {
    /// Item ids.
    pub ids: Vec<String>,
    /// Features.
    pub x: Array2<f64>,
    /// Class indices.
    pub y: Vec<usize>,
    /// Confidence weights.
    pub w: Array1<f64>,
}

impl TrustedArrays {
    /// Load from the store; items with a class outside the workspace's classes are skipped.
    pub fn load(store: &Store, meta: &WorkspaceMeta) -> Result<Self, StoreError> {
        let d = meta.features.len();
        let mut ids = Vec::new();
        let mut x = Vec::new();
        let mut y = Vec::new();
        let mut w = Vec::new();
        for t in store.trusted_items()? {
            let Some(k) = meta.classes.iter().position(|c| *c == t.label) else {
                continue;
            };
            if t.features.len() != d {
                continue;
            }
            ids.push(t.id);
            x.extend_from_slice(&t.features);
            y.push(k);
            w.push(if t.weight.is_finite() && t.weight > 0.0 {
                t.weight
            } else {
                1.0
            });
        }
        let n = ids.len();
        Ok(Self {
            ids,
            x: Array2::from_shape_vec((n, d), x).unwrap_or_else(|_| Array2::zeros((0, d))),
            y,
            w: Array1::from(w),
        })
    }

    /// Items per class name.
    pub fn per_class(&self, classes: &[String]) -> Vec<(String, usize)> {
        classes
            .iter()
            .enumerate()
            .map(|(k, c)| (c.clone(), self.y.iter().filter(|y| **y == k).count()))
            .collect()
    }
}

/// The in-memory pool summary and what it covers.
#[derive(Debug, Clone)]
pub struct PoolState {
    /// The summary.
    pub summary: PoolSummary,
    /// Highest pool sequence absorbed.
    pub through_seq: u64,
    /// Pool epoch it belongs to.
    pub epoch: u64,
    /// Changed since the last save.
    pub dirty: bool,
}

fn model_err(e: impl std::fmt::Display) -> ScoringError {
    ScoringError::Model(e.to_string())
}

/// Build the summary exactly from the stored pool.
pub fn rebuild_pool(
    store: &Store,
    meta: &WorkspaceMeta,
    config: &Config,
) -> Result<PoolState, ScoringError> {
    let epoch = store.pool_epoch()?;
    let (x, y, last) = store.pool_matrix(meta.features.len())?;
    let k = meta.classes.len();
    let summary = if y.is_empty() {
        PoolSummary::empty(meta.feature_map.clone(), k)
    } else {
        PoolSummary::fit(&config.model, meta.feature_map.clone(), k, x.view(), &y)
            .map_err(model_err)?
            .0
    };
    Ok(PoolState {
        summary,
        through_seq: last,
        epoch,
        dirty: true,
    })
}

/// Load the saved summary (or rebuild it when missing or from another pool epoch) and absorb what was
/// accepted since it was saved.
pub fn load_pool(
    store: &Store,
    meta: &WorkspaceMeta,
    config: &Config,
) -> Result<PoolState, ScoringError> {
    let epoch = store.pool_epoch()?;
    let mut state = match store.saved_summary()? {
        Some(s) if s.epoch == epoch && s.summary.feature_map == meta.feature_map => PoolState {
            summary: s.summary,
            through_seq: s.through_seq,
            epoch,
            dirty: false,
        },
        Some(s) => {
            // Another pool epoch: rebuilt exactly, the labels model carried (see `catch_up`).
            let mut state = rebuild_pool(store, meta, config)?;
            state.summary.carry_labels_model(&s.summary);
            state
        }
        None => rebuild_pool(store, meta, config)?,
    };
    catch_up(&mut state, store, meta, config)?;
    Ok(state)
}

/// Absorb pool entries past the watermark; rebuild exactly if items left the pool.
pub fn catch_up(
    state: &mut PoolState,
    store: &Store,
    meta: &WorkspaceMeta,
    config: &Config,
) -> Result<(), ScoringError> {
    if store.pool_epoch()? != state.epoch {
        let old = std::mem::replace(state, rebuild_pool(store, meta, config)?);
        // The stored pool holds only the admitted items: the labels model is carried, not refitted.
        state.summary.carry_labels_model(&old.summary);
    }
    for (seq, e) in store.pool_entries_after(state.through_seq)? {
        if !e.labels.is_empty() {
            state
                .summary
                .absorb(&config.model, e.features().view(), &e.labels)
                .map_err(model_err)?;
        }
        state.through_seq = seq;
        state.dirty = true;
    }
    Ok(())
}

/// Save the summary with its watermark.
pub fn save_pool(state: &mut PoolState, store: &Store) -> Result<(), StoreError> {
    store.save_summary(&SavedSummary {
        version: RECORD_VERSION,
        epoch: state.epoch,
        through_seq: state.through_seq,
        summary: state.summary.clone(),
    })?;
    state.dirty = false;
    Ok(())
}

/// Everything the worker needs.
pub struct Worker {
    /// Workspace folders.
    pub ws: Workspace,
    /// Configuration.
    pub config: Arc<Config>,
    /// The store.
    pub store: Store,
    /// What init fixed.
    pub meta: WorkspaceMeta,
    /// Metrics.
    pub metrics: Arc<Metrics>,
    /// Verdict observer.
    pub observer: Option<Observer>,
    /// Trusted set.
    pub trusted: TrustedArrays,
    /// Pool summary.
    pub pool: PoolState,
    /// Shared flags.
    pub shared: Arc<Shared>,
    /// Reads a claimed file again when it changed after it was read (without it, no check is made).
    pub reread: Option<Reread>,
}

/// Times a claimed file that keeps changing is read again before it is rejected as `still_changing`.
const MAX_REREADS: u32 = 5;

/// What [`Worker::reread_when_quiet`] found.
enum Again {
    /// The file as it is now.
    Read(Box<(JobInput, Option<FileStamp>)>),
    /// The file is gone from `processing/`.
    Gone,
    /// Shutdown began meanwhile (the file stays in `processing/` for the next start).
    Cancelled,
}

type Refreshed = Arc<Mutex<Option<Result<PoolState, String>>>>;

impl Worker {
    pub(crate) fn run(
        &mut self,
        rx: Receiver<Job>,
        filer: &SyncSender<Filing>,
    ) -> Result<(), ScoringError> {
        let mut last_save = Instant::now();
        let mut last_refresh = Instant::now();
        let refreshed: Refreshed = Arc::new(Mutex::new(None));
        let mut refreshing = false;
        self.publish_pool();
        let mut config_seen = 0;
        let result = loop {
            self.shared.heartbeat_ms.store(now_ms(), Ordering::SeqCst);
            if self.shared.cancel.load(Ordering::SeqCst) {
                break Ok(());
            }
            match rx.recv_timeout(Duration::from_millis(500)) {
                Ok(job) => {
                    let depth = self
                        .shared
                        .queue_depth
                        .fetch_sub(1, Ordering::SeqCst)
                        .saturating_sub(1);
                    self.metrics.queue_depth(depth);
                    if self.shared.cancel.load(Ordering::SeqCst) {
                        // Abandon at a safe point: the file stays in processing/ and is redone at start.
                        break Ok(());
                    }
                    // A reloaded configuration applies from the next batch.
                    if let Some(c) = self.shared.reload.newer(&mut config_seen) {
                        self.config = c;
                    }
                    if let Err(e) = self.process(job, filer) {
                        break Err(e);
                    }
                }
                Err(RecvTimeoutError::Timeout) => {}
                Err(RecvTimeoutError::Disconnected) => break Ok(()),
            }
            if let Err(e) = self.housekeeping(
                &mut last_save,
                &mut last_refresh,
                &refreshed,
                &mut refreshing,
            ) {
                break Err(e);
            }
        };
        if self.pool.dirty {
            if let Err(e) = save_pool(&mut self.pool, &self.store) {
                tracing::error!(error = %e, "saving the pool summary at shutdown failed");
            }
        }
        result
    }

    pub(crate) fn publish_pool(&self) {
        let n = self.pool.summary.len();
        self.shared.pool_items.store(n, Ordering::SeqCst);
        self.metrics.pool_items(n);
        self.metrics
            .trusted(&self.trusted.per_class(&self.meta.classes));
    }

    fn housekeeping(
        &mut self,
        last_save: &mut Instant,
        last_refresh: &mut Instant,
        refreshed: &Refreshed,
        refreshing: &mut bool,
    ) -> Result<(), ScoringError> {
        if self.shared.trusted_changed.swap(false, Ordering::SeqCst) {
            self.trusted = TrustedArrays::load(&self.store, &self.meta)?;
            self.publish_pool();
        }
        if self.shared.pool_changed.swap(false, Ordering::SeqCst) {
            self.catch_up_logged();
        }
        let done = refreshed.lock().ok().and_then(|mut g| g.take());
        if let Some(r) = done {
            *refreshing = false;
            match r {
                Ok(fresh)
                    if fresh.epoch == self.pool.epoch
                        && fresh.through_seq <= self.pool.through_seq =>
                {
                    tracing::info!(
                        items = fresh.summary.len(),
                        "exact pool summary refresh done"
                    );
                    let old = std::mem::replace(&mut self.pool, fresh);
                    self.catch_up_logged();
                    // After the catch-up: the carried labels model has absorbed those entries already.
                    self.pool.summary.carry_labels_model(&old.summary);
                }
                Ok(_) => {} // the pool changed underneath; the next refresh will do
                Err(e) => {
                    tracing::warn!(error = %e, "exact pool summary refresh failed");
                    self.metrics.error("persist", "pool_refresh");
                }
            }
        }
        let every = self.config.pool.exact_refresh_interval_secs;
        if every > 0
            && !*refreshing
            && last_refresh.elapsed() >= Duration::from_secs(every)
            && self.pool.summary.exact_at_n != self.pool.summary.len()
        {
            *last_refresh = Instant::now();
            *refreshing = true;
            let (store, meta, config, slot) = (
                self.store.clone(),
                self.meta.clone(),
                self.config.clone(),
                refreshed.clone(),
            );
            let spawned = std::thread::Builder::new()
                .name("labelweir-refresh".into())
                .spawn(move || {
                    let r = catch_unwind(AssertUnwindSafe(|| rebuild_pool(&store, &meta, &config)))
                        .map_err(|_| "the engine panicked".to_string())
                        .and_then(|r| r.map_err(|e| e.to_string()));
                    if let Ok(mut g) = slot.lock() {
                        *g = Some(r);
                    }
                });
            if spawned.is_err() {
                *refreshing = false;
            }
        }
        if self.pool.dirty
            && last_save.elapsed()
                >= Duration::from_secs(self.config.pool.summary_save_interval_secs)
        {
            *last_save = Instant::now();
            save_pool(&mut self.pool, &self.store)?;
        }
        Ok(())
    }

    fn catch_up_logged(&mut self) {
        let r = catch_unwind(AssertUnwindSafe(|| {
            catch_up(&mut self.pool, &self.store, &self.meta, &self.config)
        }));
        match r {
            Ok(Ok(())) => {}
            Ok(Err(e)) => {
                tracing::error!(error = %e, "pool summary update failed; it will be rebuilt exactly");
                self.metrics.error("persist", "pool_update");
                self.pool.epoch = u64::MAX; // forces an exact rebuild at the next catch-up
            }
            Err(_) => {
                tracing::error!("the engine panicked while updating the pool summary");
                self.metrics.error("persist", "pool_update_panic");
                self.pool.epoch = u64::MAX;
            }
        }
        self.publish_pool();
    }

    /// Decide one job and hand it to the filing thread. Before a verdict is recorded, the claimed file's
    /// stamp is compared with the one taken when it was read; if the file changed (a writer still
    /// appending past the quiet period), it is read again once it has been quiet for
    /// `ingest.quiet_period_ms` and judged on what it holds then; one that keeps changing is rejected as
    /// `still_changing` after [`MAX_REREADS`] reads.
    fn process(&mut self, job: Job, filer: &SyncSender<Filing>) -> Result<(), ScoringError> {
        let Job {
            record,
            mut input,
            mut stamp,
        } = job;
        if self.reread.is_none() {
            stamp = None;
        }
        let path = self.ws.processing().join(&record.file_name);
        let mut rereads = 0;
        let decided = loop {
            let unchanged = || {
                stamp
                    .as_ref()
                    .is_none_or(|s| FileStamp::of(&path).as_ref() == Some(s))
            };
            if let Some(f) = self.decide_once(record.clone(), input, &unchanged)? {
                break f;
            }
            rereads += 1;
            tracing::warn!(
                batch_id = %record.id,
                vendor = %record.vendor,
                rereads,
                "the claimed file changed after it was read; judging it again on its full content"
            );
            if rereads > MAX_REREADS {
                input = JobInput::Rejected {
                    reason: crate::store::RejectReason {
                        code: "still_changing".into(),
                        detail: "the file kept changing after it was taken in; upload it under a temporary name and rename it when it is complete".into(),
                        row: None,
                        column: None,
                    },
                    bytes: None,
                    sha256: None,
                };
                stamp = None;
                continue;
            }
            match self.reread_when_quiet(&record, &path) {
                Again::Read(read) => (input, stamp) = *read,
                Again::Gone => {
                    self.store.forget_claim(&record.id)?;
                    return Ok(());
                }
                Again::Cancelled => return Ok(()),
            }
        };
        filer
            .send(decided)
            .map_err(|_| ScoringError::Model("the filing thread stopped".into()))
    }

    /// Wait until the claimed file has not been modified for the quiet period (at most four quiet
    /// periods and a second), then read it again through the [`Reread`] hook.
    fn reread_when_quiet(&self, record: &BatchRecord, path: &std::path::Path) -> Again {
        let quiet = Duration::from_millis(self.config.ingest.quiet_period_ms);
        let give_up = Instant::now() + quiet * 4 + Duration::from_secs(1);
        loop {
            if self.shared.cancel.load(Ordering::SeqCst) {
                return Again::Cancelled;
            }
            self.shared.heartbeat_ms.store(now_ms(), Ordering::SeqCst);
            let Some(now) = FileStamp::of(path) else {
                break;
            };
            if now.age(std::time::SystemTime::now()) >= quiet || Instant::now() >= give_up {
                break;
            }
            std::thread::sleep(Duration::from_millis(50).min(quiet.max(Duration::from_millis(1))));
        }
        match self.reread.as_ref().and_then(|r| r(record)) {
            Some(read) => Again::Read(Box::new(read)),
            None => Again::Gone,
        }
    }

    /// Decide a job's input; `None`, with nothing recorded, when `unchanged` says the file changed since
    /// it was read (checked after scoring, right before the verdict is recorded).
    fn decide_once(
        &mut self,
        mut record: BatchRecord,
        input: JobInput,
        unchanged: &dyn Fn() -> bool,
    ) -> Result<Option<Filing>, ScoringError> {
        Ok(Some(match input {
            JobInput::Rejected {
                reason,
                bytes,
                sha256,
            } => {
                if !unchanged() {
                    return Ok(None);
                }
                let v = verdict::rejected(record, reason, bytes.as_ref().map(Vec::len), sha256);
                let (rec, _) = self.persist(v)?;
                Filing { record: rec, bytes }
            }
            JobInput::Parsed {
                bytes,
                sha256,
                table,
                labels,
            } => {
                record.bytes = Some(bytes.len() as u64);
                record.items = Some(table.len());
                let first = self.store.batch_by_hash(&record.vendor, &sha256)?;
                record.sha256 = Some(sha256);
                let rec = match first {
                    Some(_) if !unchanged() => return Ok(None),
                    Some(first) => self.persist(verdict::duplicate(record, first))?.0,
                    None => match self.score_and_decide(record, &table, &labels, unchanged)? {
                        Some(rec) => rec,
                        None => return Ok(None),
                    },
                };
                Filing {
                    record: rec,
                    bytes: Some(bytes),
                }
            }
        }))
    }

    /// Record a verdict in one flushed store transaction (`persist` stage).
    fn persist(&self, v: verdict::Verdict) -> Result<(BatchRecord, bool), ScoringError> {
        let t = Instant::now();
        let accepted = v.accepted();
        let rec = self.store.record_verdict(
            &v.record,
            v.audit,
            v.index_hash,
            v.history.as_ref(),
            v.assessment.as_ref(),
            v.pool,
        )?;
        self.metrics.stage("persist", t.elapsed());
        Ok((rec, accepted))
    }

    /// Score (with the speculative absorb beside it), decide, persist, and bring the pool summary up to
    /// date for an accepted batch.
    fn score_and_decide(
        &mut self,
        record: BatchRecord,
        table: &Table,
        labels: &[usize],
        unchanged: &dyn Fn() -> bool,
    ) -> Result<Option<BatchRecord>, ScoringError> {
        // The summary this batch is scored against; a speculative absorb starts from it too.
        let base = (self.pool.through_seq, self.pool.epoch);
        let (scored, score_elapsed, speculative, absorb_wait) = self.score(table, labels);
        if !unchanged() {
            // The file grew (or changed) while it was scored: nothing is recorded; it is read again.
            return Ok(None);
        }
        self.metrics.stage("score", score_elapsed);
        if let Err(msg) = &scored {
            self.metrics.error("score", "engine");
            tracing::error!(batch_id = %record.id, vendor = %record.vendor, error = %msg, "scoring failed; quarantining");
        }
        let t_decide = Instant::now();
        let history = self.store.vendor_history(&record.vendor)?;
        let shift = scored.as_ref().ok().and_then(|_| {
            verdict::shift_check(
                &self.config,
                &self.meta.feature_map.standardizer,
                self.trusted.x.view(),
                self.pool.summary.reservoir_phi.view(),
                table.features.view(),
            )
        });
        let decision = verdict::decide(
            &self.config,
            &history,
            &scored,
            shift.as_ref(),
            &self.meta.classes,
        );
        self.metrics.stage("decide", t_decide.elapsed());
        if decision
            .reasons
            .iter()
            .any(|r| r.code == crate::policy::ReasonCode::ItemsUnlikePool)
        {
            self.metrics.unlike_pool(&record.vendor);
        }
        if let Ok(a) = &scored {
            self.metrics.batch_scored(
                &record.vendor,
                a.repair_cost,
                Some(decision.baseline.median),
            );
            let flagged = a
                .items
                .iter()
                .filter(|s| s.proposed_label != s.label)
                .count();
            self.metrics.batch_judged(
                &record.vendor,
                flagged as u64,
                a.items.len() as u64,
                a.damage,
            );
        }
        let item_scores = scored.as_ref().map(|a| a.items.clone()).unwrap_or_default();
        let v = verdict::scored(
            &self.config,
            record,
            verdict::ScoredBatch {
                table,
                labels,
                scored,
                score_seconds: score_elapsed.as_secs_f64(),
                classes: &self.meta.classes,
                trusted_ids: &self.trusted.ids,
                spot_seed: rand::random(),
            },
            decision,
            history,
        );
        let (rec, accepted) = self.persist(v)?;
        if accepted {
            self.metrics.admission(
                &rec.vendor,
                rec.held.iter().filter_map(|h| match h.state {
                    crate::store::HeldState::Waiting => Some("held"),
                    crate::store::HeldState::AdmittedProposed => Some("entered_proposed"),
                    crate::store::HeldState::Dropped => Some("dropped"),
                    crate::store::HeldState::Admitted => None,
                }),
            );
            let t_absorb = Instant::now();
            // The speculative copy absorbed the batch as delivered; it stands in for the stored entry only
            // when every item entered with its given label.
            let speculative = speculative.filter(|_| rec.held.is_empty());
            self.absorb_accepted(rec.pool_seq, base, speculative);
            self.absorb_kept_out(&rec, table, labels, &item_scores);
            self.metrics
                .stage("absorb", absorb_wait + t_absorb.elapsed());
        }
        Ok(Some(rec))
    }

    /// Run the engine on the batch against the pool summary; meanwhile a second thread absorbs the same
    /// batch into a copy of that summary (the update the batch needs if it is accepted; it does not
    /// depend on the score), adopted after an accepting verdict and dropped otherwise (see
    /// `absorb_accepted` for when a copy may stand in for the stored entry). A panic or error in the
    /// engine becomes an `Err` message. Returns the answer, the scoring time, the copy, and the time spent
    /// waiting for the copy after scoring.
    fn score(
        &self,
        table: &Table,
        labels: &[usize],
    ) -> (verdict::Scored, Duration, Option<PoolSummary>, Duration) {
        let k = self.meta.classes.len();
        let t_score = Instant::now();
        let base_epoch = self.pool.epoch;
        std::thread::scope(|s| {
            let spec = (base_epoch != u64::MAX)
                .then(|| {
                    let (summary, settings) = (&self.pool.summary, &self.config.model);
                    let (x, y) = (table.features.view(), labels);
                    std::thread::Builder::new()
                        .name("labelweir-absorb".into())
                        .spawn_scoped(s, move || {
                            let mut copy = summary.clone();
                            match catch_unwind(AssertUnwindSafe(|| copy.absorb(settings, x, y))) {
                                Ok(Ok(_)) => Some(copy),
                                _ => None, // the store path (`catch_up`) redoes it and reports the error
                            }
                        })
                        .ok()
                })
                .flatten();
            let assessed = catch_unwind(AssertUnwindSafe(|| {
                model::assess(
                    &self.config.model,
                    &self.meta.feature_map.standardizer,
                    k,
                    TrustedInput {
                        x: self.trusted.x.view(),
                        y: &self.trusted.y,
                        weight: self.trusted.w.view(),
                    },
                    PoolInput::Summary(&self.pool.summary),
                    table.features.view(),
                    labels,
                )
            }));
            let score_elapsed = t_score.elapsed();
            // Waiting here for the speculative absorb counts as `absorb` time.
            let t_wait = Instant::now();
            let speculative = spec.and_then(|h| h.join().ok().flatten());
            let scored = match assessed {
                Ok(Ok(a)) => Ok(a),
                Ok(Err(e)) => Err(format!("the engine could not score the batch: {e}")),
                Err(_) => {
                    Err("the engine failed (internal error) while scoring the batch".to_string())
                }
            };
            (scored, score_elapsed, speculative, t_wait.elapsed())
        })
    }

    /// Items of an accepted batch kept out of the pool join the model of the items as delivered, the
    /// clean level's labels model, where the trusted-anchored model does not doubt them
    /// ([`verdict::kept_out_rows`], [`PoolSummary::absorb_kept_out`]); never the pool or the reference.
    fn absorb_kept_out(
        &mut self,
        rec: &BatchRecord,
        table: &Table,
        labels: &[usize],
        items: &[model::ItemScore],
    ) {
        let rows = verdict::kept_out_rows(rec, &table.ids, items);
        if rows.is_empty() {
            return;
        }
        let y: Vec<usize> = rows.iter().map(|&i| labels[i]).collect();
        let x = table.features.select(ndarray::Axis(0), &rows);
        match self
            .pool
            .summary
            .absorb_kept_out(&self.config.model, x.view(), &y)
        {
            Ok(()) => self.pool.dirty = true,
            Err(e) => {
                tracing::warn!(batch_id = %rec.id, error = %e, "items kept out of the pool did not reach the clean level's labels model");
                self.metrics.error("persist", "pool_update");
            }
        }
    }

    /// Bring the pool summary up to date after this worker accepted a batch (its entry has sequence
    /// `seq`), before the next batch is scored.
    ///
    /// The speculative copy (`base` summary ⊕ the batch, computed from the same features and labels
    /// that were stored as the pool entry, by the same `PoolSummary::absorb`) is adopted only when it is
    /// exactly what [`catch_up`] would compute: the summary still is the one the copy started from, the
    /// pool epoch has not moved (nothing left the pool), and the only pool entry past the watermark is
    /// this batch's own. Anything else (a reviewer's release or withdrawal committed meanwhile, a failed
    /// speculative absorb) falls back to [`catch_up`] from the store, which absorbs in sequence order.
    fn absorb_accepted(&mut self, seq: Option<u64>, base: (u64, u64), spec: Option<PoolSummary>) {
        let (through, epoch) = (self.pool.through_seq, self.pool.epoch);
        let adoptable = match (seq, spec) {
            (Some(seq), Some(summary)) if base == (through, epoch) => {
                let only_ours = self
                    .store
                    .pool_seqs_after(through)
                    .is_ok_and(|s| s == [seq]);
                let same_epoch = self.store.pool_epoch().is_ok_and(|e| e == epoch);
                (only_ours && same_epoch).then_some((seq, summary))
            }
            _ => None,
        };
        match adoptable {
            Some((seq, summary)) => {
                self.shared
                    .speculative_absorbs
                    .fetch_add(1, Ordering::SeqCst);
                self.pool.summary = summary;
                self.pool.through_seq = seq;
                self.pool.dirty = true;
                self.publish_pool();
            }
            None => self.catch_up_logged(),
        }
    }
}

#[cfg(test)]
#[path = "score_tests.rs"]
mod tests;
