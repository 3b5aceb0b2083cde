//! Ranking metrics for the attack benchmark.
//!
//! Every function takes per-item scores (higher = more suspicious) and the ground truth of which items were
//! planted bugs. Ties between scores are handled explicitly (they are common: a baseline that outputs 0/1
//! produces large tie groups), always by treating a group of equal scores as one threshold, never by the
//! order the items happen to come in.

use std::cmp::Ordering;

/// Midranks (1-based) of `values`: tied values share the mean of the ranks they occupy.
///
/// This is the rank transform of the Mann–Whitney U statistic and of Spearman's ρ with ties
/// (e.g. Hollander & Wolfe, *Nonparametric Statistical Methods*, ch. 4 and 8). NaN sorts below every number
/// (`f64::total_cmp` after mapping NaN to −∞), so a NaN score is "least suspicious", never a panic.
pub fn midranks(values: &[f64]) -> Vec<f64> {
    let key = |v: f64| if v.is_nan() { f64::NEG_INFINITY } else { v };
    let mut order: Vec<usize> = (0..values.len()).collect();
    order.sort_by(|&a, &b| key(values[a]).total_cmp(&key(values[b])));
    let mut ranks = vec![0.0; values.len()];
    let mut start = 0;
    while start < order.len() {
        let mut end = start + 1;
        while end < order.len() && key(values[order[end]]) == key(values[order[start]]) {
            end += 1;
        }
        // positions start..end (0-based) hold ranks start+1..=end; their mean is (start + 1 + end) / 2.
        let mean_rank = (start + 1 + end) as f64 / 2.0;
        for &i in &order[start..end] {
            ranks[i] = mean_rank;
        }
        start = end;
    }
    ranks
}

/// Area under the ROC curve by the Mann–Whitney statistic, ties counted one half:
///
/// `AUROC = (1 / (n₊ n₋)) Σ_{i∈pos} Σ_{j∈neg} ([s_i > s_j] + ½ [s_i = s_j])
///        = (R₊ − n₊(n₊ + 1)/2) / (n₊ n₋)`
///
/// with `R₊` the sum of the positives' midranks (Hanley & McNeil, "The meaning and use of the area under a
/// receiver operating characteristic (ROC) curve", Radiology 1982). `None` when either class is empty.
pub fn auroc(scores: &[f64], positive: &[bool]) -> Option<f64> {
    assert_eq!(
        scores.len(),
        positive.len(),
        "scores and truth differ in length"
    );
    let n_pos = positive.iter().filter(|&&p| p).count();
    let n_neg = positive.len() - n_pos;
    if n_pos == 0 || n_neg == 0 {
        return None;
    }
    let ranks = midranks(scores);
    let r_pos: f64 = ranks
        .iter()
        .zip(positive)
        .filter(|(_, &p)| p)
        .map(|(r, _)| r)
        .sum();
    let np = n_pos as f64;
    Some((r_pos - np * (np + 1.0) / 2.0) / (np * n_neg as f64))
}

/// Groups of equal scores, highest first: `(positives in group, items in group)`.
fn threshold_groups(scores: &[f64], positive: &[bool]) -> Vec<(usize, usize)> {
    let key = |v: f64| if v.is_nan() { f64::NEG_INFINITY } else { v };
    let mut order: Vec<usize> = (0..scores.len()).collect();
    order.sort_by(|&a, &b| key(scores[b]).total_cmp(&key(scores[a])));
    let mut groups = Vec::new();
    let mut start = 0;
    while start < order.len() {
        let mut end = start + 1;
        while end < order.len() && key(scores[order[end]]) == key(scores[order[start]]) {
            end += 1;
        }
        let pos = order[start..end].iter().filter(|&&i| positive[i]).count();
        groups.push((pos, end - start));
        start = end;
    }
    groups
}

