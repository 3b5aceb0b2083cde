//! The pool summary: a second-order model of the accepted pool's loss around its optimum.
//!
//! Memory: `p·K` coefficients, a `p·K` gradient and a dense `(p·K)²` Hessian — for 32 features, an
//! intercept and 8 classes that is 264² ≈ 70 000 doubles ≈ 0.56 MB, whatever the pool size.

use std::time::Instant;

use ndarray::{Array1, Array2, ArrayView2};
use serde::{Deserialize, Serialize};

use super::learner::{
    flatten_pk, one_hot, solve, weights_view, Objective, Quadratic, INTERCEPT_RIDGE,
};
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
    /// `H_P`, `(p·K) × (p·K)`.
    pub hess: Array2<f64>,
    /// Pool size at the last exact refresh.
    pub exact_at_n: u64,
}

impl PoolSummary {
    /// An empty pool (`n_P = 0`, `W_P = 0`).
    pub fn empty(feature_map: FeatureMap, n_classes: usize) -> Self {
        let p = feature_map.output_dim();
        let m = p * n_classes;
        Self {
            version: 1,
            n: 0,
            n_classes,
            feature_map,
            w: Array2::zeros((p, n_classes)),
            loss: 0.0,
            grad: Array1::zeros(m),
            hess: Array2::zeros((m, m)),
            exact_at_n: 0,
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
        let mut out = Self::empty(feature_map, n_classes);
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
        let (theta, report) = solve(
            settings,
            &obj,
            init,
            Instant::now() + settings.time_budget(),
        );
        let (f, g, prob) = obj.value_grad(&theta);
        let (pen_f, pen_g) = penalty(&theta, phi.ncols(), settings.l2);
        out.n = y.len() as u64;
        out.exact_at_n = out.n;
        out.loss = f - pen_f;
        out.grad = g - pen_g;
        out.hess = obj.data_hessian(prob.view());
        out.w = weights_view(&theta, phi.ncols(), n_classes).to_owned();
        Ok((out, report))
    }

    /// `θ_P` in the flat layout of [`super::learner`].
    pub fn theta(&self) -> Array1<f64> {
        flatten_pk(self.w.view())
    }

    /// The pool term for a training objective whose data normaliser is `norm` (`≥ n_P`): the quadratic
    /// model with weight `n_P / norm`.
    pub fn prior<'a>(&'a self, center: &'a Array1<f64>, norm: f64) -> Quadratic<'a> {
        Quadratic {
            scale: self.n as f64 / norm,
            center: center.view(),
            grad: self.grad.view(),
            hess: self.hess.view(),
        }
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
        let k = self.n_classes;
        let phi = self.feature_map.apply(x)?;
        let p = phi.ncols();
        let yy = one_hot(y, k);
        let n_p = self.n as f64;
        let n_b = y.len() as f64;
        let norm = n_p + n_b;
        let theta_p = self.theta();
        let (theta, report) = {
            let obj = Objective {
                phi: phi.view(),
                y: yy.view(),
                weight: None,
                norm,
                l2: settings.l2,
                prior: (self.n > 0).then(|| self.prior(&theta_p, norm)),
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
        let (fb, gb) = (fb - pen_f, gb - pen_g);
        // Pool part carried through its quadratic model: ℓ̄_P(θ) ≈ ℓ_P + g_Pᵀ d + ½ dᵀ H_P d.
        let d = &theta - &theta_p;
        let hd = self.hess.dot(&d);
        let pool_loss = self.loss + self.grad.dot(&d) + 0.5 * d.dot(&hd);
        let pool_grad = &self.grad + &hd;
        let w_p = n_p / norm;
        self.loss = w_p * pool_loss + fb;
        self.grad = pool_grad * w_p + gb;
        let hb = batch_obj.data_hessian(prob.view());
        self.hess = &self.hess * w_p + hb;
        self.w = weights_view(&theta, p, k).to_owned();
        self.n += y.len() as u64;
        Ok(report)
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
    pub fn memory_bytes(&self) -> usize {
        8 * (self.w.len() + self.grad.len() + self.hess.len() + self.feature_map.omega.len())
    }
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
