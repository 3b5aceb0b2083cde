//! The attack benchmark behind `labelweir bench engine`.
//!
//! For each data source (iris and red-wine quality shipped by the `linfa-datasets` crate, and the
//! fictional recycling plant of [`crate::scenario`]) and each repetition:
//!
//! 1. **Split.** At most 10 trusted items per class (fewer for a class too small to spare them: at most a
//!    third of its items), then a clean pool and a batch drawn from the rest. The plant draws each part
//!    from its own generator instead.
//! 2. **Attack.** The batch's labels are flipped with a published recipe ([`crate::scenario`]): uniform
//!    random flips, class-targeted flips `a → b` and region (systematic) flips, at 5%, 10% and 20% of the
//!    batch; on the plant also a sub-population flip (a vendor who labels wet cardboard as paper). The clean
//!    batch is assessed too.
//! 3. **Score.** The engine ([`crate::model::assess`], incremental mode against a pool summary, exactly
//!    what the daemon does) and the two [`super::baselines`] score every batch item; the engine's three
//!    signals are also ranked alone (ablation): the repair path (`path_score`), the reference model
//!    (`reference_disagreement`) and their combination (`suspicion`). A [`CEILING`] row — the learner given
//!    the batch's true labels — shows what any detector or proposer built on this learner can reach.
//! 4. **Measure.** Item-level AUROC, average precision, precision at recall ½ and proposed-label accuracy
//!    among the top `k` ([`super::metrics`]); the batch's repair cost, damage and the default policy's
//!    cold-start verdict ([`crate::policy::decide_batch`] with an empty vendor history) with the rules
//!    behind it; the engine against the better baseline paired by repetition ([`PairedDifference`]).
//!
//! A scale section times the scoring of a 1,000-item plant batch (32 sensor readings, 8 classes) against
//! pool summaries of 10,000, 100,000 and 1,000,000 items. A summary is a fixed-size second-order model
//! of the pool's *mean* loss, so the 100k and 1M summaries are the exact 10k summary with its item count
//! set to the larger pool (the mean gradient and Hessian of a larger sample from the same plant are the
//! same quantities, estimated better); scoring reads only the summary, never the pool's items.
//!
//! All randomness is seeded; the same options give the same report (timings aside).

use std::time::{Duration, Instant};

use ndarray::{Array1, Array2, ArrayView2, Axis};
use rand::seq::SliceRandom;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use serde::Serialize;

use super::baselines::{
    argmax, cross_validated_loss, fit_predict, nearest_trusted, BaselineScores,
};
use super::metrics::{
    auroc, average_precision, precision_at_recall, spearman, top_k_labels, top_k_set, TopKLabels,
};
use crate::model::{
    assess, Assessment, FeatureMap, ModelError, ModelSettings, PoolInput, PoolSummary,
    Standardizer, TrustedInput,
};
use crate::policy::{decide_batch, BatchSignals, PolicySettings, VendorHistory, Verdict};
use crate::scenario::{self, Plant};

/// What to run.
#[derive(Debug, Clone)]
pub struct BenchOptions {
    /// Smaller pools and batches, one repetition, fewer timing repeats (well under a minute in release).
    pub quick: bool,
    /// Master seed; every split, attack and model draw derives from it.
    pub seed: u64,
    /// Engine settings (the `[model]` section).
    pub settings: ModelSettings,
    /// Run the scale section (pool sizes 10k, 100k, 1M).
    pub scale: bool,
}

impl Default for BenchOptions {
    fn default() -> Self {
        Self {
            quick: false,
            seed: 2018,
            settings: ModelSettings::default(),
            scale: true,
        }
    }
}

/// Errors of the benchmark: the engine refused an input (a bug in the benchmark or the engine).
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum BenchError {
    /// The engine returned an error.
    #[error("{case}: {source}")]
    Model {
        /// Which case was running.
        case: String,
        /// The engine's error.
        source: ModelError,
    },
}

/// One planted attack.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
#[serde(rename_all = "snake_case", tag = "kind")]
pub enum Attack {
    /// No flips: the clean batch.
    Clean,
    /// Uniform random flips of a fraction `rate` of the batch (Xiao, Xiao & Eckert, ECAI 2012).
    Uniform {
        /// Fraction of the batch flipped.
        rate: f64,
    },
    /// Class-targeted flips `a → b`: `rate · n_batch` items of class `a` (at most 45% of the class, so
    /// that `a` stays the majority label of its items as the pair-noise protocol requires) get label `b`;
    /// `a` is the batch's largest class, `b` the class whose pool centroid is nearest to `a`'s.
    Targeted {
        /// Fraction of the batch aimed at.
        rate: f64,
    },
    /// Region flips: the `rate · n_batch` items nearest to a random centre get one random class
    /// (Zhang, Zhu & Wright 2018's systematic-bias setting).
    Region {
        /// Fraction of the batch flipped.
        rate: f64,
    },
    /// The plant only: every wet-cardboard item of the batch labelled paper.
    WetCardboardAsPaper,
    /// A labelling rule over one feature: items whose value on a (seeded) feature lies in its top `rate`
    /// quantile of the batch are all given one class — self-consistent and learnable, the systematic-bias
    /// setting of Zhang, Zhu & Wright 2018.
    FeatureRule {
        /// Share of the batch the rule covers (items already of the rule's class are left alone).
        rate: f64,
        /// Where the same bias already stands.
        pool: PoolBias,
    },
    /// A labeler that confuses one class for another: `share` of the largest class's items get the class
    /// whose pool centroid is nearest (class-conditional noise, the pair-flip setting of Natarajan et al.,
    /// "Learning with Noisy Labels", NIPS 2013), with no cap on the share.
    Confusion {
        /// Share of the class's items confused.
        share: f64,
        /// Where the same bias already stands.
        pool: PoolBias,
    },
}

/// Whether the vendor's bias is already in the pool when its batch is scored.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum PoolBias {
    /// The pool is clean.
    Clean,
    /// The same bias was accepted into the pool before (a vendor that poisoned from its first batch).
    Biased,
    /// No pool at all (cold start).
    Empty,
}

impl PoolBias {
    fn note(self) -> &'static str {
        match self {
            PoolBias::Clean => "",
            PoolBias::Biased => ", same bias in the pool",
            PoolBias::Empty => ", cold start",
        }
    }
}

impl Attack {
    /// A short name for tables.
    pub fn label(&self) -> String {
        match self {
            Attack::Clean => "clean batch".into(),
            Attack::Uniform { rate } => format!("uniform flips {:.0}%", rate * 100.0),
            Attack::Targeted { rate } => format!("class-targeted {:.0}%", rate * 100.0),
            Attack::Region { rate } => format!("region flips {:.0}%", rate * 100.0),
            Attack::FeatureRule { rate, pool } => {
                format!("feature rule {:.0}%{}", rate * 100.0, pool.note())
            }
            Attack::Confusion { share, pool } => format!(
                "class confusion {:.0}% of a class{}",
                share * 100.0,
                pool.note()
            ),
            Attack::WetCardboardAsPaper => "wet cardboard → paper".into(),
        }
    }
}

/// Ranking quality of one method on one batch (or the mean over repetitions).
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct MethodScore {
    /// Method name.
    pub method: String,
    /// Item-level AUROC (Mann–Whitney with ties).
    pub auroc: Option<f64>,
    /// Average precision.
    pub average_precision: Option<f64>,
    /// Precision at recall ½.
    pub precision_at_half_recall: Option<f64>,
    /// True bugs among the top `k` (`k` = number of planted bugs), summed over repetitions.
    pub bugs_in_top_k: usize,
    /// Of those, how many got their true label proposed, summed over repetitions.
    pub correct_proposals: usize,
}

