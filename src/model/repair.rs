//! Bilevel label repair along a decreasing penalty path (Zhang, Zhu & Wright, AAAI 2018).
//!
//! Derivations are written beside the code that computes them below.

use std::ops::Range;
use std::sync::Arc;
use std::time::{Duration, Instant};

use ndarray::{s, Array1, Array2, ArrayView1, ArrayView2, Axis};
use rand::seq::SliceRandom;
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use serde::{Deserialize, Serialize};

use super::learner::{
    logits, one_hot, predict_proba, solve, solve_factored, train_chord, trusted_loss, vstack,
    weights_view, Objective,
};
use super::linalg::{conjugate_gradient, project_simplex, Cholesky};
use super::{
    check_labels, FeatureMap, ModelError, ModelSettings, PoolSummary, PoolTerm, Standardizer,
};

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
    /// reference model is unsound. Items at or above `flag_threshold` are flagged. A suspicion, not proof.
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
    /// Weight of the repair evidence in this item's blend, set by the trusted audit of the reference model
    /// near the item (the base weight where the reference model is sound on the nearby trusted items).
    #[serde(default)]
    pub repair_weight: f64,
    /// The probability that the given label is wrong under the reference model and the batch's estimated
    /// noise rate ([`Assessment::estimated_wrong_share`]; a class-symmetric noise model). Reported for
    /// review; the flag follows the suspicion.
    #[serde(default)]
    pub wrong_probability: f64,
    /// Step of the repair path at which this item's relaxed label first left its given class, if it did.
    pub flagged_at_step: Option<usize>,
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
    pub trusted_audit: super::anchor::TrustedAudit,
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
    /// The flagged share the batch would have if every item's label were drawn from its reference
    /// distribution `p_ref` (a batch labelled the way the reference model expects; the repair then has
    /// nothing to move): `m₀ = (1/n) Σ_i q_i` with `q_i = Σ_c p_ref,ic · 1[(1−w)(1 − p_ref,ic) ≥ τ]`, `τ` the
    /// flag threshold. Where the learner separates the classes poorly even a clean batch has many items the
    /// reference model doubts, and this is the share to expect; the policy compares the observed share
    /// with it at cold start.
    #[serde(default)]
    pub expected_flagged_share: f64,
    /// Standard deviation of that share (Poisson-binomial): `√(Σ_i q_i (1 − q_i)) / n`.
    #[serde(default)]
    pub expected_flagged_sd: f64,
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

/// The training problem over pool ∪ batch: mapped features with the pool's rows (the pool's items in exact
/// mode, the summary's reservoir when its term uses it) first and batch rows last, their weights, the
/// normaliser `N = n_P + n_B`, and the pool's quadratic model (incremental mode).
pub(super) struct Inner {
    phi: Array2<f64>,
    y_pool: Option<Array2<f64>>,
    weight: Option<Array1<f64>>,
    batch: Range<usize>,
    pub(super) norm: f64,
    l2: f64,
    prior: Option<PoolTerm>,
}

impl Inner {
    pub(super) fn labels(&self, y_batch: ArrayView2<'_, f64>) -> Array2<f64> {
        match &self.y_pool {
            Some(yp) => vstack(yp.view(), y_batch),
            None => y_batch.to_owned(),
        }
    }

    pub(super) fn objective<'b>(&'b self, y_all: &'b Array2<f64>) -> Objective<'b> {
        Objective {
            phi: self.phi.view(),
            y: y_all.view(),
            weight: self.weight.as_ref().map(|w| w.view()),
            norm: self.norm,
            l2: self.l2,
            prior: self.prior.as_ref().map(|t| t.quadratic(self.norm)),
        }
    }

    pub(super) fn phi_batch(&self) -> ArrayView2<'_, f64> {
        self.phi.slice(s![self.batch.clone(), ..])
    }

    /// Rows of the batch in the training set.
    pub(super) fn batch_rows(&self) -> Range<usize> {
        self.batch.clone()
    }

    /// The training set with the trusted items appended: mapped rows, labels and row weights, each trusted
    /// item `t` weighted `c̄ · N · c_t / Σ c` so that the trusted items' mean loss enters the objective `c̄`
    /// times (`N` the inner normaliser).
    pub(super) fn with_trusted(
        &self,
        y_batch: ArrayView2<'_, f64>,
        phi_t: ArrayView2<'_, f64>,
        y_t: &[usize],
        c_t: ArrayView1<'_, f64>,
        c_bar: f64,
    ) -> (Array2<f64>, Array2<f64>, Array1<f64>) {
        let k = y_batch.ncols();
        let phi = vstack(self.phi.view(), phi_t);
        let y = vstack(self.labels(y_batch).view(), one_hot(y_t, k).view());
        let total = c_t.sum().max(f64::MIN_POSITIVE);
        let mut w: Vec<f64> = match &self.weight {
            Some(w) => w.to_vec(),
            None => vec![1.0; self.phi.nrows()],
        };
        w.extend(c_t.iter().map(|c| c_bar * self.norm * c / total));
        (phi, y, Array1::from(w))
    }

    /// The pool summary's quadratic term for the inner normaliser, if the pool enters that way.
    pub(super) fn prior_quadratic(&self) -> Option<super::learner::Quadratic<'_>> {
        self.prior.as_ref().map(|t| t.quadratic(self.norm))
    }
}

/// The pool as it enters the training problems of one assessment: rows with a common weight, and the
/// summary's quadratic term (incremental mode).
struct PoolRows {
    phi: Option<Array2<f64>>,
    y: Option<Array2<f64>>,
    row_weight: f64,
    term: Option<PoolTerm>,
}

/// `H⁻¹` at one point of the path: a dense Cholesky factor, or CG on Hessian-vector products.
pub(super) enum HessianSolver {
    Dense(Arc<Cholesky>),
    Cg { prob: Array2<f64> },
}

/// One linearisation of `Y ↦ θ*(Y)` around an anchor `(Y_a, θ_a)`.
///
/// From the optimality condition `∇_θ L(θ*(Y), Y) = 0` and `∂(∇_θ L)/∂Y_ik = −(φ_i ⊗ e_k)/N`, the implicit
/// function theorem gives `dθ*/dY_ik = H⁻¹ (φ_i ⊗ e_k) / N`, hence
/// `θ*(Y) ≈ θ_a + H⁻¹ vec(Φ_Bᵀ (Y − Y_a)) / N` and, for the trusted loss,
/// `∂Φ/∂Y_ik = φ_iᵀ q_k / N` with `H q = ∇_θ Φ` — one solve for all `n_B·K` labels, since `H` does not depend
/// on the labels (only on `θ`).
pub(super) struct Linearisation {
    pub(super) y_anchor: Array2<f64>,
    pub(super) theta: Array1<f64>,
    solver: HessianSolver,
}

/// What the repair loop needs from the assessment.
pub(super) struct Ctx<'a> {
    pub(super) settings: &'a ModelSettings,
    pub(super) inner: &'a Inner,
    pub(super) phi_t: &'a Array2<f64>,
    pub(super) y_t: &'a [usize],
    pub(super) c_t: Array1<f64>,
    pub(super) k: usize,
    pub(super) conv: std::cell::RefCell<super::repair::Convergence>,
}

