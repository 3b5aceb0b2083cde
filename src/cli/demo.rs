//! `labelweir demo`: a workspace in the fictional recycling plant, batches dropped over a few seconds, every
//! verdict printed as it happens.

use std::net::SocketAddr;
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicUsize, Ordering};
use std::sync::Arc;
use std::time::Duration;

use anyhow::Context;

use super::{exit, Failure};
use labelweir::config::Config;
use labelweir::daemon::{self, RunOptions};
use labelweir::scenario::{self, Plant};
use labelweir::store::{BatchRecord, Outcome};
use labelweir::workspace::Workspace;

/// Run a demonstration: a fictional recycling plant's sorting model, three contracted labeling vendors, and
/// the daemon judging their batches live.
///
/// Creates a workspace in DIR (which must not exist or be empty), starts the daemon on it, drops the
/// vendors' batches into their folders over a few seconds and prints each verdict with its reasons. One
/// vendor starts delivering systematically flipped labels partway through; one file is malformed. Then it
/// keeps serving metrics until Ctrl-C (or exits at once with --exit-when-idle). A flag is a suspicion for
/// review, not proof.
#[derive(Debug, clap::Args)]
pub struct Args {
    /// Folder for the demo workspace (must not exist, or be empty; see --fresh).
    pub dir: PathBuf,
    /// Start over in a folder that holds an earlier demo run (its workspace/, trusted-items.csv,
    /// pool-items.csv and, after --embeddings, embeddings.parquet): remove them first. Any other non-empty
    /// folder is still refused.
    #[arg(long)]
    pub fresh: bool,
    /// Exit as soon as every batch has a verdict instead of serving metrics until Ctrl-C.
    #[arg(long)]
    pub exit_when_idle: bool,
    /// Serve /metrics here (default: the configured 127.0.0.1:9464).
    #[arg(long)]
    pub listen: Option<SocketAddr>,
    /// Pause between dropped batches, in milliseconds.
    #[arg(long, default_value_t = 400)]
    pub pace_ms: u64,
    /// Features by reference: the team keeps a feature table of embeddings and vendors deliver `id,label`
    /// files only. The embeddings are invented: a seeded random encoder of the plant's sensor readings
    /// (see `labelweir::scenario::embed`), not a trained model.
    #[arg(long)]
    pub embeddings: bool,
    /// Dimension of the invented embeddings (with --embeddings).
    #[arg(long, default_value_t = EMBEDDING_DIM)]
    pub embedding_dim: usize,
}

/// Default embedding dimension of the by-reference demo. 384 is the size of common sentence and image
/// encoders, but today's engine is dense in d·K and scores a 300-item batch at d = 384, K = 8 in about a
/// minute on two cores (measured, see the README), so the demo uses 64 until the engine scales.
pub const EMBEDDING_DIM: usize = 64;

const VENDORS: [&str; 3] = ["north-sort", "east-labels", "delta-tagging"];

/// Items in the pool the demo starts from (the plant's own labelled history).
const POOL_ITEMS: usize = 1_500;
/// Its file, beside the trusted set.
const POOL_FILE: &str = "pool-items.csv";
/// Its item ids' prefix.
const POOL_PREFIX: &str = "plant-history";

/// One planned delivery.
struct Drop {
    vendor: &'static str,
    name: String,
    bytes: Vec<u8>,
    note: &'static str,
}

fn csv(prefix: &str, x: &ndarray::Array2<f64>, y: &[usize]) -> anyhow::Result<Vec<u8>> {
    let mut out = Vec::new();
    labelweir::data::write_csv(
        &mut out,
        ("id", "label"),
        &scenario::item_ids(prefix, y.len()),
        &scenario::label_names(y),
        &scenario::feature_names(),
        x.view(),
    )?;
    Ok(out)
}

