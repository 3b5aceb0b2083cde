//! `labelweir bench scale`: the engine on embedding-sized feature spaces, measured, never asserted.
//!
//! **Invented data.** The recycling plant's sorting line is imagined with `K` material grades whose items
//! an encoder turns into `d`-dimension embeddings: each item has a latent description `z ∈ ℝ¹⁶` (its grade's
//! centre plus Gaussian spread), and a fixed random encoder drawn from the seed maps it to
//! `x = tanh(W z / 4 + b) + 0.05 ε` (`W` standard normal `d × 16`, `b` uniform in `[−0.5, 0.5]`, `ε`
//! standard normal). No pretrained model and no real data are involved.
//!
//! For each `(d, K)`: a trusted set of 10 items per grade, a pool fitted once and summarised (its
//! summary then stands for 1,000,000 items: the pool enters scoring only through its summary), and a
//! 1,000-item batch under 10 % uniform flips and 10 % region flips (the items nearest one centre relabelled
//! to one grade; the systematic-bias setting of Zhang, Zhu & Wright, "Training Set Debugging Using Trusted
//! Items", AAAI 2018). Reported: the median scoring time (and the first run's, which also pays for the
//! trusted set's own cross-validation; the engine remembers it for the batches after), the summary's
//! memory, convergence (in every run, or from the second on), AUROC of the
//! suspicions against the planted flips (Hanley & McNeil 1982), and — where the exact dense computation
//! is affordable — its agreement with the Kronecker-factored one on the same problem (Spearman's ρ of the
//! suspicions and the share of the top 20).
//!
//! A high suspicion is a reason for human review, not proof that a vendor mislabeled anything.

use std::time::Instant;

use ndarray::{Array1, Array2};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rand_distr::{Distribution, StandardNormal};
use serde::Serialize;

use crate::eval::metrics::{auroc, spearman, top_k_set};
use crate::model::{
    assess, Assessment, FeatureMap, ModelError, ModelSettings, PoolInput, PoolSummary,
    Standardizer, TrustedInput,
};

/// What to run.
#[derive(Debug, Clone)]
pub struct ScaleOptions {
    /// The subset `d ∈ {32, 128, 384, 768}`, `K ∈ {8, 20}`, one timing repetition.
    pub quick: bool,
    /// Master seed.
    pub seed: u64,
    /// Engine settings (the dense threshold among them).
    pub settings: ModelSettings,
    /// Only these `(d, K)` cases, when given.
    pub only: Option<Vec<(usize, usize)>>,
}

/// Agreement of the Kronecker-factored engine with the exact dense computation on one problem.
#[derive(Debug, Clone, Serialize)]
pub struct Agreement {
    /// Spearman's ρ between the two engines' suspicions (uniform flips).
    pub spearman: Option<f64>,
    /// Items shared by the two top-20 lists.
    pub top20_shared: usize,
    /// Milliseconds of the dense computation.
    pub dense_ms: f64,
    /// Milliseconds of the Kronecker-factored computation (forced below the threshold).
    pub kron_ms: f64,
}

/// One `(d, K)` case.
#[derive(Debug, Clone, Serialize)]
pub struct ScaleRow {
    /// Features `d`.
    pub features: usize,
    /// Classes `K`.
    pub classes: usize,
    /// Learner parameters `(d + 1)·K`.
    pub params: usize,
    /// `"dense"` or `"kronecker"`: the curvature the engine keeps at this size under the settings.
    pub curvature: String,
    /// Items the pool summary was fitted on (it then stands for `pool_items`).
    pub pool_fit_items: usize,
    /// Pool size the summary stands for.
    pub pool_items: u64,
    /// Milliseconds to fit the summary (once per workspace, not per batch).
    pub summary_fit_ms: f64,
    /// Median scoring time of the 1,000-item batch, milliseconds.
    pub median_ms: f64,
    /// The first run's scoring time, milliseconds: the first batch against this trusted set in the
    /// process, which also pays for the trusted set's own cross-validation (remembered for the batches
    /// after it).
    pub first_ms: f64,
    /// Timing repetitions.
    pub repeats: usize,
    /// Bytes held by the summary.
    pub summary_bytes: usize,
    /// Every solve converged and the time budget held, in every run of the case.
    pub converged: bool,
    /// The same in every run after the first (what a workspace sees from its second batch against one
    /// trusted set on).
    pub converged_after_first: bool,
    /// AUROC under 10 % uniform flips.
    pub auroc_uniform: Option<f64>,
    /// AUROC under 10 % region flips.
    pub auroc_region: Option<f64>,
    /// Agreement with the exact dense computation, where it runs.
    pub agreement: Option<Agreement>,
    /// Notes from the engine's convergence record, if any solve stopped early.
    pub notes: Vec<String>,
}