impl Ctx<'_> {
    pub(super) fn solve_h(
        &self,
        lin: &Linearisation,
        rhs: &Array1<f64>,
        warm: Option<Array1<f64>>,
    ) -> Array1<f64> {
        match &lin.solver {
            HessianSolver::Dense(c) => c.solve(rhs),
            HessianSolver::Cg { prob } => {
                let y_all = self.inner.labels(lin.y_anchor.view());
                let obj = self.inner.objective(&y_all);
                let res = conjugate_gradient(
                    |v| obj.hvp(prob.view(), v),
                    rhs,
                    warm,
                    None,
                    self.settings.cg_tol,
                    self.settings.cg_max_iters,
                );
                let mut c = self.conv.borrow_mut();
                c.linear_iterations += res.iterations as u64;
                if !res.converged {
                    c.linear_converged = false;
                }
                res.x
            }
        }
    }

    /// Re-solve the inner problem exactly at `y_batch` (warm start `init`) and build `H⁻¹` there.
    ///
    /// With `chord = Some(H̃)` the solve runs the chord method on that fixed factor ([`train_chord`]): the
    /// anchor `θ*(Y)` is still exact (to the inner tolerance) but no Hessian is assembled while the method
    /// converges well. With `keep` the new linearisation also keeps `H̃` for `dθ*/dY` (a re-anchoring along
    /// the path: the Hessian at the earlier optimum, which saves an assembly and a factorisation — the
    /// dominant cost of an assessment — per call); without it the Hessian is assembled and factored at the
    /// new optimum. The chord method hands over to full Newton when it converges slowly, and Newton's
    /// factor is then used.
    pub(super) fn linearise(
        &self,
        y_batch: &Array2<f64>,
        init: Array1<f64>,
        deadline: Instant,
        chord: Option<Arc<Cholesky>>,
        keep: bool,
    ) -> Linearisation {
        let y_all = self.inner.labels(y_batch.view());
        let obj = self.inner.objective(&y_all);
        let (theta, rep, factor, kept) = match &chord {
            Some(c) => {
                let (t, r, f) = train_chord(
                    &obj,
                    init,
                    c,
                    self.settings.inner_tol,
                    self.settings.inner_max_iters,
                    deadline,
                );
                let kept = (keep && f.is_none()).then(|| Arc::clone(c));
                (t, r, f, kept)
            }
            None => {
                let (t, r, f) = solve_factored(self.settings, &obj, init, deadline);
                (t, r, f, None)
            }
        };
        {
            let mut c = self.conv.borrow_mut();
            c.inner_iterations += rep.iterations;
            if !rep.converged {
                c.inner_converged = false;
                c.notes.push(format!(
                    "inner solve stopped early ({}; gradient norm {:.2e})",
                    rep.stopped, rep.grad_norm
                ));
            }
        }
        let m = theta.len();
        let dense_ok = m <= self.settings.dense_max_params;
        // Newton's last factor is H at the iterate one step before θ (equal to second order at a converged
        // solve): reuse it rather than assembling the Hessian again.
        let solver = match (dense_ok, kept, factor) {
            (true, Some(c), _) => HessianSolver::Dense(c),
            (true, None, Some(c)) if rep.converged => HessianSolver::Dense(Arc::new(c)),
            (true, _, _) => {
                let (_, _, prob) = obj.value_grad(&theta);
                match Cholesky::factor(obj.hessian(prob.view())) {
                    Some(c) => {
                        self.conv.borrow_mut().linear_iterations += 1;
                        HessianSolver::Dense(Arc::new(c))
                    }
                    None => {
                        self.conv.borrow_mut().notes.push(
                            "Hessian factorisation failed; fell back to conjugate gradients".into(),
                        );
                        HessianSolver::Cg { prob }
                    }
                }
            }
            (false, _, _) => {
                let (_, _, prob) = obj.value_grad(&theta);
                HessianSolver::Cg { prob }
            }
        };
        Linearisation {
            y_anchor: y_batch.clone(),
            theta,
            solver,
        }
    }

    /// The dense Hessian factor of a linearisation, for the chord method.
    pub(super) fn factor_of(lin: &Linearisation) -> Option<Arc<Cholesky>> {
        match &lin.solver {
            HessianSolver::Dense(c) => Some(Arc::clone(c)),
            HessianSolver::Cg { .. } => None,
        }
    }

    /// `θ_lin(Y) = θ_a + H⁻¹ vec(Φ_Bᵀ (Y − Y_a)) / N`, using only the rows that moved.
    pub(super) fn theta_at(
        &self,
        lin: &Linearisation,
        y: &Array2<f64>,
        warm: &mut Option<Array1<f64>>,
    ) -> Array1<f64> {
        let phi_b = self.inner.phi_batch();
        let p = phi_b.ncols();
        let k = self.k;
        let mut rhs = vec![0.0; p * k];
        let mut any = false;
        let ys = y.as_slice().expect("standard layout");
        let ya = lin.y_anchor.as_slice().expect("standard layout");
        let inv_n = 1.0 / self.inner.norm;
        for i in 0..y.nrows() {
            for c in 0..k {
                let dy = ys[i * k + c] - ya[i * k + c];
                if dy == 0.0 {
                    continue;
                }
                any = true;
                let f = dy * inv_n;
                let dst = &mut rhs[c * p..(c + 1) * p];
                for (d, &v) in dst.iter_mut().zip(phi_b.row(i).iter()) {
                    *d += f * v;
                }
            }
        }
        if !any {
            return lin.theta.clone();
        }
        let d = self.solve_h(lin, &Array1::from(rhs), warm.take());
        *warm = Some(d.clone());
        &lin.theta + &d
    }

    /// `Φ(θ)` and the label hypergradient `G = Φ_B mat(H⁻¹ ∇Φ(θ)) / N` (`n_B × K`).
    fn loss_and_hypergradient(
        &self,
        lin: &Linearisation,
        theta: &Array1<f64>,
        warm: &mut Option<Array1<f64>>,
    ) -> (f64, Array2<f64>) {
        let (phi_val, g_theta, _) =
            trusted_loss(self.phi_t.view(), self.y_t, self.c_t.view(), theta, self.k);
        let q = self.solve_h(lin, &g_theta, warm.take());
        let phi_b = self.inner.phi_batch();
        let g = logits(phi_b, &q, self.k) / self.inner.norm;
        *warm = Some(q);
        (phi_val, g)
    }

    pub(super) fn trusted_value(&self, theta: &Array1<f64>) -> f64 {
        trusted_loss(self.phi_t.view(), self.y_t, self.c_t.view(), theta, self.k).0
    }
}

/// Label draws behind the second-order part of [`Assessment::expected_damage`].
const EXPECTED_DAMAGE_DRAWS: usize = 16;

