//! The penalty path: projected gradient over the product of simplices on the linearised repair objective.

use std::time::Instant;

use ndarray::{Array1, Array2};

use super::{Ctx, Linearisation};
use crate::model::linalg::project_simplex;

/// Moved mass per item, `m_i = 1 − Y_i[ŷ_i]`.
fn moved(y: &Array2<f64>, given: &[usize]) -> Vec<f64> {
    given
        .iter()
        .enumerate()
        .map(|(i, &g)| (1.0 - y[[i, g]]).clamp(0.0, 1.0))
        .collect()
}

/// Projected gradient on the linearised `F_γ(Y) = Φ(θ_lin(Y)) + γ C(Y)` from the current `Y` (updated in
/// place), with a backtracking step size carried between calls. Returns `θ_lin` at the final `Y`.
///
/// Step: `Y⁺ = Π_Δ(Y − η ∇F)`, accepted when
/// `F(Y⁺) ≤ F(Y) + ⟨∇F, Y⁺ − Y⟩ + ‖Y⁺ − Y‖² / (2η)` (the standard sufficient-decrease test), else `η ← η/2`.
/// `∇_Y C = −e_ŷ / n_B`, so the penalty pulls mass back toward the given label.
#[allow(clippy::too_many_arguments)]
fn projected_gradient(
    ctx: &Ctx<'_>,
    lin: &Linearisation,
    y: &mut Array2<f64>,
    given: &[usize],
    gamma: f64,
    step: &mut f64,
    warm_d: &mut Option<Array1<f64>>,
    warm_q: &mut Option<Array1<f64>>,
) -> Array1<f64> {
    let n_b = given.len() as f64;
    let cost = |y: &Array2<f64>| -> f64 {
        given
            .iter()
            .enumerate()
            .map(|(i, &g)| 1.0 - y[[i, g]])
            .sum::<f64>()
            / n_b
    };
    descend_projected(
        ctx,
        lin,
        y,
        given,
        ctx.settings.repair_iters,
        step,
        warm_d,
        |y, theta| {
            let (f_phi, mut grad) = ctx.loss_and_hypergradient(lin, theta, warm_q);
            for (i, &g) in given.iter().enumerate() {
                grad[[i, g]] -= gamma / n_b;
            }
            (f_phi + gamma * cost(y), grad)
        },
        |y, theta| ctx.trusted_value(theta) + gamma * cost(y),
        1e-15,
    )
}

/// Projected-gradient descent on a linearised repair objective `F` from the current `Y` (updated in place),
/// with a backtracking step size carried between calls: `Y⁺ = Π_Δ(Y − η ∇F)`, accepted when
/// `F(Y⁺) ≤ F(Y) + ⟨∇F, Y⁺ − Y⟩ + ‖Y⁺ − Y‖² / (2η) + slack·|F(Y)|` (the standard sufficient-decrease test),
/// else `η ← η/2`; at most `iters` accepted steps, stopping once no label mass moves by more than 0.1 %.
/// `value_grad(Y, θ)` gives `F` and `∇_Y F` at `θ = θ_lin(Y)`, `value(Y, θ)` gives `F` alone. Returns
/// `θ_lin` at the final `Y`. Shared by the target-crossing path and the published objective's path.
#[allow(clippy::too_many_arguments)]
pub(crate) fn descend_projected(
    ctx: &Ctx<'_>,
    lin: &Linearisation,
    y: &mut Array2<f64>,
    given: &[usize],
    iters: usize,
    step: &mut f64,
    warm_d: &mut Option<Array1<f64>>,
    mut value_grad: impl FnMut(&Array2<f64>, &Array1<f64>) -> (f64, Array2<f64>),
    value: impl Fn(&Array2<f64>, &Array1<f64>) -> f64,
    slack: f64,
) -> Array1<f64> {
    let mut theta = ctx.theta_at(lin, y, warm_d);
    for _ in 0..iters {
        let (f, grad) = value_grad(y, &theta);
        if !step.is_finite() {
            let gmax = grad.iter().fold(0.0f64, |a, &b| a.max(b.abs()));
            if gmax <= 0.0 {
                break;
            }
            *step = 0.5 / gmax;
        } else {
            *step *= 1.5;
        }
        ctx.conv.borrow_mut().repair_iterations += 1;
        let mut accepted = None;
        for _ in 0..30 {
            ctx.conv.borrow_mut().repair_trials += 1;
            let cand = step_and_project(y, &grad, given, *step);
            let diff = &cand - &*y;
            let dd = diff.iter().map(|v| v * v).sum::<f64>();
            if dd == 0.0 {
                accepted = Some((cand, theta.clone(), 0.0));
                break;
            }
            let th = ctx.theta_at(lin, &cand, warm_d);
            let f_new = value(&cand, &th);
            let model = f + (&grad * &diff).sum() + dd / (2.0 * *step);
            if f_new <= model + slack * f.abs() {
                let max_move = diff.iter().fold(0.0f64, |a, &b| a.max(b.abs()));
                accepted = Some((cand, th, max_move));
                break;
            }
            *step *= 0.5;
        }
        match accepted {
            Some((cand, th, max_move)) => {
                *y = cand;
                theta = th;
                // Converged at this γ once no label mass moves by more than 0.1 %.
                if max_move < 1e-3 {
                    break;
                }
            }
            None => break,
        }
    }
    theta
}

