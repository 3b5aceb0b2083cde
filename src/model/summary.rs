//! The pool summary: a second-order model of the accepted pool's loss around its optimum.
//!
//! Memory: `p·K` coefficients, a `p·K` gradient and a dense `(p·K)²` Hessian — for 32 features, an
//! intercept and 8 classes that is 264² ≈ 70 000 doubles ≈ 0.56 MB — plus the reservoir of at most
//! `pool_reservoir` items (`p` doubles each: 4,096 × 33 × 8 B ≈ 1.1 MB at the default), whatever the pool
//! size.
//!
//! Above the dense threshold (`p·K > dense_max_params`) the Hessian is kept as Kronecker factors
//! `H_P ≈ B ⊗ A` instead ([`super::kron`]): `p² + K²` doubles, plus as many again for their cached
//! eigendecompositions — for 768 features and 20 classes about 2 × 769² × 8 B ≈ 9.5 MB, plus the
//! reservoir (4,096 × 769 × 8 B ≈ 25 MB), where the dense Hessian would take 15,380² × 8 B ≈ 1.9 GB.

use std::sync::{Arc, OnceLock};
use std::time::Instant;

use ndarray::{Array1, Array2, ArrayView2};
use serde::{Deserialize, Serialize};

use super::calibration::{leave_one_out_probabilities, SharpnessFit};
use super::kron::KronFactors;
use super::learner::{
    flatten_pk, one_hot, solve, vstack, weights_view, Objective, Quadratic, INTERCEPT_RIDGE,
};
use super::linalg::Cholesky;
use super::{check_labels, FeatureMap, ModelError, ModelSettings, TrainReport};

/// Second-order summary of the pool's mean cross-entropy around the pool model `W_P`:
///
/// `ℓ̄_P(W) ≈ ℓ̄_P(W_P) + g_Pᵀ (W − W_P) + ½ (W − W_P)ᵀ H_P (W − W_P)`
///
/// with `g_P`, `H_P` the gradient and Hessian of the mean (unregularised) cross-entropy over the pool's
/// `n_P` items at `W_P`. Vectors index `W` column-major by class: entry `k·p + j` is `W[j, k]`.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct PoolSummary {
    /// Record version of this structure.
    pub version: u32,
    /// Number of items summarised, `n_P`.
    pub n: u64,
    /// Number of classes `K`.
    pub n_classes: usize,
    /// The feature map the summary was built with (fixed for a workspace).
    pub feature_map: FeatureMap,
    /// `W_P`, `p × K`.
    pub w: Array2<f64>,
    /// `ℓ̄_P(W_P)`.
    pub loss: f64,
    /// `g_P`, length `p·K`.
    pub grad: Array1<f64>,
    /// `H_P`, `(p·K) × (p·K)`; empty (`0 × 0`) when [`PoolSummary::kron`] holds the curvature.
    pub hess: Array2<f64>,
    /// `H_P ≈ B ⊗ A`, Kronecker factors standing for the Hessian above the dense threshold
    /// (`p·K > dense_max_params` when the summary was created); `None` (and summaries saved before it
    /// existed) means the dense `hess`.
    #[serde(default)]
    pub kron: Option<KronFactors>,
    /// Pool size at the last exact refresh.
    pub exact_at_n: u64,
    /// Mapped features `φ` of the reservoir: a uniform random sample of at most
    /// [`ModelSettings::pool_reservoir`] pool items (Vitter, "Random Sampling with a Reservoir", ACM TOMS
    /// 1985, Algorithm R), one row per item. While the pool is no larger than the reservoir it holds every
    /// pool item and the summary is exact.
    #[serde(default)]
    pub reservoir_phi: Array2<f64>,
    /// Labels of the reservoir's items.
    #[serde(default)]
    pub reservoir_y: Vec<usize>,
    /// Cholesky factor of `H_P + R` for the chord method (see [`PoolSummary::curvature_factor`]); a cache,
    /// never saved.
    #[serde(skip)]
    curvature: Cache<Option<Arc<Cholesky>>>,
    /// The reservoir's own mean loss, gradient and Hessian at `W_P` (see [`PoolSummary::term`]); a cache,
    /// never saved.
    #[serde(skip)]
    expansion: Cache<Arc<Expansion>>,
    /// The pool model's sharpness measured when this summary was fitted exactly from a pool of items
    /// (see [`PoolSummary::sharpness`]); kept, not re-measured, as batches are absorbed.
    #[serde(default)]
    pub sharpness_at_fit: Option<SharpnessFit>,
    /// `W_P` when this summary was fitted exactly from a pool of items, kept as batches are absorbed: the
    /// clean level takes the right labels to follow this model (see [`PoolSummary::labels_model`]).
    #[serde(default)]
    pub w_at_fit: Option<Array2<f64>>,
    /// The model of every item of the accepted batches *as delivered* — the pool's items plus the items
    /// kept out of it for review — while no exact fit of an unselected pool exists (a workspace that
    /// started without an in-house pool): the clean level's labels model then (see
    /// [`PoolSummary::labels_model`] and [`PoolSummary::absorb_kept_out`]). Its own `delivered` is `None`.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub delivered: Option<Box<PoolSummary>>,
}

