//! Unit checks of the engine's derivatives and behaviour on planted bugs (seeded, relative tolerances).

use ndarray::{Array1, Array2};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rand_distr::{Distribution, StandardNormal};

use super::learner::{one_hot, solve, trusted_loss, Objective};
use super::repair::label_hypergradient;
use super::*;

/// Three Gaussian classes in `d` dimensions with unit spread, centres `2·e_c`.
fn blobs(n: usize, d: usize, k: usize, seed: u64) -> (Array2<f64>, Vec<usize>) {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let mut x = Array2::zeros((n, d));
    let mut y = Vec::with_capacity(n);
    for i in 0..n {
        let c = rng.random_range(0..k);
        y.push(c);
        for j in 0..d {
            let g: f64 = StandardNormal.sample(&mut rng);
            x[[i, j]] = g + if j % k == c { 2.0 } else { 0.0 };
        }
    }
    (x, y)
}

fn auroc(scores: &[f64], positive: &[bool]) -> f64 {
    // Mann–Whitney U / (n₊ n₋), ties counted one half (common practice).
    let mut u = 0.0;
    let (mut np, mut nn) = (0.0, 0.0);
    for (i, &pi) in positive.iter().enumerate() {
        if !pi {
            nn += 1.0;
            continue;
        }
        np += 1.0;
        for (j, &pj) in positive.iter().enumerate() {
            if !pj {
                u += if scores[i] > scores[j] {
                    1.0
                } else if scores[i] == scores[j] {
                    0.5
                } else {
                    0.0
                };
            }
        }
    }
    u / (np * nn)
}

#[test]
fn gradient_matches_finite_differences() {
    let (x, y) = blobs(40, 3, 3, 1);
    let fm = FeatureMap::new(
        Standardizer::fit(&[x.view()]).unwrap(),
        FeatureMapKind::Linear,
        1,
    )
    .unwrap();
    let phi = fm.apply(x.view()).unwrap();
    let yy = one_hot(&y, 3);
    let obj = Objective {
        phi: phi.view(),
        y: yy.view(),
        weight: None,
        norm: 40.0,
        l2: 0.05,
        prior: None,
    };
    let mut rng = ChaCha8Rng::seed_from_u64(2);
    let theta = Array1::from_shape_fn(phi.ncols() * 3, |_| rng.random_range(-1.0..1.0));
    let (_, g, prob) = obj.value_grad(&theta);
    let h = 1e-6;
    for idx in 0..theta.len() {
        let mut tp = theta.clone();
        tp[idx] += h;
        let mut tm = theta.clone();
        tm[idx] -= h;
        let fd = (obj.value_grad(&tp).0 - obj.value_grad(&tm).0) / (2.0 * h);
        assert!(
            (fd - g[idx]).abs() <= 1e-6 * (1.0 + g[idx].abs()),
            "idx {idx}: fd {fd} vs {}",
            g[idx]
        );
    }
    // Hessian-vector product against a central difference of gradients.
    let v = Array1::from_shape_fn(theta.len(), |_| rng.random_range(-1.0..1.0));
    let hv = obj.hvp(prob.view(), &v);
    let gp = obj.value_grad(&(&theta + &(&v * h))).1;
    let gm = obj.value_grad(&(&theta - &(&v * h))).1;
    let fd = (gp - gm) / (2.0 * h);
    for (a, b) in hv.iter().zip(fd.iter()) {
        assert!((a - b).abs() <= 1e-5 * (1.0 + a.abs()), "hvp {a} vs fd {b}");
    }
    // The dense Hessian agrees with the product.
    let dense = obj.hessian(prob.view()).dot(&v);
    for (a, b) in hv.iter().zip(dense.iter()) {
        assert!((a - b).abs() <= 1e-10 * (1.0 + a.abs()));
    }
}

#[test]
fn hypergradient_matches_resolved_optima() {
    let (x, y) = blobs(30, 2, 3, 3);
    let (xt, yt) = blobs(12, 2, 3, 4);
    let settings = ModelSettings {
        l2: 0.05,
        inner_tol: 1e-11,
        ..ModelSettings::default()
    };
    let fm = FeatureMap::new(
        Standardizer::fit(&[x.view()]).unwrap(),
        FeatureMapKind::Linear,
        1,
    )
    .unwrap();
    let phi = fm.apply(x.view()).unwrap();
    let phi_t = fm.apply(xt.view()).unwrap();
    let ct = Array1::from_elem(yt.len(), 1.0);
    let yy = one_hot(&y, 3);
    let obj = Objective {
        phi: phi.view(),
        y: yy.view(),
        weight: None,
        norm: 30.0,
        l2: 0.05,
        prior: None,
    };
    let far = std::time::Instant::now() + std::time::Duration::from_secs(30);
    let (theta, rep) = solve(&settings, &obj, Array1::zeros(phi.ncols() * 3), far);
    assert!(rep.converged, "{rep:?}");
    let g = label_hypergradient(&settings, &obj, &theta, 0..30, phi_t.view(), &yt, ct.view());
    let h = 1e-5;
    // Perturb along the simplex (mass moves from class c2 to class c), so Y stays a valid soft labelling;
    // the directional derivative is G[i,c] − G[i,c2].
    for &(i, c, c2) in &[(0usize, 0usize, 1usize), (3, 1, 2), (7, 2, 0), (11, 0, 2)] {
        let mut yp = yy.clone();
        yp[[i, c]] += h;
        yp[[i, c2]] -= h;
        let mut ym = yy.clone();
        ym[[i, c]] -= h;
        ym[[i, c2]] += h;
        let f = |yv: &Array2<f64>| {
            let o = Objective {
                phi: phi.view(),
                y: yv.view(),
                weight: None,
                norm: 30.0,
                l2: 0.05,
                prior: None,
            };
            let (t, r) = solve(&settings, &o, theta.clone(), far);
            assert!(r.converged);
            trusted_loss(phi_t.view(), &yt, ct.view(), &t, 3).0
        };
        let fd = (f(&yp) - f(&ym)) / (2.0 * h);
        let an = g[[i, c]] - g[[i, c2]];
        assert!(
            (fd - an).abs() <= 1e-5 * (1.0 + an.abs()) + 1e-8,
            "({i},{c},{c2}): fd {fd} vs {an}"
        );
    }
}

