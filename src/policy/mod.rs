//! Verdict policy: from a batch's signals (repair cost, damage, flagged share) to *accept* or
//! *quarantine*, against the vendor's own history. Pure: no I/O, no clocks, no randomness.
//!
//! A quarantine is a suspicion for human review, not proof that the vendor did anything wrong.
//!
//! # Signals
//!
//! [`BatchSignals`] carries the engine's **repair cost** and **damage** for the whole batch (Zhang, Zhu &
//! Wright, "Training Set Debugging Using Trusted Items", AAAI 2018) and the batch's **flagged share**, the
//! fraction of its items whose suspicion reaches `[model] flag_threshold`. The batch-level scores shrink as
//! the accepted pool grows (a 1,000-item batch barely moves a model trained on 100,000 items), while the
//! per-item suspicions keep ranking flipped items; so the flagged share is judged beside them, with the
//! same machinery. Mean suspicion is recorded too, but not judged (see
//! [`PolicySettings::cold_start_max_flagged_share`] for the measurements and the reasons).
//!
//! # Rules, in the order they are checked
//!
//! 1. **Invalid scores.** A non-finite repair cost, damage or flagged share quarantines (`score_invalid`).
//! 2. **Absolute ceiling, always on.** `repair_cost > max_repair_cost` (`repair_cost_ceiling`),
//!    `damage > max_damage_nats` (`damage_ceiling`) or `flagged_share > max_flagged_share`
//!    (`flagged_share_ceiling`) quarantines whatever the vendor's history says, so a vendor whose baseline
//!    has crept up can never buy a free pass.
//! 3. **Cold start.** While the vendor has fewer than `min_history` accepted batches, only absolute limits
//!    apply: `repair_cost > cold_start_max_repair_cost` (`cold_start_repair_cost`),
//!    `damage > cold_start_max_damage_nats` (`cold_start_damage`), and `flagged_share >
//!    cold_start_max_flagged_share` (`cold_start_flagged_share`; `cold_start_max_flagged_share_small_pool`
//!    instead while the pool holds fewer than `small_pool_items` items: the engine's reference model is
//!    then weak or cross-fitted, which raises the flagged share of clean batches). On data the learner
//!    separates poorly (labels that follow the engine's reference model would already flag more than
//!    `cold_start_weak_model_share` of the batch) the flagged-share and damage limits fire only when the
//!    signal also exceeds what such labels would give, by `cold_start_flagged_excess_z` and
//!    `cold_start_damage_excess_z` standard deviations. The flagged share has its own history (stores
//!    written before it existed have none yet), so it can be in cold start while the repair cost is not.
//! 4. **Robust baseline.** Otherwise each signal is compared with the median of the vendor's accepted
//!    values through the modified z-score of Iglewicz & Hoaglin (*How to Detect and Handle Outliers*, 1993):
//!
//!    `M = 0.6745 (x − median) / MAD`, outlier when `M > modified_z_limit` (3.5 in the book).
//!
//!    Only the upper tail counts: a batch that needs *less* repair, or has fewer flagged items, than usual
//!    is not suspicious. When the MAD is 0 (more than half the values are equal, common when clean batches
//!    need no repair at all) the scale falls back to `1.253314 · mean absolute deviation` (common practice
//!    in statistics software documentation); whichever scale is used is floored at `min_scale` (repair
//!    cost) or `flagged_share_min_scale` (flagged share), so that a vendor whose clean batches all cost
//!    exactly 0 is not quarantined for a cost of 0.001 (`repair_cost_outlier`, `flagged_share_outlier`).
//!    The flagged share's scale is also floored at the binomial standard error of a proportion,
//!    `√(m (1 − m) / n)` for the baseline median `m` and this batch's `n` items (standard): a small batch's
//!    share is noisier than the vendor's usual batches, and is not blamed for that.
//! 5. **Slow drift.** A one-sided upper tabular CUSUM (Montgomery & Runger, *Applied Statistics and
//!    Probability for Engineers*, CUSUM section) per signal on the standardised value `z = (x − median) / σ̂`
//!    with `σ̂ = 1.4826 · MAD` (the same fallback and floors):
//!
//!    `S_i = max(0, S_{i−1} + z_i − k)`, signal when `S_i > h`; defaults `k = 0.5`, `h = 5`
//!    (Montgomery's design rule for a 1σ shift) (`repair_cost_drift`, `flagged_share_drift`).
//!
//! Quarantined batches never enter the baseline or the CUSUM state — otherwise a poisoner moves the
//! baseline with its own batches (common practice). For the same reason, the values of batches accepted
//! while a signal's CUSUM is above 0 (an excursion in progress) are held aside and join that signal's
//! baseline only once its CUSUM returns to 0: a slow drip of slightly-high batches cannot drag the median up
//! under the CUSUM that is meant to catch it (our own design; Montgomery's CUSUM assumes a fixed target). A
//! reviewer who accepts the new level resets the CUSUMs ([`VendorHistory::reset_cusum`]), which merges the
//! held values. The daemon calls [`VendorHistory::record_accepted`] for batches the policy accepted, and
//! [`VendorHistory::record_released`] for a batch a reviewer released (in the same store transaction as the
//! release, without the items the reviewer left out or corrected): a person looked at it, so it joins the
//! vendor's record, and a vendor whose honest batches the computed limits hold earns a record of its own
//! instead of staying in cold start for ever.
//!
//! 6. **Per label** ([`classes`], `flagged_items_in_class`): each given label's flagged items against the
//!    number to expect if the labels were right; a systematic error on one class can hide in the noise of
//!    the batch's total.

