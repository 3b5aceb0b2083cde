//! The two simple baselines the engine is compared with in the attack benchmark.
//!
//! * **Nearest trusted neighbour**: does the nearest expert-verified item carry a different label?
//! * **Cross-validated loss**: how surprised is a model that has not seen the item by its given label?
//!
//! Both return one [`BaselineScores`] per batch: a score per item (higher = more suspicious) and a proposed
//! label per item, so they go through exactly the same metrics as the engine.

use ndarray::{Array2, ArrayView2, Axis};
use rand::seq::SliceRandom;
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;

use crate::model::{FeatureMap, FeatureMapKind, Learner, ModelError, ModelSettings, Standardizer};

/// Per-item scores and proposed labels of a baseline.
#[derive(Debug, Clone, PartialEq)]
pub struct BaselineScores {
    /// Suspicion score per batch item (higher = more suspicious; not necessarily in `[0, 1]`).
    pub score: Vec<f64>,
    /// Proposed label per batch item.
    pub proposed: Vec<usize>,
}

/// Nearest-trusted-neighbour label disagreement.
///
/// Features are standardised with `standardizer` (column mean and population standard deviation), then for
/// batch item `i` with given label `ŷ_i`:
///
/// * `d_same` = Euclidean distance to the nearest trusted item labelled `ŷ_i` (∞ if there is none),
/// * `d_other` = distance to the nearest trusted item with any other label (∞ if there is none),
/// * `score_i = d_same / (d_same + d_other)` (0.5 when both are 0 or both are ∞).
///
/// `score_i > ½` exactly when the nearest trusted item carries a different label, so thresholding at ½
/// gives the plain 0/1 disagreement; the ratio breaks the ties inside each of the two groups by how much
/// closer the nearest disagreeing item is than the nearest agreeing one. The proposed label is the label of
/// the nearest trusted item.
pub fn nearest_trusted(
    standardizer: &Standardizer,
    n_classes: usize,
    trusted_x: ArrayView2<'_, f64>,
    trusted_y: &[usize],
    batch_x: ArrayView2<'_, f64>,
    batch_y: &[usize],
) -> Result<BaselineScores, ModelError> {
    if trusted_x.nrows() != trusted_y.len() || batch_x.nrows() != batch_y.len() {
        return Err(ModelError::Shape("rows and labels differ in count".into()));
    }
    if trusted_y.is_empty() {
        return Err(ModelError::Degenerate("empty trusted set".into()));
    }
    let zt = standardizer.transform(trusted_x)?;
    let zb = standardizer.transform(batch_x)?;
    let mut score = Vec::with_capacity(batch_y.len());
    let mut proposed = Vec::with_capacity(batch_y.len());
    for (i, zi) in zb.axis_iter(Axis(0)).enumerate() {
        let given = batch_y[i];
        if given >= n_classes {
            return Err(ModelError::Label {
                row: i,
                label: given,
                classes: n_classes,
            });
        }
        let (mut d_same, mut d_other) = (f64::INFINITY, f64::INFINITY);
        let (mut best, mut best_label) = (f64::INFINITY, given);
        for (zt_j, &lj) in zt.axis_iter(Axis(0)).zip(trusted_y) {
            let d = zi
                .iter()
                .zip(zt_j.iter())
                .map(|(a, b)| (a - b) * (a - b))
                .sum::<f64>()
                .sqrt();
            if lj == given {
                d_same = d_same.min(d);
            } else {
                d_other = d_other.min(d);
            }
            if d < best {
                best = d;
                best_label = lj;
            }
        }
        let s = if d_same.is_infinite() && d_other.is_infinite() {
            0.5
        } else if d_same.is_infinite() {
            1.0
        } else if d_other.is_infinite() {
            0.0
        } else if d_same + d_other == 0.0 {
            0.5
        } else {
            d_same / (d_same + d_other)
        };
        score.push(s);
        proposed.push(best_label);
    }
    Ok(BaselineScores { score, proposed })
}

