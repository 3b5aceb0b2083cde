//! Bilevel label repair along a decreasing penalty path (Zhang, Zhu & Wright, AAAI 2018).
//!
//! Derivations are written beside the code that computes them. The assessment runs in phases, one file
//! each: the reference model and the target ([`mod@reference`]), the learner's linearisation around pool ∪
//! batch (`inner`), the penalty path ([`path`]), the expected clean-batch figures ([`expected`]), and the
//! per-item fusion and report (`assess`).

mod assess;
pub mod expected;
mod fusion;
mod inner;
pub mod path;
pub mod reference;

use std::time::Duration;

use ndarray::{ArrayView1, ArrayView2};

use serde::{Deserialize, Serialize};

use super::PoolSummary;

pub use assess::assess;
pub use expected::label_hypergradient;
pub(crate) use inner::{Ctx, Inner, Linearisation};
pub(crate) use path::descend_projected;

/// How the accepted pool enters the assessment.
#[derive(Debug, Clone, Copy)]
pub enum PoolInput<'a> {
    /// No pool (cold start).
    Empty,
    /// Exact mode: the pool's raw items (features, labels); the learner is re-solved over pool ∪ batch.
    Exact {
        /// Raw (unstandardised) pool features, one row per item.
        x: ArrayView2<'a, f64>,
        /// Pool labels as class indices.
        y: &'a [usize],
    },
    /// Incremental mode: a second-order summary of the pool's loss around its optimum.
    Summary(&'a PoolSummary),
}

/// The trusted set as the engine sees it.
#[derive(Debug, Clone, Copy)]
pub struct TrustedInput<'a> {
    /// Raw (unstandardised) features.
    pub x: ArrayView2<'a, f64>,
    /// Class indices.
    pub y: &'a [usize],
    /// Confidence weight per item (1.0 when unknown).
    pub weight: ArrayView1<'a, f64>,
}

/// One batch item's score.
///
/// A flag is a suspicion for human review, not proof.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ItemScore {
    /// Row of the item in the batch as given.
    pub index: usize,
    /// Given label (class index).
    pub label: usize,
    /// Combined suspicion in `[0, 1]`, higher means more likely mislabeled: `w·repair_signal + (1 − w)·
    /// learner_doubt` with `w` = [`ItemScore::repair_weight`], which the trusted audit raises where the
    /// reference model is unsound. Items at or above the batch's flag line ([`Assessment::flag_line`]) are
    /// flagged. A suspicion, not proof.
    pub suspicion: f64,
    /// Proposed label (class index); equals `label` when the engine sees no reason to change it.
    pub proposed_label: usize,
    /// Confidence in the proposed label, in `[0, 1]`: `suspicion × alternative_share` for a proposed change,
    /// `1 − suspicion` when the given label is kept.
    pub confidence: f64,
    /// The most likely other class (what a reviewer would relabel the item to if its label is wrong),
    /// whether or not the suspicion reaches the flag threshold.
    #[serde(default)]
    pub alternative_label: usize,
    /// `P(alternative | the given label is wrong)` under the blend.
    #[serde(default)]
    pub alternative_share: f64,
    /// Label mass the minimal repair (the cheapest relabelling that meets the trusted-loss target) moves
    /// away from the given label.
    pub repair_mass: f64,
    /// The repair signal in `[0, 1]`, from the published objective's path alone (trusted loss,
    /// self-consistency, moved mass; halving γ): items flagged at an earlier step score higher, ties broken
    /// by the mass moved (see [`crate::model`]'s `anchor` module docs).
    #[serde(alias = "path_score")]
    pub repair_signal: f64,
    /// The class the repair path moved this item's label mass to (its largest other class).
    #[serde(default)]
    pub repair_label: usize,
    /// The learner's doubt: `1 − p_ref(given label)` under a reference model that has not seen this item.
    #[serde(alias = "reference_disagreement")]
    pub learner_doubt: f64,
    /// The trusted-anchored doubt: `1 − p_A(given label)` under the learner fitted jointly to the trusted
    /// items (weighted `anchor_confidence`) and to pool ∪ batch as delivered.
    #[serde(default)]
    pub anchored_doubt: f64,
    /// The trusted neighbours' doubt: `1 − p_N(given label)`, what the verified items nearest to this
    /// item say, with no learner in between (`crate::model::neighbours`: each class weighted by the
    /// distance to its nearest trusted item). It counts where the trusted audit has raised the repair
    /// weight (0 in records written before it existed).
    #[serde(default)]
    pub neighbour_doubt: f64,
    /// Weight of the repair evidence in this item's blend, set by the trusted audit of the reference model
    /// near the item (the base weight where the reference model is sound on the nearby trusted items).
    #[serde(default)]
    pub repair_weight: f64,
    /// The probability that the given label is wrong under the reference model and the batch's estimated
    /// noise rate ([`Assessment::estimated_wrong_share`]; a class-symmetric noise model). Reported for
    /// review; the flag follows the suspicion.
    #[serde(default)]
    pub wrong_probability: f64,
    /// The reference model's margin on the item, whatever its label: its most likely class's probability
    /// less the runner-up's, in `[0, 1]`. Small where the model is least sure; what expert spot checks
    /// rank their hard items by ([`crate::policy::spot`]).
    #[serde(default)]
    pub reference_margin: f64,
    /// Step of the repair path at which this item's relaxed label first left its given class, if it did.
    pub flagged_at_step: Option<usize>,
    /// The item's term of the batch's label fit ([`LabelFit`]): `ln p_ref(y)` with `p_ref` floored at
    /// `1e-4` (one item moves the sum by at most 9.2 nats), its mean and variance for a label drawn from
    /// the clean level's distribution `p̃`. All 0 while the reference is cross-fitted (its probabilities are
    /// calibrated by nothing).
    #[serde(default)]
    pub label_fit: LabelFit,
}