impl MethodScore {
    /// `correct_proposals / bugs_in_top_k`.
    pub fn label_accuracy(&self) -> Option<f64> {
        (self.bugs_in_top_k > 0).then(|| self.correct_proposals as f64 / self.bugs_in_top_k as f64)
    }
}

/// The engine's own methods, the baselines and the ceiling, in table order.
pub const METHODS: [&str; 7] = [
    "labelweir (suspicion)",
    "  repair signal alone",
    "  learner doubt alone",
    "  trusted-anchored doubt alone",
    "nearest trusted (baseline)",
    "cross-validated loss (baseline)",
    CEILING,
];

/// The ceiling row: not a detector (it is given the batch's true labels), but what the learner can do at
/// best on this data.
///
/// Under uniform flips at rate `r` among `K` classes, the chance that an item with features `x` and
/// delivered label `ỹ` was flipped, `r/(K−1)·(1 − p(ỹ|x)) / [(1−r) p(ỹ|x) + r/(K−1)·(1 − p(ỹ|x))]`, falls
/// as the true conditional `p(ỹ|x)` rises; so ranking by `−ln p(ỹ|x)` is the most powerful test at every
/// threshold (Neyman–Pearson lemma), and its AUROC is the best any detector can reach. The row estimates
/// it with the engine's learner trained on the trusted items, the pool and the batch *with its true
/// labels* (in-sample for the batch, which flatters it: an optimistic ceiling). Its proposals are that
/// model's most probable class. Where a target lies above this row, no detector or proposer built on
/// this learner can meet it on this data.
pub const CEILING: &str = "ceiling (given the true labels)";

/// Results of one (source, attack) case, averaged over repetitions.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct CaseReport {
    /// Data source.
    pub source: String,
    /// The attack.
    pub attack: Attack,
    /// Repetitions averaged.
    pub runs: usize,
    /// Batch size.
    pub batch_items: usize,
    /// Planted bugs, mean over repetitions.
    pub bugs: f64,
    /// Repair cost, mean.
    pub repair_cost: f64,
    /// Repair cost, largest over repetitions.
    pub repair_cost_max: f64,
    /// Repetitions whose repair path reached the trusted-loss target.
    pub target_reached: usize,
    /// Damage (nats), mean.
    pub damage: f64,
    /// Repetitions the default cold-start policy would quarantine.
    pub quarantined: usize,
    /// The policy rules behind those quarantines, with how many repetitions each fired in.
    pub quarantine_reasons: Vec<(String, usize)>,
    /// Whether every inner and linear solve converged, in every repetition.
    pub converged: bool,
    /// Engine wall time per assessment, mean (ms).
    pub engine_ms: f64,
    /// Share of the batch's items whose true label is the pool model's most probable class, mean: a ceiling
    /// for proposals from any model of the learner's capacity trained on this pool.
    pub learner_accuracy: f64,
    /// Share of the batch's items flagged (suspicion ≥ the flag threshold), mean over repetitions.
    pub flagged_share: f64,
    /// The batch's estimated share of wrong labels, mean.
    pub estimated_wrong_share: f64,
    /// Mean repair weight the trusted audit gave the batch's items, mean over repetitions.
    pub mean_repair_weight: f64,
    /// Per-method ranking quality (empty for the clean batch).
    pub methods: Vec<MethodScore>,
    /// The engine minus the better baseline (by mean average precision), paired by repetition: mean and
    /// standard error of the differences in AUROC and in AP (absent for the clean batch or one repetition).
    pub paired_vs_baseline: Option<PairedDifference>,
}

/// Mean and standard error of per-repetition differences (engine − better baseline).
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct PairedDifference {
    /// Mean AUROC difference.
    pub auroc_mean: f64,
    /// Its standard error, `sd / √R` over `R` repetitions.
    pub auroc_se: f64,
    /// Mean AP difference.
    pub ap_mean: f64,
    /// Its standard error.
    pub ap_se: f64,
}

impl PairedDifference {
    /// Whether neither difference is below zero by more than two standard errors: a shortfall that the
    /// repetitions cannot tell from noise (a two-sided 95 % interval that contains 0; standard practice).
    pub fn within_noise(&self) -> bool {
        self.auroc_mean >= -2.0 * self.auroc_se && self.ap_mean >= -2.0 * self.ap_se
    }
}

/// Paired differences between method `a` and method `b` over the repetitions.
fn paired(runs: &[Run], a: usize, b: usize) -> Option<PairedDifference> {
    let r = runs.len();
    if r < 2 {
        return None;
    }
    let stat = |f: fn(&MethodScore) -> Option<f64>| -> Option<(f64, f64)> {
        let d: Vec<f64> = runs
            .iter()
            .map(|run| Some(f(&run.methods[a])? - f(&run.methods[b])?))
            .collect::<Option<_>>()?;
        let n = d.len() as f64;
        let mean = d.iter().sum::<f64>() / n;
        let var = d.iter().map(|x| (x - mean).powi(2)).sum::<f64>() / (n - 1.0);
        Some((mean, (var / n).sqrt()))
    };
    let (auroc_mean, auroc_se) = stat(|m| m.auroc)?;
    let (ap_mean, ap_se) = stat(|m| m.average_precision)?;
    Some(PairedDifference {
        auroc_mean,
        auroc_se,
        ap_mean,
        ap_se,
    })
}

/// Incremental (pool summary) against exact (pool re-solve) mode on one attacked batch.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct ModeAgreement {
    /// Data source.
    pub source: String,
    /// The attack.
    pub attack: Attack,
    /// Spearman's ρ between the two modes' suspicions.
    pub spearman: Option<f64>,
    /// Items shared by the two modes' top 20 (of `min(20, n)`).
    pub top20_shared: usize,
    /// `min(20, n)`.
    pub top20_of: usize,
    /// Repair cost, incremental mode.
    pub repair_cost_summary: f64,
    /// Repair cost, exact mode.
    pub repair_cost_exact: f64,
    /// Damage (nats), incremental mode.
    pub damage_summary: f64,
    /// Damage (nats), exact mode.
    pub damage_exact: f64,
    /// Exact-mode wall time (ms).
    pub exact_ms: f64,
    /// Incremental-mode wall time (ms).
    pub summary_ms: f64,
}

/// Scoring time against one pool size.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct ScaleTiming {
    /// Items the pool summary stands for.
    pub pool_items: u64,
    /// Batch items scored.
    pub batch_items: usize,
    /// Features per item.
    pub features: usize,
    /// Classes.
    pub classes: usize,
    /// Median wall time of one assessment (ms).
    pub median_ms: f64,
    /// Fastest and slowest repetition (ms).
    pub min_ms: f64,
    /// Slowest repetition (ms).
    pub max_ms: f64,
    /// Repetitions timed.
    pub repeats: usize,
    /// Bytes held by the pool summary.
    pub summary_bytes: usize,
    /// Time to build the exact 10k summary the larger ones derive from (ms).
    pub summary_build_ms: f64,
    /// Time to absorb the scored batch into the summary (the daemon's accept step) (ms).
    pub absorb_ms: f64,
    /// Engine phases of the median run (ms): reference model, training on pool ∪ batch, repair path.
    pub phase_ms: [f64; 3],
}

/// The pool sweep's cost: `labelweir pool sweep` scores the pool in stored batches; here a million plant
/// items in chunks of 10,000 against the 10k summary standing for a million-item pool.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct SweepTiming {
    /// Items swept.
    pub items: usize,
    /// Items per chunk.
    pub chunk: usize,
    /// Fitting the trusted-anchored model (ms).
    pub fit_ms: f64,
    /// Scoring every chunk (ms; generating the items is not counted).
    pub score_ms: f64,
    /// Items per second.
    pub items_per_s: f64,
    /// Bytes held while sweeping: the summary, the scorer's trusted rows and parameters, one chunk's raw
    /// features and its mapped rows and probabilities (`chunk × (d + 2·(p + K))` doubles).
    pub memory_bytes: usize,
}