/// Largest trusted-anchored doubt (`1 − p_A(given label)`, [`crate::model::ItemScore::anchored_doubt`])
/// with which an item kept out of the pool still enters the model of the items as delivered (see
/// [`PoolSummary::absorb_kept_out`] and [`kept_out_for_labels_model`]).
pub const KEPT_OUT_MAX_ANCHORED_DOUBT: f64 = 0.5;

/// Of an accepted batch's items kept out of the pool (`kept`, rows of the batch), those whose given label
/// the trusted-anchored model does not doubt (`anchored_doubt < ` [`KEPT_OUT_MAX_ANCHORED_DOUBT`]: the
/// learner fitted to the trusted items and the data gives the label at least even odds). They enter the
/// clean level's labels model; the others do not.
///
/// Why a gate: the labels model sets how many flags a batch with right labels shows. Fed every kept-out
/// item with the label the vendor gave it, it learns a vendor's caught flips, and the next batch with the
/// same flips is expected to show them: a drip of flips from day one on an empty pool (0 % rising by 1 %
/// per 150-item batch) was then never held in 16 batches (two seeds). The trusted-anchored model doubts
/// flipped labels far more than the hard right ones the pool model doubts: on that drip its doubt on kept
/// flipped items had median 0.985 (10th percentile 0.67), on kept right items median 0.37. With the gate,
/// 8, 9 and 8 of the 16 drip batches were held (first at the 7th, 7th and 9th batch, 6–8 % flips; in an
/// earlier draw of the stream without the labels model 11–13, first at the 3rd–6th), and 2, 0 and 1 of its 176 flips entered the pool; the
/// clean stream of 300-item batches from an empty pool had 1, 0 and 0 of 60 batches held (5, 15 and 9
/// without the labels model). Measured with `bench casebook --case "empty pool"`, seeds 2018, 2026, 7.
pub fn kept_out_for_labels_model(
    items: &[crate::model::ItemScore],
    kept: impl IntoIterator<Item = usize>,
) -> Vec<usize> {
    let doubt: std::collections::HashMap<usize, f64> = items
        .iter()
        .map(|it| (it.index, it.anchored_doubt))
        .collect();
    kept.into_iter()
        .filter(|row| {
            doubt
                .get(row)
                .is_some_and(|&d| d < KEPT_OUT_MAX_ANCHORED_DOUBT)
        })
        .collect()
}

/// Work bound for [`PoolSummary::sharpness`]: items × `K·(p·K)²` stays under this.
pub const SHARPNESS_FLOPS: f64 = 3e8;

/// A mean loss with its gradient and Hessian at one point: `(ℓ̄, ∇ℓ̄, ∇²ℓ̄)`.
type Expansion = (f64, Array1<f64>, Array2<f64>);

/// The pool's part of a training objective over pool ∪ batch, as [`PoolSummary::term`] builds it.
///
/// The objective's data term is `(1/N) [Σ_B ℓ_i + w Σ_R ℓ_r] + (n_P/N) Q(θ)`, with `N = n_P + n_B`, the
/// reservoir rows `R` (if any) each standing for `w = n_P/|R|` pool items, and `Q` the quadratic
/// `gᵀ(θ − θ_P) + ½ (θ − θ_P)ᵀ H (θ − θ_P)`.
#[derive(Debug, Clone)]
pub struct PoolTerm {
    /// `n_P`.
    pub n: f64,
    /// Reservoir rows (mapped features), one-hot labels, and the weight `w` of each row; `None` when the
    /// quadratic alone stands for the pool.
    pub rows: Option<(Array2<f64>, Array2<f64>, f64)>,
    /// `θ_P`.
    pub center: Array1<f64>,
    /// `g` of the quadratic.
    pub grad: Array1<f64>,
    /// `H` of the quadratic (dense; empty when `kron` holds it, or when the curvature is zero).
    pub hess: Array2<f64>,
    /// `H ≈ B ⊗ A` of the quadratic above the dense threshold.
    pub kron: Option<Arc<KronFactors>>,
}

impl PoolTerm {
    /// The quadratic as an objective term for data normaliser `norm`.
    pub fn quadratic(&self, norm: f64) -> Quadratic<'_> {
        Quadratic {
            scale: self.n / norm,
            center: self.center.view(),
            grad: self.grad.view(),
            hess: self.hess.view(),
            kron: self.kron.as_deref(),
        }
    }

    /// Sum of the reservoir rows' weights (`n_P` when there are rows, else 0).
    pub fn row_weight_sum(&self) -> f64 {
        self.rows
            .as_ref()
            .map_or(0.0, |(phi, _, w)| phi.nrows() as f64 * w)
    }
}