use std::collections::VecDeque;

use serde::{Deserialize, Serialize};

mod admission;
pub mod classes;
pub mod evidence;
mod judge;
mod settings;
pub mod shift;
pub mod spot;
mod stats;

pub use admission::{
    doubtful_items, item_fate, unsure_fate, unsure_items, AdmissionSettings, FlaggedItems, ItemFate,
};
pub use classes::{LabelCheck, LabelFlags};
pub use evidence::{ItemEvidence, ItemJudgement};
pub use settings::{PolicyError, PolicySettings};
pub use shift::{Reach, ShiftReport};
pub use stats::{cusum_step, median, modified_z_scores};

/// The consistency constant that makes the MAD estimate σ for normal data: `1 / Φ⁻¹(0.75)`.
///
/// Source: standard (e.g. Rousseeuw & Croux, "Alternatives to the Median Absolute Deviation", JASA 1993).
pub const MAD_CONSISTENCY: f64 = 1.482_602_218_505_602;

/// The constant in Iglewicz & Hoaglin's modified z-score, `≈ Φ⁻¹(0.75)` rounded as printed in the book.
pub const MODIFIED_Z_FACTOR: f64 = 0.6745;

/// Scale for the mean absolute deviation when the MAD is 0: `√(π/2)`, so that `1.253314 · meanAD`
/// estimates σ for normal data (common practice in statistics software documentation).
pub const MEAN_AD_CONSISTENCY: f64 = 1.253_314;

/// What the policy reads about one batch: the engine's batch-level scores and two summaries of its
/// per-item suspicions.
///
/// The per-item summaries matter when the accepted pool is large: a batch of 1,000 items barely moves a
/// model trained on 100,000, so its repair cost and damage shrink towards the clean noise floor, while the
/// per-item suspicions (which compare each label with a reference model that has not seen the item) keep
/// ranking flipped items well. See [`PolicySettings::cold_start_max_flagged_share`] for the measurements.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct BatchSignals {
    /// The engine's repair cost: fraction of the batch's label mass that must move, in `[0, 1]`.
    pub repair_cost: f64,
    /// The engine's damage: change of the trusted set's mean cross-entropy caused by the batch as
    /// delivered, in nats.
    pub damage: f64,
    /// Fraction of the batch's items whose suspicion is at or above the flag threshold
    /// (`[model] flag_threshold`), in `[0, 1]`.
    pub flagged_share: f64,
    /// Mean suspicion over the batch's items, in `[0, 1]` (recorded for review, not judged; see
    /// [`PolicySettings::cold_start_max_flagged_share`]).
    pub mean_suspicion: f64,
    /// Items in the batch (the `n` of the flagged share's binomial standard error).
    pub items: usize,
    /// Items in the accepted pool the batch was judged against. While the pool is small the engine's
    /// reference model is weak (or cross-fitted, below `[model] min_reference_pool`) and clean batches
    /// have a higher flagged share; see [`PolicySettings::small_pool_items`].
    #[serde(default)]
    pub pool_items: u64,
    /// The flagged share to expect if the batch were labelled the way the engine's reference model expects
    /// (`Assessment::expected_flagged_share`), and its standard deviation. Where the learner separates the
    /// classes poorly, clean batches have many doubtful items; the cold-start rule then asks for a share
    /// clearly above this, not only above the fixed limit. 0 and 0 when unknown (no effect).
    #[serde(default)]
    pub expected_flagged_share: f64,
    /// Standard deviation of [`BatchSignals::expected_flagged_share`].
    #[serde(default)]
    pub expected_flagged_sd: f64,
    /// The damage to expect if the batch were labelled the way the engine's reference model expects
    /// (`Assessment::expected_damage`), in nats, and its standard deviation. On data the learner
    /// separates poorly the cold-start damage rule asks for damage clearly above this. 0 and 0 when
    /// unknown (no effect).
    #[serde(default)]
    pub expected_damage: f64,
    /// Standard deviation of [`BatchSignals::expected_damage`], in nats.
    #[serde(default)]
    pub expected_damage_sd: f64,
    /// The computed clean level: the flagged share a batch of these very items would show if every label
    /// were right (from the engine's assessment). 0 when unknown (`clean_level_unknown` is used).
    #[serde(default)]
    pub clean_flagged_share: f64,
    /// The reference model's sharpness `β` the clean level was computed with
    /// (`Assessment::reference_sharpness`; 1: the model taken as it is), and how it was set. Shown in the
    /// decision so a reviewer sees what the clean level rests on.
    #[serde(default = "one")]
    pub clean_level_sharpness: f64,
    /// How [`BatchSignals::clean_level_sharpness`] was set, in words.
    #[serde(default)]
    pub clean_level_basis: String,
    /// Items beyond the trusted set's reach ([`shift`]); their labels are not judged.
    #[serde(default)]
    pub unlike_items: usize,
    /// Flagged items among those beyond reach (left out of the flagged count the label rules read).
    #[serde(default)]
    pub unlike_flagged: usize,
    /// The share of the reference sample beyond reach (what a batch like the pool shows); 0 when the shift
    /// check did not run.
    #[serde(default)]
    pub unlike_tail: f64,
    /// The batch's items per given label, for the per-label test ([`classes`]); empty when the engine
    /// computed no per-label expectation (records from before it did), which skips that test.
    #[serde(default)]
    pub labels: Vec<LabelFlags>,
    /// The judged items' label fit (see `model::LabelFit`): how likely their labels are under the
    /// reference model against right labels.
    #[serde(default)]
    pub label_fit: crate::model::LabelFit,
}

