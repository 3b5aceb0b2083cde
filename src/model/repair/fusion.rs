//! Phase 5 of an assessment: each item's suspicion from the repair signal, the trusted-anchored doubt and
//! the learner's doubt, fused with the weight the trusted audit gives the repair near the item; the
//! proposed label; and the trusted items the batch gets wrong.

use ndarray::{Array1, Array2, ArrayView2};

use super::{argmax, ItemScore, TrustedItemReport};
use crate::model::anchor::AnchoredPath;
use crate::model::learner::predict_proba;
use crate::model::neighbours::NeighbourModel;
use crate::model::ModelSettings;

/// The per-item evidence the fusion reads.
pub(crate) struct Evidence<'a> {
    /// Reference probabilities `p_ref` (a model that has not seen the item).
    pub(crate) p_ref: &'a Array2<f64>,
    /// The trusted-anchored model's probabilities `p_A`.
    pub(crate) p_anchor: &'a Array2<f64>,
    /// The published objective's path.
    pub(crate) anchored: &'a AnchoredPath,
    /// Repair weight per item, from the trusted audit.
    pub(crate) repair_weights: &'a [f64],
    /// The trusted neighbours' labels model `p_N`.
    pub(crate) neighbours: &'a NeighbourModel,
    /// The configured base weight (where the audit finds the reference sound).
    pub(crate) base_weight: f64,
    /// Moved mass per item at the repair-cost point.
    pub(crate) repair_mass: &'a [f64],
    /// Whether the pool is the reference model.
    pub(crate) big_pool: bool,
}

