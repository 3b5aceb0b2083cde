//! Sustained throughput through the whole path (claim, parse, score, decide, persist, notice), measured,
//! never asserted. Run it with `labelweir bench daemon` or
//! `cargo run --release --example throughput`. It drives the daemon from outside, like an operator:
//! the daemon knows nothing of it.

use std::sync::atomic::{AtomicUsize, Ordering};
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

use crate::config::{Config, ConfigError};
use crate::daemon::{self, DaemonError, RunOptions};
use crate::pipeline::score;
use crate::pipeline::Observer;
use crate::scenario::{self, Plant};
use crate::store::StoreError;
use crate::store::{AuditRecord, BatchRecord, BatchState, Outcome, PoolChange, PoolEntry, Store};
use crate::workspace::{create_workspace, Workspace, WorkspaceError};

/// What to measure.
#[derive(Debug, Clone)]
pub struct Options {
    /// Batches dropped at once.
    pub batches: usize,
    /// Items per batch (each with the plant's 32 features).
    pub items: usize,
    /// Items already in the pool when the measurement starts.
    pub pool: usize,
    /// Seed for the generated items.
    pub seed: u64,
    /// Scratch folder (a fresh sub-folder is created and removed); default: the system temp dir.
    pub scratch: Option<std::path::PathBuf>,
    /// Engine settings for the run (default: the workspace defaults). A cheaper setting shows how the
    /// pipeline behaves around a faster scoring stage.
    pub model: Option<crate::model::ModelSettings>,
}

impl Default for Options {
    /// 30 batches of 1,000 items × 32 features against a pool of 100,000 (issue 3's case).
    fn default() -> Self {
        Self {
            batches: 30,
            items: 1000,
            pool: 100_000,
            seed: 3,
            scratch: None,
            model: None,
        }
    }
}

/// What was measured.
#[derive(Debug, Clone)]
pub struct Report {
    /// The options used.
    pub options: Options,
    /// Seconds to build the starting pool and its exact summary (not part of the rate).
    pub setup_seconds: f64,
    /// Seconds from dropping the batches to the last verdict.
    pub wall_seconds: f64,
    /// Items per second through the whole path (first claim to last verdict).
    pub items_per_second: f64,
    /// Items per second once the pipeline is full: from the verdict of batch `warmup` to the last one,
    /// counting the items settled in between.
    pub steady_items_per_second: f64,
    /// Batches left out of the steady rate (pipeline fill).
    pub warmup: usize,
    /// What scoring alone would allow: items per batch / mean `score` seconds.
    pub scoring_bound_items_per_second: f64,
    /// Mean seconds per batch for each stage (the `stage` label values of `labelweir_batch_stage_duration_seconds`).
    pub stage_mean_seconds: Vec<(String, f64)>,
    /// CPU milliseconds per batch between the drop and the last verdict: `("process", total)`, then
    /// per thread (`scoring`, `ingest`, `filing`, `runtime`, `store`), then `other` (the rest,
    /// mostly the short-lived `labelweir-absorb` threads). Empty where `/proc` is not readable.
    pub cpu_ms_per_batch: Vec<(String, f64)>,
    /// Median and 95th percentile of claim → settled, seconds.
    pub latency_p50_p95: (f64, f64),
    /// Verdict counts.
    pub outcomes: Vec<(String, usize)>,
}

/// Version of the `bench daemon --json` document (`schemas/bench-daemon.schema.json`); raised on any
/// change a reader could trip over.
pub const JSON_VERSION: u32 = 1;

