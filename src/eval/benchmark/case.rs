//! One case of the benchmark: a batch attacked, scored by the engine and the baselines, and aggregated.

use super::*;
use std::time::{Duration, Instant};

use ndarray::{Array1, Array2, ArrayView2, Axis};

use crate::eval::baselines::{
    argmax, cross_validated_loss, fit_predict, nearest_trusted, BaselineScores,
};
use crate::eval::metrics::{
    auroc, average_precision, precision_at_recall, top_k_labels, TopKLabels,
};
use crate::model::{
    assess, ModelError, ModelSettings, PoolInput, PoolSummary, Standardizer, TrustedInput,
};
use crate::policy::{decide_batch, BatchSignals, PolicySettings, VendorHistory, Verdict};

/// Paired differences between method `a` and method `b` over the repetitions.
pub(super) fn paired(runs: &[Run], a: usize, b: usize) -> Option<PairedDifference> {
    let r = runs.len();
    if r < 2 {
        return None;
    }
    let stat = |f: fn(&MethodScore) -> Option<f64>| -> Option<(f64, f64)> {
        let d: Vec<f64> = runs
            .iter()
            .map(|run| Some(f(&run.methods[a])? - f(&run.methods[b])?))
            .collect::<Option<_>>()?;
        let n = d.len() as f64;
        let mean = d.iter().sum::<f64>() / n;
        let var = d.iter().map(|x| (x - mean).powi(2)).sum::<f64>() / (n - 1.0);
        Some((mean, (var / n).sqrt()))
    };
    let (auroc_mean, auroc_se) = stat(|m| m.auroc)?;
    let (ap_mean, ap_se) = stat(|m| m.average_precision)?;
    Some(PairedDifference {
        auroc_mean,
        auroc_se,
        ap_mean,
        ap_se,
    })
}

pub(super) fn method_score(
    name: &str,
    scores: &[f64],
    positive: &[bool],
    proposed: &[usize],
    truth: &[usize],
) -> MethodScore {
    let t: TopKLabels = top_k_labels(scores, positive, proposed, truth);
    MethodScore {
        method: name.to_string(),
        auroc: auroc(scores, positive),
        average_precision: average_precision(scores, positive),
        precision_at_half_recall: precision_at_recall(scores, positive, 0.5),
        bugs_in_top_k: t.bugs_in_top_k,
        correct_proposals: t.correct_proposals,
    }
}

#[allow(clippy::too_many_arguments)]
pub(super) fn run_case(
    settings: &ModelSettings,
    st: &Standardizer,
    k: usize,
    split: &Split,
    summary: &PoolSummary,
    attack: Attack,
    seed: u64,
    case: &str,
) -> Result<Run, BenchError> {
    let model_err = |source| BenchError::Model {
        case: case.to_string(),
        source,
    };
    let (delivered, positive) = apply_attack(attack, split, st, k, seed);
    let weight = Array1::ones(split.trusted_y.len());
    let trusted = TrustedInput {
        x: split.trusted_x.view(),
        y: &split.trusted_y,
        weight: weight.view(),
    };
    let pool_bias = match attack {
        Attack::FeatureRule { pool, .. } | Attack::Confusion { pool, .. } => pool,
        _ => PoolBias::Clean,
    };
    // A biased pool carries the same rule (same seed) over its own items.
    let biased_summary = if pool_bias == PoolBias::Biased {
        let (pool_y, _) = systematic_labels(
            attack,
            split,
            st,
            k,
            seed,
            split.pool_x.view(),
            &split.pool_y,
        );
        let (s, _) = PoolSummary::fit(
            settings,
            summary.feature_map.clone(),
            k,
            split.pool_x.view(),
            &pool_y,
        )
        .map_err(model_err)?;
        Some((s, pool_y))
    } else {
        None
    };
    // What the cross-validated-loss baseline sees as the pool: the same pool the engine sees.
    let empty_x = Array2::<f64>::zeros((0, split.pool_x.ncols()));
    let (base_pool_x, base_pool_y): (ArrayView2<'_, f64>, &[usize]) =
        match (&biased_summary, pool_bias) {
            (Some((_, y)), _) => (split.pool_x.view(), y),
            (None, PoolBias::Empty) => (empty_x.view(), &[]),
            _ => (split.pool_x.view(), &split.pool_y),
        };
    let pool_input = match pool_bias {
        PoolBias::Clean => PoolInput::Summary(summary),
        PoolBias::Biased => PoolInput::Summary(biased_summary.as_ref().map_or(summary, |(s, _)| s)),
        PoolBias::Empty => PoolInput::Empty,
    };
    let t0 = Instant::now();
    let a = assess(
        settings,
        st,
        k,
        trusted,
        pool_input,
        split.batch_x.view(),
        &delivered,
    )
    .map_err(model_err)?;
    let engine_ms = ms(t0.elapsed());
    let decision = decide_batch(
        &PolicySettings::default(),
        &VendorHistory::default(),
        &BatchSignals::from_assessment(&a, settings.flag_threshold),
    );
    let verdict = decision.verdict;
    let reasons: Vec<&'static str> = if verdict == Verdict::Quarantine {
        decision.reasons.iter().map(|r| r.code.as_str()).collect()
    } else {
        Vec::new()
    };
    let bugs = positive.iter().filter(|&&p| p).count();
    let methods = if bugs > 0 {
        let base_pool = (base_pool_x, base_pool_y);
        score_methods(
            settings, st, k, split, summary, &a, &delivered, &positive, base_pool, seed,
        )
        .map_err(model_err)?
    } else {
        Vec::new()
    };
    let learner_accuracy = learner_accuracy(summary, k, split).map_err(model_err)?;
    Ok(Run {
        bugs,
        assessment: a,
        engine_ms,
        learner_accuracy,
        verdict,
        reasons,
        methods,
    })
}

