//! The training problem over pool ∪ batch and its linearisation `Y ↦ θ*(Y)` (implicit function theorem).

use std::ops::Range;
use std::sync::{Arc, OnceLock};
use std::time::Instant;

use ndarray::{s, Array1, Array2, ArrayView1, ArrayView2};

use super::reference::PoolRows;

use crate::model::learner::{
    logits, one_hot, solve_factored, train_chord, trusted_loss, vstack, Objective, INTERCEPT_RIDGE,
};
use crate::model::linalg::{conjugate_gradient, conjugate_gradient_with, Cholesky};
use crate::model::{ModelSettings, PoolTerm};

/// The training problem over pool ∪ batch: mapped features with the pool's rows (the pool's items in exact
/// mode, the summary's reservoir when its term uses it) first and batch rows last, their weights, the
/// normaliser `N = n_P + n_B`, and the pool's quadratic model (incremental mode).
pub(crate) struct Inner {
    phi: Array2<f64>,
    y_pool: Option<Array2<f64>>,
    weight: Option<Array1<f64>>,
    batch: Range<usize>,
    pub(crate) norm: f64,
    l2: f64,
    prior: Option<PoolTerm>,
    /// `Φ U_A`: the rows in the eigenbasis of the pool's Kronecker feature factor, for the solves above
    /// the dense threshold ([`crate::model::kron::FeatureFrame`]); computed on first use.
    rotated: OnceLock<Array2<f64>>,
}

impl Inner {
    /// The training set over pool ∪ batch (phase 2 of an assessment): the pool's rows first (exact mode's
    /// weigh 1 each and need no weights; a reservoir's stand for `n_P/|R|` each), the batch rows last, the
    /// normaliser `N = n_P + n_B` and the summary's quadratic term.
    pub(crate) fn new(pool: PoolRows, phi_b: &Array2<f64>, n_p: u64, l2: f64) -> Self {
        let n_b = phi_b.nrows();
        let (phi, batch, weight) = match &pool.phi {
            Some(pp) => {
                let weight = (pool.row_weight != 1.0).then(|| {
                    let mut w = vec![pool.row_weight; pp.nrows()];
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
        Self {
            phi,
            y_pool: pool.y,
            weight,
            batch,
            norm: n_p as f64 + n_b as f64,
            l2,
            prior: pool.term,
            rotated: OnceLock::new(),
        }
    }

    pub(crate) fn labels(&self, y_batch: ArrayView2<'_, f64>) -> Array2<f64> {
        match &self.y_pool {
            Some(yp) => vstack(yp.view(), y_batch),
            None => y_batch.to_owned(),
        }
    }

    pub(crate) fn objective<'b>(&'b self, y_all: &'b Array2<f64>) -> Objective<'b> {
        Objective {
            phi: self.phi.view(),
            y: y_all.view(),
            weight: self.weight.as_ref().map(|w| w.view()),
            norm: self.norm,
            l2: self.l2,
            prior: self.prior.as_ref().map(|t| t.quadratic(self.norm)),
        }
    }

    pub(crate) fn phi_batch(&self) -> ArrayView2<'_, f64> {
        self.phi.slice(s![self.batch.clone(), ..])
    }

    /// Rows of the batch in the training set.
    pub(crate) fn batch_rows(&self) -> Range<usize> {
        self.batch.clone()
    }

    /// The training set with the trusted items appended: mapped rows, labels and row weights, each trusted
    /// item `t` weighted `c̄ · N · c_t / Σ c` so that the trusted items' mean loss enters the objective `c̄`
    /// times (`N` the inner normaliser).
    pub(crate) fn with_trusted(
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
    pub(crate) fn prior_quadratic(&self) -> Option<crate::model::learner::Quadratic<'_>> {
        self.prior.as_ref().map(|t| t.quadratic(self.norm))
    }
}

/// `H⁻¹` at one point of the path: a dense Cholesky factor, or CG on Hessian-vector products.
pub(crate) enum HessianSolver {
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
pub(crate) struct Linearisation {
    pub(crate) y_anchor: Array2<f64>,
    pub(crate) theta: Array1<f64>,
    solver: HessianSolver,
}

/// What the repair loop needs from the assessment.
pub(crate) struct Ctx<'a> {
    pub(crate) settings: &'a ModelSettings,
    pub(crate) inner: &'a Inner,
    pub(crate) phi_t: &'a Array2<f64>,
    pub(crate) y_t: &'a [usize],
    pub(crate) c_t: Array1<f64>,
    pub(crate) k: usize,
    pub(crate) conv: std::cell::RefCell<super::Convergence>,
}

impl Ctx<'_> {
    pub(crate) fn solve_h(
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
                let kron = obj.prior.and_then(|q| q.kron.map(|f| (q.scale, f)));
                let res = if let Some((scale, factors)) = kron {
                    // Above the dense threshold: preconditioned by the pool summary's Kronecker factors,
                    // `(a B ⊗ A + D)⁻¹` with the learner's ridge `D` (`RidgedInverse`), nearly `H⁻¹` when the pool
                    // outweighs the batch; solved in the eigenbasis of the feature factor, where the pool's
                    // term and the preconditioner cost `O(K² p)` a product (`FeatureFrame`).
                    let frame = factors.frame(scale, obj.l2, INTERCEPT_RIDGE);
                    let phi = self
                        .inner
                        .rotated
                        .get_or_init(|| frame.rotate_rows(self.inner.phi.view()));
                    let mut res = conjugate_gradient_with(
                        |v| {
                            let mut out = obj.data_hvp(phi.view(), prob.view(), v);
                            out += &frame.pool_and_ridge_dot(v);
                            out
                        },
                        &frame.into_frame(rhs),
                        warm.map(|w| frame.into_frame(&w)),
                        |r| frame.precondition(r),
                        self.settings.cg_tol,
                        self.settings.cg_max_iters,
                    );
                    res.x = frame.out_of_frame(&res.x);
                    res
                } else {
                    conjugate_gradient(
                        |v| obj.hvp(prob.view(), v),
                        rhs,
                        warm,
                        None,
                        self.settings.cg_tol,
                        self.settings.cg_max_iters,
                    )
                };
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
    pub(crate) fn linearise(
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
    pub(crate) fn factor_of(lin: &Linearisation) -> Option<Arc<Cholesky>> {
        match &lin.solver {
            HessianSolver::Dense(c) => Some(Arc::clone(c)),
            HessianSolver::Cg { .. } => None,
        }
    }

    /// `θ_lin(Y) = θ_a + H⁻¹ vec(Φ_Bᵀ (Y − Y_a)) / N`, using only the rows that moved.
    pub(crate) fn theta_at(
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
    pub(crate) fn loss_and_hypergradient(
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

    pub(crate) fn trusted_value(&self, theta: &Array1<f64>) -> f64 {
        trusted_loss(self.phi_t.view(), self.y_t, self.c_t.view(), theta, self.k).0
    }
}

#[cfg(test)]
impl Inner {
    /// Exact mode with unit weights: pool rows first (labels `y_pool`), then the batch rows.
    pub(crate) fn for_test(
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
            rotated: OnceLock::new(),
        }
    }
}

#[cfg(test)]
impl<'a> Ctx<'a> {
    /// A context over `inner` for the trusted items `(phi_t, y_t)` with unit confidence.
    pub(crate) fn for_test(
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
            conv: std::cell::RefCell::new(super::Convergence {
                inner_converged: true,
                linear_converged: true,
                ..super::Convergence::default()
            }),
        }
    }
}
