//! Kronecker-factored curvature of the softmax loss, for learners too large for a dense Hessian.
//!
//! # The approximation (Martens & Grosse, "Optimizing Neural Networks with Kronecker-factored Approximate
//! Curvature", ICML 2015)
//!
//! The data Hessian of the mean weighted cross-entropy, in the learner's layout `θ[k·p + j] = W[j, k]`, is
//!
//! ```text
//!   H = Σ_i (w_i/N) Σ_i ⊗ φ_i φ_iᵀ,      Σ_i = diag p_i − p_i p_iᵀ   (K × K, class curvature of item i)
//! ```
//!
//! — `(p·K)²` numbers. We keep `H ≈ B ⊗ A` with
//!
//! ```text
//!   A = Σ_i (w_i c_i / N) φ_i φ_iᵀ        (p × p),   c_i = tr Σ_i = 1 − ‖p_i‖²
//!   B = Σ_i (w_i / N) Σ_i  /  tr(…)       (K × K, unit trace)
//! ```
//!
//! so that `tr(B ⊗ A) = tr B · tr A = Σ_i (w_i/N) c_i ‖φ_i‖² = tr H` (trace-exact), in `p² + K²` numbers.
//! The approximation is exact when every item has the same class curvature (`Σ_i = Σ`), and for two
//! classes (`Σ_i = (c_i/2) [[1, −1], [−1, 1]]`, a scalar times one matrix): then `B ⊗ A = H`.
//!
//! # Products and the damped inverse
//!
//! With `V` the `K × p` matrix whose row `k` is block `k` of `v` (so `v` is `V` row-major),
//! `(B ⊗ A) v = B V A` (both symmetric). With the eigendecompositions `A = U_A diag(a) U_Aᵀ`,
//! `B = U_B diag(b) U_Bᵀ`, the damped system `(s B ⊗ A + μ I) x = v` has the exact solution
//!
//! ```text
//!   X = U_B [ (U_Bᵀ V U_A) ⊘ (s b a ᵀ + μ) ] U_Aᵀ
//! ```
//!
//! (`⊘` elementwise), at `2(K²p + Kp²)` flops. The learner's ridge is not `μ I` (the intercepts carry a far
//! smaller one), and [`RidgedInverse`] corrects for that in `K` directions at almost no cost: it is the
//! preconditioner of the conjugate-gradient solves above the dense threshold.

use std::sync::{Arc, OnceLock};

use ndarray::{s, Array1, Array2, ArrayView1, ArrayView2};
use serde::{Deserialize, Serialize};

/// `H ≈ B ⊗ A` (module docs); the eigendecompositions are computed on first use and cached.
#[derive(Serialize, Deserialize)]
pub struct KronFactors {
    /// Feature factor `A` (`p × p`), carrying the Hessian's trace.
    pub a: Array2<f64>,
    /// Class factor `B` (`K × K`), unit trace.
    pub b: Array2<f64>,
    #[serde(skip)]
    eig: OnceLock<Arc<KronEigen>>,
}

/// Eigendecompositions of both factors: `(values, vectors as columns)`.
#[derive(Debug)]
struct KronEigen {
    a_val: Array1<f64>,
    a_vec: Array2<f64>,
    b_val: Array1<f64>,
    b_vec: Array2<f64>,
}

impl Clone for KronFactors {
    fn clone(&self) -> Self {
        let eig = OnceLock::new();
        if let Some(e) = self.eig.get() {
            let _ = eig.set(Arc::clone(e));
        }
        Self {
            a: self.a.clone(),
            b: self.b.clone(),
            eig,
        }
    }
}

impl PartialEq for KronFactors {
    /// The cached eigendecompositions never make two factorisations differ.
    fn eq(&self, other: &Self) -> bool {
        self.a == other.a && self.b == other.b
    }
}

impl std::fmt::Debug for KronFactors {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("KronFactors")
            .field("p", &self.a.nrows())
            .field("k", &self.b.nrows())
            .finish()
    }
}

impl KronFactors {
    /// Factors from explicit matrices (`a` is `p × p`, `b` is `K × K`, both symmetric).
    pub fn new(a: Array2<f64>, b: Array2<f64>) -> Self {
        Self {
            a,
            b,
            eig: OnceLock::new(),
        }
    }

    /// The factors of the data Hessian of rows `phi` (`n × p`) with class probabilities `prob` (`n × K`),
    /// item weights `weight` (ones when `None`) and normaliser `norm` (module docs). Rows are processed in
    /// chunks so that memory stays at `p²` plus a chunk.
    pub fn from_data(
        phi: ArrayView2<'_, f64>,
        prob: ArrayView2<'_, f64>,
        weight: Option<ArrayView1<'_, f64>>,
        norm: f64,
    ) -> Self {
        let (n, p) = phi.dim();
        let k = prob.ncols();
        let mut a = Array2::<f64>::zeros((p, p));
        let mut b = Array2::<f64>::zeros((k, k));
        const CHUNK: usize = 4096;
        let mut start = 0;
        while start < n {
            let end = (start + CHUNK).min(n);
            let mut scaled = phi.slice(s![start..end, ..]).to_owned();
            for (r, i) in (start..end).enumerate() {
                let wn = weight.map_or(1.0, |w| w[i]) / norm;
                let pi = prob.row(i);
                let c = 1.0 - pi.dot(&pi);
                let f = (wn * c.max(0.0)).sqrt();
                scaled.row_mut(r).mapv_inplace(|v| v * f);
                for u in 0..k {
                    b[[u, u]] += wn * pi[u];
                    for v in 0..k {
                        b[[u, v]] -= wn * pi[u] * pi[v];
                    }
                }
            }
            a += &scaled.t().dot(&scaled);
            start = end;
        }
        let tb: f64 = b.diag().sum();
        if tb > 0.0 {
            b /= tb;
        }
        Self::new(a, b)
    }

