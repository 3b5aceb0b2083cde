//! The label-repair engine checked against the outside and against its own derivatives.
//!
//! * the learner against `linfa-logistic` 0.8.1 on iris and winequality from `linfa-datasets` 0.8.1;
//! * the Hessian against Böhning's (1992) eigenvalue bound;
//! * gradient, Hessian-vector product and label hypergradient against finite differences (proptest, seeded);
//! * the relaxed repair against the exact combinatorial optimum on tiny problems;
//! * no panic / no NaN on hostile numbers;
//! * incremental (pool summary) against exact (pool re-solve) mode.

use labelweir::model::learner::{self, Learner, Objective, Quadratic};
use labelweir::model::linalg::Cholesky;
use labelweir::model::{FeatureMap, FeatureMapKind, ModelSettings, Standardizer};
use linfa::prelude::*;
use ndarray::{s, Array1, Array2, ArrayView2, Axis};
use proptest::prelude::*;
use proptest::test_runner::{Config as PtConfig, RngAlgorithm, RngSeed};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;

// ---------------------------------------------------------------------------------------------------------
// helpers

/// Settings with tight inner tolerances, for comparisons against references.
fn tight(l2: f64) -> ModelSettings {
    ModelSettings {
        l2,
        inner_tol: 1e-11,
        inner_max_iters: 2000,
        ..ModelSettings::default()
    }
}

fn linear_map(x: ArrayView2<'_, f64>) -> FeatureMap {
    let st = Standardizer::fit(&[x]).expect("standardise");
    FeatureMap::new(st, FeatureMapKind::Linear, 7).expect("feature map")
}

fn max_abs_diff(a: &Array2<f64>, b: &Array2<f64>) -> f64 {
    assert_eq!(a.dim(), b.dim());
    a.iter()
        .zip(b.iter())
        .map(|(x, y)| (x - y).abs())
        .fold(0.0, f64::max)
}

/// Class index per row, classes renumbered 0..K in sorted order of the dataset's targets.
fn dense_labels(targets: &[usize]) -> (Vec<usize>, usize) {
    let mut classes: Vec<usize> = targets.to_vec();
    classes.sort_unstable();
    classes.dedup();
    let y = targets
        .iter()
        .map(|t| classes.binary_search(t).expect("present"))
        .collect();
    (y, classes.len())
}

// ---------------------------------------------------------------------------------------------------------
// 1. the learner against linfa-logistic 0.8.1

/// Fit ours and linfa-logistic's `MultiLogisticRegression` on the same standardised data and compare
/// predicted probabilities on every training row.
///
/// Regularisation convention (read from linfa-logistic 0.8.1, `src/lib.rs`, `multi_logistic_loss` and
/// `multi_logistic_grad`): linfa minimises the *summed* loss
/// `−Σ_i Σ_k Y_ik log softmax(x_i W + b)_k + (α/2) ‖W‖²`, and the intercept `b` is not penalised (the penalty
/// uses `params` after `convert_params` split the intercept row off). labelweir minimises the *mean* loss
/// `(1/n) Σ_i … + (λ/2) ‖W_{features}‖²` (+ a 1e-8 ridge on the intercept that only picks one of the
/// softmax-equivalent intercepts). Multiplying ours by `n` gives linfa's with `α = n·λ`; both have the
/// same minimiser, hence the same probabilities.
fn compare_with_linfa(x: Array2<f64>, targets: Vec<usize>, l2: f64) -> f64 {
    let (y, k) = dense_labels(&targets);
    let fm = linear_map(x.view());
    let z = fm.standardizer.transform(x.view()).expect("standardise");
    let n = x.nrows() as f64;

    let (ours, report) = Learner::fit(&tight(l2), fm, k, x.view(), &y).expect("fit");
    assert!(report.converged, "our solve did not converge: {report:?}");
    let p_ours = ours.predict_proba(x.view()).expect("predict");

    let ds = linfa::Dataset::new(z.clone(), Array1::from(y.clone()));
    let theirs = linfa_logistic::MultiLogisticRegression::default()
        .alpha(n * l2)
        .max_iterations(5000)
        .gradient_tolerance(1e-10)
        .fit(&ds)
        .expect("linfa fit");
    // linfa's classes are the sorted distinct targets, the same order as `dense_labels`.
    assert_eq!(theirs.classes(), (0..k).collect::<Vec<_>>().as_slice());
    let p_theirs = theirs.predict_probabilities(&z);
    max_abs_diff(&p_ours, &p_theirs)
}

#[test]
fn learner_matches_linfa_logistic_on_iris() {
    // Fisher's iris via linfa-datasets 0.8.1 (150 × 4, 3 classes). Reference: linfa-logistic 0.8.1.
    // Tolerance: 1e-5 absolute on every predicted probability — both solvers stop at a small gradient, and
    // the remaining differences come from linfa's L-BFGS stopping point, not from the model.
    let ds = linfa_datasets::iris();
    for l2 in [1e-3, 1e-2, 1e-1] {
        let d = compare_with_linfa(ds.records().to_owned(), ds.targets().to_vec(), l2);
        assert!(d < 1e-5, "iris, l2 = {l2}: max |Δp| = {d:e}");
    }
}

#[test]
fn learner_matches_linfa_logistic_on_winequality() {
    // Red wine quality via linfa-datasets 0.8.1 (1599 × 11, 6 quality classes 3..8). Reference:
    // linfa-logistic 0.8.1. Same tolerance and mapping as above.
    let ds = linfa_datasets::winequality();
    for l2 in [1e-3, 1e-2] {
        let d = compare_with_linfa(ds.records().to_owned(), ds.targets().to_vec(), l2);
        assert!(d < 1e-5, "winequality, l2 = {l2}: max |Δp| = {d:e}");
    }
}

// ---------------------------------------------------------------------------------------------------------
// 2. Böhning's bound on the Hessian

/// Largest eigenvalue of a symmetric positive semi-definite operator by power iteration (seeded).
fn power_iteration(dim: usize, seed: u64, apply: impl Fn(&Array1<f64>) -> Array1<f64>) -> f64 {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let mut v = Array1::from_shape_fn(dim, |_| rng.random::<f64>() - 0.5);
    v /= v.dot(&v).sqrt();
    let mut lambda = 0.0;
    for _ in 0..3000 {
        let w = apply(&v);
        lambda = v.dot(&w);
        let nw = w.dot(&w).sqrt();
        if nw == 0.0 {
            return 0.0;
        }
        v = w / nw;
    }
    lambda
}

