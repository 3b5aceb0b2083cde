//! `labelweir quarantine`: review held batches — list, show, release, reject, withdraw — and the held items
//! of accepted batches (held, admit, drop).
//!
//! Also home of [`dispatch`], which every review command uses: through the running daemon's admin socket
//! when it answers, else on the store opened directly.

use std::path::{Path, PathBuf};
use std::time::{Duration, Instant};

use anyhow::Context;

use super::{exit, Failure};
use labelweir::admin;
use labelweir::config::Config;
use labelweir::review::{
    self, Caller, DecisionReport, HeldAction, HeldBatch, HeldReport, HeldRequest, QueueEntry,
    RejectRequest, ReleaseRequest, Request, ReviewEnv, ReviewError, ReviewHooks, ShowReport,
    WithdrawRequest,
};
use labelweir::store::{BatchState, Store, StoreError};
use labelweir::text::sanitize;
use labelweir::workspace::Workspace;

/// Review quarantined batches: list them, show why one was held, release or reject it, or withdraw an
/// accepted batch from the pool. Works while the daemon runs (through its admin socket, DIR/admin.sock)
/// and while it is stopped. A flag is a suspicion for review, not proof.
#[derive(Debug, clap::Args)]
pub struct Args {
    #[command(subcommand)]
    command: Command,
}

#[derive(Debug, clap::Subcommand)]
enum Command {
    List(ListArgs),
    Show(ShowArgs),
    Release(ReleaseArgs),
    Reject(RejectArgs),
    Withdraw(WithdrawArgs),
    Held(ListArgs),
    Admit(HeldArgs),
    Drop(HeldArgs),
}

/// Admit (`quarantine admit`) or drop (`quarantine drop`) held items of an accepted batch: the flagged
/// items that `[admission] flagged = "hold"` kept out of the pool, and the items the experts' spot-check
/// answers contradicted (`quarantine held` lists them).
#[derive(Debug, clap::Args)]
struct HeldArgs {
    /// Workspace folder.
    dir: PathBuf,
    /// Batch id (from `quarantine held`).
    batch: String,
    /// Why (required; recorded in the audit trail).
    #[arg(long)]
    reason: String,
    /// Reviewer name. Default: the OS user.
    #[arg(long)]
    by: Option<String>,
    /// This held item (repeat for more). Default: every item of the batch still waiting.
    #[arg(long = "item", value_name = "ID")]
    items: Vec<String>,
    /// Admit with the proposed label instead of the given one (admit only): the engine's, or the experts'
    /// answer for an item their spot check contradicted.
    #[arg(long)]
    proposed: bool,
    /// Print JSON.
    #[arg(long)]
    json: bool,
}

/// List the batches waiting for review, oldest first.
#[derive(Debug, clap::Args)]
struct ListArgs {
    /// Workspace folder.
    dir: PathBuf,
    /// Print JSON.
    #[arg(long)]
    json: bool,
}

/// Explain why a batch was held: repair cost against the vendor's baseline, the items whose labels the
/// repair moved, the trusted items the batch would break, its history; and write a self-contained HTML
/// page with a 2-D projection of its items beside the trusted items.
#[derive(Debug, clap::Args)]
struct ShowArgs {
    /// Workspace folder.
    dir: PathBuf,
    /// Batch id (from `quarantine list`).
    batch: String,
    /// Where to write the HTML page. Default: beside the batch's report in the workspace,
    /// `DIR/<folder>/<BATCH>.review.html` (it moves with the batch when a reviewer decides).
    #[arg(long)]
    html: Option<PathBuf>,
    /// Do not write the HTML page.
    #[arg(long, conflicts_with = "html")]
    no_html: bool,
    /// Print JSON.
    #[arg(long)]
    json: bool,
    /// Most moved items to print (the JSON and the page have all).
    #[arg(long, default_value_t = 25)]
    top: usize,
}

