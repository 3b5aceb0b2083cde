//! Unit tests of the item evidence: the binomial tail against hand-computed values, the vendor's level,
//! and the two attacks on per-file judging (a delivery split into small files, small clean files
//! interleaved) through the pure policy.
use super::*;
use crate::policy::{decide_batch, ReasonCode, VendorHistory, Verdict};

/// A batch of `n` items, `k` flagged, computed clean level `c`.
fn batch(n: usize, k: usize, c: f64) -> BatchSignals {
    BatchSignals {
        repair_cost: 0.0,
        damage: 0.0,
        flagged_share: k as f64 / n as f64,
        mean_suspicion: 0.1,
        items: n,
        pool_items: 100_000,
        clean_flagged_share: c,
        ..BatchSignals::invalid()
    }
}

#[test]
fn binomial_tail_matches_hand_computed_values() {
    // P(X ≥ 8 | Bin(10, ½)) = (C(10,8) + C(10,9) + C(10,10)) / 2¹⁰ = 56/1024 (binomial coefficients,
    // computed by hand).
    assert!((binomial_upper_tail(8, 10, 0.5) - 56.0 / 1024.0).abs() < 1e-12);
    // P(X ≥ 1 | Bin(20, 0.05)) = 1 − 0.95²⁰ (complement of no success).
    let want = 1.0 - 0.95f64.powi(20);
    assert!((binomial_upper_tail(1, 20, 0.05) - want).abs() < 1e-12);
    // P(X ≥ 0) = 1; P(X ≥ n + 1) = 0; P(X = n) = pⁿ.
    assert_eq!(binomial_upper_tail(0, 7, 0.3), 1.0);
    assert_eq!(binomial_upper_tail(8, 7, 0.3), 0.0);
    assert!((binomial_upper_tail(7, 7, 0.3) - 0.3f64.powi(7)).abs() < 1e-15);
    // Large n stays finite and tiny far in the tail.
    // (Chernoff: P ≤ exp(−n KL(0.06 ‖ 0.05)) ≈ exp(−49.6).)
    let p = binomial_upper_tail(3_000, 50_000, 0.05);
    assert!(p > 0.0 && p < 1e-15, "{p}");
}

#[test]
fn likelihood_ratio_is_the_bernoulli_formula() {
    // 3 of 10 at p₁ = 0.2 against p₀ = 0.1: 3 ln 2 + 7 ln(0.8/0.9).
    let want = 3.0 * 2f64.ln() + 7.0 * (0.8f64 / 0.9).ln();
    assert!((bernoulli_llr(3, 10, 0.1, 0.2) - want).abs() < 1e-12);
}

#[test]
fn a_new_vendor_is_judged_against_the_computed_clean_level() {
    let s = PolicySettings::default();
    let h = VendorHistory::default();
    // 150 items, computed clean level 0.05: 7 flagged is usual, 25 is not.
    let ok = decide_batch(&s, &h, &batch(150, 7, 0.05));
    assert_eq!(ok.verdict, Verdict::Accept, "{:?}", ok.reasons);
    let j = ok.items.expect("judged as items");
    assert_eq!((j.items, j.flagged), (150, 7));
    assert!((j.level - 0.05).abs() < 1e-12 && !j.established);
    let bad = decide_batch(&s, &h, &batch(150, 25, 0.05));
    assert_eq!(bad.verdict, Verdict::Quarantine);
    assert!(bad
        .reasons
        .iter()
        .any(|r| r.code == ReasonCode::FlaggedItemsExcess));
    assert!(bad.reasons[0]
        .detail
        .contains("computed clean level 0.0500"));
    // On data the learner separates poorly the computed level is high, and so is what passes.
    let weak = decide_batch(&s, &h, &batch(150, 55, 0.35));
    assert_eq!(weak.verdict, Verdict::Accept, "{:?}", weak.reasons);
}