/// A trusted item that adding the batch as delivered would get wrong.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct TrustedItemReport {
    /// Row in the trusted set.
    pub index: usize,
    /// Its verified label.
    pub label: usize,
    /// What the model trained with the batch as delivered predicts.
    pub predicted_with_batch: usize,
    /// Probability that model gives the verified label.
    pub prob_with_batch: f64,
    /// Whether the reference model (pool alone) predicted it correctly.
    pub reference_correct: bool,
    /// Whether the model trained with the repaired batch predicts it correctly.
    pub repaired_correct: bool,
}

/// Convergence record of an assessment; nothing here is hidden from the output.
#[derive(Debug, Clone, Default, PartialEq, Serialize, Deserialize)]
pub struct Convergence {
    /// Every inner solve reached its tolerance.
    pub inner_converged: bool,
    /// Every linear solve reached its tolerance.
    pub linear_converged: bool,
    /// Inner-solve iterations, summed.
    pub inner_iterations: u64,
    /// Linear-solve iterations (CG) or factorisations (dense), summed.
    pub linear_iterations: u64,
    /// The time budget ran out before the path finished.
    pub budget_exhausted: bool,
    /// Projected-gradient iterations on the repair path, and trial points evaluated by their line search.
    pub repair_iterations: u64,
    /// Trial points evaluated by the repair's line search.
    pub repair_trials: u64,
    /// Which linear solver was used: `"dense"` or `"cg"`.
    pub linear_solver: String,
    /// Human-readable notes (e.g. which solve stopped early).
    pub notes: Vec<String>,
}

impl Convergence {
    /// The record at the start of an assessment: every solve converged so far, and the linear solver
    /// chosen (`"dense"` when `dense`, else `"cg"`).
    pub(crate) fn started(dense: bool) -> Self {
        Self {
            inner_converged: true,
            linear_converged: true,
            linear_solver: if dense { "dense" } else { "cg" }.into(),
            ..Self::default()
        }
    }
}

/// Wall-clock time per phase.
#[derive(Debug, Clone, Default, PartialEq, Serialize, Deserialize)]
pub struct Timings {
    /// Fitting the reference model(s).
    pub reference: Duration,
    /// Solving the learner on pool ∪ batch.
    pub train: Duration,
    /// The repair path.
    pub repair: Duration,
    /// Everything.
    pub total: Duration,
}