    /// Dimensions `(p, K)`.
    pub fn dims(&self) -> (usize, usize) {
        (self.a.nrows(), self.b.nrows())
    }

    /// Numbers held (`p² + K²`), for memory accounting.
    pub fn len(&self) -> usize {
        self.a.len() + self.b.len()
    }

    /// Whether the factors are empty (`p = 0`).
    pub fn is_empty(&self) -> bool {
        self.a.is_empty()
    }

    /// The combination `w_a (B_a ⊗ A_a) ≈ …` of two trace-exact factorisations standing for the sum
    /// `w_a H_a + H_b`: `A = w_a A_a + A_b`, `B` the trace-weighted mean of `B_a` and `B_b` (unit trace
    /// again), so the trace stays exact.
    pub fn combine(&self, w_a: f64, other: &Self) -> Self {
        let ta = w_a * self.a.diag().sum();
        let tb = other.a.diag().sum();
        let a = &self.a * w_a + &other.a;
        let b = if ta + tb > 0.0 {
            (&self.b * ta + &other.b * tb) / (ta + tb)
        } else {
            self.b.clone()
        };
        Self::new(a, b)
    }

    /// `(B ⊗ A) v`, i.e. `B V A` with `V` the `K × p` reshaping of `v`.
    pub fn matvec(&self, v: &Array1<f64>) -> Array1<f64> {
        let (p, k) = self.dims();
        let vm = v
            .view()
            .into_shape_with_order((k, p))
            .expect("v has p·K entries");
        let out = self.b.dot(&vm.dot(&self.a));
        Array1::from(out.into_raw_vec_and_offset().0)
    }

    fn eigen(&self) -> Arc<KronEigen> {
        Arc::clone(self.eig.get_or_init(|| {
            let (a_val, a_vec) = sym_eigen(&self.a);
            let (b_val, b_vec) = sym_eigen(&self.b);
            Arc::new(KronEigen {
                a_val,
                a_vec,
                b_val,
                b_vec,
            })
        }))
    }

    /// Compute (and cache) the eigendecompositions now, so that clones made afterwards share them.
    pub fn prepare(&self) {
        let _ = self.eigen();
    }

    /// Solve `(s B ⊗ A + μ I) x = v` exactly through the eigendecompositions (module docs). Eigenvalues
    /// below zero (round-off of a semidefinite factor) count as zero; `μ > 0` keeps the system definite.
    pub fn solve_damped(&self, s: f64, mu: f64, v: &Array1<f64>) -> Array1<f64> {
        // The ridged inverse with the same ridge everywhere: no correction, the formula above.
        self.ridged_inverse(s, mu, mu).apply(v)
    }

    /// The exact inverse of `s B ⊗ A + D`, where the ridge `D` is `μ` on every weight and `r` on the
    /// intercepts (the last feature of each class block, as the learner's penalty has it): see
    /// [`RidgedInverse`]. `μ > 0`, `r > 0`.
    pub fn ridged_inverse(&self, s: f64, mu: f64, r: f64) -> RidgedInverse {
        RidgedInverse::new(self.eigen(), s, mu, r)
    }
}

/// `(s B ⊗ A + D)⁻¹` for the learner's ridge `D = μ I + (r − μ) U Uᵀ`, `U = [e_(k, p−1)]_k` the `K`
/// intercept coordinates.
///
/// [`KronFactors::solve_damped`] inverts `M = s B ⊗ A + μ I`. The learner's penalty is not `μ I`: the
/// intercepts carry a ridge `r ≪ μ` (`INTERCEPT_RIDGE`), so `M` differs from the pool's curvature plus
/// penalty in `K` directions, and a conjugate-gradient solve preconditioned by `M⁻¹` pays about `K`
/// iterations for them (`bench scale`: 4,506 against 1,002 iterations at 384 × 20). The Woodbury identity
/// (Woodbury 1950; Golub & Van Loan, *Matrix Computations*, 4th ed., §2.1.4) corrects `M` in those `K`
/// directions:
///
/// ```text
///   (M + U C Uᵀ)⁻¹ = M⁻¹ − M⁻¹ U (C⁻¹ + Uᵀ M⁻¹ U)⁻¹ Uᵀ M⁻¹,      C = (r − μ) I_K.
/// ```
///
/// With `M⁻¹ = (U_B ⊗ U_A) Λ⁻¹ (U_B ⊗ U_A)ᵀ` and `α = U_Aᵀ e_(p−1)` (the last row of `U_A`), every piece is
/// cheap: `Uᵀ M⁻¹ U = U_B diag(σ) U_Bᵀ` with `σ_u = Σ_j α_j² / (s b_u a_j + μ)`; `Uᵀ M⁻¹ v` is the intercept
/// column of `M⁻¹ v`; and `M⁻¹ U w` is, in the eigenbasis, the rank-one matrix `(U_Bᵀ w) αᵀ ⊘ Λ`, subtracted
/// before the one transformation back. So a product costs what `solve_damped` costs, plus `O(K p + K²)`.
/// The capacitance `C⁻¹ + Uᵀ M⁻¹ U` is negative definite (`Uᵀ M⁻¹ U ⪯ I/μ < I/(μ − r)`), so its negation
/// is factored by Cholesky, once.
pub struct RidgedInverse {
    eig: Arc<KronEigen>,
    /// `1 / (s b_u a_j + μ)`, `K × p`.
    inv: Array2<f64>,
    /// `α`: the intercept's row of `U_A`.
    alpha: Array1<f64>,
    /// Cholesky factor of `−(C⁻¹ + Uᵀ M⁻¹ U)`; `None` when `r = μ` (no correction).
    cap: Option<crate::model::linalg::Cholesky>,
}

