//! Evidence per item, not per file: the flagged items a vendor delivers are judged as one stream of items,
//! so how the vendor cuts that stream into files does not change what the policy sees.
//!
//! # The level a vendor is judged against
//!
//! Each scored batch brings `n` judged items (items within the trusted set's reach, see
//! [`super::shift`]), `k` of them flagged, and the engine's computed clean level `c`: the flagged share a
//! batch of these very items would show if every label were right. The level for the batch is
//!
//! `ℓ = clamp(c + a, level_floor, 0.95)`,
//!
//! where `a` is the vendor's adjustment from its own record, size-weighted over the last
//! `evidence_items` items of its accepted batches (released ones included):
//!
//! * `A = Σ (k_j − c_j n_j) / (Σ n_j + trust_items)` — the excess of flagged items over the clean level per
//!   item, shrunk towards 0 by a prior worth `trust_items` items (a vendor earns its own level item by
//!   item; a run of tiny batches adds little weight, so it cannot drive the level to zero);
//! * `R = max(0, Σ_rel (k_j − c_j n_j) / Σ_rel n_j)` over the batches a reviewer released (0 when none);
//! * `a = A` when `A ≤ 0` (a vendor cleaner than the computed level is judged more strictly), else
//!   `a = min(A, R)`: a vendor's own accepted batches can never raise its level above the computed clean
//!   level; only batches a person looked at and released can. A poisoner that starts dirty on day one
//!   therefore never becomes its own baseline, and a vendor whose honest data flag more than the engine
//!   computes is not held for ever: the reviewer's releases lift the level (no cold-start deadlock).
//!
//! # The two rules
//!
//! 1. **This batch** (`flagged_items_excess`): the exact binomial upper tail
//!    `P(X ≥ k | X ~ Bin(n, ℓ)) < item_alpha`. The noise allowance follows the item count: a 30-item
//!    file needs a far larger share than a 3,000-item delivery to be held. Treating every item's flag
//!    as Bernoulli(ℓ) over-states the variance of the Poisson-binomial count the items really have (the
//!    binomial has the largest variance for a given mean), so the test is conservative.
//! 2. **The stream** (`flagged_items_drift`): a Bernoulli CUSUM over the vendor's accepted items (Page,
//!    "Continuous Inspection Schemes", Biometrika 1954; for a proportion inspected item by item,
//!    Reynolds & Stoumbos, "A CUSUM Chart for Monitoring a Proportion When Inspecting Continuously",
//!    Journal of Quality Technology 1999). Each item adds its log-likelihood ratio of `p₁ = ℓ + δ`
//!    against `p₀ = ℓ`; a batch adds `L = k ln(p₁/p₀) + (n − k) ln((1 − p₁)/(1 − p₀))` and
//!    `S ← max(0, S + L)`, hold when `S > item_cusum_h` (nats). Splitting a delivery into files only adds
//!    resets to 0 between them, and `max(0, max(0, S + L₁) + L₂) ≥ max(0, S + L₁ + L₂)`: splitting can
//!    only raise the statistic, never hide a drift. Held batches leave `S` where it was, so the next file
//!    of a held delivery starts from a statistic just under `h`.
//! 3. **The stream's label fit** (`labels_unlikely`): the flag is a threshold on each item's doubt, and
//!    where the learner separates the classes only moderately a flipped label is often doubted no more
//!    than a right one. The batch's label fit (`model::LabelFit`: `ℓ = Σ ln p_ref(yᵢ)` against its mean
//!    `E` and variance `V` for right labels) uses every item's probability. Standardised per item by
//!    `σ̄ = √(V/n)`, the batch adds `L = (E − ℓ)/σ̄ − k·n` to a normal CUSUM over items,
//!    `F ← max(0, F + L)`, hold when `F > fit_cusum_h` (`k` = `fit_drift_shift`, in item standard
//!    deviations; the tabular CUSUM of Page 1954 on standardised items). The same argument as above makes
//!    splitting useless. In control, Siegmund's approximation (Siegmund, *Sequential Analysis*, 1985)
//!    gives a run length of `(e^{2kb} − 2kb − 1)/(2k²)` steps with `b = h + 1.166` for a CUSUM of
//!    unit-variance steps. Updated once per batch of `n` items, the statistic steps by `N(−k n, n)` in
//!    control: divided by `√n`, the same chart with `k√n` and `h/√n`. At the defaults `k` = 0.1, `h` = 40
//!    that is about 188,000 steps for one-item files, and about 17,000 batches for files of 30 or of 150
//!    items (2.6 million items at 150); a Monte Carlo test through this module matches the published run
//!    lengths at `k` = 0.5, `h` = 5, item by item and in four-item batches (`evidence_tests.rs`). A shift
//!    of `δ` standard deviations per item is held after about `h/(δ − k)` items.

