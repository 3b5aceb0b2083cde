//! Policy calibration: `cargo run --release --example policy_calibration [--quick]`.
//!
//! Measures, in the fictional recycling plant ([`labelweir::scenario::Plant`]), the four batch signals the
//! verdict policy reads (repair cost, damage, flagged share, mean suspicion; see
//! [`labelweir::policy::BatchSignals`]) for clean batches and for batches with 10 % uniform flips (Xiao,
//! Xiao & Eckert, ECAI 2012, random baseline) or 10 % region flips (the systematic-bias setting of Zhang,
//! Zhu & Wright, "Training Set Debugging Using Trusted Items", AAAI 2018), at pools of about 2k, 20k and
//! 100k items. As in the engine benchmark's scale timings, a [`PoolSummary`] fitted exactly on 10k items
//! with `n` set larger stands for the bigger pools. It also covers the demo's regime (300-item batches
//! against an empty or small pool).
//!
//! The defaults of `[policy]` were chosen from this output (the numbers are quoted beside them in
//! `src/policy/mod.rs`). Measured, never asserted: a test that depends on these numbers would pin the engine.

use labelweir::model::{
    self, FeatureMap, ModelSettings, PoolInput, PoolSummary, Standardizer, TrustedInput,
};
use labelweir::policy::{self, BatchSignals, PolicySettings, VendorHistory, Verdict};
use labelweir::scenario::{self, Plant};
use ndarray::{Array1, Array2};

struct Row {
    regime: String,
    kind: &'static str,
    s: BatchSignals,
}