/// What the engine says about one batch.
#[derive(Debug, Clone, Default, PartialEq, Serialize, Deserialize)]
pub struct Assessment {
    /// Fraction of the batch's label mass that must move so that the model trained on pool ∪ repaired batch
    /// fits the trusted items at least as well as the target (see [`Assessment::trusted_loss_target`]).
    /// In `[0, 1]`. When even the deepest repair on the path does not reach the target, this is the cost
    /// the path reached, [`Assessment::target_reached`] is false and [`Assessment::trusted_still_wrong`]
    /// counts the trusted items still misclassified there. Unknown (`NaN`, `null` in JSON; the reason in
    /// [`Assessment::unknown`]) when the time budget cut the computation short.
    #[serde(deserialize_with = "nullable_f64")]
    pub repair_cost: f64,
    /// Whether the path reached the target.
    pub target_reached: bool,
    /// Trusted items the model trained with the repaired batch (at the repair-cost point, or the deepest
    /// point when the target was not reached) still misclassifies.
    #[serde(default)]
    pub trusted_still_wrong: usize,
    /// Which yardstick set the target: `"pool"` (the pool model's trusted loss, when it beats the trusted
    /// set's own cross-validated loss), `"trusted_cross_validation"` or `"consensus_relabelling"`.
    #[serde(default)]
    pub target_basis: String,
    /// Batch-level numbers that are unknown because a computation did not finish, each with its reason.
    #[serde(default)]
    pub unknown: Vec<String>,
    /// What the trusted set says about the reference model, and the repair weights it set.
    #[serde(default)]
    pub trusted_audit: crate::model::anchor::TrustedAudit,
    /// The batch's estimated share of wrong labels (the noise rate `ε` behind every item's suspicion).
    #[serde(default)]
    pub estimated_wrong_share: f64,
    /// `γ` of each step of the published objective's repair path.
    #[serde(default)]
    pub repair_path_gammas: Vec<f64>,
    /// Items the repair path had flagged by the end of each step.
    #[serde(default)]
    pub repair_path_flagged: Vec<usize>,
    /// Change in trusted loss caused by adding the batch as delivered: `Φ(W*(P ∪ B)) − Φ(W*(P))` (nats).
    /// Unknown (`NaN`, `null` in JSON) when the time budget ran out before that model converged.
    #[serde(deserialize_with = "nullable_f64")]
    pub damage: f64,
    /// `Φ` of the model trained on the pool alone (or of the empty model when there is no pool).
    pub trusted_loss_pool: f64,
    /// `Φ` of the model trained on pool ∪ batch as delivered.
    pub trusted_loss_with_batch: f64,
    /// `Φ` at the repair-cost point of the path.
    pub trusted_loss_repaired: f64,
    /// The target. With a pool of at least `min_reference_pool` items: `Φ_pool + target_slack`. Otherwise
    /// (cold start) `min(Φ_pool, Φ_cv, Φ_consensus) + target_slack`, where `Φ_cv` is the trusted set's own
    /// cross-validated loss (what the trusted items alone can promise about each other) and `Φ_consensus`
    /// the trusted loss after training on the batch relabelled by the cross-fitted reference model.
    pub trusted_loss_target: f64,
    /// Items, in batch order.
    pub items: Vec<ItemScore>,
    /// Trusted items that the model trained with the batch as delivered gets wrong.
    pub broken_trusted: Vec<TrustedItemReport>,
    /// `γ` values of the path, largest first.
    pub path_gammas: Vec<f64>,
    /// Moved-mass fraction at each step of the path.
    pub path_costs: Vec<f64>,
    /// Trusted loss at each step of the path.
    pub path_losses: Vec<f64>,
    /// Solver status.
    pub convergence: Convergence,
    /// Phase timings.
    pub timings: Timings,
    /// Which model supplied `reference_disagreement`: `"pool"` or `"cross_fit"`.
    pub reference: String,
    /// Trusted-set size and pool size used.
    pub sizes: Sizes,
    /// The share of items *in doubt* (suspicion at or above `[model] flag_threshold`, the doubt line the
    /// policy counts; the items an accepted batch holds for review) the batch would have if every item's
    /// label were drawn from its calibrated
    /// label distribution `p̃` — the pool's labels model (`PoolSummary::labels_model`: as fitted from
    /// unselected stored items, or of the accepted items as delivered; `p_ref` while the pool is not the
    /// reference or has neither), sharpened by [`Assessment::reference_sharpness`]
    /// when the clean level is calibrated — and flagged by the fusion's rule with the repair's own share
    /// taken as 0 (a batch carrying the right labels asks the repair to move nothing):
    /// `m₀ = (1/n) Σ_i q_i`, `q_i = Σ_c p̃_ic · 1[(w_ic − b)⁺ (1 − p_A,ic) + (1 − w_ic)(1 − p_ref,ic) ≥ τ]`,
    /// with `w_ic` the repair weight the trusted audit gives item `i` labelled `c`, `b` the base weight,
    /// `p_A` the trusted-anchored model and `τ` the doubt line `[model] flag_threshold`. Where the learner
    /// separates the classes poorly even a clean batch has many items the reference model doubts, and
    /// this is the share to expect; the policy judges the observed share in doubt against it. (The flag
    /// shown per item sits at the batch's higher [`Assessment::flag_line`].)
    #[serde(default)]
    pub expected_flagged_share: f64,
    /// Standard deviation of that share (Poisson-binomial): `√(Σ_i q_i (1 − q_i)) / n`.
    #[serde(default)]
    pub expected_flagged_sd: f64,
    /// The flagged items to expect per given label (indexed by class) from a batch labelled the way the
    /// reference model expects: `E_c = Σ_i p̃_ic · 1[item i flagged with label c]` (the rule above), the
    /// mean of a sum of independent Bernoulli variables (Poisson-binomial); `Σ_c E_c = n · m₀`. The
    /// policy compares each label's flagged count with it, so that a systematic error on one class is
    /// seen even when the batch's total flagged share stays within its noise. Empty in reports written before it existed.
    #[serde(default)]
    pub expected_flagged_by_label: Vec<f64>,
    /// The damage to expect if every item's label were drawn from its reference distribution `p_ref`:
    /// `E ≈ damage + Σ_i ⟨G_i, p_ref,i − y_i⟩ + E[r]` with `G = ∂Φ/∂Y` the label hypergradient at the
    /// delivered labels (the implicit-function-theorem gradient the repair path starts from) and `r ≥ 0`
    /// the second-order remainder of the trusted loss, estimated from a few seeded label draws through the
    /// same linearisation (see `expected_damage` in this module's source). Where the learner separates the
    /// classes poorly a clean batch's damage is noisy — another sample of plausible labels moves the trusted
    /// loss by this much — and the policy compares the observed damage with `E + z·sd` at cold start.
    /// Checked against brute-force relabelling and retraining in `tests/it/engine.rs`.
    #[serde(default)]
    pub expected_damage: f64,
    /// Standard deviation of that damage (labels drawn independently).
    #[serde(default)]
    pub expected_damage_sd: f64,
    /// How sure the reference model should be, as the trusted items measure it
    /// ([`crate::model::calibration`]): the expected flagged counts above take the right labels to follow
    /// `p_ref` sharpened by `applied` (`p_c^β / Σ_k p_k^β`), so they match what batches carrying the
    /// right labels flag whether the reference model is under- or over-confident. `applied = 1` (the
    /// model as it is) while the reference is cross-fitted or the trusted set is too small.
    #[serde(default)]
    pub reference_sharpness: crate::model::calibration::Sharpness,
    /// The batch's flag line: items whose suspicion reaches it are flagged. The least suspicion at or
    /// above `[model] flag_threshold` at which a batch carrying the right labels — labels drawn from the
    /// same calibrated distribution as [`Assessment::expected_flagged_share`] — is expected to flag at most
    /// `[model] clean_flag_rate` of its items:
    /// `τ* = max(τ₀, min{τ : (1/n) Σ_i Σ_c p̃_ic 1[s_ic ≥ τ] ≤ r})`, with `s_ic` the fusion's suspicion of
    /// item `i` labelled `c` (the repair's share taken as 0). So a flag means the same on every data set:
    /// a right label scores that high on at most `r` of the items, however well the learner separates the
    /// classes. It depends on the items' features and the trusted set, not on the delivered labels.
    /// Reports written before it existed read 0 here; [`Assessment::flag_line_or`] then gives the floor.
    #[serde(default)]
    pub flag_line: f64,
}