#[test]
fn day_one_excess_never_raises_the_level_but_releases_do() {
    let s = PolicySettings::default();
    let mut h = VendorHistory::default();
    // 40 accepted batches each 2 flagged items above the clean level: the vendor's own record says
    // "worse than the prior", and its level stays at the computed clean level.
    for _ in 0..40 {
        let b = batch(150, 9, 0.05);
        h.record_accepted(&s, &b);
    }
    let j = h.evidence.judge(&s, &batch(150, 9, 0.05));
    assert!(j.accepted_excess > 0.0);
    assert_eq!(j.adjustment, 0.0);
    assert!((j.level - 0.05).abs() < 1e-12);
    // A reviewer releases batches at that level: now the level may rise to it.
    for _ in 0..10 {
        h.record_released(&s, &batch(150, 12, 0.05));
    }
    let j = h.evidence.judge(&s, &batch(150, 9, 0.05));
    assert!(j.adjustment > 0.0 && j.level > 0.05, "{j:?}");
    assert_eq!(j.cusum_before, 0.0);
    // A vendor cleaner than the computed level is judged more strictly.
    let mut clean = VendorHistory::default();
    for _ in 0..40 {
        clean.record_accepted(&s, &batch(150, 3, 0.05));
    }
    assert!(clean.evidence.judge(&s, &batch(150, 3, 0.05)).level < 0.05);
}

#[test]
fn tiny_clean_batches_carry_their_weight_in_items_only() {
    let s = PolicySettings::default();
    let mut h = VendorHistory::default();
    for _ in 0..20 {
        h.record_accepted(&s, &batch(300, 15, 0.05));
    }
    let before = h.evidence.judge(&s, &batch(300, 15, 0.05)).level;
    // 100 files of 3 clean items with nothing flagged: 300 items, the weight of one ordinary batch.
    for _ in 0..100 {
        h.record_accepted(&s, &batch(3, 0, 0.05));
    }
    let after = h.evidence.judge(&s, &batch(300, 15, 0.05)).level;
    assert!(after > 0.04 && before - after < 0.01, "{before} → {after}");
}

/// Deliver `files` through the pure policy, recording accepted ones; returns the verdicts.
fn deliver(s: &PolicySettings, h: &mut VendorHistory, files: &[BatchSignals]) -> Vec<Verdict> {
    files
        .iter()
        .map(|b| {
            let d = decide_batch(s, h, b);
            if d.verdict == Verdict::Accept {
                h.record_accepted(s, b);
            }
            d.verdict
        })
        .collect()
}

/// A vendor with a clean record of 20 batches of 300 items.
fn established(s: &PolicySettings) -> VendorHistory {
    let mut h = VendorHistory::default();
    deliver(s, &mut h, &vec![batch(300, 15, 0.05); 20]);
    h
}

#[test]
fn splitting_a_poisoned_delivery_into_small_files_does_not_get_it_through() {
    let s = PolicySettings::default();
    // One 600-item delivery, clean level 0.05 (30 flagged) plus 57 flagged flipped items: held.
    let mut whole = established(&s);
    assert_eq!(
        deliver(&s, &mut whole, &[batch(600, 87, 0.05)]),
        [Verdict::Quarantine]
    );
    // The same items as 20 files of 30 (flagged 4 or 5 each, 87 in all): the item CUSUM accumulates
    // across files; once it holds one file, every later file of the delivery is held too.
    let mut split = established(&s);
    let files: Vec<_> = (0..20)
        .map(|i| batch(30, if i % 3 == 0 { 5 } else { 4 }, 0.05))
        .collect();
    assert_eq!(files.iter().map(|b| b.flagged_items()).sum::<usize>(), 87);
    let v = deliver(&s, &mut split, &files);
    let first_hold = v
        .iter()
        .position(|v| *v == Verdict::Quarantine)
        .expect("held");
    assert!(
        v[first_hold..].iter().all(|v| *v == Verdict::Quarantine),
        "{v:?}"
    );
    assert!(first_hold <= 8, "first hold at file {first_hold}: {v:?}");
}