/// Largest `p·K` for which the dense comparison is run (a `(p·K)²` Hessian of at most ~140 MB).
const DENSE_COMPARISON_MAX: usize = 4200;

/// The cases of the sweep.
pub fn cases(quick: bool) -> Vec<(usize, usize)> {
    let (ds, ks): (&[usize], &[usize]) = if quick {
        (&[32, 128, 384, 768], &[8, 20])
    } else {
        (&[32, 128, 384, 768, 1024], &[8, 20, 100])
    };
    ks.iter()
        .flat_map(|&k| ds.iter().map(move |&d| (d, k)))
        .collect()
}

/// Invented embeddings of sorted items (module docs).
struct Line {
    centres: Array2<f64>,
    w: Array2<f64>,
    b: Array1<f64>,
}

const LATENT: usize = 16;

impl Line {
    fn new(d: usize, k: usize, seed: u64) -> Self {
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        let mut normal = |scale: f64| {
            let z: f64 = StandardNormal.sample(&mut rng);
            z * scale
        };
        let centres = Array2::from_shape_fn((k, LATENT), |_| normal(1.6));
        let w = Array2::from_shape_fn((d, LATENT), |_| normal(1.0));
        let mut rng = ChaCha8Rng::seed_from_u64(seed ^ 0xb1a5);
        let b = Array1::from_shape_fn(d, |_| rng.random_range(-0.5..0.5));
        Self { centres, w, b }
    }

    fn sample(&self, n: usize, seed: u64) -> (Array2<f64>, Vec<usize>) {
        let k = self.centres.nrows();
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        let y: Vec<usize> = (0..n).map(|i| (i + rng.random_range(0..k)) % k).collect();
        self.encode(&y, &mut rng)
    }

    fn sample_per_class(&self, per: usize, seed: u64) -> (Array2<f64>, Vec<usize>) {
        let k = self.centres.nrows();
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        let y: Vec<usize> = (0..per * k).map(|i| i % k).collect();
        self.encode(&y, &mut rng)
    }

    fn encode(&self, y: &[usize], rng: &mut ChaCha8Rng) -> (Array2<f64>, Vec<usize>) {
        let d = self.w.nrows();
        let mut z = Array2::<f64>::zeros((y.len(), LATENT));
        for (i, &c) in y.iter().enumerate() {
            for j in 0..LATENT {
                let e: f64 = StandardNormal.sample(rng);
                z[[i, j]] = self.centres[[c, j]] + e;
            }
        }
        let mut x = z.dot(&self.w.t()) / (LATENT as f64).sqrt() + &self.b;
        x.mapv_inplace(f64::tanh);
        for v in x.iter_mut() {
            let e: f64 = StandardNormal.sample(rng);
            *v += 0.05 * e;
        }
        debug_assert_eq!(x.ncols(), d);
        (x, y.to_vec())
    }
}

/// Every solve converged and nothing ran out of time.
fn converged(a: &Assessment) -> bool {
    let c = &a.convergence;
    c.inner_converged && c.linear_converged && !c.budget_exhausted
}

fn suspicions(a: &Assessment) -> Vec<f64> {
    a.items.iter().map(|i| i.suspicion).collect()
}