/// How likely labels are under the reference model, against what right labels would give: for items
/// `i`, `ℓ = Σ_i ln p_ref,i(y_i)`, `E = Σ_i Σ_c p̃_ic ln p_ref,ic` and
/// `V = Σ_i [Σ_c p̃_ic (ln p_ref,ic)² − (Σ_c p̃_ic ln p_ref,ic)²]`, with `p̃` the calibrated distribution the
/// clean level draws right labels from (see `Assessment::expected_flagged_share`) and independent items.
/// `z = (ℓ − E)/√V` is near 0 for right labels and negative when labels are less likely than right ones
/// would be. It uses every item's probability, not only whether it crossed the flag threshold — what a
/// learner that separates the classes only moderately leaves to work with. Sums over items add.
#[derive(Debug, Clone, Copy, Default, PartialEq, Serialize, Deserialize)]
pub struct LabelFit {
    /// `ℓ`, nats.
    pub loglik: f64,
    /// `E`, nats.
    pub expected: f64,
    /// `V`, nats².
    pub variance: f64,
}

impl LabelFit {
    /// `z = (ℓ − E)/√V` (0 when `V` is 0).
    pub fn z(&self) -> f64 {
        if self.variance > 0.0 {
            (self.loglik - self.expected) / self.variance.sqrt()
        } else {
            0.0
        }
    }