/// A lazily computed value keyed by two fingerprints of what it was computed from, so that a changed
/// setting or an edited summary is never served a stale value. Not part of the summary's identity.
struct Cache<T>(OnceLock<(u64, u64, T)>);

impl<T> Default for Cache<T> {
    fn default() -> Self {
        Self(OnceLock::new())
    }
}

impl<T: Clone> Cache<T> {
    fn get_or(&self, key: (u64, u64), compute: impl Fn() -> T) -> T {
        let cached = self.0.get_or_init(|| (key.0, key.1, compute()));
        if (cached.0, cached.1) == key {
            cached.2.clone()
        } else {
            compute()
        }
    }
}

impl<T: Clone> Clone for Cache<T> {
    fn clone(&self) -> Self {
        let c = Self::default();
        if let Some(v) = self.0.get() {
            let _ = c.0.set(v.clone());
        }
        c
    }
}

impl<T> PartialEq for Cache<T> {
    /// A cache never makes two summaries differ.
    fn eq(&self, _: &Self) -> bool {
        true
    }
}

impl<T> std::fmt::Debug for Cache<T> {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str(if self.0.get().is_some() {
            "Cache(filled)"
        } else {
            "Cache(empty)"
        })
    }
}

impl PoolSummary {
    /// An empty pool (`n_P = 0`, `W_P = 0`), dense up to the default `dense_max_params` parameters and
    /// Kronecker-factored above (see [`PoolSummary::empty_with_threshold`]).
    pub fn empty(feature_map: FeatureMap, n_classes: usize) -> Self {
        Self::empty_with_threshold(
            feature_map,
            n_classes,
            ModelSettings::default().dense_max_params,
        )
    }

    /// An empty pool whose curvature is a dense Hessian when `p·K ≤ dense_max_params`, else Kronecker
    /// factors (zero until items arrive).
    pub fn empty_with_threshold(
        feature_map: FeatureMap,
        n_classes: usize,
        dense_max_params: usize,
    ) -> Self {
        let p = feature_map.output_dim();
        let m = p * n_classes;
        let kronecker = m > dense_max_params;
        let (hess, kron) = if kronecker {
            (
                Array2::zeros((0, 0)),
                Some(KronFactors::new(
                    Array2::zeros((p, p)),
                    Array2::zeros((n_classes, n_classes)),
                )),
            )
        } else {
            (Array2::zeros((m, m)), None)
        };
        Self {
            version: 1,
            n: 0,
            n_classes,
            feature_map,
            w: Array2::zeros((p, n_classes)),
            loss: 0.0,
            grad: Array1::zeros(m),
            hess,
            kron,
            exact_at_n: 0,
            reservoir_phi: Array2::zeros((0, p)),
            reservoir_y: Vec::new(),
            curvature: Cache::default(),
            expansion: Cache::default(),
            sharpness_at_fit: None,
            w_at_fit: None,
            delivered: None,
        }
    }

    /// Exact summary of the given items: solve the learner over them and take gradient and Hessian there.
    pub fn fit(
        settings: &ModelSettings,
        feature_map: FeatureMap,
        n_classes: usize,
        x: ArrayView2<'_, f64>,
        y: &[usize],
    ) -> Result<(Self, TrainReport), ModelError> {
        settings.validate()?;
        check_labels(y, n_classes)?;
        if x.nrows() != y.len() {
            return Err(ModelError::Shape(format!(
                "{} rows but {} labels",
                x.nrows(),
                y.len()
            )));
        }
        let mut out = Self::empty_with_threshold(feature_map, n_classes, settings.dense_max_params);
        if y.is_empty() {
            return Ok((
                out,
                TrainReport {
                    converged: true,
                    ..TrainReport::default()
                },
            ));
        }
        let phi = out.feature_map.apply(x)?;
        out.offer(phi.view(), y, settings.pool_reservoir, settings.seed);
        let yy = one_hot(y, n_classes);
        let obj = Objective {
            phi: phi.view(),
            y: yy.view(),
            weight: None,
            norm: y.len() as f64,
            l2: settings.l2,
            prior: None,
        };
        let init = Array1::zeros(phi.ncols() * n_classes);
        let deadline = Instant::now() + settings.time_budget();
        let (theta, report) = if out.kron.is_some() {
            fit_kronecker(settings, &obj, init, deadline)
        } else {
            solve(settings, &obj, init, deadline)
        };
        let (f, g, prob) = obj.value_grad(&theta);
        let (pen_f, pen_g) = penalty(&theta, phi.ncols(), settings.l2);
        out.n = y.len() as u64;
        out.exact_at_n = out.n;
        out.loss = f - pen_f;
        out.grad = g - pen_g;
        if out.kron.is_some() {
            out.kron = Some(KronFactors::from_data(
                phi.view(),
                prob.view(),
                None,
                y.len() as f64,
            ));
        } else {
            out.hess = obj.data_hessian(prob.view());
        }
        out.w = weights_view(&theta, phi.ncols(), n_classes).to_owned();
        out.sharpness_at_fit = out.measure_sharpness(settings.l2);
        out.w_at_fit = Some(out.w.clone());
        Ok((out, report))
    }