#[test]
fn interleaving_small_clean_files_does_not_get_poison_through() {
    let s = PolicySettings::default();
    let mut h = established(&s);
    // 20 poisoned 30-item files (as above) each followed by a clean 30-item file (1–2 flagged).
    let mut files = Vec::new();
    for i in 0..20 {
        files.push(batch(30, if i % 3 == 0 { 5 } else { 4 }, 0.05));
        files.push(batch(30, 1 + i % 2, 0.05));
    }
    let v = deliver(&s, &mut h, &files);
    let poisoned_through = (0..20).filter(|i| v[2 * i] == Verdict::Accept).count();
    let clean_held = (0..20)
        .filter(|i| v[2 * i + 1] == Verdict::Quarantine)
        .count();
    assert!(
        poisoned_through <= 10,
        "{poisoned_through} poisoned files through: {v:?}"
    );
    assert_eq!(clean_held, 0, "{v:?}");
}

/// What a release teaches the vendor's record is the level of the labels the reviewer let stand: items left
/// out leave the count, and flagged items left out or corrected leave the flagged count.
#[test]
fn a_release_without_the_corrected_items_teaches_the_level_that_stood() {
    let s = PolicySettings::default();
    let b = batch(150, 30, 0.05);
    let kept = b.clone().without_items(10, 25);
    assert_eq!((kept.items, kept.flagged_items()), (140, 5));
    let mut as_is = VendorHistory::default();
    as_is.record_released(&s, &b);
    let mut fixed = VendorHistory::default();
    fixed.record_released(&s, &kept);
    assert_eq!(fixed.evidence.released[0].flagged, 5);
    assert_eq!(fixed.evidence.released[0].items, 140);
    let next = batch(150, 9, 0.05);
    assert!(
        fixed.evidence.judge(&s, &next).level < as_is.evidence.judge(&s, &next).level,
        "a batch released with its errors corrected lifts the level less"
    );
    // Removing more than there is never underflows, and an empty remainder has share 0, not 0/0 (a NaN
    // share would read as invalid scores; the mutation run's `items > 0` → `>= 0` gave NaN here).
    let none = b.without_items(1_000, 1_000);
    assert_eq!((none.items, none.flagged_items()), (0, 0));
    assert_eq!(none.flagged_share, 0.0);
}

/// A batch whose judged items' labels are `z` standard deviations less (negative) or more likely than
/// right labels, per batch: `V = n` (unit variance per item), `ℓ − E = z √n`.
fn fitted(n: usize, k: usize, c: f64, z: f64) -> BatchSignals {
    BatchSignals {
        label_fit: crate::model::LabelFit {
            loglik: -(n as f64) + z * (n as f64).sqrt(),
            expected: -(n as f64),
            variance: n as f64,
        },
        ..batch(n, k, c)
    }
}

/// The label-fit CUSUM (`labels_unlikely`), worked by hand: with unit item variance a batch of `n` items
/// at `z` adds `L = −z √n − k n`. At the defaults (`k` = 0.1, `h` = 40), 150-item batches at z = −3.35
/// (what 10 % uniform flips gave on winequality) add `41.0 − 15 = 26.0` each: the first is accepted, the
/// second crosses `h`. Right labels (z = 0) add −15 and never hold; a release restarts the statistic.
#[test]
fn labels_less_likely_than_right_ones_are_held_by_the_label_fit_cusum() {
    let s = PolicySettings::default();
    assert_eq!((s.fit_drift_shift, s.fit_cusum_h), (0.1, 40.0));
    let mut h = established(&s);
    let j = h.evidence.judge(&s, &fitted(150, 8, 0.05, -3.35));
    assert!(
        (j.fit_step - (3.35 * 150f64.sqrt() - 15.0)).abs() < 1e-9,
        "{j:?}"
    );
    assert!((j.fit_z + 3.35).abs() < 1e-9 && !j.unlikely());
    let v = deliver(&s, &mut h, &vec![fitted(150, 8, 0.05, -3.35); 2]);
    assert_eq!(v, [Verdict::Accept, Verdict::Quarantine]);
    let d = decide_batch(&s, &h, &fitted(150, 8, 0.05, -3.35));
    assert!(
        d.reasons
            .iter()
            .any(|r| r.code == ReasonCode::LabelsUnlikely),
        "{:?}",
        d.reasons
    );
    // The same items in 30-item files (each adds 41.0 / 5 − 3 = 5.2): splitting does not hide them —
    // held at the eighth file (240 items; as whole batches, at the second, 300 items).
    let mut split = established(&s);
    let v = deliver(
        &s,
        &mut split,
        &vec![fitted(30, 2, 0.05, -3.35 / 5f64.sqrt()); 10],
    );
    let first = v
        .iter()
        .position(|v| *v == Verdict::Quarantine)
        .expect("held");
    assert_eq!(first, 7, "{v:?}");
    // Right labels never accumulate; a release restarts the statistic.
    let mut clean = established(&s);
    let v = deliver(&s, &mut clean, &vec![fitted(150, 8, 0.05, 0.0); 200]);
    assert!(v.iter().all(|v| *v == Verdict::Accept));
    assert_eq!(clean.evidence.fit_cusum, 0.0);
    let mut held = established(&s);
    deliver(&s, &mut held, &[fitted(150, 8, 0.05, -3.35)]);
    assert!(held.evidence.fit_cusum > 0.0);
    held.evidence
        .record_released(&s, &fitted(150, 8, 0.05, -3.35));
    assert_eq!(held.evidence.fit_cusum, 0.0);
}

