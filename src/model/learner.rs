//! L2-regularised multinomial logistic regression: loss, gradient, Hessian-vector products, training.
//!
//! # Notation
//!
//! `Φ ∈ R^{n×p}` are the mapped features (last column the intercept), `Y ∈ R^{n×K}` soft labels (rows on the
//! simplex), `w_i ≥ 0` item weights, `N` the normaliser of the data term (the training-set size), and the
//! parameters `θ ∈ R^{pK}` hold `W ∈ R^{p×K}` class by class: `θ[k·p + j] = W[j, k]`. With
//! `P = softmax(ΦW)` row-wise, the training objective is
//!
//! ```text
//! L(θ; Y) = (1/N) Σ_i w_i Σ_k −Y_ik log P_ik  +  a·Q(θ)  +  (λ/2) ‖W_{0..p−1}‖²  +  (ε/2) ‖W_{p−1}‖²
//! ```
//!
//! where `a·Q(θ)` is the optional quadratic model of the accepted pool's loss ([`Quadratic`]), `λ` penalises
//! every coefficient except the intercept, and `ε = 1e-8` is a tiny ridge on the intercept that only picks one
//! optimum out of the line along which the softmax is invariant (adding a constant to every class's
//! intercept); it changes no prediction.
//!
//! * gradient: `∇_W L = Φᵀ diag(w) (P − Y) / N + a ∇Q + λ M ⊙ W` (`M` masks the intercept row);
//! * Hessian of one item: `w_i (diag p_i − p_i p_iᵀ) ⊗ φ_i φ_iᵀ / N`, independent of the labels
//!   (Böhning, "Multinomial logistic regression algorithm", Ann. Inst. Statist. Math. 1992);
//! * Hessian-vector product: `U = Φ V`, `R_i = w_i (p_i ⊙ u_i − p_i (p_iᵀ u_i))`, `H[V] = Φᵀ R / N + a H_Q V + λ M ⊙ V`.

use std::cell::RefCell;
use std::time::{Duration, Instant};

use argmin::core::{CostFunction, Executor, Gradient, State, TerminationReason, TerminationStatus};
use argmin::solver::linesearch::MoreThuenteLineSearch;
use argmin::solver::quasinewton::LBFGS;
use ndarray::{s, Array1, Array2, ArrayView1, ArrayView2, Axis};
use serde::{Deserialize, Serialize};

use super::kron::KronFactors;

/// Ridge on the intercept row (see the module docs).
pub const INTERCEPT_RIDGE: f64 = 1e-8;

/// Outcome of one training solve.
#[derive(Debug, Clone, Default, PartialEq, Serialize, Deserialize)]
pub struct TrainReport {
    /// Whether the gradient tolerance was reached.
    pub converged: bool,
    /// Iterations used.
    pub iterations: u64,
    /// Final Euclidean norm of the gradient.
    pub grad_norm: f64,
    /// Final objective value.
    pub objective: f64,
    /// Why the solver stopped, in words.
    pub stopped: String,
}

impl TrainReport {
    /// The report of a solver that stopped with gradient norm `gn` (converged when `gn ≤ tol`).
    fn at_end(
        gn: f64,
        tol: f64,
        iterations: u64,
        objective: f64,
        stopped: impl Into<String>,
    ) -> Self {
        Self {
            converged: gn <= tol,
            iterations,
            grad_norm: gn,
            objective,
            stopped: stopped.into(),
        }
    }
}

/// A quadratic model `Q(θ) = gᵀ(θ − θ₀) + ½ (θ − θ₀)ᵀ H (θ − θ₀)` (the constant is dropped), entering the
/// objective with weight `scale`.
#[derive(Debug, Clone, Copy)]
pub struct Quadratic<'a> {
    /// Weight `a` of the term (for a pool summary: `n_P / N`).
    pub scale: f64,
    /// Expansion point `θ₀`.
    pub center: ArrayView1<'a, f64>,
    /// Gradient `g` at `θ₀`.
    pub grad: ArrayView1<'a, f64>,
    /// Hessian `H` at `θ₀` (dense; empty when `kron` stands for it, or when the curvature is zero).
    pub hess: ArrayView2<'a, f64>,
    /// Kronecker-factored `H ≈ B ⊗ A` used instead of `hess` above the dense threshold (see
    /// [`super::kron`]).
    pub kron: Option<&'a KronFactors>,
}