/// Scores and proposals of the [`CEILING`] row: `−ln p(delivered label)` and the most probable class under
/// the learner trained on trusted ∪ pool ∪ batch with the batch's true labels.
pub(super) fn ceiling_scores(
    settings: &ModelSettings,
    summary: &PoolSummary,
    k: usize,
    split: &Split,
    delivered: &[usize],
) -> Result<(Vec<f64>, Vec<usize>), ModelError> {
    let x = ndarray::concatenate(
        Axis(0),
        &[
            split.trusted_x.view(),
            split.pool_x.view(),
            split.batch_x.view(),
        ],
    )
    .map_err(|e| ModelError::Shape(e.to_string()))?;
    let y: Vec<usize> = split
        .trusted_y
        .iter()
        .chain(&split.pool_y)
        .chain(&split.batch_y)
        .copied()
        .collect();
    let prob = fit_predict(
        settings,
        &summary.feature_map,
        k,
        x.view(),
        &y,
        split.batch_x.view(),
    )?;
    let score = delivered
        .iter()
        .zip(prob.rows())
        .map(|(&d, r)| -r[d].max(f64::MIN_POSITIVE).ln())
        .collect();
    let proposed = prob
        .rows()
        .into_iter()
        .map(|r| argmax(r.iter().copied()))
        .collect();
    Ok((score, proposed))
}

pub(super) fn ms(d: Duration) -> f64 {
    d.as_secs_f64() * 1e3
}

pub(super) fn mean_opt(values: impl Iterator<Item = Option<f64>>) -> Option<f64> {
    let v: Vec<f64> = values.flatten().collect();
    (!v.is_empty()).then(|| v.iter().sum::<f64>() / v.len() as f64)
}

pub(super) fn aggregate(
    source: &str,
    attack: Attack,
    runs: &[Run],
    batch_items: usize,
) -> CaseReport {
    let n = runs.len().max(1) as f64;
    let methods = if runs.iter().all(|r| !r.methods.is_empty()) && !runs.is_empty() {
        (0..runs[0].methods.len())
            .map(|m| MethodScore {
                method: runs[0].methods[m].method.clone(),
                auroc: mean_opt(runs.iter().map(|r| r.methods[m].auroc)),
                average_precision: mean_opt(runs.iter().map(|r| r.methods[m].average_precision)),
                precision_at_half_recall: mean_opt(
                    runs.iter().map(|r| r.methods[m].precision_at_half_recall),
                ),
                bugs_in_top_k: runs.iter().map(|r| r.methods[m].bugs_in_top_k).sum(),
                correct_proposals: runs.iter().map(|r| r.methods[m].correct_proposals).sum(),
            })
            .collect()
    } else {
        Vec::new()
    };
    CaseReport {
        source: source.to_string(),
        attack,
        runs: runs.len(),
        batch_items,
        bugs: runs.iter().map(|r| r.bugs as f64).sum::<f64>() / n,
        repair_cost: runs.iter().map(|r| r.assessment.repair_cost).sum::<f64>() / n,
        repair_cost_max: runs
            .iter()
            .map(|r| r.assessment.repair_cost)
            .fold(0.0, f64::max),
        target_reached: runs.iter().filter(|r| r.assessment.target_reached).count(),
        damage: runs.iter().map(|r| r.assessment.damage).sum::<f64>() / n,
        quarantined: runs
            .iter()
            .filter(|r| r.verdict == Verdict::Quarantine)
            .count(),
        quarantine_reasons: {
            let mut counts: Vec<(String, usize)> = Vec::new();
            for code in runs.iter().flat_map(|r| r.reasons.iter()) {
                match counts.iter_mut().find(|(c, _)| c == code) {
                    Some((_, n)) => *n += 1,
                    None => counts.push(((*code).to_string(), 1)),
                }
            }
            counts
        },
        converged: runs.iter().all(|r| {
            r.assessment.convergence.inner_converged && r.assessment.convergence.linear_converged
        }),
        engine_ms: runs.iter().map(|r| r.engine_ms).sum::<f64>() / n,
        learner_accuracy: runs.iter().map(|r| r.learner_accuracy).sum::<f64>() / n,
        flagged_share: runs
            .iter()
            .map(|r| {
                let a = &r.assessment;
                a.items
                    .iter()
                    .filter(|i| i.proposed_label != i.label)
                    .count() as f64
                    / a.items.len().max(1) as f64
            })
            .sum::<f64>()
            / n,
        estimated_wrong_share: runs
            .iter()
            .map(|r| r.assessment.estimated_wrong_share)
            .sum::<f64>()
            / n,
        mean_repair_weight: runs
            .iter()
            .map(|r| r.assessment.trusted_audit.mean_repair_weight)
            .sum::<f64>()
            / n,
        paired_vs_baseline: methods
            .iter()
            .enumerate()
            .filter(|(_, m)| m.method.ends_with("(baseline)"))
            .max_by(|(_, x), (_, y)| {
                x.average_precision
                    .unwrap_or(0.0)
                    .total_cmp(&y.average_precision.unwrap_or(0.0))
            })
            .and_then(|(b, _)| paired(runs, 0, b)),
        methods,
    }
}

