//! `assess`: one batch scored against the trusted set through the learner, phase by phase.

use std::time::Instant;

use ndarray::{Array1, Array2, ArrayView2};

use crate::model::calibration::{class_mix_weights, sharpen, Sharpness, SharpnessFit};

use super::fusion::{
    expected_flagged, flag_line, propose_at, score_items, trusted_reports, Evidence, FlagRule,
};
use super::path::{penalty_path, repair_point};
use super::reference::{fit_pool, reference, Reference};
use super::{
    argmax, Assessment, Convergence, Ctx, Inner, ItemScore, LabelFit, Linearisation, PoolInput,
    Sizes, Timings, TrustedInput,
};
use crate::model::anchor::{anchored_model, anchored_path, trusted_audit, AnchoredPath};
use crate::model::learner::{one_hot, predict_proba, trusted_loss};
use crate::model::neighbours::{neighbour_model, squared_distances, NeighbourModel};
use crate::model::{check_labels, FeatureMap, ModelError, ModelSettings, Standardizer};

/// The checked inputs of an assessment in the learner's feature space.
struct Prepared {
    fmap: FeatureMap,
    phi_b: Array2<f64>,
    phi_t: Array2<f64>,
    /// Learner parameters `p·K`.
    m: usize,
}

/// Checks the inputs and maps the batch and the trusted items to the learner's features.
fn prepare(
    settings: &ModelSettings,
    standardizer: &Standardizer,
    k: usize,
    trusted: TrustedInput<'_>,
    pool: PoolInput<'_>,
    batch_x: ArrayView2<'_, f64>,
    batch_y: &[usize],
) -> Result<Prepared, ModelError> {
    settings.validate()?;
    check_labels(batch_y, k)?;
    check_labels(trusted.y, k)?;
    if trusted.y.is_empty() {
        return Err(ModelError::Degenerate("the trusted set is empty".into()));
    }
    if batch_y.is_empty() {
        return Err(ModelError::Degenerate("the batch is empty".into()));
    }
    if batch_x.nrows() != batch_y.len()
        || trusted.x.nrows() != trusted.y.len()
        || trusted.weight.len() != trusted.y.len()
    {
        return Err(ModelError::Shape(
            "rows, labels and weights must have the same length".into(),
        ));
    }
    if trusted.weight.iter().any(|w| !w.is_finite() || *w < 0.0) || trusted.weight.sum() <= 0.0 {
        return Err(ModelError::Degenerate(
            "trusted weights must be finite, ≥ 0, and not all zero".into(),
        ));
    }
    let fmap = match pool {
        PoolInput::Summary(s) => {
            if s.n_classes != k {
                return Err(ModelError::Shape(format!(
                    "pool summary has {} classes, trusted set {k}",
                    s.n_classes
                )));
            }
            s.feature_map.clone()
        }
        _ => FeatureMap::new(standardizer.clone(), settings.feature_map, settings.seed)?,
    };
    if batch_x.ncols() != fmap.input_dim() || trusted.x.ncols() != fmap.input_dim() {
        return Err(ModelError::Shape(format!(
            "expected {} feature columns (batch has {}, trusted set {})",
            fmap.input_dim(),
            batch_x.ncols(),
            trusted.x.ncols()
        )));
    }
    let phi_b = fmap.apply(batch_x)?;
    let phi_t = fmap.apply(trusted.x)?;
    let m = phi_b.ncols() * k;
    Ok(Prepared {
        fmap,
        phi_b,
        phi_t,
        m,
    })
}