    /// The sum of two fits (over disjoint items).
    pub fn plus(self, o: LabelFit) -> LabelFit {
        LabelFit {
            loglik: self.loglik + o.loglik,
            expected: self.expected + o.expected,
            variance: self.variance + o.variance,
        }
    }

    /// This fit without the items of `o` (a part of it).
    pub fn minus(self, o: LabelFit) -> LabelFit {
        LabelFit {
            loglik: self.loglik - o.loglik,
            expected: self.expected - o.expected,
            variance: (self.variance - o.variance).max(0.0),
        }
    }
}

/// Reads a number that may be `null` (an unknown value, serialised from `NaN`) as `NaN`.
fn nullable_f64<'de, D: serde::Deserializer<'de>>(d: D) -> Result<f64, D::Error> {
    Ok(Option::<f64>::deserialize(d)?.unwrap_or(f64::NAN))
}

/// Sizes of the inputs of an assessment.
#[derive(Debug, Clone, Default, PartialEq, Serialize, Deserialize)]
pub struct Sizes {
    /// Trusted items.
    pub trusted: usize,
    /// Pool items (exact or summarised).
    pub pool: u64,
    /// Batch items.
    pub batch: usize,
    /// Learner parameters `p·K`.
    pub params: usize,
}

impl Assessment {
    /// The batch's flag line, never below `floor` (`[model] flag_threshold`): a report written before the
    /// line existed (0, or not a number) reads as the floor, as it was then.
    pub fn flag_line_or(&self, floor: f64) -> f64 {
        if self.flag_line.is_finite() {
            self.flag_line.max(floor)
        } else {
            floor
        }
    }

    /// Items sorted by suspicion, highest first (ties by batch order).
    pub fn ranked(&self) -> Vec<&ItemScore> {
        let mut v: Vec<&ItemScore> = self.items.iter().collect();
        v.sort_by(|a, b| {
            b.suspicion
                .total_cmp(&a.suspicion)
                .then(a.index.cmp(&b.index))
        });
        v
    }
}

/// Index of the largest value (the first on ties; 0 for an empty iterator).
pub(crate) fn argmax(it: impl Iterator<Item = f64>) -> usize {
    let mut best = (0, f64::NEG_INFINITY);
    for (i, v) in it.enumerate() {
        if v > best.1 {
            best = (i, v);
        }
    }
    best.0
}
