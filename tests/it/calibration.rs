//! The clean level computed to the data: batches carrying their true labels flag as many items as the
//! engine says a clean batch should — on a registry data set where the learner is only moderately accurate,
//! and on the plant, where the reference model taken as it is is too flat (see
//! `labelweir::model::calibration`).
//!
//! Data: red wine quality from `linfa-datasets` 0.8.1 (1,599 × 11, six quality grades; the linear learner
//! on an 800-item pool is right on about half of the batch items — 0.53 when this was written — checked
//! below to stay moderate).
//!
//! What it shows (measured when written): on winequality 210 items flagged in five clean 150-item batches
//! against 197.8 ± 10.9 computed with the reference model as it is (the shipped default) and 220.4 ± 11.4
//! with the measured sharpness (`β` = 0.87); before the clean level followed the fusion's rule (the
//! trusted-anchored doubt, weighed where the trusted audit raises the repair's weight) it computed 168.9 ±
//! 10.4, 3.9 standard deviations off, and this check failed. On the plant, 73 against 87.8 ± 7.7 with the
//! measured sharpness (`β` = 1.15), and 106.8 ± 8.5 with the model as it is (4 standard deviations off:
//! the plant's check fails without the calibration).

//!
//! "Flagged" in the tallies above is the policy's count, the items *in doubt* (suspicion at or above
//! `[model] flag_threshold`). The flags shown per item sit at each batch's own flag line
//! (`Assessment::flag_line`, `[model] clean_flag_rate`); the last test checks what they come to.

use labelweir::model::calibration::Sharpness;
use labelweir::model::{
    assess, Assessment, FeatureMap, FeatureMapKind, ModelSettings, PoolInput, PoolSummary,
    Standardizer, TrustedInput,
};
use ndarray::{Array1, Array2, Axis};
use rand::seq::SliceRandom;
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;

/// Clean batches' flags, summed over the batches.
struct Tally {
    /// Items flagged.
    observed: f64,
    /// Flagged items computed for batches carrying the right labels, and the variance of that count.
    expected: f64,
    variance: f64,
    /// Items whose given label the reference model prefers (`learner_doubt < 0.5`), of `items`.
    right: usize,
    items: usize,
    /// Each assessment's sharpness.
    sharpness: Vec<Sharpness>,
}

impl Tally {
    fn sd(&self) -> f64 {
        self.variance.sqrt()
    }

    /// Whether the observed count lies within three standard deviations of the computed one.
    fn agrees(&self) -> bool {
        (self.observed - self.expected).abs() <= 3.0 * self.sd()
    }

    /// The tally in one line, for the checks' closing prints.
    fn line(&self) -> String {
        format!(
            "{} clean batch items, flagged {} against {:.1} ± {:.1}; sharpness {:?}",
            self.items,
            self.observed,
            self.expected,
            self.sd(),
            self.sharpness.first()
        )
    }
}

/// A workspace as the tests fit it: standardiser on the trusted items, summary of the pool, default
/// settings with `calibrate_clean_level` as given.
struct Workspace {
    settings: ModelSettings,
    st: Standardizer,
    k: usize,
    trusted: (Array2<f64>, Vec<usize>),
    summary: PoolSummary,
}

impl Workspace {
    fn fit(
        calibrate: bool,
        trusted: (&Array2<f64>, &[usize]),
        pool: (&Array2<f64>, &[usize]),
        k: usize,
    ) -> Self {
        let settings = ModelSettings {
            calibrate_clean_level: calibrate,
            ..ModelSettings::default()
        };
        let st = Standardizer::fit(&[trusted.0.view()]).expect("standardise");
        let fm = FeatureMap::new(st.clone(), FeatureMapKind::Linear, 7).expect("map");
        let (summary, _) = PoolSummary::fit(&settings, fm, k, pool.0.view(), pool.1).expect("pool");
        Self {
            settings,
            st,
            k,
            trusted: (trusted.0.clone(), trusted.1.to_vec()),
            summary,
        }
    }

