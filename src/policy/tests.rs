//! The policy's unit tests: the published constants and worked examples, then each rule.
use super::*;
use approx::assert_relative_eq;

/// The settings these tests were written for: the per-batch flagged-share rules (`judge_items = false`);
/// the item rules have their own tests in `evidence_tests.rs`.
pub(super) fn batch_rules() -> PolicySettings {
    PolicySettings {
        judge_items: false,
        ..PolicySettings::default()
    }
}

/// Signals of a batch of 1,000 items with this repair cost, no damage and a usual flagged share.
pub(super) fn cost_only(cost: f64) -> BatchSignals {
    BatchSignals {
        repair_cost: cost,
        damage: 0.0,
        flagged_share: 0.07,
        mean_suspicion: 0.15,
        items: 1000,
        pool_items: 100_000,
        expected_flagged_share: 0.0,
        expected_flagged_sd: 0.0,
        expected_damage: 0.0,
        expected_damage_sd: 0.0,
        ..BatchSignals::invalid()
    }
}

/// Signals of a clean-looking batch (no repair, no damage) of `items` items with this flagged share.
pub(super) fn share(flagged_share: f64, items: usize) -> BatchSignals {
    BatchSignals {
        repair_cost: 0.0,
        damage: 0.0,
        flagged_share,
        mean_suspicion: 0.15,
        items,
        pool_items: 100_000,
        expected_flagged_share: 0.0,
        expected_flagged_sd: 0.0,
        expected_damage: 0.0,
        expected_damage_sd: 0.0,
        ..BatchSignals::invalid()
    }
}

/// A vendor whose accepted batches had these flagged shares (1,000 items each, no repair), every value
/// in the baseline.
fn share_history(shares: &[f64]) -> VendorHistory {
    let s = batch_rules();
    let mut h = VendorHistory::default();
    for &f in shares {
        h.record_accepted(&s, &share(f, 1000));
        h.reset_cusum(&s);
    }
    h
}

fn codes(d: &Decision) -> Vec<ReasonCode> {
    d.reasons.iter().map(|r| r.code).collect()
}

fn history(costs: &[f64]) -> VendorHistory {
    let s = batch_rules();
    let mut h = VendorHistory::default();
    for &c in costs {
        h.record_accepted(&s, &cost_only(c));
        h.reset_cusum(&s); // every cost joins the baseline
    }
    h
}

#[test]
fn mad_constant_matches_the_published_value() {
    // 1/Φ⁻¹(0.75) = 1.4826022 (standard; e.g. Rousseeuw & Croux 1993), tests/reference/check-values.md §1.2.
    assert_relative_eq!(MAD_CONSISTENCY, 1.482_602_2, epsilon = 1e-7);
    // Iglewicz & Hoaglin's 0.6745 is that quantile rounded to four places.
    assert_relative_eq!(1.0 / MAD_CONSISTENCY, MODIFIED_Z_FACTOR, epsilon = 5e-5);
}

#[test]
fn modified_z_first_worked_example() {
    // Iglewicz & Hoaglin (1993) formula; worked values from tests/reference/check-values.md §1.2 ("computed"):
    // data 10, 11, 12, 12, 13, 14, 35: median 12; |x − 12| = 2,1,0,0,1,2,23 → sorted 0,0,1,1,2,2,23,
    // MAD = 1; M(35) = 0.6745·23 = 15.5135, M(14) = 0.6745·2 = 1.349.
    let data = [10.0, 11.0, 12.0, 12.0, 13.0, 14.0, 35.0];
    assert_relative_eq!(median(&data), 12.0);
    let m = modified_z_scores(&data).expect("MAD > 0");
    assert_relative_eq!(m[6], 15.51, epsilon = 0.005);
    assert_relative_eq!(m[5], 1.35, epsilon = 0.005);
    assert!(m[6] > 3.5 && m[5] < 3.5, "only 35 is an outlier at 3.5");
}

#[test]
fn modified_z_second_worked_example() {
    // tests/reference/check-values.md §1.2 ("computed" from Iglewicz & Hoaglin's formula): data 10, 12, 12, 13,
    // 12, 11, 14, 300: median (12+12)/2 = 12, deviations sorted 0,0,0,1,1,2,2,288 → MAD 1;
    // M(300) = 0.6745·288 = 194.2560, M(10) = −1.3490.
    let data = [10.0, 12.0, 12.0, 13.0, 12.0, 11.0, 14.0, 300.0];
    let m = modified_z_scores(&data).expect("MAD > 0");
    assert_relative_eq!(m[7], 194.2560, epsilon = 1e-4);
    assert_relative_eq!(m[0], -1.3490, epsilon = 1e-4);
}

#[test]
fn mad_zero_falls_back_to_mean_absolute_deviation() {
    // Common practice (statistics software documentation; tests/reference/check-values.md §1.2): when MAD = 0 use
    // (x − median)/(1.253314 · meanAD). Data 5,5,5,5,9: median 5, MAD 0, meanAD = 4/5 = 0.8,
    // so M(9) = 4/(1.253314·0.8) = 3.98942.
    let data = [5.0, 5.0, 5.0, 5.0, 9.0];
    let m = modified_z_scores(&data).expect("meanAD > 0");
    assert_relative_eq!(m[4], 4.0 / (1.253314 * 0.8), epsilon = 1e-9);
    assert_relative_eq!(m[4], 3.98942, epsilon = 1e-5);
    assert!(modified_z_scores(&[2.0, 2.0, 2.0]).is_none());
}