impl RidgedInverse {
    fn new(eig: Arc<KronEigen>, s: f64, mu: f64, r: f64) -> Self {
        let (p, k) = (eig.a_val.len(), eig.b_val.len());
        let inv = Array2::from_shape_fn((k, p), |(u, j)| {
            1.0 / (s * eig.b_val[u].max(0.0) * eig.a_val[j].max(0.0) + mu)
        });
        let alpha = if p > 0 {
            eig.a_vec.row(p - 1).to_owned()
        } else {
            Array1::zeros(0)
        };
        let cap = (r != mu && p > 0).then(|| {
            // σ_u = Σ_j α_j² / λ_uj
            let a2 = alpha.mapv(|a| a * a);
            let sigma = inv.dot(&a2);
            // −(C⁻¹ + U_B diag(σ) U_Bᵀ) = I/(μ − r) − U_B diag(σ) U_Bᵀ
            let scaled = &eig.b_vec * &sigma.view().insert_axis(ndarray::Axis(0));
            let mut neg = -scaled.dot(&eig.b_vec.t());
            for u in 0..k {
                neg[[u, u]] += 1.0 / (mu - r);
            }
            crate::model::linalg::Cholesky::factor(neg)
        });
        Self {
            eig,
            inv,
            alpha,
            cap: cap.flatten(),
        }
    }

    /// `(s B ⊗ A + D)⁻¹ v` (type docs).
    pub fn apply(&self, v: &Array1<f64>) -> Array1<f64> {
        let e = &self.eig;
        let (k, p) = self.inv.dim();
        let vm = v
            .view()
            .into_shape_with_order((k, p))
            .expect("v has p·K entries");
        let out = self
            .apply_in_frame(vm.dot(&e.a_vec).view())
            .dot(&e.a_vec.t());
        Array1::from(out.into_raw_vec_and_offset().0)
    }

    /// The same inverse for `Ṽ = V U_A` (`K × p`, the feature factor's eigenbasis; see [`FeatureFrame`]):
    /// returns `X̃ = X U_A`. Only the class factor's basis changes remain, `O(K² p)`.
    fn apply_in_frame(&self, vt: ArrayView2<'_, f64>) -> Array2<f64> {
        let e = &self.eig;
        // Λ⁻¹ (U_Bᵀ Ṽ): M⁻¹ v in the eigenbasis.
        let mut m = e.b_vec.t().dot(&vt);
        m *= &self.inv;
        if let Some(cap) = &self.cap {
            // t = Uᵀ M⁻¹ v = U_B (m α); w = (C⁻¹ + Uᵀ M⁻¹ U)⁻¹ t = −cap⁻¹ t; subtract M⁻¹ U w.
            let t = e.b_vec.dot(&m.dot(&self.alpha));
            let w = -cap.solve(&t);
            let bw = e.b_vec.t().dot(&w);
            for (u, mut row) in m.rows_mut().into_iter().enumerate() {
                for ((x, &a), &iv) in row.iter_mut().zip(&self.alpha).zip(self.inv.row(u)) {
                    *x -= bw[u] * a * iv;
                }
            }
        }
        e.b_vec.dot(&m)
    }
}