impl Quadratic<'_> {
    /// `H v` with whichever form of `H` the term holds (zero when it holds none).
    pub fn hess_dot(&self, v: &Array1<f64>) -> Array1<f64> {
        match self.kron {
            Some(f) => f.matvec(v),
            None if self.hess.is_empty() => Array1::zeros(v.len()),
            None => self.hess.dot(v),
        }
    }
}

/// The training objective `L(θ; Y)` of the module docs.
#[derive(Debug, Clone, Copy)]
pub struct Objective<'a> {
    /// Mapped features `Φ` (`n × p`, last column the intercept).
    pub phi: ArrayView2<'a, f64>,
    /// Soft labels `Y` (`n × K`).
    pub y: ArrayView2<'a, f64>,
    /// Item weights `w` (all ones when `None`).
    pub weight: Option<ArrayView1<'a, f64>>,
    /// Normaliser `N` of the data term.
    pub norm: f64,
    /// L2 weight `λ`.
    pub l2: f64,
    /// Optional quadratic pool term.
    pub prior: Option<Quadratic<'a>>,
}

/// Row-wise softmax of logits; returns `(P, log-sum-exp per row)`. Stable for any finite logits.
pub fn softmax_rows(mut z: Array2<f64>) -> (Array2<f64>, Array1<f64>) {
    let mut lse = Array1::zeros(z.nrows());
    for (mut row, l) in z.rows_mut().into_iter().zip(lse.iter_mut()) {
        let m = row.fold(f64::NEG_INFINITY, |a, &b| a.max(b));
        let mut s = 0.0;
        for v in row.iter_mut() {
            // exp(−700) ≈ 1e-304: anything smaller is flushed to zero to keep subnormals out.
            let d = *v - m;
            *v = if d < -700.0 { 0.0 } else { d.exp() };
            s += *v;
        }
        row.mapv_inplace(|v| v / s);
        *l = m + s.ln();
    }
    (z, lse)
}

/// `W` as a `p × K` view of `θ` (no copy): `θ` holds `Wᵀ` row-major.
pub fn weights_view(theta: &Array1<f64>, p: usize, k: usize) -> ArrayView2<'_, f64> {
    theta
        .view()
        .into_shape_with_order((k, p))
        .expect("θ has p·K entries")
        .reversed_axes()
}

/// Logits `ΦW` for parameters `θ`.
pub fn logits(phi: ArrayView2<'_, f64>, theta: &Array1<f64>, k: usize) -> Array2<f64> {
    phi.dot(&weights_view(theta, phi.ncols(), k))
}

/// Class probabilities `softmax(ΦW)`.
pub fn predict_proba(phi: ArrayView2<'_, f64>, theta: &Array1<f64>, k: usize) -> Array2<f64> {
    softmax_rows(logits(phi, theta, k)).0
}

/// Flatten a `p × K` gradient matrix `G` into `θ` layout (`θ[k·p + j] = G[j, k]`).
pub fn flatten_pk(g: ArrayView2<'_, f64>) -> Array1<f64> {
    let (p, k) = g.dim();
    let mut out = Array1::zeros(p * k);
    for c in 0..k {
        out.slice_mut(s![c * p..(c + 1) * p]).assign(&g.column(c));
    }
    out
}