#[test]
fn hessian_obeys_bohning_bound_on_iris() {
    // Böhning, "Multinomial logistic regression algorithm", Ann. Inst. Statist. Math. 44 (1992): for the
    // mean multinomial log-loss, H ≼ ½ (I_K − 11ᵀ/K) ⊗ ΦᵀΦ/n, so with the L2 term
    // λ ≤ eig(H) ≤ λ + λ_max(ΦᵀΦ)/(2n) (tests/reference/check-values.md §2).
    //
    // Adjusted for the unpenalised intercept: the intercept row carries only the 1e-8 ridge ε, so
    // (a) the upper bound is ½ vᵀ[(I − 11ᵀ/K) ⊗ ΦᵀΦ/n] v + λ‖v_feat‖² + ε‖v_icpt‖² for every v, and
    //     λ_max(H) ≤ max(λ, ε) + λ_max(ΦᵀΦ)/(2n) (Φ includes the column of ones);
    // (b) the lower bound λ‖v‖² holds on the penalised block (v with zero intercept row); along the
    //     intercept direction that adds the same constant to every class, H v = ε v exactly.
    let ds = linfa_datasets::iris();
    let x = ds.records().to_owned();
    let (y, k) = dense_labels(ds.targets().as_slice().expect("contiguous"));
    let fm = linear_map(x.view());
    let phi = fm.apply(x.view()).expect("phi");
    let (n, p) = phi.dim();
    let yy = learner::one_hot(&y, k);
    let l2 = 1e-2;
    let eps = learner::INTERCEPT_RIDGE;
    let obj = Objective {
        phi: phi.view(),
        y: yy.view(),
        weight: None,
        norm: n as f64,
        l2,
        prior: None,
    };
    let gram = phi.t().dot(&phi) / n as f64;
    let gram_max = power_iteration(p, 1, |v| gram.dot(v));

    let mut rng = ChaCha8Rng::seed_from_u64(1992);
    // At the optimum and at random parameter points (the bound holds at every θ).
    let (theta_opt, _) = learner::solve(
        &tight(l2),
        &obj,
        Array1::zeros(p * k),
        std::time::Instant::now() + std::time::Duration::from_secs(30),
    );
    let mut points = vec![theta_opt];
    for _ in 0..4 {
        points.push(Array1::from_shape_fn(p * k, |_| {
            3.0 * (rng.random::<f64>() - 0.5)
        }));
    }
    for theta in &points {
        let (_, _, prob) = obj.value_grad(theta);
        for _ in 0..50 {
            let v = Array1::from_shape_fn(p * k, |_| rng.random::<f64>() - 0.5);
            let hv = obj.hvp(prob.view(), &v);
            let quad = v.dot(&hv);
            // ½ vᵀ[(I − 11ᵀ/K) ⊗ G] v with V = v as p × K (θ[k·p + j] = V[j, k]): ½ Σ_k V_kᵀ G V_k − ½ (1/K) sᵀ G s,
            // s = Σ_k V_k.
            let vm = learner::weights_view(&v, p, k).to_owned();
            let gv = gram.dot(&vm);
            let srow = vm.sum_axis(Axis(1));
            let bound_data = 0.5 * ((&vm * &gv).sum() - srow.dot(&gram.dot(&srow)) / k as f64);
            let feat = vm.slice(s![..p - 1, ..]);
            let icpt = vm.row(p - 1);
            let bound =
                bound_data + l2 * feat.iter().map(|a| a * a).sum::<f64>() + eps * icpt.dot(&icpt);
            assert!(
                quad <= bound * (1.0 + 1e-10) + 1e-14,
                "vᵀHv = {quad} > Böhning bound {bound}"
            );
            // Lower bound on the penalised block.
            let mut vf = v.clone();
            for c in 0..k {
                vf[c * p + p - 1] = 0.0;
            }
            let qf = vf.dot(&obj.hvp(prob.view(), &vf));
            assert!(
                qf >= l2 * vf.dot(&vf) * (1.0 - 1e-10),
                "vᵀHv = {qf} < λ‖v‖²"
            );
        }
        let lmax = power_iteration(p * k, 2, |v| obj.hvp(prob.view(), v));
        assert!(
            lmax <= l2.max(eps) + gram_max / 2.0 + 1e-9,
            "λ_max(H) = {lmax} above the bound"
        );
        assert!(lmax >= l2, "λ_max(H) = {lmax} below λ");
        // The invariant direction: +c on every class's intercept.
        let mut ones = Array1::zeros(p * k);
        for c in 0..k {
            ones[c * p + p - 1] = 1.0;
        }
        let h1 = obj.hvp(prob.view(), &ones);
        let resid = (&h1 - &(&ones * eps))
            .mapv(f64::abs)
            .fold(0.0, |a: f64, &b| a.max(b));
        assert!(
            resid < 1e-12,
            "H·(intercept ones) = ε·ones expected, residual {resid}"
        );
    }
}

// ---------------------------------------------------------------------------------------------------------
// 3. derivatives against finite differences (seeded proptest)

fn proptest_config(cases: u32) -> PtConfig {
    PtConfig {
        cases,
        rng_algorithm: RngAlgorithm::ChaCha,
        rng_seed: RngSeed::Fixed(20_180_201),
        failure_persistence: None,
        ..PtConfig::default()
    }
}

/// A random small problem: Φ (last column ones), soft labels on the simplex, item weights, λ, θ, and
/// optionally a quadratic prior.
#[derive(Debug, Clone)]
struct SmallProblem {
    phi: Array2<f64>,
    y: Array2<f64>,
    w: Array1<f64>,
    l2: f64,
    theta: Array1<f64>,
    dir: Array1<f64>,
    prior: Option<Prior>,
}

/// A quadratic prior: (scale, centre, gradient, Hessian).
type Prior = (f64, Array1<f64>, Array1<f64>, Array2<f64>);

impl SmallProblem {
    fn objective(&self) -> Objective<'_> {
        Objective {
            phi: self.phi.view(),
            y: self.y.view(),
            weight: Some(self.w.view()),
            norm: self.phi.nrows() as f64,
            l2: self.l2,
            prior: self.prior.as_ref().map(|(a, c, g, h)| Quadratic {
                scale: *a,
                center: c.view(),
                grad: g.view(),
                hess: h.view(),
                kron: None,
            }),
        }
    }
}

fn small_problem() -> impl Strategy<Value = SmallProblem> {
    (
        2usize..25,
        1usize..5,
        2usize..5,
        any::<u64>(),
        prop::bool::ANY,
        -4.0f64..0.0,
    )
        .prop_map(|(n, d, k, seed, with_prior, log_l2)| {
            let mut rng = ChaCha8Rng::seed_from_u64(seed);
            let p = d + 1;
            let m = p * k;
            let mut phi = Array2::from_shape_fn((n, p), |_| 2.0 * rng.random::<f64>() - 1.0);
            phi.column_mut(p - 1).fill(1.0);
            let mut y = Array2::from_shape_fn((n, k), |_| rng.random::<f64>());
            for mut row in y.rows_mut() {
                let s = row.sum();
                row /= s;
            }
            let w = Array1::from_shape_fn(n, |_| 0.2 + rng.random::<f64>());
            let theta = Array1::from_shape_fn(m, |_| 2.0 * rng.random::<f64>() - 1.0);
            let dir = Array1::from_shape_fn(m, |_| 2.0 * rng.random::<f64>() - 1.0);
            let prior = with_prior.then(|| {
                let b = Array2::from_shape_fn((m, m), |_| rng.random::<f64>() - 0.5);
                let h = b.t().dot(&b) / m as f64;
                let c = Array1::from_shape_fn(m, |_| rng.random::<f64>() - 0.5);
                let g = Array1::from_shape_fn(m, |_| 0.1 * (rng.random::<f64>() - 0.5));
                (0.5 + rng.random::<f64>(), c, g, h)
            });
            SmallProblem {
                phi,
                y,
                w,
                l2: 10f64.powf(log_l2),
                theta,
                dir,
                prior,
            }
        })
}

