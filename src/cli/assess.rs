//! `labelweir assess`: score one vendor batch against a trusted set (and optionally the accepted pool),
//! once, without a workspace.
//!
//! The contract (other tools script against it): exit 0 when the batch looks clean, 1 when the default
//! policy would quarantine it, 2 on bad input or a bad configuration, with a message naming the file, the
//! row and the column. `--json` prints one JSON document whose `items` are sorted by suspicion, highest
//! first. A flag is a suspicion for human review, not proof.

use std::collections::HashSet;
use std::fmt::Write as _;
use std::path::{Path, PathBuf};

use ndarray::{Array1, Array2, ArrayView2, Axis};
use serde_json::{json, Value};

use super::{exit, Failure};
use labelweir::config::Config;
use labelweir::data::{self, Classes, Table, TableOptions};
use labelweir::model::{
    self, Assessment, FeatureMap, ModelSettings, PoolInput, PoolSummary, Standardizer,
    SuspectStory, TrainReport, TrustedInput,
};
use labelweir::policy::{self, Decision, PolicySettings, VendorHistory};
use labelweir::text::sanitize;

/// The one line every output carries.
pub const CAUTION: &str = "A flag is a suspicion for human review, not proof: a high suspicion means the \
labels disagree with what the trusted items and the rest of the data imply, not that the vendor made a \
mistake or acted in bad faith.";

/// Score one vendor batch against a trusted set through the learner, once.
///
/// Prints the batch's repair cost (the fraction of its label mass that must move so that the model trained
/// on pool + repaired batch fits the trusted items as well as it should), its damage (the change in
/// trusted-set loss caused by adding it as delivered) and the most suspicious items with a proposed label.
///
/// Files are CSV (header row; an id column, a label column, every other column a numeric feature) or
/// JSON Lines (.jsonl, one object per line with the same keys). Classes are the trusted set's labels.
///
/// Exit codes: 0 the batch looks clean; 1 it would be quarantined under the default policy (or the
/// `[policy]` of --config); 2 bad input or configuration (the message names file, row and column).
///
/// A flag is a suspicion for human review, not proof.
#[derive(Debug, clap::Args)]
pub struct Args {
    /// The vendor batch to assess (.csv or .jsonl).
    pub batch: PathBuf,
    /// Trusted (expert-verified) items; their labels define the classes, their columns the features.
    #[arg(long, value_name = "TRUSTED")]
    pub trusted: PathBuf,
    /// Items already accepted into the training pool (repeat for several files).
    #[arg(long = "pool", value_name = "POOL")]
    pub pool: Vec<PathBuf>,
    /// Print one JSON document instead of the readable report.
    #[arg(long)]
    pub json: bool,
    /// Configuration file: its `[model]` section sets the engine, its `[policy]` section the verdict, its
    /// `[schema]` the default id and label column names. Without it, the documented defaults apply.
    #[arg(long, value_name = "FILE")]
    pub config: Option<PathBuf>,
    /// Name of the item-id column (default: `id`, or `[schema] id_column` of --config).
    #[arg(long, value_name = "C")]
    pub id_column: Option<String>,
    /// Name of the label column (default: `label`, or `[schema] label_column` of --config).
    #[arg(long, value_name = "C")]
    pub label_column: Option<String>,
    /// How the pool enters: `incremental` summarises it first (gradient and Hessian of its loss at its
    /// optimum, as the daemon does), `exact` re-solves the learner over every pool item with the batch.
    #[arg(long, value_enum, default_value_t = Mode::Incremental)]
    pub mode: Mode,
    /// Rows in the readable report's table of top suspects.
    #[arg(long, default_value_t = 20, value_name = "N")]
    pub top: usize,
}

/// How the pool enters the assessment.
#[derive(Debug, Clone, Copy, PartialEq, Eq, clap::ValueEnum)]
pub enum Mode {
    /// Build a pool summary (second-order model of the pool's loss), then assess against it.
    Incremental,
    /// Re-solve over pool ∪ batch.
    Exact,
}

impl Mode {
    fn as_str(self) -> &'static str {
        match self {
            Mode::Incremental => "incremental",
            Mode::Exact => "exact",
        }
    }
}