/// The learner's system in the eigenbasis of the feature factor: coordinates `θ̃ = (I_K ⊗ U_Aᵀ) θ`, i.e.
/// `Ṽ = V U_A` for the `K × p` reshaping `V` of `θ`. The change of basis is orthogonal, so norms, inner
/// products and conjugate-gradient residuals are the same in both; what changes is the cost of the pool's
/// term, which is diagonal in the features there:
///
/// ```text
///   (I ⊗ U_Aᵀ)(s B ⊗ A + D)(I ⊗ U_A) ṽ  =  s B Ṽ diag(a) + μ Ṽ + (r − μ) (Ṽ α) αᵀ,
/// ```
///
/// with `D = μ I + (r − μ) U Uᵀ` the learner's ridge (weights `μ`, intercepts `r`; [`RidgedInverse`]) and
/// `α = U_Aᵀ e_(p−1)` the intercept's coordinate in the frame. A product costs `O(K² p)` instead of the
/// `2 K p²` of `B V A`, and the preconditioner's two feature basis changes disappear. The data rows enter
/// through their rotated features `Φ̃ = Φ U_A` (computed once per batch, `n p²`): the data Hessian's
/// product `Φᵀ(…Φ V…)` becomes `Φ̃ᵀ(…Φ̃ Ṽ…)`. A conjugate-gradient solve then rotates its right-hand side
/// and warm start in and its solution out (`3 K p²` per solve rather than per iteration).
pub struct FeatureFrame {
    inverse: RidgedInverse,
    /// The class factor `B`.
    b: Array2<f64>,
    scale: f64,
    mu: f64,
    r: f64,
}

impl KronFactors {
    /// The frame of `s B ⊗ A + D` (weights' ridge `μ`, intercepts' `r`; see [`FeatureFrame`]).
    pub fn frame(&self, s: f64, mu: f64, r: f64) -> FeatureFrame {
        FeatureFrame {
            inverse: self.ridged_inverse(s, mu, r),
            b: self.b.clone(),
            scale: s,
            mu,
            r,
        }
    }
}

impl FeatureFrame {
    fn dims(&self) -> (usize, usize) {
        self.inverse.inv.dim()
    }

    fn as_matrix<'v>(&self, v: &'v Array1<f64>) -> ArrayView2<'v, f64> {
        let (k, p) = self.dims();
        v.view()
            .into_shape_with_order((k, p))
            .expect("v has p·K entries")
    }

    /// `ṽ`: `v` in the frame (`V U_A`).
    pub fn into_frame(&self, v: &Array1<f64>) -> Array1<f64> {
        let out = self.as_matrix(v).dot(&self.inverse.eig.a_vec);
        Array1::from(out.into_raw_vec_and_offset().0)
    }

    /// `v` from its frame coordinates `ṽ` (`Ṽ U_Aᵀ`).
    pub fn out_of_frame(&self, vt: &Array1<f64>) -> Array1<f64> {
        let out = self.as_matrix(vt).dot(&self.inverse.eig.a_vec.t());
        Array1::from(out.into_raw_vec_and_offset().0)
    }

    /// Rows of mapped features in the frame: `Φ U_A` (`n × p`).
    pub fn rotate_rows(&self, phi: ArrayView2<'_, f64>) -> Array2<f64> {
        phi.dot(&self.inverse.eig.a_vec)
    }

    /// `(s B ⊗ A + D) v` in the frame (type docs).
    pub fn pool_and_ridge_dot(&self, vt: &Array1<f64>) -> Array1<f64> {
        let e = &self.inverse.eig;
        let v = self.as_matrix(vt);
        let a = e.a_val.mapv(|x| self.scale * x);
        let mut out = self.b.dot(&v) * a.view().insert_axis(ndarray::Axis(0));
        out.scaled_add(self.mu, &v);
        if self.r != self.mu {
            let alpha = &self.inverse.alpha;
            let va = v.dot(alpha);
            for (mut row, &t) in out.rows_mut().into_iter().zip(&va) {
                row.scaled_add((self.r - self.mu) * t, alpha);
            }
        }
        Array1::from(out.into_raw_vec_and_offset().0)
    }

    /// `(s B ⊗ A + D)⁻¹ v` in the frame: the preconditioner ([`RidgedInverse`]) without its feature basis
    /// changes.
    pub fn precondition(&self, vt: &Array1<f64>) -> Array1<f64> {
        let out = self.inverse.apply_in_frame(self.as_matrix(vt));
        Array1::from(out.into_raw_vec_and_offset().0)
    }
}

/// Eigendecomposition of a symmetric matrix: `(values, vectors)` with `a = V diag(values) Vᵀ`, vectors as
/// columns, values ascending.
///
/// Householder reduction to tridiagonal form followed by the implicit QL method with shifts (Wilkinson &
/// Reinsch, *Handbook for Automatic Computation, Vol. II: Linear Algebra*, 1971, procedures `tred2` and
/// `tql2`; written here after the public-domain JAMA translation). About `(4/3 + 3) p³` flops.
pub fn sym_eigen(a: &Array2<f64>) -> (Array1<f64>, Array2<f64>) {
    let n = a.nrows();
    if n == 0 {
        return (Array1::zeros(0), Array2::zeros((0, 0)));
    }
    let mut v = a.clone();
    let mut d = vec![0.0; n];
    let mut e = vec![0.0; n];
    tred2(&mut v, &mut d, &mut e);
    // QL rotations act on columns of V; work on Vᵀ so that each rotation touches two contiguous rows.
    let mut z = v.t().as_standard_layout().into_owned();
    tql2(&mut z, &mut d, &mut e);
    (Array1::from(d), z.reversed_axes())
}

