//! Small dense linear algebra: Cholesky, conjugate gradients, projection onto the simplex.
//!
//! Written here rather than pulled from a LAPACK binding so that a plain `cargo build` needs no system
//! BLAS; the matrices are at most a few thousand rows (the learner's parameter count).

use ndarray::{Array1, Array2};

/// Lower-triangular Cholesky factor `L` of a symmetric positive definite `A = L Lᵀ`.
#[derive(Debug, Clone, PartialEq)]
pub struct Cholesky {
    l: Array2<f64>,
}

impl Cholesky {
    /// Factor `a` (consumed; only its lower triangle is read). `None` if `a` is not numerically positive
    /// definite (a pivot ≤ 1e-300 or not finite).
    ///
    /// `L_jj = √(A_jj − Σ_{k<j} L_jk²)`, `L_ij = (A_ij − Σ_{k<j} L_ik L_jk) / L_jj` for `i > j`
    /// (column-by-column, Cholesky–Banachiewicz on rows for cache locality).
    pub fn factor(mut a: Array2<f64>) -> Option<Self> {
        let n = a.nrows();
        if n != a.ncols() {
            return None;
        }
        for i in 0..n {
            for j in 0..=i {
                let sum = {
                    let ri = a.row(i);
                    let rj = a.row(j);
                    let (ri, rj) = (ri.as_slice()?, rj.as_slice()?);
                    a[[i, j]] - dot(&ri[..j], &rj[..j])
                };
                if i == j {
                    if !sum.is_finite() || sum <= 1e-300 {
                        return None;
                    }
                    a[[i, i]] = sum.sqrt();
                } else {
                    a[[i, j]] = sum / a[[j, j]];
                }
            }
            for j in i + 1..n {
                a[[i, j]] = 0.0;
            }
        }
        Some(Self { l: a })
    }

    /// Dimension of the factored matrix.
    pub fn dim(&self) -> usize {
        self.l.nrows()
    }

    /// Solve `L z = b` (forward substitution only): `z_i = (b_i − L_{i,<i}·z_{<i}) / L_ii`.
    pub fn solve_lower(&self, b: &Array1<f64>) -> Array1<f64> {
        let n = self.dim();
        let mut z: Vec<f64> = b.to_vec();
        let l = self.l.as_slice().expect("standard layout");
        for i in 0..n {
            let s = dot(&l[i * n..i * n + i], &z[..i]);
            z[i] = (z[i] - s) / l[i * n + i];
        }
        Array1::from(z)
    }

    /// Solve `A x = b` by forward (`L z = b`) and back (`Lᵀ x = z`) substitution.
    ///
    /// Both walk the rows of `L` contiguously: the forward pass as dot products, `z_i = (b_i − L_{i,<i}·z_{<i})
    /// / L_ii`; the backward pass in column (axpy) form, `x_i = z_i / L_ii` then `z_{<i} −= x_i L_{i,<i}` for
    /// `i = n−1, …, 0`, since row `i` of `L` is column `i` of `Lᵀ`. One copy of the factor is read twice.
    pub fn solve(&self, b: &Array1<f64>) -> Array1<f64> {
        let n = self.dim();
        let mut z: Vec<f64> = b.to_vec();
        let l = self.l.as_slice().expect("standard layout");
        for i in 0..n {
            let s = dot(&l[i * n..i * n + i], &z[..i]);
            z[i] = (z[i] - s) / l[i * n + i];
        }
        for i in (0..n).rev() {
            let xi = z[i] / l[i * n + i];
            z[i] = xi;
            for (zj, &lij) in z[..i].iter_mut().zip(&l[i * n..i * n + i]) {
                *zj -= xi * lij;
            }
        }
        Array1::from(z)
    }
}