/// Everything `assess` computed, ready to print.
#[derive(Debug)]
pub struct Report {
    /// The batch file as given.
    pub batch_path: String,
    /// The trusted file as given.
    pub trusted_path: String,
    /// The pool files as given.
    pub pool_paths: Vec<String>,
    /// How the pool entered.
    pub mode: Mode,
    /// Class names (index order).
    pub classes: Classes,
    /// Batch ids, in batch order.
    pub batch_ids: Vec<String>,
    /// Trusted ids, in trusted-file order.
    pub trusted_ids: Vec<String>,
    /// Pool items used.
    pub pool_items: usize,
    /// The pool summary's size and fit, in incremental mode with a pool.
    pub summary: Option<SummaryInfo>,
    /// The engine's answer.
    pub assessment: Assessment,
    /// The policy's answer (default vendor history: cold start).
    pub decision: Decision,
    /// The floor of the flag line (`[model] flag_threshold`).
    pub flag_threshold: f64,
    /// The batch's flag line: suspicion at or above which an item counts as flagged
    /// ([`Assessment::flag_line`]).
    pub flag_line: f64,
    /// `[model] clean_flag_rate`: the share a batch with the right labels would flag at the line.
    pub clean_flag_rate: f64,
    /// The flagged items grouped by (given → proposed), with the trusted items nearest them.
    pub stories: Vec<SuspectStory>,
}

/// The pool summary built in incremental mode.
#[derive(Debug, Clone)]
pub struct SummaryInfo {
    /// Bytes held by the summary.
    pub memory_bytes: usize,
    /// The fit over the pool.
    pub fit: TrainReport,
}

/// Run the subcommand.
pub fn run(args: Args) -> anyhow::Result<u8> {
    let report = assess_files(&args)?;
    let out = if args.json {
        let mut s = serde_json::to_string_pretty(&report_json(&report))?;
        s.push('\n');
        s
    } else {
        render_text(&report, args.top)
    };
    print!("{out}");
    Ok(match report.decision.verdict {
        policy::Verdict::Accept => exit::OK,
        policy::Verdict::Quarantine => exit::QUARANTINE,
    })
}

fn input_error(message: impl Into<String>) -> anyhow::Error {
    Failure::new(exit::INPUT, message).into()
}

/// Settings from `--config`: the file is parsed with unknown keys rejected; a file that lists vendors (a
/// workspace's) is validated in full, otherwise only its `[model]` and `[policy]` sections are checked, so
/// a file holding just those sections is enough for a one-shot assessment.
fn load_config(path: Option<&Path>) -> anyhow::Result<Config> {
    let Some(path) = path else {
        return Ok(Config::default());
    };
    let text = std::fs::read_to_string(path).map_err(|e| {
        input_error(format!(
            "{}: cannot read the configuration: {e}",
            path.display()
        ))
    })?;
    let cfg = Config::parse_str(&text, path).map_err(|e| input_error(e.to_string()))?;
    if !cfg.vendors.is_empty() {
        cfg.validate()
            .map_err(|e| input_error(format!("{}: {e}", path.display())))?;
    }
    cfg.model
        .validate()
        .map_err(|e| input_error(format!("{}: {e}", path.display())))?;
    cfg.policy
        .validate()
        .map_err(|e| input_error(format!("{}: {e}", path.display())))?;
    Ok(cfg)
}

