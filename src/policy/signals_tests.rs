//! Tests of how a batch's signals are read off an engine assessment and narrowed by the shift check
//! (written for the mutation run of `mod.rs`: the policy's own tests built `BatchSignals` by hand, so no
//! library test under `policy` reached `from_assessment` or `with_shift`).

use super::*;
use crate::model::{Assessment, ItemScore, LabelFit};

fn fit(loglik: f64, expected: f64, variance: f64) -> LabelFit {
    LabelFit {
        loglik,
        expected,
        variance,
    }
}

fn item(index: usize, label: usize, suspicion: f64, label_fit: LabelFit) -> ItemScore {
    ItemScore {
        label_fit,
        index,
        label,
        suspicion,
        proposed_label: label,
        confidence: suspicion,
        alternative_label: label,
        alternative_share: 0.0,
        repair_mass: 0.0,
        repair_signal: suspicion,
        repair_label: label,
        learner_doubt: suspicion,
        anchored_doubt: 0.0,
        neighbour_doubt: 0.0,
        repair_weight: 0.2,
        wrong_probability: suspicion,
        reference_margin: 0.0,
        flagged_at_step: None,
    }
}

/// Six items, threshold 0.5: items 0, 2 (exactly at the threshold: a flag), 4 and 5 are flagged (four
/// against two, so a flipped comparison shows); item 5's label has no per-label expectation (it is counted
/// in the totals only).
fn assessment() -> Assessment {
    Assessment {
        items: vec![
            item(0, 0, 0.9, fit(-1.0, -0.5, 0.1)),
            item(1, 0, 0.2, fit(-0.2, -0.3, 0.05)),
            item(2, 1, 0.5, fit(-0.7, -0.6, 0.2)),
            item(3, 1, 0.1, fit(-0.1, -0.2, 0.01)),
            item(4, 2, 0.7, fit(-2.0, -0.4, 0.3)),
            item(5, 5, 0.8, fit(-0.3, -0.3, 0.02)),
        ],
        expected_flagged_by_label: vec![0.4, 0.3, 0.2],
        ..Assessment::default()
    }
}

/// Worked by hand: 4 of 6 flagged, mean suspicion 3.2 / 6, per label (items, flagged) = (2, 1), (2, 1),
/// (1, 1) with the engine's expectations, and the label fit the sum over all six items.
#[test]
fn signals_count_flags_in_total_and_per_label_as_worked_by_hand() {
    let s = BatchSignals::from_assessment(&assessment(), 0.5);
    assert_eq!(s.items, 6);
    assert!((s.flagged_share - 4.0 / 6.0).abs() < 1e-12);
    assert!(
        (s.mean_suspicion - 3.2 / 6.0).abs() < 1e-12,
        "{}",
        s.mean_suspicion
    );
    let tallies: Vec<(usize, u64, u64, f64)> = s
        .labels
        .iter()
        .map(|l| (l.class, l.items, l.flagged, l.expected))
        .collect();
    assert_eq!(
        tallies,
        vec![(0, 2, 1, 0.4), (1, 2, 1, 0.3), (2, 1, 1, 0.2)]
    );
    assert!((s.label_fit.loglik - -4.3).abs() < 1e-12);
    assert!((s.label_fit.expected - -2.3).abs() < 1e-12);
    assert!((s.label_fit.variance - 0.68).abs() < 1e-12);
    // An empty batch has no shares (the policy reads NaN as an invalid score). With no items, `n > 0`
    // and `n ≥ 0` give the same NaN (`0/0`), so that mutant of the guard is equivalent.
    let empty = BatchSignals::from_assessment(&Assessment::default(), 0.5);
    assert!(empty.flagged_share.is_nan() && empty.mean_suspicion.is_nan());
}

