//! Flagged items told as stories: grouped by (given → proposed) label and checked against the trusted
//! items nearest them.
//!
//! A systematic labelling bug shows as many flagged items sharing one (given → proposed) pair — "46 items
//! labeled paper, the engine proposes cardboard" — and the trusted set says whether the proposal stands
//! on verified ground there: among the trusted items nearest the group's items (Euclidean distance in
//! standardised feature units, `z = (x − μ) / s`), how many carry the proposed label and how many the given
//! one. Many trusted items of the proposed class near the group is the trusted set vouching for the
//! proposal; trusted items of the given class near it speak for the vendor. Either way a story is a
//! suspicion for review, not proof.
//!
//! Pure: arrays in, groups out.

use ndarray::ArrayView2;
use serde::{Deserialize, Serialize};

use super::ItemScore;

/// Trusted items looked at per flagged item (its nearest ones).
pub const NEAREST_TRUSTED: usize = 3;

/// Fewest nearby trusted items of the proposed class that count as the trusted set backing a proposal.
pub const MIN_BACKING: usize = 3;

/// Flagged items that share a (given → proposed) pair.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct SuspectStory {
    /// Given label (class index).
    pub label: usize,
    /// Proposed label (class index).
    pub proposed_label: usize,
    /// Batch rows of the group's items, most suspicious first.
    pub items: Vec<usize>,
    /// Mean suspicion over the group.
    pub mean_suspicion: f64,
    /// Mean repair signal over the group (the published objective's path alone).
    pub mean_repair_signal: f64,
    /// Mean learner doubt over the group (`1 − p_ref(given)` under the reference model).
    pub mean_learner_doubt: f64,
    /// Distinct trusted items among the [`NEAREST_TRUSTED`] nearest of each of the group's items.
    pub trusted_nearby: usize,
    /// Of those, how many carry the proposed label.
    pub trusted_nearby_proposed: usize,
    /// Of those, how many carry the given label.
    pub trusted_nearby_given: usize,
}

impl SuspectStory {
    /// Whether the trusted items near the group lean to the proposed label: at least
    /// [`MIN_BACKING`] of them carry it, and strictly more than carry the given one. (The floor is common
    /// practice with no source: one or two nearby trusted items are too few to speak for a region.)
    pub fn trusted_back_the_proposal(&self) -> bool {
        self.trusted_nearby_proposed >= MIN_BACKING
            && self.trusted_nearby_proposed > self.trusted_nearby_given
    }
}

/// Group the flagged items (suspicion ≥ `flag_threshold` and a proposed label other than the given one)
/// by (given → proposed), largest group first (ties: higher mean suspicion first).
///
/// `z_trusted` and `z_batch` are the trusted and batch features standardised with one map; `y_trusted`
/// the verified labels; `items` the engine's scores (each [`ItemScore::index`] a row of `z_batch`).
/// Rows whose index is out of range are skipped, never a panic. Cost: `O(f · t · d)` for `f` flagged
/// items, `t` trusted items and `d` features.
pub fn suspect_stories(
    z_trusted: ArrayView2<'_, f64>,
    y_trusted: &[usize],
    z_batch: ArrayView2<'_, f64>,
    items: &[ItemScore],
    flag_threshold: f64,
) -> Vec<SuspectStory> {
    let mut flagged: Vec<&ItemScore> = items
        .iter()
        .filter(|s| {
            s.suspicion >= flag_threshold
                && s.proposed_label != s.label
                && s.index < z_batch.nrows()
        })
        .collect();
    flagged.sort_by(|a, b| b.suspicion.total_cmp(&a.suspicion));
    let comparable = z_trusted.ncols() == z_batch.ncols() && y_trusted.len() == z_trusted.nrows();
    // Per group: the story and the set of trusted rows seen near it.
    let mut groups: Vec<(SuspectStory, Vec<bool>)> = Vec::new();
    for s in flagged {
        let at = match groups
            .iter()
            .position(|(g, _)| g.label == s.label && g.proposed_label == s.proposed_label)
        {
            Some(k) => k,
            None => {
                groups.push((
                    SuspectStory {
                        label: s.label,
                        proposed_label: s.proposed_label,
                        items: Vec::new(),
                        mean_suspicion: 0.0,
                        mean_repair_signal: 0.0,
                        mean_learner_doubt: 0.0,
                        trusted_nearby: 0,
                        trusted_nearby_proposed: 0,
                        trusted_nearby_given: 0,
                    },
                    vec![false; z_trusted.nrows()],
                ));
                groups.len() - 1
            }
        };
        let (g, seen) = &mut groups[at];
        g.items.push(s.index);
        g.mean_suspicion += s.suspicion;
        g.mean_repair_signal += s.repair_signal;
        g.mean_learner_doubt += s.learner_doubt;
        if comparable {
            for t in nearest(z_trusted, z_batch.row(s.index), NEAREST_TRUSTED) {
                seen[t] = true;
            }
        }
    }
    let mut out: Vec<SuspectStory> = groups
        .into_iter()
        .map(|(mut g, seen)| {
            let n = g.items.len().max(1) as f64;
            g.mean_suspicion /= n;
            g.mean_repair_signal /= n;
            g.mean_learner_doubt /= n;
            for (t, _) in seen.iter().enumerate().filter(|(_, s)| **s) {
                g.trusted_nearby += 1;
                if y_trusted[t] == g.proposed_label {
                    g.trusted_nearby_proposed += 1;
                } else if y_trusted[t] == g.label {
                    g.trusted_nearby_given += 1;
                }
            }
            g
        })
        .collect();
    out.sort_by(|a, b| {
        b.items
            .len()
            .cmp(&a.items.len())
            .then(b.mean_suspicion.total_cmp(&a.mean_suspicion))
    });
    out
}