/// Score one batch against the trusted set through the learner.
///
/// * `standardizer` maps raw features to standardised ones (fit it on trusted ∪ pool ∪ batch features for a
///   one-shot assessment; the daemon keeps the workspace's fixed one). With [`PoolInput::Summary`] the
///   summary's own feature map is used and `standardizer` is ignored.
/// * `n_classes` is the number of classes of the trusted set; every label must be below it.
///
/// # Algorithm
///
/// 1. Reference: `θ_P` (pool alone) and `Φ_pool = Φ(θ_P)`; the target `Φ_tgt` (see
///    [`Assessment::trusted_loss_target`]); reference probabilities `p_ref` for every batch item from a model
///    that has not seen it (the pool model, or a cross-fit over batch folds plus the trusted items).
/// 2. Train on pool ∪ batch as delivered: `θ̂`, `Φ_with = Φ(θ̂)`, damage `Φ_with − Φ_pool`.
/// 3. Penalty path: with `C(Y) = (1/n_B) Σ_i (1 − Y_i[ŷ_i])`, minimise the linearised
///    `F_γ(Y) = Φ(θ_lin(Y)) + γ C(Y)` over the product of simplices by projected gradient (convex: `θ_lin`
///    is affine in `Y` and the cross-entropy is convex in `θ`), for `γ_l = γ_max r^{(l+1)/L}`, warm-started,
///    re-solving the learner exactly (re-linearising) a few times along the way. `γ_max = n_B max_i max_k
///    (G_iŷ − G_ik)` is where the first label starts to move (KKT at `Y = Ŷ`).
/// 4. Repair cost: the moved mass where the path first meets `Φ ≤ Φ_tgt` (interpolated between steps).
/// 5. Per item: `path_score` = moved mass averaged over the path; suspicion = `w·s_i + (1−w)·(1 −
///    p_ref(ŷ))` with `s_i = path_score` and `w = repair_weight` under a cross-fitted reference, and
///    `s_i` = the mass the repair moves at the target crossing and `w = pool_reference_repair_weight`
///    when the pool is the reference; proposed label = the best alternative under `w·Y_deep + (1−w)·p_ref`
///    when the suspicion reaches `flag_threshold`, else the given label.
pub fn assess(
    settings: &ModelSettings,
    standardizer: &Standardizer,
    n_classes: usize,
    trusted: TrustedInput<'_>,
    pool: PoolInput<'_>,
    batch_x: ArrayView2<'_, f64>,
    batch_y: &[usize],
) -> Result<Assessment, ModelError> {
    let started = Instant::now();
    let deadline = started + settings.time_budget();
    let k = n_classes;
    let prep = prepare(settings, standardizer, k, trusted, pool, batch_x, batch_y)?;
    let (fmap, phi_b, phi_t, m) = (prep.fmap, prep.phi_b, prep.phi_t, prep.m);
    let n_b = batch_y.len();
    let y_hat = one_hot(batch_y, k);
    let mut conv = Convergence::started(m <= settings.dense_max_params);
    let mut timings = Timings::default();

    // ---- 1. the pool alone (θ_P, Φ_pool), the target and the reference probabilities ---------------------
    let t_ref = Instant::now();
    let (pool_rows, n_p, theta_p) =
        fit_pool(settings, &fmap, pool, k, m, n_b, deadline, &mut conv)?;
    let mut refm = reference(
        settings, &phi_b, &y_hat, &pool_rows, n_p, &phi_t, trusted, &theta_p, k, m, deadline,
        &mut conv,
    );
    timings.reference = t_ref.elapsed();

    // ---- 2. pool ∪ batch as delivered --------------------------------------------------------------------
    let t_train = Instant::now();
    let inner = Inner::new(pool_rows, &phi_b, n_p, settings.l2);
    let ctx = Ctx {
        settings,
        inner: &inner,
        phi_t: &phi_t,
        y_t: trusted.y,
        c_t: trusted.weight.to_owned(),
        k,
        conv: std::cell::RefCell::new(conv),
    };
    let lin = train_delivered(&ctx, pool, &y_hat, &theta_p, &mut refm, deadline);
    let theta_hat = lin.theta.clone();
    let (phi_with, _, prob_t_with) =
        trusted_loss(phi_t.view(), trusted.y, trusted.weight, &theta_hat, k);
    let (damage, mut unknown) = damage_or_unknown(&ctx, phi_with - refm.phi_pool_loss, deadline);
    timings.train = t_train.elapsed();

    // ---- 3. the repair paths and the trusted evidence ----------------------------------------------------
    let t_rep = Instant::now();
    let mut warm_q: Option<Array1<f64>> = None;
    let (_, g0) = ctx.loss_and_hypergradient(&lin, &theta_hat, &mut warm_q);
    let (expected_damage, expected_damage_sd) = super::expected::expected_damage(
        &ctx,
        &lin,
        &g0,
        &refm.p_ref,
        batch_y,
        damage,
        phi_with,
        settings.seed,
        deadline,
    );
    let big_pool = refm.big_pool;
    let ev = trusted_evidence(
        &ctx, &lin, &y_hat, batch_y, &theta_hat, &theta_p, &phi_b, trusted, big_pool, deadline,
    );
    let target = refm.target;
    let path = penalty_path(
        &ctx, lin, &y_hat, batch_y, &g0, target, phi_with, deadline, warm_q,
    );
    let mut conv = ctx.conv.into_inner();
    conv.budget_exhausted = path.budget_exhausted || ev.anchored.budget_exhausted;
    if conv.budget_exhausted {
        let (ms, done, steps) = (
            settings.time_budget_ms,
            path.costs.len(),
            settings.path_steps,
        );
        conv.notes.push(format!(
            "time budget of {ms} ms ran out after {done} of {steps} path steps"
        ));
    }

    // ---- 4. repair cost -----------------------------------------------------------------------------------
    let point = repair_point(&path, phi_with, target, &theta_hat, n_b);
    if point.cost.is_nan() {
        unknown.push(format!(
            "repair_cost: the time budget of {} ms ran out before the repair path reached its target",
            settings.time_budget_ms
        ));
    }
    timings.repair = t_rep.elapsed();

    // ---- 5. items -----------------------------------------------------------------------------------------
    let fusion = ev.fusion(&refm, &point.mass, big_pool);
    let (mut items, noise_rate) = score_items(settings, batch_y, k, &fusion);
    let (sharpness, line, (expected_flagged_share, expected_flagged_sd, expected_flagged_by_label)) =
        clean_expectation(settings, &refm, &phi_b, &ev, trusted, pool, k, &mut items);
    let (broken_trusted, trusted_still_wrong) = trusted_reports(
        phi_t.view(),
        trusted.y,
        &prob_t_with,
        &refm.ref_pred_t,
        &point.theta,
        k,
    );
    timings.total = started.elapsed();
    Ok(Assessment {
        // `clamp` keeps an unknown (NaN) cost unknown.
        repair_cost: point.cost.clamp(0.0, 1.0),
        trusted_still_wrong,
        target_basis: refm.target_basis.into(),
        unknown,
        trusted_audit: ev.trusted_audit,
        estimated_wrong_share: noise_rate,
        repair_path_gammas: ev.anchored.gammas,
        repair_path_flagged: ev.anchored.flagged_per_step,
        target_reached: point.reached,
        damage,
        trusted_loss_pool: refm.phi_pool_loss,
        trusted_loss_with_batch: phi_with,
        trusted_loss_repaired: point.loss,
        trusted_loss_target: target,
        items,
        broken_trusted,
        path_gammas: path.gammas,
        path_costs: path.costs,
        path_losses: path.losses,
        convergence: conv,
        timings,
        reference: refm.reference.into(),
        sizes: Sizes {
            trusted: trusted.y.len(),
            pool: n_p,
            batch: n_b,
            params: m,
        },
        expected_flagged_share,
        expected_flagged_sd,
        expected_flagged_by_label,
        expected_damage,
        expected_damage_sd,
        reference_sharpness: sharpness,
        flag_line: line,
    })
}