/// `Σ_i a_i b_i` over the shorter of the two slices, with eight independent partial sums so that the
/// compiler can keep them in vector registers (a single running sum is a serial dependency chain that
/// floating-point rules forbid it to reorder). The summation order differs from left-to-right, which
/// changes the result only by rounding.
pub fn dot(a: &[f64], b: &[f64]) -> f64 {
    let n = a.len().min(b.len());
    let (a, b) = (&a[..n], &b[..n]);
    let mut acc = [0.0f64; 8];
    let (ca, cb) = (a.chunks_exact(8), b.chunks_exact(8));
    let (ra, rb) = (ca.remainder(), cb.remainder());
    for (x, y) in ca.zip(cb) {
        for l in 0..8 {
            acc[l] += x[l] * y[l];
        }
    }
    let mut tail = 0.0;
    for (x, y) in ra.iter().zip(rb) {
        tail += x * y;
    }
    ((acc[0] + acc[4]) + (acc[1] + acc[5])) + ((acc[2] + acc[6]) + (acc[3] + acc[7])) + tail
}

/// Result of a conjugate-gradient solve.
#[derive(Debug, Clone)]
pub struct CgResult {
    /// The approximate solution.
    pub x: Array1<f64>,
    /// Iterations used.
    pub iterations: usize,
    /// Whether `‖r‖ ≤ tol · ‖b‖` was reached.
    pub converged: bool,
    /// Final relative residual `‖b − A x‖ / ‖b‖`.
    pub relative_residual: f64,
}

/// Preconditioned conjugate gradients for `A x = b` with `A` symmetric positive definite, given only as
/// the product `v ↦ A v` (Hestenes & Stiefel 1952; the preconditioned form as in Barrett et al.,
/// *Templates for the Solution of Linear Systems*, 1994). The A-norm error after `k` steps is at most
/// `2((√κ − 1)/(√κ + 1))^k` times the initial one.
pub fn conjugate_gradient(
    apply: impl Fn(&Array1<f64>) -> Array1<f64>,
    b: &Array1<f64>,
    x0: Option<Array1<f64>>,
    precond: Option<&Cholesky>,
    tol: f64,
    max_iters: usize,
) -> CgResult {
    let pre = |r: &Array1<f64>| match precond {
        Some(c) => c.solve(r),
        None => r.clone(),
    };
    conjugate_gradient_with(apply, b, x0, pre, tol, max_iters)
}

/// [`conjugate_gradient`] with any symmetric positive definite preconditioner `r ↦ M⁻¹ r` (for example the
/// damped Kronecker-factored inverse of [`super::kron::KronFactors::solve_damped`]).
pub fn conjugate_gradient_with(
    apply: impl Fn(&Array1<f64>) -> Array1<f64>,
    b: &Array1<f64>,
    x0: Option<Array1<f64>>,
    pre: impl Fn(&Array1<f64>) -> Array1<f64>,
    tol: f64,
    max_iters: usize,
) -> CgResult {
    let bnorm = b.dot(b).sqrt();
    let mut x = x0.unwrap_or_else(|| Array1::zeros(b.len()));
    if bnorm == 0.0 {
        return CgResult {
            x: Array1::zeros(b.len()),
            iterations: 0,
            converged: true,
            relative_residual: 0.0,
        };
    }
    let mut r = b - &apply(&x);
    let mut z = pre(&r);
    let mut d = z.clone();
    let mut rz = r.dot(&z);
    let mut rel = r.dot(&r).sqrt() / bnorm;
    let mut it = 0;
    while rel > tol && it < max_iters {
        let ad = apply(&d);
        let dad = d.dot(&ad);
        if dad.is_nan() || dad <= 0.0 {
            break;
        }
        let alpha = rz / dad;
        x.scaled_add(alpha, &d);
        r.scaled_add(-alpha, &ad);
        z = pre(&r);
        let rz_new = r.dot(&z);
        let beta = rz_new / rz;
        rz = rz_new;
        d = &z + &(&d * beta);
        rel = r.dot(&r).sqrt() / bnorm;
        it += 1;
    }
    CgResult {
        converged: rel <= tol,
        x,
        iterations: it,
        relative_residual: rel,
    }
}

