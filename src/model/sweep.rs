//! Debugging the accepted pool against the current trusted set, in chunks.
//!
//! A vendor that poisons from its first delivery, or a bias present from the start, is in the pool
//! before any batch is scored against it: the pool model has learned it, and every later batch is judged
//! against a reference that agrees with the bias. The sweep turns the trusted set on the pool itself:
//!
//! * the **pool model** `θ_P` (from the pool summary) gives each pool item's learner doubt
//!   `1 − p_P(y_i)` — in-sample, so it cannot see a bias the pool shares;
//! * the **trusted-anchored model** `θ_A = argmin_θ c̄_A Φ(θ) + L_P(θ)` (the trusted items' mean loss
//!   weighted `anchor_confidence` beside the pool's own loss, here its second-order summary) is the
//!   learner pulled onto the trusted items; its doubt `1 − p_A(y_i)` is where the trusted set disagrees
//!   with what the pool taught;
//! * the suspicion leads with the anchored doubt (the sweep asks whether accepted labels agree with the
//!   trusted set); the in-sample doubt keeps the configured base weight where the **trusted audit** of
//!   `θ_P` (see the `anchor` module) finds the pool model sound near the item, and none where it does not.
//!
//! The models are fitted once (`SweepScorer::new`: one solve of the size of the learner's parameters);
//! each chunk then costs `O(n · p · K + n · m · p)` for `n` items and `m` trusted items, so a pool of a
//! million items is swept in chunks with memory bounded by the chunk. A flag is a suspicion for human
//! review, not proof.

use std::time::Instant;

use ndarray::{Array1, Array2, ArrayView2};
use serde::{Deserialize, Serialize};

use super::anchor::{trusted_audit, TrustedAudit};
use super::learner::{one_hot, predict_proba, solve, Objective};
use super::repair::argmax;
use super::{check_labels, ModelError, ModelSettings, PoolSummary, TrustedInput};

/// One pool item's sweep result.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct SweepItem {
    /// Row in the chunk.
    pub index: usize,
    /// The label in the pool (class index).
    pub label: usize,
    /// Fused suspicion in `[0, 1]`: `(1 − β)·anchored_doubt + β·learner_doubt`, with `β` the base weight
    /// (`pool_reference_repair_weight`) while the audit finds the pool model sound near the item, and 0
    /// where it does not. The sweep asks whether accepted labels agree with the trusted set, so the
    /// trusted-anchored doubt leads. A suspicion, not proof.
    pub suspicion: f64,
    /// `1 − p_P(label)` under the pool model (in-sample).
    pub learner_doubt: f64,
    /// `1 − p_A(label)` under the trusted-anchored model.
    pub anchored_doubt: f64,
    /// The trusted audit's weight on the anchored doubt for this item.
    pub repair_weight: f64,
    /// The trusted-anchored model's most likely other class.
    pub proposed_label: usize,
}

/// The two models of a sweep and the trusted items they are audited on.
pub struct SweepScorer {
    summary_map: super::FeatureMap,
    k: usize,
    base_weight: f64,
    neighbours: usize,
    theta_pool: Array1<f64>,
    theta_anchor: Array1<f64>,
    phi_t: Array2<f64>,
    y_t: Vec<usize>,
    c_t: Array1<f64>,
    converged: bool,
}

impl SweepScorer {
    /// Fit the trusted-anchored model against the pool summary (`n > 0`).
    pub fn new(
        settings: &ModelSettings,
        summary: &PoolSummary,
        trusted: TrustedInput<'_>,
    ) -> Result<Self, ModelError> {
        settings.validate()?;
        let k = summary.n_classes;
        check_labels(trusted.y, k)?;
        if trusted.y.is_empty() {
            return Err(ModelError::Degenerate("the trusted set is empty".into()));
        }
        if summary.n == 0 {
            return Err(ModelError::Degenerate("the pool is empty".into()));
        }
        let fmap = summary.feature_map.clone();
        let phi_t = fmap.apply(trusted.x)?;
        let theta_pool = summary.theta();
        let n_p = summary.n as f64;
        // The trusted items pull the model far from θ_P, where the summary's quadratic alone overstates the
        // pool's loss; so the pool enters with its reservoir as well (exact while the pool fits in it, an
        // unbiased correction beyond: see `PoolSummary::term`).
        let mut term = summary.term(settings, usize::MAX);
        let total = trusted.weight.sum().max(f64::MIN_POSITIVE);
        // Trusted item t weighs c̄_A · n_P · c_t / Σ c, so their mean loss enters c̄_A times beside the
        // pool's mean loss (normaliser n_P).
        let w_t = trusted
            .weight
            .mapv(|c| settings.anchor_confidence * n_p * c / total);
        let y_t = one_hot(trusted.y, k);
        let (phi, y, w) = match term.rows.take() {
            Some((rp, ry, rw)) => {
                let mut w = vec![rw; rp.nrows()];
                w.extend(w_t.iter());
                (
                    super::learner::vstack(rp.view(), phi_t.view()),
                    super::learner::vstack(ry.view(), y_t.view()),
                    Array1::from(w),
                )
            }
            None => (phi_t.clone(), y_t, w_t),
        };
        let obj = Objective {
            phi: phi.view(),
            y: y.view(),
            weight: Some(w.view()),
            norm: n_p,
            l2: settings.l2,
            prior: Some(term.quadratic(n_p)),
        };
        let deadline = Instant::now() + settings.time_budget();
        let (theta_anchor, rep) = solve(settings, &obj, theta_pool.clone(), deadline);
        Ok(Self {
            summary_map: fmap,
            k,
            base_weight: settings.pool_reference_repair_weight,
            neighbours: settings.trusted_neighbours,
            theta_pool,
            theta_anchor,
            phi_t,
            y_t: trusted.y.to_vec(),
            c_t: trusted.weight.to_owned(),
            converged: rep.converged,
        })
    }