    fn assess(&self, bx: &Array2<f64>, by: &[usize]) -> Assessment {
        let w = Array1::ones(self.trusted.1.len());
        assess(
            &self.settings,
            &self.st,
            self.k,
            TrustedInput {
                x: self.trusted.0.view(),
                y: &self.trusted.1,
                weight: w.view(),
            },
            PoolInput::Summary(&self.summary),
            bx.view(),
            by,
        )
        .expect("assess")
    }

    fn flagged(&self, a: &Assessment) -> Vec<bool> {
        a.items
            .iter()
            .map(|i| i.suspicion >= self.settings.flag_threshold)
            .collect()
    }

    /// Absorb a batch as the daemon's default admission does: its flagged items wait for review, the
    /// rest enter the pool.
    fn absorb_unflagged(&mut self, bx: &Array2<f64>, by: &[usize]) {
        let flagged = self.flagged(&self.assess(bx, by));
        let keep: Vec<usize> = (0..by.len()).filter(|&i| !flagged[i]).collect();
        let ky: Vec<usize> = keep.iter().map(|&i| by[i]).collect();
        self.summary
            .absorb(&self.settings, bx.select(Axis(0), &keep).view(), &ky)
            .expect("absorb");
    }

    /// Assess each batch of true labels and sum their flags.
    fn tally(&self, batches: impl Iterator<Item = (Array2<f64>, Vec<usize>)>) -> Tally {
        let mut t = Tally {
            observed: 0.0,
            expected: 0.0,
            variance: 0.0,
            right: 0,
            items: 0,
            sharpness: Vec::new(),
        };
        for (bx, by) in batches {
            let a = self.assess(&bx, &by);
            let n = by.len() as f64;
            t.observed += self.flagged(&a).iter().filter(|&&f| f).count() as f64;
            t.expected += a.expected_flagged_share * n;
            t.variance += (a.expected_flagged_sd * n).powi(2);
            t.right += a.items.iter().filter(|i| i.learner_doubt < 0.5).count();
            t.items += by.len();
            t.sharpness.push(a.reference_sharpness.clone());
        }
        t
    }
}

/// Red wine quality split as the checks use it: up to 10 trusted items per grade (a third of the rarest
/// grades' items at most), then `pool` items, the rest in 150-item batches.
struct Wine {
    k: usize,
    trusted: (Array2<f64>, Vec<usize>),
    pool: (Array2<f64>, Vec<usize>),
    batches: Vec<(Array2<f64>, Vec<usize>)>,
}

fn wine(pool: usize) -> Wine {
    let ds = linfa_datasets::winequality();
    let mut grades: Vec<usize> = ds.targets().to_vec();
    grades.sort_unstable();
    grades.dedup();
    let y_all: Vec<usize> = ds
        .targets()
        .iter()
        .map(|t| grades.binary_search(t).expect("present"))
        .collect();
    let k = grades.len();
    let mut order: Vec<usize> = (0..y_all.len()).collect();
    order.shuffle(&mut ChaCha8Rng::seed_from_u64(1599));
    let mut per_grade = vec![0usize; k];
    let counts: Vec<usize> = (0..k)
        .map(|c| y_all.iter().filter(|&&y| y == c).count())
        .collect();
    let (mut trusted, mut rest) = (Vec::new(), Vec::new());
    for &i in &order {
        let c = y_all[i];
        if per_grade[c] < 10.min(counts[c] / 3) {
            per_grade[c] += 1;
            trusted.push(i);
        } else {
            rest.push(i);
        }
    }
    let (pool_rows, batch_rows) = rest.split_at(pool);
    let pick = |idx: &[usize]| {
        (
            ds.records().select(Axis(0), idx),
            idx.iter().map(|&i| y_all[i]).collect::<Vec<_>>(),
        )
    };
    Wine {
        k,
        trusted: pick(&trusted),
        pool: pick(pool_rows),
        batches: batch_rows
            .chunks(150)
            .filter(|c| c.len() == 150)
            .map(pick)
            .collect(),
    }
}

