//! `labelweir trusted`: keep the trusted set — add, list, remove, export, re-scan.

use std::io::Write;
use std::path::PathBuf;

use super::quarantine::{dispatch, print_json};
use super::{exit, Failure};
use labelweir::review::{
    Request, RescanReport, TrustedAddRequest, TrustedChange, TrustedExport, TrustedRemoveRequest,
    TrustedReport,
};
use labelweir::store::TrustedItem;
use labelweir::text::sanitize;

/// Keep the trusted set (expert-verified items every batch is judged against). Every item keeps who
/// verified it, when, and from what source; nothing a vendor delivers can change it. After a change the
/// rolling window is applied, class balance is checked, and recently accepted batches are re-scored;
/// any that now look poisoned are listed (pull one out with `labelweir quarantine withdraw`).
#[derive(Debug, clap::Args)]
pub struct Args {
    #[command(subcommand)]
    command: Command,
}

#[derive(Debug, clap::Subcommand)]
enum Command {
    Add(AddArgs),
    List(ListArgs),
    Remove(RemoveArgs),
    Export(ExportArgs),
    Rescan(RescanArgs),
}

/// Add verified items from a CSV or JSON Lines file (the workspace's columns; labels among its classes).
#[derive(Debug, clap::Args)]
struct AddArgs {
    /// Workspace folder.
    dir: PathBuf,
    /// The file of verified items.
    file: PathBuf,
    /// Who verified them. Default: the OS user.
    #[arg(long)]
    by: Option<String>,
    /// Where they come from (e.g. "lab re-inspection 2026-03, line 3").
    #[arg(long)]
    source: String,
    /// Replace items whose ids are already in the trusted set.
    #[arg(long)]
    replace: bool,
    /// Print JSON.
    #[arg(long)]
    json: bool,
}

/// List the trusted set with provenance and class balance.
#[derive(Debug, clap::Args)]
struct ListArgs {
    /// Workspace folder.
    dir: PathBuf,
    /// Print JSON.
    #[arg(long)]
    json: bool,
}

/// Remove trusted items (a class is never emptied).
#[derive(Debug, clap::Args)]
struct RemoveArgs {
    /// Workspace folder.
    dir: PathBuf,
    /// Item ids.
    #[arg(required = true)]
    ids: Vec<String>,
    /// Why (required; recorded in the audit trail).
    #[arg(long)]
    reason: String,
    /// Who. Default: the OS user.
    #[arg(long)]
    by: Option<String>,
    /// Print JSON.
    #[arg(long)]
    json: bool,
}

/// Export the trusted set: CSV in the workspace's columns (re-importable with `trusted add`), or JSON
/// Lines with provenance.
#[derive(Debug, clap::Args)]
struct ExportArgs {
    /// Workspace folder.
    dir: PathBuf,
    /// `csv` or `jsonl`.
    #[arg(long, default_value = "csv", value_parser = ["csv", "jsonl"])]
    format: String,
    /// Write here instead of stdout.
    #[arg(long, short)]
    output: Option<PathBuf>,
}

/// Re-score recently accepted batches against the current trusted set ([trusted]
/// rescore_lookback_batches / rescore_lookback_days). Exit code 1 when any now looks poisoned.
#[derive(Debug, clap::Args)]
struct RescanArgs {
    /// Workspace folder.
    dir: PathBuf,
    /// Who asked. Default: the OS user.
    #[arg(long)]
    by: Option<String>,
    /// Print JSON.
    #[arg(long)]
    json: bool,
}

/// A file sent over the admin channel: its name (no folder) and its content, which must be UTF-8 text
/// (an input error otherwise, as for a file that cannot be read).
pub(super) fn read_text_file(path: &std::path::Path) -> anyhow::Result<(String, String)> {
    let bytes = std::fs::read(path)
        .map_err(|e| Failure::new(exit::INPUT, format!("read {}: {e}", path.display())))?;
    let content = String::from_utf8(bytes)
        .map_err(|_| Failure::new(exit::INPUT, format!("{} is not UTF-8 text", path.display())))?;
    let name = path
        .file_name()
        .map(|s| s.to_string_lossy().into_owned())
        .unwrap_or_default();
    Ok((name, content))
}