/// The items' scores and the batch's estimated share of wrong labels.
///
/// The suspicion fuses the repair signal (the published objective's path) with the learner's doubt, item
/// by item, with the weight the trusted audit gives the repair there: the configured base weight where the
/// reference model is sound on the nearby trusted items and of the item's class, more where it is not:
///
/// `s_j = b·r_j + (w_j − b)⁺ · max(1 − p_A(ŷ_j), 1 − p_N(ŷ_j)) + (1 − w_j)(1 − p_ref(ŷ_j))`,
///
/// `r_j` the repair's own signal, `p_A` the trusted-anchored model, `p_N` the trusted neighbours' labels
/// model ([`crate::model::neighbours`]). What the audit adds above the base goes to the trusted evidence:
/// the larger of the two doubts, because a model anchored on the trusted items but trained beside a
/// biased pool can learn the bias too, while the verified items near the item cannot. The best
/// alternative class comes from the blend `q_j = b ρ_j + (w_j − b) p_N,j + (1 − w_j) p_ref,j` of the
/// repair's path-averaged relaxed label, the neighbours' labels and the reference prediction (`b` capped
/// at `w_j`).
pub(crate) fn score_items(
    settings: &ModelSettings,
    batch_y: &[usize],
    k: usize,
    ev: &Evidence<'_>,
) -> (Vec<ItemScore>, f64) {
    let n_b = batch_y.len();
    let (p_ref, anchored) = (ev.p_ref, ev.anchored);
    let blend: Array2<f64> = {
        let mut q = p_ref.clone();
        for (j, mut row) in q.rows_mut().into_iter().enumerate() {
            let w = ev.repair_weights[j];
            let b = ev.base_weight.min(w);
            for c in 0..k {
                row[c] = b * anchored.mean_labels[[j, c]]
                    + (w - b) * ev.neighbours.p[[j, c]]
                    + (1.0 - w) * row[c];
            }
        }
        q
    };
    // The batch's estimated share of wrong labels: EM on the reference model's probability of each given
    // label under a class-symmetric noise model (see `crate::model::anchor`), and each item's posterior.
    let q_given: Vec<f64> = (0..n_b).map(|j| p_ref[[j, batch_y[j]]]).collect();
    let (noise_rate, p_wrong) = crate::model::anchor::noise_rate_em(
        &q_given,
        k,
        settings.label_noise_prior,
        settings.label_noise_prior_items,
    );
    let items = (0..n_b)
        .map(|i| {
            let given = batch_y[i];
            let disagreement = (1.0 - p_ref[[i, given]]).clamp(0.0, 1.0);
            // Where the audit finds the reference sound (w = base), the repair's share is the signal that
            // serves best there: under the pool reference the mass the minimal repair moves at the target
            // crossing (the items the post-condition needs relabelled; the pool model orders the rest better
            // than any path does), under a cross-fit the published path's rank. What the audit adds above
            // the base goes to the trusted evidence (the trusted-anchored doubt or the neighbours' doubt,
            // whichever is larger), which leans on the trusted set where the reference model has learned
            // a bias.
            let w = ev.repair_weights[i];
            let base_signal = if ev.big_pool {
                ev.repair_mass[i]
            } else {
                anchored.score[i]
            };
            let anchored_doubt = (1.0 - ev.p_anchor[[i, given]]).clamp(0.0, 1.0);
            let neighbour_doubt = ev.neighbours.doubt(i, given);
            let suspicion = (ev.base_weight * base_signal
                + (w - ev.base_weight).max(0.0) * anchored_doubt.max(neighbour_doubt)
                + (1.0 - w) * disagreement)
                .clamp(0.0, 1.0);
            let pi = blend.row(i);
            // Best alternative class under the blend, and its share of the non-given mass:
            // P(alternative | the given label is wrong). The proposed label is the alternative once the
            // suspicion reaches the batch's flag line ([`propose_at`], once the line is known); until then
            // every item keeps its given label.
            let alt = argmax((0..k).map(|c| if c == given { f64::NEG_INFINITY } else { pi[c] }));
            let rest: f64 = (0..k).filter(|&c| c != given).map(|c| pi[c]).sum();
            let share = if rest > 0.0 {
                pi[alt] / rest
            } else {
                1.0 / (k - 1) as f64
            };
            let rho = anchored.mean_labels.row(i);
            let repair_label = argmax((0..k).map(|c| {
                if c == given {
                    f64::NEG_INFINITY
                } else {
                    rho[c]
                }
            }));
            ItemScore {
                index: i,
                label: given,
                suspicion,
                proposed_label: given,
                confidence: 1.0 - suspicion,
                alternative_label: alt,
                alternative_share: share.clamp(0.0, 1.0),
                repair_mass: ev.repair_mass[i],
                repair_signal: anchored.score[i],
                repair_label,
                learner_doubt: disagreement,
                anchored_doubt,
                neighbour_doubt,
                repair_weight: w,
                wrong_probability: p_wrong[i],
                reference_margin: margin(p_ref.row(i)),
                flagged_at_step: anchored.first_flagged[i],
                label_fit: Default::default(),
            }
        })
        .collect();
    (items, noise_rate)
}

/// A probability row's margin: the largest entry less the second largest (the largest alone for one
/// class).
fn margin(p: ndarray::ArrayView1<'_, f64>) -> f64 {
    let (mut first, mut second) = (f64::NEG_INFINITY, f64::NEG_INFINITY);
    for &v in p {
        if v > first {
            second = first;
            first = v;
        } else if v > second {
            second = v;
        }
    }
    (first - second.max(0.0)).clamp(0.0, 1.0)
}

/// The fusion's flag rule as the clean level reads it: for item `j` carrying label `c`,
///
/// `flag_j(c) = 1[(w_jc − b)⁺ max(1 − p_A,jc, 1 − p_N,jc) + (1 − w_jc)(1 − p_ref,jc) ≥ τ]`,
///
/// the suspicion of [`score_items`] with the repair's own share `b · s_j` taken as 0: a batch carrying the
/// right labels asks the minimal repair to move nothing (its cost point is where the target is already
/// met). `w_jc` is the weight the trusted audit would give item `j` with label `c` (the neighbourhood's
/// excess is the item's, the class excesses are `c`'s), `p_A` the trusted-anchored model's probabilities,
/// `p_N` the trusted neighbours' (read as no doubt, `1 − p_N = 0`, where `neighbours` is `None`).
pub(crate) struct FlagRule<'a> {
    /// Reference probabilities `p_ref`.
    pub(crate) p_ref: &'a Array2<f64>,
    /// The trusted-anchored model's probabilities `p_A`.
    pub(crate) p_anchor: &'a Array2<f64>,
    /// `w_jc` (`n_B × K`).
    pub(crate) weights_by_class: &'a Array2<f64>,
    /// `p_N`, or `None` for a rule without the neighbours' doubt.
    pub(crate) neighbours: Option<&'a NeighbourModel>,
    /// The base weight `b`.
    pub(crate) base_weight: f64,
    /// The flag threshold `τ`.
    pub(crate) threshold: f64,
}