/// Pass / miss against one target of the issue.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct TargetCheck {
    /// What is checked.
    pub target: String,
    /// Whether it is met.
    pub met: bool,
    /// The measured value(s), in words.
    pub measured: String,
    /// A missed target that lies above what the [`CEILING`] row (the learner given the batch's true
    /// labels) reaches on this data: no detector or proposer built on this learner could meet it here.
    pub beyond_ceiling: bool,
    /// A missed "at least matches the better baseline" whose shortfall is within two paired standard
    /// errors over the repetitions ([`PairedDifference::within_noise`]). Still counted as missed.
    pub tie_within_noise: bool,
}

/// The whole benchmark report (serialised for `--json`).
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct BenchReport {
    /// Quick mode.
    pub quick: bool,
    /// Master seed.
    pub seed: u64,
    /// Engine settings used.
    pub settings: ModelSettings,
    /// One entry per (source, attack).
    pub cases: Vec<CaseReport>,
    /// Incremental against exact mode.
    pub mode_agreement: Vec<ModeAgreement>,
    /// Scoring time against growing pools.
    pub scale: Vec<ScaleTiming>,
    /// The pool sweep over a million plant items (with the scale section).
    pub sweep: Option<SweepTiming>,
    /// The targets, checked.
    pub targets: Vec<TargetCheck>,
    /// Total wall time (s).
    pub wall_seconds: f64,
}

/// A labelled data source.
struct Source {
    name: &'static str,
    x: Array2<f64>,
    y: Vec<usize>,
    n_classes: usize,
}

/// One repetition's split.
struct Split {
    trusted_x: Array2<f64>,
    trusted_y: Vec<usize>,
    pool_x: Array2<f64>,
    pool_y: Vec<usize>,
    batch_x: Array2<f64>,
    batch_y: Vec<usize>,
    /// Plant sub-population of each batch item (plant only).
    batch_sub: Option<Vec<usize>>,
}

/// Sizes per source: `(pool, batch)`.
fn sizes(name: &str, quick: bool) -> (usize, usize) {
    match (name, quick) {
        ("iris", _) => (60, 60),
        ("winequality", true) => (600, 300),
        ("winequality", false) => (1000, 500),
        (_, true) => (1000, 300),
        (_, false) => (3000, 500),
    }
}

/// Repetitions per source. A 60-item iris batch holds 3 bugs at 5 %, so one rank swap moves its average
/// precision by ~0.05: 3 repetitions cannot tell the methods apart, 20 can (and cost milliseconds each).
fn repetitions(name: &str, quick: bool) -> usize {
    match (name, quick) {
        (_, true) => 1,
        ("iris", false) => 20,
        ("winequality", false) => 10,
        (_, false) => 5,
    }
}

/// Renumber targets to `0..K` in sorted order.
fn dense(targets: &[usize]) -> (Vec<usize>, usize) {
    let mut classes = targets.to_vec();
    classes.sort_unstable();
    classes.dedup();
    let y = targets
        .iter()
        .map(|t| classes.binary_search(t).unwrap_or(0))
        .collect();
    (y, classes.len())
}

fn open_sources() -> Vec<Source> {
    let iris = linfa_datasets::iris();
    let (y, k) = dense(
        iris.targets()
            .as_slice()
            .unwrap_or(&iris.targets().to_vec()),
    );
    let wine = linfa_datasets::winequality();
    let (wy, wk) = dense(
        wine.targets()
            .as_slice()
            .unwrap_or(&wine.targets().to_vec()),
    );
    vec![
        Source {
            name: "iris",
            x: iris.records().to_owned(),
            y,
            n_classes: k,
        },
        Source {
            name: "winequality",
            x: wine.records().to_owned(),
            y: wy,
            n_classes: wk,
        },
    ]
}

/// At most 10 trusted items per class (at most a third of the class), then pool and batch from the rest.
fn split_open(src: &Source, pool_n: usize, batch_n: usize, seed: u64) -> Split {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let mut trusted = Vec::new();
    let mut rest = Vec::new();
    for c in 0..src.n_classes {
        let mut members: Vec<usize> = (0..src.y.len()).filter(|&i| src.y[i] == c).collect();
        members.shuffle(&mut rng);
        let t = 10.min(members.len() / 3).max(1.min(members.len()));
        trusted.extend_from_slice(&members[..t]);
        rest.extend_from_slice(&members[t..]);
    }
    rest.shuffle(&mut rng);
    let batch_n = batch_n.min(rest.len() / 2);
    let pool_n = pool_n.min(rest.len() - batch_n);
    let pool = &rest[..pool_n];
    let batch = &rest[pool_n..pool_n + batch_n];
    let pick = |idx: &[usize]| {
        (
            src.x.select(Axis(0), idx),
            idx.iter().map(|&i| src.y[i]).collect::<Vec<_>>(),
        )
    };
    let (trusted_x, trusted_y) = pick(&trusted);
    let (pool_x, pool_y) = pick(pool);
    let (batch_x, batch_y) = pick(batch);
    Split {
        trusted_x,
        trusted_y,
        pool_x,
        pool_y,
        batch_x,
        batch_y,
        batch_sub: None,
    }
}

fn split_plant(plant: &Plant, pool_n: usize, batch_n: usize, seed: u64) -> Split {
    let (trusted_x, trusted_y) = plant.sample_per_class(10, seed ^ 0x7157);
    let (pool_x, pool_y) = plant.sample(pool_n, seed ^ 0x9001);
    let b = plant.sample_detailed(batch_n, seed ^ 0xBA7C);
    Split {
        trusted_x,
        trusted_y,
        pool_x,
        pool_y,
        batch_x: b.x,
        batch_y: b.y,
        batch_sub: Some(b.subpopulation),
    }
}

/// The class whose pool centroid (standardised) is nearest to class `a`'s.
fn nearest_class(
    st: &Standardizer,
    x: ArrayView2<'_, f64>,
    y: &[usize],
    k: usize,
    a: usize,
) -> usize {
    let z = match st.transform(x) {
        Ok(z) => z,
        Err(_) => return (a + 1) % k,
    };
    let centroid = |c: usize| -> Option<Array1<f64>> {
        let rows: Vec<usize> = (0..y.len()).filter(|&i| y[i] == c).collect();
        (!rows.is_empty()).then(|| {
            z.select(Axis(0), &rows)
                .mean_axis(Axis(0))
                .unwrap_or_default()
        })
    };
    let Some(ca) = centroid(a) else {
        return (a + 1) % k;
    };
    (0..k)
        .filter(|&c| c != a)
        .filter_map(|c| centroid(c).map(|cc| (c, (&cc - &ca).mapv(|v| v * v).sum())))
        .min_by(|u, v| u.1.total_cmp(&v.1))
        .map_or((a + 1) % k, |(c, _)| c)
}

/// Apply an attack; returns the delivered labels and the mask of planted bugs.
fn apply_attack(
    attack: Attack,
    split: &Split,
    st: &Standardizer,
    k: usize,
    seed: u64,
) -> (Vec<usize>, Vec<bool>) {
    let y = &split.batch_y;
    let n = y.len();
    match attack {
        Attack::Clean => (y.clone(), vec![false; n]),
        Attack::Uniform { rate } => scenario::uniform_flips(y, k, rate, seed),
        Attack::Targeted { rate } => {
            let mut counts = vec![0usize; k];
            for &c in y {
                counts[c] += 1;
            }
            let a = (0..k)
                .max_by_key(|&c| (counts[c], std::cmp::Reverse(c)))
                .unwrap_or(0);
            let b = nearest_class(st, split.pool_x.view(), &split.pool_y, k, a);
            let within = (rate * n as f64 / counts[a].max(1) as f64).min(0.45);
            scenario::targeted_flips(y, a, b, within, seed)
        }
        Attack::FeatureRule { .. } | Attack::Confusion { .. } => {
            systematic_labels(attack, split, st, k, seed, split.batch_x.view(), y)
        }
        Attack::Region { rate } => {
            let to = ChaCha8Rng::seed_from_u64(seed ^ 0x4E61).random_range(0..k);
            scenario::region_flips(split.batch_x.view(), y, to, rate, seed)
        }
        Attack::WetCardboardAsPaper => {
            let plant = Plant::new(0);
            let wet = plant
                .subpopulation_index("wet_cardboard")
                .unwrap_or(usize::MAX);
            let subs = split.batch_sub.clone().unwrap_or_default();
            scenario::subpopulation_flips(y, &subs, &[wet], scenario::class::PAPER, 1.0, seed)
        }
    }
}