/// Average precision, the step-wise area under the precision–recall curve:
///
/// `AP = Σ_t (R_t − R_{t−1}) P_t`
///
/// over the distinct score thresholds `t` from highest to lowest, with `P_t`, `R_t` the precision and recall
/// of "flag every item scoring ≥ t". Without ties this is the classic non-interpolated average precision
/// `(1/n₊) Σ_{k: item k relevant} precision@k` (Manning, Raghavan & Schütze, *Introduction to Information
/// Retrieval*, 2008, §8.4). `None` when there is no positive.
pub fn average_precision(scores: &[f64], positive: &[bool]) -> Option<f64> {
    assert_eq!(
        scores.len(),
        positive.len(),
        "scores and truth differ in length"
    );
    let n_pos = positive.iter().filter(|&&p| p).count();
    if n_pos == 0 {
        return None;
    }
    // Σ_t (hits at t) · P_t, divided by n₊ once at the end; the min(1) removes the last rounding ulp
    // when every hit comes first (the exact value is then 1).
    let (mut tp, mut flagged, mut sum) = (0usize, 0usize, 0.0);
    for (pos, size) in threshold_groups(scores, positive) {
        tp += pos;
        flagged += size;
        if pos > 0 {
            sum += pos as f64 * (tp as f64 / flagged as f64);
        }
    }
    Some((sum / n_pos as f64).min(1.0))
}

/// Precision at the first threshold (highest first, tie groups kept whole) whose recall reaches
/// `recall_level`: "if a reviewer goes down the list until half the bugs are found, what fraction of what
/// they looked at was a bug". `None` when there is no positive.
pub fn precision_at_recall(scores: &[f64], positive: &[bool], recall_level: f64) -> Option<f64> {
    assert_eq!(
        scores.len(),
        positive.len(),
        "scores and truth differ in length"
    );
    let n_pos = positive.iter().filter(|&&p| p).count();
    if n_pos == 0 {
        return None;
    }
    let (mut tp, mut flagged) = (0usize, 0usize);
    for (pos, size) in threshold_groups(scores, positive) {
        tp += pos;
        flagged += size;
        if tp as f64 >= recall_level * n_pos as f64 - 1e-12 {
            return Some(tp as f64 / flagged as f64);
        }
    }
    // Unreachable for recall_level ≤ 1: the last group brings recall to 1.
    Some(tp as f64 / flagged.max(1) as f64)
}

/// Proposed-label quality among the `k` most suspicious items.
#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize)]
pub struct TopKLabels {
    /// `k` used (the number of planted bugs, capped at the batch size).
    pub k: usize,
    /// True bugs among the top `k`.
    pub bugs_in_top_k: usize,
    /// True bugs among the top `k` whose proposed label is their true (pre-attack) label.
    pub correct_proposals: usize,
    /// `correct_proposals / bugs_in_top_k` (`None` when no bug made the top `k`).
    pub accuracy: Option<f64>,
}

/// Proposed-label accuracy on the true bugs among the `k` highest-scoring items, `k = #bugs`.
///
/// The top `k` is taken by score, ties broken by item index (lowest first), the same order as
/// `Assessment::ranked`. `true_labels[i]` is the label before the attack; `proposed[i]` the tool's proposal.
pub fn top_k_labels(
    scores: &[f64],
    positive: &[bool],
    proposed: &[usize],
    true_labels: &[usize],
) -> TopKLabels {
    assert!(
        scores.len() == positive.len()
            && scores.len() == proposed.len()
            && scores.len() == true_labels.len(),
        "per-item slices differ in length"
    );
    let k = positive.iter().filter(|&&p| p).count();
    let mut order: Vec<usize> = (0..scores.len()).collect();
    order.sort_by(|&a, &b| match scores[b].total_cmp(&scores[a]) {
        Ordering::Equal => a.cmp(&b),
        o => o,
    });
    let top = &order[..k.min(order.len())];
    let bugs: Vec<usize> = top.iter().copied().filter(|&i| positive[i]).collect();
    let correct = bugs
        .iter()
        .filter(|&&i| proposed[i] == true_labels[i])
        .count();
    TopKLabels {
        k,
        bugs_in_top_k: bugs.len(),
        correct_proposals: correct,
        accuracy: (!bugs.is_empty()).then(|| correct as f64 / bugs.len() as f64),
    }
}

