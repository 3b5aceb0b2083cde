//! How sure the reference model should be: its sharpness measured on the trusted set.
//!
//! The policy compares a batch's flagged count with the count a batch carrying the right labels would
//! show, `E = Σ_j Σ_c P(y_j = c) · 1[item j would be flagged if labelled c]`. The flag indicator is the
//! engine's own rule and is known exactly; `P(y_j = c)` is not. Taking it to be the reference model's
//! `p_ref,jc` is right only when that model is calibrated. An L2-regularised learner is often
//! under-confident where the classes separate well (so `E` is several times what clean batches really
//! flag, and an attacker who flips the items the model is least sure of hides inside that allowance) and
//! over-confident where they separate poorly (so clean batches are held).
//!
//! The trusted items carry verified labels and the pool reference model has not seen them, so they
//! measure its calibration. One parameter is fitted, a sharpness `β` (temperature scaling with `T = 1/β`,
//! Guo, Pleiss, Sun & Weinberger, "On Calibration of Modern Neural Networks", ICML 2017, applied to the
//! reference model's log-probabilities):
//!
//! `p_β,c = p_c^β / Σ_k p_k^β`,
//!
//! by maximum likelihood on the trusted items: `ℓ(β) = Σ_t w_t (β log p_t,y_t − log Σ_k p_t,k^β)`.
//! `ℓ` is concave in `β` — `ℓ'(β) = Σ_t w_t (log p_t,y_t − E_β[log p_t])` and
//! `ℓ''(β) = −Σ_t w_t Var_β[log p_t] ≤ 0` (the log-partition of an exponential family) — so a safeguarded
//! Newton iteration on a bracket finds the maximum. Its standard error is `1/√(−ℓ''(β̂))` (observed
//! information).
//!
//! Two measurements, because neither alone is enough:
//!
//! * **The pool** (the many items): the reference model's approximate leave-one-out probabilities on
//!   the pool summary's reservoir items. An item's own influence is removed by one Newton step,
//!   `θ₋ᵢ ≈ θ̂ + (1/n_P)(H_P + R)⁻¹ ∇ℓᵢ(θ̂)` (the approximate leave-one-out of Rad & Maleki, "A Scalable
//!   Estimate of the Out-of-Sample Prediction Error via Approximate Leave-One-Out", JRSS B 2020; for
//!   logistic regression it goes back to Pregibon, "Logistic Regression Diagnostics", Annals of
//!   Statistics 1981), so the fitted items do not look better predicted than new ones do. Precise, but
//!   only while the pool is not selected by the admission rule: it is measured when a summary is fitted
//!   from a pool of items and carried as batches are absorbed (see `PoolSummary::sharpness` for why).
//! * **The trusted set** (few items, verified, unseen by the pool model): unbiased but noisy. A trusted
//!   set is usually balanced by class while batches follow the belt's class mix, and a learner is
//!   calibrated differently on rare and common classes; so each trusted item is weighted by
//!   `π_pool(c) / π_trusted(c)` for its class `c` (importance weights for a change of class prior), the
//!   weights scaled to sum to Kish's effective sample size `(Σw)² / Σw²` so that the standard error
//!   counts the items the weighting really leaves (Kish, "Survey Sampling", 1965).
//!
//! The value applied is `min(β̂_P − z·se_P, β̂_T + 2·se_T)` — the pool's measurement, but never
//! sharper than the trusted items allow — or, without a usable pool measurement, `β̂_T − z·se_T`. Lower
//! ends, because a `β` too large makes clean batches look dirty, so an uncertain measurement errs towards
//! fewer false alarms (and the one-step leave-one-out removes slightly less than an item's whole
//! influence, so `β̂_P` leans sharp: on the plant 1.31–1.51 against 1.29–1.36 on fresh items, three
//! seeds); clamped to `[BETA_MIN, BETA_MAX]`, and 1 when neither could be measured. A flag is a
//! suspicion for human review, not proof; this only sets how many flags a clean batch is expected to
//! show.

use ndarray::{Array1, Array2, ArrayView1, ArrayView2};