#[test]
fn cusum_recursion_on_a_hand_worked_sequence() {
    // Montgomery & Runger's tabular CUSUM s_H(i) = max[0, x_i − (μ0 + K) + s_H(i−1)] with μ0 = 0,
    // K = 0.5 (tests/reference/check-values.md §1.1). Worked by hand:
    //   x:   0.2   1.1   1.6   0.3   2.0   −1.0  −2.0  3.0
    //   S:   0     0.6   1.7   1.5   3.0   1.5   0     2.5
    let xs = [0.2, 1.1, 1.6, 0.3, 2.0, -1.0, -2.0, 3.0];
    let expected = [0.0, 0.6, 1.7, 1.5, 3.0, 1.5, 0.0, 2.5];
    let mut s = 0.0;
    for (x, e) in xs.iter().zip(expected) {
        s = cusum_step(s, *x, 0.5);
        assert_relative_eq!(s, e, epsilon = 1e-12);
    }
}

#[test]
fn cold_start_uses_absolute_limits() {
    let s = batch_rules();
    let h = VendorHistory::default();
    let ok = decide(&s, &h, 0.01, 0.0);
    assert_eq!(ok.verdict, Verdict::Accept);
    assert!(ok.baseline.cold_start);
    assert_eq!(ok.reasons[0].code, ReasonCode::WithinColdStartLimits);
    let hi = decide(&s, &h, 0.06, 0.0);
    assert_eq!(hi.verdict, Verdict::Quarantine);
    assert_eq!(hi.reasons[0].code, ReasonCode::ColdStartRepairCost);
    let dmg = decide(&s, &h, 0.0, 0.06);
    assert_eq!(dmg.verdict, Verdict::Quarantine);
    assert_eq!(dmg.reasons[0].code, ReasonCode::ColdStartDamage);
}

#[test]
fn ceiling_applies_even_with_a_high_baseline() {
    let s = batch_rules();
    // A vendor whose accepted costs were all around 0.18 (allowed under the ceiling of 0.2).
    let h = history(&[0.18, 0.17, 0.19, 0.18, 0.18, 0.17, 0.19, 0.18, 0.18, 0.19]);
    assert!(!h.is_cold(&s));
    let d = decide(&s, &h, 0.21, 0.0);
    assert_eq!(d.verdict, Verdict::Quarantine);
    assert!(d
        .reasons
        .iter()
        .any(|r| r.code == ReasonCode::RepairCostCeiling));
    let d = decide(&s, &h, 0.18, 0.3);
    assert!(d
        .reasons
        .iter()
        .any(|r| r.code == ReasonCode::DamageCeiling));
}

#[test]
fn outlier_against_the_vendor_baseline() {
    let s = batch_rules();
    // Median 0.03, deviations 0.01,0,0.01,0,0.01,0,0.01,0,0 → MAD 0 → meanAD = 0.04/9 = 0.00444,
    // scale 1.253314·0.00444 = 0.00557 < floor 0.01, so σ̂ = 0.01 and M(0.08) = (0.08 − 0.03)/0.01 = 5 > 3.5.
    let h = history(&[0.02, 0.03, 0.04, 0.03, 0.02, 0.03, 0.04, 0.03, 0.03]);
    let d = decide(&s, &h, 0.08, 0.0);
    assert_eq!(d.baseline.scale_source, ScaleSource::Floor);
    assert_relative_eq!(d.baseline.modified_z, 5.0, epsilon = 1e-9);
    assert_eq!(d.verdict, Verdict::Quarantine);
    assert_eq!(d.reasons[0].code, ReasonCode::RepairCostOutlier);
    // Lower than usual is never suspicious.
    assert_eq!(decide(&s, &h, 0.0, 0.0).verdict, Verdict::Accept);
    // Within: 0.05 → M = 2.
    let d = decide(&s, &h, 0.05, 0.0);
    assert_eq!(d.verdict, Verdict::Accept);
    assert_eq!(d.reasons[0].code, ReasonCode::WithinBaseline);
}

#[test]
fn all_zero_history_uses_the_floor() {
    let s = batch_rules();
    let h = history(&[0.0; 10]);
    let d = decide(&s, &h, 0.001, 0.0);
    assert_eq!(
        d.verdict,
        Verdict::Accept,
        "rounding noise is not an outlier"
    );
    let d = decide(&s, &h, 0.04, 0.0);
    assert_eq!(
        d.verdict,
        Verdict::Quarantine,
        "4 floor units above a zero baseline"
    );
}

