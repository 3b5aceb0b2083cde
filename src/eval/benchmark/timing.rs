//! The benchmark's timing sections: incremental-vs-exact agreement, scale, and the pool sweep.

use super::*;
use std::time::{Duration, Instant};

use ndarray::Array1;

use crate::eval::metrics::{spearman, top_k_set};
use crate::model::{
    assess, FeatureMap, ModelSettings, PoolInput, PoolSummary, Standardizer, TrustedInput,
};
use crate::scenario::{self, Plant};

#[allow(clippy::too_many_arguments)]
pub(super) fn mode_agreement(
    settings: &ModelSettings,
    st: &Standardizer,
    k: usize,
    split: &Split,
    attack: Attack,
    seed: u64,
    summary_run: &Run,
    source_name: &str,
) -> Result<ModeAgreement, BenchError> {
    let (delivered, _) = apply_attack(attack, split, st, k, seed);
    let weight = Array1::ones(split.trusted_y.len());
    let t0 = Instant::now();
    let exact = assess(
        settings,
        st,
        k,
        TrustedInput {
            x: split.trusted_x.view(),
            y: &split.trusted_y,
            weight: weight.view(),
        },
        PoolInput::Exact {
            x: split.pool_x.view(),
            y: &split.pool_y,
        },
        split.batch_x.view(),
        &delivered,
    )
    .map_err(|source| BenchError::Model {
        case: format!("{source_name} · exact mode"),
        source,
    })?;
    let exact_ms = ms(t0.elapsed());
    let a: Vec<f64> = summary_run
        .assessment
        .items
        .iter()
        .map(|i| i.suspicion)
        .collect();
    let b: Vec<f64> = exact.items.iter().map(|i| i.suspicion).collect();
    let top = 20.min(a.len());
    let (ta, tb) = (top_k_set(&a, top), top_k_set(&b, top));
    Ok(ModeAgreement {
        source: source_name.to_string(),
        attack,
        spearman: spearman(&a, &b),
        top20_shared: ta.iter().filter(|i| tb.contains(i)).count(),
        top20_of: top,
        repair_cost_summary: summary_run.assessment.repair_cost,
        repair_cost_exact: exact.repair_cost,
        damage_summary: summary_run.assessment.damage,
        damage_exact: exact.damage,
        exact_ms,
        summary_ms: summary_run.engine_ms,
    })
}