#[test]
fn planted_region_flips_rank_first_and_clean_batch_costs_little() {
    let k = 3;
    let (xp, yp) = blobs(600, 4, k, 10);
    let (xt, yt) = blobs(24, 4, k, 11);
    let (xb, yb) = blobs(300, 4, k, 12);
    let settings = ModelSettings::default();
    let stdz = Standardizer::fit(&[xt.view(), xp.view(), xb.view()]).unwrap();
    let ct = Array1::from_elem(yt.len(), 1.0);
    let trusted = TrustedInput {
        x: xt.view(),
        y: &yt,
        weight: ct.view(),
    };
    let pool = PoolInput::Exact {
        x: xp.view(),
        y: &yp,
    };
    let clean = assess(&settings, &stdz, k, trusted, pool, xb.view(), &yb).unwrap();
    assert!(
        clean.repair_cost < 0.02,
        "clean batch cost {}",
        clean.repair_cost
    );
    // Region flip: items of class 0 with feature 0 above its median become class 1.
    let mut yf = yb.clone();
    let mut flipped = vec![false; yb.len()];
    for i in 0..yb.len() {
        if yb[i] == 0 && xb[[i, 0]] > 2.0 {
            yf[i] = 1;
            flipped[i] = true;
        }
    }
    assert!(flipped.iter().filter(|f| **f).count() > 10);
    let bad = assess(&settings, &stdz, k, trusted, pool, xb.view(), &yf).unwrap();
    let scores: Vec<f64> = bad.items.iter().map(|s| s.suspicion).collect();
    let a = auroc(&scores, &flipped);
    assert!(a > 0.9, "AUROC {a}");
    assert!(
        bad.repair_cost > clean.repair_cost,
        "{} vs {}",
        bad.repair_cost,
        clean.repair_cost
    );
    assert!(bad.damage > clean.damage);
    // Proposed labels of the flagged planted bugs go back to the true class.
    let fixed = bad
        .items
        .iter()
        .filter(|s| flipped[s.index] && s.proposed_label != s.label);
    let (mut right, mut total) = (0, 0);
    for s in fixed {
        total += 1;
        right += usize::from(s.proposed_label == yb[s.index]);
    }
    assert!(total > 0 && right * 10 >= total * 9, "{right}/{total}");
    for s in &bad.items {
        assert!(s.suspicion.is_finite() && (0.0..=1.0).contains(&s.suspicion));
    }
}

#[test]
fn summary_mode_agrees_with_exact_mode() {
    let k = 3;
    // Pool ten times the batch: the quadratic pool model is accurate near θ_P, and a batch moves θ little.
    let (xp, yp) = blobs(2000, 4, k, 20);
    let (xt, yt) = blobs(24, 4, k, 21);
    let (xb, mut yb) = blobs(200, 4, k, 22);
    for v in yb.iter_mut().take(20) {
        *v = (*v + 1) % k;
    }
    let settings = ModelSettings::default();
    let stdz = Standardizer::fit(&[xt.view(), xp.view()]).unwrap();
    let fm = FeatureMap::new(stdz.clone(), settings.feature_map, settings.seed).unwrap();
    let (summary, rep) = PoolSummary::fit(&settings, fm, k, xp.view(), &yp).unwrap();
    assert!(rep.converged);
    let ct = Array1::from_elem(yt.len(), 1.0);
    let trusted = TrustedInput {
        x: xt.view(),
        y: &yt,
        weight: ct.view(),
    };
    let exact = assess(
        &settings,
        &stdz,
        k,
        trusted,
        PoolInput::Exact {
            x: xp.view(),
            y: &yp,
        },
        xb.view(),
        &yb,
    )
    .unwrap();
    let inc = assess(
        &settings,
        &stdz,
        k,
        trusted,
        PoolInput::Summary(&summary),
        xb.view(),
        &yb,
    )
    .unwrap();
    let top = |a: &Assessment| {
        a.ranked()
            .iter()
            .take(20)
            .map(|s| s.index)
            .collect::<std::collections::BTreeSet<_>>()
    };
    let overlap = top(&exact).intersection(&top(&inc)).count();
    assert!(overlap >= 18, "top-20 overlap {overlap}");
    assert!(
        (exact.damage - inc.damage).abs() < 2e-3 + 0.15 * exact.damage.abs(),
        "{} vs {}",
        exact.damage,
        inc.damage
    );
}