#[test]
fn slow_drift_trips_the_cusum_before_any_single_outlier() {
    let s = batch_rules();
    // Baseline: costs alternating 0.00/0.02 → median 0.01, MAD 0.01, σ̂ = 0.0148, modified z scale
    // 0.01/0.6745 = 0.01483.
    let mut h = history(&[0.0, 0.02, 0.0, 0.02, 0.0, 0.02, 0.0, 0.02, 0.0, 0.02]);
    // A drip of costs 0.03 each: z = (0.03 − 0.01)/0.014826 = 1.349 per batch (modified z 1.349 < 3.5),
    // so S grows by 0.849 per batch: 0.85, 1.70, 2.55, 3.40, 4.25, 5.09 → the 6th (index 5) signals.
    // The drip's costs are held aside while S > 0, so the median stays at 0.01.
    let mut alarm_at = None;
    for i in 0..20 {
        let d = decide(&s, &h, 0.03, 0.0);
        assert!(d.baseline.modified_z < s.modified_z_limit);
        if d.verdict == Verdict::Quarantine {
            assert_eq!(d.reasons[0].code, ReasonCode::RepairCostDrift);
            alarm_at = Some(i);
            break;
        }
        h.record_accepted(&s, &cost_only(0.03));
    }
    assert_eq!(alarm_at, Some(5));
    assert_eq!(h.pending_costs.len(), 5);
    assert_relative_eq!(decide(&s, &h, 0.03, 0.0).baseline.median, 0.01);
    // A reviewer accepts the new level: the held costs join the baseline and the alarm clears.
    h.reset_cusum(&s);
    assert!(h.pending_costs.is_empty());
    assert_eq!(h.accepted_costs.len(), 15);
    assert_eq!(decide(&s, &h, 0.03, 0.0).verdict, Verdict::Accept);
}

#[test]
fn quarantined_batches_do_not_move_the_baseline() {
    let s = batch_rules();
    let h = history(&[0.01; 10]);
    let d = decide(&s, &h, 0.5, 0.0);
    assert_eq!(d.verdict, Verdict::Quarantine);
    // The batch is judged against the ten accepted costs only, its own cost not among them; the history
    // grows only through `record_accepted` (the daemon's verdict step calls it for accepted batches).
    assert_eq!(d.baseline.n_history, 10);
    assert_eq!(d.baseline.median, 0.01);
    let next = decide(&s, &h, 0.011, 0.0);
    assert_eq!(next.verdict, Verdict::Accept);
    assert_eq!(next.baseline.median, 0.01);
}

#[test]
fn history_window_rolls() {
    let s = PolicySettings {
        history_window: 10,
        ..batch_rules()
    };
    let mut h = VendorHistory::default();
    for i in 0..25 {
        // Alternate 0.01 and 0.02: never far above the median, so nothing is held aside for long.
        h.record_accepted(&s, &cost_only(if i % 2 == 0 { 0.01 } else { 0.02 }));
        h.reset_cusum(&s);
    }
    assert_eq!(h.accepted_costs.len(), 10);
    assert_eq!(h.accepted_total, 25);
    assert!(h.pending_costs.is_empty());
}

#[test]
fn head_start_applies_when_leaving_cold_start() {
    let s = PolicySettings {
        cusum_head_start: true,
        ..batch_rules()
    };
    let mut h = VendorHistory::default();
    for _ in 0..s.min_history {
        h.record_accepted(&s, &cost_only(0.0));
    }
    // Lucas & Crosier (Technometrics 1982) fast initial response: S_0 = h/2.
    assert_relative_eq!(h.cusum, 2.5);
}

#[test]
fn invalid_scores_quarantine() {
    let s = batch_rules();
    let d = decide(&s, &VendorHistory::default(), f64::NAN, 0.0);
    assert_eq!(d.verdict, Verdict::Quarantine);
    assert_eq!(d.reasons[0].code, ReasonCode::ScoreInvalid);
}

#[test]
fn settings_validate_and_reject_nonsense() {
    assert!(batch_rules().validate().is_ok());
    let bad = PolicySettings {
        max_repair_cost: 1.5,
        ..batch_rules()
    };
    assert!(bad.validate().is_err());
    let bad = PolicySettings {
        cusum_h: 0.0,
        ..batch_rules()
    };
    assert!(bad.validate().is_err());
    let parsed: Result<PolicySettings, _> = toml::from_str("no_such_key = 1");
    assert!(parsed.is_err(), "unknown keys are rejected");
}

#[test]
fn reason_codes_serialise_to_their_stable_names() {
    for c in ReasonCode::ALL {
        assert_eq!(serde_json::to_value(c).unwrap(), c.as_str());
    }
}