proptest! {
    #![proptest_config(proptest_config(64))]

    /// ∇L·v against the central difference (L(θ + hv) − L(θ − hv)) / 2h, h = 1e-5; error O(h²) ≈ 1e-10
    /// relative to the curvature scale, so 1e-6 relative (plus 1e-9 absolute) cannot be met by a wrong
    /// gradient (common practice for gradient checks; argmin and faer test the same way).
    #[test]
    fn gradient_matches_finite_differences(pr in small_problem()) {
        let obj = pr.objective();
        let (_, g, _) = obj.value_grad(&pr.theta);
        let h = 1e-5;
        let (fp, _, _) = obj.value_grad(&(&pr.theta + &(&pr.dir * h)));
        let (fm, _, _) = obj.value_grad(&(&pr.theta - &(&pr.dir * h)));
        let fd = (fp - fm) / (2.0 * h);
        let an = g.dot(&pr.dir);
        prop_assert!((fd - an).abs() <= 1e-6 * an.abs().max(fd.abs()) + 1e-9, "fd {fd} vs analytic {an}");
    }

    /// H[v] against (∇L(θ + hv) − ∇L(θ − hv)) / 2h, componentwise, and against the dense `hessian()`.
    #[test]
    fn hvp_matches_finite_differences_of_gradients(pr in small_problem()) {
        let obj = pr.objective();
        let (_, _, prob) = obj.value_grad(&pr.theta);
        let hv = obj.hvp(prob.view(), &pr.dir);
        let h = 1e-5;
        let (_, gp, _) = obj.value_grad(&(&pr.theta + &(&pr.dir * h)));
        let (_, gm, _) = obj.value_grad(&(&pr.theta - &(&pr.dir * h)));
        let fd = (gp - gm) / (2.0 * h);
        let scale = hv.iter().chain(fd.iter()).fold(0.0f64, |a, b| a.max(b.abs()));
        for (a, b) in hv.iter().zip(fd.iter()) {
            prop_assert!((a - b).abs() <= 1e-6 * scale + 1e-9, "hvp {a} vs fd {b}");
        }
        let dense = obj.hessian(prob.view()).dot(&pr.dir);
        for (a, b) in hv.iter().zip(dense.iter()) {
            prop_assert!((a - b).abs() <= 1e-10 * scale + 1e-12, "hvp {a} vs dense {b}");
        }
    }
}

/// A small training problem with a trusted set, for the label hypergradient: pool rows (hard labels) then
/// batch rows (soft labels strictly inside the simplex), optional quadratic prior.
#[derive(Debug, Clone)]
struct HyperProblem {
    base: SmallProblem,
    n_batch: usize,
    phi_t: Array2<f64>,
    y_t: Vec<usize>,
    c_t: Array1<f64>,
    /// Tangent direction on the product of simplices (each row sums to 0), batch rows only.
    dir: Array2<f64>,
}

fn hyper_problem() -> impl Strategy<Value = HyperProblem> {
    (small_problem(), 1usize..8, 2usize..10, any::<u64>()).prop_map(|(mut base, nb, nt, seed)| {
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        let (n, p) = base.phi.dim();
        let k = base.y.ncols();
        let nb = nb.min(n);
        // A better-conditioned problem for re-solving: λ ≥ 1e-2, unit item weights (the engine's
        // training objective has no item weights).
        base.l2 = base.l2.max(1e-2);
        base.w = Array1::ones(n);
        // Keep batch labels away from the simplex boundary so Y ± hD stays feasible.
        for mut row in base.y.slice_mut(s![n - nb.., ..]).rows_mut() {
            row.mapv_inplace(|v| 0.1 + v);
            let sum = row.sum();
            row /= sum;
        }
        let mut phi_t = Array2::from_shape_fn((nt, p), |_| 2.0 * rng.random::<f64>() - 1.0);
        phi_t.column_mut(p - 1).fill(1.0);
        let y_t = (0..nt).map(|_| rng.random_range(0..k)).collect();
        let c_t = Array1::from_shape_fn(nt, |_| 0.5 + rng.random::<f64>());
        let mut dir = Array2::from_shape_fn((nb, k), |_| rng.random::<f64>() - 0.5);
        for mut row in dir.rows_mut() {
            let mean = row.sum() / k as f64;
            row.mapv_inplace(|v| v - mean);
        }
        HyperProblem {
            base,
            n_batch: nb,
            phi_t,
            y_t,
            c_t,
            dir,
        }
    })
}

proptest! {
    #![proptest_config(proptest_config(32))]

    /// The label hypergradient `∂Φ/∂Y` (implicit function theorem; Zhang, Zhu & Wright, AAAI 2018; formula
    /// in tests/reference/check-values.md §2) against finite differences of *re-solved* optima: Φ(θ*(Y + hD)) and
    /// Φ(θ*(Y − hD)) with the learner solved from scratch to a gradient norm of 1e-12, along a direction D
    /// that keeps every batch row on the simplex. h = 1e-4; tolerance 1e-4 relative to the largest of
    /// |fd|, |analytic| and ‖G‖·‖D‖ (plus 1e-9 absolute): a wrong sign, a missing 1/N or a missing
    /// H⁻¹ misses it by orders of magnitude.
    #[test]
    fn label_hypergradient_matches_resolved_finite_differences(hp in hyper_problem()) {
        let settings = ModelSettings { inner_tol: 1e-10, inner_max_iters: 500, ..tight(hp.base.l2) };
        let n = hp.base.phi.nrows();
        let k = hp.base.y.ncols();
        let batch = n - hp.n_batch..n;
        let solve_at = |y: &Array2<f64>| {
            let mut pr = hp.base.clone();
            pr.y = y.clone();
            let obj = pr.objective();
            let (theta, report) = learner::solve(
                &settings,
                &obj,
                Array1::zeros(pr.phi.ncols() * k),
                std::time::Instant::now() + std::time::Duration::from_secs(20),
            );
            // Polish with undamped Newton steps: the learner's Armijo test on f cannot see decreases
            // below f's rounding error, so it stops near ‖∇L‖ ≈ 1e-9; Newton from there converges
            // quadratically to ‖∇L‖ ≈ 1e-13 or below.
            let mut theta = theta;
            for _ in 0..5 {
                let (_, g, prob) = obj.value_grad(&theta);
                let chol = Cholesky::factor(obj.hessian(prob.view())).expect("H is positive definite");
                theta = &theta - &chol.solve(&g);
            }
            let (_, g, _) = obj.value_grad(&theta);
            let gn = g.dot(&g).sqrt();
            assert!(gn <= 1e-12, "re-solve stalled at ‖∇L‖ = {gn:e} ({report:?})");
            theta
        };
        let phi_loss = |theta: &Array1<f64>| {
            learner::trusted_loss(hp.phi_t.view(), &hp.y_t, hp.c_t.view(), theta, k).0
        };
        let theta0 = solve_at(&hp.base.y);
        let g = {
            let obj = hp.base.objective();
            labelweir::model::repair::label_hypergradient(
                &settings, &obj, &theta0, batch.clone(), hp.phi_t.view(), &hp.y_t, hp.c_t.view(),
            )
        };
        prop_assert_eq!(g.dim(), (hp.n_batch, k));
        let h = 1e-4;
        let mut yp = hp.base.y.clone();
        let mut ym = hp.base.y.clone();
        {
            let mut bp = yp.slice_mut(s![batch.clone(), ..]);
            bp.scaled_add(h, &hp.dir);
            let mut bm = ym.slice_mut(s![batch.clone(), ..]);
            bm.scaled_add(-h, &hp.dir);
        }
        let fd = (phi_loss(&solve_at(&yp)) - phi_loss(&solve_at(&ym))) / (2.0 * h);
        let an = (&g * &hp.dir).sum();
        let scale = fd.abs().max(an.abs()).max(
            g.iter().map(|v| v * v).sum::<f64>().sqrt() * hp.dir.iter().map(|v| v * v).sum::<f64>().sqrt(),
        );
        prop_assert!((fd - an).abs() <= 1e-4 * scale + 1e-9, "fd {} vs analytic {}", fd, an);
    }
}