use std::collections::VecDeque;

use serde::{Deserialize, Serialize};

use super::{BatchSignals, PolicySettings};

fn one() -> f64 {
    1.0
}

/// One batch in a vendor's item evidence.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct Tally {
    /// Judged items (within the trusted set's reach).
    pub items: u64,
    /// Flagged items among them.
    pub flagged: u64,
    /// Flagged items to expect if every label were right (`c · n`).
    pub clean: f64,
}

impl Tally {
    /// The tally of a batch's signals: judged items, flagged judged items and the clean count.
    pub fn of(settings: &PolicySettings, s: &BatchSignals) -> Self {
        let items = s.judged_items() as u64;
        Self {
            items,
            flagged: s.judged_flagged() as u64,
            clean: s.clean_level(settings) * items as f64,
        }
    }

    fn excess(&self) -> f64 {
        self.flagged as f64 - self.clean
    }
}

/// A vendor's item evidence: the tallies of its accepted (and released) batches over the last
/// `evidence_items` items, the tallies of released batches, and the Bernoulli CUSUM.
#[derive(Debug, Clone, Default, PartialEq, Serialize, Deserialize)]
#[serde(default)]
pub struct ItemEvidence {
    /// Accepted and released batches, oldest first, at most `evidence_items` items in all (the newest
    /// batch is always kept).
    pub accepted: VecDeque<Tally>,
    /// Batches a reviewer released, oldest first, at most `evidence_items` items in all.
    pub released: VecDeque<Tally>,
    /// Bernoulli CUSUM statistic after the last accepted batch, in nats.
    pub cusum: f64,
    /// Judged items of accepted and released batches ever recorded (not capped by the window).
    pub items_total: u64,
    /// The label-fit CUSUM after the last accepted batch, in item standard deviations.
    pub fit_cusum: f64,
    /// Accepted batches since the item CUSUM was last 0 (Montgomery's `N⁺`; see [`ItemJudgement::recall`]).
    pub cusum_run: u32,
    /// Accepted batches since the label-fit CUSUM was last 0.
    pub fit_run: u32,
}