/// Rows of `z` nearest to `x` (squared Euclidean distance, ties by row), at most `k`.
fn nearest(z: ArrayView2<'_, f64>, x: ndarray::ArrayView1<'_, f64>, k: usize) -> Vec<usize> {
    let mut d: Vec<(f64, usize)> = z
        .rows()
        .into_iter()
        .enumerate()
        .map(|(t, row)| {
            let d2: f64 = row
                .iter()
                .zip(x.iter())
                .map(|(a, b)| (a - b) * (a - b))
                .sum();
            (d2, t)
        })
        .collect();
    d.sort_by(|a, b| a.0.total_cmp(&b.0).then(a.1.cmp(&b.1)));
    d.into_iter().take(k).map(|(_, t)| t).collect()
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::array;

    fn item(index: usize, label: usize, proposed: usize, suspicion: f64) -> ItemScore {
        ItemScore {
            label_fit: Default::default(),
            index,
            label,
            suspicion,
            proposed_label: proposed,
            confidence: suspicion,
            alternative_label: proposed,
            alternative_share: 1.0,
            repair_mass: 0.0,
            repair_signal: suspicion,
            repair_label: proposed,
            learner_doubt: 1.0 - suspicion,
            anchored_doubt: 0.0,
            neighbour_doubt: 0.0,
            repair_weight: 0.2,
            wrong_probability: 0.0,
            reference_margin: 0.0,
            flagged_at_step: None,
        }
    }

    /// Two trusted clusters: class 1 around x = 10, class 0 around x = 0. Three items labeled 0 sit in
    /// the class-1 cluster and the engine proposes 1 for them; one labeled 2 near x = 0 is proposed 0;
    /// one item below the threshold and one with its label kept stay out.
    #[test]
    fn flagged_items_group_by_pair_and_count_the_trusted_items_near_them() {
        let zt = array![[0.0], [0.5], [-0.5], [10.0], [10.5], [9.5], [11.0]];
        let yt = [0, 0, 0, 1, 1, 1, 1];
        let zb = array![[10.1], [9.9], [10.4], [0.2], [10.0], [0.0]];
        let items = vec![
            item(0, 0, 1, 0.9),
            item(1, 0, 1, 0.7),
            item(2, 0, 1, 0.8),
            item(3, 2, 0, 0.6),
            item(4, 0, 1, 0.4), // below the threshold
            item(5, 0, 0, 0.9), // label kept
        ];
        let s = suspect_stories(zt.view(), &yt, zb.view(), &items, 0.5);
        assert_eq!(s.len(), 2, "{s:?}");
        assert_eq!((s[0].label, s[0].proposed_label), (0, 1));
        // Most suspicious first within the group.
        assert_eq!(s[0].items, vec![0, 2, 1]);
        assert!((s[0].mean_suspicion - 0.8).abs() < 1e-12);
        // The three nearest trusted items of 10.1, 9.9 and 10.4 are all class 1: rows 3, 4, 5 and 6.
        assert_eq!(s[0].trusted_nearby, 4);
        assert_eq!(s[0].trusted_nearby_proposed, 4);
        assert_eq!(s[0].trusted_nearby_given, 0);
        assert!(s[0].trusted_back_the_proposal());
        // Item 3 (given 2, proposed 0) near x = 0: three class-0 trusted items back the proposal; none
        // carries the given label.
        assert_eq!(
            (s[1].label, s[1].proposed_label, s[1].items.len()),
            (2, 0, 1)
        );
        assert_eq!(
            (s[1].trusted_nearby_proposed, s[1].trusted_nearby_given),
            (3, 0)
        );
    }

    /// Where the trusted items near a group carry the given label, the story says so: the trusted set
    /// speaks for the vendor there.
    #[test]
    fn trusted_items_of_the_given_class_speak_for_the_vendor() {
        let zt = array![[0.0, 0.0], [0.1, 0.0], [0.0, 0.1], [5.0, 5.0]];
        let yt = [0, 0, 0, 1];
        let zb = array![[0.05, 0.05]];
        let s = suspect_stories(zt.view(), &yt, zb.view(), &[item(0, 0, 1, 0.9)], 0.5);
        assert_eq!(
            (s[0].trusted_nearby_given, s[0].trusted_nearby_proposed),
            (3, 0)
        );
        assert!(!s[0].trusted_back_the_proposal());
    }

    /// Mismatched shapes and out-of-range rows are skipped, never a panic: the groups still form, with
    /// no trusted items counted.
    #[test]
    fn mismatched_shapes_do_not_panic() {
        let zt = array![[0.0, 1.0]];
        let zb = array![[0.0]];
        let items = vec![item(0, 0, 1, 0.9), item(7, 0, 1, 0.9)];
        let s = suspect_stories(zt.view(), &[0], zb.view(), &items, 0.5);
        assert_eq!(s.len(), 1);
        assert_eq!(s[0].items, vec![0]);
        assert_eq!(s[0].trusted_nearby, 0);
    }

    /// Two nearby trusted items of the proposed class are too few to back a proposal ([`MIN_BACKING`]).
    #[test]
    fn two_nearby_trusted_items_do_not_back_a_proposal() {
        let zt = array![[0.0], [0.1], [9.0]];
        let yt = [1, 1, 0];
        let zb = array![[0.05]];
        let s = suspect_stories(zt.view(), &yt, zb.view(), &[item(0, 0, 1, 0.9)], 0.5);
        assert_eq!(
            (s[0].trusted_nearby_proposed, s[0].trusted_nearby_given),
            (2, 1)
        );
        assert!(!s[0].trusted_back_the_proposal());
    }
}