fn one() -> f64 {
    1.0
}

impl BatchSignals {
    /// The signals of an engine assessment; `flag_threshold` is `[model] flag_threshold` (`t`, the doubt
    /// line: the policy counts the items *in doubt*, not only those flagged at the batch's higher flag
    /// line, [`crate::model::Assessment::flag_line`] — a count of common events tells a moderate shift
    /// from noise better than a count of rare ones).
    ///
    /// `flagged_share = #{i : s_i ≥ t} / n`, `mean_suspicion = Σ s_i / n` over the batch's `n` items (both
    /// NaN for an empty batch, which the policy treats as an invalid score).
    pub fn from_assessment(a: &crate::model::Assessment, flag_threshold: f64) -> Self {
        let n = a.items.len() as f64;
        let flagged = a
            .items
            .iter()
            .filter(|i| i.suspicion >= flag_threshold)
            .count() as f64;
        let sum: f64 = a.items.iter().map(|i| i.suspicion).sum();
        let mut labels: Vec<LabelFlags> = a
            .expected_flagged_by_label
            .iter()
            .enumerate()
            .map(|(class, &expected)| LabelFlags {
                class,
                name: String::new(),
                items: 0,
                flagged: 0,
                expected,
            })
            .collect();
        for i in &a.items {
            if let Some(l) = labels.get_mut(i.label) {
                l.items += 1;
                l.flagged += u64::from(i.suspicion >= flag_threshold);
            }
        }
        Self {
            repair_cost: a.repair_cost,
            damage: a.damage,
            flagged_share: if n > 0.0 { flagged / n } else { f64::NAN },
            mean_suspicion: if n > 0.0 { sum / n } else { f64::NAN },
            items: a.items.len(),
            pool_items: a.sizes.pool,
            expected_flagged_share: a.expected_flagged_share,
            expected_flagged_sd: a.expected_flagged_sd,
            expected_damage: a.expected_damage,
            expected_damage_sd: a.expected_damage_sd,
            clean_flagged_share: a.expected_flagged_share,
            clean_level_sharpness: a.reference_sharpness.applied,
            clean_level_basis: a.reference_sharpness.basis.clone(),
            unlike_items: 0,
            unlike_flagged: 0,
            unlike_tail: 0.0,
            labels,
            label_fit: a
                .items
                .iter()
                .fold(crate::model::LabelFit::default(), |f, i| {
                    f.plus(i.label_fit)
                }),
        }
    }

    /// The same signals with the class names (by index) in the per-label tallies, so that reasons name a
    /// class by its name.
    pub fn named(mut self, classes: &[String]) -> Self {
        for l in &mut self.labels {
            if let Some(n) = classes.get(l.class) {
                l.name = n.clone();
            }
        }
        self
    }

    /// The same signals with the shift check's findings: items beyond reach are counted, and their flags
    /// are left out of the items the label rules judge.
    pub fn with_shift(
        mut self,
        a: &crate::model::Assessment,
        flag_threshold: f64,
        report: &ShiftReport,
    ) -> Self {
        self.unlike_items = report.unlike_items;
        self.unlike_tail = report.tail;
        self.unlike_flagged = a
            .items
            .iter()
            .filter(|i| i.suspicion >= flag_threshold)
            .filter(|i| report.beyond.get(i.index).copied().unwrap_or(false))
            .count();
        // Per label: items beyond reach leave the tallies, and the expectation is scaled to the judged
        // items (the engine computed it over the whole batch).
        let keep = if self.items > 0 {
            self.judged_items() as f64 / self.items as f64
        } else {
            0.0
        };
        for l in &mut self.labels {
            l.expected *= keep;
        }
        for i in &a.items {
            if !report.beyond.get(i.index).copied().unwrap_or(false) {
                continue;
            }
            self.label_fit = self.label_fit.minus(i.label_fit);
            if let Some(l) = self.labels.get_mut(i.label) {
                l.items = l.items.saturating_sub(1);
                if i.suspicion >= flag_threshold {
                    l.flagged = l.flagged.saturating_sub(1);
                }
            }
        }
        self
    }

    /// The same signals without items a reviewer left out of a release or corrected (`removed` items,
    /// `removed_flagged` of them flagged): what the vendor's record learns from a released batch is the
    /// level of the labels the reviewer let stand.
    pub fn without_items(mut self, removed: usize, removed_flagged: usize) -> Self {
        let flagged = self.flagged_items().saturating_sub(removed_flagged);
        self.items = self.items.saturating_sub(removed);
        self.flagged_share = if self.items > 0 {
            flagged.min(self.items) as f64 / self.items as f64
        } else {
            0.0
        };
        self
    }