/// The damage to expect from the batch labelled the way the reference model expects, and its standard
/// deviation (see [`Assessment::expected_damage`]).
///
/// Labels `Y′_i ~ Categorical(p_ref,i)`, independently. The trained model moves linearly with the labels
/// (the linearisation the repair path uses, `θ′ = θ̂ + J (Y′ − Y)`, `J = H⁻¹ Φ_Bᵀ / N`), and the trusted loss
/// is expanded around `θ̂`:
///
///   `Φ(θ′) = Φ(θ̂) + ⟨G, Y′ − Y⟩ + r(Y′)`,  `G = Jᵀ ∇Φ(θ̂)` (the label hypergradient),
///
/// with `r ≥ 0` the remainder (the trusted loss is convex in `θ`). The linear term has closed-form moments,
///
///   `E⟨G, Y′ − Y⟩ = Σ_i ⟨G_i, p_ref,i − y_i⟩`,  `Var = Σ_i ( Σ_c p_ic G_ic² − (Σ_c p_ic G_ic)² )`,
///
/// and the remainder (Jensen's gap: the label noise spreads `θ′`, which raises the mean trusted loss) is
/// estimated from [`EXPECTED_DAMAGE_DRAWS`] seeded draws, each one linear solve with the factor already
/// in hand and one evaluation of `Φ`; the linear term serves as a control variate for it, so the draws
/// estimate only the small second-order part. Past the assessment's deadline the draws stop (fewer than two:
/// the linear term alone).
#[allow(clippy::too_many_arguments)]
fn expected_damage(
    ctx: &Ctx<'_>,
    lin: &Linearisation,
    g: &Array2<f64>,
    p_ref: &Array2<f64>,
    batch_y: &[usize],
    damage: f64,
    phi_with: f64,
    seed: u64,
    deadline: Instant,
) -> (f64, f64) {
    let (mut shift, mut var) = (0.0, 0.0);
    for (i, (p, gi)) in p_ref.rows().into_iter().zip(g.rows()).enumerate() {
        let mean: f64 = p.iter().zip(gi.iter()).map(|(pc, gc)| pc * gc).sum();
        let second: f64 = p.iter().zip(gi.iter()).map(|(pc, gc)| pc * gc * gc).sum();
        shift += mean - gi[batch_y[i]];
        var += (second - mean * mean).max(0.0);
    }
    let mut rng = ChaCha8Rng::seed_from_u64(seed ^ 0x4441_4d47);
    let k = p_ref.ncols();
    let mut lin_terms = Vec::with_capacity(EXPECTED_DAMAGE_DRAWS);
    let mut remainders = Vec::with_capacity(EXPECTED_DAMAGE_DRAWS);
    let mut warm = None;
    for _ in 0..EXPECTED_DAMAGE_DRAWS {
        if Instant::now() >= deadline {
            break;
        }
        let mut y = Array2::zeros((batch_y.len(), k));
        let mut linear = 0.0;
        for (i, p) in p_ref.rows().into_iter().enumerate() {
            let u: f64 = rand::Rng::random(&mut rng);
            let mut acc = 0.0;
            let c = p
                .iter()
                .position(|&pc| {
                    acc += pc;
                    u < acc
                })
                .unwrap_or(k - 1);
            y[[i, c]] = 1.0;
            linear += g[[i, c]] - g[[i, batch_y[i]]];
        }
        let theta = ctx.theta_at(lin, &y, &mut warm);
        let phi = ctx.trusted_value(&theta);
        lin_terms.push(linear);
        remainders.push(phi - phi_with - linear);
    }
    if remainders.len() < 2 {
        // Out of time: the linear term alone (it misses the small, non-negative Jensen gap).
        return (damage + shift, var.sqrt());
    }
    let n = remainders.len() as f64;
    let r_mean = remainders.iter().sum::<f64>() / n;
    let l_mean = lin_terms.iter().sum::<f64>() / n;
    let r_var = remainders.iter().map(|r| (r - r_mean).powi(2)).sum::<f64>() / (n - 1.0);
    let cov = remainders
        .iter()
        .zip(&lin_terms)
        .map(|(r, l)| (r - r_mean) * (l - l_mean))
        .sum::<f64>()
        / (n - 1.0);
    let mean = damage + shift + r_mean;
    let sd = (var + r_var + 2.0 * cov).max(0.0).sqrt();
    if mean.is_finite() && sd.is_finite() {
        (mean, sd)
    } else {
        (damage + shift, var.sqrt())
    }
}

/// Moved mass per item, `m_i = 1 − Y_i[ŷ_i]`.
fn moved(y: &Array2<f64>, given: &[usize]) -> Vec<f64> {
    given
        .iter()
        .enumerate()
        .map(|(i, &g)| (1.0 - y[[i, g]]).clamp(0.0, 1.0))
        .collect()
}

/// The label hypergradient `∂Φ/∂Y` (rows `batch` of the training set) at the optimum `theta` of `obj`.
///
/// `∂Φ/∂Y_ik = φ_iᵀ q_k / N` with `H q = ∇_θ Φ` (implicit function theorem; see [`assess`]). Solved densely
/// when `p·K ≤ settings.dense_max_params`, else by CG. Exposed for the derivative checks.
pub fn label_hypergradient(
    settings: &ModelSettings,
    obj: &Objective<'_>,
    theta: &Array1<f64>,
    batch: Range<usize>,
    phi_t: ArrayView2<'_, f64>,
    y_t: &[usize],
    c_t: ArrayView1<'_, f64>,
) -> Array2<f64> {
    let k = obj.classes();
    let (_, g_theta, _) = trusted_loss(phi_t, y_t, c_t, theta, k);
    let (_, _, prob) = obj.value_grad(theta);
    let q = if theta.len() <= settings.dense_max_params {
        Cholesky::factor(obj.hessian(prob.view())).map(|c| c.solve(&g_theta))
    } else {
        None
    };
    let q = q.unwrap_or_else(|| {
        conjugate_gradient(
            |v| obj.hvp(prob.view(), v),
            &g_theta,
            None,
            None,
            settings.cg_tol,
            settings.cg_max_iters,
        )
        .x
    });
    let phi_b = obj.phi.slice(s![batch, ..]);
    phi_b.dot(&weights_view(&q, obj.dim(), k)) / obj.norm
}

/// Stratified fold assignment: items of each class dealt round-robin after a seeded shuffle.
fn folds(y: &[usize], k: usize, n_folds: usize, seed: u64) -> Vec<usize> {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let mut order: Vec<usize> = (0..y.len()).collect();
    order.shuffle(&mut rng);
    let mut next = vec![0usize; k];
    let mut out = vec![0; y.len()];
    for i in order {
        let c = y[i];
        out[i] = next[c] % n_folds;
        next[c] += 1;
    }
    out
}