/// Euclidean projection of `v` onto the probability simplex `{y ≥ 0, Σ y = 1}`, in place.
///
/// Sort-based algorithm (Held, Wolfe & Crowder 1974; Duchi et al., ICML 2008): with `u` sorted descending,
/// `ρ = max{j : u_j − (Σ_{r≤j} u_r − 1)/j > 0}`, `τ = (Σ_{r≤ρ} u_r − 1)/ρ`, `y = max(v − τ, 0)`.
pub fn project_simplex(v: &mut [f64]) {
    let mut stack = [0.0f64; 32];
    let mut heap = Vec::new();
    let u: &mut [f64] = if v.len() <= stack.len() {
        let u = &mut stack[..v.len()];
        u.copy_from_slice(v);
        u
    } else {
        heap.extend_from_slice(v);
        &mut heap
    };
    u.sort_unstable_by(|a, b| b.total_cmp(a));
    let mut cum = 0.0;
    let mut tau = 0.0;
    for (j, &uj) in u.iter().enumerate() {
        cum += uj;
        let t = (cum - 1.0) / (j as f64 + 1.0);
        if uj - t > 0.0 {
            tau = t;
        }
    }
    // Entries below 1e-12 are flushed to zero (and the row renormalised): subnormal label masses would
    // otherwise slow every later product by orders of magnitude and carry no information.
    let mut sum = 0.0;
    for x in v.iter_mut() {
        let y = *x - tau;
        *x = if y > 1e-12 { y } else { 0.0 };
        sum += *x;
    }
    if sum > 0.0 && sum != 1.0 {
        for x in v.iter_mut() {
            *x /= sum;
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::array;

    #[test]
    fn cholesky_solves_spd_system() {
        // A = MᵀM + I is SPD; check the residual of the solve rather than a golden value.
        let m = array![[1.0, 2.0, 0.5], [0.0, 1.0, -1.0], [3.0, 0.0, 1.0]];
        let a = m.t().dot(&m) + Array2::<f64>::eye(3);
        let b = array![1.0, -2.0, 0.5];
        let x = Cholesky::factor(a.clone()).expect("spd").solve(&b);
        let r = &a.dot(&x) - &b;
        assert!(r.iter().all(|v| v.abs() < 1e-12), "residual {r}");
    }

    #[test]
    fn cholesky_rejects_indefinite() {
        let a = array![[1.0, 2.0], [2.0, 1.0]];
        assert!(Cholesky::factor(a).is_none());
    }

    #[test]
    fn cg_matches_cholesky() {
        let m = array![
            [2.0, 1.0, 0.0, 0.0],
            [1.0, 3.0, 1.0, 0.0],
            [0.0, 1.0, 4.0, 1.0],
            [0.0, 0.0, 1.0, 5.0]
        ];
        let b = array![1.0, 2.0, 3.0, 4.0];
        let direct = Cholesky::factor(m.clone()).unwrap().solve(&b);
        let cg = conjugate_gradient(|v| m.dot(v), &b, None, None, 1e-12, 100);
        assert!(cg.converged);
        // CG terminates in at most n steps in exact arithmetic.
        assert!(cg.iterations <= 4 + 1);
        for (a, b) in cg.x.iter().zip(direct.iter()) {
            assert!((a - b).abs() < 1e-9);
        }
    }

    #[test]
    fn simplex_projection_examples() {
        // A point already on the simplex is its own projection.
        let mut v = [0.2, 0.3, 0.5];
        project_simplex(&mut v);
        assert!((v[0] - 0.2).abs() < 1e-15 && (v[2] - 0.5).abs() < 1e-15);
        // (1, 1) projects to (0.5, 0.5); (2, 0) to (1, 0): worked by hand from the formula above.
        let mut w = [1.0, 1.0];
        project_simplex(&mut w);
        assert_eq!(w, [0.5, 0.5]);
        let mut z = [2.0, 0.0];
        project_simplex(&mut z);
        assert_eq!(z, [1.0, 0.0]);
        // Shifting every coordinate by a constant does not change the projection.
        let mut a = [0.9, -0.3, 0.4];
        let mut b = [5.9, 4.7, 5.4];
        project_simplex(&mut a);
        project_simplex(&mut b);
        for (x, y) in a.iter().zip(b.iter()) {
            assert!((x - y).abs() < 1e-12);
        }
    }
}