use crate::model::learner::{logits, softmax_rows};
use serde::{Deserialize, Serialize};

/// Smallest sharpness applied (a flatter model than this is not credible from a trusted set).
pub const BETA_MIN: f64 = 0.25;
/// Largest sharpness applied.
pub const BETA_MAX: f64 = 8.0;
/// Standard errors subtracted from a measured `β̂` before it is applied (its lower end).
pub const SHARPNESS_Z: f64 = 1.0;
/// Fewest items that may measure the sharpness.
pub const MIN_TRUSTED_ITEMS: usize = 10;

/// One maximum-likelihood measurement of `β`.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct SharpnessFit {
    /// `β̂`.
    pub beta: f64,
    /// Its standard error `1/√(−ℓ''(β̂))`.
    pub standard_error: f64,
    /// Items that measured it.
    pub items: usize,
}

impl SharpnessFit {
    /// Fit `β` on probabilities `p` (rows on the simplex, from a model that has not seen the items),
    /// labels `y` and weights `w` (see the module documentation); `None` with fewer than
    /// [`MIN_TRUSTED_ITEMS`] items, non-finite probabilities, or no curvature (every row uniform).
    pub fn fit(p: ArrayView2<'_, f64>, y: &[usize], w: ArrayView1<'_, f64>) -> Option<Self> {
        if y.len() < MIN_TRUSTED_ITEMS {
            return None;
        }
        // Log-probabilities, floored so that a zero probability cannot make the likelihood infinite.
        let logp = p.mapv(|v| v.max(1e-12).ln());
        if logp.iter().any(|v| !v.is_finite()) {
            return None;
        }
        // (ℓ'(β), −ℓ''(β)).
        let derivatives = |beta: f64| -> (f64, f64) {
            let (mut g, mut h) = (0.0, 0.0);
            for (t, row) in logp.rows().into_iter().enumerate() {
                let top = row.iter().fold(f64::NEG_INFINITY, |m, &v| m.max(beta * v));
                let e: Vec<f64> = row.iter().map(|&v| (beta * v - top).exp()).collect();
                let z: f64 = e.iter().sum();
                let mean: f64 = e.iter().zip(row).map(|(a, &l)| a * l).sum::<f64>() / z;
                let second: f64 = e.iter().zip(row).map(|(a, &l)| a * l * l).sum::<f64>() / z;
                g += w[t] * (row[y[t]] - mean);
                h += w[t] * (second - mean * mean).max(0.0);
            }
            (g, h)
        };
        // ℓ' is decreasing; keep a bracket [lo, hi] around its root and take Newton steps inside it.
        let (mut lo, mut hi) = (BETA_MIN / 4.0, BETA_MAX * 4.0);
        let mut beta = 1.0;
        for _ in 0..100 {
            let (g, h) = derivatives(beta);
            if g > 0.0 {
                lo = beta;
            } else {
                hi = beta;
            }
            let newton = beta + g / h.max(1e-12);
            let next = if newton > lo && newton < hi {
                newton
            } else {
                0.5 * (lo + hi)
            };
            let done = (next - beta).abs() < 1e-9 * beta.max(1.0);
            beta = next;
            if done {
                break;
            }
        }
        let (_, info) = derivatives(beta);
        (info > 0.0 && beta.is_finite()).then(|| Self {
            beta,
            standard_error: 1.0 / info.sqrt(),
            items: y.len(),
        })
    }
}

/// The reference model's sharpness: what the pool and the trusted set measured, and what is applied.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Sharpness {
    /// Measured on the pool's approximate leave-one-out probabilities (`None`: not measured).
    pub pool: Option<SharpnessFit>,
    /// Measured on the trusted items (`None`: not measured).
    pub trusted: Option<SharpnessFit>,
    /// The `β` applied to the expected flagged counts (1: the reference model taken as it is).
    pub applied: f64,
    /// How `applied` was set, in words.
    pub basis: String,
}

impl Default for Sharpness {
    fn default() -> Self {
        Self::combine(None, None, "not computed")
    }
}