/// Phase 2: train on pool ∪ batch as delivered, `θ̂`, starting at `θ_P`; with a pool summary the chord
/// method on `H_P + R` (the pool's mean Hessian plus the ridge, factored once per summary) gets there
/// without assembling a Hessian, and the Hessian is assembled once, at `θ̂`, for the linearisation.
///
/// While the pool is too small to be the reference, the batch relabelled by the cross-fitted reference (its
/// most likely class for every item) is a second yardstick: what the batch would give the trusted items if
/// its labels agreed with everything else we know. Hard labels, not the soft `p_ref`: a model trained on
/// soft labels fits the trusted items better than any hard labelling could, which would charge clean
/// batches for not being smooth. It lowers `refm.target` when it sets a tighter bar.
fn train_delivered(
    ctx: &Ctx<'_>,
    pool: PoolInput<'_>,
    y_hat: &Array2<f64>,
    theta_p: &Array1<f64>,
    refm: &mut Reference,
    deadline: Instant,
) -> Linearisation {
    let settings = ctx.settings;
    let m = theta_p.len();
    let pool_factor = match pool {
        PoolInput::Summary(s) if m <= settings.dense_max_params => s.curvature_factor(settings.l2),
        _ => None,
    };
    let lin = ctx.linearise(y_hat, theta_p.clone(), deadline, pool_factor, false);
    if !refm.big_pool {
        let lab: Vec<usize> = refm
            .p_ref
            .rows()
            .into_iter()
            .map(|r| argmax(r.iter().copied()))
            .collect();
        let y_cons = one_hot(&lab, ctx.k);
        let consensus = ctx.linearise(
            &y_cons,
            lin.theta.clone(),
            deadline,
            Ctx::factor_of(&lin),
            true,
        );
        let phi_consensus = ctx.trusted_value(&consensus.theta) + settings.target_slack;
        if phi_consensus < refm.target {
            refm.target = phi_consensus;
            refm.target_basis = "consensus_relabelling";
        }
    }
    lin
}