/// Score one batch against the trusted set through the learner.
///
/// * `standardizer` maps raw features to standardised ones (fit it on trusted ∪ pool ∪ batch features for a
///   one-shot assessment; the daemon keeps the workspace's fixed one). With [`PoolInput::Summary`] the
///   summary's own feature map is used and `standardizer` is ignored.
/// * `n_classes` is the number of classes of the trusted set; every label must be below it.
///
/// # Algorithm
///
/// 1. Reference: `θ_P` (pool alone) and `Φ_pool = Φ(θ_P)`; the target `Φ_tgt` (see
///    [`Assessment::trusted_loss_target`]); reference probabilities `p_ref` for every batch item from a model
///    that has not seen it (the pool model, or a cross-fit over batch folds plus the trusted items).
/// 2. Train on pool ∪ batch as delivered: `θ̂`, `Φ_with = Φ(θ̂)`, damage `Φ_with − Φ_pool`.
/// 3. Penalty path: with `C(Y) = (1/n_B) Σ_i (1 − Y_i[ŷ_i])`, minimise the linearised
///    `F_γ(Y) = Φ(θ_lin(Y)) + γ C(Y)` over the product of simplices by projected gradient (convex: `θ_lin`
///    is affine in `Y` and the cross-entropy is convex in `θ`), for `γ_l = γ_max r^{(l+1)/L}`, warm-started,
///    re-solving the learner exactly (re-linearising) a few times along the way. `γ_max = n_B max_i max_k
///    (G_iŷ − G_ik)` is where the first label starts to move (KKT at `Y = Ŷ`).
/// 4. Repair cost: the moved mass where the path first meets `Φ ≤ Φ_tgt` (interpolated between steps).
/// 5. Per item: `path_score` = moved mass averaged over the path; suspicion = `w·s_i + (1−w)·(1 −
///    p_ref(ŷ))` with `s_i = path_score` and `w = repair_weight` under a cross-fitted reference, and
///    `s_i` = the mass the repair moves at the target crossing and `w = pool_reference_repair_weight`
///    when the pool is the reference; proposed label = the best alternative under `w·Y_deep + (1−w)·p_ref`
///    when the suspicion reaches `flag_threshold`, else the given label.
pub fn assess(
    settings: &ModelSettings,
    standardizer: &Standardizer,
    n_classes: usize,
    trusted: TrustedInput<'_>,
    pool: PoolInput<'_>,
    batch_x: ArrayView2<'_, f64>,
    batch_y: &[usize],
) -> Result<Assessment, ModelError> {
    let started = Instant::now();
    let deadline = started + settings.time_budget();
    settings.validate()?;
    let k = n_classes;
    check_labels(batch_y, k)?;
    check_labels(trusted.y, k)?;
    if trusted.y.is_empty() {
        return Err(ModelError::Degenerate("the trusted set is empty".into()));
    }
    if batch_y.is_empty() {
        return Err(ModelError::Degenerate("the batch is empty".into()));
    }
    if batch_x.nrows() != batch_y.len()
        || trusted.x.nrows() != trusted.y.len()
        || trusted.weight.len() != trusted.y.len()
    {
        return Err(ModelError::Shape(
            "rows, labels and weights must have the same length".into(),
        ));
    }
    if trusted.weight.iter().any(|w| !w.is_finite() || *w < 0.0) || trusted.weight.sum() <= 0.0 {
        return Err(ModelError::Degenerate(
            "trusted weights must be finite, ≥ 0, and not all zero".into(),
        ));
    }
    let fmap = match pool {
        PoolInput::Summary(s) => {
            if s.n_classes != k {
                return Err(ModelError::Shape(format!(
                    "pool summary has {} classes, trusted set {k}",
                    s.n_classes
                )));
            }
            s.feature_map.clone()
        }
        _ => FeatureMap::new(standardizer.clone(), settings.feature_map, settings.seed)?,
    };
    if batch_x.ncols() != fmap.input_dim() || trusted.x.ncols() != fmap.input_dim() {
        return Err(ModelError::Shape(format!(
            "expected {} feature columns (batch has {}, trusted set {})",
            fmap.input_dim(),
            batch_x.ncols(),
            trusted.x.ncols()
        )));
    }
    let phi_b = fmap.apply(batch_x)?;
    let phi_t = fmap.apply(trusted.x)?;
    let p = phi_b.ncols();
    let m = p * k;
    let n_b = batch_y.len();
    let y_hat = one_hot(batch_y, k);
    let mut conv = Convergence {
        inner_converged: true,
        linear_converged: true,
        linear_solver: if m <= settings.dense_max_params {
            "dense".into()
        } else {
            "cg".into()
        },
        ..Convergence::default()
    };
    let mut timings = Timings::default();

    // ---- 1. the pool alone: θ_P, Φ_pool --------------------------------------------------------------
    let t_ref = Instant::now();
    let (pool_rows, n_p, theta_p) = match pool {
        PoolInput::Empty => (
            PoolRows {
                phi: None,
                y: None,
                row_weight: 1.0,
                term: None,
            },
            0u64,
            Array1::zeros(m),
        ),
        PoolInput::Exact { x, y } => {
            check_labels(y, k)?;
            if x.nrows() != y.len() {
                return Err(ModelError::Shape(
                    "pool rows and labels differ in length".into(),
                ));
            }
            let phi_p = fmap.apply(x)?;
            let yp = one_hot(y, k);
            let theta_p = if y.is_empty() {
                Array1::zeros(m)
            } else {
                let obj = Objective {
                    phi: phi_p.view(),
                    y: yp.view(),
                    weight: None,
                    norm: y.len() as f64,
                    l2: settings.l2,
                    prior: None,
                };
                let (t, rep) = solve(settings, &obj, Array1::zeros(m), deadline);
                conv.inner_iterations += rep.iterations;
                if !rep.converged {
                    conv.inner_converged = false;
                    conv.notes
                        .push(format!("pool-only solve stopped early ({})", rep.stopped));
                }
                t
            };
            (
                PoolRows {
                    phi: Some(phi_p),
                    y: Some(yp),
                    row_weight: 1.0,
                    term: None,
                },
                y.len() as u64,
                theta_p,
            )
        }
        PoolInput::Summary(s) if s.n == 0 => (
            PoolRows {
                phi: None,
                y: None,
                row_weight: 1.0,
                term: None,
            },
            0,
            s.theta(),
        ),
        PoolInput::Summary(s) => {
            let mut term = s.term(settings, n_b);
            let (phi, y, row_weight) = match term.rows.take() {
                Some((phi, y, w)) => (Some(phi), Some(y), w),
                None => (None, None, 1.0),
            };
            (
                PoolRows {
                    phi,
                    y,
                    row_weight,
                    term: Some(term),
                },
                s.n,
                s.theta(),
            )
        }
    };
    let (phi_pool_loss, _, prob_t_pool) =
        trusted_loss(phi_t.view(), trusted.y, trusted.weight, &theta_p, k);
    // The pool is the reference once it holds `min_reference_pool` items, or sooner when it already holds
    // `reference_items_per_param` items per learner parameter (a small learner on a small pool).
    let big_pool = n_p > 0
        && (n_p >= settings.min_reference_pool as u64
            || n_p as f64 >= settings.reference_items_per_param * m as f64);

    // Cross-validated trusted loss (only needed while the pool is too small to be the reference).
    let mut ref_pred_t: Vec<usize> = prob_t_pool
        .rows()
        .into_iter()
        .map(|r| argmax(r.iter().copied()))
        .collect();
    // The target never rests on the pool alone: the trusted set's own cross-validated loss (what the
    // trusted items promise about each other, which no vendor can touch) is always computed, and the
    // target is the better of the two. A contaminated pool raises `Φ_pool`, so it can never make the bar
    // laxer than the trusted items alone set it; a clean pool that predicts the trusted items better
    // tightens it.
    let mut target = phi_pool_loss;
    let mut target_basis = "pool";
    let (cv_loss, cv_pred) =
        trusted_cross_validation(settings, &phi_t, trusted, k, deadline, &mut conv);
    if cv_loss < target || n_p == 0 {
        target = target.min(cv_loss);
        ref_pred_t = cv_pred;
        target_basis = "trusted_cross_validation";
    }
    target += settings.target_slack;

    // Reference probabilities for the batch items from a model that has not seen them.
    let norm = n_p as f64 + n_b as f64;
    let (p_ref, reference) = if big_pool {
        (predict_proba(phi_b.view(), &theta_p, k), "pool")
    } else {
        let pr = cross_fit(
            settings, &phi_b, &y_hat, &pool_rows, n_p as f64, &phi_t, trusted, &theta_p, deadline,
            &mut conv,
        );
        (pr, "cross_fit")
    };
    timings.reference = t_ref.elapsed();

    // ---- 2. pool ∪ batch as delivered --------------------------------------------------------------------
    let t_train = Instant::now();
    let (phi_all, batch_rows, weight) = match &pool_rows.phi {
        Some(pp) => {
            // Exact mode's pool rows weigh 1 each (no weights needed); a reservoir's stand for n_P/|R|.
            let weight = (pool_rows.row_weight != 1.0).then(|| {
                let mut w = vec![pool_rows.row_weight; pp.nrows()];
                w.resize(pp.nrows() + n_b, 1.0);
                Array1::from(w)
            });
            (
                vstack(pp.view(), phi_b.view()),
                pp.nrows()..pp.nrows() + n_b,
                weight,
            )
        }
        None => (phi_b.clone(), 0..n_b, None),
    };
    let inner = Inner {
        phi: phi_all,
        y_pool: pool_rows.y,
        weight,
        batch: batch_rows,
        norm,
        l2: settings.l2,
        prior: pool_rows.term,
    };
    let ctx = Ctx {
        settings,
        inner: &inner,
        phi_t: &phi_t,
        y_t: trusted.y,
        c_t: trusted.weight.to_owned(),
        k,
        conv: std::cell::RefCell::new(conv),
    };
    // Training on pool ∪ batch starts at θ_P; with a pool summary the chord method on `H_P + R` (the pool's
    // mean Hessian plus the ridge, factored once per summary) gets there without assembling a Hessian, and
    // the Hessian is assembled once, at θ̂, for the linearisation.
    let pool_factor = match pool {
        PoolInput::Summary(s) if m <= settings.dense_max_params => s.curvature_factor(settings.l2),
        _ => None,
    };
    let mut lin = ctx.linearise(&y_hat, theta_p.clone(), deadline, pool_factor, false);
    // While the pool is too small to be the reference, the batch relabelled by the cross-fitted reference
    // (its most likely class for every item) is a second yardstick: what the batch would give the trusted
    // items if its labels agreed with everything else we know. Hard labels, not the soft `p_ref`: a model
    // trained on soft labels fits the trusted items better than any hard labelling could, which would
    // charge clean batches for not being smooth.
    if !big_pool {
        let lab: Vec<usize> = p_ref
            .rows()
            .into_iter()
            .map(|r| argmax(r.iter().copied()))
            .collect();
        let y_cons = one_hot(&lab, k);
        let consensus = ctx.linearise(
            &y_cons,
            lin.theta.clone(),
            deadline,
            Ctx::factor_of(&lin),
            true,
        );
        let phi_consensus = ctx.trusted_value(&consensus.theta) + settings.target_slack;
        if phi_consensus < target {
            target = phi_consensus;
            target_basis = "consensus_relabelling";
        }
    }
    let theta_hat = lin.theta.clone();
    let (phi_with, _, prob_t_with) =
        trusted_loss(phi_t.view(), trusted.y, trusted.weight, &theta_hat, k);
    let mut damage = phi_with - phi_pool_loss;
    // An unfinished computation reads as unknown (NaN, `null` in JSON), with its reason: never as a
    // number the policy could take at face value.
    let mut unknown: Vec<String> = Vec::new();
    if Instant::now() >= deadline && !ctx.conv.borrow().inner_converged {
        unknown.push(format!(
            "damage: the time budget of {} ms ran out before the model trained with the batch converged",
            settings.time_budget_ms
        ));
        damage = f64::NAN;
    }
    timings.train = t_train.elapsed();

    // ---- 3. the penalty path -----------------------------------------------------------------------------
    let t_rep = Instant::now();
    let mut warm_d: Option<Array1<f64>> = None;
    let mut warm_q: Option<Array1<f64>> = None;
    let (_, g0) = ctx.loss_and_hypergradient(&lin, &theta_hat, &mut warm_q);
    let (expected_damage, expected_damage_sd) = expected_damage(
        &ctx,
        &lin,
        &g0,
        &p_ref,
        batch_y,
        damage,
        phi_with,
        settings.seed,
        deadline,
    );
    // The published objective's repair path (trusted loss weighted by `trusted_confidence`, the relabelled
    // data's self-consistency, moved mass; halving γ), from the delivered labels: the repair signal.
    let anchored = super::anchor::anchored_path(
        &ctx,
        &lin,
        batch_y,
        settings.anchor_steps,
        settings.repair_iters.max(4),
        deadline,
    );
    // The trusted-anchored model (trusted items weighted `anchor_confidence` beside pool ∪ batch as
    // delivered) and its doubt about each given label.
    let theta_anchor = super::anchor::anchored_model(
        &ctx,
        &y_hat,
        theta_hat.clone(),
        settings.anchor_confidence,
        Ctx::factor_of(&lin),
        deadline,
    );
    let p_anchor = predict_proba(phi_b.view(), &theta_anchor, k);
    // The trusted audit of the reference model: the pool model when it is the reference, else the model
    // trained on pool ∪ batch as delivered (the cross-fit's folds have seen the trusted items).
    let (theta_audit, audited) = if big_pool {
        (&theta_p, "pool")
    } else {
        (&theta_hat, "pool_and_batch")
    };
    let base_weight = if big_pool {
        settings.pool_reference_repair_weight
    } else {
        settings.repair_weight
    };
    let (repair_weights, _, trusted_audit) = super::anchor::trusted_audit(
        phi_t.view(),
        trusted.y,
        trusted.weight,
        theta_audit,
        phi_b.view(),
        batch_y,
        k,
        base_weight,
        settings.trusted_neighbours,
        audited,
    );
    // γ at which item i's label starts to move (first order, KKT at Y = Ŷ): n_B max_k (G_iŷ − G_ik)⁺.
    let entry: Vec<f64> = (0..n_b)
        .map(|i| {
            let gy = g0[[i, batch_y[i]]];
            (0..k).map(|c| gy - g0[[i, c]]).fold(0.0, f64::max) * n_b as f64
        })
        .collect();
    let gamma_max = entry.iter().copied().fold(0.0, f64::max);
    let steps = settings.path_steps;
    let gammas: Vec<f64> = (0..steps)
        .map(|l| gamma_max * settings.path_min_ratio.powf((l + 1) as f64 / steps as f64))
        .collect();
    let relin_at: Vec<usize> = (0..settings.relinearisations)
        .map(|j| ((j + 1) * steps) / (settings.relinearisations + 1))
        .collect();

    let mut y = y_hat.clone();
    let mut path_costs = Vec::with_capacity(steps);
    let mut path_losses = Vec::with_capacity(steps);
    let mut moved_path: Vec<Vec<f64>> = Vec::with_capacity(steps);
    let mut thetas: Vec<Array1<f64>> = Vec::with_capacity(steps);
    let mut path_labels: Vec<Array2<f64>> = Vec::with_capacity(steps);
    let mut step_size = f64::NAN;
    let mut budget_exhausted = false;
    let mut gammas = gammas;
    let mut relin_at = relin_at;
    if gamma_max > 0.0 {
        let mut l = 0;
        while l < gammas.len() {
            let gamma = gammas[l];
            if Instant::now() >= deadline {
                budget_exhausted = true;
                break;
            }
            if relin_at.contains(&l) && l > 0 {
                let init = ctx.theta_at(&lin, &y, &mut warm_d);
                lin = ctx.linearise(&y, init, deadline, Ctx::factor_of(&lin), true);
                warm_d = None;
                warm_q = None;
            }
            let theta_l = projected_gradient(
                &ctx,
                &lin,
                &mut y,
                batch_y,
                gamma,
                &mut step_size,
                &mut warm_d,
                &mut warm_q,
            );
            let loss_l = ctx.trusted_value(&theta_l);
            let mv = moved(&y, batch_y);
            path_costs.push(mv.iter().sum::<f64>() / n_b as f64);
            path_losses.push(loss_l);
            moved_path.push(mv);
            thetas.push(theta_l);
            path_labels.push(y.clone());
            let reached = path_losses.iter().any(|&v| v <= target) || phi_with <= target;
            if l + 1 == steps && !reached {
                // The path ended above the target: continue it as far again on the same log scale (to
                // γ_max·r²), re-linearising first, and stop at the first step that meets the target.
                let last = gammas[steps - 1];
                gammas.extend(
                    (1..=steps)
                        .map(|j| last * settings.path_min_ratio.powf(j as f64 / steps as f64)),
                );
                relin_at.push(steps);
            }
            if l >= steps && reached {
                break;
            }
            l += 1;
        }
    }
    gammas.truncate(path_costs.len().max(steps.min(gammas.len())));
    // Verify the crossing with an exact re-solve where the linearised path first meets the target.
    let mut crossing = path_losses.iter().position(|&v| v <= target);
    if let Some(l) = crossing {
        let y_l = path_labels[l].clone();
        let exact = ctx.linearise(
            &y_l,
            thetas[l].clone(),
            deadline,
            Ctx::factor_of(&lin),
            true,
        );
        let exact_loss = ctx.trusted_value(&exact.theta);
        path_losses[l] = exact_loss;
        thetas[l] = exact.theta;
        if exact_loss > target {
            crossing = path_losses
                .iter()
                .skip(l + 1)
                .position(|&v| v <= target)
                .map(|j| j + l + 1);
        }
    }
    let mut conv = ctx.conv.into_inner();
    let budget_exhausted = budget_exhausted || anchored.budget_exhausted;
    conv.budget_exhausted = budget_exhausted;
    if budget_exhausted {
        conv.notes.push(format!(
            "time budget of {} ms ran out after {} of {} path steps",
            settings.time_budget_ms,
            path_costs.len(),
            steps
        ));
    }

    // ---- 4. repair cost -----------------------------------------------------------------------------------
    let zero = vec![0.0; n_b];
    let (repair_cost, target_reached, loss_repaired, repair_mass, theta_rep) = if phi_with <= target
    {
        (0.0, true, phi_with, zero.clone(), theta_hat.clone())
    } else if let Some(l) = crossing {
        let (c0, f0, m0) = if l == 0 {
            (0.0, phi_with, &zero)
        } else {
            (path_costs[l - 1], path_losses[l - 1], &moved_path[l - 1])
        };
        let (c1, f1) = (path_costs[l], path_losses[l]);
        let t = if f0 > f1 {
            ((f0 - target) / (f0 - f1)).clamp(0.0, 1.0)
        } else {
            1.0
        };
        let mass: Vec<f64> = m0
            .iter()
            .zip(&moved_path[l])
            .map(|(a, b)| a + t * (b - a))
            .collect();
        (
            c0 + t * (c1 - c0),
            true,
            target.min(f0),
            mass,
            thetas[l].clone(),
        )
    } else {
        // Not even the deepest repair on the path reaches the target: report the cost the path reached,
        // `target_reached: false` and the trusted items still wrong there — never a stand-in. When the
        // time budget cut the path short, the cost is unknown.
        let last = path_costs.len().saturating_sub(1);
        match path_costs.last() {
            Some(&c) if !budget_exhausted => (
                c,
                false,
                path_losses[last],
                moved_path[last].clone(),
                thetas[last].clone(),
            ),
            Some(_) => (
                f64::NAN,
                false,
                path_losses[last],
                moved_path[last].clone(),
                thetas[last].clone(),
            ),
            // No path: either no label change lowers the trusted loss (γ_max = 0; the batch's harm is not in
            // its labels, and `damage` says how much there is) or the budget ran out before the first step.
            None if gamma_max > 0.0 => (f64::NAN, false, phi_with, zero.clone(), theta_hat.clone()),
            None => (0.0, false, phi_with, zero.clone(), theta_hat.clone()),
        }
    };
    if repair_cost.is_nan() {
        unknown.push(format!(
            "repair_cost: the time budget of {} ms ran out before the repair path reached its target",
            settings.time_budget_ms
        ));
    }
    timings.repair = t_rep.elapsed();

    // ---- 5. items ---------------------------------------------------------------------------------------
    // The suspicion fuses the repair signal (the published objective's path) with the learner's doubt, item
    // by item, with the weight the trusted audit gives the repair there: the configured base weight where
    // the reference model is sound on the nearby trusted items and of the item's class, more where it is
    // not. The best alternative class comes from the blend q_j = w_j ρ_j + (1 − w_j) p_ref,j of the repair's
    // path-averaged relaxed label and the reference prediction.
    let blend: Array2<f64> = {
        let mut q = p_ref.clone();
        for (j, mut row) in q.rows_mut().into_iter().enumerate() {
            let w = repair_weights[j];
            for c in 0..k {
                row[c] = w * anchored.mean_labels[[j, c]] + (1.0 - w) * row[c];
            }
        }
        q
    };
    // The batch's estimated share of wrong labels: EM on the reference model's probability of each given
    // label under a class-symmetric noise model (see `super::anchor`), and each item's posterior there.
    let q_given: Vec<f64> = (0..n_b).map(|j| p_ref[[j, batch_y[j]]]).collect();
    let (noise_rate, p_wrong) = super::anchor::noise_rate_em(
        &q_given,
        k,
        settings.label_noise_prior,
        settings.label_noise_prior_items,
    );
    let items = (0..n_b)
        .map(|i| {
            let given = batch_y[i];
            let disagreement = (1.0 - p_ref[[i, given]]).clamp(0.0, 1.0);
            // Where the audit finds the reference sound (w = base), the repair's share is the signal that
            // serves best there: under the pool reference the mass the minimal repair moves at the target
            // crossing (the items the post-condition needs relabelled; the pool model orders the rest better
            // than any path does), under a cross-fit the published path's rank. What the audit adds above
            // the base goes to the published path's rank, which leans on the trusted set where the reference
            // model has learned a bias.
            let w = repair_weights[i];
            let base_signal = if big_pool {
                repair_mass[i]
            } else {
                anchored.score[i]
            };
            let anchored_doubt = (1.0 - p_anchor[[i, given]]).clamp(0.0, 1.0);
            let suspicion = (base_weight * base_signal
                + (w - base_weight).max(0.0) * anchored_doubt
                + (1.0 - w) * disagreement)
                .clamp(0.0, 1.0);
            let pi = blend.row(i);
            // Best alternative class under the blend, and its share of the non-given mass:
            // P(alternative | the given label is wrong). The proposed label is the alternative once the
            // suspicion reaches `flag_threshold`, otherwise the given label.
            let alt = argmax((0..k).map(|c| if c == given { f64::NEG_INFINITY } else { pi[c] }));
            let rest: f64 = (0..k).filter(|&c| c != given).map(|c| pi[c]).sum();
            let share = if rest > 0.0 {
                pi[alt] / rest
            } else {
                1.0 / (k - 1) as f64
            };
            let (proposed_label, confidence) = if suspicion >= settings.flag_threshold {
                (alt, (suspicion * share).clamp(0.0, 1.0))
            } else {
                (given, 1.0 - suspicion)
            };
            let rho = anchored.mean_labels.row(i);
            let repair_label = argmax((0..k).map(|c| {
                if c == given {
                    f64::NEG_INFINITY
                } else {
                    rho[c]
                }
            }));
            ItemScore {
                index: i,
                label: given,
                suspicion,
                proposed_label,
                confidence,
                alternative_label: alt,
                alternative_share: share.clamp(0.0, 1.0),
                repair_mass: repair_mass[i],
                repair_signal: anchored.score[i],
                repair_label,
                learner_doubt: disagreement,
                anchored_doubt,
                repair_weight: w,
                wrong_probability: p_wrong[i],
                flagged_at_step: anchored.first_flagged[i],
            }
        })
        .collect();

    // The flagged share to expect from a batch labelled the way the reference model expects (see
    // `Assessment::expected_flagged_share`), at each item's own weight.
    let q: Vec<f64> = p_ref
        .rows()
        .into_iter()
        .enumerate()
        .map(|(j, r)| {
            let w = repair_weights[j];
            r.iter()
                .filter(|&&pc| (1.0 - w) * (1.0 - pc) >= settings.flag_threshold)
                .sum::<f64>()
                .clamp(0.0, 1.0)
        })
        .collect();
    let expected_flagged_share = q.iter().sum::<f64>() / n_b as f64;
    let expected_flagged_sd = q.iter().map(|v| v * (1.0 - v)).sum::<f64>().sqrt() / n_b as f64;

    // Trusted items the batch as delivered gets wrong.
    let prob_t_rep = predict_proba(phi_t.view(), &theta_rep, k);
    let broken_trusted = (0..trusted.y.len())
        .filter_map(|t| {
            let pred = argmax(prob_t_with.row(t).iter().copied());
            let yt = trusted.y[t];
            (pred != yt).then(|| TrustedItemReport {
                index: t,
                label: yt,
                predicted_with_batch: pred,
                prob_with_batch: prob_t_with[[t, yt]],
                reference_correct: ref_pred_t[t] == yt,
                repaired_correct: argmax(prob_t_rep.row(t).iter().copied()) == yt,
            })
        })
        .collect();

    let trusted_still_wrong = (0..trusted.y.len())
        .filter(|&t| argmax(prob_t_rep.row(t).iter().copied()) != trusted.y[t])
        .count();
    timings.total = started.elapsed();
    Ok(Assessment {
        repair_cost: if repair_cost.is_nan() {
            f64::NAN
        } else {
            repair_cost.clamp(0.0, 1.0)
        },
        trusted_still_wrong,
        target_basis: target_basis.into(),
        unknown,
        trusted_audit,
        estimated_wrong_share: noise_rate,
        repair_path_gammas: anchored.gammas,
        repair_path_flagged: anchored.flagged_per_step,
        target_reached,
        damage,
        trusted_loss_pool: phi_pool_loss,
        trusted_loss_with_batch: phi_with,
        trusted_loss_repaired: loss_repaired,
        trusted_loss_target: target,
        items,
        broken_trusted,
        path_gammas: gammas,
        path_costs,
        path_losses,
        convergence: conv,
        timings,
        reference: reference.into(),
        sizes: Sizes {
            trusted: trusted.y.len(),
            pool: n_p,
            batch: n_b,
            params: m,
        },
        expected_flagged_share,
        expected_flagged_sd,
        expected_damage,
        expected_damage_sd,
    })
}