/// The ranking of every method on one attacked batch: the engine's fused suspicion and each of its signals
/// alone, the two baselines (the cross-validated-loss baseline sees `base_pool`, the pool the engine sees)
/// and the [`CEILING`] row.
#[allow(clippy::too_many_arguments)]
fn score_methods(
    settings: &ModelSettings,
    st: &Standardizer,
    k: usize,
    split: &Split,
    summary: &PoolSummary,
    a: &Assessment,
    delivered: &[usize],
    positive: &[bool],
    base_pool: (ArrayView2<'_, f64>, &[usize]),
    seed: u64,
) -> Result<Vec<MethodScore>, ModelError> {
    let (base_pool_x, base_pool_y) = base_pool;
    let mut methods = Vec::new();
    let truth = &split.batch_y;
    // The relabel a reviewer is offered for a top-k suspect: the proposed label once the item is
    // flagged, else the engine's best alternative class (`alternative_label` equals `proposed_label`
    // for every flagged item).
    let proposed: Vec<usize> = a.items.iter().map(|i| i.alternative_label).collect();
    let col = |f: fn(&crate::model::ItemScore) -> f64| a.items.iter().map(f).collect::<Vec<_>>();
    methods.push(method_score(
        METHODS[0],
        &col(|i| i.suspicion),
        positive,
        &proposed,
        truth,
    ));
    methods.push(method_score(
        METHODS[1],
        &col(|i| i.repair_signal),
        positive,
        &proposed,
        truth,
    ));
    methods.push(method_score(
        METHODS[2],
        &col(|i| i.learner_doubt),
        positive,
        &proposed,
        truth,
    ));
    methods.push(method_score(
        METHODS[3],
        &col(|i| i.anchored_doubt),
        positive,
        &proposed,
        truth,
    ));
    methods.push(method_score(
        METHODS[4],
        &col(|i| i.neighbour_doubt),
        positive,
        &proposed,
        truth,
    ));
    let nt: BaselineScores = nearest_trusted(
        st,
        k,
        split.trusted_x.view(),
        &split.trusted_y,
        split.batch_x.view(),
        delivered,
    )?;
    methods.push(method_score(
        METHODS[5],
        &nt.score,
        positive,
        &nt.proposed,
        truth,
    ));
    let cv = cross_validated_loss(
        settings,
        st,
        k,
        base_pool_x,
        base_pool_y,
        split.batch_x.view(),
        delivered,
        5,
        seed ^ 0xC5,
    )?;
    methods.push(method_score(
        METHODS[6],
        &cv.score,
        positive,
        &cv.proposed,
        truth,
    ));
    let (score, proposed) = ceiling_scores(settings, summary, k, split, delivered)?;
    methods.push(method_score(CEILING, &score, positive, &proposed, truth));
    Ok(methods)
}

/// The pool model's accuracy on the batch's true labels.
fn learner_accuracy(summary: &PoolSummary, k: usize, split: &Split) -> Result<f64, ModelError> {
    let phi = summary.feature_map.apply(split.batch_x.view())?;
    let prob = crate::model::learner::predict_proba(phi.view(), &summary.theta(), k);
    let hits = prob
        .rows()
        .into_iter()
        .zip(&split.batch_y)
        .filter(|(r, &t)| r.iter().enumerate().all(|(c, &v)| c == t || v <= r[t]))
        .count();
    Ok(hits as f64 / split.batch_y.len().max(1) as f64)
}