/// Read the files, run the engine and the policy.
pub fn assess_files(args: &Args) -> anyhow::Result<Report> {
    let cfg = load_config(args.config.as_deref())?;
    let opts = TableOptions {
        id_column: args
            .id_column
            .clone()
            .unwrap_or_else(|| cfg.schema.id_column.clone()),
        label_column: args
            .label_column
            .clone()
            .unwrap_or_else(|| cfg.schema.label_column.clone()),
        limits: data::Limits::default(),
    };
    let read = |path: &Path, schema: Option<&[String]>| -> anyhow::Result<Table> {
        data::read_table(path, &opts, schema).map_err(|e| input_error(e.to_string()))
    };
    let trusted = read(&args.trusted, None)?;
    let classes = trusted.classes();
    if classes.len() < 2 {
        return Err(input_error(format!(
            "{}, column \"{}\": the trusted set has {} class(es); at least two are needed",
            trusted.source,
            opts.label_column,
            classes.len()
        )));
    }
    let schema = trusted.feature_names.clone();
    let labels_of = |t: &Table| -> anyhow::Result<Vec<usize>> {
        t.class_indices_in(&classes, &opts.label_column)
            .map_err(|e| input_error(e.to_string()))
    };
    let trusted_y = labels_of(&trusted)?;
    let mut pools = Vec::new();
    for p in &args.pool {
        let t = read(p, Some(&schema))?;
        let y = labels_of(&t)?;
        pools.push((t, y));
    }
    // Ids must be unique across the pool files too (an item is either in the pool or not).
    let mut seen = HashSet::new();
    for (t, _) in &pools {
        for (row, id) in t.ids.iter().enumerate() {
            if !seen.insert(id.as_str()) {
                return Err(input_error(format!(
                    "{}, row {}, column \"{}\": duplicate id \"{}\" (already in an earlier pool file)",
                    sanitize(&t.source),
                    row + 1,
                    sanitize(&opts.id_column),
                    sanitize(id)
                )));
            }
        }
    }
    let batch = read(&args.batch, Some(&schema))?;
    let batch_y = labels_of(&batch)?;

    let pool_x: Array2<f64> = if pools.is_empty() {
        Array2::zeros((0, schema.len()))
    } else {
        let views: Vec<ArrayView2<'_, f64>> =
            pools.iter().map(|(t, _)| t.features.view()).collect();
        ndarray::concatenate(Axis(0), &views)?
    };
    let pool_y: Vec<usize> = pools.iter().flat_map(|(_, y)| y.iter().copied()).collect();

    let settings: &ModelSettings = &cfg.model;
    let engine_error =
        |e: model::ModelError| input_error(format!("cannot assess {}: {e}", batch.source));
    // The standardiser sees every item of this one-shot run: trusted ∪ pool ∪ batch.
    let standardizer = Standardizer::fit(&[
        trusted.features.view(),
        pool_x.view(),
        batch.features.view(),
    ])
    .map_err(engine_error)?;
    let weight = Array1::ones(trusted.len());
    let trusted_in = TrustedInput {
        x: trusted.features.view(),
        y: &trusted_y,
        weight: weight.view(),
    };
    let k = classes.len();
    let mut summary_info = None;
    let summary;
    let pool_in = if pool_y.is_empty() {
        PoolInput::Empty
    } else {
        match args.mode {
            Mode::Exact => PoolInput::Exact {
                x: pool_x.view(),
                y: &pool_y,
            },
            Mode::Incremental => {
                let fmap =
                    FeatureMap::new(standardizer.clone(), settings.feature_map, settings.seed)
                        .map_err(engine_error)?;
                let (s, fit) = PoolSummary::fit(settings, fmap, k, pool_x.view(), &pool_y)
                    .map_err(engine_error)?;
                summary_info = Some(SummaryInfo {
                    memory_bytes: s.memory_bytes(),
                    fit,
                });
                summary = s;
                PoolInput::Summary(&summary)
            }
        }
    };
    let batch_in = (batch.features.view(), batch_y.as_slice());
    let assessment =
        score(settings, &standardizer, k, trusted_in, pool_in, batch_in).map_err(engine_error)?;
    let decision = decide(
        &cfg.policy,
        &assessment,
        settings.flag_threshold,
        classes.names(),
    );
    let stories = stories_of(
        &standardizer,
        &trusted,
        &trusted_y,
        &batch,
        &assessment,
        settings,
    )
    .map_err(engine_error)?;
    let flag_line = assessment.flag_line_or(settings.flag_threshold);
    Ok(Report {
        batch_path: batch.source.clone(),
        trusted_path: trusted.source.clone(),
        pool_paths: pools.iter().map(|(t, _)| t.source.clone()).collect(),
        mode: args.mode,
        classes,
        batch_ids: batch.ids,
        trusted_ids: trusted.ids,
        pool_items: pool_y.len(),
        summary: summary_info,
        assessment,
        decision,
        flag_threshold: settings.flag_threshold,
        flag_line,
        clean_flag_rate: settings.clean_flag_rate,
        stories,
    })
}

