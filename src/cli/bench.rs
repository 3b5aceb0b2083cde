//! `labelweir bench`: measurements of labelweir itself.
//!
//! `bench engine` plants label flips with known ground truth into batches of open data (iris and red-wine
//! quality from the `linfa-datasets` crate) and of the fictional recycling plant, scores them with the
//! engine and with two simple baselines, and prints ranking quality, repair costs, the incremental-vs-exact
//! agreement, scoring time against pools of 10k–1M items, and the targets met or missed. See
//! [`labelweir::eval::benchmark`](labelweir::eval::benchmark) for the protocol.

use std::io::Write;

use anyhow::Context;

use super::{exit, Failure};
use labelweir::eval::benchmark::{self, BenchOptions};
use labelweir::model::ModelSettings;

/// Measure labelweir: detection quality under planted label attacks, and speed.
///
/// Scores are suspicions for human review, not proof that a vendor mislabeled anything.
#[derive(Debug, clap::Args)]
pub struct Args {
    #[command(subcommand)]
    what: What,
}

#[derive(Debug, clap::Subcommand)]
enum What {
    /// Plant label attacks (uniform, class-targeted, region flips at 5/10/20%) and measure how well the
    /// engine and two baselines find them; time scoring against pools of 10k, 100k and 1M items.
    ///
    /// Exit code 0 when the benchmark ran (whether or not every target was met; see the "targets"
    /// section), 70 when the engine failed.
    Engine(EngineArgs),
    /// The engine on embedding-sized feature spaces: d in {32, 128, 384, 768, 1024} features and K in
    /// {8, 20, 100} classes (--quick: d up to 768, K in {8, 20}) on invented embeddings of the plant's
    /// items; scoring time against a pool summary standing for 1,000,000 items, summary memory,
    /// convergence, AUROC under uniform and region flips, and agreement with the exact dense
    /// computation where it is affordable. Measured, never asserted; build with `--release`.
    Scale(ScaleArgs),
    /// Daemon throughput: sustained items per second through the whole path (claim, parse, score, decide,
    /// persist, notice) with the latency per stage. Measured, never asserted; build with `--release`.
    Daemon(DaemonArgs),
    /// Attack casebook: scripted vendor streams (clean, drips, targeted, region, boiling frog, split and
    /// interleaved files, a repair-aware attacker, covariate shift) replayed through the verdict path
    /// (engine, shift check, policy, item admission); per case the first batch held, the poison that
    /// reached the pool, the clean batches held and what the vendor was told.
    Casebook(CasebookArgs),
}

/// Options of `bench casebook`.
#[derive(Debug, clap::Args)]
struct CasebookArgs {
    /// CI-size streams (a 12-batch clean stream, 3–22 batches per attack).
    #[arg(long)]
    quick: bool,
    /// Print one JSON document instead of the table.
    #[arg(long)]
    json: bool,
    /// Master seed.
    #[arg(long, default_value_t = 2018)]
    seed: u64,
    /// Settings to replay the streams under (a workspace's `labelweir.toml`); the shipped defaults
    /// otherwise. Replaying the same streams under two files is a paired comparison.
    #[arg(long, value_name = "FILE")]
    config: Option<std::path::PathBuf>,
    /// Only the cases whose name contains this text (case-insensitive), each with the seed it has in the
    /// full run.
    #[arg(long, value_name = "TEXT")]
    case: Option<String>,
    /// Batches between an accepted batch's spot check and the simulated expert's answers (the experts'
    /// turnaround; `[spot_checks] enabled = false` in `--config` replays without spot checks).
    #[arg(long, value_name = "N", default_value_t = labelweir::eval::casebook::EXPERT_LAG)]
    expert_lag: usize,
}

/// Sizes for `bench daemon` (defaults: 30 batches of 1,000 items against a pool of 100,000).
#[derive(Debug, clap::Args)]
struct DaemonArgs {
    /// Batches dropped at once.
    #[arg(long)]
    batches: Option<usize>,
    /// Items per batch (each with the recycling plant's 32 sensor readings).
    #[arg(long)]
    items: Option<usize>,
    /// Items already in the pool when the measurement starts.
    #[arg(long)]
    pool: Option<usize>,
    /// Engine settings: a TOML file whose `[model]` table overrides the defaults (other tables ignored;
    /// the feature map stays linear). Cheaper settings (e.g. fewer `path_steps`) show how the pipeline
    /// keeps up with a faster scoring stage.
    #[arg(long, value_name = "FILE")]
    config: Option<std::path::PathBuf>,
    /// Print one versioned JSON document instead of the text (schema: schemas/bench-daemon.schema.json).
    #[arg(long)]
    json: bool,
}