    /// Flagged items of the batch: `round(flagged_share · items)` (0 for a non-finite share).
    pub fn flagged_items(&self) -> usize {
        if self.flagged_share.is_finite() {
            (self.flagged_share.clamp(0.0, 1.0) * self.items as f64).round() as usize
        } else {
            0
        }
    }

    /// Items whose labels are judged: those within the trusted set's reach.
    pub fn judged_items(&self) -> usize {
        self.items.saturating_sub(self.unlike_items)
    }

    /// Flagged items among the judged ones.
    pub fn judged_flagged(&self) -> usize {
        self.flagged_items()
            .saturating_sub(self.unlike_flagged)
            .min(self.judged_items())
    }

    /// The clean level `c` the item rules start from: the computed one, or `clean_level_unknown`.
    pub fn clean_level(&self, settings: &PolicySettings) -> f64 {
        if self.clean_flagged_share > 0.0 && self.clean_flagged_share.is_finite() {
            self.clean_flagged_share.min(1.0)
        } else {
            settings.clean_level_unknown
        }
    }

    /// Whether the shift check found the batch's items unlike the pool (see [`shift::unlike_pool`]), and
    /// the binomial tail behind it.
    pub fn unlike_pool(&self, settings: &PolicySettings) -> (bool, f64) {
        if self.unlike_tail <= 0.0 {
            return (false, 1.0);
        }
        shift::unlike_pool(settings, self.items, self.unlike_items, self.unlike_tail)
    }

    /// Whether the engine's learner separates this batch's classes poorly: labels that follow its reference
    /// model would already flag more than `cold_start_weak_model_share` of the batch. The cold-start
    /// flagged-share and damage limits then also ask for a clear excess over what such labels give.
    pub fn separates_poorly(&self, settings: &PolicySettings) -> bool {
        self.expected_flagged_share > settings.cold_start_weak_model_share
    }

    /// Signals of a batch the engine could not score: every field NaN, so the policy quarantines it
    /// (`score_invalid`).
    pub fn invalid() -> Self {
        Self {
            repair_cost: f64::NAN,
            damage: f64::NAN,
            flagged_share: f64::NAN,
            mean_suspicion: f64::NAN,
            items: 0,
            pool_items: 0,
            expected_flagged_share: 0.0,
            expected_flagged_sd: 0.0,
            expected_damage: 0.0,
            expected_damage_sd: 0.0,
            clean_flagged_share: 0.0,
            clean_level_sharpness: 1.0,
            clean_level_basis: String::new(),
            unlike_items: 0,
            unlike_flagged: 0,
            unlike_tail: 0.0,
            labels: Vec::new(),
            label_fit: crate::model::LabelFit::default(),
        }
    }
}

/// One vendor's history: the repair costs and flagged shares of its *accepted* batches and the CUSUM
/// states. Stored per vendor by the daemon (serde, versioned; fields added later default when absent).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct VendorHistory {
    /// Record version (currently 1).
    pub version: u32,
    /// Repair costs of the most recent accepted batches that form the baseline, oldest first (at most
    /// `history_window`).
    pub accepted_costs: VecDeque<f64>,
    /// Costs of batches accepted while the CUSUM was above 0; they join `accepted_costs` when it returns to
    /// 0 or is reset (at most `history_window`, oldest dropped first).
    #[serde(default)]
    pub pending_costs: VecDeque<f64>,
    /// CUSUM statistic `S` of the repair cost after the last accepted batch (σ units; 0 during cold start).
    pub cusum: f64,
    /// Accepted batches ever recorded (not capped by the window).
    pub accepted_total: u64,
    /// The flagged shares of accepted batches, with their own held-aside values and CUSUM (empty in
    /// records written before the flagged share was judged; it then starts in cold start).
    #[serde(default)]
    pub flagged_share: SignalHistory,
    /// The flagged items as one stream ([`evidence`]): empty in records written before it existed.
    #[serde(default)]
    pub evidence: ItemEvidence,
    /// The expert spot checks' charts ([`spot`]).
    #[serde(default)]
    pub spot: spot::SpotCharts,
    /// Set when a spot-check chart signalled: every later batch is held (`spot_check_disagreement`)
    /// until a reviewer clears it.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub spot_hold: Option<spot::SpotHold>,
    /// A spot-check signal's recall not finished yet: written with the signal, in the same transaction,
    /// and cleared once the chart's run is recalled, so that a stop or a crash in between finishes the
    /// recall at the daemon's next start (`review::resume_spot_recalls`).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub spot_recall: Option<spot::PendingRecall>,
}

/// The accepted values of one signal other than the repair cost, with its CUSUM state (see
/// [`VendorHistory::flagged_share`]).
#[derive(Debug, Clone, Default, PartialEq, Serialize, Deserialize)]
#[serde(default)]
pub struct SignalHistory {
    /// Values of the most recent accepted batches that form the baseline, oldest first (at most
    /// `history_window`).
    pub accepted: VecDeque<f64>,
    /// Values of batches accepted while this signal's CUSUM was above 0 (held aside, see the module
    /// documentation).
    pub pending: VecDeque<f64>,
    /// CUSUM statistic after the last accepted batch (σ units; 0 during cold start).
    pub cusum: f64,
}