impl Report {
    /// The report as one versioned JSON document (`bench daemon --json`; schema in
    /// `schemas/bench-daemon.schema.json`). Times in seconds, rates in items per second, CPU in
    /// milliseconds per batch.
    pub fn to_json(&self) -> serde_json::Value {
        let o = &self.options;
        let pairs = |v: &[(String, f64)]| {
            v.iter()
                .map(|(k, x)| (k.clone(), serde_json::json!(finite(*x))))
                .collect::<serde_json::Map<_, _>>()
        };
        serde_json::json!({
            "kind": "labelweir-bench-daemon",
            "version": JSON_VERSION,
            "options": {
                "batches": o.batches,
                "items_per_batch": o.items,
                "pool_items": o.pool,
                "features": 32,
                "seed": o.seed,
            },
            "setup_seconds": finite(self.setup_seconds),
            "wall_seconds": finite(self.wall_seconds),
            "items_per_second": finite(self.items_per_second),
            "steady_items_per_second": finite(self.steady_items_per_second),
            "warmup_batches": self.warmup,
            "scoring_bound_items_per_second": finite(self.scoring_bound_items_per_second),
            "latency_seconds": {
                "p50": finite(self.latency_p50_p95.0),
                "p95": finite(self.latency_p50_p95.1),
            },
            "stage_mean_seconds": pairs(&self.stage_mean_seconds),
            "cpu_ms_per_batch": pairs(&self.cpu_ms_per_batch),
            "outcomes": self.outcomes.iter().map(|(k, n)| (k.clone(), serde_json::json!(n))).collect::<serde_json::Map<_, _>>(),
        })
    }
}

/// A number JSON can carry: non-finite values (a rate over zero time) become `null`.
fn finite(x: f64) -> Option<f64> {
    x.is_finite().then_some(x)
}

impl std::fmt::Display for Report {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        let o = &self.options;
        writeln!(
            f,
            "daemon throughput: {} batches x {} items x 32 features, pool of {} items",
            o.batches, o.items, o.pool
        )?;
        writeln!(
            f,
            "  setup (pool + exact summary, not timed below): {:.1} s",
            self.setup_seconds
        )?;
        writeln!(
            f,
            "  wall time, first drop to last verdict:       {:.2} s",
            self.wall_seconds
        )?;
        writeln!(f, "  sustained rate:                               {:.0} items/s (target >= 20000 on 2 cores)", self.items_per_second)?;
        writeln!(
            f,
            "  steady rate (after the first {} verdicts):    {:.0} items/s",
            self.warmup, self.steady_items_per_second
        )?;
        writeln!(
            f,
            "  scoring alone would allow:                    {:.0} items/s (steady rate is {:.0}% of it)",
            self.scoring_bound_items_per_second,
            100.0 * self.steady_items_per_second / self.scoring_bound_items_per_second
        )?;
        writeln!(
            f,
            "  per batch, claim -> settled: p50 {:.3} s, p95 {:.3} s (includes queueing)",
            self.latency_p50_p95.0, self.latency_p50_p95.1
        )?;
        writeln!(
            f,
            "  mean seconds per batch by stage (thread; stages on different threads overlap):"
        )?;
        for (s, v) in &self.stage_mean_seconds {
            let thread = match s.as_str() {
                "claim" | "parse" => "ingest",
                "notice" => "filing",
                _ => "scoring",
            };
            writeln!(f, "    {s:<8} {v:.4}  ({thread})")?;
        }
        if let Some((_, total)) = self.cpu_ms_per_batch.first() {
            let scoring = self
                .cpu_ms_per_batch
                .iter()
                .find(|(k, _)| k == "scoring")
                .map_or(f64::NAN, |(_, v)| *v);
            let parts: Vec<String> = self.cpu_ms_per_batch[1..]
                .iter()
                .map(|(k, v)| format!("{k} {v:.1}"))
                .collect();
            writeln!(
                f,
                "  CPU ms per batch: {total:.1} in all ({})",
                parts.join(", ")
            )?;
            // On an otherwise idle machine with two cores a batch needs at least max(scoring
            // thread, all CPU / 2) of wall time; wall time above that is waiting (other load on
            // the machine, or the pipeline stalling).
            let floor_ms = scoring.max(total / 2.0);
            writeln!(
                f,
                "  CPU bound on an idle 2-core machine:          {:.0} items/s (max of scoring thread, all CPU / 2 = {floor_ms:.1} ms per batch)",
                o.items as f64 / floor_ms * 1000.0
            )?;
        }
        let outs: Vec<String> = self
            .outcomes
            .iter()
            .map(|(k, n)| format!("{k} {n}"))
            .collect();
        writeln!(f, "  verdicts: {}", outs.join(", "))
    }
}