/// Absorb `x, y` into an empty summary in three batches, and fit the same items at once.
fn absorbed_and_fitted(settings: &ModelSettings) -> (PoolSummary, PoolSummary) {
    let k = 3;
    let (x, y) = blobs(900, 3, k, 30);
    let stdz = Standardizer::fit(&[x.view()]).unwrap();
    let fm = FeatureMap::new(stdz, settings.feature_map, settings.seed).unwrap();
    let mut inc = PoolSummary::empty(fm.clone(), k);
    for c in 0..3 {
        let r = c * 300..(c + 1) * 300;
        inc.absorb(settings, x.slice(ndarray::s![r.clone(), ..]), &y[r])
            .unwrap();
    }
    let (exact, _) = PoolSummary::fit(settings, fm, k, x.view(), &y).unwrap();
    assert_eq!(inc.len(), 900);
    (inc, exact)
}

fn max_abs<D: ndarray::Dimension>(a: &ndarray::Array<f64, D>) -> f64 {
    a.iter().fold(0.0f64, |m, &v| m.max(v.abs()))
}

#[test]
fn absorbing_batches_tracks_the_exact_summary() {
    // Quadratic model alone (no reservoir): the carried Hessian drifts, the optimum stays close.
    let settings = ModelSettings {
        pool_reservoir: 0,
        ..ModelSettings::default()
    };
    let (inc, exact) = absorbed_and_fitted(&settings);
    let diff = max_abs(&(&inc.w - &exact.w));
    let scale = max_abs(&exact.w);
    assert!(diff <= 0.05 * scale, "max |ΔW| {diff} vs scale {scale}");
    assert!(inc.reservoir_y.is_empty());
}

/// The pool's sharpness (and the model the clean level's labels follow) is measured when a summary is
/// fitted from items, carried unchanged as batches are absorbed, and never measured on a pool that only grew by absorbing (its items would be selected by
/// the admission rule in the daemon; see `PoolSummary::sharpness`).
#[test]
fn the_pools_sharpness_is_measured_at_fit_and_carried_through_absorbing() {
    let settings = ModelSettings::default();
    let (inc, exact) = absorbed_and_fitted(&settings);
    assert!(inc.sharpness().is_none(), "grew by absorbing: not measured");
    assert!(
        inc.labels_model().is_none(),
        "grew by absorbing: no model at fit"
    );
    let at_fit = exact.sharpness().expect("measured at fit");
    let model_at_fit = exact.labels_model().expect("the model at fit");
    assert_eq!(model_at_fit, exact.theta());
    assert!(at_fit.beta.is_finite() && at_fit.standard_error > 0.0 && at_fit.items >= 10);
    let mut grown = exact.clone();
    let (x, y) = blobs(300, 3, 3, 31);
    grown.absorb(&settings, x.view(), &y).unwrap();
    assert_eq!(grown.sharpness(), Some(at_fit));
    assert_eq!(grown.labels_model(), Some(model_at_fit.clone()));
    assert_ne!(
        grown.theta(),
        model_at_fit,
        "absorbing moved the pool model"
    );
}

#[test]
fn absorbing_is_exact_while_the_pool_fits_in_the_reservoir() {
    // With the reservoir holding every item, each absorb solves the exact objective and refreshes the
    // gradient and Hessian from the items: the summary equals a fit on all items up to solver tolerance.
    let settings = ModelSettings::default();
    let (inc, exact) = absorbed_and_fitted(&settings);
    assert!(inc.reservoir_is_whole_pool());
    assert!(max_abs(&(&inc.w - &exact.w)) <= 1e-5 * max_abs(&exact.w));
    assert!(max_abs(&(&inc.hess - &exact.hess)) <= 1e-5 * max_abs(&exact.hess));
    assert!(max_abs(&(&inc.grad - &exact.grad)) <= 1e-6);
    assert!(
        (inc.loss - exact.loss).abs() <= 1e-7,
        "loss {} vs {}",
        inc.loss,
        exact.loss
    );
}