impl Objective<'_> {
    /// Number of classes `K`.
    pub fn classes(&self) -> usize {
        self.y.ncols()
    }

    /// Mapped feature dimension `p`.
    pub fn dim(&self) -> usize {
        self.phi.ncols()
    }

    fn weight(&self, i: usize) -> f64 {
        self.weight.map_or(1.0, |w| w[i])
    }

    /// Adds the regulariser's and the prior's value and gradient to `(f, g)` at `θ`.
    fn add_penalties(&self, theta: &Array1<f64>, f: &mut f64, g: &mut Array1<f64>) {
        let p = self.dim();
        for (idx, (&t, gi)) in theta.iter().zip(g.iter_mut()).enumerate() {
            let r = if idx % p == p - 1 {
                INTERCEPT_RIDGE
            } else {
                self.l2
            };
            *f += 0.5 * r * t * t;
            *gi += r * t;
        }
        if let Some(q) = &self.prior {
            let d = theta - &q.center;
            let hd = q.hess_dot(&d);
            *f += q.scale * (q.grad.dot(&d) + 0.5 * d.dot(&hd));
            g.scaled_add(q.scale, &q.grad);
            g.scaled_add(q.scale, &hd);
        }
    }

    /// Objective value and gradient at `θ`, plus the probabilities `P` there.
    ///
    /// `f = (1/N) Σ_i w_i (lse_i − Σ_k Y_ik z_ik) + penalties`. Rows of `Y` must lie on the simplex
    /// (`Σ_k Y_ik = 1`), which the gradient below uses;
    /// `∇ = Φᵀ diag(w)(P − Y)/N + penalties'`.
    pub fn value_grad(&self, theta: &Array1<f64>) -> (f64, Array1<f64>, Array2<f64>) {
        let k = self.classes();
        let z = logits(self.phi, theta, k);
        // −Σ_k Y_ik log P_ik = (Σ_k Y_ik) lse_i − Σ_k Y_ik z_ik
        let yz: Array1<f64> = (&self.y * &z).sum_axis(Axis(1));
        let (prob, lse) = softmax_rows(z);
        let mut r = &prob - &self.y;
        let mut data = 0.0;
        for i in 0..r.nrows() {
            let w = self.weight(i);
            let ysum: f64 = self.y.row(i).sum();
            data += w * (ysum * lse[i] - yz[i]);
            if w != 1.0 {
                r.row_mut(i).mapv_inplace(|v| v * w);
            }
        }
        let mut f = data / self.norm;
        let g_pk = self.phi.t().dot(&r) / self.norm;
        let mut g = flatten_pk(g_pk.view());
        self.add_penalties(theta, &mut f, &mut g);
        (f, g, prob)
    }

    /// Hessian-vector product `H[v]` at the point whose probabilities are `prob`.
    pub fn hvp(&self, prob: ArrayView2<'_, f64>, v: &Array1<f64>) -> Array1<f64> {
        let p = self.dim();
        let mut out = self.data_hvp(self.phi, prob, v);
        for (idx, (o, &vi)) in out.iter_mut().zip(v.iter()).enumerate() {
            let reg = if idx % p == p - 1 {
                INTERCEPT_RIDGE
            } else {
                self.l2
            };
            *o += reg * vi;
        }
        if let Some(q) = &self.prior {
            out.scaled_add(q.scale, &q.hess_dot(v));
        }
        out
    }

    /// The data term's Hessian-vector product alone, `Φᵀ diag(w) R / N` with
    /// `R_ic = p_ic (u_ic − p_iᵀ u_i)`, `U = Φ V`, computed with the rows `phi` in place of the objective's
    /// own (the same rows in another basis of the features, [`super::kron::FeatureFrame`]; `phi` has the
    /// objective's row count).
    pub fn data_hvp(
        &self,
        phi: ArrayView2<'_, f64>,
        prob: ArrayView2<'_, f64>,
        v: &Array1<f64>,
    ) -> Array1<f64> {
        let p = phi.ncols();
        let k = self.classes();
        let u = phi.dot(&weights_view(v, p, k));
        let mut r = Array2::zeros(u.raw_dim());
        for i in 0..u.nrows() {
            let w = self.weight(i);
            let pi = prob.row(i);
            let ui = u.row(i);
            let pu = pi.dot(&ui);
            for c in 0..k {
                r[[i, c]] = w * pi[c] * (ui[c] - pu);
            }
        }
        flatten_pk(phi.t().dot(&r).view()) / self.norm
    }

    /// The data term's Hessian alone (no penalties, no prior), assembled densely:
    /// block `(a, b)` is `Φᵀ diag(w ⊙ (δ_ab p_a − p_a ⊙ p_b)) Φ / N`.
    ///
    /// Computed as `blockdiag_a(Φᵀ diag(w ⊙ p_a / N) Φ) − AᵀA` with `A = [√(w/N) ⊙ p_1 ⊙ Φ, …, √(w/N) ⊙ p_K ⊙ Φ]`
    /// (`n × pK`), so the `K²` blocks come from one large product instead of `K²` rescalings.
    pub fn data_hessian(&self, prob: ArrayView2<'_, f64>) -> Array2<f64> {
        let p = self.dim();
        let k = self.classes();
        let n = self.phi.nrows();
        let mut h = Array2::zeros((p * k, p * k));
        // Rows are processed in chunks so that memory stays bounded for large exact fits.
        const CHUNK: usize = 4096;
        let mut start = 0;
        while start < n {
            let end = (start + CHUNK).min(n);
            let rows = end - start;
            let phi = self.phi.slice(s![start..end, ..]);
            let mut a = Array2::<f64>::zeros((rows, p * k));
            let mut diag_scaled = Array2::<f64>::zeros((rows, p));
            for c in 0..k {
                for (r, i) in (start..end).enumerate() {
                    let wn = self.weight(i) / self.norm;
                    let pc = prob[[i, c]];
                    let f = wn.sqrt() * pc;
                    let src = phi.row(r);
                    let mut dst = a.slice_mut(s![r, c * p..(c + 1) * p]);
                    ndarray::Zip::from(&mut dst)
                        .and(&src)
                        .for_each(|d, &v| *d = f * v);
                    let g = wn * pc;
                    ndarray::Zip::from(diag_scaled.row_mut(r))
                        .and(&src)
                        .for_each(|d, &v| *d = g * v);
                }
                let block = diag_scaled.t().dot(&phi);
                let mut dst = h.slice_mut(s![c * p..(c + 1) * p, c * p..(c + 1) * p]);
                dst += &block;
            }
            let ata = a.t().dot(&a);
            h -= &ata;
            start = end;
        }
        h
    }

    /// The full Hessian at the point whose probabilities are `prob`, assembled densely.
    pub fn hessian(&self, prob: ArrayView2<'_, f64>) -> Array2<f64> {
        let p = self.dim();
        let mut h = self.data_hessian(prob);
        for idx in 0..h.nrows() {
            h[[idx, idx]] += if idx % p == p - 1 {
                INTERCEPT_RIDGE
            } else {
                self.l2
            };
        }
        if let Some(q) = &self.prior {
            match q.kron {
                Some(f) => {
                    let (p, k) = f.dims();
                    for u in 0..k {
                        for v in 0..k {
                            let mut blk = h.slice_mut(s![u * p..(u + 1) * p, v * p..(v + 1) * p]);
                            blk.scaled_add(q.scale * f.b[[u, v]], &f.a);
                        }
                    }
                }
                None if q.hess.is_empty() => {}
                None => h.scaled_add(q.scale, &q.hess),
            }
        }
        h
    }
}

