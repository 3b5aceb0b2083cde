//! Metrics: the only module that knows Prometheus.
//!
//! The rest of the daemon reports *events* through the functions and methods here ("a batch was decided",
//! "a stage took this long"); this module turns them into Prometheus series in its own registry, served by
//! [`crate::http`] on `/metrics` in the text format 0.0.4. Own metrics carry the `labelweir_` prefix;
//! the process collector's `process_*` series are unprefixed.
//!
//! Label values are bounded: vendors come from the configuration (events about any other vendor name are
//! dropped, never turned into a label), outcomes, stages, reasons and store operations are fixed sets.
//! No batch ids, file names or hashes appear as labels; those go to logs and the audit trail.
//!
//! The metrics live in one process-wide registry, created by [`install`] (the daemon calls it with the
//! configured vendors); before that, events are ignored.

use std::collections::HashSet;
use std::sync::{Arc, OnceLock, RwLock};
use std::time::Duration;

use prometheus::{
    Encoder, Gauge, GaugeVec, Histogram, HistogramOpts, HistogramVec, IntCounter, IntCounterVec,
    IntGauge, IntGaugeVec, Opts, Registry, TextEncoder,
};

const NS: &str = "labelweir";

/// The fates counted by `labelweir_admission_items_total`.
pub const ADMISSION_FATES: [&str; 3] = ["held", "entered_proposed", "dropped"];

/// Batch outcomes used as the `outcome` label.
pub const OUTCOMES: [&str; 7] = [
    "accepted",
    "quarantined",
    "rejected",
    "duplicate",
    "released",
    "withdrawn",
    // A reviewer's reject of a quarantined batch (the batch state of the same name).
    "review_rejected",
];
/// Pipeline stages used as the `stage` label of the duration histogram: `claim` and `parse` (ingest
/// thread), `score`, `decide`, `persist` (the verdict's store transaction) and `absorb` (the pool summary
/// taking in an accepted batch) on the scoring thread, `notice` (filing: file, report, notice, terminal
/// state) on the filing thread.
pub const STAGES: [&str; 7] = [
    "claim", "parse", "score", "decide", "persist", "absorb", "notice",
];
/// Reasons for a rescan.
pub const RESCAN_REASONS: [&str; 5] = ["startup", "timer", "event", "overflow", "error"];
/// Filesystems whose free space is reported.
pub const MOUNTS: [&str; 2] = ["inbox", "state"];
/// Every `(stage, kind)` pair `labelweir_errors_total` is incremented with (pre-created at zero so alert
/// rules see a series before the first error).
pub const ERROR_KINDS: [(&str, &str); 7] = [
    ("claim", "list"),
    ("claim", "rename"),
    ("file", "settle"),
    ("persist", "pool_refresh"),
    ("persist", "pool_update"),
    ("persist", "pool_update_panic"),
    ("score", "engine"),
];
/// Every store operation `labelweir_store_errors_total` counts (the transactions in `store.rs`).
pub const STORE_OPS: [&str; 7] = [
    "initialise",
    "record claim",
    "forget claim",
    "transition",
    "append audit",
    "update trusted",
    "write history",
];
/// Buckets of the repair-cost histogram (fractions of label mass).
pub const REPAIR_COST_BUCKETS: [f64; 8] = [0.005, 0.01, 0.02, 0.05, 0.1, 0.2, 0.5, 1.0];

/// Every labelweir metric.
#[derive(Debug)]
pub struct Metrics {
    registry: Registry,
    vendors: HashSet<String>,
    classes: RwLock<HashSet<String>>,
    flow: Flow,
    state: State,
}

/// The batch flow: files, batches, scores, stage times, rescans, errors.
#[derive(Debug)]
struct Flow {
    files_discovered: IntCounterVec,
    batches: IntCounterVec,
    batch_items: IntCounterVec,
    admission_items: IntCounterVec,
    unlike_pool: IntCounterVec,
    recalled: IntCounterVec,
    spot_checks: IntCounterVec,
    spot_items: IntCounterVec,
    spot_signals: IntCounterVec,
    batch_bytes: IntCounterVec,
    repair_cost: HistogramVec,
    repair_cost_last: GaugeVec,
    repair_cost_baseline: GaugeVec,
    flagged_items: IntCounterVec,
    flagged_share_last: GaugeVec,
    damage_last: GaugeVec,
    stage_duration: HistogramVec,
    inbox_files: IntGaugeVec,
    inbox_oldest_age: GaugeVec,
    last_processed: GaugeVec,
    rescans: IntCounterVec,
    watcher_errors: IntCounter,
    errors: IntCounterVec,
}