/// One problem of the sweep: data, the fitted summary, and the two attacked batches.
struct Problem {
    st: Standardizer,
    trusted_x: Array2<f64>,
    trusted_y: Vec<usize>,
    batch_x: Array2<f64>,
    uniform: (Vec<usize>, Vec<bool>),
    region: (Vec<usize>, Vec<bool>),
    pool_x: Array2<f64>,
    pool_y: Vec<usize>,
}

impl Problem {
    fn new(d: usize, k: usize, seed: u64) -> Result<Self, ModelError> {
        let line = Line::new(d, k, seed);
        let (trusted_x, trusted_y) = line.sample_per_class(10, seed ^ 1);
        let pool_n = (30 * k).max(2000);
        let (pool_x, pool_y) = line.sample(pool_n, seed ^ 2);
        let (batch_x, clean) = line.sample(1000, seed ^ 3);
        let uniform = crate::scenario::uniform_flips(&clean, k, 0.10, seed ^ 4);
        let region = crate::scenario::region_flips(batch_x.view(), &clean, 0, 0.10, seed ^ 5);
        let st = Standardizer::fit(&[trusted_x.view(), pool_x.view()])?;
        Ok(Self {
            st,
            trusted_x,
            trusted_y,
            batch_x,
            uniform,
            region,
            pool_x,
            pool_y,
        })
    }

    fn summary(&self, settings: &ModelSettings, k: usize) -> Result<PoolSummary, ModelError> {
        let fm = FeatureMap::new(self.st.clone(), settings.feature_map, settings.seed)?;
        let (mut s, _) = PoolSummary::fit(settings, fm, k, self.pool_x.view(), &self.pool_y)?;
        s.n = 1_000_000;
        s.exact_at_n = s.n;
        s.prepare();
        Ok(s)
    }

    fn assess(
        &self,
        settings: &ModelSettings,
        k: usize,
        summary: &PoolSummary,
        labels: &[usize],
    ) -> Result<(Assessment, f64), ModelError> {
        let weight = Array1::ones(self.trusted_y.len());
        let t = Instant::now();
        let a = assess(
            settings,
            &self.st,
            k,
            TrustedInput {
                x: self.trusted_x.view(),
                y: &self.trusted_y,
                weight: weight.view(),
            },
            PoolInput::Summary(summary),
            self.batch_x.view(),
            labels,
        )?;
        Ok((a, t.elapsed().as_secs_f64() * 1e3))
    }
}

/// Run one `(d, K)` case.
pub fn run_case(opts: &ScaleOptions, d: usize, k: usize) -> Result<ScaleRow, ModelError> {
    let settings = &opts.settings;
    let prob = Problem::new(d, k, opts.seed ^ ((d as u64) << 8) ^ k as u64)?;
    let params = (d + 1) * k;
    let t = Instant::now();
    let summary = prob.summary(settings, k)?;
    let summary_fit_ms = t.elapsed().as_secs_f64() * 1e3;
    let repeats = if opts.quick { 1 } else { 3 };
    let mut times = Vec::with_capacity(repeats);
    let mut ok = true;
    let mut ok_after_first = true;
    let mut notes = Vec::new();
    let mut uniform = None;
    for rep in 0..repeats {
        let (a, ms) = prob.assess(settings, k, &summary, &prob.uniform.0)?;
        times.push(ms);
        ok &= converged(&a);
        if rep > 0 {
            ok_after_first &= converged(&a);
        }
        notes.extend(a.convergence.notes.iter().cloned());
        uniform = Some(a);
    }
    let first_ms = times[0];
    times.sort_by(f64::total_cmp);
    let uniform = uniform.expect("at least one repetition");
    let (region, _) = prob.assess(settings, k, &summary, &prob.region.0)?;
    ok &= converged(&region);
    ok_after_first &= converged(&region);
    notes.extend(region.convergence.notes.iter().cloned());
    notes.sort();
    notes.dedup();
    let agreement = if params <= DENSE_COMPARISON_MAX {
        Some(agreement(&prob, settings, k)?)
    } else {
        None
    };
    Ok(ScaleRow {
        features: d,
        classes: k,
        params,
        curvature: if summary.kron.is_some() {
            "kronecker"
        } else {
            "dense"
        }
        .into(),
        pool_fit_items: prob.pool_y.len(),
        pool_items: summary.n,
        summary_fit_ms,
        median_ms: times[times.len() / 2],
        first_ms,
        repeats,
        summary_bytes: summary.memory_bytes(),
        converged: ok,
        converged_after_first: ok_after_first,
        auroc_uniform: auroc(&suspicions(&uniform), &prob.uniform.1),
        auroc_region: auroc(&suspicions(&region), &prob.region.1),
        agreement,
        notes,
    })
}