#[test]
fn reservoir_is_a_uniform_sample_of_the_pool() {
    // Algorithm R (Vitter, "Random Sampling with a Reservoir", ACM TOMS 1985): after n items, each item is
    // in a reservoir of capacity r with probability r/n, wherever it came in the stream. 500 items reach
    // the summary as a fit of 100 and four absorbed batches of 100; capacity 50, so every item's inclusion
    // probability is 0.1. Over 300 seeds, the mean inclusion rate of the first 100 items (the ones that
    // filled the reservoir) and of the last 100 must both be 0.1 (σ of each mean ≈ 0.0017; the bound is
    // ±0.02). A reservoir that kept the first items, or favoured late ones, fails by a wide margin.
    let k = 2;
    let n = 500;
    let x = Array2::from_shape_fn((n, 1), |(i, _)| i as f64);
    let y: Vec<usize> = (0..n).map(|i| i % k).collect();
    let mut hits = vec![0usize; n];
    let seeds = 300;
    for seed in 0..seeds {
        let settings = ModelSettings {
            pool_reservoir: 50,
            seed,
            inner_max_iters: 5,
            ..ModelSettings::default()
        };
        let stdz = Standardizer::fit(&[x.view()]).unwrap();
        let fm = FeatureMap::new(stdz, settings.feature_map, settings.seed).unwrap();
        let first = x.slice(ndarray::s![0..100, ..]);
        let (mut s, _) = PoolSummary::fit(&settings, fm.clone(), k, first, &y[..100]).unwrap();
        for b in 1..5 {
            let r = b * 100..(b + 1) * 100;
            s.absorb(&settings, x.slice(ndarray::s![r.clone(), ..]), &y[r])
                .unwrap();
        }
        assert_eq!(s.reservoir_y.len(), 50);
        // Identify items by their mapped feature (the standardised index, a strictly increasing map).
        let phi = fm.apply(x.view()).unwrap();
        for row in s.reservoir_phi.rows() {
            let i = (0..n)
                .find(|&i| phi[[i, 0]] == row[0])
                .expect("a reservoir row is a pool item");
            hits[i] += 1;
        }
    }
    let rate = |r: std::ops::Range<usize>| {
        let len = r.len() as f64;
        r.map(|i| hits[i] as f64).sum::<f64>() / (len * seeds as f64)
    };
    let (early, late) = (rate(0..100), rate(400..500));
    assert!(
        (early - 0.1).abs() < 0.02,
        "first 100 items kept at rate {early}"
    );
    assert!(
        (late - 0.1).abs() < 0.02,
        "last 100 items kept at rate {late}"
    );
}

#[test]
fn chord_method_reaches_newtons_optimum() {
    // The chord method on a fixed factor (here the Hessian at θ = 0) must land on Newton's optimum.
    use super::learner::{train_chord, train_newton};
    use super::linalg::Cholesky;
    let k = 3;
    let (x, y) = blobs(400, 4, k, 41);
    let stdz = Standardizer::fit(&[x.view()]).unwrap();
    let fm = FeatureMap::new(stdz, FeatureMapKind::Linear, 1).unwrap();
    let phi = fm.apply(x.view()).unwrap();
    let yy = one_hot(&y, k);
    let obj = Objective {
        phi: phi.view(),
        y: yy.view(),
        weight: None,
        norm: 400.0,
        l2: 1e-2,
        prior: None,
    };
    let m = phi.ncols() * k;
    let far = std::time::Instant::now() + std::time::Duration::from_secs(60);
    let (theta_n, rep_n) = train_newton(&obj, Array1::zeros(m), 1e-9, 100, far);
    let (_, _, prob0) = obj.value_grad(&Array1::zeros(m));
    let factor = Cholesky::factor(obj.hessian(prob0.view())).unwrap();
    let (theta_c, rep_c, _) = train_chord(&obj, Array1::zeros(m), &factor, 1e-9, 500, far);
    assert!(rep_n.converged && rep_c.converged, "{rep_n:?} {rep_c:?}");
    let diff = max_abs(&(&theta_n - &theta_c));
    assert!(diff < 1e-6, "chord vs Newton: max |Δθ| {diff}");
}