    /// `θ_P` in the flat layout of [`super::learner`].
    pub fn theta(&self) -> Array1<f64> {
        flatten_pk(self.w.view())
    }

    /// Absorb an accepted batch: re-solve over (summary ⊕ batch), then
    /// `g ← [n_P (g_P + H_P ΔW) + Σ_B ∇ℓ_i] / (n_P + n_B)`, `H ← [n_P H_P + Σ_B ∇²ℓ_i] / (n_P + n_B)`,
    /// all at the new optimum (the pool's Hessian is carried, not re-evaluated: the exact refresh corrects
    /// that drift).
    pub fn absorb(
        &mut self,
        settings: &ModelSettings,
        x: ArrayView2<'_, f64>,
        y: &[usize],
    ) -> Result<TrainReport, ModelError> {
        settings.validate()?;
        check_labels(y, self.n_classes)?;
        if x.nrows() != y.len() {
            return Err(ModelError::Shape(format!(
                "{} rows but {} labels",
                x.nrows(),
                y.len()
            )));
        }
        if y.is_empty() {
            return Ok(TrainReport {
                converged: true,
                ..TrainReport::default()
            });
        }
        if let Some(d) = self.delivered.as_mut() {
            d.absorb(settings, x, y)?;
        }
        let k = self.n_classes;
        let phi = self.feature_map.apply(x)?;
        let p = phi.ncols();
        let yy = one_hot(y, k);
        let n_p = self.n as f64;
        let n_b = y.len() as f64;
        let norm = n_p + n_b;
        let theta_p = self.theta();
        let term = (self.n > 0).then(|| self.term(settings, y.len()));
        let (theta, report) = {
            // Rows: the reservoir's (weighted), when the term uses it, then the batch's.
            let (phi_all, y_all, weight) = match term.as_ref().and_then(|t| t.rows.as_ref()) {
                Some((rp, ry, w)) => {
                    let mut wt = vec![*w; rp.nrows()];
                    wt.resize(rp.nrows() + y.len(), 1.0);
                    (
                        vstack(rp.view(), phi.view()),
                        vstack(ry.view(), yy.view()),
                        Some(Array1::from(wt)),
                    )
                }
                None => (phi.clone(), yy.clone(), None),
            };
            let obj = Objective {
                phi: phi_all.view(),
                y: y_all.view(),
                weight: weight.as_ref().map(|w| w.view()),
                norm,
                l2: settings.l2,
                prior: term.as_ref().map(|t| t.quadratic(norm)),
            };
            solve(
                settings,
                &obj,
                theta_p.clone(),
                Instant::now() + settings.time_budget(),
            )
        };
        let batch_obj = Objective {
            phi: phi.view(),
            y: yy.view(),
            weight: None,
            norm,
            l2: settings.l2,
            prior: None,
        };
        // Batch part alone (sums over the batch, divided by `norm`): the objective without prior and penalty.
        let (fb, gb, prob) = batch_obj.value_grad(&theta);
        let (pen_f, pen_g) = penalty(&theta, p, settings.l2);
        let (fb, gb) = (fb - pen_f, gb - &pen_g);
        // Pool part carried through its quadratic model: ℓ̄_P(θ) ≈ ℓ_P + g_Pᵀ d + ½ dᵀ H_P d, plus, when the
        // term used the reservoir, its estimate of the remainder beyond second order:
        // [ℓ̄_R(θ) − q_R(θ)] for the loss, [∇ℓ̄_R(θ) − g_R − H_R d] for the gradient, [∇²ℓ̄_R(θ) − H_R] for
        // the Hessian.
        let d = &theta - &theta_p;
        let hd = match &self.kron {
            Some(f) => f.matvec(&d),
            None => self.hess.dot(&d),
        };
        let mut pool_loss = self.loss + self.grad.dot(&d) + 0.5 * d.dot(&hd);
        let mut pool_grad = &self.grad + &hd;
        if let Some(f) = self.kron.take() {
            // Kronecker mode: the pool's factors carried, combined with the batch's at the new optimum;
            // when the reservoir holds the whole pool, the refresh below replaces them by exact ones.
            let w_p = n_p / norm;
            self.loss = w_p * pool_loss + fb;
            self.grad = pool_grad * w_p + gb;
            let fb_factors = KronFactors::from_data(phi.view(), prob.view(), None, norm);
            self.kron = Some(f.combine(w_p, &fb_factors));
            self.w = weights_view(&theta, p, k).to_owned();
            self.offer(phi.view(), y, settings.pool_reservoir, settings.seed);
            self.n += y.len() as u64;
            self.curvature = Cache::default();
            self.expansion = Cache::default();
            self.refresh_from_reservoir(settings);
            return Ok(report);
        }
        let mut pool_hess = self.hess.clone();
        if term.as_ref().is_some_and(|t| t.rows.is_some()) {
            let e = self.reservoir_expansion(settings.l2);
            let ry = one_hot(&self.reservoir_y, k);
            let robj = Objective {
                phi: self.reservoir_phi.view(),
                y: ry.view(),
                weight: None,
                norm: self.reservoir_y.len() as f64,
                l2: settings.l2,
                prior: None,
            };
            let (fr, gr, pr) = robj.value_grad(&theta);
            let (fr, gr) = (fr - pen_f, gr - pen_g);
            let hrd = e.2.dot(&d);
            pool_loss += fr - (e.0 + e.1.dot(&d) + 0.5 * d.dot(&hrd));
            pool_grad = pool_grad + gr - &e.1 - hrd;
            pool_hess = pool_hess + robj.data_hessian(pr.view()) - &e.2;
        }
        let w_p = n_p / norm;
        self.loss = w_p * pool_loss + fb;
        self.grad = pool_grad * w_p + gb;
        let hb = batch_obj.data_hessian(prob.view());
        self.hess = pool_hess * w_p + hb;
        self.w = weights_view(&theta, p, k).to_owned();
        self.offer(phi.view(), y, settings.pool_reservoir, settings.seed);
        self.n += y.len() as u64;
        self.curvature = Cache::default();
        self.expansion = Cache::default();
        self.refresh_from_reservoir(settings);
        Ok(report)
    }