pub(super) fn argmax(it: impl Iterator<Item = f64>) -> usize {
    let mut best = (0, f64::NEG_INFINITY);
    for (i, v) in it.enumerate() {
        if v > best.1 {
            best = (i, v);
        }
    }
    best.0
}

/// Projected gradient on the linearised `F_γ(Y) = Φ(θ_lin(Y)) + γ C(Y)` from the current `Y` (updated in
/// place), with a backtracking step size carried between calls. Returns `θ_lin` at the final `Y`.
///
/// Step: `Y⁺ = Π_Δ(Y − η ∇F)`, accepted when
/// `F(Y⁺) ≤ F(Y) + ⟨∇F, Y⁺ − Y⟩ + ‖Y⁺ − Y‖² / (2η)` (the standard sufficient-decrease test), else `η ← η/2`.
/// `∇_Y C = −e_ŷ / n_B`, so the penalty pulls mass back toward the given label.
#[allow(clippy::too_many_arguments)]
fn projected_gradient(
    ctx: &Ctx<'_>,
    lin: &Linearisation,
    y: &mut Array2<f64>,
    given: &[usize],
    gamma: f64,
    step: &mut f64,
    warm_d: &mut Option<Array1<f64>>,
    warm_q: &mut Option<Array1<f64>>,
) -> Array1<f64> {
    let n_b = given.len() as f64;
    let cost = |y: &Array2<f64>| -> f64 {
        given
            .iter()
            .enumerate()
            .map(|(i, &g)| 1.0 - y[[i, g]])
            .sum::<f64>()
            / n_b
    };
    descend_projected(
        ctx,
        lin,
        y,
        given,
        ctx.settings.repair_iters,
        step,
        warm_d,
        |y, theta| {
            let (f_phi, mut grad) = ctx.loss_and_hypergradient(lin, theta, warm_q);
            for (i, &g) in given.iter().enumerate() {
                grad[[i, g]] -= gamma / n_b;
            }
            (f_phi + gamma * cost(y), grad)
        },
        |y, theta| ctx.trusted_value(theta) + gamma * cost(y),
        1e-15,
    )
}