/// The state of the daemon and its workspace: pool, trusted set, quarantine, notices, store, disk, readiness.
#[derive(Debug)]
struct State {
    unknown_folders: IntGauge,
    pool_items: IntGauge,
    trusted_items: IntGaugeVec,
    trusted_min_class: IntGauge,
    quarantine_batches: IntGauge,
    quarantine_oldest_age: Gauge,
    quarantine_bytes: IntGauge,
    notices_written: IntCounterVec,
    store_size: IntGauge,
    store_flush: Histogram,
    store_errors: IntCounterVec,
    free_bytes: IntGaugeVec,
    ready: IntGauge,
    queue_depth: IntGauge,
    config_reload_ok: IntGauge,
}

static GLOBAL: OnceLock<RwLock<Option<Arc<Metrics>>>> = OnceLock::new();

fn slot() -> &'static RwLock<Option<Arc<Metrics>>> {
    GLOBAL.get_or_init(|| RwLock::new(None))
}

/// The installed metrics, if any.
pub fn get() -> Option<Arc<Metrics>> {
    slot().read().ok().and_then(|g| g.clone())
}

/// Create the registry for these vendors (replacing any earlier one in this process) and return it.
pub fn install(vendors: &[String]) -> Arc<Metrics> {
    let m = Arc::new(Metrics::new(vendors).expect("metric definitions are static and valid"));
    if let Ok(mut g) = slot().write() {
        *g = Some(m.clone());
    }
    m
}

/// Event from the store: one flushed transaction took this long.
pub fn store_flush_observed(d: Duration) {
    if let Some(m) = get() {
        m.state.store_flush.observe(d.as_secs_f64());
    }
}

/// Event from the store: an operation failed.
pub fn store_error(op: &'static str) {
    if let Some(m) = get() {
        m.state.store_errors.with_label_values(&[op]).inc();
    }
}

fn opts(name: &str, help: &str) -> Opts {
    Opts::new(name, help).namespace(NS)
}

fn hopts(name: &str, help: &str, buckets: Vec<f64>) -> HistogramOpts {
    HistogramOpts::new(name, help)
        .namespace(NS)
        .buckets(buckets)
}