impl Default for VendorHistory {
    fn default() -> Self {
        Self {
            version: 1,
            accepted_costs: VecDeque::new(),
            pending_costs: VecDeque::new(),
            cusum: 0.0,
            accepted_total: 0,
            flagged_share: SignalHistory::default(),
            evidence: ItemEvidence::default(),
            spot: spot::SpotCharts::default(),
            spot_hold: None,
            spot_recall: None,
        }
    }
}

/// Which signal a baseline describes: its scale floor and whether the binomial floor applies.
#[derive(Debug, Clone, Copy)]
enum Signal {
    RepairCost,
    FlaggedShare { items: usize },
}

impl Signal {
    fn floor(self, settings: &PolicySettings) -> f64 {
        match self {
            Signal::RepairCost => settings.min_scale,
            Signal::FlaggedShare { .. } => settings.flagged_share_min_scale,
        }
    }
}

/// Record one accepted value of a signal: update its CUSUM against the baseline before this batch, then
/// add the value to the baseline window, or hold it aside while the CUSUM is above 0.
fn record_value(
    settings: &PolicySettings,
    signal: Signal,
    accepted: &mut VecDeque<f64>,
    pending: &mut VecDeque<f64>,
    cusum: &mut f64,
    x: f64,
) {
    let window = settings.history_window.max(1);
    if accepted.len() < settings.min_history {
        accepted.push_back(x);
        if accepted.len() >= settings.min_history {
            // Leaving cold start: the CUSUM starts here (optionally with a head start).
            *cusum = if settings.cusum_head_start {
                settings.cusum_h / 2.0
            } else {
                0.0
            };
        }
    } else {
        let b = Baseline::of(settings, signal, accepted, pending.len(), *cusum, x);
        *cusum = b.cusum;
        pending.push_back(x);
        if *cusum <= 0.0 {
            accepted.extend(pending.drain(..));
        }
    }
    while pending.len() > window {
        pending.pop_front();
    }
    while accepted.len() > window {
        accepted.pop_front();
    }
}

impl VendorHistory {
    /// Record an accepted batch: for the repair cost and the flagged share, update the CUSUM against the
    /// baseline *before* this batch (the same one [`decide_batch`] used), then add the value to the
    /// baseline window — or, while that CUSUM is above 0, to the held-aside values (see the module
    /// documentation).
    ///
    /// Call it only for batches the policy accepted; non-finite values are ignored (a non-finite repair
    /// cost records nothing at all).
    pub fn record_accepted(&mut self, settings: &PolicySettings, signals: &BatchSignals) {
        if !signals.repair_cost.is_finite() {
            return;
        }
        self.accepted_total += 1;
        record_value(
            settings,
            Signal::RepairCost,
            &mut self.accepted_costs,
            &mut self.pending_costs,
            &mut self.cusum,
            signals.repair_cost.clamp(0.0, 1.0),
        );
        if signals.flagged_share.is_finite() {
            self.evidence.record_accepted(settings, signals);
            let f = &mut self.flagged_share;
            record_value(
                settings,
                Signal::FlaggedShare {
                    items: signals.items,
                },
                &mut f.accepted,
                &mut f.pending,
                &mut f.cusum,
                signals.flagged_share.clamp(0.0, 1.0),
            );
        }
    }

    /// Record a batch a reviewer released: a person judged it, so its values join the baselines directly
    /// (no CUSUM step, no holding aside) and its items join the item evidence as released (they may lift
    /// the vendor's level, see [`evidence`]). This is what keeps a vendor whose honest batches the
    /// computed limits hold from staying in cold start for ever.
    pub fn record_released(&mut self, settings: &PolicySettings, signals: &BatchSignals) {
        if !signals.repair_cost.is_finite() {
            return;
        }
        let window = settings.history_window.max(1);
        self.accepted_total += 1;
        self.accepted_costs
            .push_back(signals.repair_cost.clamp(0.0, 1.0));
        while self.accepted_costs.len() > window {
            self.accepted_costs.pop_front();
        }
        if signals.flagged_share.is_finite() {
            self.evidence.record_released(settings, signals);
            let f = &mut self.flagged_share;
            f.accepted.push_back(signals.flagged_share.clamp(0.0, 1.0));
            while f.accepted.len() > window {
                f.accepted.pop_front();
            }
        }
    }

    /// Whether the vendor is still in cold start under these settings (for the repair cost and damage).
    pub fn is_cold(&self, settings: &PolicySettings) -> bool {
        self.accepted_costs.len() < settings.min_history
    }

    /// Whether the vendor's flagged-share history is still in cold start (it can be after an upgrade,
    /// while the repair-cost history is not).
    pub fn flagged_share_is_cold(&self, settings: &PolicySettings) -> bool {
        self.flagged_share.accepted.len() < settings.min_history
    }

