//! Truncated Newton for learners above the dense threshold: Newton directions from preconditioned
//! conjugate gradients on exact Hessian-vector products, never a dense Hessian.
//!
//! Each outer step solves `H(θ) d = −∇L(θ)` only to a relative residual
//! `η = min(½, √‖∇L‖)` (the forcing sequence of Eisenstat & Walker, "Choosing the forcing terms in an
//! inexact Newton method", SIAM J. Sci. Comput. 1996, which keeps Newton's superlinear convergence), with
//! `H(θ) v` from [`Objective::hvp`] and a preconditioner `M⁻¹ ≈ H⁻¹` — with a pool summary, the
//! Kronecker-factored inverse `(s B ⊗ A + D)⁻¹` of the pool's curvature plus the learner's ridge `D`
//! ([`super::kron`]), nearly the whole Hessian when the pool outweighs the batch. An Armijo backtracking line search makes
//! every step descend (Nocedal & Wright, *Numerical Optimization*, 2006, §7.1, "Newton–CG").

use std::time::Instant;

use ndarray::Array1;

use super::learner::{armijo_step, Objective, TrainReport};
use super::linalg::conjugate_gradient_with;

/// The preconditioner of [`train_newton_cg`] for an objective: the exact inverse of its prior's
/// Kronecker-factored curvature plus the learner's ridge, `(a B ⊗ A + D)⁻¹` (`a` the prior's weight, `D`
/// the ridge `λ` with the intercepts' `INTERCEPT_RIDGE`; [`super::kron::RidgedInverse`]), or the identity
/// when the prior has none. Built once per objective: the product costs two `K × p` by `p × p` products.
pub fn kron_preconditioner<'a>(obj: &Objective<'a>) -> impl Fn(&Array1<f64>) -> Array1<f64> + 'a {
    let inverse = obj.prior.and_then(|q| {
        q.kron
            .map(|f| f.ridged_inverse(q.scale, obj.l2, super::learner::INTERCEPT_RIDGE))
    });
    move |r: &Array1<f64>| match &inverse {
        Some(inv) => inv.apply(r),
        None => r.clone(),
    }
}

