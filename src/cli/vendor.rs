//! `labelweir vendor`: a reviewer's decisions about a vendor as a whole.

use std::path::PathBuf;

use super::exit;
use super::quarantine::{dispatch, print_json};
use labelweir::review::{DriftReset, DriftResetRequest, Request};
use labelweir::text::sanitize;

/// Decisions about a vendor as a whole. Works while the daemon runs (through its admin socket) and while
/// it is stopped; every decision is recorded in the audit trail.
#[derive(Debug, clap::Args)]
pub struct Args {
    #[command(subcommand)]
    command: Command,
}

#[derive(Debug, clap::Subcommand)]
enum Command {
    ResetDrift(ResetDriftArgs),
}

/// After a drift alarm (`repair_cost_drift`, `flagged_share_drift`, the item stream's rules) was checked
/// and the vendor's current level is accepted as its new normal: set the drift statistics (CUSUMs) back
/// to 0 and let the values held aside during the drift join the vendor's baselines. Also clears a
/// spot-check hold (`spot_check_disagreement`) once the expert's answers were looked at, and restarts the
/// spot-check charts. An alarm is a suspicion for review, not proof; resetting it is a reviewer's
/// judgement and is audited.
#[derive(Debug, clap::Args)]
struct ResetDriftArgs {
    /// Workspace folder.
    dir: PathBuf,
    /// The vendor.
    vendor: String,
    /// Why (recorded in the audit trail).
    #[arg(long)]
    reason: String,
    /// Who decides. Default: the OS user.
    #[arg(long)]
    by: Option<String>,
    /// Print JSON.
    #[arg(long)]
    json: bool,
}

/// Run the subcommand.
pub fn run(args: Args) -> anyhow::Result<u8> {
    match args.command {
        Command::ResetDrift(a) => {
            let req = DriftResetRequest {
                vendor: a.vendor,
                by: a.by.unwrap_or_else(super::init::os_user),
                reason: a.reason,
            };
            let v = dispatch(&a.dir, Request::DriftReset(req))?;
            if a.json {
                print_json(&v)?;
            } else {
                let r: DriftReset = serde_json::from_value(v)?;
                println!(
                    "vendor {}: drift statistics reset by {} (repair-cost CUSUM was {:.2}, flagged-share CUSUM {:.2}); {} held values joined the baselines, {} batches in the repair-cost baseline",
                    sanitize(&r.vendor),
                    sanitize(&r.by),
                    r.repair_cost_cusum_before,
                    r.flagged_share_cusum_before,
                    r.held_values_joined,
                    r.baseline_batches
                );
                if r.spot_hold_cleared {
                    println!(
                        "vendor {}: spot-check hold cleared; its batches are judged by their scores again",
                        sanitize(&r.vendor)
                    );
                }
            }
        }
    }
    Ok(exit::OK)
}