/// argmin adapter: evaluates value and gradient together and caches the last point, since the line search
/// asks for both at the same parameters.
/// The last point evaluated: `(θ, f(θ), ∇f(θ))`.
type Evaluated = Option<(Array1<f64>, f64, Array1<f64>)>;

struct Problem<'a> {
    obj: Objective<'a>,
    cache: RefCell<Evaluated>,
}

impl Problem<'_> {
    fn eval(&self, theta: &Array1<f64>) -> (f64, Array1<f64>) {
        if let Some((t, f, g)) = self.cache.borrow().as_ref() {
            if t == theta {
                return (*f, g.clone());
            }
        }
        let (f, g, _) = self.obj.value_grad(theta);
        *self.cache.borrow_mut() = Some((theta.clone(), f, g.clone()));
        (f, g)
    }
}

impl CostFunction for Problem<'_> {
    type Param = Array1<f64>;
    type Output = f64;
    fn cost(&self, param: &Self::Param) -> Result<Self::Output, argmin::core::Error> {
        Ok(self.eval(param).0)
    }
}

impl Gradient for Problem<'_> {
    type Param = Array1<f64>;
    type Gradient = Array1<f64>;
    fn gradient(&self, param: &Self::Param) -> Result<Self::Gradient, argmin::core::Error> {
        Ok(self.eval(param).1)
    }
}