/// Release a quarantined batch into the training pool, optionally leaving items out or correcting labels.
#[derive(Debug, clap::Args)]
struct ReleaseArgs {
    /// Workspace folder.
    dir: PathBuf,
    /// Batch id.
    batch: String,
    /// Why (required; recorded in the audit trail).
    #[arg(long)]
    reason: String,
    /// Reviewer name. Default: the OS user.
    #[arg(long)]
    by: Option<String>,
    /// Leave this item out of the pool (repeat for more).
    #[arg(long = "exclude", value_name = "ID")]
    exclude: Vec<String>,
    /// Set this item's label (repeat for more).
    #[arg(long = "relabel", value_name = "ID=LABEL")]
    relabel: Vec<String>,
    /// Leave out the items listed in this file: one id per line; blank lines and lines starting with
    /// `#` are skipped.
    #[arg(long, value_name = "FILE")]
    exclude_from: Option<PathBuf>,
    /// Leave out every flagged item (label moved by the repair) that no --relabel covers and, with
    /// --accept-proposed, whose proposal is below the confidence floor.
    #[arg(long)]
    exclude_flagged: bool,
    /// Take the proposed label of every flagged item whose proposal is at least --min-confidence
    /// (explicit --exclude and --relabel win). Weaker proposals are not taken and are listed.
    #[arg(long)]
    accept_proposed: bool,
    /// Confidence floor for --accept-proposed, from 0 to 1.
    #[arg(long, value_name = "P", default_value_t = labelweir::review::DEFAULT_MIN_CONFIDENCE, requires = "accept_proposed")]
    min_confidence: f64,
    /// Show what the release would do and record nothing.
    #[arg(long)]
    dry_run: bool,
    /// Add this item, with its final label, to the trusted set: you verified it (repeat for more).
    #[arg(long = "promote", value_name = "ID")]
    promote: Vec<String>,
    /// Print JSON.
    #[arg(long)]
    json: bool,
}

/// Reject a quarantined batch: it stays out of the pool and the vendor gets a notice.
#[derive(Debug, clap::Args)]
struct RejectArgs {
    /// Workspace folder.
    dir: PathBuf,
    /// Batch id.
    batch: String,
    /// Why (required; recorded in the audit trail, not sent to the vendor).
    #[arg(long)]
    reason: String,
    /// Reviewer name. Default: the OS user.
    #[arg(long)]
    by: Option<String>,
    /// Tell the vendor the labels the repair proposes for the flagged items (off by default: notices
    /// must not become a free oracle for a poisoner).
    #[arg(long)]
    disclose_proposed: bool,
    /// Name the flagged items in the vendor notice (off by default: the notice gives their count only;
    /// --disclose-proposed implies it).
    #[arg(long)]
    disclose_items: bool,
    /// Print JSON.
    #[arg(long)]
    json: bool,
}

/// Pull an accepted (or released) batch back out of the training pool, e.g. after a trusted-set change
/// re-scan reported it.
#[derive(Debug, clap::Args)]
struct WithdrawArgs {
    /// Workspace folder.
    dir: PathBuf,
    /// Batch id.
    batch: String,
    /// Why (required; recorded in the audit trail).
    #[arg(long)]
    reason: String,
    /// Reviewer name. Default: the OS user.
    #[arg(long)]
    by: Option<String>,
    /// Print JSON.
    #[arg(long)]
    json: bool,
}