/// Spearman's rank correlation with ties: the Pearson correlation of the midranks.
///
/// `ρ = Σ (r_i − r̄)(s_i − s̄) / √(Σ (r_i − r̄)² Σ (s_i − s̄)²)`; without ties it equals
/// `1 − 6 Σ d_i² / (n (n² − 1))` (Spearman 1904). `None` when fewer than two items or one side is constant.
pub fn spearman(a: &[f64], b: &[f64]) -> Option<f64> {
    assert_eq!(a.len(), b.len(), "spearman: lengths differ");
    if a.len() < 2 {
        return None;
    }
    let (ra, rb) = (midranks(a), midranks(b));
    let n = a.len() as f64;
    let (ma, mb) = (ra.iter().sum::<f64>() / n, rb.iter().sum::<f64>() / n);
    let (mut sab, mut saa, mut sbb) = (0.0, 0.0, 0.0);
    for (x, y) in ra.iter().zip(&rb) {
        sab += (x - ma) * (y - mb);
        saa += (x - ma) * (x - ma);
        sbb += (y - mb) * (y - mb);
    }
    if saa <= 0.0 || sbb <= 0.0 {
        return None;
    }
    Some(sab / (saa * sbb).sqrt())
}

/// Indices of the `k` highest scores (ties by index), as a sorted set for comparisons.
pub fn top_k_set(scores: &[f64], k: usize) -> Vec<usize> {
    let mut order: Vec<usize> = (0..scores.len()).collect();
    order.sort_by(|&a, &b| match scores[b].total_cmp(&scores[a]) {
        Ordering::Equal => a.cmp(&b),
        o => o,
    });
    order.truncate(k);
    order.sort_unstable();
    order
}

#[cfg(test)]
mod tests {
    use super::*;

    fn close(a: f64, b: f64, tol: f64) {
        assert!((a - b).abs() <= tol, "{a} vs {b} (tol {tol})");
    }

    #[test]
    fn midranks_average_tied_positions() {
        // Hand computed: sorted 1, 2, 2, 3 occupy ranks 1, 2, 3, 4; the two 2s share (2 + 3) / 2 = 2.5.
        assert_eq!(midranks(&[2.0, 1.0, 3.0, 2.0]), vec![2.5, 1.0, 4.0, 2.5]);
    }

    #[test]
    fn auroc_small_documented_example() {
        // y = [0, 0, 1, 1], scores = [0.1, 0.4, 0.35, 0.8]: AUROC 0.75 (the example in scikit-learn's
        // `roc_auc_score` documentation; by hand: pairs (0.35 > 0.1), (0.8 > 0.1), (0.8 > 0.4) win,
        // (0.35 < 0.4) loses: 3/4).
        let s = [0.1, 0.4, 0.35, 0.8];
        let y = [false, false, true, true];
        close(auroc(&s, &y).unwrap(), 0.75, 1e-12);
    }