/// A decision record written before the sharpness was kept reads it as 1 (the reference model taken as it
/// was then), so old records show the level as it was computed. Written for a mutation run's two missed
/// mutants (the serde default `one` returning 0 or −1).
#[test]
fn an_old_record_without_the_sharpness_reads_it_as_one() {
    let s = PolicySettings::default();
    let j = ItemEvidence::default().judge(&s, &batch(150, 12, 0.08));
    let mut v = serde_json::to_value(&j).unwrap();
    v.as_object_mut().unwrap().remove("clean_level_sharpness");
    let old: ItemJudgement = serde_json::from_value(v).unwrap();
    assert_eq!(old.clean_level_sharpness, 1.0);
    assert_eq!(
        ItemJudgement {
            clean_level_sharpness: 1.0,
            ..old
        },
        ItemJudgement {
            clean_level_sharpness: 1.0,
            ..j
        }
    );
}

/// The label-fit rule in words and at its edges: a record from before the rule existed (`h` = 0) never
/// fires whatever its statistic, a CUSUM equal to `h` has not crossed it, one above has; the sentence
/// carries the numbers. Written for a mutation run's missed mutants in `unlikely` (`>` → `>=`, twice)
/// and `describe_fit` (an empty or made-up sentence).
#[test]
fn the_label_fit_rule_fires_only_above_a_positive_h_and_says_its_numbers() {
    let s = PolicySettings::default();
    let j = ItemEvidence::default().judge(&s, &batch(300, 20, 0.08));
    let at = |cusum: f64, h: f64| ItemJudgement {
        fit_z: -2.4,
        fit_cusum_before: 39.4,
        fit_cusum: cusum,
        fit_cusum_h: h,
        ..j.clone()
    };
    assert!(
        !at(5.0, 0.0).unlikely(),
        "an old record (h = 0) never fires"
    );
    assert!(!at(40.0, 40.0).unlikely(), "equal to h has not crossed it");
    assert!(at(50.9, 40.0).unlikely());
    let words = at(50.9, 40.0).describe_fit();
    assert!(
        words.contains("label fit z = -2.40 over 300 judged items")
            && words.contains("label-fit CUSUM 39.4 → 50.9 (h = 40 item standard deviations)"),
        "{words}"
    );
}

/// The vendor's accepted excess, worked by hand: two accepted 150-item batches with 20 and 15 flagged
/// items against 12 expected each carry an excess of 8 + 3 = 11 items, shrunk towards 0 by
/// `trust_items` (1,000): `A = 11 / (300 + 1,000) = 0.0084615`. Written for a mutation run's missed
/// mutants of that sum (`+` → `−`, `*`) and of the released excess's mean (`/` → `%`, `*`).
#[test]
fn the_accepted_excess_is_the_shrunk_mean_worked_by_hand() {
    let s = PolicySettings::default();
    assert_eq!(s.trust_items, 1_000);
    let mut e = ItemEvidence::default();
    for flagged in [20, 15] {
        e.accepted.push_back(Tally {
            items: 150,
            flagged,
            clean: 12.0,
        });
    }
    let j = e.judge(&s, &batch(150, 12, 0.08));
    assert!((j.accepted_excess - 11.0 / 1_300.0).abs() < 1e-12, "{j:?}");
    // Released batches are a reviewer's word, not shrunk: one released batch with 20 flagged against 12
    // carries `R = 8 / 150`, and the level rises by `min(A, R) = A`.
    e.released.push_back(Tally {
        items: 150,
        flagged: 20,
        clean: 12.0,
    });
    let j = e.judge(&s, &batch(150, 12, 0.08));
    assert!((j.released_excess - 8.0 / 150.0).abs() < 1e-12, "{j:?}");
    assert!((j.adjustment - 11.0 / 1_300.0).abs() < 1e-12, "{j:?}");
}