#[test]
fn cold_start_judges_the_flagged_share() {
    let s = batch_rules();
    let h = VendorHistory::default();
    // 27 of 300 flagged (0.09 ≤ 0.10) against a large pool: accepted, the reason names the share.
    let ok = decide_batch(&s, &h, &share(0.09, 300));
    assert_eq!(ok.verdict, Verdict::Accept);
    assert!(ok.reasons[0].detail.contains("share in doubt 0.0900"));
    assert!(ok
        .flagged_share_baseline
        .as_ref()
        .is_some_and(|b| b.cold_start));
    // 33 of 300 (0.11 > 0.10): quarantined, with the count in the detail.
    let hi = decide_batch(&s, &h, &share(0.11, 300));
    assert_eq!(hi.verdict, Verdict::Quarantine);
    assert_eq!(codes(&hi), vec![ReasonCode::ColdStartFlaggedShare]);
    assert!(
        hi.reasons[0].detail.contains("33 of 300 items"),
        "{}",
        hi.reasons[0].detail
    );
    // Below small_pool_items (1,500) the limit is 0.17: 0.16 passes, 0.18 does not.
    let small = |f, pool_items| BatchSignals {
        pool_items,
        ..share(f, 300)
    };
    assert_eq!(
        decide_batch(&s, &h, &small(0.16, 0)).verdict,
        Verdict::Accept
    );
    assert_eq!(
        decide_batch(&s, &h, &small(0.16, 1_499)).verdict,
        Verdict::Accept
    );
    assert_eq!(
        decide_batch(&s, &h, &small(0.16, 1_500)).verdict,
        Verdict::Quarantine
    );
    let d = decide_batch(&s, &h, &small(0.18, 300));
    assert_eq!(codes(&d), vec![ReasonCode::ColdStartFlaggedShare]);
    assert!(d.reasons[0].detail.contains("small pool"));
}

#[test]
fn cold_start_share_limit_asks_for_more_than_the_reference_model_expects() {
    // A data set the learner separates poorly: a clean batch is expected to flag 0.28 ± 0.02 of its
    // items. 0.30 is above the fixed limit (0.10) but within m₀ + 3 sd = 0.34: accepted. 0.345 is not
    // (and stays under the absolute ceiling 0.35).
    let s = batch_rules();
    let h = VendorHistory::default();
    let weak = |f| BatchSignals {
        expected_flagged_share: 0.28,
        expected_flagged_sd: 0.02,
        ..share(f, 500)
    };
    assert_eq!(decide_batch(&s, &h, &weak(0.30)).verdict, Verdict::Accept);
    let d = decide_batch(&s, &h, &weak(0.345));
    assert_eq!(codes(&d), vec![ReasonCode::ColdStartFlaggedShare]);
    assert!(
        d.reasons[0].detail.contains("0.2800"),
        "{}",
        d.reasons[0].detail
    );
    // A model that separates the classes well (m₀ 0.108 ≤ 0.2): the fixed limit alone decides, even
    // when the batch's own items are ambiguous — 0.123 > 0.10 is quarantined.
    let strong = BatchSignals {
        expected_flagged_share: 0.108,
        expected_flagged_sd: 0.015,
        ..share(0.123, 300)
    };
    assert_eq!(decide_batch(&s, &h, &strong).verdict, Verdict::Quarantine);
    // With z = 0 the fixed limit alone decides, as before.
    let s0 = PolicySettings {
        cold_start_flagged_excess_z: 0.0,
        ..batch_rules()
    };
    assert_eq!(
        decide_batch(&s0, &h, &weak(0.30)).verdict,
        Verdict::Quarantine
    );
}

#[test]
fn cold_start_damage_on_a_weak_model_must_clear_the_damage_to_expect() {
    // Values shaped on clean winequality batches (pool model accuracy 0.62): labels drawn from the
    // reference model would give damage −0.05 ± 0.06 nats and would flag 0.28 of the items.
    let s = batch_rules();
    let h = VendorHistory::default();
    let weak = |damage| BatchSignals {
        damage,
        expected_flagged_share: 0.28,
        expected_flagged_sd: 0.02,
        expected_damage: -0.05,
        expected_damage_sd: 0.06,
        ..share(0.28, 500)
    };
    // 0.069 > 0.05 but within E + 3 sd = 0.13: accepted.
    assert_eq!(decide_batch(&s, &h, &weak(0.069)).verdict, Verdict::Accept);
    // 0.15 > 0.13: quarantined, and the reason names the expectation.
    let d = decide_batch(&s, &h, &weak(0.15));
    assert_eq!(codes(&d), vec![ReasonCode::ColdStartDamage]);
    assert!(
        d.reasons[0].detail.contains("-0.0500"),
        "{}",
        d.reasons[0].detail
    );
    // A model that separates the classes well (m₀ ≤ 0.2): the fixed limit alone decides, however wide
    // the damage to expect.
    let strong = BatchSignals {
        expected_flagged_share: 0.09,
        flagged_share: 0.05,
        ..weak(0.069)
    };
    assert_eq!(
        codes(&decide_batch(&s, &h, &strong)),
        vec![ReasonCode::ColdStartDamage]
    );
    // The legacy entry point has no signals: the fixed limit alone decides.
    assert_eq!(decide(&s, &h, 0.0, 0.069).verdict, Verdict::Quarantine);
    // A negative z is refused by validation.
    let bad = PolicySettings {
        cold_start_damage_excess_z: -1.0,
        ..batch_rules()
    };
    assert!(bad.validate().is_err());
}