impl FlagRule<'_> {
    /// The rule's suspicion of item `j` carrying label `c`:
    /// `(w_jc − b)⁺ max(1 − p_A,jc, 1 − p_N,jc) + (1 − w_jc)(1 − p_ref,jc)`.
    fn score(&self, j: usize, c: usize) -> f64 {
        let w = self.weights_by_class[[j, c]];
        let neighbours = self.neighbours.map_or(0.0, |n| n.doubt(j, c));
        let anchored = (1.0 - self.p_anchor[[j, c]])
            .clamp(0.0, 1.0)
            .max(neighbours);
        let learner = (1.0 - self.p_ref[[j, c]]).clamp(0.0, 1.0);
        (w - self.base_weight).max(0.0) * anchored + (1.0 - w) * learner
    }

    /// `flag_j(c)`.
    fn flags(&self, j: usize, c: usize) -> bool {
        self.score(j, c) >= self.threshold
    }
}

/// The batch's flag line: the least suspicion `τ ≥ floor` at which a batch carrying the right labels is
/// expected to flag at most `rate` of its items,
///
/// `τ* = max(floor, min{τ : m₀(τ) ≤ rate})`, `m₀(τ) = (1/n) Σ_j Σ_c p̃_jc · 1[s_jc ≥ τ]`,
///
/// with `s_jc` the rule's suspicion of item `j` labelled `c` ([`FlagRule`], the repair's share taken as 0)
/// and `p̃` the distribution the right labels are taken to follow. `m₀` is a step function that falls as
/// `τ` rises; the line sits halfway between the last suspicion it keeps and the first it drops (above the
/// highest one, at most 1, when even that one alone weighs more than `rate`). A flag at this line is a
/// statement with a known error rate — "a right label scores this high on at most `rate` of the items" —
/// whatever the learner's accuracy: where the classes overlap, the line rises until clean batches flag
/// no more than `rate`; where the learner is sure, it stays at the floor. The line depends on the items'
/// features and the trusted set, never on the delivered labels, so a vendor cannot move it by labelling.
/// (The rule is ours: a per-batch false-positive rate control, the Neyman–Pearson way of fixing the
/// size of a test; no published source for its use here.)
pub(crate) fn flag_line(rule: &FlagRule<'_>, p_label: &Array2<f64>, floor: f64, rate: f64) -> f64 {
    let (n_b, k) = rule.p_ref.dim();
    if n_b == 0 || rate >= 1.0 {
        return floor;
    }
    let mut mass: Vec<(f64, f64)> = (0..n_b)
        .flat_map(|j| (0..k).map(move |c| (j, c)))
        .map(|(j, c)| {
            (
                rule.score(j, c),
                p_label[[j, c]].clamp(0.0, 1.0) / n_b as f64,
            )
        })
        .filter(|&(s, w)| s >= floor && w > 0.0)
        .collect();
    mass.sort_by(|a, b| b.0.total_cmp(&a.0));
    let mut kept = 0.0;
    let mut above = f64::NAN;
    let mut i = 0;
    while i < mass.len() {
        let s = mass[i].0;
        let mut w = 0.0;
        while i < mass.len() && mass[i].0 == s {
            w += mass[i].1;
            i += 1;
        }
        if kept + w > rate {
            let line = if above.is_nan() {
                (s + 1.0) / 2.0
            } else {
                (s + above) / 2.0
            };
            return line.max(floor).min(1.0);
        }
        kept += w;
        above = s;
    }
    floor
}