/// Run the subcommand.
pub fn run(args: Args) -> anyhow::Result<u8> {
    match args.command {
        Command::Add(a) => {
            let (file_name, content) = read_text_file(&a.file)?;
            let req = TrustedAddRequest {
                file_name,
                content,
                by: a.by.unwrap_or_else(super::init::os_user),
                source: a.source,
                replace: a.replace,
            };
            let v = dispatch(&a.dir, Request::TrustedAdd(req))?;
            print_change(v, a.json)
        }
        Command::List(a) => {
            let v = dispatch(&a.dir, Request::TrustedList)?;
            if a.json {
                print_json(&v)?;
            } else {
                let r: TrustedReport = serde_json::from_value(v)?;
                println!(
                    "{:<24} {:<16} {:<16} {:<20} source",
                    "item", "label", "verified by", "added"
                );
                for t in &r.items {
                    println!(
                        "{:<24} {:<16} {:<16} {:<20} {}",
                        sanitize(&t.id),
                        sanitize(&t.label),
                        sanitize(&t.added_by),
                        t.added_at.format("%Y-%m-%d %H:%M:%S"),
                        sanitize(&t.source)
                    );
                }
                print_balance(&r.balance);
            }
            Ok(exit::OK)
        }
        Command::Remove(a) => {
            let req = TrustedRemoveRequest {
                ids: a.ids,
                by: a.by.unwrap_or_else(super::init::os_user),
                reason: a.reason,
            };
            let v = dispatch(&a.dir, Request::TrustedRemove(req))?;
            print_change(v, a.json)
        }
        Command::Export(a) => {
            let v = dispatch(&a.dir, Request::TrustedExport)?;
            let export: TrustedExport = serde_json::from_value(v)?;
            let config = labelweir::config::Config::from_workspace(&a.dir)
                .map_err(|e| Failure::new(exit::CONFIG, e.to_string()))?;
            let bytes = if a.format == "jsonl" {
                let mut out = Vec::new();
                for t in &export.items {
                    serde_json::to_writer(&mut out, t)?;
                    out.push(b'\n');
                }
                out
            } else {
                export_csv(&export, &config)?
            };
            match a.output {
                Some(p) => labelweir::fsx::write_atomic_at(&p, &bytes, None)
                    .map(|_| ())
                    .map_err(|e| Failure::new(exit::IO, format!("write {}: {e}", p.display())))?,
                None => std::io::stdout().write_all(&bytes)?,
            }
            Ok(exit::OK)
        }
        Command::Rescan(a) => {
            let v = dispatch(
                &a.dir,
                Request::Rescan {
                    by: a.by.unwrap_or_else(super::init::os_user),
                },
            )?;
            let r: RescanReport = serde_json::from_value(v.clone())?;
            if a.json {
                print_json(&v)?;
            } else {
                print_rescan(&r);
            }
            Ok(if r.now_suspicious.is_empty() {
                exit::OK
            } else {
                exit::QUARANTINE
            })
        }
    }
}

/// The trusted items as CSV in the workspace's columns, faithful for re-import with `trusted add` (not
/// neutralised for spreadsheets: ids are written exactly as stored).
fn export_csv(e: &TrustedExport, config: &labelweir::config::Config) -> anyhow::Result<Vec<u8>> {
    let d = e.features.len();
    let rows: Vec<&TrustedItem> = e.items.iter().filter(|t| t.features.len() == d).collect();
    let ids: Vec<String> = rows.iter().map(|t| t.id.clone()).collect();
    let labels: Vec<String> = rows.iter().map(|t| t.label.clone()).collect();
    let x = ndarray::Array2::from_shape_vec(
        (rows.len(), d),
        rows.iter()
            .flat_map(|t| t.features.iter().copied())
            .collect(),
    )?;
    let mut out = Vec::new();
    labelweir::data::write_csv(
        &mut out,
        (&config.schema.id_column, &config.schema.label_column),
        &ids,
        &labels,
        &e.features,
        x.view(),
    )?;
    Ok(out)
}

fn print_balance(b: &labelweir::review::Balance) {
    let parts: Vec<String> = b
        .per_class
        .iter()
        .map(|(c, n)| format!("{} {n}", sanitize(c)))
        .collect();
    println!("\n{} trusted items: {}", b.total, parts.join(", "));
    for w in &b.warnings {
        println!("warning: {}", sanitize(w));
    }
}

fn print_rescan(r: &RescanReport) {
    if r.checked.is_empty() {
        println!("re-scan: no recently accepted batches to re-check");
        return;
    }
    println!(
        "re-scan of {} recently accepted batch(es) ({}):",
        r.checked.len(),
        r.pool_mode
    );
    for c in &r.checked {
        match &c.error {
            Some(e) => println!(
                "  {:<12} {:<16} not re-scored: {}",
                c.batch_id,
                sanitize(&c.vendor),
                sanitize(e)
            ),
            None => println!(
                "  {:<12} {:<16} repair cost then {} now {}  -> {}{}",
                c.batch_id,
                sanitize(&c.vendor),
                c.repair_cost_then.map_or("-".into(), |x| format!("{x:.4}")),
                c.repair_cost_now.map_or("-".into(), |x| format!("{x:.4}")),
                c.verdict_now.map_or("?", |v| v.as_str()),
                if c.reasons.is_empty() {
                    String::new()
                } else {
                    format!(" ({})", c.reasons.join(","))
                }
            ),
        }
    }
    for b in &r.now_suspicious {
        println!(
            "now looks suspicious: {b} — review it, and if needed: labelweir quarantine withdraw DIR {b} --reason ..."
        );
    }
}

fn print_change(v: serde_json::Value, json: bool) -> anyhow::Result<u8> {
    let c: TrustedChange = serde_json::from_value(v.clone())?;
    if json {
        print_json(&v)?;
    } else {
        if !c.added.is_empty() {
            println!("added {} trusted item(s)", c.added.len());
        }
        if !c.replaced.is_empty() {
            println!("replaced {} trusted item(s)", c.replaced.len());
        }
        if !c.removed.is_empty() {
            println!("removed {} trusted item(s)", c.removed.len());
        }
        if !c.expired.is_empty() {
            println!(
                "the rolling window retired {} older item(s): {}",
                c.expired.len(),
                sanitize(&c.expired.join(", "))
            );
        }
        print_balance(&c.balance);
        print_rescan(&c.rescan);
    }
    Ok(exit::OK)
}