/// What the trusted set says beside the reference model (phase 3 of an assessment).
struct TrustedEvidence {
    /// The published objective's repair path.
    anchored: AnchoredPath,
    /// The trusted-anchored model's probabilities for the batch items.
    p_anchor: Array2<f64>,
    /// Repair weight per item from the trusted audit.
    repair_weights: Vec<f64>,
    /// The weight each item would have with each label (`n_B × K`), for the clean level.
    weights_by_class: Array2<f64>,
    /// The configured base repair weight for this reference.
    base_weight: f64,
    /// The trusted neighbours' labels model for the batch items.
    neighbours: NeighbourModel,
    /// The audit itself.
    trusted_audit: crate::model::TrustedAudit,
}

impl TrustedEvidence {
    /// The per-item evidence the fusion reads (phase 5).
    fn fusion<'a>(
        &'a self,
        refm: &'a Reference,
        repair_mass: &'a [f64],
        big_pool: bool,
    ) -> Evidence<'a> {
        Evidence {
            p_ref: &refm.p_ref,
            p_anchor: &self.p_anchor,
            anchored: &self.anchored,
            repair_weights: &self.repair_weights,
            neighbours: &self.neighbours,
            base_weight: self.base_weight,
            repair_mass,
            big_pool,
        }
    }
}