impl Sharpness {
    /// The applied value from the two measurements (see the module documentation); `why_not` is the
    /// basis when neither exists.
    pub fn combine(
        pool: Option<SharpnessFit>,
        trusted: Option<SharpnessFit>,
        why_not: &str,
    ) -> Self {
        let (applied, basis) = match (&pool, &trusted) {
            (Some(p), Some(t)) => {
                let cap = t.beta + 2.0 * t.standard_error;
                let lower = p.beta - SHARPNESS_Z * p.standard_error;
                if lower <= cap {
                    (
                        lower,
                        "pool leave-one-out (lower end), within the trusted items' range"
                            .to_string(),
                    )
                } else {
                    (
                        cap,
                        "capped by the trusted items (pool leave-one-out sharper)".to_string(),
                    )
                }
            }
            (Some(p), None) => (
                p.beta - SHARPNESS_Z * p.standard_error,
                "pool leave-one-out (lower end)".to_string(),
            ),
            (None, Some(t)) => (
                t.beta - SHARPNESS_Z * t.standard_error,
                "trusted items (lower end)".to_string(),
            ),
            (None, None) => (1.0, why_not.to_string()),
        };
        Self {
            pool,
            trusted,
            applied: applied.clamp(BETA_MIN, BETA_MAX),
            basis,
        }
    }
}

/// Weights of the trusted items (labels `y_t`, confidence weights `c`) that carry them to the class mix of
/// `pool_y`: `c_t · π_pool(y_t) / π_trusted(y_t)`, scaled to sum to Kish's effective size
/// `(Σw)² / Σw²`. With no pool labels the confidence weights are returned unchanged.
pub fn class_mix_weights(
    y_t: &[usize],
    pool_y: &[usize],
    k: usize,
    c: ArrayView1<'_, f64>,
) -> Array1<f64> {
    if pool_y.is_empty() || y_t.is_empty() {
        return c.to_owned();
    }
    let share = |y: &[usize]| {
        let mut v = vec![0.0; k];
        for &l in y {
            if l < k {
                v[l] += 1.0 / y.len() as f64;
            }
        }
        v
    };
    let (pp, pt) = (share(pool_y), share(y_t));
    let w: Array1<f64> = y_t
        .iter()
        .zip(c.iter())
        .map(|(&l, &ct)| if pt[l] > 0.0 { ct * pp[l] / pt[l] } else { 0.0 })
        .collect();
    let (sum, sq) = (w.sum(), w.mapv(|v| v * v).sum());
    if sum <= 0.0 || sq <= 0.0 {
        return c.to_owned();
    }
    let effective = sum * sum / sq;
    w * (effective / sum)
}