// ---------------------------------------------------------------------------------------------------------
// 4. the relaxed repair against the exact combinatorial optimum (tiny problems)

use labelweir::model::{assess, Assessment, PoolInput, PoolSummary, TrustedInput};

/// Gaussian blobs: class `c` centred at `centres[c]` with unit-free spread `sd`.
fn blobs(
    centres: &[[f64; 2]],
    per: &[usize],
    sd: f64,
    rng: &mut ChaCha8Rng,
) -> (Array2<f64>, Vec<usize>) {
    let n: usize = per.iter().sum();
    let mut x = Array2::zeros((n, 2));
    let mut y = Vec::with_capacity(n);
    let mut r = 0;
    for (c, &m) in per.iter().enumerate() {
        for _ in 0..m {
            for j in 0..2 {
                // Box–Muller from two uniforms.
                let (u1, u2): (f64, f64) = (rng.random::<f64>().max(1e-12), rng.random());
                let g = (-2.0 * u1.ln()).sqrt() * (std::f64::consts::TAU * u2).cos();
                x[[r, j]] = centres[c][j] + sd * g;
            }
            y.push(c);
            r += 1;
        }
    }
    (x, y)
}

/// Trusted-set loss after retraining on pool ∪ batch with hard batch labels `yb`, exactly as the engine's
/// exact mode trains: mean cross-entropy over all `n_P + n_B` rows, `settings.l2` on the features.
fn retrained_trusted_loss(
    settings: &ModelSettings,
    fm: &FeatureMap,
    k: usize,
    pool: (&Array2<f64>, &[usize]),
    batch_x: &Array2<f64>,
    yb: &[usize],
    trusted: (&Array2<f64>, &[usize]),
) -> f64 {
    let x = ndarray::concatenate(Axis(0), &[pool.0.view(), batch_x.view()]).expect("stack");
    let mut y = pool.1.to_vec();
    y.extend_from_slice(yb);
    let (l, _) = Learner::fit(settings, fm.clone(), k, x.view(), &y).expect("fit");
    let phi_t = fm.apply(trusted.0.view()).expect("phi");
    let w = Array1::ones(trusted.1.len());
    learner::trusted_loss(phi_t.view(), trusted.1, w.view(), &l.theta, k).0
}

#[test]
fn expected_damage_matches_monte_carlo_relabelling_through_the_reference_model() {
    // `Assessment::expected_damage` and `expected_damage_sd` predict the damage a batch would do if each
    // item's label were drawn from the reference model's probabilities (the model linear in the labels,
    // the trusted loss to second order through seeded draws). Checked here against brute force: draw such labellings, retrain on pool ∪ batch for
    // each (exact mode, the engine's learner and settings) and take the damage's sample mean and standard
    // deviation. Overlapping classes (spread 1.3 around centres 2 apart), so that the labels drawn differ
    // from the delivered ones on a third of the items: the regime the cold-start policy uses this in.
    for seed in [77, 78, 79] {
        expected_damage_check(seed);
    }
}

fn expected_damage_check(seed: u64) {
    let settings = ModelSettings::default();
    let k = 3;
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let centres = [[-1.0, 0.0], [1.0, 0.0], [0.0, 1.7]];
    let (tx, ty) = blobs(&centres, &[8, 8, 8], 1.3, &mut rng);
    let (px, py) = blobs(&centres, &[90, 90, 90], 1.3, &mut rng);
    let (bx, by) = blobs(&centres, &[40, 40, 40], 1.3, &mut rng);
    let st = Standardizer::fit(&[tx.view(), px.view(), bx.view()]).expect("standardise");
    let fm = FeatureMap::new(st.clone(), settings.feature_map, settings.seed).expect("map");
    let w = Array1::ones(ty.len());
    let a = assess_exact(&settings, &st, k, (&tx, &ty), (&px, &py), (&bx, &by));
    assert_eq!(a.reference, "pool", "pool of 270 ≥ min_reference_pool");
    // The reference model: the pool's own model (what the engine uses once the pool is large enough).
    let (pool_model, _) = Learner::fit(&settings, fm.clone(), k, px.view(), &py).expect("fit");
    let p_ref = pool_model.predict_proba(bx.view()).expect("predict");
    let phi_t = fm.apply(tx.view()).expect("phi");
    let phi_pool = learner::trusted_loss(phi_t.view(), &ty, w.view(), &pool_model.theta, k).0;
    let draws = 300;
    let mut damages = Vec::with_capacity(draws);
    let mut changed = 0usize;
    for _ in 0..draws {
        let yb: Vec<usize> = p_ref
            .rows()
            .into_iter()
            .map(|r| {
                let u: f64 = rng.random();
                let mut acc = 0.0;
                r.iter()
                    .position(|&p| {
                        acc += p;
                        u < acc
                    })
                    .unwrap_or(k - 1)
            })
            .collect();
        changed += yb.iter().zip(&by).filter(|(a, b)| a != b).count();
        let phi = retrained_trusted_loss(&settings, &fm, k, (&px, &py), &bx, &yb, (&tx, &ty));
        damages.push(phi - phi_pool);
    }
    let mean = damages.iter().sum::<f64>() / draws as f64;
    let sd = (damages.iter().map(|d| (d - mean).powi(2)).sum::<f64>() / (draws - 1) as f64).sqrt();
    let changed_share = changed as f64 / (draws * by.len()) as f64;
    assert!(
        changed_share > 0.2,
        "the drawn labels should differ often: {changed_share:.3}"
    );
    // The mean: within 3 standard errors of the Monte Carlo estimate plus a tenth of an sd for the
    // linearisation; the sd: within 25 %.
    let se = sd / (draws as f64).sqrt();
    assert!(
        (mean - a.expected_damage).abs() <= 3.0 * se + 0.1 * sd,
        "seed {seed}: expected damage {:.5} vs Monte Carlo {mean:.5} (sd {sd:.5}, se {se:.5})",
        a.expected_damage
    );
    assert!(
        (a.expected_damage_sd / sd - 1.0).abs() <= 0.25,
        "seed {seed}: sd {:.5} vs Monte Carlo {sd:.5}",
        a.expected_damage_sd
    );
}

/// `assess` in exact mode with unit trusted weights.
fn assess_exact(
    settings: &ModelSettings,
    st: &Standardizer,
    k: usize,
    trusted: (&Array2<f64>, &[usize]),
    pool: (&Array2<f64>, &[usize]),
    batch: (&Array2<f64>, &[usize]),
) -> Assessment {
    let w = Array1::ones(trusted.1.len());
    assess(
        settings,
        st,
        k,
        TrustedInput {
            x: trusted.0.view(),
            y: trusted.1,
            weight: w.view(),
        },
        PoolInput::Exact {
            x: pool.0.view(),
            y: pool.1,
        },
        batch.0.view(),
        batch.1,
    )
    .expect("assess")
}

/// All labellings of `n` items with `k` classes, in lexicographic order.
fn labellings(n: usize, k: usize) -> impl Iterator<Item = Vec<usize>> {
    (0..k.pow(n as u32)).map(move |mut code| {
        (0..n)
            .map(|_| {
                let c = code % k;
                code /= k;
                c
            })
            .collect()
    })
}