/// Sets each item's proposed label and confidence at the batch's flag line: an item whose suspicion
/// reaches `line` is flagged, its proposed label the best alternative class and its confidence
/// `suspicion × alternative_share`; any other keeps its given label with confidence `1 − suspicion`.
pub(crate) fn propose_at(items: &mut [ItemScore], line: f64) {
    for it in items {
        if it.suspicion >= line {
            it.proposed_label = it.alternative_label;
            it.confidence = (it.suspicion * it.alternative_share).clamp(0.0, 1.0);
        } else {
            it.proposed_label = it.label;
            it.confidence = 1.0 - it.suspicion;
        }
    }
}

/// The flagged share to expect from a batch labelled the way the reference model expects, and its
/// standard deviation (see `Assessment::expected_flagged_share`), each item flagged by the fusion's rule
/// ([`FlagRule`]); and the flagged items to expect per given label (`Assessment::expected_flagged_by_label`).
///
/// `p_label` is the distribution the right labels are taken to follow: `p_ref` itself, or `p_ref`
/// sharpened by the sharpness the trusted set measured (see [`crate::model::calibration`]); the flag
/// indicator always follows the fusion's rule, because that is what the engine flags with.
pub(crate) fn expected_flagged(rule: &FlagRule<'_>, p_label: &Array2<f64>) -> (f64, f64, Vec<f64>) {
    let n_b = rule.p_ref.nrows();
    let by_item = flag_chances(rule, p_label);
    let q: Vec<f64> = by_item
        .rows()
        .into_iter()
        .map(|r| r.sum().clamp(0.0, 1.0))
        .collect();
    let share = q.iter().sum::<f64>() / n_b as f64;
    let sd = q.iter().map(|v| v * (1.0 - v)).sum::<f64>().sqrt() / n_b as f64;
    let by_label = by_item.sum_axis(ndarray::Axis(0)).to_vec();
    (share, sd, by_label)
}

/// `P(Y′_j = c) · flag_j(c)` for every item `j` and class `c`, with `Y′_j ~ Categorical(p_label,j)`: the
/// chance that item `j` carries label `c` and is flagged for it.
fn flag_chances(rule: &FlagRule<'_>, p_label: &Array2<f64>) -> Array2<f64> {
    let mut out = Array2::zeros(rule.p_ref.raw_dim());
    for j in 0..rule.p_ref.nrows() {
        for c in 0..rule.p_ref.ncols() {
            if rule.flags(j, c) {
                out[[j, c]] = p_label[[j, c]].clamp(0.0, 1.0);
            }
        }
    }
    out
}