/// Minimise the objective from `init` with argmin's L-BFGS (memory 10, Moré–Thuente line search), bounded by
/// `max_iters` and `timeout`. argmin's Ctrl-C handling is off (the daemon owns signals).
///
/// A run that stops early is reported in the [`TrainReport`], never raised; the best parameters seen are
/// returned.
pub fn train(
    obj: &Objective<'_>,
    init: Array1<f64>,
    tol: f64,
    max_iters: u64,
    timeout: Duration,
) -> (Array1<f64>, TrainReport) {
    let started = Instant::now();
    let problem = Problem {
        obj: *obj,
        cache: RefCell::new(None),
    };
    let (f0, g0) = problem.eval(&init);
    let g0n = g0.dot(&g0).sqrt();
    if g0n <= tol {
        return (
            init,
            TrainReport {
                converged: true,
                iterations: 0,
                grad_norm: g0n,
                objective: f0,
                stopped: "already optimal".into(),
            },
        );
    }
    let solver = LBFGS::new(MoreThuenteLineSearch::new(), 10)
        .with_tolerance_grad(tol)
        .and_then(|s| s.with_tolerance_cost(0.0));
    let solver = match solver {
        Ok(s) => s,
        Err(e) => {
            return (
                init,
                TrainReport {
                    stopped: format!("solver setup failed: {e}"),
                    objective: f0,
                    grad_norm: g0n,
                    ..TrainReport::default()
                },
            )
        }
    };
    let fallback = init.clone();
    let run = Executor::new(problem, solver)
        .configure(|state| state.param(init).max_iters(max_iters))
        .timeout(
            timeout
                .saturating_sub(started.elapsed())
                .max(Duration::from_millis(1)),
        )
        .run();
    match run {
        Ok(mut res) => {
            let iterations = res.state().get_iter();
            let status = res.state().get_termination_status().clone();
            let theta = res
                .state
                .take_best_param()
                .or_else(|| res.state.take_param())
                .unwrap_or(fallback);
            let (f, g, _) = obj.value_grad(&theta);
            let gn = g.dot(&g).sqrt();
            let stopped = match &status {
                TerminationStatus::Terminated(r) => r.text().to_string(),
                TerminationStatus::NotTerminated => "not terminated".into(),
            };
            let converged = gn <= tol.max(1e-12) * 10.0
                || matches!(
                    status,
                    TerminationStatus::Terminated(TerminationReason::SolverConverged)
                ) && gn <= tol.sqrt();
            (
                theta,
                TrainReport {
                    converged,
                    iterations,
                    grad_norm: gn,
                    objective: f,
                    stopped,
                },
            )
        }
        Err(e) => {
            let (f, g, _) = obj.value_grad(&fallback);
            (
                fallback,
                TrainReport {
                    converged: false,
                    iterations: 0,
                    grad_norm: g.dot(&g).sqrt(),
                    objective: f,
                    stopped: format!("solver error: {e}"),
                },
            )
        }
    }
}

/// A point of the optimisation: `θ`, the objective there, its gradient and the class probabilities.
pub(crate) type Iterate = (Array1<f64>, f64, Array1<f64>, Array2<f64>);

/// A backtracking line search (Armijo's sufficient-decrease rule, `f(θ + t·d) ≤ f(θ) + 10⁻⁴·t·∇f·d`, `t`
/// halved up to 40 times; Nocedal & Wright, "Numerical Optimization", 2006, Alg. 3.1) along the first of
/// `dirs` that descends and succeeds. Returns the new `θ` with its value, gradient and probabilities, or
/// `None` when no direction gives sufficient decrease.
pub(crate) fn armijo_step(
    obj: &Objective<'_>,
    theta: &Array1<f64>,
    f: f64,
    g: &Array1<f64>,
    dirs: impl IntoIterator<Item = Array1<f64>>,
) -> Option<Iterate> {
    for dir in dirs {
        let slope = g.dot(&dir);
        if !slope.is_finite() || slope >= 0.0 {
            continue;
        }
        let mut step = 1.0;
        for _ in 0..40 {
            let cand = theta + &(&dir * step);
            let (fc, gc, pc) = obj.value_grad(&cand);
            if fc.is_finite() && fc <= f + 1e-4 * step * slope {
                return Some((cand, fc, gc, pc));
            }
            step *= 0.5;
        }
    }
    None
}