    /// Reset both CUSUMs to 0 and let the held-aside values join the baselines (a reviewer acknowledged a
    /// drift alarm and accepts the vendor's current level); likewise restart the item stream's charts and
    /// the spot-check charts, and clear a spot-check hold (the reviewer looked at the expert's answers).
    pub fn reset_cusum(&mut self, settings: &PolicySettings) {
        let window = settings.history_window.max(1);
        self.cusum = 0.0;
        self.evidence.restart();
        self.spot.restart();
        self.spot_hold = None;
        self.accepted_costs.extend(self.pending_costs.drain(..));
        while self.accepted_costs.len() > window {
            self.accepted_costs.pop_front();
        }
        let f = &mut self.flagged_share;
        f.cusum = 0.0;
        f.accepted.extend(f.pending.drain(..));
        while f.accepted.len() > window {
            f.accepted.pop_front();
        }
    }
}

/// The outcome of the policy.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Verdict {
    /// Into the training pool.
    Accept,
    /// Held for security review.
    Quarantine,
}

impl Verdict {
    /// Stable lower-case name.
    pub fn as_str(self) -> &'static str {
        match self {
            Verdict::Accept => "accept",
            Verdict::Quarantine => "quarantine",
        }
    }
}

/// Why the policy decided as it did. The serialised names are stable (they appear in notices, the audit
/// trail and metrics labels).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
#[non_exhaustive]
pub enum ReasonCode {
    /// Accept: the vendor has a baseline and the batch is within it.
    WithinBaseline,
    /// Accept: the vendor is in cold start and the batch is within the absolute limits.
    WithinColdStartLimits,
    /// Quarantine: the repair cost or damage is not a finite number.
    ScoreInvalid,
    /// Quarantine: repair cost above the always-on ceiling.
    RepairCostCeiling,
    /// Quarantine: damage above the always-on ceiling.
    DamageCeiling,
    /// Quarantine: cold start and repair cost above the cold-start limit.
    ColdStartRepairCost,
    /// Quarantine: cold start and damage above the cold-start limit.
    ColdStartDamage,
    /// Quarantine: modified z-score of the repair cost above the limit.
    RepairCostOutlier,
    /// Quarantine: the CUSUM of the vendor's standardised repair cost crossed `h` (slow drift).
    RepairCostDrift,
    /// Quarantine: flagged share above the always-on ceiling.
    FlaggedShareCeiling,
    /// Quarantine: cold start (of the flagged-share history) and flagged share above the cold-start limit.
    ColdStartFlaggedShare,
    /// Quarantine: modified z-score of the flagged share above the limit.
    FlaggedShareOutlier,
    /// Quarantine: the CUSUM of the vendor's standardised flagged share crossed `h` (slow drift).
    FlaggedShareDrift,
    /// Quarantine: more flagged items than the binomial noise allows at the vendor's level
    /// ([`evidence`]).
    FlaggedItemsExcess,
    /// Quarantine: the Bernoulli CUSUM over the vendor's items crossed `h` ([`evidence`]).
    FlaggedItemsDrift,
    /// Quarantine: the CUSUM of the vendor's label fit crossed its `h` — its labels are less likely under
    /// the reference model than right labels would be ([`evidence`]).
    LabelsUnlikely,
    /// Quarantine for operations, not label trouble: the batch's items are unlike the pool and the
    /// trusted set does not cover them ([`shift`]).
    ItemsUnlikePool,
    /// Quarantine: among the items given one label, more are flagged than the noise allows if the
    /// labels were right — a systematic error on one class ([`classes`]).
    FlaggedItemsInClass,
    /// Quarantine: the experts' spot checks of the vendor's accepted batches disagree with its labels
    /// more often than a clean labeler's would ([`spot`]); every batch waits for review until a reviewer
    /// clears the hold.
    SpotCheckDisagreement,
}

impl ReasonCode {
    /// The stable snake_case name.
    pub fn as_str(self) -> &'static str {
        match self {
            ReasonCode::WithinBaseline => "within_baseline",
            ReasonCode::WithinColdStartLimits => "within_cold_start_limits",
            ReasonCode::ScoreInvalid => "score_invalid",
            ReasonCode::RepairCostCeiling => "repair_cost_ceiling",
            ReasonCode::DamageCeiling => "damage_ceiling",
            ReasonCode::ColdStartRepairCost => "cold_start_repair_cost",
            ReasonCode::ColdStartDamage => "cold_start_damage",
            ReasonCode::RepairCostOutlier => "repair_cost_outlier",
            ReasonCode::RepairCostDrift => "repair_cost_drift",
            ReasonCode::FlaggedShareCeiling => "flagged_share_ceiling",
            ReasonCode::ColdStartFlaggedShare => "cold_start_flagged_share",
            ReasonCode::FlaggedShareOutlier => "flagged_share_outlier",
            ReasonCode::FlaggedShareDrift => "flagged_share_drift",
            ReasonCode::FlaggedItemsExcess => "flagged_items_excess",
            ReasonCode::FlaggedItemsDrift => "flagged_items_drift",
            ReasonCode::LabelsUnlikely => "labels_unlikely",
            ReasonCode::ItemsUnlikePool => "items_unlike_pool",
            ReasonCode::FlaggedItemsInClass => "flagged_items_in_class",
            ReasonCode::SpotCheckDisagreement => "spot_check_disagreement",
        }
    }

    /// Every code, for documentation and schema checks.
    pub const ALL: [ReasonCode; 19] = [
        ReasonCode::WithinBaseline,
        ReasonCode::WithinColdStartLimits,
        ReasonCode::ScoreInvalid,
        ReasonCode::RepairCostCeiling,
        ReasonCode::DamageCeiling,
        ReasonCode::ColdStartRepairCost,
        ReasonCode::ColdStartDamage,
        ReasonCode::RepairCostOutlier,
        ReasonCode::RepairCostDrift,
        ReasonCode::FlaggedShareCeiling,
        ReasonCode::ColdStartFlaggedShare,
        ReasonCode::FlaggedShareOutlier,
        ReasonCode::FlaggedShareDrift,
        ReasonCode::FlaggedItemsExcess,
        ReasonCode::FlaggedItemsDrift,
        ReasonCode::LabelsUnlikely,
        ReasonCode::ItemsUnlikePool,
        ReasonCode::FlaggedItemsInClass,
        ReasonCode::SpotCheckDisagreement,
    ];

    /// Whether the code says something about the batch's labels (false for the accepting codes, an
    /// invalid score and `items_unlike_pool`, which is about the items, not their labels).
    pub fn is_label_finding(self) -> bool {
        !matches!(
            self,
            ReasonCode::WithinBaseline
                | ReasonCode::WithinColdStartLimits
                | ReasonCode::ScoreInvalid
                | ReasonCode::ItemsUnlikePool
        )
    }

    /// Whether the code is a stream rule, whose hold may recall the vendor's batches accepted on the
    /// statistic's way up ([`ItemJudgement::recall`]).
    pub fn is_stream_rule(self) -> bool {
        matches!(
            self,
            ReasonCode::FlaggedItemsDrift | ReasonCode::LabelsUnlikely
        )
    }
}