fn plan(plant: &Plant) -> anyhow::Result<Vec<Drop>> {
    let paper = scenario::class_names()
        .iter()
        .position(|c| c == "paper")
        .unwrap_or(0);
    let mut drops = Vec::new();
    let mut seed = 100;
    for week in 1..=4 {
        for vendor in VENDORS {
            seed += 1;
            let (x, y) = plant.sample(300, seed);
            let name = format!("week{week:02}.csv");
            let prefix = format!("{vendor}-w{week:02}");
            let (y, note) = if vendor == "delta-tagging" && week >= 3 {
                // From week 3 on, this vendor labels one region of the belt's items as paper
                // (systematic flips; Zhang, Zhu & Wright 2018's systematic-bias setting).
                let (y2, _) = scenario::region_flips(x.view(), &y, paper, 0.15, seed);
                (
                    y2,
                    "systematically flipped labels (a region of items labeled paper)",
                )
            } else {
                (y, "clean")
            };
            drops.push(Drop {
                vendor,
                name,
                bytes: csv(&prefix, &x, &y)?,
                note,
            });
        }
        if week == 2 {
            // A malformed delivery: a sensor reading exported as text.
            let (x, y) = plant.sample(50, 999);
            let text = String::from_utf8(csv("east-labels-fix", &x, &y)?)?;
            let mut lines: Vec<String> = text.lines().map(String::from).collect();
            if let Some(row) = lines.get_mut(7) {
                let mut cells: Vec<String> = row.split(',').map(String::from).collect();
                if cells.len() > 5 {
                    cells[5] = "n/a".into();
                }
                *row = cells.join(",");
            }
            drops.push(Drop {
                vendor: "east-labels",
                name: "week02-fix.csv".into(),
                bytes: (lines.join("\n") + "\n").into_bytes(),
                note: "malformed (a text cell in a numeric column)",
            });
        }
    }
    Ok(drops)
}

fn print_verdict(r: &BatchRecord) {
    let outcome = r.outcome.map_or("?", |o| o.as_str());
    let mut line = format!(
        "{:<14} {:<16} -> {:<11}",
        r.vendor,
        r.original_name,
        outcome.to_uppercase()
    );
    if let Some(s) = &r.scores {
        line.push_str(&format!(
            " repair cost {:.3}, damage {:+.3} nats",
            s.repair_cost, s.damage
        ));
    }
    println!("{line}");
    match r.outcome {
        Some(Outcome::Quarantined) => {
            if let Some(d) = &r.decision {
                for reason in &d.reasons {
                    println!("      reason: {} - {}", reason.code, reason.detail);
                }
                if d.recall > 0 {
                    println!(
                        "      recall: this vendor's {} batch(es) accepted since that statistic last stood at 0 \
                         go back to quarantine for review (recalled_on_drift)",
                        d.recall
                    );
                }
            }
            let flagged: Vec<_> = r
                .suspects
                .iter()
                .filter(|s| s.proposed_label != s.label)
                .collect();
            println!(
                "      {} item(s) flagged (the engine proposes another label); top suspects (a suspicion, not proof):",
                flagged.len()
            );
            for s in flagged.iter().take(3) {
                println!(
                    "        {}  labeled {:<10} proposed {:<10} suspicion {:.2}",
                    s.id, s.label, s.proposed_label, s.suspicion
                );
            }
        }
        Some(Outcome::Rejected) | Some(Outcome::Duplicate) => {
            if let Some(rr) = &r.reject {
                println!("      reason: {} - {}", rr.code, rr.detail);
            }
        }
        _ => {}
    }
}

/// The by-reference variant: every item that the plan delivers (and the trusted set) goes into a feature
/// table of invented embeddings, written as Parquet; each delivery that parses becomes `id,label` only.
/// The malformed delivery stays as it is (it carries feature columns and is refused for them).
fn to_reference(
    dir: &Path,
    trusted: (&ndarray::Array2<f64>, &[usize]),
    pool: (&ndarray::Array2<f64>, &[usize]),
    drops: &mut [Drop],
    dim: usize,
) -> anyhow::Result<(PathBuf, PathBuf, PathBuf)> {
    use labelweir::data::{parse_table, Format, TableOptions};
    use labelweir::scenario::embed::Encoder;
    let encoder = Encoder::new(trusted.0.view(), dim, 2026);
    let mut ids = scenario::item_ids("trusted", trusted.1.len());
    let mut values = encoder.encode(trusted.0.view());
    let id_label = |ids: &[String], labels: &[String]| -> Vec<u8> {
        let mut out = String::from("id,label\n");
        for (i, l) in ids.iter().zip(labels) {
            out.push_str(&format!("{i},{l}\n"));
        }
        out.into_bytes()
    };
    let trusted_file = dir.join("trusted-items.csv");
    std::fs::write(
        &trusted_file,
        id_label(&ids, &scenario::label_names(trusted.1)),
    )?;
    let pool_ids = scenario::item_ids(POOL_PREFIX, pool.1.len());
    let pool_file = dir.join(POOL_FILE);
    std::fs::write(
        &pool_file,
        id_label(&pool_ids, &scenario::label_names(pool.1)),
    )?;
    values.extend(encoder.encode(pool.0.view()));
    ids.extend(pool_ids);
    for d in drops.iter_mut() {
        let Ok(t) = parse_table(
            &d.bytes,
            Format::Csv,
            &d.name,
            &TableOptions::default(),
            None,
        ) else {
            continue;
        };
        values.extend(encoder.encode(t.features.view()));
        ids.extend(t.ids.iter().cloned());
        d.bytes = id_label(&t.ids, &t.labels);
    }
    let table = dir.join("embeddings.parquet");
    let mut out = Vec::new();
    labelweir::data::write_parquet_features(&mut out, "id", &ids, &encoder.names(), &values)?;
    std::fs::write(&table, out)?;
    Ok((trusted_file, pool_file, table))
}