/// The same problem (uniform flips) scored with a dense summary and dense solves, and with Kronecker
/// factors forced (the dense threshold set to 0).
fn agreement(prob: &Problem, settings: &ModelSettings, k: usize) -> Result<Agreement, ModelError> {
    let dense_settings = ModelSettings {
        dense_max_params: usize::MAX,
        ..settings.clone()
    };
    let kron_settings = ModelSettings {
        dense_max_params: 0,
        ..settings.clone()
    };
    let ds = prob.summary(&dense_settings, k)?;
    let ks = prob.summary(&kron_settings, k)?;
    let (a, dense_ms) = prob.assess(&dense_settings, k, &ds, &prob.uniform.0)?;
    let (b, kron_ms) = prob.assess(&kron_settings, k, &ks, &prob.uniform.0)?;
    let (sa, sb) = (suspicions(&a), suspicions(&b));
    let (ta, tb) = (top_k_set(&sa, 20), top_k_set(&sb, 20));
    Ok(Agreement {
        spearman: spearman(&sa, &sb),
        top20_shared: ta.iter().filter(|i| tb.contains(i)).count(),
        dense_ms,
        kron_ms,
    })
}

/// Run the sweep; `progress` receives one line per finished case.
pub fn run(
    opts: &ScaleOptions,
    mut progress: impl FnMut(&str),
) -> Result<Vec<ScaleRow>, ModelError> {
    let list = opts.only.clone().unwrap_or_else(|| cases(opts.quick));
    let mut rows = Vec::with_capacity(list.len());
    for (d, k) in list {
        let row = run_case(opts, d, k)?;
        progress(&render_row(&row));
        rows.push(row);
    }
    Ok(rows)
}

fn opt(v: Option<f64>) -> String {
    v.map_or_else(|| "-".into(), |x| format!("{x:.3}"))
}

fn render_row(r: &ScaleRow) -> String {
    let agree = r.agreement.as_ref().map_or_else(
        || "-".to_string(),
        |a| {
            format!(
                "rho {} top20 {}/20 (dense {:.0} ms)",
                opt(a.spearman),
                a.top20_shared,
                a.dense_ms
            )
        },
    );
    format!(
        "d {:>5} K {:>3} p*K {:>6} {:<9} median {:>8.0} ms (first {:.0} ms)  summary {:>7.1} MB (fit {:.1} s)  converged {:<3}  AUROC uniform {} region {}  vs dense: {}",
        r.features,
        r.classes,
        r.params,
        r.curvature,
        r.median_ms,
        r.first_ms,
        r.summary_bytes as f64 / 1e6,
        r.summary_fit_ms / 1e3,
        match (r.converged, r.converged_after_first) {
            (true, _) => "yes",
            (false, true) => "from the 2nd batch",
            (false, false) => "no",
        },
        opt(r.auroc_uniform),
        opt(r.auroc_region),
        agree
    )
}

/// The sweep as text: one line per case, then the notes of cases that did not converge.
pub fn render_text(rows: &[ScaleRow]) -> String {
    let mut out = String::from(
        "scale sweep: 1,000-item batch against a pool summary standing for 1,000,000 items (invented embeddings)\n",
    );
    for r in rows {
        out.push_str(&render_row(r));
        out.push('\n');
    }
    for r in rows.iter().filter(|r| !r.notes.is_empty()) {
        out.push_str(&format!("notes d {} K {}:\n", r.features, r.classes));
        for n in &r.notes {
            out.push_str(&format!("  {n}\n"));
        }
    }
    out.push_str("A suspicion is a reason for human review, not proof.\n");
    out
}