#[test]
fn every_rule_that_fires_is_reported() {
    let s = batch_rules();
    let b = BatchSignals {
        repair_cost: 0.06,
        damage: 0.3,
        flagged_share: 0.4,
        ..share(0.0, 100)
    };
    let d = decide_batch(&s, &VendorHistory::default(), &b);
    assert_eq!(d.verdict, Verdict::Quarantine);
    assert_eq!(
        codes(&d),
        vec![
            ReasonCode::DamageCeiling,
            ReasonCode::FlaggedShareCeiling,
            ReasonCode::ColdStartRepairCost,
            ReasonCode::ColdStartDamage,
            ReasonCode::ColdStartFlaggedShare,
        ]
    );
    assert_eq!(d.signals, Some(b));
}

#[test]
fn flagged_share_ceiling_applies_with_a_high_baseline() {
    let s = batch_rules();
    // A vendor whose accepted batches were all around 0.33 flagged (its items are hard to label).
    let h = share_history(&[0.33, 0.34, 0.32, 0.33, 0.34, 0.33, 0.32, 0.33, 0.33, 0.34]);
    assert!(!h.flagged_share_is_cold(&s));
    assert_eq!(
        decide_batch(&s, &h, &share(0.34, 1000)).verdict,
        Verdict::Accept
    );
    let d = decide_batch(&s, &h, &share(0.36, 1000));
    assert!(codes(&d).contains(&ReasonCode::FlaggedShareCeiling));
}

#[test]
fn flagged_share_outlier_by_the_modified_z_score() {
    let s = batch_rules();
    // Shares 0.05 … 0.09: median 0.07; |x − 0.07| sorted 0,0,0,0,0.01,0.01,0.01,0.01,0.02,0.02 → MAD 0.01
    // (Iglewicz & Hoaglin 1993): M(x) = 0.6745 (x − 0.07)/0.01, scale 0.01/0.6745 = 0.014826 above the
    // floor 0.01 and above the binomial standard error √(0.07 · 0.93/1000) = 0.00807.
    let h = share_history(&[0.05, 0.06, 0.07, 0.08, 0.09, 0.06, 0.07, 0.08, 0.07, 0.07]);
    let d = decide_batch(&s, &h, &share(0.15, 1000));
    let fb = d.flagged_share_baseline.clone().expect("judged");
    assert_eq!(fb.scale_source, ScaleSource::Mad);
    assert_relative_eq!(fb.median, 0.07, epsilon = 1e-12);
    assert_relative_eq!(fb.mad, 0.01, epsilon = 1e-12);
    assert_relative_eq!(fb.modified_z, 0.6745 * 8.0, epsilon = 1e-9); // 5.396
    assert_eq!(codes(&d), vec![ReasonCode::FlaggedShareOutlier]);
    assert!(d.reasons[0].detail.contains("150 of 1000 items"));
    // M(0.12) = 0.6745 · 5 = 3.3725 < 3.5, and the CUSUM after it is 3.3725 − 0.5 < 5: accepted.
    let d = decide_batch(&s, &h, &share(0.12, 1000));
    assert_eq!(d.verdict, Verdict::Accept);
    assert_eq!(d.reasons[0].code, ReasonCode::WithinBaseline);
    assert!(d.reasons[0]
        .detail
        .contains("share in doubt 0.1200 (median 0.0700"));
    // Fewer flags than usual are never suspicious.
    assert_eq!(
        decide_batch(&s, &h, &share(0.0, 1000)).verdict,
        Verdict::Accept
    );
}

#[test]
fn a_small_batch_is_judged_against_its_binomial_standard_error() {
    let s = batch_rules();
    // All shares 0.07: MAD = meanAD = 0, so the scale is a floor. For 1,000 items the configured floor
    // 0.01 binds (binomial √(0.07 · 0.93/1000) = 0.00807); for 100 items the binomial standard error
    // of a proportion binds: √(0.0651/100) = 0.025515 (standard), so M(0.15) = 0.08/0.025515 = 3.1354.
    let h = share_history(&[0.07; 10]);
    let big = decide_batch(&s, &h, &share(0.15, 1000));
    let fb = big.flagged_share_baseline.expect("judged");
    assert_eq!(fb.scale_source, ScaleSource::Floor);
    assert_relative_eq!(fb.modified_z, 8.0, epsilon = 1e-9);
    assert_eq!(big.verdict, Verdict::Quarantine);
    let small = decide_batch(&s, &h, &share(0.15, 100));
    let fb = small.flagged_share_baseline.expect("judged");
    assert_eq!(fb.scale_source, ScaleSource::BinomialStandardError);
    assert_relative_eq!(fb.sigma, (0.07f64 * 0.93 / 100.0).sqrt(), epsilon = 1e-12);
    assert_relative_eq!(fb.modified_z, 3.1354, epsilon = 1e-4);
    assert_eq!(small.verdict, Verdict::Accept);
}