/// How one batch's items were judged: the numbers behind `flagged_items_excess` and
/// `flagged_items_drift`, kept in the decision record.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ItemJudgement {
    /// Judged items `n` of this batch.
    pub items: u64,
    /// Flagged items `k` among them.
    pub flagged: u64,
    /// The computed clean level `c` of this batch (the engine's, or `clean_level_unknown`).
    pub clean_level: f64,
    /// Whether `c` came from the engine (false: `clean_level_unknown` was used).
    pub clean_level_computed: bool,
    /// The reference model's sharpness `β` behind `c` (1: the model as it is).
    #[serde(default = "one")]
    pub clean_level_sharpness: f64,
    /// The vendor's size-weighted excess `A` (shrunk by `trust_items`).
    pub accepted_excess: f64,
    /// The released batches' excess `R` (0 when none).
    pub released_excess: f64,
    /// The adjustment `a` applied to `c`.
    pub adjustment: f64,
    /// The level `ℓ` the batch was judged against.
    pub level: f64,
    /// Items in the vendor's window of accepted batches.
    pub window_items: u64,
    /// Whether the vendor's own record weighs at least as much as the prior (`window_items ≥ trust_items`).
    pub established: bool,
    /// `P(X ≥ k | Bin(n, ℓ))`.
    pub tail_p: f64,
    /// The test's limit `item_alpha`.
    pub alpha: f64,
    /// The CUSUM's alternative `p₁ = ℓ + δ`.
    pub drift_level: f64,
    /// This batch's log-likelihood ratio `L`, in nats.
    pub llr: f64,
    /// CUSUM before the batch, in nats.
    pub cusum_before: f64,
    /// CUSUM including the batch (what it becomes if the batch is accepted), in nats.
    pub cusum: f64,
    /// The decision interval `h`, in nats.
    pub cusum_h: f64,
    /// The judged items' label fit `z = (ℓ − E)/√V` (0: as likely as right labels).
    #[serde(default)]
    pub fit_z: f64,
    /// This batch's label-fit increment `L`, in item standard deviations.
    #[serde(default)]
    pub fit_step: f64,
    /// Label-fit CUSUM before the batch.
    #[serde(default)]
    pub fit_cusum_before: f64,
    /// Label-fit CUSUM including the batch (what it becomes if the batch is accepted).
    #[serde(default)]
    pub fit_cusum: f64,
    /// Its decision interval.
    #[serde(default)]
    pub fit_cusum_h: f64,
    /// The vendor's accepted batches since the item CUSUM was last 0, before this batch.
    #[serde(default)]
    pub cusum_run: u32,
    /// The vendor's accepted batches since the label-fit CUSUM was last 0, before this batch.
    #[serde(default)]
    pub fit_run: u32,
}

impl ItemJudgement {
    /// Whether the batch test fires.
    pub fn excess(&self) -> bool {
        self.tail_p < self.alpha
    }

    /// Whether the stream's CUSUM crosses `h`.
    pub fn drift(&self) -> bool {
        self.cusum > self.cusum_h
    }

    /// Whether the label-fit CUSUM crosses its `h` (never when `h` is 0: records from before it existed).
    pub fn unlikely(&self) -> bool {
        self.fit_cusum_h > 0.0 && self.fit_cusum > self.fit_cusum_h
    }

    /// How many of the vendor's most recent accepted batches to take back out of the pool for review when
    /// this batch is held: the accepted batches since the CUSUM that fires was last 0 (the larger run when
    /// both fire), where the hold needed them; 0 otherwise.
    ///
    /// A CUSUM that signals also dates the change: the shift most likely began just after the last
    /// period at which the statistic was 0, i.e. `N⁺` periods back, where `N⁺` counts the consecutive
    /// periods it has been above 0 (Montgomery, *Introduction to Statistical Quality Control*, §9.1 on the
    /// tabular CUSUM; from memory, 6th ed.). The batches accepted in that run were judged while the
    /// statistic was already climbing: a drip or a split delivery gets its early files in before the
    /// stream rule can fire. Recalling them keeps that poison out of the next training run; a reviewer
    /// releases whatever was right. The run is bounded by the batches in the vendor's evidence window.
    ///
    /// Only where the hold needed the run: a batch whose own step crosses `h` (`L > h`) would have been
    /// held from a statistic at 0, so it dates the change at itself, and the batches before it — clean
    /// ones often leave the statistic a little above 0 — are not recalled. (Without this, two clean
    /// batches followed by one with 30 % flipped labels recalled the clean ones in the daemon tests.)
    pub fn recall(&self) -> u32 {
        let drift = if self.drift() && self.llr <= self.cusum_h {
            self.cusum_run
        } else {
            0
        };
        let fit = if self.unlikely() && self.fit_step <= self.fit_cusum_h {
            self.fit_run
        } else {
            0
        };
        drift.max(fit)
    }