/// Run the subcommand.
pub fn run(args: Args) -> anyhow::Result<u8> {
    match args.command {
        Command::List(a) => {
            let v = dispatch(&a.dir, Request::QuarantineList)?;
            if a.json {
                print_json(&v)?;
            } else {
                let list: Vec<QueueEntry> = serde_json::from_value(v)?;
                print_list(&list);
            }
        }
        Command::Show(a) => {
            let v = dispatch(
                &a.dir,
                Request::QuarantineShow {
                    batch: a.batch.clone(),
                },
            )?;
            let report: ShowReport = serde_json::from_value(v.clone())?;
            let page = if a.no_html {
                None
            } else {
                let path = match &a.html {
                    Some(p) => p.clone(),
                    None => review::page_path(&Workspace::new(&a.dir), &report.batch).ok_or_else(
                        || {
                            Failure::new(
                                exit::INPUT,
                                format!(
                                    "batch {} has no folder yet (state {}); give --html PATH",
                                    sanitize(&report.batch.id),
                                    report.batch.state
                                ),
                            )
                        },
                    )?,
                };
                write_page(&path, &review::render_html(&report))
                    .with_context(|| format!("write {}", path.display()))
                    .map_err(|e| Failure::new(exit::IO, format!("{e:#}")))?;
                Some(path)
            };
            if a.json {
                let mut v = v;
                v["html_page"] = serde_json::json!(page);
                print_json(&v)?;
            } else {
                print_show(&report, &a.dir, a.top, page.as_deref());
            }
        }
        Command::Release(a) => {
            let mut relabel = Vec::new();
            for r in &a.relabel {
                let (id, label) = r.rsplit_once('=').ok_or_else(|| {
                    Failure::new(
                        exit::INPUT,
                        format!("--relabel {}: expected ID=LABEL", sanitize(r)),
                    )
                })?;
                relabel.push((id.to_string(), label.to_string()));
            }
            let mut exclude = a.exclude;
            if let Some(f) = &a.exclude_from {
                exclude.extend(read_id_list(f)?);
            }
            let req = ReleaseRequest {
                batch: a.batch,
                by: a.by.unwrap_or_else(super::init::os_user),
                reason: a.reason,
                exclude,
                relabel,
                accept_proposed: a.accept_proposed,
                promote: a.promote,
                min_confidence: Some(a.min_confidence),
                exclude_flagged: a.exclude_flagged,
                dry_run: a.dry_run,
            };
            let v = dispatch(&a.dir, Request::Release(req))?;
            print_decision(v, a.json)?;
        }
        Command::Reject(a) => {
            let req = RejectRequest {
                batch: a.batch,
                by: a.by.unwrap_or_else(super::init::os_user),
                reason: a.reason,
                disclose_proposed: a.disclose_proposed,
                disclose_items: a.disclose_items,
            };
            let v = dispatch(&a.dir, Request::Reject(req))?;
            print_decision(v, a.json)?;
        }
        Command::Held(a) => {
            let v = dispatch(&a.dir, Request::HeldList)?;
            if a.json {
                print_json(&v)?;
            } else {
                let list: Vec<HeldBatch> = serde_json::from_value(v)?;
                print_held(&list);
            }
        }
        Command::Admit(a) => held(a, false)?,
        Command::Drop(a) => held(a, true)?,
        Command::Withdraw(a) => {
            let req = WithdrawRequest {
                batch: a.batch,
                by: a.by.unwrap_or_else(super::init::os_user),
                reason: a.reason,
            };
            let v = dispatch(&a.dir, Request::Withdraw(req))?;
            print_decision(v, a.json)?;
        }
    }
    Ok(exit::OK)
}

/// Item ids from a list file: one per line, blank lines and `#` comments skipped.
fn read_id_list(path: &Path) -> anyhow::Result<Vec<String>> {
    let text = std::fs::read_to_string(path).map_err(|e| {
        Failure::new(
            exit::INPUT,
            format!("--exclude-from {}: {e}", path.display()),
        )
    })?;
    Ok(text
        .lines()
        .map(str::trim)
        .filter(|l| !l.is_empty() && !l.starts_with('#'))
        .map(str::to_string)
        .collect())
}

fn held(a: HeldArgs, drop: bool) -> anyhow::Result<()> {
    if drop && a.proposed {
        return Err(Failure::new(exit::INPUT, "--proposed goes with `quarantine admit`").into());
    }
    let req = HeldRequest {
        batch: a.batch,
        by: a.by.unwrap_or_else(super::init::os_user),
        reason: a.reason,
        action: match (drop, a.proposed) {
            (true, _) => HeldAction::Drop,
            (false, true) => HeldAction::AdmitProposed,
            (false, false) => HeldAction::Admit,
        },
        items: a.items,
    };
    let v = dispatch(&a.dir, Request::HeldDecide(req))?;
    if a.json {
        print_json(&v)?;
    } else {
        let r: HeldReport = serde_json::from_value(v)?;
        println!(
            "batch {}: {} item(s) {}; {} of its items in the pool, {} still held",
            sanitize(&r.batch_id),
            r.items.len(),
            match r.action {
                HeldAction::Admit => "admitted with their given labels",
                HeldAction::AdmitProposed => "admitted with the proposed labels",
                HeldAction::Drop => "dropped",
            },
            r.in_pool,
            r.waiting
        );
    }
    Ok(())
}