/// Phase 3's trusted evidence: the published objective's repair path from the delivered labels, the
/// trusted-anchored model, and the trusted audit of the reference model.
#[allow(clippy::too_many_arguments)]
fn trusted_evidence(
    ctx: &Ctx<'_>,
    lin: &Linearisation,
    y_hat: &Array2<f64>,
    batch_y: &[usize],
    theta_hat: &Array1<f64>,
    theta_p: &Array1<f64>,
    phi_b: &Array2<f64>,
    trusted: TrustedInput<'_>,
    big_pool: bool,
    deadline: Instant,
) -> TrustedEvidence {
    let (settings, k, phi_t) = (ctx.settings, ctx.k, ctx.phi_t);
    // The published objective's repair path (trusted loss weighted by `trusted_confidence`, the relabelled
    // data's self-consistency, moved mass; halving γ), from the delivered labels: the repair signal.
    let anchored = anchored_path(
        ctx,
        lin,
        batch_y,
        settings.anchor_steps,
        settings.repair_iters.max(4),
        deadline,
    );
    // The trusted-anchored model (trusted items weighted `anchor_confidence` beside pool ∪ batch as
    // delivered) and its doubt about each given label.
    let theta_anchor = anchored_model(
        ctx,
        y_hat,
        theta_hat.clone(),
        settings.anchor_confidence,
        Ctx::factor_of(lin),
        deadline,
    );
    let p_anchor = predict_proba(phi_b.view(), &theta_anchor, k);
    // The trusted audit of the reference model: the pool model when it is the reference, else the model
    // trained on pool ∪ batch as delivered (the cross-fit's folds have seen the trusted items).
    let (theta_audit, audited) = if big_pool {
        (theta_p, "pool")
    } else {
        (theta_hat, "pool_and_batch")
    };
    let base_weight = if big_pool {
        settings.pool_reference_repair_weight
    } else {
        settings.repair_weight
    };
    // Squared distances from each batch item to each trusted item, for the audit's neighbourhoods and the
    // trusted neighbours' labels model alike.
    let d_bt = squared_distances(phi_b.view(), phi_t.view());
    let (weights, trusted_audit) = trusted_audit(
        phi_t.view(),
        trusted.y,
        trusted.weight,
        theta_audit,
        d_bt.view(),
        batch_y,
        k,
        base_weight,
        settings.trusted_neighbours,
        audited,
    );
    // What the verified items near each batch item say, with no learner in between.
    let neighbours = neighbour_model(phi_t.view(), trusted.y, d_bt.view(), k);
    let trusted_audit = crate::model::TrustedAudit {
        neighbour_sharpness: neighbours.sharpness,
        ..trusted_audit
    };
    TrustedEvidence {
        anchored,
        p_anchor,
        repair_weights: weights.given,
        weights_by_class: weights.by_class,
        base_weight,
        neighbours,
        trusted_audit,
    }
}

/// The damage, or unknown (`NaN`, `null` in JSON) with its reason when the time budget ran out before the
/// model trained with the batch converged: an unfinished computation never reads as a number the policy
/// could take at face value.
fn damage_or_unknown(ctx: &Ctx<'_>, damage: f64, deadline: Instant) -> (f64, Vec<String>) {
    if Instant::now() >= deadline && !ctx.conv.borrow().inner_converged {
        let why = format!(
            "damage: the time budget of {} ms ran out before the model trained with the batch converged",
            ctx.settings.time_budget_ms
        );
        return (f64::NAN, vec![why]);
    }
    (damage, Vec::new())
}

/// What a batch carrying the right labels would flag (`Assessment::expected_flagged_share`, its
/// standard deviation and the per-label counts), each item flagged by the fusion's rule; the right labels
/// are taken to follow the pool's labels model (`PoolSummary::labels_model`: the pool model as fitted from
/// unselected stored items, or the model of the items of accepted batches as delivered for a pool that was
/// never fitted from items; `p_ref` while the pool is not the reference or has neither), sharpened by the measured
/// sharpness ([`reference_sharpness`]) when `[model] calibrate_clean_level` is on, and moved toward the
/// trusted neighbours' labels where the trusted audit distrusts the reference ([`toward_neighbours`])
/// (the expected items in doubt, at `[model] flag_threshold`); the batch's flag line
/// (`Assessment::flag_line`, from `flag_threshold` and `clean_flag_rate`, against the same distribution),
/// at which each item's proposed label is set; and each item's [`LabelFit`] term against the sharpened
/// labels model alone (set on `items`, in batch order; the label fit asks how well the reference model
/// itself expects the given labels).
#[allow(clippy::too_many_arguments)]
fn clean_expectation(
    settings: &ModelSettings,
    refm: &Reference,
    phi_b: &Array2<f64>,
    ev: &TrustedEvidence,
    trusted: TrustedInput<'_>,
    pool: PoolInput<'_>,
    k: usize,
    items: &mut [ItemScore],
) -> (Sharpness, f64, (f64, f64, Vec<f64>)) {
    let mut sharpness = reference_sharpness(refm, trusted, pool, k);
    if !settings.calibrate_clean_level {
        sharpness.applied = 1.0;
        sharpness.basis = "measured, not applied ([model] calibrate_clean_level = false)".into();
    }
    // The right labels follow the pool model as fitted from stored items (see
    // `PoolSummary::labels_model`), not the one sharpened by absorbing selected items; the flags follow
    // the reference as it is.
    let p_fit = match pool {
        PoolInput::Summary(s) if refm.big_pool => s
            .labels_model()
            .map(|theta| predict_proba(phi_b.view(), &theta, k)),
        _ => None,
    };
    let p_label = sharpen(
        p_fit.as_ref().unwrap_or(&refm.p_ref).view(),
        sharpness.applied,
    );
    // Where the trusted audit distrusts the reference, the right labels lean toward what the verified
    // items nearby say (`toward_neighbours`): otherwise a reference that learned a vendor's bias would
    // expect the biased labels, the neighbours' doubt of them would count as clean, and the clean level
    // would rise with the bias itself (measured: DEVELOPERS.md, "The trusted neighbours").
    let p_flag = toward_neighbours(&p_label, ev);
    let rule = FlagRule {
        p_ref: &refm.p_ref,
        p_anchor: &ev.p_anchor,
        weights_by_class: &ev.weights_by_class,
        neighbours: Some(&ev.neighbours),
        base_weight: ev.base_weight,
        threshold: settings.flag_threshold,
    };
    let line = flag_line(
        &rule,
        &p_flag,
        settings.flag_threshold,
        settings.clean_flag_rate,
    );
    propose_at(items, line);
    // The label fit only while the pool is the reference: a cross-fitted reference's probabilities are
    // calibrated by nothing (its sharpness is not measured), and clean fixture batches scored through one
    // read z ≈ −4. Without it the terms stay 0 (`V` = 0: no evidence either way).
    if refm.big_pool {
        let given: Vec<usize> = items.iter().map(|it| it.label).collect();
        let fits = label_fits(&refm.p_ref, &p_label, &given);
        for (it, fit) in items.iter_mut().zip(fits) {
            it.label_fit = fit;
        }
    }
    (sharpness, line, expected_flagged(&rule, &p_flag))
}

