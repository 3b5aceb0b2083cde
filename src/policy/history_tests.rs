//! Tests of a vendor's record at its edges: leaving cold start, the held-aside values and the baselines
//! kept to their window, released batches (written for the mutation run of `mod.rs`: the policy tests
//! asked far from these edges).

use approx::assert_relative_eq;

use super::tests::{batch_rules, cost_only, share};
use super::*;

/// Leaving cold start at exactly `min_history` values: the next value is judged against the baseline
/// (its CUSUM step is taken and it waits aside while the statistic is above 0) rather than joining the
/// baseline unjudged; with a one-value cold start the head start is set by that one value. Written for the
/// mutation run of `mod.rs` (`<` → `<=` and `>=` → `<` at the cold-start edge of `record_value` survived:
/// the head-start test above leaves cold start with `min_history` = 8, where the second mutant happens to
/// end with the same statistic).
#[test]
fn the_value_after_cold_start_is_judged_and_a_one_value_cold_start_gets_its_head_start() {
    let s = batch_rules();
    let mut h = VendorHistory::default();
    for _ in 0..s.min_history {
        h.record_accepted(&s, &cost_only(0.0));
    }
    assert_eq!((h.accepted_costs.len(), h.cusum), (s.min_history, 0.0));
    h.record_accepted(&s, &cost_only(0.5));
    assert!(h.cusum > 0.0, "{h:?}");
    assert_eq!(
        (h.accepted_costs.len(), h.pending_costs.len()),
        (s.min_history, 1)
    );
    let one = PolicySettings {
        min_history: 1,
        cusum_head_start: true,
        ..batch_rules()
    };
    let mut h = VendorHistory::default();
    h.record_accepted(&one, &cost_only(0.0));
    assert_relative_eq!(h.cusum, one.cusum_h / 2.0);
}

/// The values held aside during a CUSUM excursion and the baseline they join afterwards both stay within
/// `history_window`: twelve values that climb the statistic leave ten aside, and when it returns to 0
/// the baseline keeps its newest ten. Written for the mutation run of `mod.rs` (`>` → `==` / `>=` in
/// `record_value`'s two trims survived: no test held more values aside than the window).
#[test]
fn the_held_aside_values_and_the_baseline_stay_within_the_window() {
    let s = PolicySettings {
        history_window: 10,
        ..batch_rules()
    };
    let mut h = VendorHistory::default();
    for _ in 0..s.min_history {
        h.record_accepted(&s, &cost_only(0.0));
    }
    for _ in 0..12 {
        h.record_accepted(&s, &cost_only(0.006));
    }
    assert!(h.cusum > 0.0, "{h:?}");
    assert_eq!(
        (h.accepted_costs.len(), h.pending_costs.len()),
        (s.min_history, 10)
    );
    let mut zeros = 0;
    while h.cusum > 0.0 {
        h.record_accepted(&s, &cost_only(0.0));
        zeros += 1;
        assert!(zeros < 100, "{h:?}");
    }
    assert_eq!((h.accepted_costs.len(), h.pending_costs.len()), (10, 0));
}

/// Released batches join both baselines directly, each kept to `history_window` values: five releases
/// into a three-value window leave the newest three of each. Written for the mutation run of `mod.rs`
/// (`>` → `==` in `record_released`'s flagged-share trim survived: no test released more batches than
/// the window holds).
#[test]
fn released_batches_keep_both_baselines_within_the_window() {
    let s = PolicySettings {
        history_window: 3,
        ..batch_rules()
    };
    let mut h = VendorHistory::default();
    for i in 0..5 {
        h.record_released(&s, &share(f64::from(i) / 100.0, 1_000));
    }
    assert_eq!(h.accepted_total, 5);
    assert_eq!(h.accepted_costs.len(), 3);
    let kept: Vec<f64> = h.flagged_share.accepted.iter().copied().collect();
    assert_eq!(kept, [0.02, 0.03, 0.04]);
}

/// A vendor is in cold start, per signal, until it has `min_history` accepted values: one short of it
/// it is, at it it is not. Written for the mutation run of `mod.rs` (`is_cold` returning false, `<` →
/// `==` / `<=` in both survived: the tests only asked after far more, or far fewer, batches).
#[test]
fn cold_start_ends_exactly_at_min_history_for_each_signal() {
    let s = batch_rules();
    let mut h = VendorHistory::default();
    assert!(h.is_cold(&s) && h.flagged_share_is_cold(&s));
    for _ in 0..s.min_history - 1 {
        h.record_accepted(&s, &share(0.05, 1_000));
    }
    assert!(h.is_cold(&s) && h.flagged_share_is_cold(&s));
    h.record_accepted(&s, &share(0.05, 1_000));
    assert!(!h.is_cold(&s) && !h.flagged_share_is_cold(&s));
}