fn print_held(list: &[HeldBatch]) {
    if list.is_empty() {
        println!("no accepted batch has held items");
        return;
    }
    println!(
        "Flagged and unsure items of accepted batches kept out of the pool (unsure: not flagged, but among the \
         batch's highest suspicions; experts: taken out when the trusted-set experts' spot check gave another \
         label; each is a suspicion for review, not proof):"
    );
    println!(
        "{:<12} {:<16} {:>6} {:>8} {:>8} {:>9} {:>8} {:>7} {:>8} {:>8}",
        "BATCH",
        "VENDOR",
        "ITEMS",
        "IN POOL",
        "WAITING",
        "PROPOSED",
        "DROPPED",
        "UNSURE",
        "IN DOUBT",
        "EXPERTS"
    );
    for b in list {
        println!(
            "{:<12} {:<16} {:>6} {:>8} {:>8} {:>9} {:>8} {:>7} {:>8} {:>8}",
            sanitize(&b.batch_id),
            sanitize(&b.vendor),
            b.items.unwrap_or(0),
            b.in_pool,
            b.waiting,
            b.admitted_proposed,
            b.dropped,
            b.unsure,
            b.in_doubt,
            b.expert_disagreed
        );
    }
}

fn write_page(path: &Path, html: &str) -> std::io::Result<()> {
    let dir = match path.parent() {
        Some(p) if !p.as_os_str().is_empty() => p.to_path_buf(),
        _ => PathBuf::from("."),
    };
    let name = path
        .file_name()
        .map(|s| s.to_string_lossy().into_owned())
        .unwrap_or_else(|| "labelweir-review.html".into());
    labelweir::fsx::write_atomic(&dir, &name, html.as_bytes(), None).map(|_| ())
}

/// Pretty-print JSON to stdout.
pub fn print_json(v: &serde_json::Value) -> anyhow::Result<()> {
    println!("{}", serde_json::to_string_pretty(v)?);
    Ok(())
}

/// Turn a review error into a [`Failure`] with its exit code.
pub fn review_failure(e: ReviewError) -> anyhow::Error {
    Failure::new(super::review_exit(&e), e.to_string()).into()
}

fn own_uid() -> Option<u32> {
    use std::os::unix::fs::MetadataExt;
    std::fs::metadata("/proc/self").ok().map(|m| m.uid())
}

/// Run a review request: through the running daemon's admin socket when it answers, else on the store
/// opened directly (waiting up to 15 s while another review command holds it).
pub fn dispatch(dir: &Path, req: Request) -> anyhow::Result<serde_json::Value> {
    dispatch_with_progress(dir, req, &|_| {})
}

/// The review hooks of a command that opened the store itself: nothing to tell a daemon, progress to
/// the command's display.
struct DirectHooks<'a>(&'a (dyn Fn(admin::Progress) + Sync));

impl ReviewHooks for DirectHooks<'_> {
    fn progress(&self, done: usize, total: usize) {
        (self.0)(admin::Progress { done, total });
    }
}

