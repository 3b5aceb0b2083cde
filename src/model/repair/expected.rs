//! What a clean batch of these very items would show: the expected damage, and the label hypergradient.

use std::ops::Range;
use std::time::Instant;

use ndarray::{s, Array1, Array2, ArrayView1, ArrayView2};
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;

use super::{Ctx, Linearisation};
use crate::model::learner::{trusted_loss, weights_view, Objective};
use crate::model::linalg::{conjugate_gradient, Cholesky};
use crate::model::ModelSettings;

/// Label draws behind the second-order part of [`Assessment::expected_damage`].
const EXPECTED_DAMAGE_DRAWS: usize = 16;

/// The damage to expect from the batch labelled the way the reference model expects, and its standard
/// deviation (see [`Assessment::expected_damage`]).
///
/// Labels `Y′_i ~ Categorical(p_ref,i)`, independently. The trained model moves linearly with the labels
/// (the linearisation the repair path uses, `θ′ = θ̂ + J (Y′ − Y)`, `J = H⁻¹ Φ_Bᵀ / N`), and the trusted loss
/// is expanded around `θ̂`:
///
///   `Φ(θ′) = Φ(θ̂) + ⟨G, Y′ − Y⟩ + r(Y′)`,  `G = Jᵀ ∇Φ(θ̂)` (the label hypergradient),
///
/// with `r ≥ 0` the remainder (the trusted loss is convex in `θ`). The linear term has closed-form moments,
///
///   `E⟨G, Y′ − Y⟩ = Σ_i ⟨G_i, p_ref,i − y_i⟩`,  `Var = Σ_i ( Σ_c p_ic G_ic² − (Σ_c p_ic G_ic)² )`,
///
/// and the remainder (Jensen's gap: the label noise spreads `θ′`, which raises the mean trusted loss) is
/// estimated from [`EXPECTED_DAMAGE_DRAWS`] seeded draws, each one linear solve with the factor already
/// in hand and one evaluation of `Φ`; the linear term serves as a control variate for it, so the draws
/// estimate only the small second-order part. Past the assessment's deadline the draws stop (fewer than two:
/// the linear term alone).
#[allow(clippy::too_many_arguments)]
pub(crate) fn expected_damage(
    ctx: &Ctx<'_>,
    lin: &Linearisation,
    g: &Array2<f64>,
    p_ref: &Array2<f64>,
    batch_y: &[usize],
    damage: f64,
    phi_with: f64,
    seed: u64,
    deadline: Instant,
) -> (f64, f64) {
    let (mut shift, mut var) = (0.0, 0.0);
    for (i, (p, gi)) in p_ref.rows().into_iter().zip(g.rows()).enumerate() {
        let mean: f64 = p.iter().zip(gi.iter()).map(|(pc, gc)| pc * gc).sum();
        let second: f64 = p.iter().zip(gi.iter()).map(|(pc, gc)| pc * gc * gc).sum();
        shift += mean - gi[batch_y[i]];
        var += (second - mean * mean).max(0.0);
    }
    let mut rng = ChaCha8Rng::seed_from_u64(seed ^ 0x4441_4d47);
    let k = p_ref.ncols();
    let mut lin_terms = Vec::with_capacity(EXPECTED_DAMAGE_DRAWS);
    let mut remainders = Vec::with_capacity(EXPECTED_DAMAGE_DRAWS);
    let mut warm = None;
    for _ in 0..EXPECTED_DAMAGE_DRAWS {
        if Instant::now() >= deadline {
            break;
        }
        let mut y = Array2::zeros((batch_y.len(), k));
        let mut linear = 0.0;
        for (i, p) in p_ref.rows().into_iter().enumerate() {
            let u: f64 = rand::Rng::random(&mut rng);
            let mut acc = 0.0;
            let c = p
                .iter()
                .position(|&pc| {
                    acc += pc;
                    u < acc
                })
                .unwrap_or(k - 1);
            y[[i, c]] = 1.0;
            linear += g[[i, c]] - g[[i, batch_y[i]]];
        }
        let theta = ctx.theta_at(lin, &y, &mut warm);
        let phi = ctx.trusted_value(&theta);
        lin_terms.push(linear);
        remainders.push(phi - phi_with - linear);
    }
    if remainders.len() < 2 {
        // Out of time: the linear term alone (it misses the small, non-negative Jensen gap).
        return (damage + shift, var.sqrt());
    }
    let n = remainders.len() as f64;
    let r_mean = remainders.iter().sum::<f64>() / n;
    let l_mean = lin_terms.iter().sum::<f64>() / n;
    let r_var = remainders.iter().map(|r| (r - r_mean).powi(2)).sum::<f64>() / (n - 1.0);
    let cov = remainders
        .iter()
        .zip(&lin_terms)
        .map(|(r, l)| (r - r_mean) * (l - l_mean))
        .sum::<f64>()
        / (n - 1.0);
    let mean = damage + shift + r_mean;
    let sd = (var + r_var + 2.0 * cov).max(0.0).sqrt();
    if mean.is_finite() && sd.is_finite() {
        (mean, sd)
    } else {
        (damage + shift, var.sqrt())
    }
}

/// The label hypergradient `∂Φ/∂Y` (rows `batch` of the training set) at the optimum `theta` of `obj`.
///
/// `∂Φ/∂Y_ik = φ_iᵀ q_k / N` with `H q = ∇_θ Φ` (implicit function theorem; see [`super::assess`]). Solved densely
/// when `p·K ≤ settings.dense_max_params`, else by CG. Exposed for the derivative checks.
pub fn label_hypergradient(
    settings: &ModelSettings,
    obj: &Objective<'_>,
    theta: &Array1<f64>,
    batch: Range<usize>,
    phi_t: ArrayView2<'_, f64>,
    y_t: &[usize],
    c_t: ArrayView1<'_, f64>,
) -> Array2<f64> {
    let k = obj.classes();
    let (_, g_theta, _) = trusted_loss(phi_t, y_t, c_t, theta, k);
    let (_, _, prob) = obj.value_grad(theta);
    let q = if theta.len() <= settings.dense_max_params {
        Cholesky::factor(obj.hessian(prob.view())).map(|c| c.solve(&g_theta))
    } else {
        None
    };
    let q = q.unwrap_or_else(|| {
        conjugate_gradient(
            |v| obj.hvp(prob.view(), v),
            &g_theta,
            None,
            None,
            settings.cg_tol,
            settings.cg_max_iters,
        )
        .x
    });
    let phi_b = obj.phi.slice(s![batch, ..]);
    phi_b.dot(&weights_view(&q, obj.dim(), k)) / obj.norm
}