/// The learner's value, gradient, Hessian-vector product and dense Hessian with every optional part in
/// play — row weights other than 1, soft labels, the pool's quadratic term — where
/// `gradient_matches_finite_differences` has unit weights, one-hot labels and no prior. The value is
/// checked against the objective written out naively in the test
/// (`f = (1/N) Σ_i w_i Σ_k −Y_ik log softmax(z_i)_k + ½ Σ_j r_j θ_j² + a (gᵀd + ½ dᵀHd)`, `d = θ − θ₀`), the
/// gradient against central differences of that naive value, the product against central differences
/// of the gradient, and the dense Hessian against the product. Written against mutants in the weighting
/// and prior code, which the unweighted, prior-free test cannot see; in the mutation run of 2026-12-04
/// (DEVELOPERS.md) `learner.rs:201:18` (`!=` → `==`) and `202:49` (`*` → `/`) in `value_grad` each
/// failed it.
#[test]
fn derivatives_match_finite_differences_with_weights_soft_labels_and_a_prior() {
    use super::learner::{Quadratic, INTERCEPT_RIDGE};
    let (n, k) = (30, 3);
    let (x, y) = blobs(n, 2, k, 5);
    let fm = FeatureMap::new(
        Standardizer::fit(&[x.view()]).unwrap(),
        FeatureMapKind::Linear,
        1,
    )
    .unwrap();
    let phi = fm.apply(x.view()).unwrap();
    let p = phi.ncols();
    let m = p * k;
    let mut rng = ChaCha8Rng::seed_from_u64(6);
    // Soft labels: 0.7 on the given class, the rest spread at random (rows sum to 1).
    let mut yy = one_hot(&y, k) * 0.7;
    for mut row in yy.rows_mut() {
        let w: Vec<f64> = (0..k).map(|_| rng.random_range(0.0..1.0)).collect();
        let s: f64 = w.iter().sum();
        for c in 0..k {
            row[c] += 0.3 * w[c] / s;
        }
    }
    let weight = Array1::from_shape_fn(n, |_| rng.random_range(0.2..3.0));
    let center = Array1::from_shape_fn(m, |_| rng.random_range(-0.5..0.5));
    let qgrad = Array1::from_shape_fn(m, |_| rng.random_range(-0.3..0.3));
    let a = Array2::from_shape_fn((m, m), |_| rng.random_range(-0.5..0.5));
    let qhess = a.dot(&a.t()) + Array2::<f64>::eye(m);
    let (norm, l2, scale) = (45.0, 0.05, 0.4);
    let obj = Objective {
        phi: phi.view(),
        y: yy.view(),
        weight: Some(weight.view()),
        norm,
        l2,
        prior: Some(Quadratic {
            scale,
            center: center.view(),
            grad: qgrad.view(),
            hess: qhess.view(),
            kron: None,
        }),
    };
    let naive = |theta: &Array1<f64>| -> f64 {
        let mut f = 0.0;
        for i in 0..n {
            let z: Vec<f64> = (0..k)
                .map(|c| (0..p).map(|j| phi[[i, j]] * theta[c * p + j]).sum())
                .collect();
            let lse = z.iter().map(|v| v.exp()).sum::<f64>().ln();
            f += weight[i] * (0..k).map(|c| -yy[[i, c]] * (z[c] - lse)).sum::<f64>();
        }
        f /= norm;
        for (j, t) in theta.iter().enumerate() {
            let r = if j % p == p - 1 { INTERCEPT_RIDGE } else { l2 };
            f += 0.5 * r * t * t;
        }
        let d = theta - &center;
        f + scale * (qgrad.dot(&d) + 0.5 * d.dot(&qhess.dot(&d)))
    };
    let theta = Array1::from_shape_fn(m, |_| rng.random_range(-1.0..1.0));
    let (f, g, prob) = obj.value_grad(&theta);
    assert!(
        (f - naive(&theta)).abs() <= 1e-12 * (1.0 + f.abs()),
        "value {f} vs {}",
        naive(&theta)
    );
    let h = 1e-5;
    for idx in 0..m {
        let mut tp = theta.clone();
        tp[idx] += h;
        let mut tm = theta.clone();
        tm[idx] -= h;
        let fd = (naive(&tp) - naive(&tm)) / (2.0 * h);
        assert!(
            (fd - g[idx]).abs() <= 1e-6 * (1.0 + g[idx].abs()),
            "gradient {idx}: fd {fd} vs {}",
            g[idx]
        );
    }
    let v = Array1::from_shape_fn(m, |_| rng.random_range(-1.0..1.0));
    let hv = obj.hvp(prob.view(), &v);
    let fd = (obj.value_grad(&(&theta + &(&v * h))).1 - obj.value_grad(&(&theta - &(&v * h))).1)
        / (2.0 * h);
    for (a, b) in hv.iter().zip(fd.iter()) {
        assert!((a - b).abs() <= 1e-6 * (1.0 + a.abs()), "hvp {a} vs fd {b}");
    }
    let dense = obj.hessian(prob.view()).dot(&v);
    for (a, b) in hv.iter().zip(dense.iter()) {
        assert!(
            (a - b).abs() <= 1e-10 * (1.0 + a.abs()),
            "hessian·v {b} vs hvp {a}"
        );
    }
}

/// Above the dense threshold the summary keeps Kronecker factors (not `(p·K)²` numbers), survives a JSON
/// round trip with them, and a summary saved before the factors existed (no `kron` key) still loads, as a
/// dense one.
#[test]
fn kronecker_summaries_round_trip_and_old_summaries_still_load() {
    let k = 3;
    let (x, y) = blobs(300, 4, k, 40);
    let stdz = Standardizer::fit(&[x.view()]).unwrap();
    let fm = FeatureMap::new(stdz, FeatureMapKind::Linear, 1).unwrap();
    let kron_settings = ModelSettings {
        dense_max_params: 0,
        ..ModelSettings::default()
    };
    let (ks, rep) = PoolSummary::fit(&kron_settings, fm.clone(), k, x.view(), &y).unwrap();
    assert!(rep.converged, "{rep:?}");
    assert!(ks.hess.is_empty());
    let f = ks
        .kron
        .as_ref()
        .expect("Kronecker factors above the threshold");
    assert_eq!(f.dims(), (5, 3));
    // JSON keeps every number to within its last digit.
    let back: PoolSummary = serde_json::from_str(&serde_json::to_string(&ks).unwrap()).unwrap();
    let bf = back.kron.as_ref().expect("factors survive the round trip");
    assert!(max_abs(&(&bf.a - &f.a)) <= 1e-12 * max_abs(&f.a));
    assert!(max_abs(&(&bf.b - &f.b)) <= 1e-12 * max_abs(&f.b));
    assert!(max_abs(&(&back.w - &ks.w)) <= 1e-12 * max_abs(&ks.w));
    let (ds, _) = PoolSummary::fit(&ModelSettings::default(), fm, k, x.view(), &y).unwrap();
    assert!(ds.kron.is_none());
    let mut old = serde_json::to_value(&ds).unwrap();
    old.as_object_mut().unwrap().remove("kron");
    let loaded: PoolSummary = serde_json::from_value(old).unwrap();
    assert!(loaded.kron.is_none());
    assert_eq!(loaded.hess.dim(), (15, 15));
    assert!(max_abs(&(&loaded.hess - &ds.hess)) <= 1e-12 * max_abs(&ds.hess));
    // Factors and their eigendecompositions (2 × (5² + 3²)) against the dense 15² Hessian.
    assert!(ks.memory_bytes() < ds.memory_bytes());
    // The same optimum either way (the solvers differ, the objective does not).
    let diff = max_abs(&(&ks.w - &ds.w));
    assert!(diff <= 1e-5 * max_abs(&ds.w), "max |ΔW| {diff}");
}