impl Flow {
    // size-limits: long-fn new: one registration per flow metric, read as a table of names, help texts and labels
    fn new(r: &Registry) -> prometheus::Result<Self> {
        let stage_buckets = vec![
            0.0005, 0.001, 0.0025, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5, 5.0, 10.0,
            30.0,
        ];
        Ok(Self {
            files_discovered: reg(
                r,
                IntCounterVec::new(
                    opts(
                        "files_discovered_total",
                        "Files found in a vendor's drop folder.",
                    ),
                    &["vendor"],
                )?,
            )?,
            batches: reg(
                r,
                IntCounterVec::new(
                    opts("batches_total", "Batches by vendor and outcome."),
                    &["vendor", "outcome"],
                )?,
            )?,
            batch_items: reg(
                r,
                IntCounterVec::new(
                    opts(
                        "batch_items_total",
                        "Items in batches, by vendor and outcome.",
                    ),
                    &["vendor", "outcome"],
                )?,
            )?,
            admission_items: reg(
                r,
                IntCounterVec::new(
                    opts(
                        "admission_items_total",
                        "Flagged items of accepted batches that did not enter the pool as delivered, by \
                         vendor and fate (held for review, entered_proposed, dropped); a flag is a \
                         suspicion for review, not proof.",
                    ),
                    &["vendor", "fate"],
                )?,
            )?,
            unlike_pool: reg(
                r,
                IntCounterVec::new(
                    opts(
                        "batches_unlike_pool_total",
                        "Batches held because their items are unlike the pool and the trusted set \
                         (items_unlike_pool), by vendor: a data-source finding for operations, not a \
                         finding about the vendor's labels.",
                    ),
                    &["vendor"],
                )?,
            )?,
            recalled: reg(
                r,
                IntCounterVec::new(
                    opts(
                        "batches_recalled_total",
                        "Accepted batches taken back out of the pool for review because a later batch of \
                         the same vendor was held by a stream rule (recalled_on_drift) or the experts' spot \
                         checks signalled (recalled_on_spot_check), by vendor: a suspicion for review, not \
                         proof.",
                    ),
                    &["vendor"],
                )?,
            )?,
            spot_checks: reg(
                r,
                IntCounterVec::new(
                    opts(
                        "spot_checks_total",
                        "Accepted batches whose items were picked for the experts' spot check (event \
                         picked) and whose spot check the experts answered (event answered), by vendor; \
                         picked less answered is what waits for the experts.",
                    ),
                    &["vendor", "event"],
                )?,
            )?,
            spot_items: reg(
                r,
                IntCounterVec::new(
                    opts(
                        "spot_check_items_total",
                        "Spot-checked items the experts answered, by vendor and whether the vendor's label \
                         agreed with theirs (result agree or disagree). A disagreement is a suspicion for \
                         review, not proof: experts err too.",
                    ),
                    &["vendor", "result"],
                )?,
            )?,
            spot_signals: reg(
                r,
                IntCounterVec::new(
                    opts(
                        "spot_check_signals_total",
                        "Spot-check charts that reached their limit, by vendor: the vendor's batches wait \
                         for review until a reviewer clears the hold (a suspicion, not proof).",
                    ),
                    &["vendor"],
                )?,
            )?,
            batch_bytes: reg(
                r,
                IntCounterVec::new(
                    opts("batch_bytes_total", "Bytes of claimed batch files."),
                    &["vendor"],
                )?,
            )?,
            repair_cost: reg(
                r,
                HistogramVec::new(
                    hopts(
                        "repair_cost",
                        "Repair cost of scored batches (fraction of label mass the repair moves).",
                        REPAIR_COST_BUCKETS.to_vec(),
                    ),
                    &["vendor"],
                )?,
            )?,
            repair_cost_last: reg(
                r,
                GaugeVec::new(
                    opts(
                        "repair_cost_last",
                        "Repair cost of the vendor's last scored batch.",
                    ),
                    &["vendor"],
                )?,
            )?,
            repair_cost_baseline: reg(
                r,
                GaugeVec::new(
                    opts(
                        "repair_cost_baseline",
                        "Median repair cost of the vendor's accepted history.",
                    ),
                    &["vendor"],
                )?,
            )?,
            flagged_items: reg(
                r,
                IntCounterVec::new(
                    opts(
                        "flagged_items_total",
                        "Items of scored batches flagged (suspicion at the batch's flag line: the engine \
                         proposes another label; a right label gets there on at most [model] clean_flag_rate \
                         of the items), by vendor; with labelweir_batch_items_total it gives the flagged \
                         share over time. A flag is a suspicion for review, not proof.",
                    ),
                    &["vendor"],
                )?,
            )?,
            flagged_share_last: reg(
                r,
                GaugeVec::new(
                    opts(
                        "flagged_share_last",
                        "Share of the vendor's last scored batch flagged at its flag line (a suspicion, not proof).",
                    ),
                    &["vendor"],
                )?,
            )?,
            damage_last: reg(
                r,
                GaugeVec::new(
                    opts(
                        "damage_last",
                        "Damage of the vendor's last scored batch: how much worse the model does on the \
                         trusted items with the batch added as delivered (nats).",
                    ),
                    &["vendor"],
                )?,
            )?,
            stage_duration: reg(
                r,
                HistogramVec::new(
                    hopts(
                        "batch_stage_duration_seconds",
                        "Time per pipeline stage per batch.",
                        stage_buckets,
                    ),
                    &["stage"],
                )?,
            )?,
            inbox_files: reg(
                r,
                IntGaugeVec::new(
                    opts(
                        "inbox_files",
                        "Files waiting in the vendor's drop folder (temporary names excluded).",
                    ),
                    &["vendor"],
                )?,
            )?,
            inbox_oldest_age: reg(
                r,
                GaugeVec::new(
                    opts(
                        "inbox_oldest_file_age_seconds",
                        "Age of the oldest waiting file (0 when none).",
                    ),
                    &["vendor"],
                )?,
            )?,
            last_processed: reg(
                r,
                GaugeVec::new(
                    opts(
                        "last_batch_processed_timestamp_seconds",
                        "Unix time of the vendor's last batch verdict.",
                    ),
                    &["vendor"],
                )?,
            )?,
            rescans: reg(
                r,
                IntCounterVec::new(
                    opts("watcher_rescans_total", "Drop-folder rescans by cause."),
                    &["reason"],
                )?,
            )?,
            watcher_errors: reg(
                r,
                IntCounter::with_opts(opts(
                    "watcher_errors_total",
                    "Errors reported by the filesystem watcher.",
                ))?,
            )?,
            errors: reg(
                r,
                IntCounterVec::new(
                    opts("errors_total", "Errors by pipeline stage and kind."),
                    &["stage", "kind"],
                )?,
            )?,
        })
    }
}