/// Items 4 and 5 (both flagged) lie beyond the trusted set's reach: two unlike flags; the per-label
/// expectations scale by the judged share 4/6; the two items leave the tallies (item 5's label has none)
/// and the fit.
#[test]
fn the_shift_check_takes_the_items_beyond_reach_out_of_the_label_tallies() {
    let a = assessment();
    let report = ShiftReport {
        beyond: vec![false, false, false, false, true, true],
        unlike_items: 2,
        tail: 0.03,
    };
    let s = BatchSignals::from_assessment(&a, 0.5).with_shift(&a, 0.5, &report);
    assert_eq!(
        (s.unlike_items, s.unlike_flagged, s.unlike_tail),
        (2, 2, 0.03)
    );
    assert_eq!((s.judged_items(), s.judged_flagged()), (4, 2));
    let tallies: Vec<(u64, u64)> = s.labels.iter().map(|l| (l.items, l.flagged)).collect();
    assert_eq!(tallies, vec![(2, 1), (2, 1), (0, 0)]);
    for (l, e) in s.labels.iter().zip([0.4, 0.3, 0.2]) {
        assert!((l.expected - e * 4.0 / 6.0).abs() < 1e-12, "{l:?}");
    }
    assert!((s.label_fit.loglik - -2.0).abs() < 1e-12);
    assert!((s.label_fit.expected - -1.6).abs() < 1e-12);
    assert!((s.label_fit.variance - 0.36).abs() < 1e-12);
    // An empty batch keeps nothing to judge: its expectations become 0, not NaN.
    let empty = Assessment {
        expected_flagged_by_label: vec![0.4],
        ..Assessment::default()
    };
    let none = ShiftReport {
        beyond: Vec::new(),
        unlike_items: 0,
        tail: 0.0,
    };
    let s = BatchSignals::from_assessment(&empty, 0.5).with_shift(&empty, 0.5, &none);
    assert_eq!(s.labels[0].expected, 0.0);
}

/// A record written before the clean level's sharpness existed reads it as 1 (the model taken as it is).
#[test]
fn signals_saved_without_the_sharpness_read_it_as_one() {
    let s = BatchSignals::from_assessment(&assessment(), 0.5);
    let mut v = serde_json::to_value(&s).expect("signals serialise");
    v.as_object_mut()
        .expect("an object")
        .remove("clean_level_sharpness");
    let back: BatchSignals = serde_json::from_value(v).expect("signals deserialise");
    assert_eq!(back.clean_level_sharpness, 1.0);
}

/// The clean level the item rules start from: the computed share where it is a positive finite number
/// (capped at 1), `clean_level_unknown` otherwise — a share of exactly 0 means "not computed" (records
/// from before the engine computed it). Written for the mutation run of `mod.rs` (`>` → `>=` and `&&` →
/// `||` in `clean_level` survived: no test gave it 0 or an infinite share).
#[test]
fn the_clean_level_is_the_computed_share_only_where_it_is_positive_and_finite() {
    let s = PolicySettings::default();
    let with = |c: f64| BatchSignals {
        clean_flagged_share: c,
        ..BatchSignals::invalid()
    };
    assert_eq!(with(0.3).clean_level(&s), 0.3);
    assert_eq!(with(1.5).clean_level(&s), 1.0);
    for c in [0.0, -0.1, f64::INFINITY, f64::NAN] {
        assert_eq!(with(c).clean_level(&s), s.clean_level_unknown, "{c}");
    }
}

/// `separates_poorly` is strict: a batch whose right labels would flag exactly `cold_start_weak_model_share`
/// is not a weak-model batch, the next representable share above it is (mutation run of `mod.rs`: `>` →
/// `>=` survived).
#[test]
fn a_weak_model_is_one_strictly_above_the_share() {
    let s = PolicySettings::default();
    let with = |e: f64| BatchSignals {
        expected_flagged_share: e,
        ..BatchSignals::invalid()
    };
    let limit = s.cold_start_weak_model_share;
    assert!(!with(limit).separates_poorly(&s));
    assert!(with(f64::from_bits(limit.to_bits() + 1)).separates_poorly(&s));
}