    /// The label-fit rule in one sentence.
    pub fn describe_fit(&self) -> String {
        format!(
            "label fit z = {:+.2} over {} judged items (0 for labels as likely as right ones under the reference model, \
             negative for less likely); label-fit CUSUM {:.1} → {:.1} (h = {:.0} item standard deviations)",
            self.fit_z, self.items, self.fit_cusum_before, self.fit_cusum, self.fit_cusum_h
        )
    }

    /// One sentence with the rule and the numbers, for reasons and `quarantine show`.
    pub fn describe(&self) -> String {
        let whose = if self.established {
            "the vendor's own record"
        } else {
            "a short record (the computed clean level dominates)"
        };
        format!(
            "{} of {} judged items in doubt against level {:.4} = computed clean level {:.4}{} {:+.4} from {} ({} items; \
             own excess {:+.4}, released excess {:+.4}): binomial tail {:.2e} (limit {:.0e}); item CUSUM {:.2} → {:.2} nats (h = {:.1}, p₁ = {:.4})",
            self.flagged,
            self.items,
            self.level,
            self.clean_level,
            if !self.clean_level_computed {
                " (not computed; configured)".to_string()
            } else if self.clean_level_sharpness != 1.0 {
                format!(" (reference model's sharpness {:.2}, measured)", self.clean_level_sharpness)
            } else {
                String::new()
            },
            self.adjustment,
            whose,
            self.window_items,
            self.accepted_excess,
            self.released_excess,
            self.tail_p,
            self.alpha,
            self.cusum_before,
            self.cusum,
            self.cusum_h,
            self.drift_level,
        )
    }
}

impl ItemEvidence {
    /// Judge one batch's items against the vendor's evidence (see the module documentation).
    pub fn judge(&self, settings: &PolicySettings, s: &BatchSignals) -> ItemJudgement {
        let t = Tally::of(settings, s);
        let sum = |q: &VecDeque<Tally>| {
            q.iter()
                .fold((0u64, 0.0f64), |(n, e), b| (n + b.items, e + b.excess()))
        };
        let (window_items, acc_excess) = sum(&self.accepted);
        let (rel_items, rel_excess) = sum(&self.released);
        let accepted_excess =
            acc_excess / (window_items as f64 + settings.trust_items as f64).max(1.0);
        let released_excess = if rel_items > 0 {
            (rel_excess / rel_items as f64).max(0.0)
        } else {
            0.0
        };
        let adjustment = if accepted_excess <= 0.0 {
            accepted_excess
        } else {
            accepted_excess.min(released_excess)
        };
        let c = s.clean_level(settings);
        let level = (c + adjustment).clamp(settings.item_level_floor, 0.95);
        let drift_level = (level + settings.item_drift_shift).min(0.99);
        let llr = bernoulli_llr(t.flagged, t.items, level, drift_level);
        // Label fit: `L = (E − ℓ)/σ̄ − k·n` with `σ̄ = √(V/n)` (module documentation).
        let fit = s.label_fit;
        let fit_step = if fit.variance > 0.0 && t.items > 0 {
            let n = t.items as f64;
            (fit.expected - fit.loglik) / (fit.variance / n).sqrt() - settings.fit_drift_shift * n
        } else {
            0.0
        };
        ItemJudgement {
            items: t.items,
            flagged: t.flagged,
            clean_level: c,
            clean_level_computed: s.clean_flagged_share > 0.0,
            clean_level_sharpness: s.clean_level_sharpness,
            accepted_excess,
            released_excess,
            adjustment,
            level,
            window_items,
            established: window_items >= settings.trust_items,
            tail_p: binomial_upper_tail(t.flagged, t.items, level),
            alpha: settings.item_alpha,
            drift_level,
            llr,
            cusum_before: self.cusum,
            cusum: (self.cusum + llr).max(0.0),
            cusum_h: settings.item_cusum_h,
            fit_z: fit.z(),
            fit_step,
            fit_cusum_before: self.fit_cusum,
            fit_cusum: (self.fit_cusum + fit_step).max(0.0),
            fit_cusum_h: settings.fit_cusum_h,
            cusum_run: self.cusum_run.min(self.accepted.len() as u32),
            fit_run: self.fit_run.min(self.accepted.len() as u32),
        }
    }