/// `Π_Δ(Y − η G)` row by row. A row sitting at its given label's vertex `e_g` stays there exactly when
/// `v_g − max_{c≠g} v_c ≥ 1` for `v = e_g − η g_i` (then `τ = v_g − 1` clips every other entry), which
/// skips the sort for the many rows the repair leaves alone.
pub(crate) fn step_and_project(
    y: &Array2<f64>,
    grad: &Array2<f64>,
    given: &[usize],
    step: f64,
) -> Array2<f64> {
    let mut cand = y.clone();
    let k = y.ncols();
    for (i, mut row) in cand.rows_mut().into_iter().enumerate() {
        let g = given[i];
        let at_vertex = row[g] == 1.0;
        for c in 0..k {
            row[c] -= step * grad[[i, c]];
        }
        if at_vertex {
            let vg = row[g];
            let others = (0..k)
                .filter(|&c| c != g)
                .fold(f64::NEG_INFINITY, |a, c| a.max(row[c]));
            if vg - others >= 1.0 {
                row.fill(0.0);
                row[g] = 1.0;
                continue;
            }
        }
        project_simplex(row.as_slice_mut().expect("contiguous rows"));
    }
    cand
}

/// The target-crossing penalty path, step by step (see [`super::assess`], phase 3).
pub(crate) struct PenaltyPath {
    /// `γ` per step, largest first.
    pub(crate) gammas: Vec<f64>,
    /// Moved-mass fraction per step.
    pub(crate) costs: Vec<f64>,
    /// Trusted loss per step (the crossing step re-solved exactly).
    pub(crate) losses: Vec<f64>,
    /// Moved mass per item, per step.
    pub(crate) moved: Vec<Vec<f64>>,
    /// `θ` per step.
    pub(crate) thetas: Vec<Array1<f64>>,
    /// First step whose (exactly verified) trusted loss meets the target.
    pub(crate) crossing: Option<usize>,
    /// `γ` at which the first label starts to move.
    pub(crate) gamma_max: f64,
    /// The time budget ran out before the path finished.
    pub(crate) budget_exhausted: bool,
}