/// The label-fit step worked by hand, and when it does not move. The demo's east-labels week 3 read
/// `ℓ = −118.81`, `E = −85.17`, `V = 196.96` over 300 items: `σ̄ = √(196.96/300) = 0.81026`, so
/// `L = 33.64 / 0.81026 − 0.1 · 300 = 11.52`. A batch without a label fit (`V = 0`: the reference was
/// cross-fitted) leaves the statistic where it was instead of dividing by zero. The record says whether
/// the clean level was computed. Written for a mutation run's missed mutants in `judge` (the step's
/// guard `&&` → `||` and `>` → `>=`, `/` → `*` in `σ̄`, and the `clean_level_computed` comparison).
#[test]
fn the_label_fit_step_is_the_formula_and_stays_put_without_a_fit() {
    let s = PolicySettings::default();
    let mut b = batch(300, 36, 0.078);
    b.label_fit = crate::model::LabelFit {
        loglik: -118.81,
        expected: -85.17,
        variance: 196.96,
    };
    let e = ItemEvidence {
        fit_cusum: 39.4,
        ..ItemEvidence::default()
    };
    let j = e.judge(&s, &b);
    let step = 33.64 / (196.96f64 / 300.0).sqrt() - 0.1 * 300.0;
    assert!((step - 11.52).abs() < 0.01, "{step}");
    assert!((j.fit_step - step).abs() < 1e-9, "{j:?}");
    assert!((j.fit_cusum - (39.4 + step)).abs() < 1e-9);
    assert!(j.clean_level_computed);
    let mut none = batch(300, 36, 0.0);
    none.label_fit = crate::model::LabelFit::default();
    let j = e.judge(&s, &none);
    assert_eq!((j.fit_step, j.fit_cusum), (0.0, 39.4), "{j:?}");
    assert!(!j.clean_level_computed, "clean_level_unknown was used");
}

/// The vendor's window, worked by hand with `evidence_items` = 400 and 150-item batches: the oldest
/// tallies are dropped while the rest still hold 400 items, so the window holds 150, 300, 450, 450, 450
/// items after each of five accepted batches (3 batches from the third on), a 1,000-item batch is kept
/// alone (the newest always stays), released batches are windowed the same way, and `items_total`
/// counts every item ever recorded. Written for a mutation run's missed mutants in `trim` and `push`
/// (none of the library's tests had a window long enough to trim).
#[test]
fn the_window_keeps_the_newest_items_up_to_the_cap() {
    let s = PolicySettings {
        evidence_items: 400,
        ..PolicySettings::default()
    };
    let b = batch(150, 12, 0.08);
    let mut e = ItemEvidence::default();
    let mut held = Vec::new();
    for _ in 0..5 {
        e.record_accepted(&s, &b);
        held.push(e.accepted.iter().map(|t| t.items).sum::<u64>());
    }
    assert_eq!(held, [150, 300, 450, 450, 450]);
    assert_eq!(e.accepted.len(), 3);
    assert_eq!(e.items_total, 750);
    e.record_accepted(&s, &batch(1_000, 80, 0.08));
    assert_eq!(e.accepted.len(), 1, "{:?}", e.accepted);
    assert_eq!(e.items_total, 1_750);
    for _ in 0..4 {
        e.record_released(&s, &b);
    }
    assert_eq!(e.released.len(), 3);
    assert_eq!(e.released.iter().map(|t| t.items).sum::<u64>(), 450);
    assert_eq!(
        e.accepted.len(),
        3,
        "the 1,000-item batch has left: {:?}",
        e.accepted
    );
    // At exactly the cap the rest still holds "at least" the cap: the oldest goes.
    let s = PolicySettings {
        evidence_items: 300,
        ..s
    };
    let mut e = ItemEvidence::default();
    for _ in 0..3 {
        e.record_accepted(&s, &b);
    }
    assert_eq!(e.accepted.iter().map(|t| t.items).sum::<u64>(), 300);
}