/// Minimise the objective by truncated Newton from `init` (module docs). Returns the parameters, the report
/// (iterations are Newton steps) and the conjugate-gradient iterations spent.
pub fn train_newton_cg(
    obj: &Objective<'_>,
    init: Array1<f64>,
    precond: &dyn Fn(&Array1<f64>) -> Array1<f64>,
    tol: f64,
    max_iters: u64,
    cg_max_iters: usize,
    deadline: Instant,
) -> (Array1<f64>, TrainReport, u64) {
    let mut theta = init;
    let (mut f, mut g, mut prob) = obj.value_grad(&theta);
    let mut iterations = 0;
    let mut cg_total = 0u64;
    let mut stopped = "iteration bound reached";
    loop {
        let gn = g.dot(&g).sqrt();
        if gn <= tol {
            stopped = "gradient tolerance reached";
            break;
        }
        if iterations >= max_iters {
            break;
        }
        if Instant::now() >= deadline {
            stopped = "time budget reached";
            break;
        }
        iterations += 1;
        let forcing = 0.5f64.min(gn.sqrt());
        let neg_g = -&g;
        let cg = conjugate_gradient_with(
            |v| obj.hvp(prob.view(), v),
            &neg_g,
            None,
            precond,
            forcing,
            cg_max_iters,
        );
        cg_total += cg.iterations as u64;
        let newton = cg.x;
        // A direction that does not descend (CG stopped on round-off) is replaced by the preconditioned
        // gradient, which always does.
        match armijo_step(obj, &theta, f, &g, [newton, -precond(&g)]) {
            Some((t, fc, gc, pc)) => (theta, f, g, prob) = (t, fc, gc, pc),
            None => {
                stopped = "line search made no progress";
                break;
            }
        }
    }
    let gn = g.dot(&g).sqrt();
    let report = TrainReport {
        converged: gn <= tol,
        iterations,
        grad_norm: gn,
        objective: f,
        stopped: stopped.into(),
    };
    (theta, report, cg_total)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::model::kron::KronFactors;
    use crate::model::learner::{one_hot, predict_proba, train_newton, Quadratic};
    use crate::model::linalg::Cholesky;
    use rand::{Rng, SeedableRng};
    use std::time::Duration;

    /// A small problem with a Kronecker-factored prior: pool rows summarised at `θ₀`, batch rows as data.
    struct Case {
        phi: Array2<f64>,
        y: Array2<f64>,
        center: Array1<f64>,
        grad: Array1<f64>,
        hess: Array2<f64>,
        kron: KronFactors,
    }

    use ndarray::Array2;

    fn case(p: usize, k: usize, seed: u64) -> Case {
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(seed);
        let mut rows = |n: usize| {
            let mut x = Array2::from_shape_fn((n, p), |_| rng.random_range(-1.5..1.5));
            x.column_mut(p - 1).fill(1.0);
            x
        };
        let pool = rows(80);
        let phi = rows(25);
        let center = Array1::from_shape_fn(p * k, |i| ((i * 7) % 5) as f64 * 0.2 - 0.4);
        let prob = predict_proba(pool.view(), &center, k);
        let kron = KronFactors::from_data(pool.view(), prob.view(), None, 80.0);
        let y = one_hot(&(0..25).map(|i| (i * 3) % k).collect::<Vec<_>>(), k);
        let grad = Array1::from_shape_fn(p * k, |i| ((i * 11) % 7) as f64 * 1e-3 - 3e-3);
        Case {
            phi,
            y,
            center,
            grad,
            hess: Array2::zeros((0, 0)),
            kron,
        }
    }

    fn objective(c: &Case) -> Objective<'_> {
        Objective {
            phi: c.phi.view(),
            y: c.y.view(),
            weight: None,
            norm: 105.0,
            l2: 1e-3,
            prior: Some(Quadratic {
                scale: 80.0 / 105.0,
                center: c.center.view(),
                grad: c.grad.view(),
                hess: c.hess.view(),
                kron: Some(&c.kron),
            }),
        }
    }

    /// Truncated Newton preconditioned by the prior's factors reaches the optimum that dense Newton
    /// (the assembled Hessian, Cholesky) reaches on the same objective.
    #[test]
    fn truncated_newton_matches_dense_newton() {
        let c = case(7, 4, 1);
        let obj = objective(&c);
        let deadline = Instant::now() + Duration::from_secs(30);
        let init = Array1::zeros(28);
        let (dense, rd) = train_newton(&obj, init.clone(), 1e-9, 100, deadline);
        let pre = kron_preconditioner(&obj);
        let (tn, rt, cg) = train_newton_cg(&obj, init, &pre, 1e-9, 100, 200, deadline);
        assert!(rd.converged && rt.converged, "{rd:?} {rt:?}");
        assert!(cg > 0);
        let diff = (&dense - &tn).iter().fold(0.0f64, |m, v| m.max(v.abs()));
        assert!(diff < 1e-7, "max |Δθ| {diff}");
    }

    /// The preconditioned CG solve of `H x = b` matches the dense Cholesky solve of the assembled
    /// Hessian, and the preconditioner cuts the iterations against plain CG.
    #[test]
    fn preconditioned_cg_matches_the_cholesky_solve() {
        let c = case(9, 5, 2);
        let obj = objective(&c);
        let theta = Array1::from_shape_fn(45, |i| (i as f64 * 0.3).sin() * 0.2);
        let (_, _, prob) = obj.value_grad(&theta);
        let h = obj.hessian(prob.view());
        let b = Array1::from_shape_fn(45, |i| (i as f64 * 0.7).cos());
        let direct = Cholesky::factor(h).expect("definite").solve(&b);
        let pre = kron_preconditioner(&obj);
        let pcg = conjugate_gradient_with(|v| obj.hvp(prob.view(), v), &b, None, pre, 1e-12, 500);
        let plain = conjugate_gradient_with(
            |v| obj.hvp(prob.view(), v),
            &b,
            None,
            |r: &Array1<f64>| r.clone(),
            1e-12,
            500,
        );
        assert!(pcg.converged);
        let scale = direct.iter().fold(0.0f64, |m, v| m.max(v.abs()));
        for (a, d) in pcg.x.iter().zip(direct.iter()) {
            assert!((a - d).abs() <= 1e-8 * scale, "{a} vs {d}");
        }
        assert!(
            pcg.iterations < plain.iterations,
            "preconditioned {} vs plain {}",
            pcg.iterations,
            plain.iterations
        );
    }
}