fn method_score(
    name: &str,
    scores: &[f64],
    positive: &[bool],
    proposed: &[usize],
    truth: &[usize],
) -> MethodScore {
    let t: TopKLabels = top_k_labels(scores, positive, proposed, truth);
    MethodScore {
        method: name.to_string(),
        auroc: auroc(scores, positive),
        average_precision: average_precision(scores, positive),
        precision_at_half_recall: precision_at_recall(scores, positive, 0.5),
        bugs_in_top_k: t.bugs_in_top_k,
        correct_proposals: t.correct_proposals,
    }
}

/// One repetition of one case.
struct Run {
    bugs: usize,
    assessment: Assessment,
    engine_ms: f64,
    learner_accuracy: f64,
    verdict: Verdict,
    /// The rules that quarantined the batch (empty when accepted).
    reasons: Vec<&'static str>,
    methods: Vec<MethodScore>,
}

#[allow(clippy::too_many_arguments)]
fn run_case(
    settings: &ModelSettings,
    st: &Standardizer,
    k: usize,
    split: &Split,
    summary: &PoolSummary,
    attack: Attack,
    seed: u64,
    case: &str,
) -> Result<Run, BenchError> {
    let model_err = |source| BenchError::Model {
        case: case.to_string(),
        source,
    };
    let (delivered, positive) = apply_attack(attack, split, st, k, seed);
    let weight = Array1::ones(split.trusted_y.len());
    let trusted = TrustedInput {
        x: split.trusted_x.view(),
        y: &split.trusted_y,
        weight: weight.view(),
    };
    let pool_bias = match attack {
        Attack::FeatureRule { pool, .. } | Attack::Confusion { pool, .. } => pool,
        _ => PoolBias::Clean,
    };
    // A biased pool carries the same rule (same seed) over its own items.
    let biased_summary = if pool_bias == PoolBias::Biased {
        let (pool_y, _) = systematic_labels(
            attack,
            split,
            st,
            k,
            seed,
            split.pool_x.view(),
            &split.pool_y,
        );
        let (s, _) = PoolSummary::fit(
            settings,
            summary.feature_map.clone(),
            k,
            split.pool_x.view(),
            &pool_y,
        )
        .map_err(model_err)?;
        Some((s, pool_y))
    } else {
        None
    };
    // What the cross-validated-loss baseline sees as the pool: the same pool the engine sees.
    let empty_x = Array2::<f64>::zeros((0, split.pool_x.ncols()));
    let (base_pool_x, base_pool_y): (ArrayView2<'_, f64>, &[usize]) =
        match (&biased_summary, pool_bias) {
            (Some((_, y)), _) => (split.pool_x.view(), y),
            (None, PoolBias::Empty) => (empty_x.view(), &[]),
            _ => (split.pool_x.view(), &split.pool_y),
        };
    let pool_input = match pool_bias {
        PoolBias::Clean => PoolInput::Summary(summary),
        PoolBias::Biased => PoolInput::Summary(biased_summary.as_ref().map_or(summary, |(s, _)| s)),
        PoolBias::Empty => PoolInput::Empty,
    };
    let t0 = Instant::now();
    let a = assess(
        settings,
        st,
        k,
        trusted,
        pool_input,
        split.batch_x.view(),
        &delivered,
    )
    .map_err(model_err)?;
    let engine_ms = ms(t0.elapsed());
    let decision = decide_batch(
        &PolicySettings::default(),
        &VendorHistory::default(),
        &BatchSignals::from_assessment(&a, settings.flag_threshold),
    );
    let verdict = decision.verdict;
    let reasons: Vec<&'static str> = if verdict == Verdict::Quarantine {
        decision.reasons.iter().map(|r| r.code.as_str()).collect()
    } else {
        Vec::new()
    };
    let bugs = positive.iter().filter(|&&p| p).count();
    let mut methods = Vec::new();
    if bugs > 0 {
        let truth = &split.batch_y;
        // The relabel a reviewer is offered for a top-k suspect: the proposed label once the item is
        // flagged, else the engine's best alternative class (`alternative_label` equals `proposed_label`
        // for every flagged item).
        let proposed: Vec<usize> = a.items.iter().map(|i| i.alternative_label).collect();
        let col =
            |f: fn(&crate::model::ItemScore) -> f64| a.items.iter().map(f).collect::<Vec<_>>();
        methods.push(method_score(
            METHODS[0],
            &col(|i| i.suspicion),
            &positive,
            &proposed,
            truth,
        ));
        methods.push(method_score(
            METHODS[1],
            &col(|i| i.repair_signal),
            &positive,
            &proposed,
            truth,
        ));
        methods.push(method_score(
            METHODS[2],
            &col(|i| i.learner_doubt),
            &positive,
            &proposed,
            truth,
        ));
        methods.push(method_score(
            METHODS[3],
            &col(|i| i.anchored_doubt),
            &positive,
            &proposed,
            truth,
        ));
        let nt: BaselineScores = nearest_trusted(
            st,
            k,
            split.trusted_x.view(),
            &split.trusted_y,
            split.batch_x.view(),
            &delivered,
        )
        .map_err(model_err)?;
        methods.push(method_score(
            METHODS[4],
            &nt.score,
            &positive,
            &nt.proposed,
            truth,
        ));
        let cv = cross_validated_loss(
            settings,
            st,
            k,
            base_pool_x,
            base_pool_y,
            split.batch_x.view(),
            &delivered,
            5,
            seed ^ 0xC5,
        )
        .map_err(model_err)?;
        methods.push(method_score(
            METHODS[5],
            &cv.score,
            &positive,
            &cv.proposed,
            truth,
        ));
        let (score, proposed) =
            ceiling_scores(settings, summary, k, split, &delivered).map_err(model_err)?;
        methods.push(method_score(CEILING, &score, &positive, &proposed, truth));
    }
    let learner_accuracy = {
        let phi = summary
            .feature_map
            .apply(split.batch_x.view())
            .map_err(model_err)?;
        let prob = crate::model::learner::predict_proba(phi.view(), &summary.theta(), k);
        let hits = prob
            .rows()
            .into_iter()
            .zip(&split.batch_y)
            .filter(|(r, &t)| r.iter().enumerate().all(|(c, &v)| c == t || v <= r[t]))
            .count();
        hits as f64 / split.batch_y.len().max(1) as f64
    };
    Ok(Run {
        bugs,
        assessment: a,
        engine_ms,
        learner_accuracy,
        verdict,
        reasons,
        methods,
    })
}