impl State {
    fn new(r: &Registry) -> prometheus::Result<Self> {
        Ok(Self {
            unknown_folders: reg(
                r,
                IntGauge::with_opts(opts(
                    "unknown_inbox_folders",
                    "Entries in inbox/ that are not a configured vendor (ignored).",
                ))?,
            )?,
            pool_items: reg(
                r,
                IntGauge::with_opts(opts("pool_items", "Items in the accepted pool."))?,
            )?,
            trusted_items: reg(
                r,
                IntGaugeVec::new(
                    opts("trusted_items", "Trusted items per class."),
                    &["class"],
                )?,
            )?,
            trusted_min_class: reg(
                r,
                IntGauge::with_opts(opts(
                    "trusted_min_class_items",
                    "Trusted items in the thinnest class.",
                ))?,
            )?,
            quarantine_batches: reg(
                r,
                IntGauge::with_opts(opts(
                    "quarantine_batches",
                    "Batches waiting in quarantine for review.",
                ))?,
            )?,
            quarantine_oldest_age: reg(
                r,
                Gauge::with_opts(opts(
                    "quarantine_oldest_age_seconds",
                    "Age of the oldest batch waiting in quarantine (0 when none).",
                ))?,
            )?,
            quarantine_bytes: reg(
                r,
                IntGauge::with_opts(opts(
                    "quarantine_bytes",
                    "Bytes of batch files waiting in quarantine.",
                ))?,
            )?,
            notices_written: reg(
                r,
                IntCounterVec::new(
                    opts(
                        "notices_written_total",
                        "Vendor notice files written, by format.",
                    ),
                    &["vendor", "format"],
                )?,
            )?,
            store_size: reg(
                r,
                IntGauge::with_opts(opts("store_size_bytes", "Size of the store on disk."))?,
            )?,
            store_flush: reg(
                r,
                Histogram::with_opts(hopts(
                    "store_flush_duration_seconds",
                    "Duration of flushed store transactions.",
                    vec![
                        0.0001, 0.0005, 0.001, 0.0025, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 1.0,
                    ],
                ))?,
            )?,
            store_errors: reg(
                r,
                IntCounterVec::new(
                    opts("store_errors_total", "Store operations that failed."),
                    &["op"],
                )?,
            )?,
            free_bytes: reg(
                r,
                IntGaugeVec::new(
                    opts(
                        "filesystem_free_bytes",
                        "Free bytes on the filesystem (available to the daemon).",
                    ),
                    &["mount"],
                )?,
            )?,
            ready: reg(
                r,
                IntGauge::with_opts(opts("ready", "1 when /readyz answers 200."))?,
            )?,
            queue_depth: reg(
                r,
                IntGauge::with_opts(opts(
                    "scoring_queue_depth",
                    "Parsed batches waiting for the scoring worker.",
                ))?,
            )?,
            config_reload_ok: reg(
                r,
                IntGauge::with_opts(opts(
                    "config_last_reload_successful",
                    "1 when the configuration in use loaded successfully.",
                ))?,
            )?,
        })
    }
}