    /// Cholesky factor of `H_P + R`, the pool's mean Hessian plus the learner's ridge
    /// (`λ` on weights, the tiny intercept ridge on intercepts); `None` for an empty pool or when the
    /// factorisation fails.
    ///
    /// Why this matrix: the Hessian of the incremental training objective at `θ` is
    /// `(n_P/N) H_P + (1/N) Σ_B ∇²ℓ_i(θ) + R`, and a batch drawn like the pool has a mean Hessian close to
    /// `H_P`, so `H_P + R` is a good fixed matrix for the chord method ([`super::learner::train_chord`])
    /// whatever the batch — it does not depend on the batch or on `N`, and is computed once per summary.
    pub fn curvature_factor(&self, l2: f64) -> Option<Arc<Cholesky>> {
        if self.n == 0 || self.kron.is_some() {
            return None;
        }
        let trace: f64 = self.hess.diag().sum();
        self.curvature.get_or((l2.to_bits(), trace.to_bits()), || {
            let p = self.feature_map.output_dim();
            let mut h = self.hess.clone();
            for idx in 0..h.nrows() {
                h[[idx, idx]] += if idx % p == p - 1 {
                    INTERCEPT_RIDGE
                } else {
                    l2
                };
            }
            Cholesky::factor(h).map(Arc::new)
        })
    }

    /// The pool model's sharpness `β` (see [`crate::model::calibration`]) as measured when the summary
    /// was fitted from a pool of items; `None` for a summary that was never fitted exactly (an empty pool
    /// that grew by absorbing batches), above the dense threshold, or with too few items.
    ///
    /// Why only then: flagged items of accepted batches wait for review instead of entering the pool
    /// (`[admission] flagged = "hold"`), so the items a pool gains by absorbing batches are *selected* —
    /// the labels the model doubts most are missing — and a pool of them looks sharper than the data are
    /// (on the plant the measured `β` climbed from 1.3 to 2.4 over 180 absorbed clean batches, and clean
    /// batches were then held). The pool a workspace is first fitted from (the in-house pool at `init`) is
    /// measured once, and that value is carried, also through exact rebuilds of the stored pool, which holds
    /// only the admitted items ([`PoolSummary::carry_labels_model`]).
    pub fn sharpness(&self) -> Option<SharpnessFit> {
        self.sharpness_at_fit.clone()
    }

    /// `θ` of the model the clean level takes the right labels to follow: the pool model as fitted from
    /// stored items, carried as batches are absorbed (`None` before any fit from items: the current
    /// model then). The same selection as in [`PoolSummary::sharpness`]: a model trained on absorbed
    /// items, from which the doubted labels are missing, is sharper than the data are, and a clean level
    /// drawn from it falls while clean batches flag as many items as ever (on winequality the computed
    /// clean count fell from 41.6 to 32.0 in six absorbed clean batches, the flagged count stayed at
    /// 39–52). The model at fit is the one the measured sharpness belongs to.
    ///
    /// A summary that was never fitted from items (a workspace that started without an in-house pool and
    /// grew by absorbing batches) has no such model; once items of an accepted batch are kept out for
    /// review, it keeps one of its own: the model of every item of the accepted batches as delivered
    /// ([`PoolSummary::absorb_kept_out`]). Without it the clean level follows the selected model: on the
    /// plant, a clean stream of 300-item batches from an empty pool had 5, 15 and 9 of 60 batches held
    /// (three seeds), nearly all by the per-label rule, on labels whose hard items the pool had lost
    /// (items labelled polypropylene: 23 of 28 flagged against 7.8 expected).
    pub fn labels_model(&self) -> Option<Array1<f64>> {
        self.w_at_fit
            .as_ref()
            .or(self.delivered.as_ref().map(|d| &d.w))
            .map(|w| flatten_pk(w.view()))
    }