/// Approximate leave-one-out class probabilities of the items `phi` (mapped rows, intercept included)
/// with labels `y` under the model `θ̂` (class-major, `θ[c·p + j]`) fitted to `n` items by minimising
/// `(1/n) Σ ℓ + ½ θᵀRθ`, whose Hessian there is `H + R = L Lᵀ` (`lower_solve` applies `L⁻¹`).
///
/// One Newton step of the objective without item `i`, whose Hessian is `H + R − Hᵢ/n`:
/// `θ₋ᵢ = θ̂ + (n(H + R) − Hᵢ)⁻¹ ∇ℓᵢ`, with `∇ℓᵢ = U rᵢ`, `Hᵢ = U Sᵢ Uᵀ`, `U = I_K ⊗ φᵢ` (`pK × K`),
/// `rᵢ = pᵢ − yᵢ` and `Sᵢ = diag(pᵢ) − pᵢpᵢᵀ`. By the Woodbury identity the item's logits move by
///
/// `Δzᵢ = Uᵀ(θ₋ᵢ − θ̂) = (I − Mᵢ Sᵢ)⁻¹ Mᵢ rᵢ`, with `Mᵢ = (1/n) Uᵀ (H + R)⁻¹ U = (1/n) VᵀV`, `V = L⁻¹U`
/// (centred, see the code),
///
/// a `K × K` solve per item after `K` triangular solves. Keeping `Hᵢ` in the step (rather than the
/// plain `(1/n)(H + R)⁻¹∇ℓᵢ`) matters for items with high leverage, i.e. when the pool holds few items
/// per learner parameter.
pub fn leave_one_out_probabilities(
    phi: ArrayView2<'_, f64>,
    y: &[usize],
    theta: &Array1<f64>,
    k: usize,
    n: f64,
    lower_solve: impl Fn(&Array1<f64>) -> Array1<f64>,
) -> Array2<f64> {
    let p = phi.ncols();
    let z = logits(phi, theta, k);
    let (prob, _) = softmax_rows(z.clone());
    let mut z_loo = z;
    for (i, row) in phi.rows().into_iter().enumerate() {
        let prob = prob.row(i);
        // V = L⁻¹ U, one column per class.
        let v: Vec<Array1<f64>> = (0..k)
            .map(|c| {
                let mut u = Array1::zeros(p * k);
                u.slice_mut(ndarray::s![c * p..(c + 1) * p]).assign(&row);
                lower_solve(&u)
            })
            .collect();
        // Centred, `P M P` with `P = I − 11ᵀ/K`: `r` and the range of `S` are orthogonal to `1`, and a
        // shift of all logits by the same amount leaves the probabilities alone, so only `P M P` matters;
        // it drops the large component along `1` that the tiny intercept ridge gives `M`.
        let raw = Array2::from_shape_fn((k, k), |(a, b)| v[a].dot(&v[b]) / n);
        let m = centre(&raw);
        let sm = Array2::from_shape_fn((k, k), |(a, b)| {
            prob[a] * (if a == b { 1.0 } else { 0.0 } - prob[b])
        });
        let r = Array1::from_shape_fn(k, |c| prob[c] - if y[i] == c { 1.0 } else { 0.0 });
        let lhs = Array2::eye(k) - m.dot(&sm);
        let dz = solve_small(lhs, m.dot(&r)).unwrap_or_else(|| m.dot(&r));
        let mut zi = z_loo.row_mut(i);
        zi += &dz;
    }
    softmax_rows(z_loo).0
}

/// `P A P` with `P = I − 11ᵀ/K`.
fn centre(a: &Array2<f64>) -> Array2<f64> {
    let k = a.nrows() as f64;
    let rows = a.mean_axis(ndarray::Axis(1)).expect("non-empty");
    let cols = a.mean_axis(ndarray::Axis(0)).expect("non-empty");
    let all = a.sum() / (k * k);
    Array2::from_shape_fn(a.raw_dim(), |(i, j)| a[[i, j]] - rows[i] - cols[j] + all)
}

/// `A x = b` for a small square `A` by Gaussian elimination with partial pivoting; `None` when `A` is
/// numerically singular.
fn solve_small(mut a: Array2<f64>, mut b: Array1<f64>) -> Option<Array1<f64>> {
    let n = b.len();
    for col in 0..n {
        let pivot = (col..n).max_by(|&x, &y| a[[x, col]].abs().total_cmp(&a[[y, col]].abs()))?;
        if a[[pivot, col]].abs() < 1e-300 || !a[[pivot, col]].is_finite() {
            return None;
        }
        if pivot != col {
            for j in 0..n {
                a.swap([pivot, j], [col, j]);
            }
            b.swap(pivot, col);
        }
        for r in col + 1..n {
            let f = a[[r, col]] / a[[col, col]];
            for j in col..n {
                a[[r, j]] -= f * a[[col, j]];
            }
            b[r] -= f * b[col];
        }
    }
    let mut x = Array1::zeros(n);
    for r in (0..n).rev() {
        let tail: f64 = (r + 1..n).map(|j| a[[r, j]] * x[j]).sum();
        x[r] = (b[r] - tail) / a[[r, r]];
    }
    Some(x)
}