/// Items of one batch whose label fit is `z` standard deviations per batch off right labels (see
/// [`fitted`]), with nothing flagged: only the label-fit CUSUM can move.
fn fit_only(n: usize, z: f64) -> BatchSignals {
    fitted(n, 0, 0.05, z)
}

/// Run lengths (batches until `labels_unlikely` fires) of the label-fit CUSUM, by Monte Carlo through
/// [`ItemEvidence`]: each batch of `n` items draws its label fit `z ~ N(−shift, 1)` (`shift` in the
/// batch's standard deviations, towards less likely labels), is judged, and joins the record as accepted.
fn label_fit_run_lengths(s: &PolicySettings, n: usize, shift: f64, runs: usize, seed: u64) -> f64 {
    use rand::SeedableRng;
    use rand_distr::{Distribution, StandardNormal};
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(seed);
    let mut total = 0usize;
    for _ in 0..runs {
        let mut ev = ItemEvidence::default();
        let mut len = 0usize;
        loop {
            len += 1;
            // A chart that never signals fails here instead of hanging the test. The in-control mean is
            // about 930 steps and the run length is close to geometric, so P(run > 50,000) ≈
            // exp(−50,000 / 930) ≈ 5·10⁻²⁴: a defect, not noise. (At 10⁶ a mutant that silenced the chart
            // still ran past a 240 s mutation-test limit.)
            assert!(
                len <= 50_000,
                "the label-fit CUSUM never fired in 50,000 batches"
            );
            let z: f64 = StandardNormal.sample(&mut rng);
            let b = fit_only(n, z - shift);
            if ev.judge(s, &b).unlikely() {
                break;
            }
            ev.record_accepted(s, &b);
        }
        total += len;
    }
    total as f64 / runs as f64
}

/// The label-fit CUSUM against published run lengths of the one-sided tabular CUSUM with `k` = 0.5,
/// `h` = 5 (in standard deviations): in control 930.6, at a shift of one standard deviation 10.38
/// (Brook & Evans, "An approach to the probability distribution of CUSUM run length", Biometrika 1972,
/// Markov chain with 150 states, as computed in `../shared/check-values.md`; the design rule is Montgomery
/// & Runger's). One-item batches make the batch CUSUM the item CUSUM. A batch of `n` items adds
/// `N(−k n, n)` in control, the item CUSUM with `k√n` and `h/√n` once divided by `√n`: four-item batches
/// at `k` = 0.25, `h` = 10 are the same chart in batches. Monte Carlo: 1,000 runs each, standard error
/// about 3 % in control (a run length's spread is about its mean), so the bounds are ±10 % and ±5 %.
#[test]
fn the_label_fit_cusum_has_the_published_run_lengths() {
    let item = PolicySettings {
        fit_drift_shift: 0.5,
        fit_cusum_h: 5.0,
        ..PolicySettings::default()
    };
    let arl0 = label_fit_run_lengths(&item, 1, 0.0, 1_000, 1972);
    assert!((arl0 / 930.6 - 1.0).abs() < 0.10, "in-control ARL {arl0}");
    let arl1 = label_fit_run_lengths(&item, 1, 1.0, 1_000, 1973);
    assert!(
        (arl1 / 10.38 - 1.0).abs() < 0.05,
        "ARL at a 1σ shift {arl1}"
    );
    let batches = PolicySettings {
        fit_drift_shift: 0.25,
        fit_cusum_h: 10.0,
        ..PolicySettings::default()
    };
    let arl0 = label_fit_run_lengths(&batches, 4, 0.0, 1_000, 1974);
    assert!(
        (arl0 / 930.6 - 1.0).abs() < 0.10,
        "in-control ARL in 4-item batches {arl0}"
    );
}