/// Householder tridiagonalisation (`tred2`): on return `v` holds the orthogonal transformation, `d` the
/// diagonal and `e[1..]` the subdiagonal. Index loops follow the published procedure line by line.
#[allow(clippy::needless_range_loop)]
fn tred2(v: &mut Array2<f64>, d: &mut [f64], e: &mut [f64]) {
    let n = d.len();
    for j in 0..n {
        d[j] = v[[n - 1, j]];
    }
    for i in (1..n).rev() {
        let mut scale = 0.0;
        let mut h = 0.0;
        for dk in d.iter().take(i) {
            scale += dk.abs();
        }
        if scale == 0.0 {
            e[i] = d[i - 1];
            for j in 0..i {
                d[j] = v[[i - 1, j]];
                v[[i, j]] = 0.0;
                v[[j, i]] = 0.0;
            }
        } else {
            for dk in d.iter_mut().take(i) {
                *dk /= scale;
                h += *dk * *dk;
            }
            let mut f = d[i - 1];
            let mut g = h.sqrt();
            if f > 0.0 {
                g = -g;
            }
            e[i] = scale * g;
            h -= f * g;
            d[i - 1] = f - g;
            for ej in e.iter_mut().take(i) {
                *ej = 0.0;
            }
            for j in 0..i {
                f = d[j];
                v[[j, i]] = f;
                g = e[j] + v[[j, j]] * f;
                for k in j + 1..i {
                    g += v[[k, j]] * d[k];
                    e[k] += v[[k, j]] * f;
                }
                e[j] = g;
            }
            f = 0.0;
            for j in 0..i {
                e[j] /= h;
                f += e[j] * d[j];
            }
            let hh = f / (h + h);
            for j in 0..i {
                e[j] -= hh * d[j];
            }
            for j in 0..i {
                f = d[j];
                g = e[j];
                for k in j..i {
                    v[[k, j]] -= f * e[k] + g * d[k];
                }
                d[j] = v[[i - 1, j]];
                v[[i, j]] = 0.0;
            }
        }
        d[i] = h;
    }
    for i in 0..n - 1 {
        v[[n - 1, i]] = v[[i, i]];
        v[[i, i]] = 1.0;
        let h = d[i + 1];
        if h != 0.0 {
            for k in 0..=i {
                d[k] = v[[k, i + 1]] / h;
            }
            for j in 0..=i {
                let mut g = 0.0;
                for k in 0..=i {
                    g += v[[k, i + 1]] * v[[k, j]];
                }
                for k in 0..=i {
                    v[[k, j]] -= g * d[k];
                }
            }
        }
        for k in 0..=i {
            v[[k, i + 1]] = 0.0;
        }
    }
    for j in 0..n {
        d[j] = v[[n - 1, j]];
        v[[n - 1, j]] = 0.0;
    }
    v[[n - 1, n - 1]] = 1.0;
    e[0] = 0.0;
}