/// Rows of `p` sharpened by `β`: `p_β,c = p_c^β / Σ_k p_k^β` (computed in log space).
pub fn sharpen(p: ArrayView2<'_, f64>, beta: f64) -> Array2<f64> {
    softmax_rows(p.mapv(|v| beta * v.max(1e-300).ln())).0
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::{array, Array1};
    use rand::{Rng, SeedableRng};
    use rand_chacha::ChaCha8Rng;

    /// Draw labels from a sharpened distribution and hand the fit the unsharpened one: the fit recovers
    /// the sharpness used to draw (a property of maximum likelihood; common practice, no published value).
    #[test]
    fn the_fit_recovers_the_sharpness_the_labels_were_drawn_with() {
        let mut rng = ChaCha8Rng::seed_from_u64(11);
        let n = 4_000;
        let p = Array2::from_shape_fn((n, 3), |_| rng.random_range(0.05..1.0));
        let p = &p / &p.sum_axis(ndarray::Axis(1)).insert_axis(ndarray::Axis(1));
        for truth in [0.5, 1.0, 2.5] {
            let drawn = sharpen(p.view(), truth);
            let y: Vec<usize> = drawn
                .rows()
                .into_iter()
                .map(|r| {
                    let u: f64 = rng.random();
                    let mut acc = 0.0;
                    r.iter()
                        .position(|&v| {
                            acc += v;
                            u < acc
                        })
                        .unwrap_or(2)
                })
                .collect();
            let s = SharpnessFit::fit(p.view(), &y, Array1::ones(n).view()).expect("measured");
            assert!(
                (s.beta - truth).abs() < 4.0 * s.standard_error && s.standard_error < 0.1,
                "truth {truth}: {s:?}"
            );
            let alone = Sharpness::combine(None, Some(s.clone()), "");
            assert!(
                alone.applied < s.beta && alone.applied >= BETA_MIN,
                "{alone:?}"
            );
        }
    }

    /// Sharpening is a softmax of `β log p`: rows stay on the simplex, `β = 1` is the identity, and a worked
    /// case: `p = (0.8, 0.2)`, `β = 2` gives `(0.64, 0.04) / 0.68 = (0.941176…, 0.058823…)`.
    #[test]
    fn sharpening_is_a_power_renormalised() {
        let p = array![[0.8, 0.2], [0.5, 0.5]];
        let s = sharpen(p.view(), 2.0);
        assert!((s[[0, 0]] - 0.64 / 0.68).abs() < 1e-12);
        assert!((s[[1, 0]] - 0.5).abs() < 1e-12);
        let same = sharpen(p.view(), 1.0);
        assert!((&same - &p).iter().all(|v| v.abs() < 1e-12));
    }

    /// Class-mix weights, worked by hand: trusted labels (0, 0, 1, 1), pool shares (0.75, 0.25), trusted
    /// shares (0.5, 0.5): raw weights (1.5, 1.5, 0.5, 0.5), sum 4, squares 5, Kish size 16/5 = 3.2, so
    /// the weights are scaled by 3.2/4 to (1.2, 1.2, 0.4, 0.4).
    #[test]
    fn class_mix_weights_follow_the_pool_and_count_the_effective_items() {
        let w = class_mix_weights(&[0, 0, 1, 1], &[0, 0, 0, 1], 2, Array1::ones(4).view());
        for (got, want) in w.iter().zip([1.2, 1.2, 0.4, 0.4]) {
            assert!((got - want).abs() < 1e-12, "{w:?}");
        }
        let same = class_mix_weights(&[0, 1], &[], 2, Array1::ones(2).view());
        assert_eq!(same.to_vec(), vec![1.0, 1.0]);
    }

    /// Too few items: nothing is measured and the model is taken as it is.
    #[test]
    fn a_tiny_trusted_set_does_not_measure_the_sharpness() {
        let p = array![[0.9, 0.1], [0.2, 0.8]];
        assert!(SharpnessFit::fit(p.view(), &[0, 1], Array1::ones(2).view()).is_none());
        let s = Sharpness::combine(None, None, "too few");
        assert_eq!((s.applied, s.basis.as_str()), (1.0, "too few"));
    }

    /// The pool's measurement is applied unless the trusted items rule it out (then their upper end).
    #[test]
    fn the_trusted_items_cap_the_pool_measurement() {
        let fit = |beta, standard_error| SharpnessFit {
            beta,
            standard_error,
            items: 100,
        };
        let within = Sharpness::combine(Some(fit(1.3, 0.04)), Some(fit(1.1, 0.2)), "");
        assert!((within.applied - 1.26).abs() < 1e-12, "{within:?}");
        let capped = Sharpness::combine(Some(fit(2.0, 0.04)), Some(fit(1.0, 0.2)), "");
        assert!((capped.applied - 1.4).abs() < 1e-12, "{capped:?}");
    }

    /// The one-step leave-one-out probabilities agree with refitting without the item (the learner's
    /// own Newton solver), to the accuracy a single Newton step promises on 200 items; and a worked
    /// `solve_small`.
    #[test]
    fn leave_one_out_probabilities_match_refitting_without_the_item() {
        use crate::model::learner::{one_hot, predict_proba, train_newton, Objective};
        use std::time::{Duration, Instant};
        let x = solve_small(array![[0.0, 2.0], [1.0, 1.0]], array![4.0, 3.0]).expect("regular");
        assert!(
            (x[0] - 1.0).abs() < 1e-12 && (x[1] - 2.0).abs() < 1e-12,
            "{x:?}"
        );
        let (n, d, k, l2) = (200, 4, 3, 1e-2);
        let mut rng = ChaCha8Rng::seed_from_u64(5);
        let mut phi = Array2::from_shape_fn((n, d + 1), |_| rng.random_range(-1.5..1.5));
        phi.column_mut(d).fill(1.0);
        let y: Vec<usize> = phi
            .rows()
            .into_iter()
            .map(|r| {
                let s = r[0] + 0.5 * r[1] + rng.random_range(-1.0..1.0);
                if s < -0.5 {
                    0
                } else if s < 0.5 {
                    1
                } else {
                    2
                }
            })
            .collect();
        let fit = |rows: &Array2<f64>, labels: &[usize]| {
            let yy = one_hot(labels, k);
            let obj = Objective {
                phi: rows.view(),
                y: yy.view(),
                weight: None,
                norm: labels.len() as f64,
                l2,
                prior: None,
            };
            let deadline = Instant::now() + Duration::from_secs(30);
            train_newton(&obj, Array1::zeros((d + 1) * k), 1e-11, 200, deadline).0
        };
        let theta = fit(&phi, &y);
        // H + R at θ̂: the learner's data Hessian plus its ridges (λ on weights, the tiny one on intercepts).
        let p = d + 1;
        let yy = one_hot(&y, k);
        let obj = Objective {
            phi: phi.view(),
            y: yy.view(),
            weight: None,
            norm: n as f64,
            l2,
            prior: None,
        };
        let mut h = obj.data_hessian(predict_proba(phi.view(), &theta, k).view());
        for idx in 0..p * k {
            h[[idx, idx]] += if idx % p == p - 1 {
                crate::model::learner::INTERCEPT_RIDGE
            } else {
                l2
            };
        }
        let chol = crate::model::linalg::Cholesky::factor(h).expect("positive definite");
        let loo = leave_one_out_probabilities(phi.view(), &y, &theta, k, n as f64, |g| {
            chol.solve_lower(g)
        });
        let mut worst = 0.0f64;
        for i in [0, 17, 99, 150] {
            let keep: Vec<usize> = (0..n).filter(|&j| j != i).collect();
            let rows = phi.select(ndarray::Axis(0), &keep);
            let labels: Vec<usize> = keep.iter().map(|&j| y[j]).collect();
            let t = fit(&rows, &labels);
            let exact = predict_proba(phi.slice(ndarray::s![i..i + 1, ..]), &t, k);
            for c in 0..k {
                worst = worst.max((exact[[0, c]] - loo[[i, c]]).abs());
            }
        }
        // The plain step `(1/n)(H + R)⁻¹∇ℓᵢ` is 1.3e-3 off here; with the item's own curvature, 6.0e-4.
        assert!(worst < 8e-4, "largest difference {worst}");
    }
}