/// Minimise the objective by Newton's method with a dense Hessian (Cholesky), used when `p·K` is small.
/// Quadratically convergent near the optimum; each step costs one Hessian assembly. Falls back to a
/// gradient step with backtracking if the factorisation fails.
pub fn train_newton(
    obj: &Objective<'_>,
    init: Array1<f64>,
    tol: f64,
    max_iters: u64,
    deadline: Instant,
) -> (Array1<f64>, TrainReport) {
    let (theta, report, _) = train_newton_factored(obj, init, tol, max_iters, deadline);
    (theta, report)
}

/// [`train_newton`], also returning the Cholesky factor of the last Hessian it assembled (at the iterate
/// one Newton step before the returned one; at a converged solve the two agree to second order), so a
/// caller that needs `H⁻¹` at the optimum need not assemble it again. `None` if no step was taken.
pub fn train_newton_factored(
    obj: &Objective<'_>,
    init: Array1<f64>,
    tol: f64,
    max_iters: u64,
    deadline: Instant,
) -> (Array1<f64>, TrainReport, Option<super::linalg::Cholesky>) {
    let mut last_factor = None;
    let mut theta = init;
    let (mut f, mut g, mut prob) = obj.value_grad(&theta);
    let mut iterations = 0;
    let mut stopped = String::from("iteration bound reached");
    loop {
        let gn = g.dot(&g).sqrt();
        if gn <= tol {
            stopped = "gradient tolerance reached".into();
            break;
        }
        if iterations >= max_iters {
            break;
        }
        if Instant::now() >= deadline {
            stopped = "time budget reached".into();
            break;
        }
        iterations += 1;
        let h = obj.hessian(prob.view());
        let factor = super::linalg::Cholesky::factor(h);
        let newton_dir = factor.as_ref().map(|c| -c.solve(&g));
        last_factor = factor;
        // Newton direction first; if its line search fails (e.g. round-off along the nearly flat intercept
        // direction), a steepest-descent step, which always descends.
        let dirs = newton_dir.into_iter().chain(std::iter::once(-g.clone()));
        match armijo_step(obj, &theta, f, &g, dirs) {
            Some((t, fc, gc, pc)) => (theta, f, g, prob) = (t, fc, gc, pc),
            None => {
                stopped = "line search made no progress".into();
                break;
            }
        }
    }
    let gn = g.dot(&g).sqrt();
    (
        theta,
        TrainReport::at_end(gn, tol, iterations, f, stopped),
        last_factor,
    )
}