/// Each item's [`LabelFit`] term: its given label under `p_ref` (floored at `1e-4`), against a label
/// drawn from `p_label`.
fn label_fits(p_ref: &Array2<f64>, p_label: &Array2<f64>, y: &[usize]) -> Vec<LabelFit> {
    p_ref
        .rows()
        .into_iter()
        .zip(p_label.rows())
        .zip(y)
        .map(|((r, q), &yi)| {
            let ln = |c: usize| r[c].max(1e-4).ln();
            let (m1, m2) = (0..r.len()).fold((0.0, 0.0), |(a, b), c| {
                let v = ln(c);
                (a + q[c] * v, b + q[c] * v * v)
            });
            LabelFit {
                loglik: ln(yi),
                expected: m1,
                variance: (m2 - m1 * m1).max(0.0),
            }
        })
        .collect()
}

/// The reference model's sharpness (see [`crate::model::calibration`]): measured on the pool's
/// approximate leave-one-out probabilities (pool summary) and on the trusted items re-weighted to the
/// pool's class mix, while the pool is the reference; the model as it is while it is cross-fitted (the
/// trusted items are then part of its training).
fn reference_sharpness(
    refm: &Reference,
    trusted: TrustedInput<'_>,
    pool: PoolInput<'_>,
    k: usize,
) -> Sharpness {
    if !refm.big_pool {
        return Sharpness::combine(
            None,
            None,
            "the reference is cross-fitted with the trusted items, which cannot then measure it",
        );
    }
    let (pool_fit, pool_labels) = match pool {
        PoolInput::Summary(s) => (s.sharpness(), s.reservoir_y.as_slice()),
        PoolInput::Exact { y, .. } => (None, y),
        PoolInput::Empty => (None, &[][..]),
    };
    let weights = class_mix_weights(trusted.y, pool_labels, k, trusted.weight);
    let trusted_fit = SharpnessFit::fit(refm.prob_t_pool.view(), trusted.y, weights.view());
    Sharpness::combine(pool_fit, trusted_fit, "too few items to measure it")
}