/// Batches of true labels: the observed flagged count, summed over the batches, lies within three
/// standard deviations of the computed clean count (the sum of independent Poisson-binomial counts), with
/// the reference model as it is (the shipped default) and with the measured sharpness applied.
#[test]
fn clean_batches_flag_what_the_computed_clean_level_says_on_winequality() {
    let w = wine(800);
    for calibrate in [false, true] {
        let ws = Workspace::fit(
            calibrate,
            (&w.trusted.0, &w.trusted.1),
            (&w.pool.0, &w.pool.1),
            w.k,
        );
        let t = ws.tally(w.batches.iter().cloned());
        assert!(t.items >= 600, "{} batch items", t.items);
        let accuracy = t.right as f64 / t.items as f64;
        assert!(
            (0.45..0.75).contains(&accuracy),
            "only moderately accurate, as the check means: {accuracy}"
        );
        assert!(
            t.sharpness
                .iter()
                .all(|s| s.pool.is_some() && (s.applied != 1.0) == calibrate),
            "the sharpness was measured (and applied when calibrating): {:?}",
            t.sharpness
        );
        eprintln!(
            "winequality (calibrate_clean_level = {calibrate}): {}; accuracy {accuracy:.3}",
            t.line()
        );
        assert!(
            t.agrees(),
            "calibrate_clean_level = {calibrate}: flagged {} against {:.1} ± {:.1} to expect; sharpness {:?}",
            t.observed,
            t.expected,
            t.sd(),
            t.sharpness[0]
        );
    }
}

/// A pool that grew by absorbing clean batches whose flagged items waited for review (the default
/// admission) is selected: the labels its model doubts are missing, so the model is sharper than the data
/// are. The clean level takes the right labels to follow the model as fitted from stored items
/// (`PoolSummary::labels_model`), and clean batches still flag what it says; taken from the absorbed model
/// instead, the computed count falls below what they flag (this check's second half).
///
/// A 400-item pool (so that 600 absorbed items weigh), with the measured sharpness applied: a model fitted
/// on 400 items is sharper than the data are before anything is absorbed (measured when written: 304
/// flagged in four clean batches against 246.4 ± 12.3 as it is, 299.5 ± 13.3 calibrated). After absorbing
/// 407 of 600 items: 152 flagged against 142.0 ± 9.3 (model at fit) and 103.4 ± 8.4 (absorbed model).
#[test]
fn the_clean_level_holds_after_the_pool_absorbed_batches_with_held_back_items() {
    let pool_n = 400;
    let w = wine(pool_n);
    let mut ws = Workspace::fit(
        true,
        (&w.trusted.0, &w.trusted.1),
        (&w.pool.0, &w.pool.1),
        w.k,
    );
    let (absorbed, judged) = w.batches.split_at(4);
    for (bx, by) in absorbed {
        ws.absorb_unflagged(bx, by);
    }
    assert!(ws.summary.len() < 400 + 600, "items were held back");
    let t = ws.tally(judged.iter().cloned());
    let mut without = Workspace { ..ws };
    without.summary.w_at_fit = None;
    let u = without.tally(judged.iter().cloned());
    eprintln!(
        "winequality after absorbing {} of 600 items: flagged {} against {:.1} ± {:.1} (labels from the model \
         at fit), {:.1} ± {:.1} (from the absorbed model)",
        without.summary.len() - pool_n as u64,
        t.observed,
        t.expected,
        t.sd(),
        u.expected,
        u.sd()
    );
    assert!(t.items >= 450, "{} judged items", t.items);
    assert!(
        t.agrees(),
        "flagged {} against {:.1} ± {:.1}",
        t.observed,
        t.expected,
        t.sd()
    );
    assert!(
        u.observed - u.expected > 3.0 * u.sd(),
        "the absorbed model's clean level is too low: flagged {} against {:.1} ± {:.1}",
        u.observed,
        u.expected,
        u.sd()
    );
}