#[test]
fn relaxed_repair_proposes_the_exact_combinatorial_optimum_on_tiny_problems() {
    // The exact problem of Zhang, Zhu & Wright (AAAI 2018): among all hard relabellings Y of the batch,
    // find the one with the fewest changed labels whose retrained model meets the post-condition
    // Φ(θ*(pool ∪ Y)) ≤ Φ_target; ties by the smaller Φ. On n ≤ 10 items it is found by enumerating all
    // K^n labellings and retraining for each (exact mode, the engine's learner and settings).
    //
    // The target is set so that the exact problem is well posed (a unique optimum with a margin): with
    // c = 2 planted flips, Φ_best = the smallest Φ over labellings changing 2 labels, Φ_2nd the next one,
    // Φ_cheap the smallest Φ over labellings changing fewer; the instance must have Φ_best < Φ_cheap, and
    // Φ_target = Φ_best + ½ min(Φ_cheap − Φ_best, Φ_2nd − Φ_best), reached through `target_slack`.
    // Compared:
    //   (a) rounding the relaxed repair: the c items with the most moved label mass (`repair_mass`, at the
    //       repair-cost point; c = the exact optimum's number of changes) are the items it changes (a
    //       relaxation may legitimately split mass, e.g. 0.5 on each of two items, so no fixed mass
    //       threshold is required of them);
    //   (b) no other item has more than ½ of its label mass moved;
    //   (c) for the items the exact optimum changes, the engine's `proposed_label` is the exact optimum's
    //       label. (Items outside that set may still get a different proposal from the engine's second
    //       signal, the reference model; that is not the repair and is not compared here.)
    //   (d) the engine's repair cost is at most the exact optimum's cost (the relaxation contains every
    //       hard labelling) plus one item's worth (1/n) of slack for the linearised, discretised path.
    // Instances: for each (K, n), the first seed whose instance is well posed with a margin — Φ_cheap and
    // Φ_2nd both at least 0.01 nats above Φ_best — a criterion that does not look at the engine.
    let configs: [(usize, usize, u64); 4] = [(2, 10, 1), (2, 9, 2), (3, 7, 3), (3, 6, 4)];
    // The proposals compared are the repair's: the flag line stays at its floor (`clean_flag_rate = 1`),
    // since on nine items a 3 % clean flag rate would flag nothing and propose no label at all.
    let settings = ModelSettings {
        l2: 1e-2,
        clean_flag_rate: 1.0,
        ..ModelSettings::default()
    };
    let mut failures = Vec::new();
    let mut checked = Vec::new();
    for (k, n, first_seed) in configs {
        for seed in first_seed * 100..first_seed * 100 + 20 {
            let mut rng = ChaCha8Rng::seed_from_u64(seed);
            let centres: Vec<[f64; 2]> = [[-2.0, 0.0], [2.0, 0.0], [0.0, 3.0]][..k].to_vec();
            let (tx, ty) = blobs(&centres, &vec![4; k], 0.7, &mut rng);
            let (px, py) = blobs(&centres, &vec![3; k], 0.7, &mut rng);
            let per: Vec<usize> = (0..k).map(|c| n / k + usize::from(c < n % k)).collect();
            let (bx, by_true) = blobs(&centres, &per, 0.7, &mut rng);
            // Plant two bugs: items 0 and n−1 (different classes) moved to the next class.
            let planted = [0, n - 1];
            let mut by = by_true.clone();
            for &i in &planted {
                by[i] = (by_true[i] + 1) % k;
            }
            let st = Standardizer::fit(&[tx.view(), px.view(), bx.view()]).expect("standardise");
            let fm =
                FeatureMap::new(st.clone(), FeatureMapKind::Linear, settings.seed).expect("map");

            // Every labelling: (changed labels, Φ after retraining).
            let all: Vec<(usize, f64, Vec<usize>)> = labellings(n, k)
                .map(|lab| {
                    let changed = lab.iter().zip(&by).filter(|(a, b)| a != b).count();
                    let phi = retrained_trusted_loss(
                        &settings,
                        &fm,
                        k,
                        (&px, &py),
                        &bx,
                        &lab,
                        (&tx, &ty),
                    );
                    (changed, phi, lab)
                })
                .collect();
            let cheap = all
                .iter()
                .filter(|e| e.0 < 2)
                .map(|e| e.1)
                .fold(f64::INFINITY, f64::min);
            let mut two: Vec<&(usize, f64, Vec<usize>)> = all.iter().filter(|e| e.0 == 2).collect();
            two.sort_by(|a, b| a.1.total_cmp(&b.1));
            let (best, second) = (two[0], two[1].1);
            if cheap - best.1 < 0.01 || second - best.1 < 0.01 {
                continue; // not well posed with a margin; try the next seed
            }
            let target = best.1 + 0.5 * (cheap - best.1).min(second - best.1);

            let run = |settings: &ModelSettings| {
                assess_exact(settings, &st, k, (&tx, &ty), (&px, &py), (&bx, &by))
            };
            let base_target = run(&settings).trusted_loss_target;
            assert!(
                target >= base_target,
                "k={k} n={n}: target {target} below the engine's own {base_target}"
            );
            let a = run(&ModelSettings {
                target_slack: target - base_target,
                ..settings.clone()
            });
            assert!(
                (a.trusted_loss_target - target).abs() < 1e-9,
                "target not applied"
            );

            let exact_lab = &best.2;
            let exact_set: Vec<usize> = (0..n).filter(|&i| exact_lab[i] != by[i]).collect();
            let exact_cost = best.0 as f64 / n as f64;
            let mass: Vec<f64> = a.items.iter().map(|i| i.repair_mass).collect();
            let engine_set = labelweir::eval::metrics::top_k_set(&mass, exact_set.len());
            let others_stay = (0..n).all(|i| exact_set.contains(&i) || mass[i] < 0.5);
            let labels_agree = exact_set
                .iter()
                .all(|&i| a.items[i].proposed_label == exact_lab[i]);
            if engine_set != exact_set
                || !others_stay
                || !labels_agree
                || a.repair_cost > exact_cost + 1.0 / n as f64
            {
                failures.push(format!(
                "k={k} n={n} seed {seed}: exact changes {exact_set:?} to {:?} (cost {exact_cost:.3}; planted {planted:?}); \
                 engine moves most mass on {engine_set:?}, repair cost {:.3} (target {target:.5} reached: {}, \
                     Φ at the repair point {:.5}, Φ of the exact optimum {:.5}); (index, mass, proposal) = {:?}",
                exact_set.iter().map(|&i| exact_lab[i]).collect::<Vec<_>>(),
                a.repair_cost,
                a.target_reached,
                a.trusted_loss_repaired,
                best.1,
                masses(&a)
            ));
            }
            checked.push((k, n, seed));
            break;
        }
    }
    assert_eq!(
        checked.len(),
        configs.len(),
        "no well-posed instance found for some (K, n): {checked:?}"
    );
    assert!(
        failures.is_empty(),
        "relaxed repair ≠ exact optimum:\n{}",
        failures.join("\n")
    );
}

fn masses(a: &Assessment) -> Vec<(usize, f64, usize)> {
    a.items
        .iter()
        .map(|i| (i.index, i.repair_mass, i.proposed_label))
        .collect()
}

// ---------------------------------------------------------------------------------------------------------
// 5. robustness: no panic, no NaN