#[test]
fn slow_drift_of_the_flagged_share_trips_its_cusum() {
    let s = batch_rules();
    // Baseline as in the outlier test: median 0.07, σ̂ = 1.4826 · 0.01. A drip of shares 0.09:
    // z = 0.02/0.014826 = 1.349 (modified z 1.349 < 3.5), S grows by 0.849: the 6th batch signals.
    let mut h = share_history(&[0.05, 0.06, 0.07, 0.08, 0.09, 0.06, 0.07, 0.08, 0.07, 0.07]);
    let mut alarm_at = None;
    for i in 0..20 {
        let d = decide_batch(&s, &h, &share(0.09, 1000));
        if d.verdict == Verdict::Quarantine {
            assert_eq!(codes(&d), vec![ReasonCode::FlaggedShareDrift]);
            alarm_at = Some(i);
            break;
        }
        h.record_accepted(&s, &share(0.09, 1000));
    }
    assert_eq!(alarm_at, Some(5));
    // The drip was held aside: the baseline median did not move; the repair cost never drifted.
    assert_eq!(h.flagged_share.pending.len(), 5);
    assert_eq!(h.cusum, 0.0);
    let d = decide_batch(&s, &h, &share(0.09, 1000));
    assert_relative_eq!(d.flagged_share_baseline.expect("judged").median, 0.07);
    // A reviewer accepts the new level: the held shares join the baseline and the alarm clears.
    h.reset_cusum(&s);
    assert!(h.flagged_share.pending.is_empty());
    assert_eq!(h.flagged_share.accepted.len(), 15);
    assert_eq!(
        decide_batch(&s, &h, &share(0.09, 1000)).verdict,
        Verdict::Accept
    );
}

#[test]
fn quarantined_batches_never_reach_the_flagged_share_baseline() {
    let s = batch_rules();
    let mut h = share_history(&[0.07; 10]);
    let poisoned = share(0.16, 1000);
    let d = decide_batch(&s, &h, &poisoned);
    assert_eq!(d.verdict, Verdict::Quarantine);
    // Judged against the ten accepted shares, its own share not among them.
    let fb = d.flagged_share_baseline.expect("a flagged-share baseline");
    assert_eq!((fb.n_history, fb.median), (10, 0.07));
    // Only an accepted batch is recorded, and it moves the flagged-share history.
    h.record_accepted(&s, &share(0.07, 1000));
    assert_eq!(h.flagged_share.accepted.len(), 11);
    assert_eq!(h.accepted_total, 11);
}

#[test]
fn histories_written_before_the_flagged_share_still_load() {
    let s = batch_rules();
    // A stored record from before this field existed: ten accepted costs, no flagged shares.
    let old = r#"{"version":1,"accepted_costs":[0,0,0,0,0,0,0,0,0,0],"pending_costs":[],"cusum":0.0,"accepted_total":10}"#;
    let h: VendorHistory = serde_json::from_str(old).expect("backward compatible");
    assert!(!h.is_cold(&s));
    assert!(h.flagged_share_is_cold(&s));
    // The repair cost is judged against its baseline, the flagged share by its cold-start limit.
    let d = decide_batch(&s, &h, &share(0.11, 1000));
    assert!(!d.baseline.cold_start);
    assert_eq!(codes(&d), vec![ReasonCode::ColdStartFlaggedShare]);
    // Decisions stored before the new fields existed load too.
    let d0 = decide(&s, &h, 0.0, 0.0);
    let mut v = serde_json::to_value(&d0).expect("serialise");
    let obj = v.as_object_mut().expect("object");
    obj.remove("flagged_share_baseline");
    obj.remove("signals");
    let back: Decision = serde_json::from_value(v).expect("backward compatible");
    assert_eq!(back, d0);
}

#[test]
fn a_non_finite_flagged_share_is_an_invalid_score() {
    let s = batch_rules();
    let d = decide_batch(&s, &VendorHistory::default(), &share(f64::NAN, 10));
    assert_eq!(codes(&d), vec![ReasonCode::ScoreInvalid]);
    let d = decide_batch(&s, &VendorHistory::default(), &BatchSignals::invalid());
    assert_eq!(codes(&d), vec![ReasonCode::ScoreInvalid]);
    // Recording a batch without a usable share keeps its repair cost.
    let mut h = VendorHistory::default();
    h.record_accepted(&s, &share(f64::NAN, 10));
    assert_eq!(h.accepted_costs.len(), 1);
    assert!(h.flagged_share.accepted.is_empty());
}

#[test]
fn decide_without_signals_skips_the_flagged_share() {
    let s = batch_rules();
    let d = decide(&s, &VendorHistory::default(), 0.0, 0.0);
    assert_eq!(d.verdict, Verdict::Accept);
    assert!(d.flagged_share_baseline.is_none() && d.signals.is_none());
}

#[test]
fn flagged_share_settings_are_validated() {
    for bad in [
        PolicySettings {
            cold_start_max_flagged_share: 1.2,
            ..batch_rules()
        },
        PolicySettings {
            max_flagged_share: -0.1,
            ..batch_rules()
        },
        PolicySettings {
            flagged_share_min_scale: 0.0,
            ..batch_rules()
        },
    ] {
        assert!(bad.validate().is_err());
    }
}