/// Whether `dir` holds an earlier demo run and nothing else.
fn is_earlier_demo(dir: &Path) -> std::io::Result<bool> {
    let names: Vec<String> = std::fs::read_dir(dir)?
        .flatten()
        .map(|e| e.file_name().to_string_lossy().into_owned())
        .collect();
    let ours = |n: &String| DEMO_FILES.contains(&n.as_str()) || n == "workspace";
    Ok(names.iter().all(ours)
        && names.iter().any(|n| n == "trusted-items.csv")
        && dir.join("workspace").join("labelweir.toml").is_file())
}

/// The files a demo run writes beside its workspace (the feature table only with `--embeddings`).
const DEMO_FILES: [&str; 3] = ["trusted-items.csv", POOL_FILE, "embeddings.parquet"];

fn setup(
    dir: &Path,
    drops: &mut [Drop],
    embeddings: Option<usize>,
    fresh: bool,
) -> anyhow::Result<()> {
    if dir.exists() && std::fs::read_dir(dir)?.next().is_some() {
        let earlier = is_earlier_demo(dir)?;
        if fresh && earlier {
            std::fs::remove_dir_all(dir.join("workspace"))?;
            for f in DEMO_FILES {
                if dir.join(f).exists() {
                    std::fs::remove_file(dir.join(f))?;
                }
            }
        } else {
            let hint = if earlier {
                "it holds an earlier demo run: add --fresh to start over, or pick a new folder"
            } else {
                "pick a new folder"
            };
            return Err(Failure::new(
                exit::INPUT,
                format!("{} exists and is not empty; {hint}", dir.display()),
            )
            .into());
        }
    }
    std::fs::create_dir_all(dir)?;
    let plant = Plant::new(2026);
    let (x, y) = plant.sample_per_class(10, 7);
    let ws_dir = dir.join("workspace");
    let vendors: Vec<String> = VENDORS.iter().map(|s| s.to_string()).collect();
    // The team's own labelled history, which a team that retrains a model already has: the pool the
    // daemon starts from. Without one, the first vendors' batches build the reference model, and with their
    // flagged items waiting for a reviewer it learns too little of the hard-but-right items (wet cardboard
    // and the like) and holds clean batches for labels; see the README, "A pool to start from".
    let (pool_x, pool_y) = plant.sample(POOL_ITEMS, 31);
    let (trusted, pool, features) = match embeddings {
        Some(dim) => {
            let (t, p, f) = to_reference(dir, (&x, &y), (&pool_x, &pool_y), drops, dim)?;
            (t, p, Some(f))
        }
        None => {
            let trusted = dir.join("trusted-items.csv");
            std::fs::write(&trusted, csv("trusted", &x, &y)?)?;
            let pool = dir.join(POOL_FILE);
            std::fs::write(&pool, csv(POOL_PREFIX, &pool_x, &pool_y)?)?;
            (trusted, pool, None)
        }
    };
    let extras = labelweir::workspace::InitExtras {
        features,
        pool: Some(pool),
    };
    labelweir::workspace::create_workspace_with(
        &ws_dir,
        &trusted,
        &vendors,
        "demo-expert",
        &extras,
    )
    .map_err(super::workspace_failure)?;
    // Demo pacing: react within a fraction of a second.
    let cfg_path = Workspace::new(&ws_dir).config_file();
    let text = std::fs::read_to_string(&cfg_path)?
        .replace("quiet_period_ms = 2000", "quiet_period_ms = 200")
        .replace("rescan_interval_secs = 60", "rescan_interval_secs = 5");
    std::fs::write(&cfg_path, text)?;
    Ok(())
}