    /// Whether the trusted-anchored model's solve converged.
    pub fn converged(&self) -> bool {
        self.converged
    }

    /// Score one chunk of pool items (raw features, labels).
    pub fn score(
        &self,
        x: ArrayView2<'_, f64>,
        y: &[usize],
    ) -> Result<(Vec<SweepItem>, TrustedAudit), ModelError> {
        check_labels(y, self.k)?;
        if x.nrows() != y.len() {
            return Err(ModelError::Shape(
                "chunk rows and labels differ in length".into(),
            ));
        }
        let phi = self.summary_map.apply(x)?;
        let p_pool = predict_proba(phi.view(), &self.theta_pool, self.k);
        let p_anchor = predict_proba(phi.view(), &self.theta_anchor, self.k);
        let d_bt = crate::model::neighbours::squared_distances(phi.view(), self.phi_t.view());
        let (weights, audit) = trusted_audit(
            self.phi_t.view(),
            &self.y_t,
            self.c_t.view(),
            &self.theta_pool,
            d_bt.view(),
            y,
            self.k,
            self.base_weight,
            self.neighbours,
            "pool",
        );
        let items = y
            .iter()
            .enumerate()
            .map(|(i, &label)| {
                let learner_doubt = (1.0 - p_pool[[i, label]]).clamp(0.0, 1.0);
                let anchored_doubt = (1.0 - p_anchor[[i, label]]).clamp(0.0, 1.0);
                let w = weights.given[i];
                let row = p_anchor.row(i);
                let proposed_label = argmax((0..self.k).map(|c| {
                    if c == label {
                        f64::NEG_INFINITY
                    } else {
                        row[c]
                    }
                }));
                SweepItem {
                    index: i,
                    label,
                    suspicion: ((1.0 - self.base_weight.min(w)) * anchored_doubt
                        + self.base_weight.min(w) * learner_doubt)
                        .clamp(0.0, 1.0),
                    learner_doubt,
                    anchored_doubt,
                    repair_weight: w,
                    proposed_label,
                }
            })
            .collect();
        Ok((items, audit))
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::model::{FeatureMap, FeatureMapKind, Standardizer};
    use rand::{Rng, SeedableRng};

    /// Two classes split by the first feature, with a trusted set that covers the whole space. A pool in
    /// which one vendor labelled a whole region wrongly (`x₀ > 1` → class 0, where it should be 1): the
    /// sweep ranks the region's items above the rest, and the anchored doubt — not the in-sample learner
    /// doubt — is what finds them.
    #[test]
    fn a_bias_the_pool_shares_is_found_by_the_trusted_anchored_model() {
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(9);
        let mut draw = |n: usize| {
            let mut x = Array2::zeros((n, 2));
            let mut y = vec![0; n];
            for i in 0..n {
                x[[i, 0]] = rng.random_range(-3.0..3.0);
                x[[i, 1]] = rng.random_range(-1.0..1.0);
                y[i] = usize::from(x[[i, 0]] > 0.0);
            }
            (x, y)
        };
        let (px, mut py) = draw(600);
        let biased: Vec<bool> = (0..600).map(|i| px[[i, 0]] > 1.0).collect();
        for (l, &b) in py.iter_mut().zip(&biased) {
            if b {
                *l = 0;
            }
        }
        let (tx, ty) = draw(40);
        let settings = ModelSettings::default();
        let st = Standardizer::fit(&[px.view()]).unwrap();
        let fm = FeatureMap::new(st, FeatureMapKind::Linear, 1).unwrap();
        let (summary, _) = PoolSummary::fit(&settings, fm, 2, px.view(), &py).unwrap();
        let w = Array1::ones(ty.len());
        let scorer = SweepScorer::new(
            &settings,
            &summary,
            TrustedInput {
                x: tx.view(),
                y: &ty,
                weight: w.view(),
            },
        )
        .unwrap();
        let (items, audit) = scorer.score(px.view(), &py).unwrap();
        // AUROC as the Mann–Whitney statistic (ties count one half).
        let auc = |f: fn(&SweepItem) -> f64| {
            let s: Vec<f64> = items.iter().map(f).collect();
            let (mut wins, mut pairs) = (0.0, 0.0);
            for (a, &pa) in s.iter().zip(&biased) {
                for (b, &pb) in s.iter().zip(&biased) {
                    if pa && !pb {
                        pairs += 1.0;
                        wins += if a > b {
                            1.0
                        } else if a == b {
                            0.5
                        } else {
                            0.0
                        };
                    }
                }
            }
            wins / pairs
        };
        let (fused, learner, anchored) = (
            auc(|i| i.suspicion),
            auc(|i| i.learner_doubt),
            auc(|i| i.anchored_doubt),
        );
        assert!(audit.trusted_wrong > 0, "{audit:?}");
        assert!(anchored > 0.9, "anchored {anchored}");
        assert!(
            anchored > learner + 0.1,
            "anchored {anchored}, learner {learner}"
        );
        assert!(fused > learner, "fused {fused}, learner {learner}");
    }
}