/// Projected-gradient descent on a linearised repair objective `F` from the current `Y` (updated in place),
/// with a backtracking step size carried between calls: `Y⁺ = Π_Δ(Y − η ∇F)`, accepted when
/// `F(Y⁺) ≤ F(Y) + ⟨∇F, Y⁺ − Y⟩ + ‖Y⁺ − Y‖² / (2η) + slack·|F(Y)|` (the standard sufficient-decrease test),
/// else `η ← η/2`; at most `iters` accepted steps, stopping once no label mass moves by more than 0.1 %.
/// `value_grad(Y, θ)` gives `F` and `∇_Y F` at `θ = θ_lin(Y)`, `value(Y, θ)` gives `F` alone. Returns
/// `θ_lin` at the final `Y`. Shared by the target-crossing path and the published objective's path.
#[allow(clippy::too_many_arguments)]
pub(super) fn descend_projected(
    ctx: &Ctx<'_>,
    lin: &Linearisation,
    y: &mut Array2<f64>,
    given: &[usize],
    iters: usize,
    step: &mut f64,
    warm_d: &mut Option<Array1<f64>>,
    mut value_grad: impl FnMut(&Array2<f64>, &Array1<f64>) -> (f64, Array2<f64>),
    value: impl Fn(&Array2<f64>, &Array1<f64>) -> f64,
    slack: f64,
) -> Array1<f64> {
    let mut theta = ctx.theta_at(lin, y, warm_d);
    for _ in 0..iters {
        let (f, grad) = value_grad(y, &theta);
        if !step.is_finite() {
            let gmax = grad.iter().fold(0.0f64, |a, &b| a.max(b.abs()));
            if gmax <= 0.0 {
                break;
            }
            *step = 0.5 / gmax;
        } else {
            *step *= 1.5;
        }
        ctx.conv.borrow_mut().repair_iterations += 1;
        let mut accepted = None;
        for _ in 0..30 {
            ctx.conv.borrow_mut().repair_trials += 1;
            let cand = step_and_project(y, &grad, given, *step);
            let diff = &cand - &*y;
            let dd = diff.iter().map(|v| v * v).sum::<f64>();
            if dd == 0.0 {
                accepted = Some((cand, theta.clone(), 0.0));
                break;
            }
            let th = ctx.theta_at(lin, &cand, warm_d);
            let f_new = value(&cand, &th);
            let model = f + (&grad * &diff).sum() + dd / (2.0 * *step);
            if f_new <= model + slack * f.abs() {
                let max_move = diff.iter().fold(0.0f64, |a, &b| a.max(b.abs()));
                accepted = Some((cand, th, max_move));
                break;
            }
            *step *= 0.5;
        }
        match accepted {
            Some((cand, th, max_move)) => {
                *y = cand;
                theta = th;
                // Converged at this γ once no label mass moves by more than 0.1 %.
                if max_move < 1e-3 {
                    break;
                }
            }
            None => break,
        }
    }
    theta
}