/// Mutation testing found three changes the library's tests let through (DEVELOPERS.md, "Mutation
/// testing"): `n % 2` → `n / 2` or `n + 2` in `median` (the worked examples had equal middle values) and
/// `/ MAD` → `· MAD` in `modified_z_scores` (their MAD was 1). Iglewicz & Hoaglin's formula
/// `M_i = 0.6745 (x_i − median) / MAD`, computed by hand (no published worked example with these values):
/// data 2, 4, 6, 8, 100: median 6, |x − 6| = 4, 2, 0, 2, 94 → sorted 0, 2, 2, 4, 94, MAD 2;
/// M(100) = 0.6745 · 94 / 2 = 31.70150, M(2) = 0.6745 · (−4) / 2 = −1.3490. Medians: the middle value, or
/// the mean of the two middle values (common practice).
#[test]
fn median_and_modified_z_with_distinct_middle_values_and_a_mad_of_two() {
    assert_eq!(median(&[10.0, 1.0, 2.0]), 2.0);
    assert_eq!(median(&[100.0, 4.0, 1.0, 3.0, 2.0]), 3.0);
    assert_eq!(median(&[10.0, 1.0, 3.0, 2.0]), 2.5);
    let m = modified_z_scores(&[2.0, 4.0, 6.0, 8.0, 100.0]).expect("MAD > 0");
    assert_relative_eq!(m[4], 31.70150, epsilon = 1e-5);
    assert_relative_eq!(m[0], -1.3490, epsilon = 1e-4);
}

/// Whether `decide_batch` gives this reason for these signals.
fn fires(s: &PolicySettings, h: &VendorHistory, sig: &BatchSignals, code: ReasonCode) -> bool {
    codes(&decide_batch(s, h, sig)).contains(&code)
}

/// Every limit is a strict "exceeds": a signal exactly at its limit does not fire the rule, the next
/// representable value above it does (each pair checks both). Written for a mutation run's twelve missed
/// mutants (`>` → `>=` at the ceilings, the cold-start limits, the weak-model allowances and the baseline
/// rules); the other limits are raised out of the way so that only the rule under test can fire.
#[test]
fn a_signal_exactly_at_its_limit_does_not_fire_and_just_above_does() {
    let up = |x: f64| f64::from_bits(x.to_bits() + 1);
    let cold = VendorHistory::default();
    let wide = PolicySettings {
        cold_start_max_repair_cost: 0.5,
        cold_start_max_damage_nats: 0.5,
        cold_start_max_flagged_share: 0.5,
        cold_start_max_flagged_share_small_pool: 0.5,
        judge_labels: false,
        ..batch_rules()
    };
    let damage = |d: f64| BatchSignals {
        damage: d,
        ..cost_only(0.0)
    };
    // (settings, signals at the limit, the same just above, the rule)
    let cases: Vec<(PolicySettings, BatchSignals, BatchSignals, ReasonCode)> = vec![
        (
            wide.clone(),
            cost_only(0.2),
            cost_only(up(0.2)),
            ReasonCode::RepairCostCeiling,
        ),
        (
            wide.clone(),
            damage(0.25),
            damage(up(0.25)),
            ReasonCode::DamageCeiling,
        ),
        (
            wide.clone(),
            share(0.35, 1000),
            share(up(0.35), 1000),
            ReasonCode::FlaggedShareCeiling,
        ),
        (
            batch_rules(),
            cost_only(0.05),
            cost_only(up(0.05)),
            ReasonCode::ColdStartRepairCost,
        ),
        (
            batch_rules(),
            damage(0.05),
            damage(up(0.05)),
            ReasonCode::ColdStartDamage,
        ),
        (
            batch_rules(),
            share(0.10, 1000),
            share(up(0.10), 1000),
            ReasonCode::ColdStartFlaggedShare,
        ),
    ];
    for (s, at, above, code) in &cases {
        assert!(!fires(s, &cold, at, *code), "{code:?} fired at its limit");
        assert!(
            fires(s, &cold, above, *code),
            "{code:?} did not fire above it"
        );
    }
    // Where the learner separates the classes poorly (labels that follow the reference model would
    // flag 30 % of the batch), the cold-start limits also ask to clear what such labels give (here with
    // no spread, so exactly `E`): damage 0.1 nats against an expected 0.1, a share 0.3 against 0.3.
    let weak = |sig: BatchSignals| BatchSignals {
        expected_flagged_share: 0.3,
        expected_damage: 0.1,
        ..sig
    };
    let s = batch_rules();
    for (at, above, code) in [
        (damage(0.1), damage(up(0.1)), ReasonCode::ColdStartDamage),
        (
            share(0.3, 1000),
            share(up(0.3), 1000),
            ReasonCode::ColdStartFlaggedShare,
        ),
    ] {
        assert!(!fires(&s, &cold, &weak(at), code), "{code:?} fired at E");
        assert!(
            fires(&s, &cold, &weak(above), code),
            "{code:?} did not fire above E"
        );
    }
}