/// Minimise the objective by the chord method: Newton steps that keep one fixed Hessian factor `H̃`
/// (typically the exact Hessian at a nearby optimum), `θ ← θ − α H̃⁻¹ ∇L(θ)` with a backtracking (Armijo)
/// step `α`. Each iteration costs one gradient (`n·p·K`) and one pair of triangular solves (`m²`) instead
/// of a Hessian assembly (`n·p²·K²/2`) and a factorisation (`m³/3`). Convergence is linear with rate
/// `‖I − H̃⁻¹H‖`, which is small while the true Hessian `H` stays close to `H̃` (Ortega & Rheinboldt,
/// *Iterative Solution of Nonlinear Equations in Several Variables*, 1970, on the chord method).
///
/// When the rate is poor (the gradient norm falls by less than half in an iteration, twice) the factor is
/// refreshed at the current iterate — an exact Newton step — and the chord iterations continue on the new
/// one (Shamanskii's variant, same reference); if a step or a factorisation fails, the remaining
/// iterations go to full Newton ([`train_newton_factored`]). The returned factor is the last one assembled
/// here (a refresh, or Newton's), else `None` (the caller keeps `H̃`).
pub fn train_chord(
    obj: &Objective<'_>,
    init: Array1<f64>,
    factor: &super::linalg::Cholesky,
    tol: f64,
    max_iters: u64,
    deadline: Instant,
) -> (Array1<f64>, TrainReport, Option<super::linalg::Cholesky>) {
    let mut theta = init;
    let (mut f, mut g, mut prob) = obj.value_grad(&theta);
    let mut gn = g.dot(&g).sqrt();
    let mut iterations = 0;
    let mut slow = 0;
    let mut refreshed: Option<super::linalg::Cholesky> = None;
    while gn > tol && iterations < max_iters && Instant::now() < deadline {
        iterations += 1;
        let dir = -refreshed.as_ref().unwrap_or(factor).solve(&g);
        let slope = g.dot(&dir);
        let mut accepted = false;
        if slope.is_finite() && slope < 0.0 {
            let mut step = 1.0;
            for _ in 0..20 {
                let cand = &theta + &(&dir * step);
                let (fc, gc, pc) = obj.value_grad(&cand);
                if fc.is_finite() && fc <= f + 1e-4 * step * slope {
                    let gnc = gc.dot(&gc).sqrt();
                    if gnc > 0.5 * gn {
                        slow += 1;
                    }
                    theta = cand;
                    f = fc;
                    g = gc;
                    prob = pc;
                    gn = gnc;
                    accepted = true;
                    break;
                }
                step *= 0.5;
            }
        }
        let fresh = if accepted && slow >= 2 && gn > tol {
            super::linalg::Cholesky::factor(obj.hessian(prob.view()))
        } else {
            None
        };
        if !accepted || (slow >= 2 && gn > tol && fresh.is_none()) {
            let (t, mut rep, fac) = train_newton_factored(
                obj,
                theta,
                tol,
                max_iters.saturating_sub(iterations).max(1),
                deadline,
            );
            rep.iterations += iterations;
            return (t, rep, fac.or(refreshed));
        }
        if fresh.is_some() {
            refreshed = fresh;
            slow = 0;
        }
    }
    let stopped = if gn <= tol {
        "gradient tolerance reached"
    } else if iterations >= max_iters {
        "iteration bound reached"
    } else {
        "time budget reached"
    };
    (
        theta,
        TrainReport::at_end(gn, tol, iterations, f, stopped),
        refreshed,
    )
}

/// The trusted-set loss `Φ(θ) = Σ_t c_t (−log P_t,y_t) / Σ_t c_t` and its gradient
/// `∇_W Φ = Φ_Tᵀ diag(c) (P_T − E_T) / Σ c` (`E_T` the one-hot verified labels), plus `P_T`.
pub fn trusted_loss(
    phi_t: ArrayView2<'_, f64>,
    y_t: &[usize],
    c_t: ArrayView1<'_, f64>,
    theta: &Array1<f64>,
    k: usize,
) -> (f64, Array1<f64>, Array2<f64>) {
    let z = logits(phi_t, theta, k);
    let (prob, lse) = softmax_rows(z.clone());
    let total: f64 = c_t.sum().max(f64::MIN_POSITIVE);
    let mut loss = 0.0;
    let mut r = prob.clone();
    for (i, &yi) in y_t.iter().enumerate() {
        loss += c_t[i] * (lse[i] - z[[i, yi]]);
        r[[i, yi]] -= 1.0;
        r.row_mut(i).mapv_inplace(|v| v * c_t[i] / total);
    }
    let g = flatten_pk(phi_t.t().dot(&r).view());
    (loss / total, g, prob)
}

/// One-hot encoding of class indices.
pub fn one_hot(y: &[usize], k: usize) -> Array2<f64> {
    let mut out = Array2::zeros((y.len(), k));
    for (i, &c) in y.iter().enumerate() {
        out[[i, c]] = 1.0;
    }
    out
}

/// Stack two matrices vertically (helper for exact mode: pool rows then batch rows).
pub fn vstack(a: ArrayView2<'_, f64>, b: ArrayView2<'_, f64>) -> Array2<f64> {
    assert_eq!(a.ncols(), b.ncols(), "vstack needs the same column count");
    let mut out = Array2::zeros((a.nrows() + b.nrows(), a.ncols()));
    out.slice_mut(s![..a.nrows(), ..]).assign(&a);
    out.slice_mut(s![a.nrows().., ..]).assign(&b);
    out
}