/// `Π_Δ(Y − η G)` row by row. A row sitting at its given label's vertex `e_g` stays there exactly when
/// `v_g − max_{c≠g} v_c ≥ 1` for `v = e_g − η g_i` (then `τ = v_g − 1` clips every other entry), which
/// skips the sort for the many rows the repair leaves alone.
pub(super) fn step_and_project(
    y: &Array2<f64>,
    grad: &Array2<f64>,
    given: &[usize],
    step: f64,
) -> Array2<f64> {
    let mut cand = y.clone();
    let k = y.ncols();
    for (i, mut row) in cand.rows_mut().into_iter().enumerate() {
        let g = given[i];
        let at_vertex = row[g] == 1.0;
        for c in 0..k {
            row[c] -= step * grad[[i, c]];
        }
        if at_vertex {
            let vg = row[g];
            let others = (0..k)
                .filter(|&c| c != g)
                .fold(f64::NEG_INFINITY, |a, c| a.max(row[c]));
            if vg - others >= 1.0 {
                row.fill(0.0);
                row[g] = 1.0;
                continue;
            }
        }
        project_simplex(row.as_slice_mut().expect("contiguous rows"));
    }
    cand
}

/// Stratified `cv_folds`-fold cross-validation of the learner on the trusted items alone (weighted):
/// returns the weighted mean out-of-fold loss `Φ_cv` and the out-of-fold predicted classes.
fn trusted_cross_validation(
    settings: &ModelSettings,
    phi_t: &Array2<f64>,
    trusted: TrustedInput<'_>,
    k: usize,
    deadline: Instant,
    conv: &mut Convergence,
) -> (f64, Vec<usize>) {
    let n = trusted.y.len();
    let nf = settings.cv_folds.min(n).max(2);
    let fold = folds(trusted.y, k, nf, settings.seed ^ 0x7275_7374);
    let mut loss = 0.0;
    let mut wsum = 0.0;
    let mut pred = vec![0usize; n];
    let m = phi_t.ncols() * k;
    for f in 0..nf {
        let train: Vec<usize> = (0..n).filter(|&i| fold[i] != f).collect();
        let test: Vec<usize> = (0..n).filter(|&i| fold[i] == f).collect();
        if test.is_empty() || train.is_empty() {
            continue;
        }
        let phi_tr = phi_t.select(Axis(0), &train);
        let y_tr = one_hot(&train.iter().map(|&i| trusted.y[i]).collect::<Vec<_>>(), k);
        let w_tr = Array1::from_iter(train.iter().map(|&i| trusted.weight[i]));
        let obj = Objective {
            phi: phi_tr.view(),
            y: y_tr.view(),
            weight: Some(w_tr.view()),
            norm: w_tr.sum().max(f64::MIN_POSITIVE),
            l2: settings.l2,
            prior: None,
        };
        let (theta, rep) = solve(settings, &obj, Array1::zeros(m), deadline);
        conv.inner_iterations += rep.iterations;
        if !rep.converged {
            conv.inner_converged = false;
            conv.notes.push(format!(
                "trusted cross-validation solve stopped early ({})",
                rep.stopped
            ));
        }
        let phi_te = phi_t.select(Axis(0), &test);
        let prob = predict_proba(phi_te.view(), &theta, k);
        for (r, &i) in test.iter().enumerate() {
            let c = trusted.weight[i];
            loss += c * -(prob[[r, trusted.y[i]]].max(1e-300)).ln();
            wsum += c;
            pred[i] = argmax(prob.row(r).iter().copied());
        }
    }
    let cv = if wsum > 0.0 {
        loss / wsum
    } else {
        (k as f64).ln()
    };
    (cv, pred)
}