/// Scoring a 1,000-item plant batch against pool summaries standing for 10k, 100k and 1M items.
pub(super) fn scale_timings(
    opts: &BenchOptions,
    plant: &Plant,
) -> Result<Vec<ScaleTiming>, BenchError> {
    let err = |case: &str| {
        let case = case.to_string();
        move |source| BenchError::Model { case, source }
    };
    let settings = &opts.settings;
    let repeats = if opts.quick { 3 } else { 9 };
    let k = Plant::N_CLASSES;
    let (trusted_x, trusted_y) = plant.sample_per_class(10, opts.seed ^ 0x51);
    let (pool_x, pool_y) = plant.sample(10_000, opts.seed ^ 0x52);
    let (batch_x, clean_y) = plant.sample(1_000, opts.seed ^ 0x53);
    let (batch_y, _) = scenario::uniform_flips(&clean_y, k, 0.10, opts.seed ^ 0x54);
    let st =
        Standardizer::fit(&[trusted_x.view(), pool_x.view()]).map_err(err("scale: standardise"))?;
    let fm = FeatureMap::new(st.clone(), settings.feature_map, settings.seed)
        .map_err(err("scale: map"))?;
    let t0 = Instant::now();
    let (base, _) =
        PoolSummary::fit(settings, fm, k, pool_x.view(), &pool_y).map_err(err("scale: fit"))?;
    let build_ms = ms(t0.elapsed());
    let weight = Array1::ones(trusted_y.len());
    let mut out = Vec::new();
    for pool_items in [10_000u64, 100_000, 1_000_000] {
        let mut summary = base.clone();
        summary.n = pool_items;
        summary.exact_at_n = pool_items;
        let mut times = Vec::with_capacity(repeats);
        let mut phases: Vec<[f64; 3]> = Vec::with_capacity(repeats);
        for _ in 0..repeats {
            let t = Instant::now();
            let a = assess(
                settings,
                &st,
                k,
                TrustedInput {
                    x: trusted_x.view(),
                    y: &trusted_y,
                    weight: weight.view(),
                },
                PoolInput::Summary(&summary),
                batch_x.view(),
                &batch_y,
            )
            .map_err(err("scale: assess"))?;
            times.push(ms(t.elapsed()));
            phases.push([
                ms(a.timings.reference),
                ms(a.timings.train),
                ms(a.timings.repair),
            ]);
        }
        times.sort_by(f64::total_cmp);
        phases.sort_by(|a, b| (a[0] + a[1] + a[2]).total_cmp(&(b[0] + b[1] + b[2])));
        let mut absorbed = summary.clone();
        let t = Instant::now();
        absorbed
            .absorb(settings, batch_x.view(), &clean_y)
            .map_err(err("scale: absorb"))?;
        let absorb_ms = ms(t.elapsed());
        out.push(ScaleTiming {
            pool_items,
            batch_items: batch_y.len(),
            features: Plant::N_FEATURES,
            classes: k,
            median_ms: times[times.len() / 2],
            min_ms: times[0],
            max_ms: times[times.len() - 1],
            repeats,
            summary_bytes: summary.memory_bytes(),
            summary_build_ms: build_ms,
            absorb_ms,
            phase_ms: phases[phases.len() / 2],
        });
    }
    Ok(out)
}

/// Time the pool sweep over a million plant items (see [`SweepTiming`]).
pub(super) fn sweep_timing(opts: &BenchOptions, plant: &Plant) -> Result<SweepTiming, BenchError> {
    let err = |source| BenchError::Model {
        case: "sweep".into(),
        source,
    };
    let settings = &opts.settings;
    let k = Plant::N_CLASSES;
    let (trusted_x, trusted_y) = plant.sample_per_class(10, opts.seed ^ 0x61);
    let (pool_x, pool_y) = plant.sample(10_000, opts.seed ^ 0x62);
    let st = Standardizer::fit(&[trusted_x.view(), pool_x.view()]).map_err(err)?;
    let fm = FeatureMap::new(st, settings.feature_map, settings.seed).map_err(err)?;
    let (mut summary, _) =
        PoolSummary::fit(settings, fm, k, pool_x.view(), &pool_y).map_err(err)?;
    let (items, chunk) = if opts.quick {
        (100_000, 10_000)
    } else {
        (1_000_000, 10_000)
    };
    summary.n = items as u64;
    summary.exact_at_n = items as u64;
    let weight = Array1::ones(trusted_y.len());
    let t = Instant::now();
    let scorer = crate::model::SweepScorer::new(
        settings,
        &summary,
        TrustedInput {
            x: trusted_x.view(),
            y: &trusted_y,
            weight: weight.view(),
        },
    )
    .map_err(err)?;
    let fit_ms = ms(t.elapsed());
    let mut score = Duration::ZERO;
    for c in 0..items / chunk {
        let (x, y) = plant.sample(chunk, opts.seed ^ 0x6300 ^ c as u64);
        let t = Instant::now();
        let (scored, _) = scorer.score(x.view(), &y).map_err(err)?;
        score += t.elapsed();
        std::hint::black_box(scored);
    }
    let d = Plant::N_FEATURES;
    let p = summary.feature_map.output_dim();
    let memory_bytes = summary.memory_bytes()
        + 8 * (trusted_y.len() * (p + 1) + 2 * p * k)
        + 8 * chunk * (d + 2 * (p + k));
    let score_ms = ms(score);
    Ok(SweepTiming {
        items,
        chunk,
        fit_ms,
        score_ms,
        items_per_s: items as f64 / score.as_secs_f64().max(1e-9),
        memory_bytes,
    })
}