/// [`dispatch`], giving a long operation's progress to `on_progress` on either path (progress lines from
/// the daemon, or the operation's own reports when the command opened the store).
pub fn dispatch_with_progress(
    dir: &Path,
    req: Request,
    on_progress: &(dyn Fn(admin::Progress) + Sync),
) -> anyhow::Result<serde_json::Value> {
    let ws = Workspace::new(dir);
    if !ws.config_file().is_file() {
        return Err(Failure::new(
            exit::INPUT,
            format!(
                "{} is not a labelweir workspace (no labelweir.toml)",
                dir.display()
            ),
        )
        .into());
    }
    let deadline = Instant::now() + Duration::from_secs(15);
    loop {
        match admin::call_with_progress(&ws, &req, on_progress) {
            Ok(Some(r)) => return r.map_err(review_failure),
            Ok(None) => {}
            Err(e) => return Err(Failure::new(super::admin_exit(&e), e.to_string()).into()),
        }
        let config =
            Config::from_workspace(dir).map_err(|e| Failure::new(exit::CONFIG, e.to_string()))?;
        match Store::open_workspace(dir, &config.store) {
            Ok(store) => {
                let meta = store
                    .workspace_meta()
                    .map_err(|e| Failure::new(exit::IO, e.to_string()))?;
                let env = ReviewEnv {
                    ws: &ws,
                    config: &config,
                    store: &store,
                    meta: &meta,
                    hooks: &DirectHooks(on_progress),
                    caller: Caller {
                        uid: own_uid(),
                        user: own_uid().and_then(admin::peer::user_name),
                        via: "direct".into(),
                    },
                };
                let r = review::handle(&env, req).map_err(review_failure);
                let flushed = store.flush();
                let v = r?;
                flushed.map_err(|e| Failure::new(exit::IO, e.to_string()))?;
                return Ok(v);
            }
            Err(StoreError::Locked(_)) if Instant::now() < deadline => {
                std::thread::sleep(Duration::from_millis(150));
            }
            Err(StoreError::Locked(p)) => {
                return Err(Failure::new(
                    exit::IO,
                    format!(
                        "the store at {} is in use and no daemon answers on {}: another review command may be running; try again",
                        p.display(),
                        ws.admin_socket().display()
                    ),
                )
                .into())
            }
            Err(e) => return Err(Failure::new(exit::IO, e.to_string()).into()),
        }
    }
}

fn fmt_opt(v: Option<f64>, digits: usize) -> String {
    v.map_or("-".into(), |x| format!("{x:.digits$}"))
}

fn print_list(list: &[QueueEntry]) {
    if list.is_empty() {
        println!("no batches waiting for review");
        return;
    }
    println!(
        "{:<12} {:<16} {:>7} {:>8} {:>8} {:>7}  {:<20}  reasons",
        "batch", "vendor", "items", "repair", "damage", "flagged", "received"
    );
    for e in list {
        println!(
            "{:<12} {:<16} {:>7} {:>8} {:>8} {:>7}  {:<20}  {}",
            sanitize(&e.batch_id),
            sanitize(&e.vendor),
            e.items.map_or("-".into(), |n| n.to_string()),
            fmt_opt(e.repair_cost, 4),
            fmt_opt(e.damage, 4),
            e.flagged_items.map_or("-".into(), |n| n.to_string()),
            e.received_at.format("%Y-%m-%d %H:%M:%S"),
            e.reasons.join(",")
        );
    }
    println!(
        "\n{} {} waiting. A flag is a suspicion for review, not proof.",
        list.len(),
        plural(list.len(), "batch", "batches")
    );
}

