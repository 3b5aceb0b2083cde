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
//!    what the daemon does) and the two [`super::baselines`] score every batch item; besides the fused
//!    `suspicion`, each of the engine's signals is ranked alone (ablation): the repair signal, the
//!    learner's doubt, the trusted-anchored doubt and the trusted neighbours' doubt. A [`CEILING`] row — the learner given
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

use std::time::Instant;

use ndarray::Array2;
use serde::Serialize;

use crate::model::{Assessment, FeatureMap, ModelError, ModelSettings, PoolSummary, Standardizer};
use crate::policy::Verdict;
use crate::scenario::Plant;

mod case;
mod data;
mod render;
mod targets;
#[cfg(test)]
mod tests;
mod timing;

use case::*;
use data::*;
pub use render::render_text;
use targets::*;
use timing::*;

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
pub const METHODS: [&str; 8] = [
    "labelweir (suspicion)",
    "  repair signal alone",
    "  learner doubt alone",
    "  trusted-anchored doubt alone",
    "  trusted neighbours' doubt alone",
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