/// The Kronecker-factored engine (threshold forced to 0) against the exact dense one on a small problem
/// where both run: the same suspicion ranking up to the approximation of the pool's curvature.
#[test]
fn kronecker_engine_agrees_with_the_dense_engine_on_a_small_problem() {
    let k = 3;
    let (xp, yp) = blobs(2000, 4, k, 50);
    let (xt, yt) = blobs(24, 4, k, 51);
    let (xb, mut yb) = blobs(200, 4, k, 52);
    for v in yb.iter_mut().take(20) {
        *v = (*v + 1) % k;
    }
    let stdz = Standardizer::fit(&[xt.view(), xp.view()]).unwrap();
    let ct = Array1::from_elem(yt.len(), 1.0);
    let trusted = TrustedInput {
        x: xt.view(),
        y: &yt,
        weight: ct.view(),
    };
    let run = |settings: &ModelSettings| {
        let fm = FeatureMap::new(stdz.clone(), settings.feature_map, settings.seed).unwrap();
        let (mut s, _) = PoolSummary::fit(settings, fm, k, xp.view(), &yp).unwrap();
        // Stand for a large pool, so that the quadratic (not the reservoir) carries it.
        s.n = 100_000;
        let a = assess(
            settings,
            &stdz,
            k,
            trusted,
            PoolInput::Summary(&s),
            xb.view(),
            &yb,
        )
        .unwrap();
        (s, a)
    };
    let (ds, dense) = run(&ModelSettings::default());
    let (ks, kron) = run(&ModelSettings {
        dense_max_params: 0,
        ..ModelSettings::default()
    });
    assert!(ds.kron.is_none() && ks.kron.is_some());
    let c = &kron.convergence;
    assert!(c.inner_converged && c.linear_converged, "{c:?}");
    let a: Vec<f64> = dense.items.iter().map(|i| i.suspicion).collect();
    let b: Vec<f64> = kron.items.iter().map(|i| i.suspicion).collect();
    // Spearman's ρ as the correlation of ranks (ties by index; common practice, no outside source).
    let ranks = |v: &[f64]| {
        let mut order: Vec<usize> = (0..v.len()).collect();
        order.sort_by(|&i, &j| v[i].total_cmp(&v[j]).then(i.cmp(&j)));
        let mut r = vec![0.0; v.len()];
        for (pos, &i) in order.iter().enumerate() {
            r[i] = pos as f64;
        }
        (r, order)
    };
    let ((ra, oa), (rb, ob)) = (ranks(&a), ranks(&b));
    let n = a.len() as f64;
    let d2: f64 = ra.iter().zip(&rb).map(|(x, y)| (x - y).powi(2)).sum();
    let rho = 1.0 - 6.0 * d2 / (n * (n * n - 1.0));
    let ta: Vec<usize> = oa.iter().rev().take(20).copied().collect();
    let tb: Vec<usize> = ob.iter().rev().take(20).copied().collect();
    let shared = ta.iter().filter(|i| tb.contains(i)).count();
    assert!(rho >= 0.99, "Spearman {rho}");
    assert!(shared >= 18, "top-20 shared {shared}");
    let flipped: Vec<bool> = (0..200).map(|i| i < 20).collect();
    assert!(auroc(&b, &flipped) >= 0.9, "AUROC {}", auroc(&b, &flipped));
}