impl std::fmt::Display for ReasonCode {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str(self.as_str())
    }
}

/// One reason: a stable code and a sentence with the numbers.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Reason {
    /// Stable code.
    pub code: ReasonCode,
    /// Human-readable detail (numbers included).
    pub detail: String,
}

/// Which scale the baseline used.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum ScaleSource {
    /// `MAD / 0.6745` (modified z) and `1.4826 · MAD` (CUSUM).
    Mad,
    /// MAD was 0: `1.253314 · mean absolute deviation`.
    MeanAbsoluteDeviation,
    /// The floor `min_scale` / `flagged_share_min_scale` (the estimate was smaller, or there is no
    /// history).
    Floor,
    /// The flagged share's binomial standard error `√(m (1 − m) / n)` (larger than the estimate and the
    /// floor: a batch smaller than the vendor's usual ones).
    BinomialStandardError,
}

/// The vendor baseline a batch was judged against, for one signal (repair cost or flagged share).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Baseline {
    /// Accepted batches in the baseline window.
    pub n_history: usize,
    /// Accepted batches held aside during a CUSUM excursion (not in the baseline).
    pub n_pending: usize,
    /// Whether this signal's history is in cold start (only absolute limits applied).
    pub cold_start: bool,
    /// Median of the accepted values (0 with no history).
    pub median: f64,
    /// Median absolute deviation (raw, no consistency constant).
    pub mad: f64,
    /// Mean absolute deviation from the median.
    pub mean_abs_dev: f64,
    /// Robust σ estimate used to standardise (after fallback and floor).
    pub sigma: f64,
    /// Where `sigma` came from.
    pub scale_source: ScaleSource,
    /// Modified z-score of this batch's value (0 during cold start).
    pub modified_z: f64,
    /// Standardised value `(x − median) / σ̂` fed to the CUSUM (0 during cold start).
    pub standardized: f64,
    /// CUSUM before this batch.
    pub cusum_before: f64,
    /// CUSUM including this batch (what it becomes if the batch is accepted; 0 during cold start).
    pub cusum: f64,
    /// The decision interval `h` used.
    pub cusum_h: f64,
}

impl Baseline {
    /// The repair-cost baseline for a new cost `x` against a vendor's history.
    ///
    /// With `m` the median and `MAD = median |c_i − m|` of the accepted costs:
    /// * modified z `M = 0.6745 (x − m) / MAD` (Iglewicz & Hoaglin 1993), or `(x − m) / (1.253314 · meanAD)`
    ///   when MAD = 0; the denominator is floored at `min_scale`;
    /// * standardised cost `z = (x − m) / σ̂`, `σ̂ = max(1.4826 · MAD, min_scale)` (or the meanAD fallback);
    /// * CUSUM `S = max(0, S_prev + z − k)` (Montgomery & Runger).
    pub fn compute(settings: &PolicySettings, history: &VendorHistory, x: f64) -> Self {
        Self::of(
            settings,
            Signal::RepairCost,
            &history.accepted_costs,
            history.pending_costs.len(),
            history.cusum,
            x,
        )
    }

    /// The flagged-share baseline for a new share `x` of a batch of `items` items: the same formulas as
    /// [`Baseline::compute`] on the vendor's accepted flagged shares, with the floor
    /// `max(flagged_share_min_scale, √(m (1 − m) / items))` (the binomial standard error of a proportion at
    /// the baseline median `m`; standard).
    pub fn flagged_share(
        settings: &PolicySettings,
        history: &VendorHistory,
        x: f64,
        items: usize,
    ) -> Self {
        let f = &history.flagged_share;
        Self::of(
            settings,
            Signal::FlaggedShare { items },
            &f.accepted,
            f.pending.len(),
            f.cusum,
            x,
        )
    }

