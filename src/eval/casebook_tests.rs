//! Tests of the attack casebook (quick streams; the full casebook is a bench command).
use super::*;

/// The quick casebook: its structure, and outcomes that can fail — poison held back, the shifted
/// items never blamed on the vendor, clean batches not held.
#[test]
fn quick_casebook_holds_poison_and_never_blames_a_shift_on_the_labels() {
    let c = run(
        &CasebookOptions {
            quick: true,
            seed: 2018,
            config: Config::default(),
            only: None,
            expert_lag: EXPERT_LAG,
        },
        |_| {},
    )
    .expect("runs");
    assert_eq!(c.cases.len(), 22);
    let by = |name: &str| {
        c.cases
            .iter()
            .find(|r| r.name.starts_with(name))
            .expect(name)
    };
    let clean = by("clean stream");
    assert_eq!((clean.poison_delivered, clean.clean_batches), (0, 12));
    assert_eq!(clean.clean_held, 0, "{clean:?}");
    assert_eq!(clean.batches_recalled, 0, "{clean:?}");
    let uniform = by("uniform 10 %");
    assert!(
        uniform.poison_delivered > 0 && uniform.poison_share() <= 0.10,
        "{uniform:?}"
    );
    // The repair-aware attacker's flips sit among the batches' highest unflagged suspicions, where
    // the unsure items wait for review (`[admission] unsure_share`); without them 21 of its 45
    // flips reached the pool in this run (measured when written).
    let aware = by("repair-aware");
    assert!(
        aware.poison_delivered > 0 && aware.poison_share() <= 0.10,
        "{aware:?}"
    );
    let wine = by("true labels (wine)");
    assert_eq!(wine.clean_held, 0, "{wine:?}");
    // On winequality flipped labels are often doubted no more than right ones; the label fit still
    // holds uniform flips (at batch 2 in this run, measured when written).
    let flips = by("uniform 10 % (wine)");
    assert!(flips.first_held.is_some(), "{flips:?}");
    // ... and its hold (a stream rule) recalls the batches accepted while the statistic climbed: the
    // flips that had entered with them leave the pool (3 of 45 from 2 batches in this run, measured
    // when written; with `recall_on_drift` off they stay).
    assert!(
        flips.poison_recalled > 0 && flips.poison_in_pool == 0,
        "{flips:?}"
    );
    let shift = by("covariate shift");
    assert!(shift.first_held.is_some(), "{shift:?}");
    assert_eq!(shift.held_as_label_trouble, 0, "{shift:?}");
    assert!(
        shift.told.iter().any(|(c, _)| c == "items_unlike_pool"),
        "{shift:?}"
    );
    for r in &c.cases {
        assert_eq!(r.batches, r.poisoned_batches + r.clean_batches);
        assert!(r.poison_in_pool <= r.poison_delivered);
        assert!(r.poison_in_pool_agreeing <= r.poison_in_pool);
        assert!(r.let_through <= r.poisoned_accepted && r.let_through <= r.poison_in_pool);
        assert_eq!(r.let_through == 0, r.poison_in_pool == 0, "{r:?}");
        assert!(r.held >= r.clean_held && r.held <= r.batches);
        assert!(r.clean_batches_recalled <= r.batches_recalled);
        assert!(r.batches_recalled + r.held <= r.batches, "{r:?}");
        assert!(r.let_through + r.let_through_recalled <= r.poisoned_accepted);
        assert!(r.poison_in_pool + r.poison_recalled <= r.poison_delivered);
        assert!(r.clean_items_kept_out <= r.clean_items_accepted);
    }
    // A filtered run replays its case with the seed it has in the full run: the same figures.
    let one = run(
        &CasebookOptions {
            quick: true,
            seed: 2018,
            config: Config::default(),
            only: Some("HALF-ACCURACY LABELER (WINE)".into()),
            expert_lag: EXPERT_LAG,
        },
        |_| {},
    )
    .expect("runs");
    assert_eq!(one.cases.len(), 1);
    let full = by("half-accuracy labeler (wine)");
    assert_eq!(
        serde_json::to_value(&one.cases[0]).unwrap(),
        serde_json::to_value(full).unwrap()
    );
}

/// From an empty pool, the flagged items of accepted batches wait for review, so the pool model loses
/// the hard-but-right items and doubts their labels more and more; the clean level follows the model of
/// the items as delivered instead (`PoolSummary::labels_model`). Without it, these two quick streams
/// (seeds 2018 and 2026, 300-item clean batches) had a batch held by the per-label rule at the 6th and
/// the 5th batch (measured when written). The drip of flips on an empty pool still keeps its flips out
/// of the pool.
#[test]
fn a_clean_stream_from_an_empty_pool_is_not_held_label_by_label() {
    for seed in [2018, 2026] {
        let c = run(
            &CasebookOptions {
                quick: true,
                seed,
                config: Config::default(),
                only: Some("empty pool".into()),
                expert_lag: EXPERT_LAG,
            },
            |_| {},
        )
        .expect("runs");
        assert_eq!(c.cases.len(), 2);
        let clean = &c.cases[0];
        assert_eq!((clean.clean_batches, clean.poison_delivered), (12, 0));
        assert!(
            !clean
                .told
                .iter()
                .any(|(code, _)| code == "flagged_items_in_class"),
            "seed {seed}: {clean:?}"
        );
        assert!(clean.clean_held <= 1, "seed {seed}: {clean:?}");
        let drip = &c.cases[1];
        assert!(drip.name.starts_with("drip"), "{drip:?}");
        assert!(
            drip.poison_delivered > 0 && drip.poison_share() <= 0.10,
            "seed {seed}: {drip:?}"
        );
    }
}

/// The experts' spot checks on the plant's repair-aware attacker (full-length stream, 10 batches): with
/// them the least-sure chart signals and the batches of its run leave the pool; without them (the same
/// stream, `[spot_checks] enabled = false`) nothing is checked and the poison stays (9 of 150 flips in
/// the pool at seed 2018 when written). Fails with the answers never taken into the charts.
#[test]
fn spot_checks_find_the_flips_the_learner_cannot_see() {
    let run_with = |enabled: bool| {
        let mut config = Config::default();
        config.spot_checks.enabled = enabled;
        let c = run(
            &CasebookOptions {
                quick: false,
                seed: 2018,
                config,
                only: Some("repair-aware, least-sure".into()),
                expert_lag: EXPERT_LAG,
            },
            |_| {},
        )
        .expect("runs");
        assert_eq!(c.cases.len(), 1);
        c.cases[0].clone()
    };
    let (on, off) = (run_with(true), run_with(false));
    assert!(off.poison_in_pool > 0 && off.spot_checked == 0, "{off:?}");
    assert!(on.spot_signal_at.is_some(), "{on:?}");
    assert!(
        on.spot_disagreed > 0 && on.spot_checked >= on.spot_disagreed,
        "{on:?}"
    );
    assert!(
        on.poison_in_pool < off.poison_in_pool,
        "on {on:?}\noff {off:?}"
    );
    assert!(
        on.told.iter().any(|(c, _)| c == "spot_check_disagreement") || on.held == 0,
        "{on:?}"
    );
}