/// Implicit QL with shifts on the tridiagonal `(d, e)` (`tql2`), accumulating the rotations into the rows
/// of `z` (the transposed eigenvector matrix); on return `d` holds the eigenvalues, ascending, and row `i`
/// of `z` the eigenvector of `d[i]`.
#[allow(clippy::needless_range_loop)]
fn tql2(z: &mut Array2<f64>, d: &mut [f64], e: &mut [f64]) {
    let n = d.len();
    for i in 1..n {
        e[i - 1] = e[i];
    }
    e[n - 1] = 0.0;
    let mut f = 0.0;
    let mut tst1 = 0.0f64;
    let eps = f64::EPSILON;
    for l in 0..n {
        tst1 = tst1.max(d[l].abs() + e[l].abs());
        let mut m = l;
        while m < n - 1 && e[m].abs() > eps * tst1 {
            m += 1;
        }
        if m > l {
            let mut iter = 0;
            loop {
                iter += 1;
                let mut g = d[l];
                let mut p = (d[l + 1] - g) / (2.0 * e[l]);
                let mut r = p.hypot(1.0);
                if p < 0.0 {
                    r = -r;
                }
                d[l] = e[l] / (p + r);
                d[l + 1] = e[l] * (p + r);
                let dl1 = d[l + 1];
                let mut h = g - d[l];
                for di in d.iter_mut().skip(l + 2) {
                    *di -= h;
                }
                f += h;
                p = d[m];
                let mut c = 1.0;
                let mut c2 = c;
                let mut c3 = c;
                let el1 = e[l + 1];
                let mut s = 0.0;
                let mut s2 = 0.0;
                for i in (l..m).rev() {
                    c3 = c2;
                    c2 = c;
                    s2 = s;
                    g = c * e[i];
                    h = c * p;
                    r = p.hypot(e[i]);
                    e[i + 1] = s * r;
                    s = e[i] / r;
                    c = p / r;
                    p = c * d[i] - s * g;
                    d[i + 1] = h + s * (c * g + s * d[i]);
                    // Rotate rows i and i+1 of Z (columns of the eigenvector matrix).
                    let (mut lo, mut hi) = z.multi_slice_mut((s![i, ..], s![i + 1, ..]));
                    ndarray::Zip::from(&mut lo)
                        .and(&mut hi)
                        .for_each(|zi, zi1| {
                            let h = *zi1;
                            *zi1 = s * *zi + c * h;
                            *zi = c * *zi - s * h;
                        });
                }
                p = -s * s2 * c3 * el1 * e[l] / dl1;
                e[l] = s * p;
                d[l] = c * p;
                if e[l].abs() <= eps * tst1 || iter > 60 {
                    break;
                }
            }
        }
        d[l] += f;
        e[l] = 0.0;
    }
    // Sort ascending (selection sort on values, swapping rows of Z).
    for i in 0..n.saturating_sub(1) {
        let mut kmin = i;
        for j in i + 1..n {
            if d[j] < d[kmin] {
                kmin = j;
            }
        }
        if kmin != i {
            d.swap(i, kmin);
            let (mut a, mut b) = z.multi_slice_mut((s![i, ..], s![kmin, ..]));
            ndarray::Zip::from(&mut a)
                .and(&mut b)
                .for_each(std::mem::swap);
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::model::learner::{predict_proba, Objective};
    use rand::{Rng, SeedableRng};

    fn random_rows(n: usize, p: usize, seed: u64) -> Array2<f64> {
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(seed);
        let mut x = Array2::from_shape_fn((n, p), |_| rng.random_range(-1.0..1.0));
        x.column_mut(p - 1).fill(1.0);
        x
    }

    fn max_abs(a: &Array2<f64>) -> f64 {
        a.iter().fold(0.0f64, |m, v| m.max(v.abs()))
    }

    /// The dense `B ⊗ A` in the learner's layout: block `(k, l)` is `B[k, l] A`.
    fn dense_kron(f: &KronFactors) -> Array2<f64> {
        let (p, k) = f.dims();
        let mut h = Array2::zeros((p * k, p * k));
        for u in 0..k {
            for v in 0..k {
                h.slice_mut(s![u * p..(u + 1) * p, v * p..(v + 1) * p])
                    .assign(&(&f.a * f.b[[u, v]]));
            }
        }
        h
    }

    /// Reconstruction `V diag(λ) Vᵀ = A` and orthonormality `VᵀV = I` on a random symmetric matrix, and
    /// the eigenvalues of a 2 × 2 case worked by hand: [[2, 1], [1, 2]] has eigenvalues 1 and 3.
    #[test]
    fn symmetric_eigendecomposition_reconstructs_the_matrix() {
        let m = random_rows(40, 30, 1);
        let a = m.t().dot(&m) - Array2::<f64>::eye(30) * 3.0;
        let (val, vec) = sym_eigen(&a);
        let back = vec.dot(&Array2::from_diag(&val)).dot(&vec.t());
        assert!(
            max_abs(&(&back - &a)) < 1e-10 * max_abs(&a),
            "reconstruction"
        );
        let eye = vec.t().dot(&vec);
        assert!(
            max_abs(&(&eye - &Array2::<f64>::eye(30))) < 1e-12,
            "orthonormal"
        );
        assert!(
            val.windows(2).into_iter().all(|w| w[0] <= w[1]),
            "ascending"
        );
        let (v2, _) = sym_eigen(&ndarray::array![[2.0, 1.0], [1.0, 2.0]]);
        assert!(
            (v2[0] - 1.0).abs() < 1e-14 && (v2[1] - 3.0).abs() < 1e-14,
            "{v2}"
        );
    }

    /// Two classes: every item's class curvature is a multiple of one matrix, so `B ⊗ A` equals the exact
    /// data Hessian (module docs). Checked against the dense Hessian the learner assembles.
    #[test]
    fn factors_are_exact_for_two_classes() {
        let phi = random_rows(50, 6, 2);
        let theta = Array1::from_shape_fn(12, |i| ((i * 7) % 5) as f64 * 0.3 - 0.6);
        let prob = predict_proba(phi.view(), &theta, 2);
        let w = Array1::from_shape_fn(50, |i| 0.5 + (i % 3) as f64);
        let y = Array2::zeros((50, 2));
        let obj = Objective {
            phi: phi.view(),
            y: y.view(),
            weight: Some(w.view()),
            norm: 50.0,
            l2: 0.0,
            prior: None,
        };
        let exact = obj.data_hessian(prob.view());
        let f = KronFactors::from_data(phi.view(), prob.view(), Some(w.view()), 50.0);
        let approx = dense_kron(&f);
        assert!(
            max_abs(&(&approx - &exact)) < 1e-12 * max_abs(&exact),
            "max diff {}",
            max_abs(&(&approx - &exact))
        );
    }

    /// Identical class probabilities on every row (`θ` with only intercepts): exact for any `K`.
    #[test]
    fn factors_are_exact_when_every_item_has_the_same_probabilities() {
        let (p, k) = (5, 4);
        let phi = random_rows(30, p, 3);
        let mut theta = Array1::zeros(p * k);
        for c in 0..k {
            theta[c * p + p - 1] = c as f64 * 0.4;
        }
        let prob = predict_proba(phi.view(), &theta, k);
        let y = Array2::zeros((30, k));
        let obj = Objective {
            phi: phi.view(),
            y: y.view(),
            weight: None,
            norm: 30.0,
            l2: 0.0,
            prior: None,
        };
        let exact = obj.data_hessian(prob.view());
        let f = KronFactors::from_data(phi.view(), prob.view(), None, 30.0);
        assert!(max_abs(&(&dense_kron(&f) - &exact)) < 1e-12 * max_abs(&exact));
    }

    /// In general the factors are not exact, but the trace is (module docs), and the product and the
    /// damped solve agree with the dense matrices they stand for.
    #[test]
    fn trace_is_exact_and_products_match_the_dense_kronecker_matrix() {
        let (p, k) = (6, 5);
        let phi = random_rows(60, p, 4);
        let theta = Array1::from_shape_fn(p * k, |i| ((i * 13) % 7) as f64 * 0.2 - 0.6);
        let prob = predict_proba(phi.view(), &theta, k);
        let y = Array2::zeros((60, k));
        let obj = Objective {
            phi: phi.view(),
            y: y.view(),
            weight: None,
            norm: 60.0,
            l2: 0.0,
            prior: None,
        };
        let exact = obj.data_hessian(prob.view());
        let f = KronFactors::from_data(phi.view(), prob.view(), None, 60.0);
        let dense = dense_kron(&f);
        let (t_exact, t_kron) = (exact.diag().sum(), dense.diag().sum());
        assert!(
            (t_exact - t_kron).abs() < 1e-12 * t_exact,
            "{t_exact} vs {t_kron}"
        );
        let v = Array1::from_shape_fn(p * k, |i| (i as f64 * 0.37).sin());
        let mv = f.matvec(&v);
        let dv = dense.dot(&v);
        assert!(mv.iter().zip(&dv).all(|(a, b)| (a - b).abs() < 1e-12));
        let (s_, mu) = (0.7, 1e-2);
        let x = f.solve_damped(s_, mu, &v);
        let back = dense.dot(&x) * s_ + &x * mu;
        assert!(
            back.iter().zip(&v).all(|(a, b)| (a - b).abs() < 1e-9),
            "damped solve residual"
        );
    }

    /// The ridged inverse solves `(s B ⊗ A + D) x = v` with the learner's ridge (`μ` on weights, `r` on
    /// the intercepts) to round-off, checked against the dense matrix; without the Woodbury correction
    /// (`solve_damped`, which assumes `D = μ I`) the residual is far larger, so the test fails if the
    /// correction is dropped or its sign flipped. Also with `r = μ`, where no correction is needed.
    #[test]
    fn the_ridged_inverse_is_exact_with_the_learners_intercept_ridge() {
        let (p, k) = (6, 5);
        let phi = random_rows(80, p, 9);
        let theta = Array1::from_shape_fn(p * k, |i| ((i * 11) % 5) as f64 * 0.3 - 0.6);
        let prob = predict_proba(phi.view(), &theta, k);
        let f = KronFactors::from_data(phi.view(), prob.view(), None, 80.0);
        let dense = dense_kron(&f);
        let v = Array1::from_shape_fn(p * k, |i| (i as f64 * 0.61).cos());
        let (s_, mu) = (0.9, 1e-2);
        for r in [1e-4, 1e-8, mu] {
            let ridge = Array1::from_shape_fn(p * k, |i| if i % p == p - 1 { r } else { mu });
            let system = |x: &Array1<f64>| dense.dot(x) * s_ + &(&ridge * x);
            let x = f.ridged_inverse(s_, mu, r).apply(&v);
            let res = &system(&x) - &v;
            let rel = res.dot(&res).sqrt() / v.dot(&v).sqrt();
            assert!(rel < 1e-7, "r = {r}: relative residual {rel:e}");
            if r != mu {
                let plain = f.solve_damped(s_, mu, &v);
                let res = &system(&plain) - &v;
                let rel_plain = res.dot(&res).sqrt() / v.dot(&v).sqrt();
                assert!(
                    rel_plain > 1e-3,
                    "r = {r}: the uncorrected inverse should miss ({rel_plain:e})"
                );
            }
        }
    }

    /// The feature frame holds the same system as the original coordinates: the rotation is orthogonal
    /// (in and out is the identity, norms kept); the pool's term with the ridge, the preconditioner and
    /// the data rows' Hessian-vector product in the frame equal the rotated originals (the dense Kronecker
    /// matrix and the objective's own product); and CG in the frame, rotated back, solves the original
    /// system. Worked from the definitions on a small problem whose intercept ridge differs from the
    /// weights' (`r = 1e-8`, `μ = 1e-2`), as the learner's does.
    #[test]
    fn the_feature_frame_holds_the_same_system() {
        use crate::model::learner::Quadratic;
        use crate::model::linalg::conjugate_gradient_with;
        let (p, k) = (6, 4);
        let phi = random_rows(70, p, 31);
        let theta = Array1::from_shape_fn(p * k, |i| ((i * 5) % 7) as f64 * 0.2 - 0.6);
        let prob = predict_proba(phi.view(), &theta, k);
        let f = KronFactors::from_data(phi.view(), prob.view(), None, 70.0);
        let (s_, mu, r) = (0.7, 1e-2, 1e-8);
        let frame = f.frame(s_, mu, r);
        let v = Array1::from_shape_fn(p * k, |i| (i as f64 * 0.37).sin() + 0.1);
        let close_to = |a: &Array1<f64>, b: &Array1<f64>, what: &str, tol: f64| {
            let d = a - b;
            let rel = d.dot(&d).sqrt() / b.dot(b).sqrt().max(1e-300);
            assert!(rel < tol, "{what}: relative difference {rel:e}");
        };
        let close = |a: &Array1<f64>, b: &Array1<f64>, what: &str| close_to(a, b, what, 1e-10);
        let vt = frame.into_frame(&v);
        close(&frame.out_of_frame(&vt), &v, "in and out");
        assert!((vt.dot(&vt) - v.dot(&v)).abs() < 1e-10 * v.dot(&v));
        // (s B ⊗ A + D) v, densely.
        let ridge = Array1::from_shape_fn(p * k, |i| if i % p == p - 1 { r } else { mu });
        let system = dense_kron(&f).dot(&v) * s_ + &(&ridge * &v);
        close(
            &frame.pool_and_ridge_dot(&vt),
            &frame.into_frame(&system),
            "pool term and ridge",
        );
        close(
            &frame.precondition(&vt),
            &frame.into_frame(&f.ridged_inverse(s_, mu, r).apply(&v)),
            "preconditioner",
        );
        // Data rows: the objective's product with its own rows, against the rotated rows in the frame.
        let (center, grad, hess) = (
            Array1::zeros(p * k),
            Array1::zeros(p * k),
            Array2::zeros((0, 0)),
        );
        let rows = random_rows(25, p, 32);
        let labels = Array2::from_elem((25, k), 1.0 / k as f64);
        let row_prob = predict_proba(rows.view(), &theta, k);
        let obj = Objective {
            phi: rows.view(),
            y: labels.view(),
            weight: None,
            norm: 95.0,
            l2: mu,
            prior: Some(Quadratic {
                scale: s_,
                center: center.view(),
                grad: grad.view(),
                hess: hess.view(),
                kron: Some(&f),
            }),
        };
        let rotated = frame.rotate_rows(rows.view());
        close(
            &obj.data_hvp(rotated.view(), row_prob.view(), &vt),
            &frame.into_frame(&obj.data_hvp(rows.view(), row_prob.view(), &v)),
            "data rows",
        );
        // The whole solve: CG in the frame, rotated back, against CG in the original coordinates.
        let in_frame = conjugate_gradient_with(
            |x| obj.data_hvp(rotated.view(), row_prob.view(), x) + frame.pool_and_ridge_dot(x),
            &vt,
            None,
            |x| frame.precondition(x),
            1e-12,
            500,
        );
        let original = conjugate_gradient_with(
            |x| obj.hvp(row_prob.view(), x),
            &v,
            None,
            |x| f.ridged_inverse(s_, mu, r).apply(x),
            1e-12,
            500,
        );
        assert!(in_frame.converged && original.converged);
        // Two CG runs to a residual of 1e-12 on a system whose intercept ridge makes it ill-conditioned
        // (about 1e8): their solutions agree to about the residual times the condition number.
        close_to(
            &frame.out_of_frame(&in_frame.x),
            &original.x,
            "solution",
            1e-7,
        );
    }

    /// When the pool's quadratic is the whole curvature (no data rows), the learner's preconditioner is
    /// the exact inverse of the Hessian, so preconditioned conjugate gradients stop after one iteration;
    /// with the uncorrected `(s B ⊗ A + λ I)⁻¹` they need one iteration per distinct eigenvalue of the
    /// preconditioned system that the intercept ridge splits off (more than `K` here).
    #[test]
    fn the_learners_preconditioner_inverts_a_pool_only_hessian_in_one_iteration() {
        use crate::model::learner::Quadratic;
        use crate::model::linalg::conjugate_gradient_with;
        let (p, k) = (7, 6);
        let phi = random_rows(90, p, 21);
        let theta = Array1::from_shape_fn(p * k, |i| ((i * 7) % 9) as f64 * 0.25 - 1.0);
        let prob = predict_proba(phi.view(), &theta, k);
        let f = KronFactors::from_data(phi.view(), prob.view(), None, 90.0);
        let (center, grad) = (Array1::zeros(p * k), Array1::zeros(p * k));
        let hess = Array2::zeros((0, 0));
        let (no_rows, no_labels) = (Array2::zeros((0, p)), Array2::zeros((0, k)));
        let obj = Objective {
            phi: no_rows.view(),
            y: no_labels.view(),
            weight: None,
            norm: 1.0,
            l2: 1e-3,
            prior: Some(Quadratic {
                scale: 0.8,
                center: center.view(),
                grad: grad.view(),
                hess: hess.view(),
                kron: Some(&f),
            }),
        };
        let b = Array1::from_shape_fn(p * k, |i| (i as f64 * 0.43).sin());
        let solve = |pre: &dyn Fn(&Array1<f64>) -> Array1<f64>| {
            conjugate_gradient_with(|v| obj.hvp(no_labels.view(), v), &b, None, pre, 1e-8, 500)
        };
        let pre = crate::model::truncated::kron_preconditioner(&obj);
        let exact = solve(&pre);
        assert!(exact.converged && exact.iterations <= 1, "{exact:?}");
        let plain = solve(&|r: &Array1<f64>| f.solve_damped(0.8, 1e-3, r));
        assert!(plain.converged && plain.iterations > k, "{plain:?}");
    }
}