/// Items kept out of the pool (held for review) enter the model of the items as delivered — the clean
/// level's labels model — and never the pool model. With the reservoir holding every item both are exact
/// fits: the pool model of the admitted items, the labels model of admitted ∪ kept out. A summary fitted
/// from items keeps its model at fit; after an exact rebuild from the admitted items alone (a selected
/// pool), `carry_labels_model` keeps the labels model instead of refitting it; it survives a save.
#[test]
fn kept_out_items_reach_the_labels_model_and_never_the_pool_model() {
    let settings = ModelSettings::default();
    let k = 3;
    let (x, y) = blobs(900, 3, k, 32);
    let stdz = Standardizer::fit(&[x.view()]).unwrap();
    let fm = FeatureMap::new(stdz, settings.feature_map, settings.seed).unwrap();
    let rows = |r: std::ops::Range<usize>| (x.slice(ndarray::s![r.clone(), ..]), &y[r]);
    // Two accepted batches of 450: the first 300 of each admitted, the last 150 kept out.
    let mut inc = PoolSummary::empty(fm.clone(), k);
    for b in 0..2 {
        let (xa, ya) = rows(b * 450..b * 450 + 300);
        inc.absorb(&settings, xa, ya).unwrap();
        let (xk, yk) = rows(b * 450 + 300..(b + 1) * 450);
        inc.absorb_kept_out(&settings, xk, yk).unwrap();
    }
    assert_eq!(inc.len(), 600, "kept-out items never join the pool");
    let admitted: Vec<usize> = (0..900).filter(|i| i % 450 < 300).collect();
    let xa = x.select(ndarray::Axis(0), &admitted);
    let ya: Vec<usize> = admitted.iter().map(|&i| y[i]).collect();
    let (pool_fit, _) = PoolSummary::fit(&settings, fm.clone(), k, xa.view(), &ya).unwrap();
    let (all_fit, _) = PoolSummary::fit(&settings, fm.clone(), k, x.view(), &y).unwrap();
    let scale = max_abs(&all_fit.theta());
    assert!(max_abs(&(&inc.theta() - &pool_fit.theta())) <= 1e-5 * scale);
    let labels = inc
        .labels_model()
        .expect("a labels model of the items as delivered");
    assert!(
        max_abs(&(&labels - &all_fit.theta())) <= 1e-5 * scale,
        "the labels model is the fit of every delivered item"
    );
    assert!(
        max_abs(&(&labels - &inc.theta())) > 1e-3 * scale,
        "and not the pool model"
    );
    // A summary fitted from an unselected pool keeps its model at fit.
    let mut fitted = pool_fit.clone();
    let (xk, yk) = rows(300..450);
    fitted.absorb_kept_out(&settings, xk, yk).unwrap();
    assert_eq!(fitted.labels_model(), Some(pool_fit.theta()));
    assert!(fitted.delivered.is_none());
    // An exact rebuild from the admitted items carries the labels model; a save keeps it.
    let mut rebuilt = pool_fit.clone();
    assert_eq!(
        rebuilt.labels_model(),
        Some(pool_fit.theta()),
        "refitted: selected"
    );
    rebuilt.carry_labels_model(&inc);
    assert_eq!(rebuilt.labels_model(), Some(labels.clone()));
    assert!(
        rebuilt.sharpness().is_none(),
        "nothing measured on a selected pool"
    );
    let saved: PoolSummary =
        serde_json::from_str(&serde_json::to_string(&rebuilt).unwrap()).unwrap();
    let back = saved.labels_model().expect("saved with the summary");
    assert!(
        max_abs(&(&back - &labels)) <= 1e-12,
        "JSON keeps the model to rounding"
    );
}

/// The gate on kept-out items, by hand: rows 0–3 kept out with trusted-anchored doubt 0.2, 0.5, 0.7 and
/// 0.49; row 9 has no score. Only doubts below 0.5 pass.
#[test]
fn only_kept_out_items_the_trusted_anchored_model_does_not_doubt_reach_the_labels_model() {
    let item = |index: usize, anchored_doubt: f64| -> crate::model::ItemScore {
        serde_json::from_value(serde_json::json!({
            "index": index, "label": 0, "suspicion": 0.9, "proposed_label": 1, "confidence": 0.5,
            "repair_mass": 0.0, "repair_signal": 0.0, "learner_doubt": 0.9,
            "flagged_at_step": null, "anchored_doubt": anchored_doubt,
        }))
        .unwrap()
    };
    let items = [
        item(0, 0.2),
        item(1, 0.5),
        item(2, 0.7),
        item(3, 0.49),
        item(4, 0.0),
    ];
    let rows = crate::model::summary::kept_out_for_labels_model(&items, [0, 1, 2, 3, 9]);
    assert_eq!(rows, vec![0, 3]);
}

/// `Objective::data_hessian` assembles the pool in chunks of 4,096 rows; a pool of 5,000 rows (two
/// chunks, weights other than 1) gives the per-item sum of the formula written out,
/// `Σ_i (w_i / N) (diag(p_i) − p_i p_iᵀ) ⊗ φ_i φ_iᵀ`. The library's other Hessian checks use small pools,
/// one chunk, where the second chunk's row count cannot be wrong (a mutation run found it unchecked).
#[test]
fn the_data_hessian_over_several_chunks_is_the_per_item_sum() {
    let (n, p, k) = (5_000, 2, 3);
    let mut rng = ChaCha8Rng::seed_from_u64(4096);
    let phi = Array2::from_shape_fn((n, p), |_| rng.random_range(-1.0..1.0));
    let y = Array2::<f64>::zeros((n, k));
    let weight = Array1::from_shape_fn(n, |_| rng.random_range(0.5..2.0));
    let prob = Array2::from_shape_fn((n, k), |(i, c)| ((i * 7 + c * 3) % 5 + 1) as f64);
    let prob = &prob
        / &prob
            .sum_axis(ndarray::Axis(1))
            .insert_axis(ndarray::Axis(1));
    let norm = 1_234.0;
    let obj = Objective {
        phi: phi.view(),
        y: y.view(),
        weight: Some(weight.view()),
        norm,
        l2: 0.0,
        prior: None,
    };
    let h = obj.data_hessian(prob.view());
    let mut want = Array2::<f64>::zeros((p * k, p * k));
    for i in 0..n {
        for a in 0..k {
            for b in 0..k {
                let d = if a == b { prob[[i, a]] } else { 0.0 };
                let s = weight[i] / norm * (d - prob[[i, a]] * prob[[i, b]]);
                for r in 0..p {
                    for c in 0..p {
                        want[[a * p + r, b * p + c]] += s * phi[[i, r]] * phi[[i, c]];
                    }
                }
            }
        }
    }
    assert!(max_abs(&(&h - &want)) < 1e-10, "{}", max_abs(&(&h - &want)));
}