/// Scores and proposals of the [`CEILING`] row: `−ln p(delivered label)` and the most probable class under
/// the learner trained on trusted ∪ pool ∪ batch with the batch's true labels.
fn ceiling_scores(
    settings: &ModelSettings,
    summary: &PoolSummary,
    k: usize,
    split: &Split,
    delivered: &[usize],
) -> Result<(Vec<f64>, Vec<usize>), ModelError> {
    let x = ndarray::concatenate(
        Axis(0),
        &[
            split.trusted_x.view(),
            split.pool_x.view(),
            split.batch_x.view(),
        ],
    )
    .map_err(|e| ModelError::Shape(e.to_string()))?;
    let y: Vec<usize> = split
        .trusted_y
        .iter()
        .chain(&split.pool_y)
        .chain(&split.batch_y)
        .copied()
        .collect();
    let prob = fit_predict(
        settings,
        &summary.feature_map,
        k,
        x.view(),
        &y,
        split.batch_x.view(),
    )?;
    let score = delivered
        .iter()
        .zip(prob.rows())
        .map(|(&d, r)| -r[d].max(f64::MIN_POSITIVE).ln())
        .collect();
    let proposed = prob
        .rows()
        .into_iter()
        .map(|r| argmax(r.iter().copied()))
        .collect();
    Ok((score, proposed))
}

fn ms(d: Duration) -> f64 {
    d.as_secs_f64() * 1e3
}

fn mean_opt(values: impl Iterator<Item = Option<f64>>) -> Option<f64> {
    let v: Vec<f64> = values.flatten().collect();
    (!v.is_empty()).then(|| v.iter().sum::<f64>() / v.len() as f64)
}

fn aggregate(source: &str, attack: Attack, runs: &[Run], batch_items: usize) -> CaseReport {
    let n = runs.len().max(1) as f64;
    let methods = if runs.iter().all(|r| !r.methods.is_empty()) && !runs.is_empty() {
        (0..runs[0].methods.len())
            .map(|m| MethodScore {
                method: runs[0].methods[m].method.clone(),
                auroc: mean_opt(runs.iter().map(|r| r.methods[m].auroc)),
                average_precision: mean_opt(runs.iter().map(|r| r.methods[m].average_precision)),
                precision_at_half_recall: mean_opt(
                    runs.iter().map(|r| r.methods[m].precision_at_half_recall),
                ),
                bugs_in_top_k: runs.iter().map(|r| r.methods[m].bugs_in_top_k).sum(),
                correct_proposals: runs.iter().map(|r| r.methods[m].correct_proposals).sum(),
            })
            .collect()
    } else {
        Vec::new()
    };
    CaseReport {
        source: source.to_string(),
        attack,
        runs: runs.len(),
        batch_items,
        bugs: runs.iter().map(|r| r.bugs as f64).sum::<f64>() / n,
        repair_cost: runs.iter().map(|r| r.assessment.repair_cost).sum::<f64>() / n,
        repair_cost_max: runs
            .iter()
            .map(|r| r.assessment.repair_cost)
            .fold(0.0, f64::max),
        target_reached: runs.iter().filter(|r| r.assessment.target_reached).count(),
        damage: runs.iter().map(|r| r.assessment.damage).sum::<f64>() / n,
        quarantined: runs
            .iter()
            .filter(|r| r.verdict == Verdict::Quarantine)
            .count(),
        quarantine_reasons: {
            let mut counts: Vec<(String, usize)> = Vec::new();
            for code in runs.iter().flat_map(|r| r.reasons.iter()) {
                match counts.iter_mut().find(|(c, _)| c == code) {
                    Some((_, n)) => *n += 1,
                    None => counts.push(((*code).to_string(), 1)),
                }
            }
            counts
        },
        converged: runs.iter().all(|r| {
            r.assessment.convergence.inner_converged && r.assessment.convergence.linear_converged
        }),
        engine_ms: runs.iter().map(|r| r.engine_ms).sum::<f64>() / n,
        learner_accuracy: runs.iter().map(|r| r.learner_accuracy).sum::<f64>() / n,
        flagged_share: runs
            .iter()
            .map(|r| {
                let a = &r.assessment;
                a.items
                    .iter()
                    .filter(|i| i.proposed_label != i.label)
                    .count() as f64
                    / a.items.len().max(1) as f64
            })
            .sum::<f64>()
            / n,
        estimated_wrong_share: runs
            .iter()
            .map(|r| r.assessment.estimated_wrong_share)
            .sum::<f64>()
            / n,
        mean_repair_weight: runs
            .iter()
            .map(|r| r.assessment.trusted_audit.mean_repair_weight)
            .sum::<f64>()
            / n,
        paired_vs_baseline: methods
            .iter()
            .enumerate()
            .filter(|(_, m)| m.method.ends_with("(baseline)"))
            .max_by(|(_, x), (_, y)| {
                x.average_precision
                    .unwrap_or(0.0)
                    .total_cmp(&y.average_precision.unwrap_or(0.0))
            })
            .and_then(|(b, _)| paired(runs, 0, b)),
        methods,
    }
}

/// The attacks run on every source (the plant adds [`Attack::WetCardboardAsPaper`]).
pub fn attacks() -> Vec<Attack> {
    let mut v = vec![Attack::Clean];
    for rate in [0.05, 0.10, 0.20] {
        v.push(Attack::Uniform { rate });
        v.push(Attack::Targeted { rate });
        v.push(Attack::Region { rate });
    }
    for pool in [PoolBias::Clean, PoolBias::Biased, PoolBias::Empty] {
        v.push(Attack::FeatureRule { rate: 0.25, pool });
        v.push(Attack::Confusion { share: 0.4, pool });
    }
    v
}

/// The systematic attacks' labels for one set of items: `(labels, mask)`. The rule's feature, class and the
/// confused pair are fixed by `seed` and the pool (so a batch and a biased pool share the same bias).
fn systematic_labels(
    attack: Attack,
    split: &Split,
    st: &Standardizer,
    k: usize,
    seed: u64,
    x: ArrayView2<'_, f64>,
    y: &[usize],
) -> (Vec<usize>, Vec<bool>) {
    let mut rng = ChaCha8Rng::seed_from_u64(seed ^ 0x5359_5354);
    match attack {
        Attack::FeatureRule { rate, .. } => {
            let f = rng.random_range(0..x.ncols().max(1));
            let to = rng.random_range(0..k);
            let mut col: Vec<f64> = x.column(f).to_vec();
            col.sort_by(f64::total_cmp);
            let cut_at = ((1.0 - rate) * col.len() as f64).floor() as usize;
            let cut = col.get(cut_at.min(col.len().saturating_sub(1))).copied();
            let mut out = y.to_vec();
            let mut mask = vec![false; y.len()];
            if let Some(cut) = cut {
                for i in 0..y.len() {
                    if x[[i, f]] >= cut && y[i] != to {
                        out[i] = to;
                        mask[i] = true;
                    }
                }
            }
            (out, mask)
        }
        Attack::Confusion { share, .. } => {
            let mut counts = vec![0usize; k];
            for &c in &split.pool_y {
                counts[c] += 1;
            }
            let a = (0..k)
                .max_by_key(|&c| (counts[c], std::cmp::Reverse(c)))
                .unwrap_or(0);
            let b = nearest_class(st, split.pool_x.view(), &split.pool_y, k, a);
            scenario::targeted_flips(y, a, b, share, rng.random())
        }
        _ => (y.to_vec(), vec![false; y.len()]),
    }
}