fn print_show(r: &ShowReport, dir: &Path, top: usize, page: Option<&Path>) {
    let b = &r.batch;
    println!(
        "batch {} from vendor {} ({})",
        sanitize(&b.id),
        sanitize(&b.vendor),
        b.state
    );
    println!("  delivered as   {}", sanitize(&b.original_name));
    println!(
        "  received       {}",
        b.claimed_at.format("%Y-%m-%d %H:%M:%S UTC")
    );
    if let Some(n) = b.items {
        println!("  items          {n}");
    }
    if let Some(rc) = &b.recalled {
        let spot = labelweir::policy::ReasonCode::SpotCheckDisagreement.as_str();
        if rc.rules.iter().any(|r| r == spot) {
            println!(
                "  recalled       {}: accepted, then taken back for review when the experts' answers to batch {}'s \
                 spot check signalled (this batch came after that chart last stood at 0; a suspicion, not proof)",
                rc.at.format("%Y-%m-%d %H:%M:%S UTC"),
                sanitize(&rc.held_batch),
            );
        } else {
            println!(
                "  recalled       {}: accepted, then taken back for review when batch {} of this vendor was held by {} \
                 (this batch came after that statistic last stood at 0; a suspicion, not proof)",
                rc.at.format("%Y-%m-%d %H:%M:%S UTC"),
                sanitize(&rc.held_batch),
                rc.rules.join(", ")
            );
        }
    }
    if let Some(sc) = &b.spot_check {
        let n = sc.items.len();
        match &sc.answered {
            None => println!(
                "  spot check     {n} items wait for the experts (spot-checks/{}.csv)",
                sanitize(&b.id)
            ),
            Some(a) => println!(
                "  spot check     {} of {n} answers by {} differ from the vendor's labels{}",
                a.disagreed,
                sanitize(&a.by),
                if a.signal.is_some() {
                    "; they raised the vendor's spot-check signal"
                } else {
                    ""
                }
            ),
        }
    }
    if let Some(s) = &b.scores {
        println!(
            "  repair cost    {:.4}  (share of label mass the repair moves)",
            s.repair_cost
        );
        println!("  damage         {:.4} nats on the trusted items", s.damage);
    }
    if let Some(bl) = &r.baseline {
        if bl.cold_start {
            println!(
                "  baseline       cold start: {} accepted {} so far, absolute limits apply",
                bl.n_history,
                plural(bl.n_history, "batch", "batches")
            );
        } else {
            println!(
                "  baseline       vendor median {:.4} over {} accepted {}; modified z {:.2}; CUSUM {:.2} (h = {:.1})",
                bl.median,
                bl.n_history,
                plural(bl.n_history, "batch", "batches"),
                bl.modified_z,
                bl.cusum,
                bl.cusum_h
            );
        }
    }
    let accepted = matches!(b.state, BatchState::Accepted | BatchState::Released);
    if accepted {
        println!("\nhow it was judged ({}):", b.state);
    } else {
        println!("\nwhy it was held:");
    }
    for reason in &r.reasons {
        println!("  - {}: {}", reason.code, sanitize(&reason.detail));
    }
    print_signals(r);
    print_flagged(r, top);
    print_repair_moved(r, top);
    println!(
        "\ntrusted items the batch as delivered would break ({}):",
        r.broken_trusted.len()
    );
    for t in r.broken_trusted.iter().take(top) {
        println!(
            "  {:<24} verified {:<16} predicted {}",
            sanitize(&t.id),
            sanitize(t.label.as_deref().unwrap_or("?")),
            sanitize(t.predicted_with_batch.as_deref().unwrap_or("?"))
        );
    }
    if r.broken_trusted.len() > top {
        println!(
            "  ... {} more (see --json or the page)",
            r.broken_trusted.len() - top
        );
    }
    println!(
        "\nvendor: {} accepted {} in total, {} waiting for review",
        r.vendor.accepted_total,
        plural(r.vendor.accepted_total as usize, "batch", "batches"),
        r.vendor.waiting_for_review
    );
    println!("\nhistory:");
    for a in &r.history {
        println!(
            "  {}  {:<10} {:<10} {:<12} {}",
            a.at.format("%Y-%m-%d %H:%M:%S"),
            sanitize(&a.actor),
            sanitize(&a.action),
            sanitize(a.outcome.as_deref().unwrap_or("")),
            sanitize(a.reason.as_deref().unwrap_or(""))
        );
    }
    print_commands(r, dir);
    if let Some(p) = page {
        println!("\nreview page: {}", p.display());
    }
    if let Some(n) = &r.projection_note {
        println!("({})", sanitize(n));
    }
    println!("\n{}", r.note);
}