/// Run the subcommand.
pub fn run(args: Args) -> anyhow::Result<u8> {
    let mut drops = plan(&Plant::new(2026))?;
    let embeddings = args.embeddings.then_some(args.embedding_dim);
    setup(&args.dir, &mut drops, embeddings, args.fresh).context("creating the demo workspace")?;
    let ws_dir = args.dir.join("workspace");
    let config =
        Config::from_workspace(&ws_dir).map_err(|e| Failure::new(exit::CONFIG, e.to_string()))?;
    let total = drops.len();
    println!("labelweir demo: a recycling plant's sorting model, trained on labels from three contracted vendors.");
    println!(
        "workspace: {}  (trusted set: 10 verified items per material class; pool: {POOL_ITEMS} items of the plant's own labelled history)",
        ws_dir.display()
    );
    if let Some(dim) = embeddings {
        println!("features by reference: the team's feature table holds invented {dim}-dimension embeddings (a seeded random encoder of the sensor readings, not a trained model); vendors deliver id,label files only.");
    }
    println!("dropping {total} batches into inbox/<vendor>/ over a few seconds; verdicts follow as they happen.");
    println!("A flag is a suspicion for human review, not proof.\n");

    let rt = tokio::runtime::Builder::new_multi_thread()
        .worker_threads(2)
        .enable_all()
        .build()?;
    let done = Arc::new(AtomicUsize::new(0));
    let idle = Arc::new(tokio::sync::Notify::new());
    let observer: labelweir::Observer = {
        let (done, idle) = (done.clone(), idle.clone());
        Arc::new(move |r: &BatchRecord| {
            print_verdict(r);
            if done.fetch_add(1, Ordering::SeqCst) + 1 == total {
                idle.notify_one();
            }
        })
    };
    let on_ready: Arc<dyn Fn(Option<SocketAddr>) + Send + Sync> = {
        let ws = Workspace::new(&ws_dir);
        let pace = Duration::from_millis(args.pace_ms);
        let drops = std::sync::Mutex::new(Some(drops));
        Arc::new(move |addr: Option<SocketAddr>| {
            if let Some(a) = addr {
                println!("metrics: http://{a}/metrics\n");
            }
            let Some(drops) = drops.lock().ok().and_then(|mut d| d.take()) else {
                return;
            };
            let ws = ws.clone();
            std::thread::spawn(move || {
                for d in drops {
                    let inbox = ws.vendor_inbox(d.vendor);
                    // Written to a hidden temporary name and renamed into place, as a vendor should.
                    match labelweir::fsx::write_atomic(&inbox, &d.name, &d.bytes, None) {
                        Ok(_) => println!("  dropped {}/{} ({})", d.vendor, d.name, d.note),
                        Err(e) => eprintln!("  could not drop {}: {e}", d.name),
                    }
                    std::thread::sleep(pace);
                }
            });
        })
    };
    let exit_when_idle = args.exit_when_idle;
    let deadline = super::run::shutdown_deadline(&config);
    let shutdown = {
        let idle = idle.clone();
        async move {
            idle.notified().await;
            if exit_when_idle {
                println!("\nevery batch has a verdict; stopping (--exit-when-idle).");
                return;
            }
            println!("\nevery batch has a verdict. Serving metrics until Ctrl-C.");
            super::run::signals(deadline).await;
        }
    };
    let opts = RunOptions {
        listen: args.listen,
        allow_remote_listen: false,
        observer: Some(observer),
        on_ready: Some(on_ready),
    };
    rt.block_on(daemon::run(Workspace::new(&ws_dir), config, opts, shutdown))
        .map_err(|e| Failure::new(super::daemon_exit(&e), e.to_string()))?;
    println!(
        "\nfolders: {}/accepted, quarantine (read-only copies + reports), rejected; vendor notices in notices/<vendor>/;\n\
         spot-checks/: items of accepted batches for the trusted-set experts to label (`labelweir spot-check list {}`)",
        ws_dir.display(),
        ws_dir.display()
    );
    Ok(exit::OK)
}