fn main() {
    let quick = std::env::args().any(|a| a == "--quick");
    let settings = ModelSettings::default();
    let plant = Plant::new(7);
    let k = Plant::N_CLASSES;
    let paper = scenario::class_names()
        .iter()
        .position(|c| c == "paper")
        .unwrap_or(0);
    let (tx, ty) = plant.sample_per_class(10, 0x51);
    let tw = Array1::ones(ty.len());
    let clean_seeds: u64 = if quick { 12 } else { 20 };
    let attack_seeds: u64 = if quick { 2 } else { 6 };
    let mut rows: Vec<Row> = Vec::new();

    // (label, items fitted exactly, n the summary claims, batch size); 0 fitted = no pool at all.
    let regimes: [(&str, usize, u64, usize); 10] = [
        ("pool 0 / batch 300", 0, 0, 300),
        ("pool 300 / batch 300", 300, 300, 300),
        ("pool 600 / batch 300", 600, 600, 300),
        ("pool 900 / batch 300", 900, 900, 300),
        ("pool 1500 / batch 300", 1_500, 1_500, 300),
        ("pool 3000 / batch 300", 3_000, 3_000, 300),
        ("pool 2k / batch 1000", 2_000, 2_000, 1_000),
        ("pool 20k / batch 1000", 10_000, 20_000, 1_000),
        ("pool 100k / batch 1000", 10_000, 100_000, 1_000),
        ("pool 100k / batch 300", 10_000, 100_000, 300),
    ];
    for (label, fitted, claimed, batch) in regimes {
        let (px, py) = plant.sample(fitted.max(1), 0x52);
        // As the daemon does: `labelweir init` learns the standardisation from the trusted set alone.
        let st = Standardizer::fit(&[tx.view()]).expect("standardise");
        let fm = FeatureMap::new(st.clone(), settings.feature_map, settings.seed).expect("map");
        let summary = if fitted == 0 {
            None
        } else {
            let (mut s, _) = PoolSummary::fit(&settings, fm, k, px.view(), &py).expect("fit");
            s.n = claimed;
            s.exact_at_n = claimed;
            Some(s)
        };
        let mut run =
            |kind: &'static str, bx: &Array2<f64>, by: &[usize], mask: Option<&[bool]>| {
                let pool = summary
                    .as_ref()
                    .map_or(PoolInput::Empty, PoolInput::Summary);
                let a = model::assess(
                    &settings,
                    &st,
                    k,
                    TrustedInput {
                        x: tx.view(),
                        y: &ty,
                        weight: tw.view(),
                    },
                    pool,
                    bx.view(),
                    by,
                )
                .expect("assess");
                let s = BatchSignals::from_assessment(&a, settings.flag_threshold);
                let auroc = mask
                    .map(|m| auroc(&a.items.iter().map(|i| i.suspicion).collect::<Vec<_>>(), m));
                eprintln!(
                "{label:<24} {kind:<8} cost {:.4} damage {:+.5} flagged {:.4} mean_susp {:.4}{}",
                s.repair_cost,
                s.damage,
                s.flagged_share,
                s.mean_suspicion,
                auroc.map_or(String::new(), |v| format!(" auroc {v:.3}"))
            );
                rows.push(Row {
                    regime: label.to_string(),
                    kind,
                    s,
                });
            };
        for seed in 0..clean_seeds {
            let (bx, by) = plant.sample(batch, 1_000 + seed);
            run("clean", &bx, &by, None);
        }
        for seed in 0..attack_seeds {
            let (bx, by) = plant.sample(batch, 2_000 + seed);
            let (fy, m) = scenario::uniform_flips(&by, k, 0.10, 3_000 + seed);
            run("uniform", &bx, &fy, Some(&m));
            let (ry, m) = scenario::region_flips(bx.view(), &by, paper, 0.10, 4_000 + seed);
            run("region", &bx, &ry, Some(&m));
        }
    }

    // Verdicts under the default policy: in cold start (empty vendor history), and against a history of
    // the regime's first HISTORY clean batches (the remaining clean batches and every attack are judged).
    const HISTORY: usize = 10;
    let ps = PolicySettings::default();
    println!("# verdicts under the default [policy] (q = quarantined / judged)");
    println!(
        "{:<24} {:<8} {:>14} {:>14} {:>14}  reasons with history",
        "regime", "kind", "cold: old", "cold: new", "history: new"
    );
    let mut regimes_seen: Vec<String> = Vec::new();
    for r in &rows {
        if regimes_seen.contains(&r.regime) {
            continue;
        }
        regimes_seen.push(r.regime.clone());
        let of = |kind: &str| -> Vec<&Row> {
            rows.iter()
                .filter(|q| q.regime == r.regime && q.kind == kind)
                .collect()
        };
        let clean = of("clean");
        let mut h = VendorHistory::default();
        for c in clean.iter().take(HISTORY) {
            h.record_accepted(&ps, &c.s);
        }
        for kind in ["clean", "uniform", "region"] {
            let all = of(kind);
            let judged: Vec<&Row> = if kind == "clean" {
                all.iter().skip(HISTORY).copied().collect()
            } else {
                all.clone()
            };
            let q = |d: &policy::Decision| d.verdict == Verdict::Quarantine;
            let cold_old = all
                .iter()
                .filter(|x| {
                    q(&policy::decide(
                        &ps,
                        &VendorHistory::default(),
                        x.s.repair_cost,
                        x.s.damage,
                    ))
                })
                .count();
            let cold_new = all
                .iter()
                .filter(|x| q(&policy::decide_batch(&ps, &VendorHistory::default(), &x.s)))
                .count();
            let mut codes: Vec<&str> = Vec::new();
            let mut hist_new = 0;
            for x in &judged {
                let d = policy::decide_batch(&ps, &h, &x.s);
                if q(&d) {
                    hist_new += 1;
                }
                for reason in &d.reasons {
                    if !codes.contains(&reason.code.as_str()) {
                        codes.push(reason.code.as_str());
                    }
                }
            }
            println!(
                "{:<24} {:<8} {:>14} {:>14} {:>14}  {}",
                r.regime,
                kind,
                format!("{cold_old}/{}", all.len()),
                format!("{cold_new}/{}", all.len()),
                format!("{hist_new}/{}", judged.len()),
                codes.join(",")
            );
        }
    }
    // Which per-item summary separates better: within a regime, d = (mean flipped − mean clean) / sd clean
    // and gap = (min flipped − max clean) / sd clean (positive: the ranges do not overlap).
    println!();
    println!(
        "# separation within a regime, in clean standard deviations (flipped = uniform and region)"
    );
    println!(
        "{:<24} {:>22} {:>22}",
        "regime", "flagged share d / gap", "mean suspicion d / gap"
    );
    for g in &regimes_seen {
        let sep = |f: fn(&BatchSignals) -> f64| {
            let c: Vec<f64> = rows
                .iter()
                .filter(|q| &q.regime == g && q.kind == "clean")
                .map(|q| f(&q.s))
                .collect();
            let a: Vec<f64> = rows
                .iter()
                .filter(|q| &q.regime == g && q.kind != "clean")
                .map(|q| f(&q.s))
                .collect();
            let mean = |v: &[f64]| v.iter().sum::<f64>() / v.len() as f64;
            let mc = mean(&c);
            let sd =
                (c.iter().map(|x| (x - mc).powi(2)).sum::<f64>() / (c.len() - 1) as f64).sqrt();
            let max_c = c.iter().copied().fold(f64::MIN, f64::max);
            let min_a = a.iter().copied().fold(f64::MAX, f64::min);
            format!("{:.1} / {:.1}", (mean(&a) - mc) / sd, (min_a - max_c) / sd)
        };
        println!(
            "{:<24} {:>22} {:>22}",
            g,
            sep(|s| s.flagged_share),
            sep(|s| s.mean_suspicion)
        );
    }
    println!();
    println!("# per regime and kind: min / median / max of each signal");
    println!(
        "{:<24} {:<8} {:>26} {:>29} {:>26} {:>26}",
        "regime", "kind", "repair cost", "damage (nats)", "flagged share", "mean suspicion"
    );
    let mut seen: Vec<(String, &str)> = Vec::new();
    for r in &rows {
        let key = (r.regime.clone(), r.kind);
        if seen.contains(&key) {
            continue;
        }
        seen.push(key);
        let pick = |f: fn(&BatchSignals) -> f64| {
            let mut v: Vec<f64> = rows
                .iter()
                .filter(|q| q.regime == r.regime && q.kind == r.kind)
                .map(|q| f(&q.s))
                .collect();
            v.sort_by(f64::total_cmp);
            format!(
                "{:.4}/{:.4}/{:.4}",
                v[0],
                labelweir::policy::median(&v),
                v[v.len() - 1]
            )
        };
        println!(
            "{:<24} {:<8} {:>26} {:>29} {:>26} {:>26}",
            r.regime,
            r.kind,
            pick(|s| s.repair_cost),
            pick(|s| s.damage),
            pick(|s| s.flagged_share),
            pick(|s| s.mean_suspicion)
        );
    }
}

/// AUROC by the Mann–Whitney statistic (ties count one half).
fn auroc(score: &[f64], positive: &[bool]) -> f64 {
    let pos: Vec<f64> = (0..score.len())
        .filter(|&i| positive[i])
        .map(|i| score[i])
        .collect();
    let neg: Vec<f64> = (0..score.len())
        .filter(|&i| !positive[i])
        .map(|i| score[i])
        .collect();
    if pos.is_empty() || neg.is_empty() {
        return f64::NAN;
    }
    let mut u = 0.0;
    for p in &pos {
        for n in &neg {
            u += if p > n {
                1.0
            } else if p == n {
                0.5
            } else {
                0.0
            };
        }
    }
    u / (pos.len() * neg.len()) as f64
}