/// CPU time from `/proc` (Linux): the process (user + system, every thread that ever ran, in
/// `USER_HZ` ticks of 1/100 s) and each live thread by name (`schedstat`, nanoseconds on the CPU).
#[derive(Debug, Clone)]
struct CpuSnapshot {
    process_s: f64,
    threads: Vec<(String, f64)>,
}

impl CpuSnapshot {
    fn take() -> Option<Self> {
        let stat = std::fs::read_to_string("/proc/self/stat").ok()?;
        // Fields after the command name's closing parenthesis: state is field 3, utime 14, stime 15.
        let rest = &stat[stat.rfind(')')? + 1..];
        let f: Vec<&str> = rest.split_whitespace().collect();
        let ticks = f.get(11)?.parse::<f64>().ok()? + f.get(12)?.parse::<f64>().ok()?;
        let mut threads = Vec::new();
        for e in std::fs::read_dir("/proc/self/task").ok()?.flatten() {
            let p = e.path();
            let comm = std::fs::read_to_string(p.join("comm")).unwrap_or_default();
            let ns = std::fs::read_to_string(p.join("schedstat"))
                .ok()
                .and_then(|t| t.split_whitespace().next()?.parse::<f64>().ok())
                .unwrap_or(0.0);
            threads.push((comm.trim().to_string(), ns / 1e9));
        }
        Some(Self {
            process_s: ticks / 100.0,
            threads,
        })
    }

    fn group(name: &str) -> &'static str {
        match name {
            "labelweir-scori" | "labelweir-scoring" => "scoring",
            "labelweir-inges" | "labelweir-ingest" => "ingest",
            "labelweir-filin" | "labelweir-filing" => "filing",
            n if n.starts_with("tokio") => "runtime",
            n if n.starts_with("sled") || n == "log flusher" => "store",
            _ => "other",
        }
    }

    /// `self − start`, in ms per batch: the process total first, then by thread group.
    fn per_batch_ms(&self, start: &Self, batches: usize) -> Vec<(String, f64)> {
        let per = |s: f64| 1000.0 * s / batches as f64;
        let total = self.process_s - start.process_s;
        let mut out = vec![("process".to_string(), per(total))];
        let mut named = 0.0;
        for g in ["scoring", "ingest", "filing", "runtime", "store"] {
            let sum = |snap: &Self| -> f64 {
                snap.threads
                    .iter()
                    .filter(|(n, _)| Self::group(n) == g)
                    .map(|(_, s)| s)
                    .sum()
            };
            let d = (sum(self) - sum(start)).max(0.0);
            named += d;
            out.push((g.to_string(), per(d)));
        }
        out.push(("other".to_string(), per((total - named).max(0.0))));
        out
    }
}

fn csv(ids: &[String], y: &[usize], x: &ndarray::Array2<f64>) -> Result<Vec<u8>, ThroughputError> {
    let mut out = Vec::new();
    crate::data::write_csv(
        &mut out,
        ("id", "label"),
        ids,
        &scenario::label_names(y),
        &scenario::feature_names(),
        x.view(),
    )
    .map_err(|e| DaemonError::Internal(e.to_string()))?;
    Ok(out)
}

/// Seed the pool through the store's own transitions (claim → verdict with pool items → settled).
fn seed_pool(store: &Store, plant: &Plant, n: usize, seed: u64) -> Result<(), StoreError> {
    let mut left = n;
    let mut k = 0;
    while left > 0 {
        let m = left.min(5000);
        let (x, y) = plant.sample(m, seed + k);
        let id = store.new_batch_id()?;
        let mut rec = BatchRecord::claimed(
            id.clone(),
            "seed",
            format!("seed-{k}.csv"),
            format!("{id}.csv"),
        );
        store.record_claim(&rec)?;
        rec.outcome = Some(Outcome::Accepted);
        rec.items = Some(m);
        let entry = PoolEntry {
            batch_id: id.clone(),
            vendor: "seed".into(),
            ids: scenario::item_ids(&format!("seed{k}"), m),
            labels: y,
            x: x.iter().copied().collect(),
            n_features: x.ncols(),
        };
        let rec = store.record_verdict(
            &rec,
            AuditRecord::new("bench", "verdict"),
            false,
            None,
            None,
            Some(entry),
        )?;
        store.transition(
            &rec.id,
            &[BatchState::Decided],
            BatchState::Accepted,
            PoolChange::None,
            vec![],
            |_| {},
        )?;
        left -= m;
        k += 1;
    }
    Ok(())
}