/// Every number in the assessment is finite and in its documented range.
fn assert_sane(a: &Assessment, n: usize, k: usize, what: &str) {
    assert_eq!(a.items.len(), n, "{what}: item count");
    assert!(
        (0.0..=1.0).contains(&a.repair_cost),
        "{what}: repair cost {}",
        a.repair_cost
    );
    for v in [
        a.damage,
        a.trusted_loss_pool,
        a.trusted_loss_with_batch,
        a.trusted_loss_repaired,
        a.trusted_loss_target,
    ] {
        assert!(v.is_finite(), "{what}: non-finite loss in {a:?}");
    }
    for it in &a.items {
        for (name, v) in [
            ("suspicion", it.suspicion),
            ("confidence", it.confidence),
            ("repair_mass", it.repair_mass),
            ("repair_signal", it.repair_signal),
            ("learner_doubt", it.learner_doubt),
            ("repair_weight", it.repair_weight),
            ("wrong_probability", it.wrong_probability),
        ] {
            assert!(
                (0.0..=1.0).contains(&v),
                "{what}: item {} {name} = {v}",
                it.index
            );
        }
        assert!(it.proposed_label < k, "{what}: proposed label out of range");
    }
    for v in a
        .path_gammas
        .iter()
        .chain(&a.path_costs)
        .chain(&a.path_losses)
    {
        assert!(v.is_finite(), "{what}: non-finite path value");
    }
    let c = &a.convergence;
    if !(c.inner_converged && c.linear_converged) || c.budget_exhausted {
        assert!(
            !c.notes.is_empty(),
            "{what}: a solve stopped early but no note says which"
        );
    }
}

/// Assess `(bx, by)` in all three pool modes and check sanity.
#[allow(clippy::too_many_arguments)]
fn assess_all_modes(
    what: &str,
    k: usize,
    tx: &Array2<f64>,
    ty: &[usize],
    px: &Array2<f64>,
    py: &[usize],
    bx: &Array2<f64>,
    by: &[usize],
) {
    let settings = ModelSettings::default();
    let st = Standardizer::fit(&[tx.view(), px.view(), bx.view()]).expect("standardise");
    let fm = FeatureMap::new(st.clone(), settings.feature_map, settings.seed).expect("map");
    let w = Array1::ones(ty.len());
    let trusted = TrustedInput {
        x: tx.view(),
        y: ty,
        weight: w.view(),
    };
    let (summary, _) = PoolSummary::fit(&settings, fm, k, px.view(), py).expect("summary");
    for (mode, pool) in [
        ("empty", PoolInput::Empty),
        (
            "exact",
            PoolInput::Exact {
                x: px.view(),
                y: py,
            },
        ),
        ("summary", PoolInput::Summary(&summary)),
    ] {
        let a = assess(&settings, &st, k, trusted, pool, bx.view(), by)
            .unwrap_or_else(|e| panic!("{what} ({mode}): {e}"));
        assert_sane(&a, by.len(), k, &format!("{what} ({mode})"));
    }
}

fn base_data(seed: u64, pool: usize, batch: usize) -> [(Array2<f64>, Vec<usize>); 3] {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let c = [[-1.0, 0.0], [1.0, 0.0], [0.0, 1.5]];
    let t = blobs(&c, &[5, 5, 5], 0.8, &mut rng);
    let p = blobs(
        &c,
        &[pool / 3, pool / 3, pool - 2 * (pool / 3)],
        0.8,
        &mut rng,
    );
    let b = blobs(
        &c,
        &[batch / 3, batch / 3, batch - 2 * (batch / 3)],
        0.8,
        &mut rng,
    );
    [t, p, b]
}

/// Apply `f` to every feature matrix (trusted, pool, batch).
fn map_features(
    d: &[(Array2<f64>, Vec<usize>); 3],
    f: impl Fn(&Array2<f64>) -> Array2<f64>,
) -> [(Array2<f64>, Vec<usize>); 3] {
    [0, 1, 2].map(|i| (f(&d[i].0), d[i].1.clone()))
}

#[test]
fn separable_data_gives_finite_scores() {
    // Classes 40 standard deviations apart: the unregularised optimum is at infinity; L2 keeps it finite.
    let d = base_data(11, 60, 30);
    let far = map_features(&d, |x| x * 40.0);
    let [(tx, ty), (px, py), (bx, mut by)] = far;
    by[0] = (by[0] + 1) % 3;
    assess_all_modes("separable", 3, &tx, &ty, &px, &py, &bx, &by);
}

#[test]
fn duplicated_collinear_and_constant_features_give_finite_scores() {
    let d = base_data(12, 60, 30);
    let widened = map_features(&d, |x| {
        let n = x.nrows();
        let mut out = Array2::zeros((n, 5));
        for i in 0..n {
            out[[i, 0]] = x[[i, 0]];
            out[[i, 1]] = x[[i, 1]];
            out[[i, 2]] = x[[i, 0]]; // duplicate
            out[[i, 3]] = 2.0 * x[[i, 0]] - 3.0 * x[[i, 1]]; // collinear
            out[[i, 4]] = 7.25; // constant
        }
        out
    });
    let [(tx, ty), (px, py), (bx, mut by)] = widened;
    by[1] = (by[1] + 1) % 3;
    assess_all_modes(
        "duplicated/collinear/constant",
        3,
        &tx,
        &ty,
        &px,
        &py,
        &bx,
        &by,
    );
}

#[test]
fn single_class_batch_gives_finite_scores() {
    let [(tx, ty), (px, py), (bx, by)] = base_data(13, 60, 30);
    let rows: Vec<usize> = (0..by.len()).filter(|&i| by[i] == 1).collect();
    let bx1 = bx.select(Axis(0), &rows);
    let by1 = vec![1; rows.len()];
    assess_all_modes("single-class batch", 3, &tx, &ty, &px, &py, &bx1, &by1);
    // Also a batch that is entirely one (wrong) class.
    let by_wrong = vec![0; rows.len()];
    assess_all_modes("single wrong class", 3, &tx, &ty, &px, &py, &bx1, &by_wrong);
}

#[test]
fn batch_larger_than_pool_gives_finite_scores() {
    let [(tx, ty), (px, py), (bx, mut by)] = base_data(14, 6, 300);
    for i in (0..by.len()).step_by(10) {
        by[i] = (by[i] + 2) % 3;
    }
    assess_all_modes("batch ≫ pool", 3, &tx, &ty, &px, &py, &bx, &by);
}

#[test]
fn huge_feature_magnitudes_give_finite_scores() {
    // 1e12 offsets and scales: standardisation must not lose the spread to cancellation.
    let d = base_data(15, 60, 30);
    let huge = map_features(&d, |x| x.mapv(|v| 1e12 + 1e10 * v));
    let [(tx, ty), (px, py), (bx, mut by)] = huge;
    by[2] = (by[2] + 1) % 3;
    assess_all_modes("huge magnitudes", 3, &tx, &ty, &px, &py, &bx, &by);
    let d = base_data(16, 60, 30);
    let huge = map_features(&d, |x| x * 1e12);
    let [(tx, ty), (px, py), (bx, by)] = huge;
    assess_all_modes("huge scale", 3, &tx, &ty, &px, &py, &bx, &by);
}

// ---------------------------------------------------------------------------------------------------------
// 6. incremental (pool summary) against exact (pool re-solve) mode

/// Delivered labels and the mask of flipped items, as the attack functions return them.
type Flips = (Vec<usize>, Vec<bool>);