/// The engine on one batch, with the seconds spent shown on a terminal (see
/// [`super::progress::with_elapsed`]).
fn score(
    settings: &ModelSettings,
    standardizer: &Standardizer,
    k: usize,
    trusted: TrustedInput<'_>,
    pool: PoolInput<'_>,
    (x, y): (ArrayView2<'_, f64>, &[usize]),
) -> Result<Assessment, model::ModelError> {
    let label = format!(
        "assess: scoring {} items (time budget {:.1} s)",
        y.len(),
        settings.time_budget_ms as f64 / 1000.0
    );
    super::progress::with_elapsed(&label, || {
        model::assess(settings, standardizer, k, trusted, pool, x, y)
    })
}

/// The flagged items told as stories, over features standardised with the run's one map.
fn stories_of(
    standardizer: &Standardizer,
    trusted: &Table,
    trusted_y: &[usize],
    batch: &Table,
    assessment: &Assessment,
    settings: &ModelSettings,
) -> Result<Vec<SuspectStory>, model::ModelError> {
    Ok(model::suspect_stories(
        standardizer.transform(trusted.features.view())?.view(),
        trusted_y,
        standardizer.transform(batch.features.view())?.view(),
        &assessment.items,
        assessment.flag_line_or(settings.flag_threshold),
    ))
}

/// The policy's verdict for a batch from a vendor with no history (cold-start limits and the absolute
/// ceilings apply), on every signal the daemon judges: repair cost, damage and flagged share.
fn decide(
    settings: &PolicySettings,
    a: &Assessment,
    flag_threshold: f64,
    classes: &[String],
) -> Decision {
    policy::decide_batch(
        settings,
        &VendorHistory::default(),
        &policy::BatchSignals::from_assessment(a, flag_threshold).named(classes),
    )
}

fn ms(d: std::time::Duration) -> f64 {
    d.as_secs_f64() * 1000.0
}

/// Per-class counts: items given that label, mean suspicion, flagged items, and where the proposals go.
fn per_class(r: &Report) -> Vec<Value> {
    let k = r.classes.len();
    let mut n = vec![0usize; k];
    let mut sum = vec![0.0f64; k];
    let mut flagged = vec![0usize; k];
    let mut proposed_into = vec![0usize; k];
    for it in &r.assessment.items {
        n[it.label] += 1;
        sum[it.label] += it.suspicion;
        if it.suspicion >= r.flag_line {
            flagged[it.label] += 1;
        }
        if it.proposed_label != it.label {
            proposed_into[it.proposed_label] += 1;
        }
    }
    (0..k)
        .map(|c| {
            json!({
                "class": r.classes.names()[c],
                "items": n[c],
                "mean_suspicion": if n[c] > 0 { sum[c] / n[c] as f64 } else { 0.0 },
                "flagged": flagged[c],
                "proposed_into": proposed_into[c],
            })
        })
        .collect()
}

/// The `--json` document.
pub fn report_json(r: &Report) -> Value {
    let a = &r.assessment;
    let name = |k: usize| r.classes.names()[k].as_str();
    let items: Vec<Value> = a
        .ranked()
        .into_iter()
        .map(|it| {
            json!({
                "id": r.batch_ids[it.index],
                "row": it.index + 1,
                "label": name(it.label),
                "suspicion": it.suspicion,
                "proposed_label": name(it.proposed_label),
                "confidence": it.confidence,
                "flagged": it.suspicion >= r.flag_line,
                "repair_signal": it.repair_signal,
                "repair_label": name(it.repair_label),
                "learner_doubt": it.learner_doubt,
                "anchored_doubt": it.anchored_doubt,
                "neighbour_doubt": it.neighbour_doubt,
                "wrong_probability": it.wrong_probability,
                "repair_weight": it.repair_weight,
                "repair_mass": it.repair_mass,
                "flagged_at_step": it.flagged_at_step,
            })
        })
        .collect();
    let broken: Vec<Value> = a
        .broken_trusted
        .iter()
        .map(|t| {
            json!({
                "id": r.trusted_ids[t.index],
                "label": name(t.label),
                "predicted_with_batch": name(t.predicted_with_batch),
                "prob_with_batch": t.prob_with_batch,
                "reference_correct": t.reference_correct,
                "repaired_correct": t.repaired_correct,
                "broken_by_batch": t.reference_correct,
            })
        })
        .collect();
    let c = &a.convergence;
    json!({
        "repair_cost": a.repair_cost,
        "damage": a.damage,
        "verdict": r.decision.verdict.as_str(),
        "exit_code": match r.decision.verdict {
            policy::Verdict::Accept => exit::OK,
            policy::Verdict::Quarantine => exit::QUARANTINE,
        },
        "reasons": r.decision.reasons,
        "note": CAUTION,
        "items": items,
        "flag_threshold": r.flag_threshold,
        "flag_line": r.flag_line,
        "clean_flag_rate": r.clean_flag_rate,
        "flagged": a.items.iter().filter(|i| i.suspicion >= r.flag_line).count(),
        "expected_flagged_share": {
            "share": a.expected_flagged_share,
            "sd": a.expected_flagged_sd,
        },
        "expected_damage": {
            "damage": a.expected_damage,
            "sd": a.expected_damage_sd,
        },
        "target_reached": a.target_reached,
        "target_basis": a.target_basis,
        "trusted_still_wrong": a.trusted_still_wrong,
        "unknown": a.unknown,
        "estimated_wrong_share": a.estimated_wrong_share,
        "trusted_audit": a.trusted_audit,
        "repair_path": {
            "gammas": a.repair_path_gammas,
            "flagged": a.repair_path_flagged,
        },
        "trusted_loss": {
            "pool": a.trusted_loss_pool,
            "with_batch": a.trusted_loss_with_batch,
            "repaired": a.trusted_loss_repaired,
            "target": a.trusted_loss_target,
        },
        "broken_trusted": broken,
        "stories": stories_json(r),
        "per_class": per_class(r),
        "classes": r.classes.names(),
        "inputs": {
            "batch": r.batch_path,
            "trusted": r.trusted_path,
            "pool": r.pool_paths,
            "mode": r.mode.as_str(),
            "batch_items": a.sizes.batch,
            "trusted_items": a.sizes.trusted,
            "pool_items": r.pool_items,
            "parameters": a.sizes.params,
        },
        "reference": a.reference,
        "pool_summary": r.summary.as_ref().map(|s| json!({
            "memory_bytes": s.memory_bytes,
            "fit_converged": s.fit.converged,
            "fit_iterations": s.fit.iterations,
            "fit_stopped": s.fit.stopped,
        })),
        "convergence": {
            "converged": converged(r),
            "inner_converged": c.inner_converged,
            "linear_converged": c.linear_converged,
            "budget_exhausted": c.budget_exhausted,
            "inner_iterations": c.inner_iterations,
            "linear_iterations": c.linear_iterations,
            "repair_iterations": c.repair_iterations,
            "linear_solver": c.linear_solver,
            "notes": c.notes,
        },
        "timings_ms": {
            "reference": ms(a.timings.reference),
            "train": ms(a.timings.train),
            "repair": ms(a.timings.repair),
            "total": ms(a.timings.total),
        },
        "path": {
            "gammas": a.path_gammas,
            "costs": a.path_costs,
            "trusted_losses": a.path_losses,
        },
        "policy": {
            "vendor_history": "none (one-shot assessment: cold-start limits and absolute ceilings apply)",
            "baseline": r.decision.baseline,
        },
    })
}

/// Stories shown in the readable report; the rest are counted (all are in `--json`).
const STORIES_SHOWN: usize = 6;

/// The flagged items by story, for `--json`: per (given → proposed) pair its item ids (most suspicious
/// first), mean signals and the trusted items nearest them.
fn stories_json(r: &Report) -> Vec<Value> {
    let name = |k: usize| r.classes.names()[k].as_str();
    r.stories
        .iter()
        .map(|g| {
            json!({
                "label": name(g.label),
                "proposed_label": name(g.proposed_label),
                "items": g.items.len(),
                "ids": g.items.iter().map(|&i| r.batch_ids[i].as_str()).collect::<Vec<_>>(),
                "mean_suspicion": g.mean_suspicion,
                "mean_repair_signal": g.mean_repair_signal,
                "mean_learner_doubt": g.mean_learner_doubt,
                "trusted_nearby": g.trusted_nearby,
                "trusted_nearby_proposed": g.trusted_nearby_proposed,
                "trusted_nearby_given": g.trusted_nearby_given,
            })
        })
        .collect()
}

/// The stories in words: "37 labeled paper, proposed cardboard: of the 14 trusted items nearest them,
/// 9 are cardboard and 2 paper".
fn render_stories(o: &mut String, r: &Report) {
    if r.stories.is_empty() {
        return;
    }
    let name = |k: usize| r.classes.names()[k].as_str();
    let _ = writeln!(
        o,
        "\nflagged items by story (given → proposed, and the {} trusted items nearest each):",
        model::stories::NEAREST_TRUSTED
    );
    for g in r.stories.iter().take(STORIES_SHOWN) {
        let (given, proposed) = (cell(name(g.label), 24), cell(name(g.proposed_label), 24));
        let lean = if g.trusted_nearby == 0 {
            String::new()
        } else if g.trusted_back_the_proposal() {
            "  <- the trusted set backs the proposal here".to_string()
        } else if g.trusted_nearby_given > g.trusted_nearby_proposed {
            "  <- trusted items here carry the given label".to_string()
        } else if g.trusted_nearby_given > 0 {
            "  <- the trusted items here are split".to_string()
        } else {
            String::new()
        };
        let _ = writeln!(
            o,
            "  {:>4} labeled {given}, proposed {proposed}: of the {} trusted items nearest them, {} {proposed}, {} {given}; repair {:.2}, learner {:.2}{lean}",
            g.items.len(),
            g.trusted_nearby,
            g.trusted_nearby_proposed,
            g.trusted_nearby_given,
            g.mean_repair_signal,
            g.mean_learner_doubt,
        );
    }
    if r.stories.len() > STORIES_SHOWN {
        let rest: usize = r.stories[STORIES_SHOWN..]
            .iter()
            .map(|g| g.items.len())
            .sum();
        let _ = writeln!(
            o,
            "  … {} more stories with {rest} items (see --json)",
            r.stories.len() - STORIES_SHOWN
        );
    }
}

/// Whether every solve (including the pool summary's fit) converged within its bounds.
fn converged(r: &Report) -> bool {
    let c = &r.assessment.convergence;
    c.inner_converged
        && c.linear_converged
        && !c.budget_exhausted
        && r.summary.as_ref().is_none_or(|s| s.fit.converged)
}

/// Text cell: sanitised, shortened to `w` characters.
fn cell(s: &str, w: usize) -> String {
    let s = sanitize(s);
    if s.chars().count() > w {
        let mut t: String = s.chars().take(w.saturating_sub(1)).collect();
        t.push('…');
        t
    } else {
        s
    }
}

/// The readable report.
pub fn render_text(r: &Report, top: usize) -> String {
    let a = &r.assessment;
    let name = |k: usize| r.classes.names()[k].as_str();
    let mut o = String::new();
    let pool = match (r.pool_items, r.mode) {
        (0, _) => "no pool".to_string(),
        (n, m) => format!("a pool of {n} items ({} mode)", m.as_str()),
    };
    let _ = writeln!(
        o,
        "labelweir assess: {} ({} items) against {} trusted items in {} classes and {pool}",
        cell(&r.batch_path, 200),
        a.sizes.batch,
        a.sizes.trusted,
        r.classes.len()
    );
    let verdict = match r.decision.verdict {
        policy::Verdict::Accept => "looks clean (exit 0)",
        policy::Verdict::Quarantine => "would be QUARANTINED under the policy (exit 1)",
    };
    let _ = writeln!(o, "\nverdict: {verdict}");
    for reason in &r.decision.reasons {
        let _ = writeln!(o, "  - {}: {}", reason.code.as_str(), reason.detail);
    }
    let _ = writeln!(
        o,
        "\nrepair cost: {:.4}  ({:.1}% of the batch's label mass must move for the model to fit the trusted items as well as it should{})",
        a.repair_cost,
        100.0 * a.repair_cost,
        if a.target_reached { "" } else { "; the target was NOT reached on the path" }
    );
    let _ = writeln!(
        o,
        "damage:      {:+.4} nats  (trusted-set loss {:.4} without the batch, {:.4} with it as delivered, {:.4} repaired; target {:.4})",
        a.damage, a.trusted_loss_pool, a.trusted_loss_with_batch, a.trusted_loss_repaired, a.trusted_loss_target
    );
    let flagged = a
        .items
        .iter()
        .filter(|i| i.suspicion >= r.flag_line)
        .count();
    let _ = writeln!(
        o,
        "flagged:     {flagged} of {} items at suspicion ≥ {:.3} (this batch's flag line: with the right labels it would flag at most {:.0} % of them)",
        a.items.len(),
        r.flag_line,
        100.0 * r.clean_flag_rate
    );
    render_stories(&mut o, r);
    if !a.broken_trusted.is_empty() {
        // Those the pool alone got right first: they are what adding the batch breaks.
        let mut broken: Vec<_> = a.broken_trusted.iter().collect();
        broken.sort_by_key(|t| (!t.reference_correct, t.index));
        let newly = broken.iter().filter(|t| t.reference_correct).count();
        let _ = writeln!(
            o,
            "\ntrusted items the model trained with the batch as delivered gets wrong: {} ({newly} of them right without the batch)",
            a.broken_trusted.len()
        );
        for t in broken.into_iter().take(10) {
            let _ = writeln!(
                o,
                "  {}  verified {}, predicted {} (p = {:.2} for {}){}",
                cell(&r.trusted_ids[t.index], 24),
                name(t.label),
                name(t.predicted_with_batch),
                t.prob_with_batch,
                name(t.label),
                if t.reference_correct {
                    "  <- broken by the batch"
                } else {
                    ""
                }
            );
        }
        if a.broken_trusted.len() > 10 {
            let _ = writeln!(
                o,
                "  … and {} more (see --json)",
                a.broken_trusted.len() - 10
            );
        }
    }
    let ranked = a.ranked();
    let shown = top.min(ranked.len());
    let _ = writeln!(o, "\ntop {shown} suspects of {}:", ranked.len());
    let _ = writeln!(
        o,
        "  (repair: the repair signal, what the trusted items say through the learner; learner: 1 − p(label) under a model that has not seen the item)"
    );
    let _ = writeln!(
        o,
        "  {:>4}  {:<24}  {:<14}  {:>9}  {:<14}  {:>10}  {:>6}  {:>7}",
        "rank", "id", "label", "suspicion", "proposed", "confidence", "repair", "learner"
    );
    for (rank, it) in ranked.iter().take(shown).enumerate() {
        let proposed = if it.proposed_label == it.label {
            "(keep)".to_string()
        } else {
            name(it.proposed_label).to_string()
        };
        let _ = writeln!(
            o,
            "  {:>4}  {:<24}  {:<14}  {:>9.3}  {:<14}  {:>10.3}  {:>6.3}  {:>7.3}",
            rank + 1,
            cell(&r.batch_ids[it.index], 24),
            cell(name(it.label), 14),
            it.suspicion,
            cell(&proposed, 14),
            it.confidence,
            it.repair_signal,
            it.learner_doubt
        );
    }
    let c = &a.convergence;
    let _ = writeln!(
        o,
        "\nsolver: {} ({} linear solver, {} inner / {} linear iterations), {:.0} ms",
        if converged(r) {
            "converged"
        } else {
            "DID NOT CONVERGE"
        },
        c.linear_solver,
        c.inner_iterations,
        c.linear_iterations,
        ms(a.timings.total)
    );
    if !converged(r) {
        if let Some(s) = &r.summary {
            if !s.fit.converged {
                let _ = writeln!(o, "  pool summary fit: {}", s.fit.stopped);
            }
        }
        if c.budget_exhausted {
            let _ = writeln!(
                o,
                "  the time budget ran out before the repair path finished"
            );
        }
    }
    for note in &c.notes {
        let _ = writeln!(o, "  note: {note}");
    }
    let _ = writeln!(o, "\n{CAUTION}");
    o
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn cells_are_sanitised_and_shortened() {
        assert_eq!(cell("a\u{1b}[31mb\nc", 24), "a[31mbc");
        assert_eq!(cell("abcdefghij", 5), "abcd…");
    }

    #[test]
    fn config_with_only_a_model_section_is_enough_and_unknown_keys_fail() {
        let dir = tempfile::tempdir().unwrap();
        let ok = dir.path().join("ok.toml");
        std::fs::write(&ok, "[model]\nl2 = 0.01\n").unwrap();
        let cfg = load_config(Some(&ok)).unwrap();
        assert!((cfg.model.l2 - 0.01).abs() < 1e-15);
        let bad = dir.path().join("bad.toml");
        std::fs::write(&bad, "[model]\nl2_weight = 0.01\n").unwrap();
        let err = load_config(Some(&bad)).unwrap_err();
        assert_eq!(
            err.downcast_ref::<Failure>().map(|f| f.code),
            Some(exit::INPUT)
        );
        let neg = dir.path().join("neg.toml");
        std::fs::write(&neg, "[model]\nl2 = -1.0\n").unwrap();
        let err = load_config(Some(&neg)).unwrap_err().to_string();
        assert!(err.contains("model.l2"), "{err}");
    }
}