/// The same check on the fictional recycling plant (2,000-item in-house pool, 10 trusted items per
/// class, eight clean 150-item batches), where the learner separates the classes well and the reference
/// model taken as it is is too flat.
#[test]
fn clean_batches_flag_what_the_calibrated_clean_level_says_on_the_plant() {
    use labelweir::scenario::Plant;
    let plant = Plant::new(2018);
    let (tx, ty) = plant.sample_per_class(10, 0x7157);
    let (px, py) = plant.sample(2_000, 0x9001);
    let batches = (0..8u64).map(|b| plant.sample(150, 0xb000 + b));
    let t = Workspace::fit(true, (&tx, &ty), (&px, &py), Plant::N_CLASSES).tally(batches);
    let applied: Vec<f64> = t.sharpness.iter().map(|s| s.applied).collect();
    eprintln!("plant: {}", t.line());
    assert!(
        applied.iter().all(|&b| b > 1.0),
        "the plant's reference model is too flat: {applied:?}"
    );
    assert!(
        t.agrees(),
        "flagged {} against {:.1} ± {:.1} to expect",
        t.observed,
        t.expected,
        t.sd()
    );
}

/// The flags at each batch's line are rare on true labels, whatever the learner's accuracy: over the
/// clean 150-item batches of winequality (the learner right on about half of them) and of the plant, the
/// items flagged at the line (a proposed label other than the given one) come to at most 5 % — the
/// calibration requirement of the trusted-anchor issue — where `[model] clean_flag_rate` asks for 3 %. With
/// the line held at its floor (`clean_flag_rate = 1`, every item at suspicion 0.5 flagged, as before the
/// line existed) winequality's clean batches flag more than 15 % (measured when written: 28 %), so the
/// check is not one the data pass by themselves. The 5 % is the requirement's; the 3 % the setting's.
#[test]
fn true_labels_are_flagged_at_the_line_on_at_most_five_percent_of_their_items() {
    use labelweir::scenario::Plant;
    let share = |ws: &Workspace, batches: &[(Array2<f64>, Vec<usize>)]| {
        let (mut flagged, mut items) = (0usize, 0usize);
        for (bx, by) in batches {
            let a = ws.assess(bx, by);
            flagged += a
                .items
                .iter()
                .filter(|i| i.proposed_label != i.label)
                .count();
            items += by.len();
        }
        flagged as f64 / items as f64
    };
    let w = wine(800);
    let mut ws = Workspace::fit(
        true,
        (&w.trusted.0, &w.trusted.1),
        (&w.pool.0, &w.pool.1),
        w.k,
    );
    let wine_share = share(&ws, &w.batches);
    ws.settings.clean_flag_rate = 1.0;
    let wine_floor = share(&ws, &w.batches);
    let plant = Plant::new(2018);
    let (tx, ty) = plant.sample_per_class(10, 0x7157);
    let (px, py) = plant.sample(2_000, 0x9001);
    let batches: Vec<_> = (0..8u64).map(|b| plant.sample(150, 0xb000 + b)).collect();
    let ws = Workspace::fit(true, (&tx, &ty), (&px, &py), Plant::N_CLASSES);
    let plant_share = share(&ws, &batches);
    eprintln!(
        "flagged at the line on true labels: winequality {wine_share:.3} (at the floor {wine_floor:.3}), plant {plant_share:.3}"
    );
    assert!(wine_share <= 0.05, "winequality: {wine_share}");
    assert!(plant_share <= 0.05, "plant: {plant_share}");
    assert!(wine_floor > 0.15, "winequality at the floor: {wine_floor}");
}