/// The right labels' distribution moved toward the trusted neighbours' labels model where the trusted
/// audit distrusts the reference: `p̃′_j = (1 − λ_j) p̃_j + λ_j p_N,j`, `λ_j = min_c w_jc − b` (the weight
/// the audit adds near item `j` whatever its label, so that no delivered label moves it; 0 where the
/// audit finds the reference sound, leaving `p̃` as it was). Rows stay distributions (convex mixtures).
fn toward_neighbours(p_label: &Array2<f64>, ev: &TrustedEvidence) -> Array2<f64> {
    mix_toward(
        p_label,
        &ev.weights_by_class,
        ev.base_weight,
        &ev.neighbours.p,
    )
}

/// `p̃′` of [`toward_neighbours`] from its parts: `weights_by_class` (`w_jc`), `base` (`b`) and `p_n`.
fn mix_toward(
    p_label: &Array2<f64>,
    weights_by_class: &Array2<f64>,
    base: f64,
    p_n: &Array2<f64>,
) -> Array2<f64> {
    let mut out = p_label.clone();
    for (j, mut row) in out.rows_mut().into_iter().enumerate() {
        let w = weights_by_class
            .row(j)
            .iter()
            .copied()
            .fold(f64::INFINITY, f64::min);
        let lambda = (w - base).clamp(0.0, 1.0);
        for (c, v) in row.iter_mut().enumerate() {
            *v = (1.0 - lambda) * *v + lambda * p_n[[j, c]];
        }
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::array;

    /// Worked by hand: item 0's weights are all at the base (λ = 0, `p̃` kept); item 1's least weight is
    /// 0.6 against a base of 0.2 (λ = 0.4: 0.6 · [0.9, 0.1] + 0.4 · [0.2, 0.8] = [0.62, 0.38]), whatever
    /// its class-1 weight of 0.9 (the label the vendor gave cannot move it).
    #[test]
    fn the_right_labels_lean_toward_the_neighbours_by_the_weight_the_audit_adds_for_every_label() {
        let p = array![[0.7, 0.3], [0.9, 0.1]];
        let w = array![[0.2, 0.2], [0.6, 0.9]];
        let p_n = array![[0.1, 0.9], [0.2, 0.8]];
        let got = mix_toward(&p, &w, 0.2, &p_n);
        let want = array![[0.7, 0.3], [0.62, 0.38]];
        for (g, w) in got.iter().zip(want.iter()) {
            assert!((g - w).abs() < 1e-12, "{got:?}");
        }
        for row in got.rows() {
            assert!((row.sum() - 1.0).abs() < 1e-12);
        }
    }

    /// [`label_fits`] worked by hand on two items (natural logarithms to five places). Item 0, label 1,
    /// `p = (0.7, 0.2, 0.1)` for both the reference and the right labels: `ℓ = ln 0.2 = −1.60944`,
    /// `E = 0.7 ln 0.7 + 0.2 ln 0.2 + 0.1 ln 0.1 = −0.80182`, `E[(ln p)²] = 1.13730`, `V = 0.49439`.
    /// Item 1, label 0, `p = (0.5, 0.5, 0)`: the zero is floored at `1e-4` but carries no label mass, so
    /// `ℓ = E = ln 0.5 = −0.69315`, `V = 0`; labelled 2 instead, `ℓ = ln 1e-4 = −9.21034`.
    #[test]
    fn label_fit_terms_are_the_formulas_worked_by_hand() {
        let p = ndarray::array![[0.7, 0.2, 0.1], [0.5, 0.5, 0.0]];
        let f = label_fits(&p, &p, &[1, 0]);
        let close = |a: f64, b: f64| (a - b).abs() < 1e-5;
        assert!(close(f[0].loglik, -1.60944), "{f:?}");
        assert!(close(f[0].expected, -0.80182), "{f:?}");
        assert!(close(f[0].variance, 0.49439), "{f:?}");
        let ln_half = -std::f64::consts::LN_2;
        assert!(close(f[1].loglik, ln_half) && close(f[1].expected, ln_half));
        assert!(f[1].variance.abs() < 1e-12);
        let total = f[0].plus(f[1]);
        assert!(close(total.z(), (-1.60944 + 0.80182) / 0.49439f64.sqrt()));
        assert!(close(label_fits(&p, &p, &[1, 2])[1].loglik, -9.21034));
    }
}