/// Register a collector with the registry and hand it back.
fn reg<C: prometheus::core::Collector + Clone + 'static>(
    r: &Registry,
    c: C,
) -> prometheus::Result<C> {
    r.register(Box::new(c.clone()))?;
    Ok(c)
}

impl Metrics {
    fn new(vendors: &[String]) -> prometheus::Result<Self> {
        let r = Registry::new();
        let build = reg(
            &r,
            IntGaugeVec::new(
                opts("build_info", "Build information; always 1."),
                &["version", "revision"],
            )?,
        )?;
        build
            .with_label_values(&[
                env!("CARGO_PKG_VERSION"),
                option_env!("LABELWEIR_REVISION").unwrap_or("unknown"),
            ])
            .set(1);
        let m = Self {
            vendors: vendors.iter().cloned().collect(),
            classes: RwLock::new(HashSet::new()),
            flow: Flow::new(&r)?,
            state: State::new(&r)?,
            registry: r,
        };
        r_register_process(&m.registry);
        // Pre-create every bounded series so alerts see zeros rather than absent series.
        for v in vendors {
            m.flow.files_discovered.with_label_values(&[v]);
            m.flow.batch_bytes.with_label_values(&[v]);
            m.flow.inbox_files.with_label_values(&[v]);
            m.flow.inbox_oldest_age.with_label_values(&[v]);
            m.flow.flagged_items.with_label_values(&[v]);
            for o in OUTCOMES {
                m.flow.batches.with_label_values(&[v, o]);
                m.flow.batch_items.with_label_values(&[v, o]);
            }
            for f in ADMISSION_FATES {
                m.flow.admission_items.with_label_values(&[v, f]);
            }
            m.flow.unlike_pool.with_label_values(&[v]);
            m.flow.recalled.with_label_values(&[v]);
            for e in ["picked", "answered"] {
                m.flow.spot_checks.with_label_values(&[v, e]);
            }
            for r in ["agree", "disagree"] {
                m.flow.spot_items.with_label_values(&[v, r]);
            }
            m.flow.spot_signals.with_label_values(&[v]);
            for f in ["json", "markdown"] {
                m.state.notices_written.with_label_values(&[v, f]);
            }
        }
        for s in STAGES {
            m.flow.stage_duration.with_label_values(&[s]);
        }
        for r in RESCAN_REASONS {
            m.flow.rescans.with_label_values(&[r]);
        }
        for mt in MOUNTS {
            m.state.free_bytes.with_label_values(&[mt]);
        }
        for (stage, kind) in ERROR_KINDS {
            m.flow.errors.with_label_values(&[stage, kind]);
        }
        for op in STORE_OPS {
            m.state.store_errors.with_label_values(&[op]);
        }
        m.state.config_reload_ok.set(1);
        Ok(m)
    }

    fn known(&self, vendor: &str) -> bool {
        self.vendors.contains(vendor)
    }

    /// The text exposition (format 0.0.4).
    pub fn render(&self) -> String {
        let mut buf = Vec::new();
        let enc = TextEncoder::new();
        if enc.encode(&self.registry.gather(), &mut buf).is_err() {
            return String::new();
        }
        String::from_utf8(buf).unwrap_or_default()
    }

    /// A file was found in a vendor folder for the first time.
    pub fn file_discovered(&self, vendor: &str) {
        if self.known(vendor) {
            self.flow
                .files_discovered
                .with_label_values(&[vendor])
                .inc();
        }
    }