    #[test]
    fn auroc_hanley_mcneil_rating_example_with_ties() {
        // Hanley & McNeil, Radiology 143:29–36 (1982), Table 1 (values from memory): 58 normal and 51
        // abnormal images rated on a 5-point scale; normal counts per rating 33, 6, 6, 11, 2; abnormal
        // 3, 2, 2, 11, 33; the paper's area (trapezoidal = Wilcoxon with ties) is 0.893.
        // Re-derived here by pair counting: Σ_pairs [a > n] + ½[a = n] over 58·51 pairs.
        let normal = [33, 6, 6, 11, 2];
        let abnormal = [3, 2, 2, 11, 33];
        let mut s = Vec::new();
        let mut y = Vec::new();
        for (rating, (&cn, &ca)) in normal.iter().zip(&abnormal).enumerate() {
            for _ in 0..cn {
                s.push(rating as f64);
                y.push(false);
            }
            for _ in 0..ca {
                s.push(rating as f64);
                y.push(true);
            }
        }
        let mut pairs = 0.0;
        for (ra, &ca) in abnormal.iter().enumerate() {
            for (rn, &cn) in normal.iter().enumerate() {
                let w = match ra.cmp(&rn) {
                    Ordering::Greater => 1.0,
                    Ordering::Equal => 0.5,
                    Ordering::Less => 0.0,
                };
                pairs += w * (ca * cn) as f64;
            }
        }
        let a = auroc(&s, &y).unwrap();
        close(a, pairs / (58.0 * 51.0), 1e-12);
        close(a, 0.893, 5e-4);
    }

    #[test]
    fn auroc_is_none_without_both_classes_and_half_for_constant_scores() {
        assert_eq!(auroc(&[1.0, 2.0], &[true, true]), None);
        // Every pair tied: each counts ½ (definition above).
        close(
            auroc(&[0.3; 6], &[true, false, true, false, false, false]).unwrap(),
            0.5,
            1e-12,
        );
    }

    #[test]
    fn average_precision_documented_example() {
        // Same data as above: AP = 0.8333… (scikit-learn's `average_precision_score` documentation; by
        // hand: ranking 0.8(+), 0.4(−), 0.35(+), 0.1(−) gives precisions 1/1 and 2/3 at the two hits,
        // AP = (1 + 2/3) / 2 = 5/6).
        let s = [0.1, 0.4, 0.35, 0.8];
        let y = [false, false, true, true];
        close(average_precision(&s, &y).unwrap(), 5.0 / 6.0, 1e-12);
    }

    #[test]
    fn average_precision_textbook_ranking() {
        // Relevant at ranks 1, 3 and 6 of 6: AP = (1/1 + 2/3 + 3/6) / 3 = 0.72222… (hand computed from the
        // definition in Manning, Raghavan & Schütze 2008, §8.4).
        let s = [6.0, 5.0, 4.0, 3.0, 2.0, 1.0];
        let y = [true, false, true, false, false, true];
        close(
            average_precision(&s, &y).unwrap(),
            (1.0 + 2.0 / 3.0 + 0.5) / 3.0,
            1e-12,
        );
    }

    #[test]
    fn average_precision_of_a_perfect_ranking_is_exactly_one() {
        // Every bug ranked first: P = 1 at every hit, AP = 1 (definition); no rounding above 1.
        for n_pos in 1..60 {
            let s: Vec<f64> = (0..100).map(|i| -(i as f64)).collect();
            let y: Vec<bool> = (0..100).map(|i| i < n_pos).collect();
            assert_eq!(average_precision(&s, &y), Some(1.0), "{n_pos} positives");
        }
    }

    #[test]
    fn average_precision_treats_a_tie_group_as_one_threshold() {
        // Scores 1, 1, 0, 0 with truth +, −, +, −: group 1 (1 hit of 2) has P = 1/2, R = 1/2; group 2 brings
        // R = 1 at P = 2/4. AP = ½·½ + ½·½ = 0.5, whichever order the tied items come in (hand computed).
        let y1 = [true, false, true, false];
        let y2 = [false, true, false, true];
        let s = [1.0, 1.0, 0.0, 0.0];
        close(average_precision(&s, &y1).unwrap(), 0.5, 1e-12);
        close(average_precision(&s, &y2).unwrap(), 0.5, 1e-12);
    }