    /// Note items of an accepted batch that were kept out of the pool (held for review), with their
    /// given labels, raw features as delivered. They never enter the pool's model (the reference that
    /// flags items); they enter the model of the items as delivered, the clean level's labels model, which
    /// a summary never fitted from items starts here as a copy of itself (see [`PoolSummary::labels_model`]).
    /// A summary fitted from an unselected pool keeps the labels model of its fit and ignores them.
    ///
    /// What this lets in: a kept-out item whose label is wrong (a flipped label that was caught) moves
    /// the labels model a little towards its label, so the clean level of the next batches allows a little
    /// more for that label there; the flags themselves, the pool and the reference model are untouched.
    pub fn absorb_kept_out(
        &mut self,
        settings: &ModelSettings,
        x: ArrayView2<'_, f64>,
        y: &[usize],
    ) -> Result<(), ModelError> {
        if y.is_empty() || self.w_at_fit.is_some() {
            return Ok(());
        }
        if self.delivered.is_none() {
            let mut copy = self.clone();
            copy.delivered = None;
            self.delivered = Some(Box::new(copy));
        }
        if let Some(d) = self.delivered.as_mut() {
            d.absorb(settings, x, y)?;
        }
        Ok(())
    }

    /// After an exact rebuild from the stored pool: keep the labels model (and its measured sharpness)
    /// of the summary this one replaces. The stored pool holds only the items admitted, so a fit of it is
    /// selected (the labels the model doubted most are missing, see [`PoolSummary::sharpness`]); the
    /// labels model of the first, unselected fit, or of the items as delivered, is carried instead.
    /// Nothing is carried from a summary that has neither (a rebuild of a first fit keeps its own).
    pub fn carry_labels_model(&mut self, old: &PoolSummary) {
        if old.feature_map != self.feature_map || old.n_classes != self.n_classes {
            return;
        }
        if old.w_at_fit.is_some() || old.delivered.is_some() {
            self.w_at_fit = old.w_at_fit.clone();
            self.sharpness_at_fit = old.sharpness_at_fit.clone();
            self.delivered = old.delivered.clone();
        }
    }

    /// Measure `β` on approximate leave-one-out probabilities of the reservoir's items, at most
    /// [`SHARPNESS_FLOPS`]` / (K·(p·K)²)` of them (`K` triangular solves with the dense factor of
    /// `H_P + R` each) and at most 1,000.
    fn measure_sharpness(&self, l2: f64) -> Option<SharpnessFit> {
        let chol = self.curvature_factor(l2)?;
        let m = self.w.len() as f64;
        let items = ((SHARPNESS_FLOPS / (self.n_classes as f64 * m * m)) as usize)
            .min(1_000)
            .min(self.reservoir_y.len());
        let phi = self.reservoir_phi.slice(ndarray::s![..items, ..]);
        let y = &self.reservoir_y[..items];
        let loo = leave_one_out_probabilities(
            phi,
            y,
            &self.theta(),
            self.n_classes,
            self.n as f64,
            |g| chol.solve_lower(g),
        );
        SharpnessFit::fit(loo.view(), y, Array1::ones(items).view())
    }

    /// Whether the reservoir holds every pool item (then the summary's pool term is exact).
    pub fn reservoir_is_whole_pool(&self) -> bool {
        self.n > 0 && self.reservoir_y.len() as u64 == self.n
    }

    /// The reservoir's mean cross-entropy, gradient and Hessian at `θ_P` (cached per summary state).
    fn reservoir_expansion(&self, l2: f64) -> Arc<Expansion> {
        let key = (self.n, self.loss.to_bits() ^ l2.to_bits());
        self.expansion.get_or(key, || {
            let (f, g, h) = self.reservoir_terms(l2, true);
            Arc::new((f, g, h.expect("the Hessian was asked for")))
        })
    }