/// Out-of-fold probabilities for the batch items: for each of `cv_folds` folds, train on the pool (items or
/// summary), the other folds of the batch, and the trusted items (with their weights), and predict the fold.
#[allow(clippy::too_many_arguments)]
fn cross_fit(
    settings: &ModelSettings,
    phi_b: &Array2<f64>,
    y_hat: &Array2<f64>,
    pool: &PoolRows,
    n_p: f64,
    phi_t: &Array2<f64>,
    trusted: TrustedInput<'_>,
    theta_p: &Array1<f64>,
    deadline: Instant,
    conv: &mut Convergence,
) -> Array2<f64> {
    let n_b = phi_b.nrows();
    let k = y_hat.ncols();
    let labels: Vec<usize> = y_hat
        .rows()
        .into_iter()
        .map(|r| argmax(r.iter().copied()))
        .collect();
    let nf = settings.cv_folds.min(n_b).max(2);
    let fold = folds(&labels, k, nf, settings.seed ^ 0x6261_7463);
    let mut out = Array2::from_elem((n_b, k), 1.0 / k as f64);
    let y_t = one_hot(trusted.y, k);
    for f in 0..nf {
        let train: Vec<usize> = (0..n_b).filter(|&i| fold[i] != f).collect();
        let test: Vec<usize> = (0..n_b).filter(|&i| fold[i] == f).collect();
        if test.is_empty() {
            continue;
        }
        let mut phi = vstack(phi_b.select(Axis(0), &train).view(), phi_t.view());
        let mut yy = vstack(y_hat.select(Axis(0), &train).view(), y_t.view());
        let mut wts: Vec<f64> = vec![1.0; train.len()];
        wts.extend(trusted.weight.iter());
        // The batch folds and trusted items count as themselves; the pool counts as its n_P items whether
        // it enters as rows (exact mode, or the reservoir), as the quadratic, or both.
        let n_sum = wts.iter().sum::<f64>() + n_p;
        if let (Some(pp), Some(yp)) = (&pool.phi, &pool.y) {
            phi = vstack(pp.view(), phi.view());
            yy = vstack(yp.view(), yy.view());
            let mut w2 = vec![pool.row_weight; pp.nrows()];
            w2.extend(wts);
            wts = w2;
        }
        let wts = Array1::from(wts);
        let obj = Objective {
            phi: phi.view(),
            y: yy.view(),
            weight: Some(wts.view()),
            norm: n_sum,
            l2: settings.l2,
            prior: pool.term.as_ref().map(|t| t.quadratic(n_sum)),
        };
        let (theta, rep) = solve(settings, &obj, theta_p.clone(), deadline);
        conv.inner_iterations += rep.iterations;
        if !rep.converged {
            conv.inner_converged = false;
            conv.notes
                .push(format!("cross-fit solve stopped early ({})", rep.stopped));
        }
        let prob = predict_proba(phi_b.select(Axis(0), &test).view(), &theta, k);
        for (r, &i) in test.iter().enumerate() {
            out.row_mut(i).assign(&prob.row(r));
        }
    }
    out
}

#[cfg(test)]
impl Inner {
    /// Exact mode with unit weights: pool rows first (labels `y_pool`), then the batch rows.
    pub(super) fn for_test(
        phi: Array2<f64>,
        y_pool: Option<Array2<f64>>,
        batch: Range<usize>,
        l2: f64,
    ) -> Self {
        let norm = phi.nrows() as f64;
        Self {
            phi,
            y_pool,
            weight: None,
            batch,
            norm,
            l2,
            prior: None,
        }
    }
}

#[cfg(test)]
impl<'a> Ctx<'a> {
    /// A context over `inner` for the trusted items `(phi_t, y_t)` with unit confidence.
    pub(super) fn for_test(
        settings: &'a ModelSettings,
        inner: &'a Inner,
        phi_t: &'a Array2<f64>,
        y_t: &'a [usize],
        k: usize,
    ) -> Self {
        Self {
            settings,
            inner,
            phi_t,
            y_t,
            c_t: Array1::ones(y_t.len()),
            k,
            conv: std::cell::RefCell::new(Convergence {
                inner_converged: true,
                linear_converged: true,
                ..Convergence::default()
            }),
        }
    }
}