    fn of(
        settings: &PolicySettings,
        signal: Signal,
        accepted: &VecDeque<f64>,
        n_pending: usize,
        cusum_prev: f64,
        x: f64,
    ) -> Self {
        let values: Vec<f64> = accepted.iter().copied().collect();
        let n = values.len();
        let cold_start = n < settings.min_history;
        let (median, mad, mean_abs_dev) = if n == 0 {
            (0.0, 0.0, 0.0)
        } else {
            let m = median(&values);
            let dev: Vec<f64> = values.iter().map(|c| (c - m).abs()).collect();
            (m, median(&dev), dev.iter().sum::<f64>() / n as f64)
        };
        // The floor: the configured one, and for a share the binomial standard error √(m(1 − m)/n).
        let configured = signal.floor(settings).max(f64::MIN_POSITIVE);
        let binomial = match signal {
            Signal::FlaggedShare { items } if items > 0 => {
                let m = median.clamp(0.0, 1.0);
                (m * (1.0 - m) / items as f64).sqrt()
            }
            _ => 0.0,
        };
        let (floor, floor_source) = if binomial > configured {
            (binomial, ScaleSource::BinomialStandardError)
        } else {
            (configured, ScaleSource::Floor)
        };
        // Denominator of the modified z and σ̂ for the CUSUM, before the floor.
        let (mz_scale, sigma, source) = if mad > 0.0 {
            (
                mad / MODIFIED_Z_FACTOR,
                MAD_CONSISTENCY * mad,
                ScaleSource::Mad,
            )
        } else if mean_abs_dev > 0.0 {
            let s = MEAN_AD_CONSISTENCY * mean_abs_dev;
            (s, s, ScaleSource::MeanAbsoluteDeviation)
        } else {
            (0.0, 0.0, ScaleSource::Floor)
        };
        let (mz_scale, sigma, scale_source) = if sigma < floor || mz_scale < floor {
            (mz_scale.max(floor), sigma.max(floor), floor_source)
        } else {
            (mz_scale, sigma, source)
        };
        let (modified_z, standardized, cusum) = if cold_start || !x.is_finite() {
            (0.0, 0.0, 0.0)
        } else {
            let z = (x - median) / sigma;
            (
                (x - median) / mz_scale,
                z,
                cusum_step(cusum_prev, z, settings.cusum_k),
            )
        };
        Self {
            n_history: n,
            n_pending,
            cold_start,
            median,
            mad,
            mean_abs_dev,
            sigma,
            scale_source,
            modified_z,
            standardized,
            cusum_before: if cold_start { 0.0 } else { cusum_prev },
            cusum,
            cusum_h: settings.cusum_h,
        }
    }
}

/// The policy's answer for one batch.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Decision {
    /// Accept or quarantine.
    pub verdict: Verdict,
    /// Every rule that fired (for an accept, one `within_*` reason).
    pub reasons: Vec<Reason>,
    /// The repair-cost baseline the batch was judged against.
    pub baseline: Baseline,
    /// The flagged-share baseline the batch was judged against (absent in records written before the
    /// flagged share was judged, and when [`decide`] was given only the batch-level scores).
    #[serde(default)]
    pub flagged_share_baseline: Option<Baseline>,
    /// The signals the decision read (absent in older records and from [`decide`]).
    #[serde(default)]
    pub signals: Option<BatchSignals>,
    /// How the batch's items were judged as part of the vendor's item stream (absent in older records,
    /// from [`decide`], and with `judge_items = false`).
    #[serde(default)]
    pub items: Option<ItemJudgement>,
    /// The per-label tests of the batch's labels that had flagged items ([`classes`]; empty in older
    /// records, from [`decide`], and with `judge_labels = false`).
    #[serde(default)]
    pub labels: Vec<LabelCheck>,
    /// For a held batch: how many of the vendor's most recent accepted batches to take back out of the
    /// pool for review (`[policy] recall_on_drift`, [`ItemJudgement::recall`]); 0 otherwise and in older
    /// records.
    #[serde(default)]
    pub recall: u32,
}

/// Decide one batch from its repair cost and damage alone: the flagged-share rules are skipped.
///
/// For callers that have only the batch-level scores (the engine benchmark's cold-start verdict). The
/// daemon, `assess` and the review's re-scoring should use [`decide_batch`], which also judges the flagged
/// share: at large pools the batch-level scores alone miss flipped batches (see
/// [`PolicySettings::cold_start_max_flagged_share`]).
pub fn decide(
    settings: &PolicySettings,
    history: &VendorHistory,
    repair_cost: f64,
    damage: f64,
) -> Decision {
    judge::judge(settings, history, repair_cost, damage, None)
}

/// Decide one batch from all its signals. See the module documentation for the rules; every rule that
/// fires is reported.
pub fn decide_batch(
    settings: &PolicySettings,
    history: &VendorHistory,
    signals: &BatchSignals,
) -> Decision {
    judge::judge(
        settings,
        history,
        signals.repair_cost,
        signals.damage,
        Some(signals),
    )
}

#[cfg(test)]
mod history_tests;
#[cfg(test)]
mod signals_tests;
#[cfg(test)]
mod tests;