/// The learner: a fitted parameter vector with its feature map and class count.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Learner {
    /// Feature map `φ`.
    pub feature_map: super::FeatureMap,
    /// Class count `K`.
    pub n_classes: usize,
    /// Parameters `θ` (`θ[k·p + j] = W[j, k]`).
    pub theta: Array1<f64>,
}

impl Learner {
    /// Fit on raw features `x` with hard labels `y` (all weights one) from `θ = 0`.
    pub fn fit(
        settings: &super::ModelSettings,
        feature_map: super::FeatureMap,
        n_classes: usize,
        x: ArrayView2<'_, f64>,
        y: &[usize],
    ) -> Result<(Self, TrainReport), super::ModelError> {
        super::check_labels(y, n_classes)?;
        let phi = feature_map.apply(x)?;
        let yy = one_hot(y, n_classes);
        let obj = Objective {
            phi: phi.view(),
            y: yy.view(),
            weight: None,
            norm: y.len().max(1) as f64,
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
        Ok((
            Self {
                feature_map,
                n_classes,
                theta,
            },
            report,
        ))
    }

    /// Class probabilities for raw features `x`.
    pub fn predict_proba(&self, x: ArrayView2<'_, f64>) -> Result<Array2<f64>, super::ModelError> {
        let phi = self.feature_map.apply(x)?;
        Ok(predict_proba(phi.view(), &self.theta, self.n_classes))
    }
}

/// Solve the inner problem with the configured method: Newton with a dense Hessian when `p·K` is at most
/// `dense_max_params`; above it, truncated Newton preconditioned by the pool summary's Kronecker factors
/// when the objective has such a prior ([`super::truncated`]), else L-BFGS (argmin).
pub fn solve(
    settings: &super::ModelSettings,
    obj: &Objective<'_>,
    init: Array1<f64>,
    deadline: Instant,
) -> (Array1<f64>, TrainReport) {
    let (theta, report, _) = solve_factored(settings, obj, init, deadline);
    (theta, report)
}

/// [`solve`], also returning the last Hessian factor when Newton's method ran (see
/// [`train_newton_factored`]).
pub fn solve_factored(
    settings: &super::ModelSettings,
    obj: &Objective<'_>,
    init: Array1<f64>,
    deadline: Instant,
) -> (Array1<f64>, TrainReport, Option<super::linalg::Cholesky>) {
    if obj.prior.is_some_and(|q| q.kron.is_some()) {
        // Above the dense threshold with a Kronecker-factored pool summary: truncated Newton,
        // preconditioned by the summary's factors.
        let pre = super::truncated::kron_preconditioner(obj);
        let (theta, report, _) = super::truncated::train_newton_cg(
            obj,
            init,
            &pre,
            settings.inner_tol,
            settings.inner_max_iters,
            settings.cg_max_iters,
            deadline,
        );
        return (theta, report, None);
    }
    if prefer_newton(settings, obj) {
        train_newton_factored(
            obj,
            init,
            settings.inner_tol,
            settings.inner_max_iters,
            deadline,
        )
    } else {
        let left = deadline.saturating_duration_since(Instant::now());
        let (theta, report) = train(
            obj,
            init,
            settings.inner_tol,
            settings.inner_max_iters,
            left,
        );
        (theta, report, None)
    }
}

/// Cost model for the inner solver. Newton costs about 8 steps × (`n·m·p/2` for the Hessian assembly +
/// `m³/3` for the factorisation); L-BFGS needs several hundred iterations to a tight tolerance on these
/// problems (we count 300 × 3 × `n·m`: a gradient is two `n × p × K` products, and the line search evaluates
/// ~1.5 points per iteration). With a pool summary (a quadratic
/// prior that dominates the curvature) Newton needs one or two steps and always wins.
fn prefer_newton(settings: &super::ModelSettings, obj: &Objective<'_>) -> bool {
    let p = obj.dim() as f64;
    let m = p * obj.classes() as f64;
    let n = obj.phi.nrows().max(1) as f64;
    if m > settings.dense_max_params as f64 {
        return false;
    }
    if obj.prior.is_some() {
        return true;
    }
    8.0 * (n * m * p / 2.0 + m * m * m / 3.0) < 1000.0 * n * m
}
