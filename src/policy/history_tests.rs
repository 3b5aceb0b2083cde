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

/// A reviewer's reset lets the values held aside join the baselines, each kept to `history_window`: 8
/// kept and 5 aside in a window of 10 leave the newest ten, the five aside last; every statistic is back
/// at 0. Written for the mutation run of `mod.rs` (`>` → `==` / `>=` in `reset_cusum`'s trim survived:
/// no test reset a record with more values than its window).
#[test]
fn a_reset_lets_the_held_aside_values_in_within_the_window() {
    let s = PolicySettings {
        history_window: 10,
        ..batch_rules()
    };
    let mut h = VendorHistory::default();
    h.accepted_costs.extend((0..8).map(f64::from));
    h.pending_costs.extend((8..13).map(f64::from));
    h.flagged_share
        .accepted
        .extend((0..8).map(|i| f64::from(i) / 100.0));
    h.flagged_share
        .pending
        .extend((8..13).map(|i| f64::from(i) / 100.0));
    (h.cusum, h.flagged_share.cusum) = (3.0, 2.0);
    (h.evidence.cusum, h.evidence.fit_cusum) = (1.0, 4.0);
    h.reset_cusum(&s);
    let costs: Vec<f64> = h.accepted_costs.iter().copied().collect();
    assert_eq!(costs, (3..13).map(f64::from).collect::<Vec<_>>());
    let shares: Vec<f64> = h.flagged_share.accepted.iter().copied().collect();
    assert_eq!(
        shares,
        (3..13).map(|i| f64::from(i) / 100.0).collect::<Vec<_>>()
    );
    assert!(h.pending_costs.is_empty() && h.flagged_share.pending.is_empty());
    assert_eq!(
        (
            h.cusum,
            h.flagged_share.cusum,
            h.evidence.cusum,
            h.evidence.fit_cusum
        ),
        (0.0, 0.0, 0.0, 0.0)
    );
}

/// The names the notices, audit trail and metrics carry, and which reasons are label findings and
/// stream rules (a recall follows a hold by a stream rule only). Written for the mutation run of
/// `mod.rs` (`Verdict::as_str` returning "" or "xyzzy", `is_label_finding` and `is_stream_rule`
/// returning a constant, and `Display` writing nothing survived the policy's tests).
#[test]
fn verdict_names_and_the_kinds_of_reason_are_the_documented_ones() {
    for (v, name) in [
        (Verdict::Accept, "accept"),
        (Verdict::Quarantine, "quarantine"),
    ] {
        assert_eq!(v.as_str(), name);
        assert_eq!(
            serde_json::to_value(v).unwrap(),
            name,
            "serialised as named"
        );
    }
    // Displayed as serialised (the audit trail's reason and the metric labels use the display form).
    for c in ReasonCode::ALL {
        assert_eq!(c.to_string(), c.as_str());
        assert_eq!(serde_json::to_value(c).unwrap(), c.as_str());
    }
    let not_labels: Vec<ReasonCode> = ReasonCode::ALL
        .into_iter()
        .filter(|c| !c.is_label_finding())
        .collect();
    assert_eq!(
        not_labels,
        [
            ReasonCode::WithinBaseline,
            ReasonCode::WithinColdStartLimits,
            ReasonCode::ScoreInvalid,
            ReasonCode::ItemsUnlikePool
        ]
    );
    let stream: Vec<ReasonCode> = ReasonCode::ALL
        .into_iter()
        .filter(|c| c.is_stream_rule())
        .collect();
    assert_eq!(
        stream,
        [ReasonCode::FlaggedItemsDrift, ReasonCode::LabelsUnlikely]
    );
}