/// Phase 3 of an assessment: minimise the linearised `F_γ(Y) = Φ(θ_lin(Y)) + γ C(Y)` for
/// `γ_l = γ_max r^{(l+1)/L}`, warm-started from the delivered labels, re-linearising `relinearisations`
/// times; if the path ends above the target it continues as far again on the same log scale and stops at
/// the first step that meets it. `γ_max = n_B max_i max_k (G_iŷ − G_ik)⁺` is where the first label starts to
/// move (KKT at `Y = Ŷ`, with `G = g0` the label hypergradient there). The crossing is verified by an exact
/// re-solve.
#[allow(clippy::too_many_arguments)]
pub(crate) fn penalty_path(
    ctx: &Ctx<'_>,
    mut lin: Linearisation,
    y_hat: &Array2<f64>,
    batch_y: &[usize],
    g0: &Array2<f64>,
    target: f64,
    phi_with: f64,
    deadline: Instant,
    mut warm_q: Option<Array1<f64>>,
) -> PenaltyPath {
    let settings = ctx.settings;
    let (n_b, k) = (batch_y.len(), ctx.k);
    // γ at which item i's label starts to move (first order, KKT at Y = Ŷ): n_B max_k (G_iŷ − G_ik)⁺.
    let entry: Vec<f64> = (0..n_b)
        .map(|i| {
            let gy = g0[[i, batch_y[i]]];
            (0..k).map(|c| gy - g0[[i, c]]).fold(0.0, f64::max) * n_b as f64
        })
        .collect();
    let gamma_max = entry.iter().copied().fold(0.0, f64::max);
    let steps = settings.path_steps;
    let mut gammas: Vec<f64> = (0..steps)
        .map(|l| gamma_max * settings.path_min_ratio.powf((l + 1) as f64 / steps as f64))
        .collect();
    let mut relin_at: Vec<usize> = (0..settings.relinearisations)
        .map(|j| ((j + 1) * steps) / (settings.relinearisations + 1))
        .collect();
    let mut warm_d: Option<Array1<f64>> = None;
    let mut y = y_hat.clone();
    let mut costs = Vec::with_capacity(steps);
    let mut losses = Vec::with_capacity(steps);
    let mut moved_path: Vec<Vec<f64>> = Vec::with_capacity(steps);
    let mut thetas: Vec<Array1<f64>> = Vec::with_capacity(steps);
    let mut path_labels: Vec<Array2<f64>> = Vec::with_capacity(steps);
    let mut step_size = f64::NAN;
    let mut budget_exhausted = false;
    if gamma_max > 0.0 {
        let mut l = 0;
        while l < gammas.len() {
            let gamma = gammas[l];
            if Instant::now() >= deadline {
                budget_exhausted = true;
                break;
            }
            if relin_at.contains(&l) && l > 0 {
                let init = ctx.theta_at(&lin, &y, &mut warm_d);
                lin = ctx.linearise(&y, init, deadline, Ctx::factor_of(&lin), true);
                warm_d = None;
                warm_q = None;
            }
            let theta_l = projected_gradient(
                ctx,
                &lin,
                &mut y,
                batch_y,
                gamma,
                &mut step_size,
                &mut warm_d,
                &mut warm_q,
            );
            let loss_l = ctx.trusted_value(&theta_l);
            let mv = moved(&y, batch_y);
            costs.push(mv.iter().sum::<f64>() / n_b as f64);
            losses.push(loss_l);
            moved_path.push(mv);
            thetas.push(theta_l);
            path_labels.push(y.clone());
            let reached = losses.iter().any(|&v| v <= target) || phi_with <= target;
            if l + 1 == steps && !reached {
                // The path ended above the target: continue it as far again on the same log scale (to
                // γ_max·r²), re-linearising first, and stop at the first step that meets the target.
                let last = gammas[steps - 1];
                gammas.extend(
                    (1..=steps)
                        .map(|j| last * settings.path_min_ratio.powf(j as f64 / steps as f64)),
                );
                relin_at.push(steps);
            }
            if l >= steps && reached {
                break;
            }
            l += 1;
        }
    }
    gammas.truncate(costs.len().max(steps.min(gammas.len())));
    // Verify the crossing with an exact re-solve where the linearised path first meets the target.
    let mut crossing = losses.iter().position(|&v| v <= target);
    if let Some(l) = crossing {
        let y_l = path_labels[l].clone();
        let exact = ctx.linearise(
            &y_l,
            thetas[l].clone(),
            deadline,
            Ctx::factor_of(&lin),
            true,
        );
        let exact_loss = ctx.trusted_value(&exact.theta);
        losses[l] = exact_loss;
        thetas[l] = exact.theta;
        if exact_loss > target {
            crossing = losses
                .iter()
                .skip(l + 1)
                .position(|&v| v <= target)
                .map(|j| j + l + 1);
        }
    }
    PenaltyPath {
        gammas,
        costs,
        losses,
        moved: moved_path,
        thetas,
        crossing,
        gamma_max,
        budget_exhausted,
    }
}