/// The given label's cross-validated loss.
///
/// The batch is split into `folds` random folds (seeded). For each fold, an L2-regularised multinomial
/// logistic regression (the engine's own learner, `settings.l2`, linear features standardised by
/// `standardizer`) is trained on the pool plus the other folds of the batch, and each held-out item gets
///
/// `score_i = −log p_{−fold(i)}(ŷ_i | x_i)`,
///
/// the cross-entropy of its given label under a model that has not seen it; its proposed label is that
/// model's most probable class.
#[allow(clippy::too_many_arguments)]
pub fn cross_validated_loss(
    settings: &ModelSettings,
    standardizer: &Standardizer,
    n_classes: usize,
    pool_x: ArrayView2<'_, f64>,
    pool_y: &[usize],
    batch_x: ArrayView2<'_, f64>,
    batch_y: &[usize],
    folds: usize,
    seed: u64,
) -> Result<BaselineScores, ModelError> {
    let n = batch_y.len();
    if batch_x.nrows() != n || pool_x.nrows() != pool_y.len() {
        return Err(ModelError::Shape("rows and labels differ in count".into()));
    }
    let folds = folds.clamp(2, n.max(2));
    let mut order: Vec<usize> = (0..n).collect();
    order.shuffle(&mut ChaCha8Rng::seed_from_u64(seed));
    let mut fold_of = vec![0usize; n];
    for (pos, &i) in order.iter().enumerate() {
        fold_of[i] = pos % folds;
    }
    let fm = FeatureMap::new(standardizer.clone(), FeatureMapKind::Linear, settings.seed)?;
    let mut score = vec![0.0; n];
    let mut proposed = vec![0usize; n];
    for f in 0..folds {
        let train_rows: Vec<usize> = (0..n).filter(|&i| fold_of[i] != f).collect();
        let test_rows: Vec<usize> = (0..n).filter(|&i| fold_of[i] == f).collect();
        if test_rows.is_empty() {
            continue;
        }
        let mut tx = pool_x.to_owned();
        let bx = batch_x.select(Axis(0), &train_rows);
        for row in bx.rows() {
            tx.push_row(row)
                .map_err(|e| ModelError::Shape(e.to_string()))?;
        }
        let mut ty = pool_y.to_vec();
        ty.extend(train_rows.iter().map(|&i| batch_y[i]));
        let probs = fit_predict(
            settings,
            &fm,
            n_classes,
            tx.view(),
            &ty,
            batch_x.select(Axis(0), &test_rows).view(),
        )?;
        for (r, &i) in test_rows.iter().enumerate() {
            let p = probs.row(r);
            score[i] = -p[batch_y[i]].max(f64::MIN_POSITIVE).ln();
            proposed[i] = argmax(p.iter().copied());
        }
    }
    Ok(BaselineScores { score, proposed })
}

/// Train the engine's learner on `(x, y)` and return `softmax(φ(x_test) W)`.
///
/// Uses [`Learner::fit`] (hard labels, unit weights, `settings.l2`, bounded by the settings' iteration and
/// time limits).
pub fn fit_predict(
    settings: &ModelSettings,
    feature_map: &FeatureMap,
    n_classes: usize,
    x: ArrayView2<'_, f64>,
    y: &[usize],
    x_test: ArrayView2<'_, f64>,
) -> Result<Array2<f64>, ModelError> {
    let (learner, _report) = Learner::fit(settings, feature_map.clone(), n_classes, x, y)?;
    learner.predict_proba(x_test)
}

/// Index of the largest value (the first on ties; 0 for an empty iterator).
pub(crate) fn argmax(it: impl Iterator<Item = f64>) -> usize {
    let mut best = (0, f64::NEG_INFINITY);
    for (i, v) in it.enumerate() {
        if v > best.1 {
            best = (i, v);
        }
    }
    best.0
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::array;

    #[test]
    fn nearest_trusted_scores_disagreement_above_half() {
        // Trusted: class 0 at x = 0, class 1 at x = 10 (identity standardisation). Batch item at x = 1
        // labelled 1: d_same = 9, d_other = 1 → 9/10 = 0.9, proposal 0. Item at x = 9 labelled 1: d_same = 1,
        // d_other = 9 → 0.1, proposal 1 (hand computed from the definition above).
        let st = Standardizer::identity(1);
        let tx = array![[0.0], [10.0]];
        let bx = array![[1.0], [9.0]];
        let b = nearest_trusted(&st, 2, tx.view(), &[0, 1], bx.view(), &[1, 1]).unwrap();
        assert!((b.score[0] - 0.9).abs() < 1e-12 && (b.score[1] - 0.1).abs() < 1e-12);
        assert_eq!(b.proposed, vec![0, 1]);
    }

    #[test]
    fn nearest_trusted_without_a_same_label_item_scores_one() {
        let st = Standardizer::identity(1);
        let tx = array![[0.0], [10.0]];
        let bx = array![[5.0]];
        let b = nearest_trusted(&st, 3, tx.view(), &[0, 1], bx.view(), &[2]).unwrap();
        assert_eq!(b.score, vec![1.0]);
    }
}
