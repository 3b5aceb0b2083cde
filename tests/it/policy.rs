//! The verdict policy on the engine's real output at a large pool (issue 3, policy).
//!
//! With a pool of 100,000 items a 1,000-item batch barely moves the model, so its repair cost and damage
//! sit near the clean noise floor; the policy also judges the batch's flagged share. These tests run the
//! engine on the recycling plant ([`labelweir::scenario::Plant`]) — a summary fitted on 10,000 items with
//! `n` set to 100,000 stands for the larger pool, as in the engine benchmark's scale timings — and check
//! that the default `[policy]` accepts clean batches and quarantines one with 10 % uniform flips (the
//! random baseline of Xiao, Xiao & Eckert, ECAI 2012), in cold start and against a history of clean
//! batches. The defaults were calibrated with `examples/policy_calibration.rs` on other seeds.

use labelweir::model::{
    assess, Assessment, FeatureMap, ModelSettings, PoolInput, PoolSummary, Standardizer,
    TrustedInput,
};
use labelweir::policy::{
    decide_batch, BatchSignals, PolicySettings, ReasonCode, VendorHistory, Verdict,
};
use labelweir::scenario::{self, Plant};
use ndarray::{Array1, Array2};

struct Bench {
    settings: ModelSettings,
    st: Standardizer,
    tx: Array2<f64>,
    ty: Vec<usize>,
    summary: PoolSummary,
    plant: Plant,
}

impl Bench {
    fn new(pool_items: u64) -> Self {
        let settings = ModelSettings::default();
        let plant = Plant::new(11);
        let (tx, ty) = plant.sample_per_class(10, 0x61);
        let (px, py) = plant.sample(10_000, 0x62);
        // As `labelweir init` does: the standardisation comes from the trusted set.
        let st = Standardizer::fit(&[tx.view()]).expect("standardise");
        let fm = FeatureMap::new(st.clone(), settings.feature_map, settings.seed).expect("map");
        let (mut summary, _) =
            PoolSummary::fit(&settings, fm, Plant::N_CLASSES, px.view(), &py).expect("fit");
        summary.n = pool_items;
        summary.exact_at_n = pool_items;
        Self {
            settings,
            st,
            tx,
            ty,
            summary,
            plant,
        }
    }

    fn assess(&self, x: &Array2<f64>, y: &[usize]) -> Assessment {
        let w = Array1::ones(self.ty.len());
        assess(
            &self.settings,
            &self.st,
            Plant::N_CLASSES,
            TrustedInput {
                x: self.tx.view(),
                y: &self.ty,
                weight: w.view(),
            },
            PoolInput::Summary(&self.summary),
            x.view(),
            y,
        )
        .expect("assess")
    }

    /// A clean 1,000-item batch and its signals.
    fn clean(&self, seed: u64) -> BatchSignals {
        let (x, y) = self.plant.sample(1_000, seed);
        BatchSignals::from_assessment(&self.assess(&x, &y), self.settings.flag_threshold)
    }

    /// A 1,000-item batch with 10 % uniform flips and its signals.
    fn flipped(&self, seed: u64) -> BatchSignals {
        let (x, y) = self.plant.sample(1_000, seed);
        let (fy, mask) = scenario::uniform_flips(&y, Plant::N_CLASSES, 0.10, seed ^ 0xf1);
        assert_eq!(mask.iter().filter(|&&m| m).count(), 100);
        BatchSignals::from_assessment(&self.assess(&x, &fy), self.settings.flag_threshold)
    }
}

fn codes(d: &labelweir::policy::Decision) -> Vec<ReasonCode> {
    d.reasons.iter().map(|r| r.code).collect()
}

#[test]
fn batch_signals_summarise_the_assessment() {
    let b = Bench::new(20_000);
    let (x, y) = b.plant.sample(200, 0x71);
    let a = b.assess(&x, &y);
    let t = b.settings.flag_threshold;
    let s = BatchSignals::from_assessment(&a, t);
    // Invariants of the definition: a share of the batch's items, and the mean of the suspicions.
    let flagged = a.items.iter().filter(|i| i.suspicion >= t).count();
    assert_eq!(s.items, 200);
    assert!((s.flagged_share - flagged as f64 / 200.0).abs() < 1e-12);
    let mean = a.items.iter().map(|i| i.suspicion).sum::<f64>() / 200.0;
    assert!((s.mean_suspicion - mean).abs() < 1e-12);
    assert_eq!(s.repair_cost, a.repair_cost);
    assert_eq!(s.damage, a.damage);
    assert_eq!(s.pool_items, 20_000);
}

#[test]
fn flipped_batch_at_a_100k_pool_is_quarantined_in_cold_start_and_with_history() {
    let ps = PolicySettings::default();
    let b = Bench::new(100_000);
    let mut history = VendorHistory::default();

    // Cold start: the vendor's first batch.
    let clean = b.clean(0x100);
    let d = decide_batch(&ps, &history, &clean);
    assert_eq!(
        d.verdict,
        Verdict::Accept,
        "clean batch in cold start: {:?}",
        d.reasons
    );
    let flipped = b.flipped(0x200);
    let d = decide_batch(&ps, &history, &flipped);
    assert_eq!(d.verdict, Verdict::Quarantine, "{flipped:?}");
    assert!(
        codes(&d).contains(&ReasonCode::ColdStartFlaggedShare),
        "{:?}",
        d.reasons
    );

    // A history of clean batches (each accepted, then recorded, as the daemon does).
    for seed in 0..ps.min_history as u64 + 2 {
        let s = b.clean(0x300 + seed);
        let d = decide_batch(&ps, &history, &s);
        assert_eq!(
            d.verdict,
            Verdict::Accept,
            "clean batch {seed}: {:?}",
            d.reasons
        );
        history.record_accepted(&ps, &s);
    }
    assert!(!history.is_cold(&ps) && !history.flagged_share_is_cold(&ps));

    let d = decide_batch(&ps, &history, &b.clean(0x400));
    assert_eq!(
        d.verdict,
        Verdict::Accept,
        "clean batch with history: {:?}",
        d.reasons
    );
    let d = decide_batch(&ps, &history, &b.flipped(0x500));
    assert_eq!(d.verdict, Verdict::Quarantine);
    assert!(
        codes(&d).contains(&ReasonCode::FlaggedShareOutlier),
        "{:?}",
        d.reasons
    );
    let fb = d.flagged_share_baseline.expect("judged");
    assert!(fb.modified_z > ps.modified_z_limit);
}
