//! `labelweir pool`: the accepted pool as a whole.

use std::path::PathBuf;

use super::exit;
use super::progress::Progress;
use super::quarantine::{dispatch_with_progress, print_json};
use labelweir::review::{Request, SweepReport, SweepRequest};
use labelweir::text::sanitize;

/// The accepted pool as a whole. Works while the daemon runs (through its admin socket) and while it is
/// stopped; every sweep is recorded in the audit trail.
#[derive(Debug, clap::Args)]
pub struct Args {
    #[command(subcommand)]
    command: Command,
}

#[derive(Debug, clap::Subcommand)]
enum Command {
    Sweep(SweepArgs),
}

/// Debug every accepted item against the current trusted set: the pool model's doubt beside the doubt of
/// the learner pulled onto the trusted items, weighted per item by how sound the pool model is on the
/// nearby trusted items. Lists suspects by vendor and batch, the batches worth withdrawing first. Run it
/// after the trusted set grows, and to find a bias a vendor delivered from its first batch. Exit code 1
/// when a batch is worth withdrawing (`labelweir quarantine withdraw`). A suspect is a suspicion for
/// review, not proof.
#[derive(Debug, clap::Args)]
struct SweepArgs {
    /// Workspace folder.
    dir: PathBuf,
    /// Suspects listed per batch.
    #[arg(long, default_value_t = 5)]
    top: usize,
    /// Batches listed (all are counted).
    #[arg(long, default_value_t = 20)]
    batches: usize,
    /// Who asked. Default: the OS user.
    #[arg(long)]
    by: Option<String>,
    /// Print JSON.
    #[arg(long)]
    json: bool,
}

/// Run the subcommand.
pub fn run(args: Args) -> anyhow::Result<u8> {
    match args.command {
        Command::Sweep(a) => {
            // Items scored, on one line of stderr when it is a terminal.
            let bar = Progress::on_terminal("pool sweep: items scored");
            let v = dispatch_with_progress(
                &a.dir,
                Request::PoolSweep(SweepRequest {
                    by: a.by.unwrap_or_else(super::init::os_user),
                    top: a.top,
                    progress: bar.is_some(),
                }),
                &|p| {
                    if let Some(b) = &bar {
                        b.show(p.done, p.total);
                    }
                },
            );
            if let Some(b) = &bar {
                b.finish();
            }
            let v = v?;
            let r: SweepReport = serde_json::from_value(v.clone())?;
            if a.json {
                print_json(&v)?;
            } else {
                print_sweep(&r, a.batches);
            }
            Ok(if r.withdraw.is_empty() {
                exit::OK
            } else {
                exit::QUARANTINE
            })
        }
    }
}

fn print_sweep(r: &SweepReport, max_batches: usize) {
    if r.items == 0 {
        println!("pool sweep: the pool is empty");
        return;
    }
    println!(
        "pool sweep: {} accepted items, {} suspects ({:.1} %), {:.0} ms; pool model: {}",
        r.items,
        r.suspects,
        100.0 * r.suspect_share,
        r.elapsed_ms,
        sanitize(&r.pool_model)
    );
    println!("trusted audit: {}", sanitize(&r.trusted_audit));
    println!("\nby vendor:");
    for v in &r.vendors {
        println!(
            "  {:<20} {:>4} batches {:>8} items {:>6} suspects ({:.1} %)",
            sanitize(&v.vendor),
            v.batches,
            v.items,
            v.suspects,
            100.0 * v.suspect_share
        );
    }
    println!("\nby batch (worth withdrawing first):");
    for b in r.batches.iter().take(max_batches) {
        println!(
            "  {}{:<12} {:<20} {:>6} items {:>5} suspects ({:.1} %), mean suspicion {:.3}",
            if b.withdraw_candidate { "* " } else { "  " },
            b.batch_id,
            sanitize(&b.vendor),
            b.items,
            b.suspects,
            100.0 * b.suspect_share,
            b.mean_suspicion
        );
        if b.withdraw_candidate {
            for s in &b.top {
                println!(
                    "      {:<24} labelled {:<14} trusted set suggests {:<14} suspicion {:.3} (pool model doubt {:.3}, anchored doubt {:.3})",
                    sanitize(&s.id),
                    sanitize(&s.label),
                    sanitize(&s.proposed_label),
                    s.suspicion,
                    s.learner_doubt,
                    s.anchored_doubt
                );
            }
        }
    }
    if r.batches.len() > max_batches {
        println!(
            "  … {} more batches (--batches N)",
            r.batches.len() - max_batches
        );
    }
    for b in &r.withdraw {
        println!(
            "worth withdrawing: {b} — review it, and if needed: labelweir quarantine withdraw DIR {b} --reason ..."
        );
    }
    println!("\n{}", sanitize(&r.note));
}
