//! Scoring time of one vendor batch against pool summaries of growing size.
//!
//! Workload (issue 2): a batch of 1,000 items × 32 sensor readings × 8 material classes from the fictional
//! recycling plant ([`labelweir::scenario::Plant`]), 10% of its labels flipped uniformly at random, 10
//! trusted items per class, scored by [`labelweir::model::assess`] in incremental mode (the daemon's mode)
//! against pool summaries standing for 10,000, 100,000 and 1,000,000 accepted items.
//!
//! How the large summaries are built: a [`PoolSummary`] is a fixed-size second-order model of the pool's
//! *mean* loss (coefficients, gradient and a `(p·K)²` Hessian); scoring reads only the summary, never the
//! pool's items. Fitting one exactly over a million items is slow and is not what is measured here, so
//!
//! * `summary_n/…`: the exact summary of 10,000 plant items with its item count set to the pool size
//!   (the mean gradient and Hessian of a larger sample from the same plant estimate the same quantities);
//! * `absorbed/100000`: a summary grown the daemon's way, from the exact 10,000-item summary by absorbing
//!   90 accepted batches of 1,000 items ([`PoolSummary::absorb`]) — a check that the scaled summaries are
//!   not easier to score against than a real one.
//!
//! The summary's memory is printed once per size. Run with `cargo bench --bench scoring`.

use std::hint::black_box;
use std::time::Duration;

use criterion::{criterion_group, criterion_main, BenchmarkId, Criterion};
use labelweir::model::{
    assess, FeatureMap, ModelSettings, PoolInput, PoolSummary, Standardizer, TrustedInput,
};
use labelweir::scenario::{self, Plant};
use ndarray::{Array1, Array2};

struct Workload {
    settings: ModelSettings,
    standardizer: Standardizer,
    trusted_x: Array2<f64>,
    trusted_y: Vec<usize>,
    trusted_w: Array1<f64>,
    batch_x: Array2<f64>,
    batch_y: Vec<usize>,
    base: PoolSummary,
}

fn workload() -> Workload {
    let settings = ModelSettings::default();
    let plant = Plant::new(2018);
    let k = Plant::N_CLASSES;
    let (trusted_x, trusted_y) = plant.sample_per_class(10, 1);
    let (pool_x, pool_y) = plant.sample(10_000, 2);
    let (batch_x, clean_y) = plant.sample(1_000, 3);
    let (batch_y, _) = scenario::uniform_flips(&clean_y, k, 0.10, 4);
    let standardizer = Standardizer::fit(&[trusted_x.view(), pool_x.view()]).expect("standardise");
    let fm = FeatureMap::new(standardizer.clone(), settings.feature_map, settings.seed)
        .expect("feature map");
    let (base, report) =
        PoolSummary::fit(&settings, fm, k, pool_x.view(), &pool_y).expect("pool summary");
    assert!(
        report.converged,
        "pool summary fit did not converge: {report:?}"
    );
    let trusted_w = Array1::ones(trusted_y.len());
    Workload {
        settings,
        standardizer,
        trusted_x,
        trusted_y,
        trusted_w,
        batch_x,
        batch_y,
        base,
    }
}

fn score(w: &Workload, summary: &PoolSummary) {
    let a = assess(
        &w.settings,
        &w.standardizer,
        Plant::N_CLASSES,
        TrustedInput {
            x: w.trusted_x.view(),
            y: &w.trusted_y,
            weight: w.trusted_w.view(),
        },
        PoolInput::Summary(summary),
        w.batch_x.view(),
        &w.batch_y,
    )
    .expect("assess");
    black_box(a);
}

fn scoring(c: &mut Criterion) {
    let w = workload();
    let mut group = c.benchmark_group("assess_1000x32x8");
    for pool in [10_000u64, 100_000, 1_000_000] {
        let mut summary = w.base.clone();
        summary.n = pool;
        summary.exact_at_n = pool;
        println!(
            "pool {pool}: summary holds {} bytes ({} parameters)",
            summary.memory_bytes(),
            summary.w.len()
        );
        group.bench_with_input(BenchmarkId::new("summary_n", pool), &summary, |b, s| {
            b.iter(|| score(&w, s))
        });
    }
    // Grown by absorbing accepted batches, as the daemon does.
    let plant = Plant::new(2018);
    let mut grown = w.base.clone();
    for i in 0..90u64 {
        let (x, y) = plant.sample(1_000, 1_000 + i);
        grown.absorb(&w.settings, x.view(), &y).expect("absorb");
    }
    println!(
        "absorbed to {} items: summary holds {} bytes",
        grown.len(),
        grown.memory_bytes()
    );
    group.bench_with_input(BenchmarkId::new("absorbed", grown.len()), &grown, |b, s| {
        b.iter(|| score(&w, s))
    });
    group.finish();
}

criterion_group! {
    name = benches;
    config = Criterion::default()
        .sample_size(10)
        .warm_up_time(Duration::from_secs(1))
        .measurement_time(Duration::from_secs(5));
    targets = scoring
}
criterion_main!(benches);