    /// An accepted batch's flagged items that did not enter the pool as delivered, one fate
    /// (`ADMISSION_FATES`: `held`, `entered_proposed`, `dropped`) per item.
    pub fn admission<'f>(&self, vendor: &str, fates: impl IntoIterator<Item = &'f str>) {
        if !self.known(vendor) {
            return;
        }
        for fate in fates {
            self.flow
                .admission_items
                .with_label_values(&[vendor, fate])
                .inc();
        }
    }

    /// A batch was held because its items are unlike the pool (`items_unlike_pool`).
    pub fn unlike_pool(&self, vendor: &str) {
        if self.known(vendor) {
            self.flow.unlike_pool.with_label_values(&[vendor]).inc();
        }
    }

    /// `n` accepted batches of the vendor were recalled for review (`recalled_on_drift`).
    pub fn recalled(&self, vendor: &str, n: u64) {
        if n > 0 && self.known(vendor) {
            self.flow.recalled.with_label_values(&[vendor]).inc_by(n);
        }
    }

    /// An accepted batch's items were picked for the experts' spot check.
    pub fn spot_check_picked(&self, vendor: &str) {
        if self.known(vendor) {
            self.flow
                .spot_checks
                .with_label_values(&[vendor, "picked"])
                .inc();
        }
    }

    /// The experts answered a spot check: `agreed` and `disagreed` items, and whether a chart signalled.
    pub fn spot_check_answered(&self, vendor: &str, agreed: u64, disagreed: u64, signal: bool) {
        if self.known(vendor) {
            let f = &self.flow;
            f.spot_checks.with_label_values(&[vendor, "answered"]).inc();
            f.spot_items
                .with_label_values(&[vendor, "agree"])
                .inc_by(agreed);
            f.spot_items
                .with_label_values(&[vendor, "disagree"])
                .inc_by(disagreed);
            if signal {
                f.spot_signals.with_label_values(&[vendor]).inc();
            }
        }
    }

    /// A batch reached an outcome (`OUTCOMES`), with its item and byte counts.
    pub fn batch_outcome(
        &self,
        vendor: &str,
        outcome: &str,
        items: u64,
        bytes: u64,
        now_unix: f64,
    ) {
        if !self.known(vendor) || !OUTCOMES.contains(&outcome) {
            return;
        }
        self.flow
            .batches
            .with_label_values(&[vendor, outcome])
            .inc();
        self.flow
            .batch_items
            .with_label_values(&[vendor, outcome])
            .inc_by(items);
        if bytes > 0 {
            self.flow
                .batch_bytes
                .with_label_values(&[vendor])
                .inc_by(bytes);
        }
        self.flow
            .last_processed
            .with_label_values(&[vendor])
            .set(now_unix);
    }

    /// A batch was scored.
    pub fn batch_scored(&self, vendor: &str, repair_cost: f64, baseline_median: Option<f64>) {
        if !self.known(vendor) || !repair_cost.is_finite() {
            return;
        }
        self.flow
            .repair_cost
            .with_label_values(&[vendor])
            .observe(repair_cost);
        self.flow
            .repair_cost_last
            .with_label_values(&[vendor])
            .set(repair_cost);
        if let Some(b) = baseline_median.filter(|b| b.is_finite()) {
            self.flow
                .repair_cost_baseline
                .with_label_values(&[vendor])
                .set(b);
        }
    }

    /// A scored batch's flagged items (of `items`) and damage (nats; skipped when unknown).
    pub fn batch_judged(&self, vendor: &str, flagged: u64, items: u64, damage: f64) {
        if !self.known(vendor) {
            return;
        }
        self.flow
            .flagged_items
            .with_label_values(&[vendor])
            .inc_by(flagged);
        if items > 0 {
            self.flow
                .flagged_share_last
                .with_label_values(&[vendor])
                .set(flagged as f64 / items as f64);
        }
        if damage.is_finite() {
            self.flow
                .damage_last
                .with_label_values(&[vendor])
                .set(damage);
        }
    }

    /// A stage (`STAGES`) of one batch took this long.
    pub fn stage(&self, stage: &str, d: Duration) {
        if STAGES.contains(&stage) {
            self.flow
                .stage_duration
                .with_label_values(&[stage])
                .observe(d.as_secs_f64());
        }
    }

    /// Backlog of a vendor folder after a scan.
    pub fn inbox_backlog(&self, vendor: &str, files: i64, oldest_age_secs: f64) {
        if self.known(vendor) {
            self.flow
                .inbox_files
                .with_label_values(&[vendor])
                .set(files);
            self.flow
                .inbox_oldest_age
                .with_label_values(&[vendor])
                .set(oldest_age_secs);
        }
    }

    /// A rescan ran (`RESCAN_REASONS`).
    pub fn rescan(&self, reason: &str) {
        if RESCAN_REASONS.contains(&reason) {
            self.flow.rescans.with_label_values(&[reason]).inc();
        }
    }

    /// The watcher reported an error.
    pub fn watcher_error(&self) {
        self.flow.watcher_errors.inc();
    }

    /// An error in a stage; `kind` is a short fixed code chosen by the caller (never vendor data).
    pub fn error(&self, stage: &'static str, kind: &'static str) {
        self.flow.errors.with_label_values(&[stage, kind]).inc();
    }

    /// Entries in `inbox/` that are not configured vendors.
    pub fn unknown_inbox_folders(&self, n: i64) {
        self.state.unknown_folders.set(n);
    }

    /// Items in the pool.
    pub fn pool_items(&self, n: u64) {
        self.state.pool_items.set(n as i64);
    }

    /// Trusted items per class (class names come from the workspace, a bounded set).
    pub fn trusted(&self, per_class: &[(String, usize)]) {
        if let Ok(mut seen) = self.classes.write() {
            for (c, n) in per_class {
                seen.insert(c.clone());
                self.state
                    .trusted_items
                    .with_label_values(&[c])
                    .set(*n as i64);
            }
        }
        let min = per_class.iter().map(|(_, n)| *n).min().unwrap_or(0);
        self.state.trusted_min_class.set(min as i64);
    }

    /// The quarantine queue.
    pub fn quarantine(&self, batches: usize, oldest_age_secs: f64, bytes: u64) {
        self.state.quarantine_batches.set(batches as i64);
        self.state.quarantine_oldest_age.set(oldest_age_secs);
        self.state.quarantine_bytes.set(bytes as i64);
    }

    /// A notice file was written (`format`: `json`, `markdown` or `csv`).
    pub fn notice_written(&self, vendor: &str, format: &'static str) {
        if self.known(vendor) {
            self.state
                .notices_written
                .with_label_values(&[vendor, format])
                .inc();
        }
    }

    /// Store size on disk.
    pub fn store_size(&self, bytes: u64) {
        self.state.store_size.set(bytes as i64);
    }

    /// Free space on a filesystem (`MOUNTS`).
    pub fn free_bytes(&self, mount: &str, bytes: u64) {
        if MOUNTS.contains(&mount) {
            self.state
                .free_bytes
                .with_label_values(&[mount])
                .set(bytes.min(i64::MAX as u64) as i64);
        }
    }

    /// Readiness as reported on `/readyz`.
    pub fn ready(&self, ready: bool) {
        self.state.ready.set(ready as i64);
    }

    /// Batches waiting for the scoring worker.
    pub fn queue_depth(&self, n: usize) {
        self.state.queue_depth.set(n as i64);
    }

    /// Whether the configuration in use loaded successfully.
    pub fn config_loaded(&self, ok: bool) {
        self.state.config_reload_ok.set(ok as i64);
    }
}

#[cfg(target_os = "linux")]
fn r_register_process(r: &Registry) {
    let _ = r.register(Box::new(
        prometheus::process_collector::ProcessCollector::for_self(),
    ));
}

#[cfg(not(target_os = "linux"))]
fn r_register_process(_r: &Registry) {}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn unknown_vendors_never_become_labels() {
        let m = Metrics::new(&["north".to_string()]).unwrap();
        m.batch_outcome("north", "accepted", 10, 100, 1.0);
        m.batch_outcome("evil\"vendor", "accepted", 10, 100, 1.0);
        m.batch_outcome("north", "made_up", 1, 1, 1.0);
        let text = m.render();
        assert!(
            text.contains("labelweir_batches_total{outcome=\"accepted\",vendor=\"north\"} 1"),
            "{text}"
        );
        assert!(!text.contains("evil"));
        assert!(!text.contains("made_up"));
        assert!(text.contains("labelweir_build_info{"));
        assert!(text.contains("process_"), "process collector registered");
    }
}