/// Options of `bench scale`.
#[derive(Debug, clap::Args)]
struct ScaleArgs {
    /// The smaller sweep (d up to 768, K in {8, 20}, one timing repetition).
    #[arg(long)]
    quick: bool,
    /// Print one JSON document instead of the table.
    #[arg(long)]
    json: bool,
    /// Master seed for the invented embeddings and the attacks.
    #[arg(long, default_value_t = 2018)]
    seed: u64,
    /// Only this case, as FEATURESxCLASSES (e.g. 768x20); repeatable.
    #[arg(long, value_name = "DxK")]
    case: Vec<String>,
    /// Engine settings: a TOML file whose `[model]` table overrides the defaults (other tables ignored).
    #[arg(long, value_name = "FILE")]
    config: Option<std::path::PathBuf>,
}

#[derive(Debug, clap::Args)]
struct EngineArgs {
    /// Smaller pools and batches, one repetition per case, fewer timing repeats.
    #[arg(long)]
    quick: bool,
    /// Print one JSON document instead of the tables.
    #[arg(long)]
    json: bool,
    /// Master seed for splits, attacks and timings' data.
    #[arg(long, default_value_t = 2018)]
    seed: u64,
    /// Skip the scoring-time sweep over pool sizes.
    #[arg(long)]
    no_scale: bool,
    /// Engine settings: a TOML file whose `[model]` table overrides the defaults (other tables ignored).
    #[arg(long, value_name = "FILE")]
    config: Option<std::path::PathBuf>,
}

/// Run the subcommand.
pub fn run(args: Args) -> anyhow::Result<u8> {
    match args.what {
        What::Engine(a) => engine(a),
        What::Casebook(c) => casebook(c),
        What::Scale(a) => scale(a),
        What::Daemon(d) => {
            let mut o = labelweir::eval::throughput::Options::default();
            if let Some(b) = d.batches {
                o.batches = b;
            }
            if let Some(i) = d.items {
                o.items = i;
            }
            if let Some(p) = d.pool {
                o.pool = p;
            }
            if let Some(path) = &d.config {
                o.model = Some(model_settings(path)?);
            }
            // Batches settled so far, on stderr when it is a terminal.
            let progress: labelweir::eval::throughput::Progress =
                match super::progress::Progress::on_terminal("bench daemon: batches settled") {
                    Some(p) => std::sync::Arc::new(move |done, total| p.show(done, total)),
                    None => std::sync::Arc::new(|_, _| {}),
                };
            match labelweir::eval::throughput::run_with_progress(&o, progress) {
                Ok(r) => {
                    let mut out = std::io::stdout().lock();
                    if d.json {
                        serde_json::to_writer_pretty(&mut out, &r.to_json())
                            .context("writing JSON")?;
                        writeln!(out)?;
                    } else {
                        write!(out, "{r}")?;
                    }
                    Ok(exit::OK)
                }
                Err(e) => {
                    use labelweir::eval::throughput::ThroughputError;
                    let code = match &e {
                        ThroughputError::Daemon(d) => super::daemon_exit(d),
                        ThroughputError::Workspace(w) => super::workspace_exit(w),
                        ThroughputError::Config(_) => exit::CONFIG,
                        ThroughputError::Io { .. } | ThroughputError::Store(_) => exit::IO,
                        _ => exit::INTERNAL,
                    };
                    Err(Failure::new(code, format!("bench daemon: {e}")).into())
                }
            }
        }
    }
}