/// Where the repair meets its target (phase 4 of an assessment).
pub(crate) struct RepairPoint {
    /// Moved-mass fraction (`NaN` when unknown).
    pub(crate) cost: f64,
    /// Whether the path reached the target.
    pub(crate) reached: bool,
    /// Trusted loss there.
    pub(crate) loss: f64,
    /// Moved mass per item there.
    pub(crate) mass: Vec<f64>,
    /// The learner there.
    pub(crate) theta: Array1<f64>,
}

/// The repair cost: the moved mass where the path first meets `Φ ≤ Φ_tgt`, interpolated linearly between
/// the two steps around the crossing (`t = (Φ₀ − Φ_tgt)/(Φ₀ − Φ₁)`).
pub(crate) fn repair_point(
    path: &PenaltyPath,
    phi_with: f64,
    target: f64,
    theta_hat: &Array1<f64>,
    n_b: usize,
) -> RepairPoint {
    let zero = vec![0.0; n_b];
    let point = |cost, reached, loss, mass: Vec<f64>, theta: &Array1<f64>| RepairPoint {
        cost,
        reached,
        loss,
        mass,
        theta: theta.clone(),
    };
    if phi_with <= target {
        return point(0.0, true, phi_with, zero, theta_hat);
    }
    if let Some(l) = path.crossing {
        let (c0, f0, m0) = if l == 0 {
            (0.0, phi_with, &zero)
        } else {
            (path.costs[l - 1], path.losses[l - 1], &path.moved[l - 1])
        };
        let (c1, f1) = (path.costs[l], path.losses[l]);
        let t = if f0 > f1 {
            ((f0 - target) / (f0 - f1)).clamp(0.0, 1.0)
        } else {
            1.0
        };
        let mass: Vec<f64> = m0
            .iter()
            .zip(&path.moved[l])
            .map(|(a, b)| a + t * (b - a))
            .collect();
        return point(
            c0 + t * (c1 - c0),
            true,
            target.min(f0),
            mass,
            &path.thetas[l],
        );
    }
    // Not even the deepest repair on the path reaches the target: report the cost the path reached,
    // `target_reached: false` and the trusted items still wrong there — never a stand-in. When the time
    // budget cut the path short, the cost is unknown.
    let last = path.costs.len().saturating_sub(1);
    match path.costs.last() {
        Some(&c) => point(
            if path.budget_exhausted { f64::NAN } else { c },
            false,
            path.losses[last],
            path.moved[last].clone(),
            &path.thetas[last],
        ),
        // No path: either no label change lowers the trusted loss (γ_max = 0; the batch's harm is not in its
        // labels, and `damage` says how much there is) or the budget ran out before the first step.
        None if path.gamma_max > 0.0 => point(f64::NAN, false, phi_with, zero, theta_hat),
        None => point(0.0, false, phi_with, zero, theta_hat),
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::model::learner::one_hot;
    use crate::model::repair::Inner;
    use crate::model::testkit::{blobs, far, tight};
    use crate::model::ModelSettings;
    use rand::{Rng, SeedableRng};
    use rand_chacha::ChaCha8Rng;

    /// `x` is the Euclidean projection of `v` onto the probability simplex exactly when `x ≥ 0`,
    /// `Σ x = 1` and some `τ` has `x_c = v_c − τ` wherever `x_c > 0` and `v_c ≤ τ` wherever `x_c = 0` (the
    /// KKT conditions of `min ‖x − v‖²` over the simplex; Held, Wolfe & Crowder, "Validation of
    /// Subgradient Optimization", Mathematical Programming, 1974; restated by Duchi, Shalev-Shwartz,
    /// Singer & Chandra, "Efficient Projections onto the l1-Ball for Learning in High Dimensions", ICML
    /// 2008, §3). Checked directly, without the project's own projection.
    fn is_simplex_projection(x: &[f64], v: &[f64], tol: f64) -> Result<(), String> {
        if x.iter().any(|&a| a < 0.0) || (x.iter().sum::<f64>() - 1.0).abs() > tol {
            return Err(format!("{x:?} is not on the simplex"));
        }
        let support: Vec<usize> = (0..x.len()).filter(|&c| x[c] > 0.0).collect();
        let tau = v[support[0]] - x[support[0]];
        for c in 0..x.len() {
            let ok = if x[c] > 0.0 {
                (v[c] - x[c] - tau).abs() <= tol
            } else {
                v[c] <= tau + tol
            };
            if !ok {
                return Err(format!("{x:?} is not the projection of {v:?} (τ = {tau})"));
            }
        }
        Ok(())
    }

    /// `step_and_project` is `Π_Δ(Y − η G)` row by row, including the rows it keeps at their given
    /// label's vertex without a sort: each output row meets the projection's KKT conditions for
    /// `y_i − η g_i`. The rows cover both sides of the vertex shortcut (`v_g − max_{c≠g} v_c ≥ 1` or not) and
    /// interior starting points. In the mutation run of 2026-12-04 (DEVELOPERS.md) the mutants
    /// `path.rs:147:20` (`-=` → `+=` in the step), `154:28` (`>=` → `<` in the shortcut's test) and `154:19`
    /// (`-` → `+` in its gap) each failed this test.
    #[test]
    fn step_and_project_is_the_projection_of_the_gradient_step() {
        let (n, k) = (400, 4);
        let mut rng = ChaCha8Rng::seed_from_u64(7);
        let given: Vec<usize> = (0..n).map(|_| rng.random_range(0..k)).collect();
        let mut y = Array2::<f64>::zeros((n, k));
        for i in 0..n {
            if i % 2 == 0 {
                y[[i, given[i]]] = 1.0;
            } else {
                let w: Vec<f64> = (0..k).map(|_| rng.random_range(0.05..1.0)).collect();
                let s: f64 = w.iter().sum();
                for c in 0..k {
                    y[[i, c]] = w[c] / s;
                }
            }
        }
        let grad = Array2::from_shape_fn((n, k), |_| rng.random_range(-2.0..2.0));
        let (mut kept, mut moved_off) = (0, 0);
        for step in [0.05, 0.3, 1.0, 4.0] {
            let out = step_and_project(&y, &grad, &given, step);
            for i in 0..n {
                let v: Vec<f64> = (0..k).map(|c| y[[i, c]] - step * grad[[i, c]]).collect();
                if i % 2 == 0 {
                    let g = given[i];
                    let others = (0..k)
                        .filter(|&c| c != g)
                        .map(|c| v[c])
                        .fold(f64::NEG_INFINITY, f64::max);
                    if v[g] - others >= 1.0 {
                        kept += 1;
                    } else {
                        moved_off += 1;
                    }
                }
                let x: Vec<f64> = out.row(i).to_vec();
                if let Err(e) = is_simplex_projection(&x, &v, 1e-9) {
                    panic!("row {i}, step {step}: {e}");
                }
            }
        }
        // Both sides of the shortcut were exercised.
        assert!(
            kept > 50 && moved_off > 50,
            "{kept} kept, {moved_off} moved off"
        );
    }

    /// Three Gaussian classes: a 24-item pool, a 9-item batch with two wrong labels (items 0 and 4), six
    /// trusted items, in exact mode with unit weights.
    struct Planted {
        inner: Inner,
        phi_t: Array2<f64>,
        y_t: Vec<usize>,
        y_b: Vec<usize>,
    }

    impl Planted {
        fn new(l2: f64) -> Self {
            let (phi_p, y_p) = blobs(24, 1);
            let (phi_b, mut y_b) = blobs(9, 2);
            y_b[0] = 1;
            y_b[4] = 2;
            let (phi_t, y_t) = blobs(6, 3);
            let phi =
                ndarray::concatenate(ndarray::Axis(0), &[phi_p.view(), phi_b.view()]).unwrap();
            let inner = Inner::for_test(phi, Some(one_hot(&y_p, 3)), 24..33, l2);
            Self {
                inner,
                phi_t,
                y_t,
                y_b,
            }
        }
    }

    /// `γ_max = n_B max_i max_k (G_iŷ − G_ik)⁺`, written here from the formula (the path computes its own).
    fn gamma_max_of(g0: &Array2<f64>, y_b: &[usize]) -> f64 {
        (0..y_b.len())
            .map(|i| {
                (0..g0.ncols())
                    .map(|c| g0[[i, y_b[i]]] - g0[[i, c]])
                    .fold(0.0, f64::max)
            })
            .fold(0.0, f64::max)
            * y_b.len() as f64
    }

    /// The descent at one `γ` ends where `F_γ(Y) = Φ(θ_lin(Y)) + γ C(Y)` is stationary over the product of
    /// simplices: every row is a fixed point of the projected-gradient map, `Y_i = Π_Δ(Y_i − η ∇_i F)`
    /// (the first-order optimality condition of a convex function over a convex set; Bertsekas, "Nonlinear
    /// Programming", 2nd ed. 1999, Prop. 2.1.3), checked at a step `η` of the test's own choosing with the
    /// gradient `G − (γ/n_B) e_ŷ` recomputed here, not the one the descent carried. Also: `F` went down,
    /// the returned `θ` is `θ_lin` at the final labels, above `γ_max` no label moves, and the iteration
    /// counters count (each iteration at least one trial; the convergence rule, not the cap, ended it).
    ///
    /// Written for the mutation run of 2026-12-05 (DEVELOPERS.md): the path-level tests let 27 mutants of
    /// `projected_gradient` and `descend_projected` through (the ranking survives a sloppy descent). Each of
    /// the mutants listed there as killed by this test fails it: the penalty's gradient sign or scale,
    /// the acceptance test's terms, the step-size rules, the stale `θ` and the counters.
    #[test]
    fn projected_gradient_stops_where_the_penalised_objective_is_stationary() {
        let settings = ModelSettings {
            repair_iters: 5000,
            ..tight()
        };
        let k = 3;
        let p = Planted::new(settings.l2);
        let y_b = &p.y_b;
        let ctx = Ctx::for_test(&settings, &p.inner, &p.phi_t, &p.y_t, k);
        let y_hat = one_hot(y_b, k);
        let lin = ctx.linearise(&y_hat, Array1::zeros(9), far(), None, false);
        let n_b = y_b.len() as f64;
        let (_, g0) = ctx.loss_and_hypergradient(&lin, &lin.theta, &mut None);
        let gamma_max = gamma_max_of(&g0, y_b);
        assert!(gamma_max > 0.0, "the planted labels should pull");
        let f_of = |y: &Array2<f64>| {
            let th = ctx.theta_at(&lin, y, &mut None);
            let mass: f64 = moved(y, y_b).iter().sum();
            (th, mass)
        };
        for frac in [2.0, 0.5, 0.1, 0.01] {
            let gamma = gamma_max * frac;
            *ctx.conv.borrow_mut() = crate::model::repair::Convergence::default();
            let mut y = y_hat.clone();
            let mut step = f64::NAN;
            let theta = projected_gradient(
                &ctx, &lin, &mut y, y_b, gamma, &mut step, &mut None, &mut None,
            );
            let (direct, mass) = f_of(&y);
            let gap = (&theta - &direct)
                .iter()
                .fold(0.0f64, |a, v| a.max(v.abs()));
            assert!(
                gap <= 1e-9,
                "γ = {frac}·γ_max: returned θ is off θ_lin(Y) by {gap:e}"
            );
            if frac > 1.0 {
                assert_eq!(y, y_hat, "above γ_max no label moves");
                continue;
            }
            assert!(mass > 0.5, "γ = {frac}·γ_max moved only {mass} label mass");
            let value = |th: &Array1<f64>, m: f64| ctx.trusted_value(th) + gamma * m / n_b;
            let (f_start, f_end) = (value(&lin.theta, 0.0), value(&direct, mass));
            assert!(
                f_end < f_start - 1e-6,
                "γ = {frac}·γ_max: F went from {f_start} to {f_end}"
            );
            let (_, mut g) = ctx.loss_and_hypergradient(&lin, &direct, &mut None);
            for (i, &c) in y_b.iter().enumerate() {
                g[[i, c]] -= gamma / n_b;
            }
            let eta = 0.5 / g0.iter().fold(0.0f64, |a, v| a.max(v.abs()));
            let mut worst = 0.0f64;
            for i in 0..y_b.len() {
                let mut v: Vec<f64> = (0..k).map(|c| y[[i, c]] - eta * g[[i, c]]).collect();
                project_simplex(&mut v);
                for c in 0..k {
                    worst = worst.max((v[c] - y[[i, c]]).abs());
                }
            }
            assert!(
                worst <= 2e-3,
                "γ = {frac}·γ_max: not stationary, a projected-gradient step still moves {worst:e}"
            );
            let conv = ctx.conv.borrow();
            assert!(
                conv.repair_iterations >= 1
                    && conv.repair_iterations < settings.repair_iters as u64
                    && conv.repair_trials >= conv.repair_iterations,
                "γ = {frac}·γ_max: {conv:?}"
            );
            eprintln!(
                "γ = {frac}·γ_max: mass {mass:.3}, residual {worst:.2e}, {} iterations, {} trials",
                conv.repair_iterations, conv.repair_trials
            );
        }
    }

    /// Each step the descent accepts meets the sufficient-decrease bound it promises: for
    /// `Y⁺ = Π_Δ(Y − η ∇F)`, `F(Y⁺) ≤ F(Y) − ‖Y⁺ − Y‖² / (2η)` (the projection's property
    /// `⟨∇F, Y⁺ − Y⟩ ≤ −‖Y⁺ − Y‖²/η` turns the test's quadratic model into this; Beck & Teboulle,
    /// "A Fast Iterative Shrinkage-Thresholding Algorithm for Linear Inverse Problems", SIAM J. Imaging
    /// Sciences 2009, Lemma 2.3). Driven one iteration at a time (`repair_iters = 1`), with `F` computed
    /// here from `θ_lin(Y)` and the moved mass, and `η` the step the call accepted. Written for the
    /// mutation run of 2026-12-05: the stationarity test above let through two mutants of the quadratic
    /// model (`+ ‖d‖²/(2η)` → `* ‖d‖²/(2η)`, and `2η` → `2 + η`), which accept steps the bound rejects
    /// and still end at a stationary point.
    #[test]
    fn every_accepted_step_meets_the_sufficient_decrease_bound() {
        let settings = ModelSettings {
            repair_iters: 1,
            ..tight()
        };
        let k = 3;
        let p = Planted::new(settings.l2);
        let y_b = &p.y_b;
        let ctx = Ctx::for_test(&settings, &p.inner, &p.phi_t, &p.y_t, k);
        let y_hat = one_hot(y_b, k);
        let lin = ctx.linearise(&y_hat, Array1::zeros(9), far(), None, false);
        let n_b = y_b.len() as f64;
        let (_, g0) = ctx.loss_and_hypergradient(&lin, &lin.theta, &mut None);
        let gamma_max = gamma_max_of(&g0, y_b);
        let f = |y: &Array2<f64>, gamma: f64| {
            let th = ctx.theta_at(&lin, y, &mut None);
            ctx.trusted_value(&th) + gamma * moved(y, y_b).iter().sum::<f64>() / n_b
        };
        for frac in [0.5, 0.1, 0.01] {
            let gamma = gamma_max * frac;
            let mut y = y_hat.clone();
            let mut step = f64::NAN;
            let mut moves = 0;
            for call in 0..200 {
                let before = y.clone();
                projected_gradient(
                    &ctx, &lin, &mut y, y_b, gamma, &mut step, &mut None, &mut None,
                );
                let dd: f64 = (&y - &before).iter().map(|v| v * v).sum();
                if dd == 0.0 {
                    break;
                }
                moves += 1;
                let (f0, f1) = (f(&before, gamma), f(&y, gamma));
                let bound = f0 - dd / (2.0 * step);
                assert!(
                    f1 <= bound + 1e-12 * f0.abs(),
                    "γ = {frac}·γ_max, call {call}: F went {f0:.12} → {f1:.12}, the bound is {bound:.12} (η = {step:e})"
                );
            }
            assert!(moves >= 2, "γ = {frac}·γ_max: only {moves} accepted steps");
        }
    }
}