/// Why a throughput run failed.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum ThroughputError {
    /// Filesystem error in the scratch folder.
    #[error("{what}: {source}")]
    Io {
        /// What was being done.
        what: String,
        /// The cause.
        #[source]
        source: std::io::Error,
    },
    /// The scratch workspace could not be created.
    #[error(transparent)]
    Workspace(#[from] WorkspaceError),
    /// The scratch workspace's configuration does not load.
    #[error(transparent)]
    Config(#[from] ConfigError),
    /// Store error while seeding the pool.
    #[error(transparent)]
    Store(#[from] StoreError),
    /// The pool summary could not be built.
    #[error(transparent)]
    Scoring(#[from] crate::pipeline::ScoringError),
    /// The daemon stopped with an error.
    #[error(transparent)]
    Daemon(#[from] DaemonError),
}

fn io(what: impl Into<String>) -> impl FnOnce(std::io::Error) -> ThroughputError {
    let what = what.into();
    move |source| ThroughputError::Io { what, source }
}

/// Build a scratch workspace, seed the pool, drop the batches at once into a running daemon, and
/// measure. The scratch folder is removed afterwards.
pub fn run(opts: &Options) -> Result<Report, ThroughputError> {
    run_with_progress(opts, Arc::new(|_, _| {}))
}

/// Called with (batches settled, batches dropped) after each verdict, for a progress display.
pub type Progress = Arc<dyn Fn(usize, usize) + Send + Sync>;

/// [`run`], reporting each settled batch to `progress` (on the daemon's filing thread: keep it short).
pub fn run_with_progress(opts: &Options, progress: Progress) -> Result<Report, ThroughputError> {
    let base = opts.scratch.clone().unwrap_or_else(std::env::temp_dir);
    let root = base.join(format!(
        "labelweir-throughput-{}-{}",
        std::process::id(),
        chrono::Utc::now().timestamp_millis()
    ));
    std::fs::create_dir_all(&root).map_err(io(format!("create {}", root.display())))?;
    let result = measure(opts, &root, progress);
    let _ = std::fs::remove_dir_all(&root);
    result
}

fn measure(
    opts: &Options,
    root: &std::path::Path,
    progress: Progress,
) -> Result<Report, ThroughputError> {
    let t_setup = Instant::now();
    let (ws, config, files) = prepare(opts, root)?;
    let setup_seconds = t_setup.elapsed().as_secs_f64();
    let run = drive(ws, config, files, opts.batches, progress)?;
    Ok(summarize(opts, setup_seconds, &run))
}

/// Generated batch files: name and bytes.
type Files = Vec<(String, Vec<u8>)>;

/// The scratch workspace (daemon settings for a burst: no quiet period, no HTTP), its pool seeded and
/// summarised, and the batches to drop.
fn prepare(
    opts: &Options,
    root: &std::path::Path,
) -> Result<(Workspace, Config, Files), ThroughputError> {
    let plant = Plant::new(opts.seed);
    let (tx, ty) = plant.sample_per_class(10, opts.seed + 1);
    let trusted = root.join("trusted.csv");
    std::fs::write(&trusted, csv(&scenario::item_ids("t", ty.len()), &ty, &tx)?)
        .map_err(io("write the trusted set"))?;
    let dir = root.join("ws");
    let vendors = vec!["bench".to_string()];
    create_workspace(&dir, &trusted, &vendors, "bench")?;
    let ws = Workspace::new(&dir);
    let text = std::fs::read_to_string(ws.config_file()).map_err(io("read the configuration"))?;
    let text = text
        .replace("quiet_period_ms = 2000", "quiet_period_ms = 0")
        .replace("enabled = true", "enabled = false")
        .replace("queue_capacity = 4", "queue_capacity = 8")
        .replace("min_free_bytes = 67108864", "min_free_bytes = 1");
    std::fs::write(ws.config_file(), text).map_err(io("write the configuration"))?;
    let mut config = Config::from_workspace(&dir)?;
    if let Some(m) = &opts.model {
        // The feature map is fixed at init; everything else in [model] may vary per run.
        config.model = crate::model::ModelSettings {
            feature_map: config.model.feature_map,
            ..m.clone()
        };
    }
    {
        let store = Store::open_workspace(&dir, &config.store)?;
        seed_pool(&store, &plant, opts.pool, opts.seed + 100)?;
        let meta = store.workspace_meta()?;
        let mut state = score::rebuild_pool(&store, &meta, &config)?;
        score::save_pool(&mut state, &store)?;
        store.flush()?;
    }
    let files: Vec<(String, Vec<u8>)> = (0..opts.batches)
        .map(|i| {
            let (x, y) = plant.sample(opts.items, opts.seed + 1000 + i as u64);
            Ok((
                format!("batch-{i:04}.csv"),
                csv(&scenario::item_ids(&format!("b{i}"), y.len()), &y, &x)?,
            ))
        })
        .collect::<Result<_, ThroughputError>>()?;
    Ok((ws, config, files))
}

/// What a run observed.
struct Observed {
    records: Vec<BatchRecord>,
    /// When the files were dropped.
    started: Instant,
    /// CPU time at the drop and at the last verdict.
    cpu: (Option<CpuSnapshot>, Option<CpuSnapshot>),
}

/// Run the daemon until `total` batches are settled; the files are dropped (temp name, then rename) as
/// soon as it is ready.
fn drive(
    ws: Workspace,
    config: Config,
    files: Files,
    total: usize,
    progress: Progress,
) -> Result<Observed, ThroughputError> {
    let done = Arc::new(AtomicUsize::new(0));
    let records: Arc<Mutex<Vec<BatchRecord>>> = Arc::default();
    let idle = Arc::new(tokio::sync::Notify::new());
    let started: Arc<Mutex<Option<Instant>>> = Arc::default();
    // CPU time of the process and its threads at the drop and at the last verdict.
    let cpu: Arc<Mutex<(Option<CpuSnapshot>, Option<CpuSnapshot>)>> = Arc::default();
    let observer: Observer = {
        let (done, idle, records, cpu) = (done.clone(), idle.clone(), records.clone(), cpu.clone());
        Arc::new(move |r: &BatchRecord| {
            if let Ok(mut v) = records.lock() {
                v.push(r.clone());
            }
            let n = done.fetch_add(1, Ordering::SeqCst) + 1;
            progress(n, total);
            if n == total {
                if let Ok(mut c) = cpu.lock() {
                    c.1 = CpuSnapshot::take();
                }
                idle.notify_one();
            }
        })
    };
    let on_ready: Arc<dyn Fn(Option<std::net::SocketAddr>) + Send + Sync> = {
        let (inbox, started, cpu) = (ws.vendor_inbox("bench"), started.clone(), cpu.clone());
        let files = Mutex::new(Some(files));
        Arc::new(move |_| {
            let Some(files) = files.lock().ok().and_then(|mut f| f.take()) else {
                return;
            };
            if let Ok(mut c) = cpu.lock() {
                c.0 = CpuSnapshot::take();
            }
            if let Ok(mut s) = started.lock() {
                *s = Some(Instant::now());
            }
            for (name, bytes) in files {
                let tmp = inbox.join(format!(".{name}.part"));
                if std::fs::write(&tmp, &bytes).is_ok() {
                    let _ = std::fs::rename(&tmp, inbox.join(&name));
                }
            }
        })
    };
    let rt = tokio::runtime::Builder::new_multi_thread()
        .worker_threads(2)
        .enable_all()
        .build()
        .map_err(io("start the runtime"))?;
    let wait = {
        let idle = idle.clone();
        async move { idle.notified().await }
    };
    let opts_run = RunOptions {
        allow_remote_listen: false,
        listen: None,
        observer: Some(observer),
        on_ready: Some(on_ready),
    };
    rt.block_on(daemon::run(ws, config, opts_run, wait))?;
    let started = started
        .lock()
        .ok()
        .and_then(|s| *s)
        .unwrap_or_else(Instant::now);
    let records = records.lock().map(|v| v.clone()).unwrap_or_default();
    let cpu = cpu.lock().map(|c| c.clone()).unwrap_or_default();
    Ok(Observed {
        records,
        started,
        cpu,
    })
}

/// Mean seconds per batch of each stage, from the stage histograms' sums and counts.
fn stage_means() -> Vec<(String, f64)> {
    let text = crate::metrics::get()
        .map(|m| m.render())
        .unwrap_or_default();
    crate::metrics::STAGES
        .iter()
        .map(|s| {
            let find = |suffix: &str| {
                text.lines()
                    .find(|l| {
                        l.starts_with(&format!(
                            "labelweir_batch_stage_duration_seconds_{suffix}{{stage=\"{s}\"}}"
                        ))
                    })
                    .and_then(|l| l.rsplit(' ').next())
                    .and_then(|v| v.parse::<f64>().ok())
                    .unwrap_or(0.0)
            };
            let (sum, count) = (find("sum"), find("count"));
            (
                s.to_string(),
                if count > 0.0 { sum / count } else { f64::NAN },
            )
        })
        .collect()
}

fn summarize(opts: &Options, setup_seconds: f64, run: &Observed) -> Report {
    let recs = &run.records;
    let last = recs.iter().filter_map(|r| r.settled_at).max();
    let first_claim = recs.iter().map(|r| r.claimed_at).min();
    // Wall time from the drop (≈ first claim) to the last verdict.
    let wall = match (first_claim, last) {
        (Some(a), Some(b)) => (b - a).to_std().unwrap_or(Duration::ZERO).as_secs_f64(),
        _ => run.started.elapsed().as_secs_f64(),
    }
    .max(1e-9);
    let items: usize = recs.iter().filter_map(|r| r.items).sum();
    // Steady state: leave out the first verdicts (the pipeline filling up, first-touch costs), then
    // rate = items settled after verdict `warmup` / time from that verdict to the last one.
    let mut settled: Vec<(chrono::DateTime<chrono::Utc>, usize)> = recs
        .iter()
        .filter_map(|r| r.settled_at.map(|t| (t, r.items.unwrap_or(0))))
        .collect();
    settled.sort_by_key(|(t, _)| *t);
    let warmup = (settled.len() / 5)
        .clamp(1, 5)
        .min(settled.len().saturating_sub(2));
    let steady = match (settled.get(warmup), settled.last()) {
        (Some((a, _)), Some((b, _))) if b > a => {
            let n: usize = settled[warmup + 1..].iter().map(|(_, n)| n).sum();
            n as f64 / (*b - *a).to_std().unwrap_or(Duration::ZERO).as_secs_f64()
        }
        _ => f64::NAN,
    };
    let mut lat: Vec<f64> = recs
        .iter()
        .filter_map(|r| {
            r.settled_at.map(|s| {
                (s - r.claimed_at)
                    .to_std()
                    .unwrap_or(Duration::ZERO)
                    .as_secs_f64()
            })
        })
        .collect();
    lat.sort_by(f64::total_cmp);
    let pct = |p: f64| {
        lat.get(((lat.len() as f64 - 1.0) * p).round() as usize)
            .copied()
            .unwrap_or(f64::NAN)
    };
    let stage_mean_seconds = stage_means();
    let cpu_ms_per_batch = match &run.cpu {
        (Some(a), Some(b)) => b.per_batch_ms(a, recs.len().max(1)),
        _ => Vec::new(),
    };
    let score_mean = stage_mean_seconds
        .iter()
        .find(|(s, _)| s == "score")
        .map_or(f64::NAN, |(_, v)| *v);
    let mut outcomes: Vec<(String, usize)> = Vec::new();
    for r in recs {
        let k = r.outcome.map_or("?", |o| o.as_str()).to_string();
        match outcomes.iter_mut().find(|(o, _)| *o == k) {
            Some((_, n)) => *n += 1,
            None => outcomes.push((k, 1)),
        }
    }
    Report {
        options: opts.clone(),
        setup_seconds,
        wall_seconds: wall,
        items_per_second: items as f64 / wall,
        steady_items_per_second: steady,
        warmup,
        scoring_bound_items_per_second: opts.items as f64 / score_mean,
        cpu_ms_per_batch,
        stage_mean_seconds,
        latency_p50_p95: (pct(0.5), pct(0.95)),
        outcomes,
    }
}