/// Read the `[model]` table of a TOML file (other tables are ignored here).
fn model_settings(path: &std::path::Path) -> anyhow::Result<ModelSettings> {
    let text = std::fs::read_to_string(path)
        .with_context(|| format!("reading {}", path.display()))
        .map_err(|e| Failure::new(exit::CONFIG, format!("{e:#}")))?;
    let table: toml::Table = toml::from_str(&text)
        .map_err(|e| Failure::new(exit::CONFIG, format!("{}: {e}", path.display())))?;
    let settings = match table.get("model") {
        Some(v) => v
            .clone()
            .try_into::<ModelSettings>()
            .map_err(|e| Failure::new(exit::CONFIG, format!("{}: [model]: {e}", path.display())))?,
        None => ModelSettings::default(),
    };
    settings
        .validate()
        .map_err(|e| Failure::new(exit::CONFIG, format!("{}: [model]: {e}", path.display())))?;
    Ok(settings)
}

/// Progress lines on stderr, unless the report goes out as JSON.
fn progress_unless(json: bool) -> impl FnMut(&str) {
    move |line| {
        if !json {
            eprintln!("  {line}");
        }
    }
}

/// Print a bench report: pretty JSON under `--json`, else its readable text.
fn print_report<T: serde::Serialize + ?Sized>(
    json: bool,
    report: &T,
    text: impl FnOnce(&T) -> String,
) -> anyhow::Result<u8> {
    let mut out = std::io::stdout().lock();
    if json {
        serde_json::to_writer_pretty(&mut out, report).context("writing JSON")?;
        writeln!(out)?;
    } else {
        write!(out, "{}", text(report))?;
    }
    Ok(exit::OK)
}

fn engine(a: EngineArgs) -> anyhow::Result<u8> {
    let settings = match &a.config {
        Some(p) => model_settings(p)?,
        None => ModelSettings::default(),
    };
    let opts = BenchOptions {
        quick: a.quick,
        seed: a.seed,
        settings,
        scale: !a.no_scale,
    };
    let report = benchmark::run(&opts, progress_unless(a.json))
        .map_err(|e| Failure::new(exit::INTERNAL, format!("benchmark failed: {e}")))?;
    print_report(a.json, &report, benchmark::render_text)
}

fn casebook(a: CasebookArgs) -> anyhow::Result<u8> {
    use labelweir::eval::casebook::{self, CasebookOptions};
    // The streams' vendor is the casebook's own, so a file whose vendor list is still empty (the
    // shipped one) is read as if it listed it.
    let config = match &a.config {
        Some(p) => {
            let text = std::fs::read_to_string(p)
                .with_context(|| format!("reading {}", p.display()))
                .map_err(|e| Failure::new(exit::CONFIG, format!("{e:#}")))?;
            let mut c = labelweir::config::Config::parse_str(&text, p)
                .map_err(|e| Failure::new(exit::CONFIG, format!("{}: {e}", p.display())))?;
            if c.vendors.is_empty() {
                c.vendors = vec!["casebook".into()];
            }
            c.validate()
                .map_err(|e| Failure::new(exit::CONFIG, format!("{}: {e}", p.display())))?;
            c
        }
        None => labelweir::config::Config::default(),
    };
    let opts = CasebookOptions {
        quick: a.quick,
        seed: a.seed,
        config,
        only: a.case,
        expert_lag: a.expert_lag,
    };
    let report = casebook::run(&opts, progress_unless(a.json))
        .map_err(|e| Failure::new(exit::INTERNAL, format!("casebook failed: {e}")))?;
    print_report(a.json, &report, casebook::render_text)
}

fn scale(a: ScaleArgs) -> anyhow::Result<u8> {
    use labelweir::eval::scale;
    let settings = match &a.config {
        Some(p) => model_settings(p)?,
        None => ModelSettings::default(),
    };
    let mut only = Vec::new();
    for c in &a.case {
        let parsed = c
            .split_once('x')
            .and_then(|(d, k)| Some((d.trim().parse().ok()?, k.trim().parse().ok()?)));
        match parsed {
            Some((d, k)) if d > 0 && k >= 2 => only.push((d, k)),
            _ => {
                return Err(Failure::new(
                    exit::INPUT,
                    format!("bench scale: --case {c:?} is not FEATURESxCLASSES (e.g. 768x20)"),
                )
                .into())
            }
        }
    }
    let opts = scale::ScaleOptions {
        quick: a.quick,
        seed: a.seed,
        settings,
        only: (!only.is_empty()).then_some(only),
    };
    let rows = scale::run(&opts, progress_unless(a.json))
        .map_err(|e| Failure::new(exit::INTERNAL, format!("bench scale failed: {e}")))?;
    print_report(a.json, &rows, |r| scale::render_text(r))
}