/// Run the benchmark; `progress` receives one line per finished case (for a progress display on stderr).
pub fn run(opts: &BenchOptions, mut progress: impl FnMut(&str)) -> Result<BenchReport, BenchError> {
    let started = Instant::now();
    let settings = &opts.settings;
    let mut cases = Vec::new();
    let mut agreement = Vec::new();
    let plant = Plant::new(opts.seed);
    let mut sources: Vec<Source> = open_sources();
    sources.push(Source {
        name: "recycling plant",
        x: Array2::zeros((0, Plant::N_FEATURES)),
        y: Vec::new(),
        n_classes: Plant::N_CLASSES,
    });
    for (si, src) in sources.iter().enumerate() {
        let (pool_n, batch_n) = sizes(src.name, opts.quick);
        let reps = repetitions(src.name, opts.quick);
        let mut attack_list = attacks();
        if src.name == "recycling plant" {
            attack_list.push(Attack::WetCardboardAsPaper);
        }
        let mut runs: Vec<Vec<Run>> = (0..attack_list.len()).map(|_| Vec::new()).collect();
        let mut batch_items = 0;
        for rep in 0..reps {
            let seed = opts.seed ^ ((si as u64 + 1) << 32) ^ (rep as u64 * 0x9E37_79B9);
            let split = if src.name == "recycling plant" {
                split_plant(&plant, pool_n, batch_n, seed)
            } else {
                split_open(src, pool_n, batch_n, seed)
            };
            batch_items = split.batch_y.len();
            let case = format!("{} rep {rep}", src.name);
            let st = Standardizer::fit(&[
                split.trusted_x.view(),
                split.pool_x.view(),
                split.batch_x.view(),
            ])
            .map_err(|source| BenchError::Model {
                case: case.clone(),
                source,
            })?;
            let fm = FeatureMap::new(st.clone(), settings.feature_map, settings.seed).map_err(
                |source| BenchError::Model {
                    case: case.clone(),
                    source,
                },
            )?;
            let (summary, _) = PoolSummary::fit(
                settings,
                fm,
                src.n_classes,
                split.pool_x.view(),
                &split.pool_y,
            )
            .map_err(|source| BenchError::Model {
                case: case.clone(),
                source,
            })?;
            for (ai, &attack) in attack_list.iter().enumerate() {
                let case = format!("{} · {} · rep {rep}", src.name, attack.label());
                let r = run_case(
                    settings,
                    &st,
                    src.n_classes,
                    &split,
                    &summary,
                    attack,
                    seed ^ (ai as u64 * 0x1F1F),
                    &case,
                )?;
                if rep == 0
                    && (attack == Attack::Uniform { rate: 0.10 }
                        || attack == Attack::Region { rate: 0.10 })
                {
                    agreement.push(mode_agreement(
                        settings,
                        &st,
                        src.n_classes,
                        &split,
                        attack,
                        seed ^ (ai as u64 * 0x1F1F),
                        &r,
                        src.name,
                    )?);
                }
                progress(&format!("{case}: {:.0} ms", r.engine_ms));
                runs[ai].push(r);
            }
        }
        for (ai, &attack) in attack_list.iter().enumerate() {
            cases.push(aggregate(src.name, attack, &runs[ai], batch_items));
        }
    }
    let (scale, sweep) = if opts.scale {
        (
            scale_timings(opts, &plant)?,
            Some(sweep_timing(opts, &plant)?),
        )
    } else {
        (Vec::new(), None)
    };
    let targets = check_targets(&cases, &agreement, &scale);
    Ok(BenchReport {
        quick: opts.quick,
        seed: opts.seed,
        settings: settings.clone(),
        cases,
        mode_agreement: agreement,
        scale,
        sweep,
        targets,
        wall_seconds: started.elapsed().as_secs_f64(),
    })
}