/// The stream rules date the change they hold on (Montgomery's `N⁺`: accepted batches since the CUSUM was
/// last 0), and a hold reaches back over those batches (`Decision::recall`), worked by hand on the
/// label-fit CUSUM: with unit item variance a 150-item batch at `z` adds `−z √150 − 15`; at
/// `z = −24/√150` that is `+9`, so four batches climb to 36 and are accepted and the fifth (45 > 40) is
/// held reaching back over four. A right-labelled batch (`−15`) between them lowers the statistic without
/// reaching 0, so the run goes on; one that brings it to 0 ends it. Without the setting nothing is
/// recalled; a hold by the batch test alone (statistic at 0) reaches back over nothing; a reviewer's
/// restart (`reset_cusum`) clears both statistics and their runs; a batch that crosses `h` on its own
/// recalls nothing (without that rule, the test fails there). Fails with the run restarted at 1
/// instead of 0, or the runs left out of `reset_cusum`; the next test fails with the run restarted at
/// every positive step (each tried by hand).
#[test]
fn a_hold_by_a_stream_rule_recalls_the_batches_since_its_statistic_was_last_zero() {
    let s = PolicySettings::default();
    let up = fitted(150, 8, 0.05, -24.0 / 150f64.sqrt());
    let right = fitted(150, 8, 0.05, 0.0);
    let mut h = established(&s);
    assert_eq!((h.evidence.fit_cusum, h.evidence.fit_run), (0.0, 0));
    let v = deliver(&s, &mut h, &vec![up.clone(); 4]);
    assert_eq!(v, [Verdict::Accept; 4]);
    assert!(
        (h.evidence.fit_cusum - 36.0).abs() < 1e-9,
        "{:?}",
        h.evidence
    );
    assert_eq!(h.evidence.fit_run, 4);
    let d = decide_batch(&s, &h, &up);
    assert_eq!(d.verdict, Verdict::Quarantine);
    assert_eq!(
        (d.items.as_ref().map(|j| j.fit_run), d.recall),
        (Some(4), 4)
    );
    // Off: the same hold, nothing recalled.
    let off = PolicySettings {
        recall_on_drift: false,
        ..s.clone()
    };
    assert_eq!(decide_batch(&off, &h, &up).recall, 0);
    // An accepted batch's decision never recalls.
    let mut lower = established(&s);
    deliver(&s, &mut lower, &[up.clone(), up.clone()]);
    let accepted = decide_batch(&s, &lower, &right);
    assert_eq!((accepted.verdict, accepted.recall), (Verdict::Accept, 0));
    // 9 + 9 − 15 = 3 > 0: the run goes on through a right-labelled batch; 3 − 15 < 0 ends it.
    deliver(&s, &mut lower, std::slice::from_ref(&right));
    assert_eq!(lower.evidence.fit_run, 3);
    deliver(&s, &mut lower, &[right]);
    assert_eq!((lower.evidence.fit_cusum, lower.evidence.fit_run), (0.0, 0));
    // A batch that crosses h on its own (step 45 > 40 from 36) dates the change at itself: the run
    // before it is not recalled (`L > h`), though the statistic was above 0.
    let jump = fitted(150, 8, 0.05, -60.0 / 150f64.sqrt());
    let alone = decide_batch(&s, &h, &jump);
    assert_eq!(alone.verdict, Verdict::Quarantine);
    assert!((alone.items.as_ref().unwrap().fit_step - 45.0).abs() < 1e-9);
    assert_eq!(alone.recall, 0);
    // A hold by the batch test alone: the statistics stand at 0, nothing to reach back over.
    let fresh = established(&s);
    let excess = decide_batch(&s, &fresh, &batch(150, 40, 0.05));
    assert!(excess
        .reasons
        .iter()
        .any(|r| r.code == ReasonCode::FlaggedItemsExcess));
    assert_eq!((excess.verdict, excess.recall), (Verdict::Quarantine, 0));
    // A reviewer's restart clears both statistics and their runs.
    h.reset_cusum(&s);
    assert_eq!(
        (
            h.evidence.fit_cusum,
            h.evidence.fit_run,
            h.evidence.cusum,
            h.evidence.cusum_run
        ),
        (0.0, 0, 0.0, 0)
    );
}