/// Trusted items the batch as delivered gets wrong (`prob_t_with`: the trusted items' probabilities under
/// the model trained with it), and how many the model at the repair point `theta_rep` still gets wrong.
pub(crate) fn trusted_reports(
    phi_t: ArrayView2<'_, f64>,
    y_t: &[usize],
    prob_t_with: &Array2<f64>,
    ref_pred_t: &[usize],
    theta_rep: &Array1<f64>,
    k: usize,
) -> (Vec<TrustedItemReport>, usize) {
    let prob_t_rep = predict_proba(phi_t, theta_rep, k);
    let broken = (0..y_t.len())
        .filter_map(|t| {
            let pred = argmax(prob_t_with.row(t).iter().copied());
            let yt = y_t[t];
            (pred != yt).then(|| TrustedItemReport {
                index: t,
                label: yt,
                predicted_with_batch: pred,
                prob_with_batch: prob_t_with[[t, yt]],
                reference_correct: ref_pred_t[t] == yt,
                repaired_correct: argmax(prob_t_rep.row(t).iter().copied()) == yt,
            })
        })
        .collect();
    let still_wrong = (0..y_t.len())
        .filter(|&t| argmax(prob_t_rep.row(t).iter().copied()) != y_t[t])
        .count();
    (broken, still_wrong)
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Worked by hand: the largest probability less the second largest, ties giving 0, one class its
    /// probability alone.
    #[test]
    fn the_margin_is_the_best_class_less_the_runner_up() {
        let m = |v: &[f64]| margin(ndarray::ArrayView1::from(v));
        assert!((m(&[0.2, 0.5, 0.3]) - 0.2).abs() < 1e-12);
        assert!((m(&[0.6, 0.1, 0.3]) - 0.3).abs() < 1e-12);
        assert_eq!(m(&[0.4, 0.4, 0.2]), 0.0);
        assert_eq!(m(&[1.0]), 1.0);
    }

    /// The per-label expectations add up to the batch's expected flagged count `n · m₀`, and each is the
    /// formula of `Assessment::expected_flagged_by_label` worked by hand on a three-item batch.
    #[test]
    fn expected_flags_per_label_add_up_to_the_expected_share() {
        let p = ndarray::array![[0.7, 0.2, 0.1], [0.45, 0.45, 0.1], [0.05, 0.05, 0.9]];
        // The trusted-anchored model sure of every label: its doubt adds nothing, the rule is
        // `(1 − w)(1 − p) ≥ τ`.
        let sure = Array2::ones((3, 3));
        let w = ndarray::array![[0.0, 0.0, 0.0], [0.2, 0.2, 0.2], [0.5, 0.5, 0.5]];
        let rule = FlagRule {
            p_ref: &p,
            p_anchor: &sure,
            weights_by_class: &w,
            neighbours: None,
            base_weight: 0.0,
            threshold: 0.5,
        };
        let (share, _, by) = expected_flagged(&rule, &p);
        // Item 0: 1 − p ≥ 0.5 for classes 1 (0.8) and 2 (0.9): adds 0.2 and 0.1.
        // Item 1: 0.8 · (1 − p) ≥ 0.5 for class 2 only (0.72); classes 0 and 1 give 0.44: adds 0.1.
        // Item 2: 0.5 · (1 − p) is at most 0.475 < 0.5: adds nothing.
        let want = [0.0, 0.2, 0.2];
        for (got, want) in by.iter().zip(want) {
            assert!((got - want).abs() < 1e-12, "{by:?}");
        }
        assert!((by.iter().sum::<f64>() - 3.0 * share).abs() < 1e-12);
        // Labels drawn from a sharper distribution than the flag rule's: the indicator still follows
        // the rule, the chance follows `p_label` (item 0's classes 1 and 2 at 0.1 and 0.05).
        let sharper = ndarray::array![[0.85, 0.1, 0.05], [0.45, 0.45, 0.1], [0.0, 0.0, 1.0]];
        let (_, _, by) = expected_flagged(&rule, &sharper);
        for (got, want) in by.iter().zip([0.0, 0.1, 0.15]) {
            assert!((got - want).abs() < 1e-12, "{by:?}");
        }
        // The trusted-anchored model doubting item 2's classes 0 and 1 (p_A = 0.1) at weight 0.5 above a
        // base of 0: 0.5 · 0.9 + 0.5 · 0.95 = 0.925 ≥ 0.5, so item 2 now adds 0.05 + 0.05; its class 2
        // (p_A = 0.8) gives 0.5 · 0.2 + 0.5 · 0.1 = 0.15 and stays unflagged.
        let doubting = ndarray::array![[1.0, 1.0, 1.0], [1.0, 1.0, 1.0], [0.1, 0.1, 0.8]];
        let rule = FlagRule {
            p_anchor: &doubting,
            ..rule
        };
        let (_, _, by) = expected_flagged(&rule, &p);
        for (got, want) in by.iter().zip([0.05, 0.25, 0.2]) {
            assert!((got - want).abs() < 1e-12, "{by:?}");
        }
        // The trusted neighbours naming class 1 for item 1 (p_N = [0.1, 0.8, 0.1]), undecided elsewhere
        // (1/3 each): item 1's class 0 now scores 0.2 · max(0, 0.9) + 0.8 · 0.55 = 0.62 ≥ 0.5 and adds
        // 0.45; its class 1 gives 0.2 · 0.2 + 0.44 = 0.48 and stays unflagged; item 2's class 2 gives
        // 0.5 · max(0.2, 2/3) + 0.05 ≈ 0.383, still unflagged; item 0 has no weight above the base.
        let third = 1.0 / 3.0;
        let nn = NeighbourModel {
            p: ndarray::array![
                [third, third, third],
                [0.1, 0.8, 0.1],
                [third, third, third]
            ],
            sharpness: 1.0,
        };
        let with_nn = FlagRule {
            neighbours: Some(&nn),
            ..rule
        };
        let (_, _, by) = expected_flagged(&with_nn, &p);
        for (got, want) in by.iter().zip([0.5, 0.25, 0.2]) {
            assert!((got - want).abs() < 1e-12, "{by:?}");
        }
    }

    /// The flag line worked by hand: two items, two classes, no repair weight, so the rule's suspicion is
    /// `1 − p_ref`. With `p_ref = p̃ = [[0.9, 0.1], [0.6, 0.4]]` the suspicions at or above the floor 0.5
    /// are 0.9 (item 0 labelled 1, chance 0.1, weight 0.05 of the batch) and 0.6 (item 1 labelled 1,
    /// chance 0.4, weight 0.2). A rate of 3 % keeps neither (the line goes above 0.9, halfway to 1), 10 %
    /// keeps the first (halfway between 0.6 and 0.9), 30 % keeps both (the floor), 1 is the floor; and at
    /// each line the expected clean flagged share is at most the rate.
    #[test]
    fn the_flag_line_is_the_least_suspicion_at_which_right_labels_flag_at_most_the_rate() {
        let p = ndarray::array![[0.9, 0.1], [0.6, 0.4]];
        let sure = Array2::ones((2, 2));
        let w = Array2::zeros((2, 2));
        let rule = FlagRule {
            p_ref: &p,
            p_anchor: &sure,
            weights_by_class: &w,
            neighbours: None,
            base_weight: 0.0,
            threshold: 0.5,
        };
        for (rate, want) in [
            (0.03, 0.95),
            (0.1, 0.75),
            (0.3, 0.5),
            (1.0, 0.5),
            (0.0, 0.95),
        ] {
            let line = flag_line(&rule, &p, 0.5, rate);
            assert!((line - want).abs() < 1e-12, "rate {rate}: line {line}");
            let at = FlagRule {
                threshold: line,
                ..rule
            };
            let (share, _, _) = expected_flagged(&at, &p);
            assert!(share <= rate + 1e-12, "rate {rate}: {share}");
        }
        // A higher floor is kept: nothing below it flags whatever the rate.
        assert_eq!(flag_line(&rule, &p, 0.8, 0.3), 0.8);
        // An empty batch: the floor.
        let none = Array2::<f64>::zeros((0, 2));
        let empty = FlagRule {
            p_ref: &none,
            p_anchor: &none,
            weights_by_class: &none,
            neighbours: None,
            base_weight: 0.0,
            threshold: 0.5,
        };
        assert_eq!(flag_line(&empty, &none, 0.5, 0.03), 0.5);
    }

    /// At the line an item is flagged (proposed label its best alternative, confidence
    /// `suspicion × share`); below it, it keeps its label with confidence `1 − suspicion`.
    #[test]
    fn items_are_flagged_at_the_line_and_not_below_it() {
        let item = |suspicion: f64| ItemScore {
            index: 0,
            label: 0,
            suspicion,
            proposed_label: 0,
            confidence: 0.0,
            alternative_label: 2,
            alternative_share: 0.5,
            repair_mass: 0.0,
            repair_signal: 0.0,
            repair_label: 2,
            learner_doubt: suspicion,
            anchored_doubt: 0.0,
            neighbour_doubt: 0.0,
            repair_weight: 0.0,
            wrong_probability: 0.0,
            reference_margin: 0.0,
            flagged_at_step: None,
            label_fit: Default::default(),
        };
        let mut items = vec![item(0.8), item(0.7), item(0.69)];
        propose_at(&mut items, 0.7);
        let got: Vec<(usize, f64)> = items
            .iter()
            .map(|i| (i.proposed_label, i.confidence))
            .collect();
        let want = [(2, 0.4), (2, 0.35), (0, 0.31)];
        for ((gl, gc), (wl, wc)) in got.iter().zip(want) {
            assert_eq!(*gl, wl, "{got:?}");
            assert!((gc - wc).abs() < 1e-12, "{got:?}");
        }
    }
}