    /// The pool's part of the training objective for a batch of `batch_len` items.
    ///
    /// * The quadratic alone (`g = g_P`, `H = H_P`) when the batch is small next to the pool
    ///   (`n_B < reservoir_min_share · n_P`): the optimum then moves so little that the second-order model
    ///   is accurate, and scoring costs the same whatever the pool size.
    /// * Otherwise the reservoir as a control variate for the terms beyond second order: its rows enter
    ///   with weight `n_P/|R|` and the quadratic becomes `g = g_P − g_R`, `H = H_P − H_R` (`g_R`, `H_R` the
    ///   reservoir's own mean gradient and Hessian at `θ_P`), so that
    ///   `ℓ̄_P(θ) ≈ q_P(θ) + [ℓ̄_R(θ) − q_R(θ)]`: the exact pool loss when the reservoir is the whole pool,
    ///   an unbiased estimate of the higher-order remainder when it is a uniform sample (a control variate:
    ///   the sampled quantity is the remainder, not the loss). A batch that is a large share of the pool
    ///   moves the model far enough for the remainder to matter: the loss of confidently fitted items rises
    ///   faster than its quadratic model.
    pub fn term(&self, settings: &ModelSettings, batch_len: usize) -> PoolTerm {
        let n = self.n as f64;
        let use_reservoir = !self.reservoir_y.is_empty()
            && self.reservoir_phi.nrows() == self.reservoir_y.len()
            && (batch_len as f64) >= settings.reservoir_min_share * n;
        if let Some(f) = &self.kron {
            return self.kron_term(settings, f, use_reservoir);
        }
        if !use_reservoir {
            return PoolTerm {
                n,
                rows: None,
                center: self.theta(),
                grad: self.grad.clone(),
                hess: self.hess.clone(),
                kron: None,
            };
        }
        let e = self.reservoir_expansion(settings.l2);
        let r = self.reservoir_y.len() as f64;
        PoolTerm {
            n,
            rows: Some((
                self.reservoir_phi.clone(),
                one_hot(&self.reservoir_y, self.n_classes),
                n / r,
            )),
            center: self.theta(),
            grad: &self.grad - &e.1,
            hess: &self.hess - &e.2,
            kron: None,
        }
    }

    /// [`PoolSummary::term`] in Kronecker mode. The reservoir enters only when it holds the whole pool
    /// (then its rows are the pool exactly, and the quadratic keeps only the small carried gradient
    /// `g_P − g_R`, with no curvature); otherwise the quadratic with `H ≈ B ⊗ A` stands for the pool
    /// alone — a sampled remainder would need the reservoir's own dense Hessian. The factors'
    /// eigendecompositions are computed here, once per summary, so that every assessment shares them.
    fn kron_term(
        &self,
        settings: &ModelSettings,
        f: &KronFactors,
        use_reservoir: bool,
    ) -> PoolTerm {
        let n = self.n as f64;
        if use_reservoir && self.reservoir_is_whole_pool() {
            let (_, g_r) = self.reservoir_loss_grad(settings.l2);
            return PoolTerm {
                n,
                rows: Some((
                    self.reservoir_phi.clone(),
                    one_hot(&self.reservoir_y, self.n_classes),
                    1.0,
                )),
                center: self.theta(),
                grad: &self.grad - &g_r,
                hess: Array2::zeros((0, 0)),
                kron: None,
            };
        }
        f.prepare();
        PoolTerm {
            n,
            rows: None,
            center: self.theta(),
            grad: self.grad.clone(),
            hess: Array2::zeros((0, 0)),
            kron: Some(Arc::new(f.clone())),
        }
    }

    /// The reservoir's mean cross-entropy and its gradient at `θ_P` (no Hessian).
    fn reservoir_loss_grad(&self, l2: f64) -> (f64, Array1<f64>) {
        let (f, g, _) = self.reservoir_terms(l2, false);
        (f, g)
    }

    /// The reservoir's mean cross-entropy `f − R(θ_P)` and gradient `∇f − ∇R(θ_P)` at `θ_P` (the L2
    /// penalty `R` removed), and its data Hessian when `with_hessian`.
    fn reservoir_terms(
        &self,
        l2: f64,
        with_hessian: bool,
    ) -> (f64, Array1<f64>, Option<Array2<f64>>) {
        let y = one_hot(&self.reservoir_y, self.n_classes);
        let obj = Objective {
            phi: self.reservoir_phi.view(),
            y: y.view(),
            weight: None,
            norm: self.reservoir_y.len().max(1) as f64,
            l2,
            prior: None,
        };
        let theta = self.theta();
        let (f, g, prob) = obj.value_grad(&theta);
        let (pen_f, pen_g) = penalty(&theta, self.reservoir_phi.ncols(), l2);
        let h = with_hessian.then(|| obj.data_hessian(prob.view()));
        (f - pen_f, g - pen_g, h)
    }

    /// Offer items to the reservoir (Algorithm R): item number `t` (0-based over the pool's history) is
    /// kept with probability `capacity / (t + 1)`, replacing a uniformly chosen slot, so that the reservoir
    /// is at every moment a uniform sample of the pool. Deterministic for a given seed and history.
    fn offer(&mut self, phi: ArrayView2<'_, f64>, y: &[usize], capacity: usize, seed: u64) {
        use rand::{Rng, SeedableRng};
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(
            seed ^ self.n.wrapping_mul(0x9E37_79B9_7F4A_7C15),
        );
        if self.reservoir_phi.ncols() != phi.ncols() {
            self.reservoir_phi = Array2::zeros((0, phi.ncols()));
            self.reservoir_y.clear();
        }
        let mut rows: Vec<f64> = self.reservoir_phi.iter().copied().collect();
        let p = phi.ncols();
        for (j, (row, &label)) in phi.rows().into_iter().zip(y).enumerate() {
            let t = self.n + j as u64;
            if self.reservoir_y.len() < capacity {
                rows.extend(row.iter());
                self.reservoir_y.push(label);
            } else if capacity > 0 {
                let u = rng.random_range(0..=t);
                if u < capacity as u64 {
                    let u = u as usize;
                    rows[u * p..(u + 1) * p]
                        .iter_mut()
                        .zip(row.iter())
                        .for_each(|(d, &v)| *d = v);
                    self.reservoir_y[u] = label;
                }
            }
        }
        self.reservoir_phi =
            Array2::from_shape_vec((self.reservoir_y.len(), p), rows).expect("rows of p features");
    }