    /// Record a batch the policy accepted: the CUSUM moves on by its log-likelihood ratio and its tally
    /// joins the window.
    pub fn record_accepted(&mut self, settings: &PolicySettings, s: &BatchSignals) {
        let j = self.judge(settings, s);
        self.cusum = j.cusum;
        self.fit_cusum = j.fit_cusum;
        // N⁺: consecutive accepted batches with the statistic above 0 (`ItemJudgement::recall`).
        self.cusum_run = if j.cusum > 0.0 { self.cusum_run + 1 } else { 0 };
        self.fit_run = if j.fit_cusum > 0.0 {
            self.fit_run + 1
        } else {
            0
        };
        self.push(settings, Tally::of(settings, s), false);
    }

    /// Record a batch a reviewer released: its tally joins the window and the released batches (it may
    /// lift the vendor's level, see the module documentation); the CUSUM restarts at 0 (a person looked
    /// at the vendor's current level).
    pub fn record_released(&mut self, settings: &PolicySettings, s: &BatchSignals) {
        self.restart();
        self.push(settings, Tally::of(settings, s), true);
    }

    /// Both CUSUMs and their runs back to 0 (a person looked at the vendor's current level).
    pub fn restart(&mut self) {
        self.cusum = 0.0;
        self.fit_cusum = 0.0;
        self.cusum_run = 0;
        self.fit_run = 0;
    }

    fn push(&mut self, settings: &PolicySettings, t: Tally, released: bool) {
        self.items_total += t.items;
        self.accepted.push_back(t);
        trim(&mut self.accepted, settings.evidence_items);
        if released {
            self.released.push_back(t);
            trim(&mut self.released, settings.evidence_items);
        }
    }
}

/// Drop the oldest tallies while the rest still hold at least `cap` items (the newest is always kept).
fn trim(q: &mut VecDeque<Tally>, cap: u64) {
    let mut total: u64 = q.iter().map(|t| t.items).sum();
    while q.len() > 1 {
        let first = q[0].items;
        if total - first < cap {
            break;
        }
        total -= first;
        q.pop_front();
    }
}

/// `P(X ≥ k)` for `X ~ Binomial(n, p)`, summed exactly in log space:
/// `ln P(X = 0) = n ln(1 − p)`, `ln P(X = j + 1) = ln P(X = j) + ln((n − j)/(j + 1)) + ln(p/(1 − p))`.
pub fn binomial_upper_tail(k: u64, n: u64, p: f64) -> f64 {
    if k == 0 {
        return 1.0;
    }
    if k > n || p <= 0.0 {
        return 0.0;
    }
    if p >= 1.0 {
        return 1.0;
    }
    let odds = (p / (1.0 - p)).ln();
    let mut lp = n as f64 * (-p).ln_1p();
    let mut terms = Vec::with_capacity((n - k + 1) as usize);
    for j in 0..n {
        if j >= k {
            terms.push(lp);
        }
        lp += ((n - j) as f64 / (j + 1) as f64).ln() + odds;
    }
    terms.push(lp); // j = n
    let m = terms.iter().copied().fold(f64::NEG_INFINITY, f64::max);
    if !m.is_finite() {
        return 0.0;
    }
    (m + terms.iter().map(|t| (t - m).exp()).sum::<f64>().ln())
        .exp()
        .min(1.0)
}

/// The log-likelihood ratio of `k` flagged among `n` items, `p₁` against `p₀`:
/// `k ln(p₁/p₀) + (n − k) ln((1 − p₁)/(1 − p₀))` (nats).
pub fn bernoulli_llr(k: u64, n: u64, p0: f64, p1: f64) -> f64 {
    let (k, rest) = (k as f64, n.saturating_sub(k) as f64);
    k * (p1 / p0).ln() + rest * ((1.0 - p1) / (1.0 - p0)).ln()
}

#[cfg(test)]
#[path = "evidence_tests.rs"]
mod tests;