fn print_decision(v: serde_json::Value, json: bool) -> anyhow::Result<()> {
    if json {
        return print_json(&v);
    }
    let d: DecisionReport = serde_json::from_value(v)?;
    if d.dry_run {
        println!(
            "preview, nothing recorded: releasing batch {} ({}) would do this",
            sanitize(&d.batch_id),
            sanitize(&d.vendor)
        );
        println!(
            "  {} {} would go into the training pool",
            d.items_into_pool,
            plural(d.items_into_pool, "item", "items")
        );
    } else {
        println!(
            "batch {} ({}) is now {}; decided by {}: {}",
            sanitize(&d.batch_id),
            sanitize(&d.vendor),
            d.state,
            sanitize(&d.by),
            sanitize(&d.reason)
        );
        if d.items_into_pool > 0 {
            println!(
                "  {} {} went into the training pool",
                d.items_into_pool,
                plural(d.items_into_pool, "item", "items")
            );
        }
    }
    if !d.excluded.is_empty() {
        let first: Vec<String> = d.excluded.iter().take(8).map(|i| sanitize(i)).collect();
        println!(
            "  {} {} left out: {}{}",
            d.excluded.len(),
            plural(d.excluded.len(), "item", "items"),
            first.join(", "),
            if d.excluded.len() > 8 {
                ", ... (see --json)"
            } else {
                ""
            }
        );
    }
    if !d.relabeled.is_empty() {
        println!(
            "  {} {} relabeled:",
            d.relabeled.len(),
            plural(d.relabeled.len(), "item", "items")
        );
    }
    for (id, from, to) in d.relabeled.iter().take(10) {
        println!(
            "    {}: {} -> {}",
            sanitize(id),
            sanitize(from),
            sanitize(to)
        );
    }
    if d.relabeled.len() > 10 {
        println!("    ... {} more (see --json)", d.relabeled.len() - 10);
    }
    print_skipped(&d);
    if !d.held_waiting.is_empty() {
        println!(
            "  {} {} the experts contradicted stay out of the pool, waiting for a reviewer (quarantine held): {}",
            d.held_waiting.len(),
            plural(d.held_waiting.len(), "item", "items"),
            sanitize(&d.held_waiting.join(", "))
        );
    }
    if !d.promoted.is_empty() {
        println!(
            "  promoted to the trusted set: {}",
            sanitize(&d.promoted.join(", "))
        );
    }
    if let Some(f) = &d.file {
        println!("  file: {}", f.display());
    }
    if !d.notices.is_empty() {
        println!("  vendor notice: {}", d.notices.join(", "));
    }
    for w in &d.warnings {
        eprintln!("warning: {}", sanitize(w));
    }
    Ok(())
}

/// `one` or `many` by count.
pub fn plural(n: usize, one: &'static str, many: &'static str) -> &'static str {
    if n == 1 {
        one
    } else {
        many
    }
}

/// The proposals a release did not take, and what happened to those items.
fn print_skipped(d: &DecisionReport) {
    if d.skipped_weak.is_empty() {
        return;
    }
    let floor = d
        .min_confidence
        .unwrap_or(labelweir::review::DEFAULT_MIN_CONFIDENCE);
    let left_out: std::collections::HashSet<&str> = d.excluded.iter().map(String::as_str).collect();
    let n_out = d
        .skipped_weak
        .iter()
        .filter(|s| left_out.contains(s.id.as_str()))
        .count();
    println!(
        "  {} weak {} below confidence {floor:.2} not taken ({} left out, {} kept their given label); decide them with --relabel ID=LABEL or --exclude ID:",
        d.skipped_weak.len(),
        plural(d.skipped_weak.len(), "proposal", "proposals"),
        n_out,
        d.skipped_weak.len() - n_out
    );
    for s in d.skipped_weak.iter().take(10) {
        println!(
            "    {}: {} -> {}? (confidence {:.2})",
            sanitize(&s.id),
            sanitize(&s.label),
            sanitize(&s.proposed_label),
            s.confidence
        );
    }
    if d.skipped_weak.len() > 10 {
        println!("    ... {} more (see --json)", d.skipped_weak.len() - 10);
    }
}