    #[test]
    fn precision_at_half_recall_hand_examples() {
        // Ranking + − + − − + (3 bugs): recall reaches ≥ 1/2 at the 3rd item (2 of 3 found): P = 2/3.
        let s = [6.0, 5.0, 4.0, 3.0, 2.0, 1.0];
        let y = [true, false, true, false, false, true];
        close(precision_at_recall(&s, &y, 0.5).unwrap(), 2.0 / 3.0, 1e-12);
        // 4 bugs ranked first: half are found after 2 items, P = 1.
        let y = [true, true, true, true, false, false];
        close(precision_at_recall(&s, &y, 0.5).unwrap(), 1.0, 1e-12);
        // A tie group of all 6 items holding the 2 bugs: P = 2/6.
        let y = [true, false, false, false, true, false];
        close(
            precision_at_recall(&[0.0; 6], &y, 0.5).unwrap(),
            2.0 / 6.0,
            1e-12,
        );
    }

    #[test]
    fn top_k_counts_only_true_bugs_in_the_top_k() {
        // 2 bugs (items 0 and 3) → k = 2. Top 2 by score: items 3 (0.9) and 1 (0.8). Item 3 is a bug and its
        // proposal (2) equals its true label (2): 1 correct of 1 bug in the top k (hand computed).
        let scores = [0.1, 0.8, 0.2, 0.9];
        let positive = [true, false, false, true];
        let proposed = [1, 0, 0, 2];
        let truth = [1, 0, 0, 2];
        let t = top_k_labels(&scores, &positive, &proposed, &truth);
        assert_eq!((t.k, t.bugs_in_top_k, t.correct_proposals), (2, 1, 1));
        assert_eq!(t.accuracy, Some(1.0));
        let wrong = [1, 0, 0, 1];
        assert_eq!(
            top_k_labels(&scores, &positive, &wrong, &truth).accuracy,
            Some(0.0)
        );
    }

    #[test]
    fn spearman_textbook_example() {
        // IQ vs hours of television for 10 people (the worked example of Spearman's ρ in Wikipedia's
        // "Spearman's rank correlation coefficient" article; values from memory): Σ d² = 194, so
        // ρ = 1 − 6·194 / (10·99) = −29/165 ≈ −0.1758 (re-derived here by the no-ties formula).
        let iq = [
            106.0, 100.0, 86.0, 101.0, 99.0, 103.0, 97.0, 113.0, 112.0, 110.0,
        ];
        let tv = [7.0, 27.0, 2.0, 50.0, 28.0, 29.0, 20.0, 12.0, 6.0, 17.0];
        let (ra, rb) = (midranks(&iq), midranks(&tv));
        let d2: f64 = ra.iter().zip(&rb).map(|(a, b)| (a - b) * (a - b)).sum();
        close(d2, 194.0, 1e-12);
        close(spearman(&iq, &tv).unwrap(), -29.0 / 165.0, 1e-12);
    }

    #[test]
    fn spearman_with_ties_and_monotone_maps() {
        // Any strictly increasing map of one side leaves ρ = 1 (definition); a constant side has no ρ.
        let a = [0.1, 0.5, 0.5, 2.0, 3.0];
        let b: Vec<f64> = a.iter().map(|v: &f64| v.exp() * 10.0).collect();
        close(spearman(&a, &b).unwrap(), 1.0, 1e-12);
        assert_eq!(spearman(&a, &[1.0; 5]), None);
        // Hand computed with ties: a ranks 1, 2.5, 2.5, 4; b ranks 1, 2, 3, 4. Centred: (−1.5, 0, 0, 1.5)
        // and (−1.5, −.5, .5, 1.5): Σ ab = 4.5, Σ a² = 4.5, Σ b² = 5 → ρ = 4.5 / √22.5 = 0.948683…
        close(
            spearman(&[1.0, 2.0, 2.0, 3.0], &[1.0, 2.0, 3.0, 4.0]).unwrap(),
            4.5 / 22.5f64.sqrt(),
            1e-12,
        );
    }

    #[test]
    fn top_k_set_breaks_ties_by_index() {
        assert_eq!(top_k_set(&[0.5, 0.9, 0.5, 0.1], 2), vec![0, 1]);
    }
}