/// `n` blob items in two dimensions and `k` classes, mapped (standardised, intercept) and one-hot labelled.
fn mapped_blobs(n: usize, k: usize, seed: u64) -> (Array2<f64>, Array2<f64>) {
    let (x, y) = blobs(n, 2, k, seed);
    let fm = FeatureMap::new(
        Standardizer::fit(&[x.view()]).unwrap(),
        FeatureMapKind::Linear,
        1,
    )
    .unwrap();
    (fm.apply(x.view()).unwrap(), one_hot(&y, k))
}

/// A pool term whose curvature is zero (an empty dense Hessian, no Kronecker factors: what an empty pool's
/// summary carries) adds nothing to the dense Hessian; the Hessian equals the one without the term, also
/// in `hvp`. A mutation run found the empty case's guard unchecked (with it dropped, the empty matrix was
/// added to the full one).
#[test]
fn a_pool_term_without_curvature_adds_nothing_to_the_hessian() {
    use super::learner::{predict_proba, Quadratic};
    let (n, k) = (20, 3);
    let (phi, yy) = mapped_blobs(n, k, 8);
    let m = phi.ncols() * k;
    let center = Array1::<f64>::zeros(m);
    let grad = Array1::from_shape_fn(m, |j| 0.01 * j as f64);
    let empty = Array2::<f64>::zeros((0, 0));
    let base = Objective {
        phi: phi.view(),
        y: yy.view(),
        weight: None,
        norm: n as f64,
        l2: 0.1,
        prior: None,
    };
    let with = Objective {
        prior: Some(Quadratic {
            scale: 2.0,
            center: center.view(),
            grad: grad.view(),
            hess: empty.view(),
            kron: None,
        }),
        ..base
    };
    let theta = Array1::from_shape_fn(m, |j| 0.05 * (j as f64).sin());
    let prob = predict_proba(phi.view(), &theta, k);
    assert!(max_abs(&(&with.hessian(prob.view()) - &base.hessian(prob.view()))) < 1e-14);
    let v = Array1::from_shape_fn(m, |j| (j as f64).cos());
    assert!(max_abs(&(&with.hvp(prob.view(), &v) - &base.hvp(prob.view(), &v))) < 1e-14);
}

/// `train` with solver settings the optimiser refuses (a negative gradient tolerance; the configuration
/// never allows one) returns the starting point with a report that says why and carries the objective and
/// gradient norm at that point. A mutation run found these report fields unchecked.
#[test]
fn a_refused_solver_setup_is_reported_with_the_starting_point() {
    use super::learner::train;
    let (n, k) = (20, 3);
    let (phi, yy) = mapped_blobs(n, k, 9);
    let m = phi.ncols() * k;
    let obj = Objective {
        phi: phi.view(),
        y: yy.view(),
        weight: None,
        norm: n as f64,
        l2: 0.1,
        prior: None,
    };
    let init = Array1::<f64>::zeros(m);
    let (f0, g0, _) = obj.value_grad(&init);
    let (theta, report) = train(
        &obj,
        init.clone(),
        -1.0,
        100,
        std::time::Duration::from_secs(5),
    );
    assert_eq!(theta, init);
    assert!(!report.converged, "{report:?}");
    assert!(
        report.stopped.starts_with("solver setup failed"),
        "{report:?}"
    );
    assert!((report.objective - f0).abs() < 1e-12, "{report:?}");
    assert!(
        (report.grad_norm - g0.dot(&g0).sqrt()).abs() < 1e-12,
        "{report:?}"
    );
}

/// Above the dense threshold (`dense_max_params = 0`) the implicit-function solves go through conjugate
/// gradients and the convergence record counts their iterations (at least one per solve, and the repair
/// path makes several). The integration suite compares the CG path with the dense one
/// (`tests/it/engine.rs`); this library copy lets a `--lib` mutation run see the count (`+=` → `*=` on it
/// in `Ctx::solve_h` was missed there, 2026-12-05).
#[test]
fn conjugate_gradient_solves_are_counted() {
    let k = 3;
    let (xp, yp) = blobs(60, 2, k, 21);
    let (xt, yt) = blobs(15, 2, k, 22);
    let (xb, mut yb) = blobs(30, 2, k, 23);
    for i in [0, 7, 14] {
        yb[i] = (yb[i] + 1) % k;
    }
    let settings = ModelSettings {
        dense_max_params: 0,
        ..ModelSettings::default()
    };
    let stdz = Standardizer::fit(&[xt.view(), xp.view(), xb.view()]).unwrap();
    let ct = Array1::from_elem(yt.len(), 1.0);
    let a = assess(
        &settings,
        &stdz,
        k,
        TrustedInput {
            x: xt.view(),
            y: &yt,
            weight: ct.view(),
        },
        PoolInput::Exact {
            x: xp.view(),
            y: &yp,
        },
        xb.view(),
        &yb,
    )
    .unwrap();
    assert_eq!(a.convergence.linear_solver, "cg");
    assert!(a.convergence.linear_converged, "{:?}", a.convergence);
    assert!(a.convergence.linear_iterations >= 3, "{:?}", a.convergence);
}