/// Incremental against exact mode on plant batches of 300 items, 10% uniform and region flips, ≤ 10 trusted
/// items per class: Spearman's ρ of the suspicions, the shared top 20, the reference signal's ρ, and the
/// repair costs and damages of both modes.
fn mode_agreement(
    settings: &ModelSettings,
    pool_items: usize,
) -> Vec<(String, f64, usize, f64, [f64; 4])> {
    use labelweir::eval::metrics::{spearman, top_k_set};
    use labelweir::scenario::{self, Plant};
    let plant = Plant::new(5);
    let (tx, ty) = plant.sample_per_class(10, 51);
    let (px, py) = plant.sample(pool_items, 52);
    let (bx, by_clean) = plant.sample(300, 53);
    let k = Plant::N_CLASSES;
    let st = Standardizer::fit(&[tx.view(), px.view(), bx.view()]).expect("standardise");
    let fm = FeatureMap::new(st.clone(), settings.feature_map, settings.seed).expect("map");
    let (summary, _) = PoolSummary::fit(settings, fm, k, px.view(), &py).expect("summary");
    let w = Array1::ones(ty.len());
    let trusted = TrustedInput {
        x: tx.view(),
        y: &ty,
        weight: w.view(),
    };
    let attacks: [(&str, Flips); 2] = [
        (
            "uniform 10%",
            scenario::uniform_flips(&by_clean, k, 0.10, 54),
        ),
        (
            "region 10%",
            scenario::region_flips(bx.view(), &by_clean, scenario::class::PAPER, 0.10, 55),
        ),
    ];
    let mut out = Vec::new();
    for (name, (by, _)) in attacks {
        let inc = assess(
            settings,
            &st,
            k,
            trusted,
            PoolInput::Summary(&summary),
            bx.view(),
            &by,
        )
        .expect("inc");
        let ex = assess(
            settings,
            &st,
            k,
            trusted,
            PoolInput::Exact {
                x: px.view(),
                y: &py,
            },
            bx.view(),
            &by,
        )
        .expect("exact");
        let a: Vec<f64> = inc.items.iter().map(|i| i.suspicion).collect();
        let b: Vec<f64> = ex.items.iter().map(|i| i.suspicion).collect();
        let rho = spearman(&a, &b).expect("ρ defined");
        let (ta, tb) = (top_k_set(&a, 20), top_k_set(&b, 20));
        let shared = ta.iter().filter(|i| tb.contains(i)).count();
        let col = |a: &Assessment| {
            a.items
                .iter()
                .map(|i| i.learner_doubt)
                .collect::<Vec<f64>>()
        };
        let rho_ref = spearman(&col(&inc), &col(&ex)).unwrap_or(0.0);
        out.push((
            name.to_string(),
            rho,
            shared,
            rho_ref,
            [inc.repair_cost, ex.repair_cost, inc.damage, ex.damage],
        ));
    }
    out
}

#[test]
fn incremental_mode_is_exact_while_the_pool_fits_in_the_reservoir() {
    // Issue 2's criterion: Spearman ≥ 0.99 on suspicion and the same top 20. With a pool of 3,000 items
    // (10× the batch) the summary's reservoir (capacity 4,096) holds the whole pool, so the incremental
    // mode's objective is the exact one and the two modes must agree to solver tolerance.
    let settings = ModelSettings::default();
    assert!(settings.pool_reservoir >= 3000);
    for (name, rho, shared, _, [ci, ce, di, de]) in mode_agreement(&settings, 3000) {
        assert!(
            rho >= 0.999 && shared == 20,
            "{name}: Spearman {rho:.4}, top-20 shared {shared}/20"
        );
        assert!((ci - ce).abs() < 1e-3, "{name}: repair cost {ci} vs {ce}");
        assert!((di - de).abs() < 1e-4, "{name}: damage {di} vs {de}");
    }
}

#[test]
fn reservoir_corrects_the_quadratic_pool_model_beyond_its_capacity() {
    // Pool 6,000 items (20× the batch), reservoir 2,000: the reservoir is a uniform sample and corrects the
    // quadratic model's error beyond second order (a control variate). The quadratic alone (reservoir off)
    // overstates the damage of a poisoned batch, because the loss of a confidently fitted pool rises
    // faster than its quadratic model once the batch pushes against it (measured: damage 2–4× the exact
    // value, ρ 0.95–0.99). Asserted: with the reservoir the suspicions meet issue 2's ρ ≥ 0.99 (measured
    // 0.997–0.999) and the damage is closer to the exact one than the quadratic alone gets it. The top 20
    // can still differ by a few items here (measured 16–20 of 20): under the pool reference the repair's
    // share of the suspicion is the mass moved where the path meets the target, and a sampled control
    // variate moves that crossing a little. On the benchmark's cases the pool fits in the reservoir and the
    // modes agree exactly (see the test above and `labelweir bench engine`).
    let with = ModelSettings {
        pool_reservoir: 2000,
        ..ModelSettings::default()
    };
    let without = ModelSettings {
        pool_reservoir: 0,
        ..ModelSettings::default()
    };
    let a = mode_agreement(&with, 6000);
    let b = mode_agreement(&without, 6000);
    let mut failures = Vec::new();
    for ((name, rho, shared, rho_ref, [_, _, di, de]), (_, rho0, shared0, _, [_, _, di0, _])) in
        a.iter().zip(&b)
    {
        eprintln!(
            "{name}: reservoir ρ {rho:.4} top-20 {shared}/20 damage {di:.4} vs exact {de:.4}; \
             quadratic alone ρ {rho0:.4} top-20 {shared0}/20 damage {di0:.4}"
        );
        if *rho < 0.99 || *shared < 15 || *rho_ref < 0.999 {
            failures.push(format!(
                "{name}: Spearman {rho:.4}, top-20 shared {shared}/20, reference ρ {rho_ref:.4}"
            ));
        }
        if (di - de).abs() >= (di0 - de).abs() {
            failures.push(format!(
                "{name}: damage with the reservoir {di:.4}, quadratic alone {di0:.4}, exact {de:.4}"
            ));
        }
    }
    assert!(failures.is_empty(), "{}", failures.join("\n"));
}

// ---------------------------------------------------------------------------------------------------------
// 7. the benchmark command end to end

/// `bench casebook --config` reads the settings a paired comparison replays under: a file that does not
/// parse or holds an invalid setting is refused with the configuration exit code (78) before any stream
/// runs, and names the file.
#[test]
fn bench_casebook_refuses_a_bad_settings_file() {
    let dir = tempfile::tempdir().expect("tempdir");
    let bad = dir.path().join("bad.toml");
    std::fs::write(&bad, "[model]\nflag_threshold = 7.0\n").expect("write");
    for path in [bad, dir.path().join("missing.toml")] {
        let out = std::process::Command::new(env!("CARGO_BIN_EXE_labelweir"))
            .args(["bench", "casebook", "--quick", "--config"])
            .arg(&path)
            .output()
            .expect("run labelweir");
        let stderr = String::from_utf8_lossy(&out.stderr);
        assert_eq!(out.status.code(), Some(78), "stderr: {stderr}");
        assert!(stderr.contains(&*path.to_string_lossy()), "{stderr}");
        assert!(out.stdout.is_empty(), "no casebook printed");
    }
}