/// The engine's signals in plain words.
fn print_signals(r: &ShowReport) {
    if r.signals.is_empty() {
        return;
    }
    println!("\nwhat the engine's signals say:");
    for n in &r.signals {
        println!("  {} = {}", n.name, sanitize(&n.value));
        println!("      {}", n.meaning);
    }
}

/// The flagged items, grouped by (given -> proposed), then the most suspicious ones.
fn print_flagged(r: &ShowReport, top: usize) {
    println!(
        "\nflagged items ({}; a suspicion for review, not proof), by given -> proposed label:",
        r.moved_items.len()
    );
    for g in &r.suspect_groups {
        let (near, of) = g.trusted_nearby_proposed;
        let trusted = if of > 0 {
            format!(
                "; {near} of {of} nearest trusted items are {}",
                sanitize(&g.proposed_label)
            )
        } else {
            String::new()
        };
        println!(
            "  {} {} labeled {}, proposed {} (mean suspicion {:.2}{trusted})",
            g.ids.len(),
            plural(g.ids.len(), "item", "items"),
            sanitize(&g.label),
            sanitize(&g.proposed_label),
            g.mean_suspicion
        );
    }
    if r.moved_items.is_empty() {
        return;
    }
    println!(
        "\n  {:<24} {:<16} {:<16} {:>9} {:>10}",
        "item", "given", "proposed", "suspicion", "confidence"
    );
    for m in r.moved_items.iter().take(top) {
        println!(
            "  {:<24} {:<16} {:<16} {:>9.3} {:>10.2}",
            sanitize(&m.id),
            sanitize(&m.label),
            sanitize(&m.proposed_label),
            m.suspicion,
            m.confidence
        );
    }
    if r.moved_items.len() > top {
        println!(
            "  ... {} more (see --json or the page)",
            r.moved_items.len() - top
        );
    }
}

/// The labels the repair itself moved, or why none are listed.
fn print_repair_moved(r: &ShowReport, top: usize) {
    let cost = r.batch.scores.as_ref().map(|s| s.repair_cost);
    match cost {
        Some(c) if c < labelweir::review::NEGLIGIBLE_REPAIR_COST => {
            println!(
                "\nlabels the repair moved: none (repair cost {c:.4} is negligible: the trusted items ask for no change)"
            );
            return;
        }
        _ => {}
    }
    println!("\nlabels the repair moved ({}):", r.repair_moved.len());
    for m in r.repair_moved.iter().take(top) {
        println!(
            "  {:<24} {:<16} -> {:<16}",
            sanitize(&m.id),
            sanitize(&m.label),
            sanitize(&m.proposed_label)
        );
    }
    if r.repair_moved.len() > top {
        println!("  ... {} more (see --json)", r.repair_moved.len() - top);
    }
}

/// A path or id as one shell word (single-quoted unless it is plain).
fn shell_word(s: &str) -> String {
    if !s.is_empty()
        && s.chars()
            .all(|c| c.is_ascii_alphanumeric() || "/._-+:=@".contains(c))
    {
        s.to_string()
    } else {
        format!("'{}'", s.replace('\'', "'\\''"))
    }
}

/// The exact commands to act on the batch.
fn print_commands(r: &ShowReport, dir: &Path) {
    let d = shell_word(&dir.display().to_string());
    let b = shell_word(&r.batch.id);
    match r.batch.state {
        BatchState::Quarantined => {
            println!("\nto decide (preview a release first; every decision needs a reason):");
            println!("  labelweir quarantine release {d} {b} --accept-proposed --exclude-flagged --dry-run --reason '...'");
            println!("  labelweir quarantine release {d} {b} --reason '...' [--accept-proposed] [--exclude-flagged] [--exclude ID] [--relabel ID=LABEL]");
            println!("  labelweir quarantine reject {d} {b} --reason '...' [--disclose-items]");
        }
        BatchState::Accepted | BatchState::Released => {
            println!("\nto act on it:");
            println!("  labelweir quarantine held {d}        (flagged items kept out of the pool)");
            println!("  labelweir quarantine withdraw {d} {b} --reason '...'");
        }
        _ => {}
    }
}