    /// When the reservoir holds the whole pool, replace the carried loss, gradient and Hessian by their
    /// exact values over the pool's items at `θ_P` (an exact refresh for free while the pool is small).
    fn refresh_from_reservoir(&mut self, settings: &ModelSettings) {
        if self.reservoir_is_whole_pool() && self.kron.is_some() {
            let (f, g) = self.reservoir_loss_grad(settings.l2);
            let y = one_hot(&self.reservoir_y, self.n_classes);
            let obj = Objective {
                phi: self.reservoir_phi.view(),
                y: y.view(),
                weight: None,
                norm: self.reservoir_y.len() as f64,
                l2: settings.l2,
                prior: None,
            };
            let (_, _, prob) = obj.value_grad(&self.theta());
            self.loss = f;
            self.grad = g;
            self.kron = Some(KronFactors::from_data(
                self.reservoir_phi.view(),
                prob.view(),
                None,
                self.reservoir_y.len() as f64,
            ));
            return;
        }
        if self.reservoir_is_whole_pool() {
            let e = self.reservoir_expansion(settings.l2);
            self.loss = e.0;
            self.grad = e.1.clone();
            self.hess = e.2.clone();
            self.curvature = Cache::default();
        }
    }

    /// Compute what scoring against this summary caches on first use (the Kronecker factors'
    /// eigendecompositions, `O(p³)`), so that the first batch is not slower than the others.
    pub fn prepare(&self) {
        if let Some(f) = &self.kron {
            f.prepare();
        }
    }

    /// Number of items summarised.
    pub fn len(&self) -> u64 {
        self.n
    }

    /// Whether the pool is empty.
    pub fn is_empty(&self) -> bool {
        self.n == 0
    }

    /// Bytes held by the summary's arrays.
    ///
    /// The quadratic model is `p·K + p·K + (p·K)²` doubles (`p² + K²` for Kronecker factors, counted
    /// twice for their cached eigendecompositions); the reservoir `|R|·p` doubles plus its labels; in dense
    /// mode, while the reservoir is in use, the caches hold one more `(p·K)²` Hessian and its Cholesky
    /// factor.
    pub fn memory_bytes(&self) -> usize {
        8 * (self.w.len()
            + self.grad.len()
            + self.hess.len()
            + self.kron.as_ref().map_or(0, |f| 2 * f.len())
            + self.feature_map.omega.len()
            + self.reservoir_phi.len())
            + std::mem::size_of::<usize>() * self.reservoir_y.len()
    }
}

/// The pool's own fit above the dense threshold: truncated Newton ([`super::truncated`]) preconditioned by
/// the Kronecker factors of the data Hessian at the start (`θ = 0`: every item has the uniform class
/// curvature there, so the factors are exact at the start and a fair approximation along the way),
/// plus the learner's ridge (`λ`, and `INTERCEPT_RIDGE` on the intercepts: [`KronFactors::ridged_inverse`]).
fn fit_kronecker(
    settings: &ModelSettings,
    obj: &Objective<'_>,
    init: Array1<f64>,
    deadline: Instant,
) -> (Array1<f64>, TrainReport) {
    let prob = super::learner::predict_proba(obj.phi, &init, obj.classes());
    let factors = KronFactors::from_data(obj.phi, prob.view(), obj.weight, obj.norm);
    let inverse = factors.ridged_inverse(1.0, settings.l2, super::learner::INTERCEPT_RIDGE);
    let pre = move |r: &Array1<f64>| inverse.apply(r);
    let (theta, report, _) = super::truncated::train_newton_cg(
        obj,
        init,
        &pre,
        settings.inner_tol,
        settings.inner_max_iters,
        settings.cg_max_iters,
        deadline,
    );
    (theta, report)
}

/// Value and gradient of the penalty `(λ/2)‖W_{0..p−1}‖² + (ε/2)‖W_{p−1}‖²` (see [`super::learner`]).
pub(crate) fn penalty(theta: &Array1<f64>, p: usize, l2: f64) -> (f64, Array1<f64>) {
    let mut f = 0.0;
    let mut g = Array1::zeros(theta.len());
    for (idx, (&t, gi)) in theta.iter().zip(g.iter_mut()).enumerate() {
        let r = if idx % p == p - 1 {
            INTERCEPT_RIDGE
        } else {
            l2
        };
        f += 0.5 * r * t * t;
        *gi = r * t;
    }
    (f, g)
}