#[allow(clippy::too_many_arguments)]
fn mode_agreement(
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
fn scale_timings(opts: &BenchOptions, plant: &Plant) -> Result<Vec<ScaleTiming>, BenchError> {
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
fn sweep_timing(opts: &BenchOptions, plant: &Plant) -> Result<SweepTiming, BenchError> {
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

fn fmt_opt(v: Option<f64>) -> String {
    v.map_or_else(|| "  —  ".into(), |x| format!("{x:.3}"))
}

/// Check the targets against the measurements.
///
/// "Clearly better" on region flips is our reading: average precision at least 0.05 above the better
/// baseline's. "Near zero" for a clean batch: repair cost ≤ 0.02 (under the default cold-start limit
/// of 0.05) and the default policy accepts it.
fn check_targets(
    cases: &[CaseReport],
    agreement: &[ModeAgreement],
    scale: &[ScaleTiming],
) -> Vec<TargetCheck> {
    let mut out = Vec::new();
    let engine = |c: &CaseReport| c.methods.first().cloned();
    let better_baseline = |c: &CaseReport, f: fn(&MethodScore) -> Option<f64>| {
        c.methods
            .iter()
            .filter(|m| m.method.ends_with("(baseline)"))
            .filter_map(f)
            .fold(f64::NEG_INFINITY, f64::max)
    };
    let ceiling = |c: &CaseReport| c.methods.iter().find(|m| m.method == CEILING).cloned();
    // A missed target above the ceiling row: say so, and by how much the ceiling falls short.
    let beyond = |met: bool, reach: Option<f64>, goal: f64| !met && reach.is_some_and(|r| r < goal);
    let ceiling_note = |reach: Option<f64>, what: &str| {
        reach.map_or_else(String::new, |r| {
            format!("; the learner given the batch's true labels reaches {what} {r:.3}")
        })
    };
    for c in cases {
        match c.attack {
            Attack::Clean => out.push(TargetCheck {
                target: format!(
                    "{}: clean batch repair cost near zero (≤ 0.02) and accepted",
                    c.source
                ),
                met: c.repair_cost_max <= 0.02 && c.quarantined == 0,
                measured: format!(
                    "repair cost {:.4} (max {:.4}), quarantined {}/{}",
                    c.repair_cost, c.repair_cost_max, c.quarantined, c.runs
                ),
                beyond_ceiling: false,
                tie_within_noise: false,
            }),
            attack => {
                let Some(e) = engine(c) else { continue };
                let top = ceiling(c);
                if matches!(attack, Attack::Uniform { rate } | Attack::Region { rate } if (rate - 0.10).abs() < 1e-9)
                {
                    let met = e.auroc.is_some_and(|a| a >= 0.95);
                    let reach = top.as_ref().and_then(|t| t.auroc);
                    out.push(TargetCheck {
                        target: format!("{}: {} AUROC ≥ 0.95", c.source, attack.label()),
                        met,
                        measured: format!(
                            "AUROC {}{}",
                            fmt_opt(e.auroc),
                            ceiling_note(reach, "AUROC")
                        ),
                        beyond_ceiling: beyond(met, reach, 0.95),
                        tie_within_noise: false,
                    });
                }
                let met = e.label_accuracy().is_some_and(|a| a >= 0.9);
                let reach = top.as_ref().and_then(MethodScore::label_accuracy);
                out.push(TargetCheck {
                    target: format!(
                        "{}: {} proposed labels ≥ 0.9 on true bugs in top-k",
                        c.source,
                        attack.label()
                    ),
                    met,
                    measured: format!(
                        "{}/{} = {} (the pool model's accuracy on the batch's true labels: {:.3}{})",
                        e.correct_proposals,
                        e.bugs_in_top_k,
                        fmt_opt(e.label_accuracy()),
                        c.learner_accuracy,
                        ceiling_note(reach, "on its own top-k")
                    ),
                    beyond_ceiling: beyond(met, reach, 0.9),
                tie_within_noise: false,
                });
                let (ba, bp) = (
                    better_baseline(c, |m| m.auroc),
                    better_baseline(c, |m| m.average_precision),
                );
                let (ea, ep) = (e.auroc.unwrap_or(0.0), e.average_precision.unwrap_or(0.0));
                let is_region =
                    matches!(attack, Attack::Region { .. } | Attack::WetCardboardAsPaper);
                // "Clearly better" on region flips: AP higher by ≥ 0.05, or — near the ceiling, where 0.05 may
                // not be left — at least a third of the better baseline's AP shortfall (1 − AP) removed.
                let clearly =
                    ep >= bp + 0.05 - 1e-12 || (ep > bp && 1.0 - ep <= (1.0 - bp) * 2.0 / 3.0);
                let met = ea >= ba - 1e-12 && if is_region { clearly } else { ep >= bp - 1e-12 };
                out.push(TargetCheck {
                    target: format!(
                        "{}: {} {} the better baseline (AUROC and AP{})",
                        c.source,
                        attack.label(),
                        if is_region {
                            "clearly beats"
                        } else {
                            "at least matches"
                        },
                        if is_region {
                            "; AP by ≥ 0.05 or a third of the baseline's shortfall"
                        } else {
                            ""
                        }
                    ),
                    met,
                    measured: format!(
                        "engine AUROC {ea:.3} AP {ep:.3}; best baseline AUROC {ba:.3} AP {bp:.3}{}{}",
                        if is_region && bp >= 0.999 {
                            " (the better baseline is already perfect: cannot be beaten)"
                        } else {
                            ""
                        },
                        c.paired_vs_baseline.map_or_else(String::new, |d| format!(
                            "; paired over {} repetitions: ΔAUROC {:+.4} ± {:.4}, ΔAP {:+.4} ± {:.4} (mean ± se)",
                            c.runs, d.auroc_mean, d.auroc_se, d.ap_mean, d.ap_se
                        ))
                    ),
                    beyond_ceiling: false,
                    tie_within_noise: !met
                        && !is_region
                        && c.paired_vs_baseline.is_some_and(|d| d.within_noise()),
                });
            }
        }
    }
    for a in agreement {
        out.push(TargetCheck {
            target: format!(
                "{}: {} incremental vs exact Spearman ≥ 0.99 and same top-20",
                a.source,
                a.attack.label()
            ),
            met: a.spearman.is_some_and(|s| s >= 0.99) && a.top20_shared == a.top20_of,
            measured: format!(
                "Spearman {}, top-20 shared {}/{}",
                fmt_opt(a.spearman),
                a.top20_shared,
                a.top20_of
            ),
            beyond_ceiling: false,
            tie_within_noise: false,
        });
    }
    if let (Some(small), Some(big)) = (
        scale.iter().find(|s| s.pool_items == 10_000),
        scale.iter().find(|s| s.pool_items == 1_000_000),
    ) {
        out.push(TargetCheck {
            target: "1,000 × 32 × 8 batch scored in ≤ 100 ms median at pool 1,000,000".into(),
            met: big.median_ms <= 100.0,
            measured: format!("{:.1} ms", big.median_ms),
            beyond_ceiling: false,
            tie_within_noise: false,
        });
        out.push(TargetCheck {
            target: "scoring at pool 1,000,000 within 2× of pool 10,000".into(),
            met: big.median_ms <= 2.0 * small.median_ms,
            measured: format!("{:.1} ms vs {:.1} ms", big.median_ms, small.median_ms),
            beyond_ceiling: false,
            tie_within_noise: false,
        });
    }
    out
}

/// The report as readable text.
pub fn render_text(r: &BenchReport) -> String {
    use std::fmt::Write;
    let mut s = String::new();
    let _ = writeln!(
        s,
        "labelweir engine benchmark ({} mode, seed {})",
        if r.quick { "quick" } else { "full" },
        r.seed,
    );
    let _ = writeln!(
        s,
        "Scores rank items for human review; a high score is a suspicion, not proof of a vendor's error.\n"
    );
    let mut last_source = "";
    for c in &r.cases {
        if c.source != last_source {
            let _ = writeln!(
                s,
                "== {} ({} items per batch, {} repetition(s)) ==",
                c.source, c.batch_items, c.runs
            );
            last_source = &c.source;
        }
        let _ = writeln!(
            s,
            "-- {}: {:.1} bugs · flagged {:.1}% (estimated wrong {:.1}%, repair weight {:.2}) · repair cost {:.3} (target reached {}/{}) · damage {:+.4} nats · quarantined {}/{}{} · pool model's accuracy {:.3} · {:.0} ms{}",
            c.attack.label(),
            c.bugs,
            100.0 * c.flagged_share,
            100.0 * c.estimated_wrong_share,
            c.mean_repair_weight,
            c.repair_cost,
            c.target_reached,
            c.runs,
            c.damage,
            c.quarantined,
            c.runs,
            if c.quarantine_reasons.is_empty() {
                String::new()
            } else {
                format!(
                    " ({})",
                    c.quarantine_reasons
                        .iter()
                        .map(|(code, n)| format!("{code} ×{n}"))
                        .collect::<Vec<_>>()
                        .join(", ")
                )
            },
            c.learner_accuracy,
            c.engine_ms,
            if c.converged { "" } else { " · NOT ALL SOLVES CONVERGED" }
        );
        if !c.methods.is_empty() {
            let _ = writeln!(
                s,
                "   {:<34} {:>6} {:>6} {:>7} {:>12}",
                "method", "AUROC", "AP", "P@R½", "labels@k"
            );
            for m in &c.methods {
                let _ = writeln!(
                    s,
                    "   {:<34} {:>6} {:>6} {:>7} {:>12}",
                    m.method,
                    fmt_opt(m.auroc),
                    fmt_opt(m.average_precision),
                    fmt_opt(m.precision_at_half_recall),
                    format!("{}/{}", m.correct_proposals, m.bugs_in_top_k)
                );
            }
        }
    }
    if !r.mode_agreement.is_empty() {
        let _ = writeln!(
            s,
            "\n== incremental (pool summary) vs exact (pool re-solve) =="
        );
        for a in &r.mode_agreement {
            let _ = writeln!(
                s,
                "   {:<16} {:<20} Spearman {} · top-20 shared {}/{} · repair cost {:.3} vs {:.3} · damage {:+.4} vs {:+.4} · {:.0} ms vs {:.0} ms",
                a.source,
                a.attack.label(),
                fmt_opt(a.spearman),
                a.top20_shared,
                a.top20_of,
                a.repair_cost_summary,
                a.repair_cost_exact,
                a.damage_summary,
                a.damage_exact,
                a.summary_ms,
                a.exact_ms
            );
        }
    }
    if !r.scale.is_empty() {
        let _ = writeln!(
            s,
            "\n== scoring time, {} items × {} features × {} classes against a pool summary ==",
            r.scale[0].batch_items, r.scale[0].features, r.scale[0].classes
        );
        let _ = writeln!(
            s,
            "   (100k and 1M: the exact 10k summary standing for the larger pool; built in {:.0} ms)",
            r.scale[0].summary_build_ms
        );
        for t in &r.scale {
            let _ = writeln!(
                s,
                "   pool {:>9}: median {:>7.1} ms (min {:.1}, max {:.1}, {} runs; reference {:.0} + train {:.0} + repair {:.0} ms) · summary {} bytes · absorb {:.0} ms",
                t.pool_items,
                t.median_ms,
                t.min_ms,
                t.max_ms,
                t.repeats,
                t.phase_ms[0],
                t.phase_ms[1],
                t.phase_ms[2],
                t.summary_bytes,
                t.absorb_ms
            );
        }
    }
    if let Some(w) = &r.sweep {
        let _ = writeln!(
            s,
            "\n== pool sweep: {} plant items in chunks of {} ==\n   trusted-anchored model fitted in {:.0} ms; scoring {:.0} ms ({:.0} items/s); memory while sweeping {} bytes",
            w.items, w.chunk, w.fit_ms, w.score_ms, w.items_per_s, w.memory_bytes
        );
    }
    let _ = writeln!(s, "\n== targets (issue 2) ==");
    for t in &r.targets {
        let _ = writeln!(
            s,
            "   [{}] {} — {}{}",
            if t.met {
                "met "
            } else if t.tie_within_noise {
                "tie "
            } else {
                "MISS"
            },
            t.target,
            t.measured,
            if t.beyond_ceiling {
                " — beyond this learner's ceiling on this data"
            } else {
                ""
            }
        );
    }
    let met = r.targets.iter().filter(|t| t.met).count();
    let beyond = r.targets.iter().filter(|t| t.beyond_ceiling).count();
    let ties = r.targets.iter().filter(|t| t.tie_within_noise).count();
    let _ = writeln!(
        s,
        "   {met}/{} targets met; of the {} missed, {beyond} lie beyond what the learner reaches when given the \
         batch's true labels (the ceiling row) and {ties} [tie] fall short of the better baseline by less than \
         two paired standard errors · {:.1} s",
        r.targets.len(),
        r.targets.len() - met,
        r.wall_seconds
    );
    s
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn open_splits_keep_at_most_ten_trusted_per_class_and_disjoint_sizes() {
        for src in open_sources() {
            let (pool_n, batch_n) = sizes(src.name, true);
            let s = split_open(&src, pool_n, batch_n, 3);
            for c in 0..src.n_classes {
                let t = s.trusted_y.iter().filter(|&&y| y == c).count();
                let total = src.y.iter().filter(|&&y| y == c).count();
                assert!(
                    (1..=10).contains(&t) && t <= total.div_ceil(3).max(1),
                    "{} class {c}: {t}",
                    src.name
                );
            }
            let used = s.trusted_y.len() + s.pool_y.len() + s.batch_y.len();
            assert!(
                used <= src.y.len(),
                "{}: {used} rows used of {}",
                src.name,
                src.y.len()
            );
            assert_eq!(
                s.batch_y.len(),
                batch_n.min((src.y.len() - s.trusted_y.len()) / 2)
            );
        }
    }

    #[test]
    fn targeted_attack_flips_the_largest_class_into_its_nearest_neighbour() {
        // Three 1-D classes at 0, 1 and 10: class 0 is the largest in the batch; its nearest class is 1.
        let x = Array2::from_shape_fn((60, 1), |(i, _)| [0.0, 1.0, 10.0][i % 3] + 0.01 * i as f64);
        let y: Vec<usize> = (0..60).map(|i| i % 3).collect();
        let mut by = y.clone();
        by[1] = 0; // class 0 now has 21 items
        let split = Split {
            trusted_x: x.clone(),
            trusted_y: y.clone(),
            pool_x: x.clone(),
            pool_y: y.clone(),
            batch_x: x.clone(),
            batch_y: by.clone(),
            batch_sub: None,
        };
        let st = Standardizer::fit(&[x.view()]).unwrap();
        let (out, mask) = apply_attack(Attack::Targeted { rate: 0.10 }, &split, &st, 3, 1);
        let flipped: Vec<usize> = (0..60).filter(|&i| mask[i]).collect();
        // 10% of 60 = 6 items, 6/21 < 0.45 of the class.
        assert_eq!(flipped.len(), 6);
        assert!(flipped.iter().all(|&i| by[i] == 0 && out[i] == 1));
    }

    fn case(attack: Attack, engine: (f64, f64), baselines: [(f64, f64); 2]) -> CaseReport {
        let m = |name: &str, (a, p): (f64, f64)| MethodScore {
            method: name.into(),
            auroc: Some(a),
            average_precision: Some(p),
            precision_at_half_recall: Some(p),
            bugs_in_top_k: 10,
            correct_proposals: 9,
        };
        CaseReport {
            source: "s".into(),
            attack,
            runs: 1,
            batch_items: 100,
            bugs: 10.0,
            repair_cost: 0.1,
            repair_cost_max: 0.1,
            target_reached: 1,
            damage: 0.1,
            quarantined: 1,
            quarantine_reasons: vec![("cold_start_repair_cost".into(), 1)],
            converged: true,
            engine_ms: 1.0,
            learner_accuracy: 0.9,
            flagged_share: 0.1,
            estimated_wrong_share: 0.1,
            mean_repair_weight: 0.2,
            paired_vs_baseline: None,
            methods: vec![
                m(METHODS[0], engine),
                m(METHODS[1], engine),
                m(METHODS[2], engine),
                m(METHODS[3], engine),
                m(METHODS[4], baselines[0]),
                m(METHODS[5], baselines[1]),
                m(CEILING, (1.0, 1.0)),
            ],
        }
    }

    #[test]
    fn targets_compare_with_the_better_baseline_and_demand_a_margin_on_region_flips() {
        let uni = case(
            Attack::Uniform { rate: 0.10 },
            (0.96, 0.80),
            [(0.90, 0.70), (0.96, 0.80)],
        );
        let reg = case(
            Attack::Region { rate: 0.10 },
            (0.96, 0.80),
            [(0.90, 0.70), (0.95, 0.78)],
        );
        let t = check_targets(&[uni, reg], &[], &[]);
        let find = |needle: &str| t.iter().find(|c| c.target.contains(needle)).unwrap().met;
        assert!(find("uniform flips 10% AUROC ≥ 0.95"));
        assert!(find("uniform flips 10% at least matches"));
        // Ties the better baseline on uniform: met. On region flips AP 0.80 vs 0.78 is not ≥ 0.05 better.
        assert!(!find("region flips 10% clearly beats"));
        assert!(find("region flips 10% proposed labels"));
        // Near the ceiling: AP 0.992 against 0.983 removes more than a third of the shortfall (0.017 →
        // 0.008), which counts as clearly better; 0.986 against 0.983 does not.
        let near = |e: f64| {
            let c = case(
                Attack::Region { rate: 0.20 },
                (0.999, e),
                [(0.99, 0.90), (0.998, 0.983)],
            );
            check_targets(&[c], &[], &[])
                .iter()
                .find(|c| c.target.contains("clearly beats"))
                .unwrap()
                .met
        };
        assert!(near(0.992));
        assert!(!near(0.986));
        let worse = case(
            Attack::Uniform { rate: 0.05 },
            (0.94, 0.80),
            [(0.95, 0.70), (0.90, 0.60)],
        );
        assert!(
            !check_targets(&[worse], &[], &[])
                .iter()
                .find(|c| c.target.contains("at least matches"))
                .unwrap()
                .met
        );
        // A shortfall within two paired standard errors is a tie — still not met; beyond them it is a miss.
        let with_paired = |ap_mean: f64| {
            let mut c = case(
                Attack::Uniform { rate: 0.10 },
                (0.96, 0.80),
                [(0.90, 0.70), (0.961, 0.81)],
            );
            c.paired_vs_baseline = Some(PairedDifference {
                auroc_mean: -0.001,
                auroc_se: 0.002,
                ap_mean,
                ap_se: 0.004,
            });
            check_targets(&[c], &[], &[])
                .into_iter()
                .find(|c| c.target.contains("at least matches"))
                .unwrap()
        };
        let tie = with_paired(-0.006);
        assert!(!tie.met && tie.tie_within_noise, "{tie:?}");
        let miss = with_paired(-0.01);
        assert!(!miss.met && !miss.tie_within_noise, "{miss:?}");
    }

    #[test]
    fn paired_differences_are_mean_and_standard_error_over_repetitions() {
        let run = |e: f64, b: f64| Run {
            bugs: 1,
            assessment: Assessment::default(),
            engine_ms: 0.0,
            learner_accuracy: 0.0,
            verdict: Verdict::Accept,
            reasons: Vec::new(),
            methods: [e, b]
                .iter()
                .map(|&v| MethodScore {
                    method: String::new(),
                    auroc: Some(v),
                    average_precision: Some(v),
                    precision_at_half_recall: None,
                    bugs_in_top_k: 0,
                    correct_proposals: 0,
                })
                .collect(),
        };
        // Differences 0.01, 0.03, −0.01: mean 0.01, sd 0.02, se 0.02/√3.
        let runs = [run(0.91, 0.90), run(0.93, 0.90), run(0.89, 0.90)];
        let d = paired(&runs, 0, 1).unwrap();
        assert!((d.auroc_mean - 0.01).abs() < 1e-12 && (d.ap_mean - 0.01).abs() < 1e-12);
        assert!((d.auroc_se - 0.02 / 3f64.sqrt()).abs() < 1e-12);
        assert!(
            paired(&runs[..1], 0, 1).is_none(),
            "one repetition has no spread"
        );
    }
}