#[test]
fn bench_engine_quick_json_reports_every_attack_and_baseline() {
    let out = std::process::Command::new(env!("CARGO_BIN_EXE_labelweir"))
        .args(["bench", "engine", "--quick", "--no-scale", "--json"])
        .output()
        .expect("run labelweir");
    assert_eq!(
        out.status.code(),
        Some(0),
        "stderr: {}",
        String::from_utf8_lossy(&out.stderr)
    );
    let v: serde_json::Value = serde_json::from_slice(&out.stdout).expect("one JSON document");
    let cases = v["cases"].as_array().expect("cases");
    for source in ["iris", "winequality", "recycling plant"] {
        let mine: Vec<&serde_json::Value> =
            cases.iter().filter(|c| c["source"] == source).collect();
        // clean + 3 attacks × 3 rates + 2 systematic attacks × 3 pool conditions (+ wet cardboard on the
        // plant)
        let expected = if source == "recycling plant" { 17 } else { 16 };
        assert_eq!(mine.len(), expected, "{source}");
        for c in mine {
            let cost = c["repair_cost"].as_f64().expect("repair cost");
            assert!((0.0..=1.0).contains(&cost), "{source}: repair cost {cost}");
            let methods = c["methods"].as_array().expect("methods");
            if c["attack"]["kind"] == "clean" {
                assert!(methods.is_empty());
                continue;
            }
            assert_eq!(
                methods.len(),
                8,
                "engine, four signals alone, two baselines, the ceiling"
            );
            for m in methods {
                for key in ["auroc", "average_precision", "precision_at_half_recall"] {
                    let x = m[key]
                        .as_f64()
                        .unwrap_or_else(|| panic!("{source}: {key} missing in {m}"));
                    assert!((0.0..=1.0).contains(&x), "{source}: {key} = {x}");
                }
            }
        }
    }
    // uniform and region flips at 10%, first repetition, on each of the three sources
    assert_eq!(v["mode_agreement"].as_array().map(Vec::len), Some(6));
    assert!(
        v["scale"].as_array().is_some_and(Vec::is_empty),
        "--no-scale skips the sweep"
    );
    assert!(v["targets"].as_array().is_some_and(|t| !t.is_empty()));
}

/// A tiny run of the throughput command measures the whole path: every batch got a verdict, every stage
/// has a measured mean time (finite; scoring's above 0), and the sustained rate is the items over the wall time it
/// prints. The numbers themselves are measured, not asserted. Shown to fail by planted defects (a stage
/// left out of the stage histogram: its mean prints as NaN; the rate computed over the setup time as well:
/// it no longer matches items / wall).
#[test]
fn bench_daemon_measures_the_whole_path() {
    let (batches, items) = (3usize, 40usize);
    let out = std::process::Command::new(env!("CARGO_BIN_EXE_labelweir"))
        .args([
            "bench",
            "daemon",
            "--batches",
            &batches.to_string(),
            "--items",
            &items.to_string(),
            "--pool",
            "300",
        ])
        .output()
        .expect("run labelweir");
    let text = String::from_utf8_lossy(&out.stdout);
    assert_eq!(
        out.status.code(),
        Some(0),
        "{text}\n{}",
        String::from_utf8_lossy(&out.stderr)
    );
    // The number after `label` on its line.
    let value = |label: &str| -> f64 {
        let line = text
            .lines()
            .find(|l| l.trim_start().starts_with(label))
            .unwrap_or_else(|| panic!("no line {label:?} in:\n{text}"));
        line.trim_start()[label.len()..]
            .split_whitespace()
            .next()
            .and_then(|v| v.parse().ok())
            .unwrap_or_else(|| panic!("no number after {label:?}: {line}"))
    };
    let verdicts: usize = text
        .lines()
        .find_map(|l| l.trim_start().strip_prefix("verdicts:"))
        .unwrap_or_else(|| panic!("no verdicts line in:\n{text}"))
        .split(',')
        .map(|kv| {
            kv.split_whitespace()
                .last()
                .and_then(|n| n.parse::<usize>().ok())
                .unwrap_or_else(|| panic!("verdict count {kv:?}"))
        })
        .sum();
    assert_eq!(verdicts, batches, "every batch got a verdict:\n{text}");
    // A stage with no observation prints its mean as NaN; `decide` takes microseconds and may print 0.0000.
    for stage in ["claim", "parse", "score", "decide", "persist", "notice"] {
        let mean = value(stage);
        assert!(
            mean.is_finite() && mean >= 0.0,
            "stage {stage} not measured ({mean}):\n{text}"
        );
    }
    assert!(
        value("score") > 0.0,
        "scoring takes measurable time:\n{text}"
    );
    // Printed as {:.2} s and {:.0} items/s: allow for that rounding.
    let wall = value("wall time, first drop to last verdict:");
    let rate = value("sustained rate:");
    let total = (batches * items) as f64;
    assert!(wall > 0.0, "{text}");
    assert!(
        rate >= total / (wall + 0.005) - 0.5 && rate <= total / (wall - 0.005).max(1e-9) + 0.5,
        "rate {rate} items/s vs {total} items in {wall} s:\n{text}"
    );
}

/// The implicit-function solves `H v = g` by conjugate gradients (the path for models with more than
/// `dense_max_params` parameters) against the dense Cholesky path on the same batch: both solve the same
/// linear system, so the repair cost and the items' repair signals agree to the solvers' tolerances (common
/// practice: two solvers of one system agree; no outside source), and the CG path reports the iterations it
/// ran. Mutation testing (DEVELOPERS.md, "Mutation testing") found that no library test reached the CG path
/// of `solve_h`: its iteration count could be subtracted or multiplied unnoticed.
#[test]
fn cg_and_dense_implicit_function_solves_agree_and_cg_counts_its_iterations() {
    let [(tx, ty), (px, py), (bx, mut by)] = base_data(21, 60, 30);
    for i in [0, 7, 14] {
        by[i] = (by[i] + 1) % 3;
    }
    let dense = ModelSettings::default();
    let cg = ModelSettings {
        dense_max_params: 0,
        ..ModelSettings::default()
    };
    let st = Standardizer::fit(&[tx.view(), px.view(), bx.view()]).expect("standardise");
    let a_dense = assess_exact(&dense, &st, 3, (&tx, &ty), (&px, &py), (&bx, &by));
    let a_cg = assess_exact(&cg, &st, 3, (&tx, &ty), (&px, &py), (&bx, &by));
    assert_eq!(a_dense.convergence.linear_solver, "dense");
    assert_eq!(a_cg.convergence.linear_solver, "cg");
    assert!(a_cg.convergence.linear_converged, "{:?}", a_cg.convergence);
    // A well-posed problem: every inner solve converged, and the record says so.
    for a in [&a_dense, &a_cg] {
        assert!(a.convergence.inner_converged, "{:?}", a.convergence);
    }
    // At least one CG iteration per solve; the path makes several solves.
    assert!(
        a_cg.convergence.linear_iterations >= 3,
        "{:?}",
        a_cg.convergence
    );
    assert!(
        (a_cg.repair_cost - a_dense.repair_cost).abs() <= 1e-3 * (1.0 + a_dense.repair_cost.abs()),
        "repair cost: cg {} vs dense {}",
        a_cg.repair_cost,
        a_dense.repair_cost
    );
    for (c, d) in a_cg.items.iter().zip(&a_dense.items) {
        assert!(
            (c.repair_signal - d.repair_signal).abs() <= 0.05,
            "repair signal: cg {} vs dense {}",
            c.repair_signal,
            d.repair_signal
        );
    }
}