/// The flagged share's scale floor is the binomial standard error `√(m(1 − m)/n)` of a batch of `n`
/// items where that exceeds the configured floor, and the configured floor for a batch with no items
/// (no binomial term: `n = 0` would make it infinite). Worked by hand: median 0.1 over identical shares
/// (MAD and mean deviation 0), `n` = 100 → `√(0.09/100)` = 0.03 > 0.01; `n` = 10,000 → 0.003 < 0.01.
/// Written for the mutation run of `mod.rs` (the guard `items > 0` replaced by `true` or `>=` survived).
#[test]
fn the_share_floor_is_the_binomial_error_of_the_batch_or_the_configured_floor() {
    let s = batch_rules();
    let mut h = VendorHistory::default();
    h.flagged_share.accepted.extend([0.1; 8]);
    let b = |items| Baseline::flagged_share(&s, &h, 0.2, items);
    let small = b(100);
    assert_eq!(small.scale_source, ScaleSource::BinomialStandardError);
    assert_relative_eq!(small.sigma, 0.03, epsilon = 1e-12);
    let large = b(10_000);
    assert_eq!(large.scale_source, ScaleSource::Floor);
    assert_relative_eq!(large.sigma, s.flagged_share_min_scale);
    let empty = b(0);
    assert_eq!(empty.scale_source, ScaleSource::Floor);
    assert_relative_eq!(empty.sigma, s.flagged_share_min_scale);
    assert_relative_eq!(empty.standardized, (0.2 - 0.1) / s.flagged_share_min_scale);
}

/// Where most of a vendor's values are equal the MAD is 0, and the scale falls back to the mean absolute
/// deviation (`1.253314 · mean |x − m|`, the normal consistency factor √(π/2)) before the floor. Worked
/// by hand: shares [0.1 ×5, 0.5, 0.6, 0.9] have median 0.1, deviations [0 ×5, 0.4, 0.5, 0.8], MAD 0 and
/// mean absolute deviation 1.7/8 = 0.2125, so σ̂ = 0.26633 (above the floor 0.01). Written for the
/// mutation run of `mod.rs` (`mad > 0` → `>=` and `mean_abs_dev > 0` → `==` / `<` in `Baseline::of`
/// survived).
#[test]
fn mostly_equal_values_are_scaled_by_their_mean_absolute_deviation() {
    let s = batch_rules();
    let mut h = VendorHistory::default();
    h.flagged_share
        .accepted
        .extend([0.1, 0.1, 0.1, 0.1, 0.1, 0.5, 0.6, 0.9]);
    let b = Baseline::flagged_share(&s, &h, 0.2, 10_000);
    assert_eq!((b.median, b.mad), (0.1, 0.0));
    assert_relative_eq!(b.mean_abs_dev, 0.2125, epsilon = 1e-12);
    assert_eq!(b.scale_source, ScaleSource::MeanAbsoluteDeviation);
    assert_relative_eq!(b.sigma, 1.253314 * 0.2125, epsilon = 1e-5);
    assert_relative_eq!(b.standardized, 0.1 / b.sigma, epsilon = 1e-12);
}

/// While a vendor is in cold start its baseline reports no modified z, standardised value or CUSUM (the
/// absolute limits judge it), and a value that is not a finite number gets none either. Written for the
/// mutation run of `mod.rs` (`cold_start || !x.is_finite()` → `&&` in `Baseline::of` survived: the
/// decisions do not read those numbers in cold start, but the decision record and `quarantine show` do).
#[test]
fn a_cold_start_or_non_finite_value_reports_no_z_and_no_cusum() {
    let s = batch_rules();
    let mut h = VendorHistory::default();
    h.accepted_costs.extend([0.01, 0.02]);
    h.cusum = 1.5;
    let cold = Baseline::compute(&s, &h, 0.5);
    assert!(cold.cold_start);
    assert_eq!(
        (
            cold.modified_z,
            cold.standardized,
            cold.cusum_before,
            cold.cusum
        ),
        (0.0, 0.0, 0.0, 0.0)
    );
    h.accepted_costs
        .extend([0.01, 0.02, 0.01, 0.02, 0.01, 0.02]);
    let warm = Baseline::compute(&s, &h, f64::NAN);
    assert!(!warm.cold_start);
    assert_eq!(
        (warm.modified_z, warm.standardized, warm.cusum),
        (0.0, 0.0, 0.0)
    );
    let judged = Baseline::compute(&s, &h, 0.5);
    assert!(judged.modified_z > 0.0 && judged.cusum > 0.0, "{judged:?}");
}