/// The item CUSUM's run (`flagged_items_drift`), worked by hand: at level 0.05 against `p₁ = 0.08`, a
/// 150-item batch with 12 flagged adds `12 ln(0.08/0.05) + 138 ln(0.92/0.95) ≈ 1.21` nats, too few for
/// the batch test (the binomial tail at 12 of 150 is about 0.06); six batches reach about 7.3 (under
/// `h` = 8) and the seventh crosses it, reaching back over six. The run never covers more batches than
/// the vendor's evidence window holds.
#[test]
fn the_item_cusum_dates_its_drift_too_within_the_window() {
    let s = PolicySettings::default();
    let step = 12.0 * (0.08f64 / 0.05).ln() + 138.0 * (0.92f64 / 0.95).ln();
    assert!((step - 1.21).abs() < 0.01, "{step}");
    let drip = batch(150, 12, 0.05);
    let mut h = established(&s);
    let v = deliver(&s, &mut h, &vec![drip.clone(); 6]);
    assert_eq!(v, [Verdict::Accept; 6]);
    assert_eq!(h.evidence.cusum_run, 6);
    assert!(
        (h.evidence.cusum - 6.0 * step).abs() < 1e-6,
        "{:?}",
        h.evidence
    );
    let d = decide_batch(&s, &h, &drip);
    assert!(d
        .reasons
        .iter()
        .any(|r| r.code == ReasonCode::FlaggedItemsDrift));
    assert_eq!(d.recall, 6);
    // A window of 450 items keeps the newest three 150-item batches: the run reported is at most three.
    let narrow = PolicySettings {
        evidence_items: 450,
        ..s.clone()
    };
    let mut w = established(&narrow);
    deliver(&narrow, &mut w, &vec![drip.clone(); 6]);
    assert_eq!(w.evidence.cusum_run, 6);
    assert_eq!(w.evidence.judge(&narrow, &drip).cusum_run, 3);
}

/// A hold reaches back over the run of the rule that fired, not over the other statistic's run: each
/// chart is set by hand (item CUSUM 1.0 after a run of 3, label fit 36 after a run of 1, and the
/// reverse), worked with the steps above (8 of 150 flagged at level 0.05 steps the item CUSUM by
/// `8 ln 1.6 + 142 ln(0.92/0.95)` ≈ −0.80; `fitted(…, −24/√150)` steps the label fit by +9; 12 of 150
/// steps the item CUSUM by +1.21 and a batch without a label fit leaves that chart alone). Written for
/// the mutation run of `evidence.rs` (`&&` → `||` in `ItemJudgement::recall` survived).
#[test]
fn a_hold_reaches_back_over_the_run_of_the_rule_that_fired_only() {
    let s = PolicySettings::default();
    let codes = |d: &crate::policy::Decision| -> Vec<ReasonCode> {
        d.reasons.iter().map(|r| r.code).collect()
    };
    let mut h = established(&s);
    (h.evidence.cusum, h.evidence.cusum_run) = (1.0, 3);
    (h.evidence.fit_cusum, h.evidence.fit_run) = (36.0, 1);
    let d = decide_batch(&s, &h, &fitted(150, 8, 0.05, -24.0 / 150f64.sqrt()));
    assert_eq!(codes(&d), [ReasonCode::LabelsUnlikely]);
    assert_eq!(d.recall, 1, "the label fit's run, not the item CUSUM's 3");
    let mut h = established(&s);
    (h.evidence.cusum, h.evidence.cusum_run) = (7.5, 2);
    (h.evidence.fit_cusum, h.evidence.fit_run) = (10.0, 4);
    let d = decide_batch(&s, &h, &batch(150, 12, 0.05));
    assert_eq!(codes(&d), [ReasonCode::FlaggedItemsDrift]);
    assert_eq!(d.recall, 2, "the item CUSUM's run, not the label fit's 4");
}