/// The baseline rules at their limits, as above: the modified z-score and the CUSUM of the repair cost
/// and of the flagged share, each at a limit set to the batch's own value (the other rule's limit out of
/// the way), then at the next representable value below it.
#[test]
fn a_baseline_rule_exactly_at_its_limit_does_not_fire_and_just_below_does() {
    let s = batch_rules();
    let h = history(&[0.01, 0.02, 0.03, 0.02, 0.01, 0.02, 0.03, 0.02, 0.02]);
    let b = Baseline::compute(&s, &h, 0.06);
    assert!(
        !b.cold_start && b.modified_z > 0.0 && b.cusum > 0.0,
        "{b:?}"
    );
    let outlier = |limit: f64| PolicySettings {
        modified_z_limit: limit,
        cusum_h: 1e9,
        ..batch_rules()
    };
    let drift = |limit: f64| PolicySettings {
        modified_z_limit: 1e9,
        cusum_h: limit,
        ..batch_rules()
    };
    let sig = cost_only(0.06);
    let below = |x: f64| f64::from_bits(x.to_bits() - 1);
    assert!(!fires(
        &outlier(b.modified_z),
        &h,
        &sig,
        ReasonCode::RepairCostOutlier
    ));
    assert!(fires(
        &outlier(below(b.modified_z)),
        &h,
        &sig,
        ReasonCode::RepairCostOutlier
    ));
    assert!(!fires(
        &drift(b.cusum),
        &h,
        &sig,
        ReasonCode::RepairCostDrift
    ));
    assert!(fires(
        &drift(below(b.cusum)),
        &h,
        &sig,
        ReasonCode::RepairCostDrift
    ));
    // The flagged share's baseline likewise.
    let fh = share_history(&[0.05, 0.06, 0.07, 0.06, 0.05, 0.06, 0.07, 0.06, 0.06]);
    let fb = Baseline::flagged_share(&s, &fh, 0.12, 1000);
    assert!(
        !fb.cold_start && fb.modified_z > 0.0 && fb.cusum > 0.0,
        "{fb:?}"
    );
    let sig = share(0.12, 1000);
    assert!(!fires(
        &outlier(fb.modified_z),
        &fh,
        &sig,
        ReasonCode::FlaggedShareOutlier
    ));
    assert!(fires(
        &outlier(below(fb.modified_z)),
        &fh,
        &sig,
        ReasonCode::FlaggedShareOutlier
    ));
    assert!(!fires(
        &drift(fb.cusum),
        &fh,
        &sig,
        ReasonCode::FlaggedShareDrift
    ));
    assert!(fires(
        &drift(below(fb.cusum)),
        &fh,
        &sig,
        ReasonCode::FlaggedShareDrift
    ));
}

/// A batch whose items lie beyond the trusted set's reach is told so (`items_unlike_pool`, a finding for
/// operations), and its batch-level scores, which mix in those items, are not judged: the repair cost that
/// holds the same batch at the ceiling without the shift does not hold it with the shift. Written for a
/// mutation run's missed mutants (`shift_rule` removed; `&&` → `||` in the guard that skips the batch
/// scores, which then skipped them for every batch).
#[test]
fn items_unlike_the_pool_are_told_apart_and_their_batch_scores_are_not_judged() {
    let s = PolicySettings::default();
    let h = VendorHistory::default();
    let base = BatchSignals {
        clean_flagged_share: 0.07,
        ..cost_only(0.3)
    };
    assert!(!base.unlike_pool(&s).0);
    let d = decide_batch(&s, &h, &base);
    assert!(codes(&d).contains(&ReasonCode::RepairCostCeiling), "{d:?}");
    assert!(!codes(&d).contains(&ReasonCode::ItemsUnlikePool));
    // 400 of 1,000 items beyond the reach where a batch like the pool has 1 % there.
    let shifted = BatchSignals {
        unlike_items: 400,
        unlike_tail: 0.01,
        ..base
    };
    assert!(shifted.unlike_pool(&s).0);
    let d = decide_batch(&s, &h, &shifted);
    let c = codes(&d);
    assert!(c.contains(&ReasonCode::ItemsUnlikePool), "{d:?}");
    assert!(!c.contains(&ReasonCode::RepairCostCeiling), "{d:?}");
    assert!(!c.contains(&ReasonCode::ColdStartRepairCost), "{d:?}");
}

/// `judge_labels = false` switches the per-label test off: a batch whose paper items are flagged 14 of
/// 77 against 3 expected is held by it when on, and neither tested nor held when off. Written for a
/// mutation run's missed mutant (`&&` → `||` in its guard, which tested the labels whatever the setting).
#[test]
fn the_per_label_test_runs_only_when_asked() {
    let labels = vec![
        classes::LabelFlags {
            class: 0,
            name: "cardboard".into(),
            items: 123,
            flagged: 9,
            expected: 9.0,
        },
        classes::LabelFlags {
            class: 1,
            name: "paper".into(),
            items: 77,
            flagged: 14,
            expected: 3.0,
        },
    ];
    let sig = BatchSignals {
        flagged_share: 23.0 / 200.0,
        items: 200,
        clean_flagged_share: 12.0 / 200.0,
        labels,
        ..share(23.0 / 200.0, 200)
    };
    let h = VendorHistory::default();
    let on = decide_batch(&PolicySettings::default(), &h, &sig);
    assert!(
        codes(&on).contains(&ReasonCode::FlaggedItemsInClass),
        "{on:?}"
    );
    let off = PolicySettings {
        judge_labels: false,
        ..PolicySettings::default()
    };
    let d = decide_batch(&off, &h, &sig);
    assert!(d.labels.is_empty(), "{:?}", d.labels);
    assert!(!codes(&d).contains(&ReasonCode::FlaggedItemsInClass));
}
