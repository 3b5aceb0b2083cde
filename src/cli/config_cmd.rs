//! `labelweir config`: check a workspace's configuration.

use std::path::PathBuf;

use super::{exit, Failure};
use labelweir::config::Config;

/// Work with a workspace's configuration file (DIR/labelweir.toml).
#[derive(Debug, clap::Args)]
pub struct Args {
    #[command(subcommand)]
    command: Command,
}

#[derive(Debug, clap::Subcommand)]
enum Command {
    /// Validate DIR/labelweir.toml: syntax, unknown keys, value ranges, and limits that contradict each
    /// other (an every-vendor ceiling below the cold-start limit it should sit above). Exit 0 when valid,
    /// 78 when not.
    Check {
        /// Workspace folder.
        dir: PathBuf,
        /// Print JSON: `{"file", "valid", "vendors", "problems"}`.
        #[arg(long)]
        json: bool,
    },
}

/// Limits that each parse but contradict each other: the fixed every-vendor ceilings must not sit below the
/// cold-start limits (a vendor would then face a stricter rule once it has a history than before).
fn contradictions(c: &Config) -> Vec<String> {
    let p = &c.policy;
    let mut v = Vec::new();
    let pairs = [
        (
            "max_repair_cost",
            p.max_repair_cost,
            "cold_start_max_repair_cost",
            p.cold_start_max_repair_cost,
        ),
        (
            "max_damage_nats",
            p.max_damage_nats,
            "cold_start_max_damage_nats",
            p.cold_start_max_damage_nats,
        ),
        (
            "max_flagged_share",
            p.max_flagged_share,
            "cold_start_max_flagged_share",
            p.cold_start_max_flagged_share,
        ),
    ];
    for (a, av, b, bv) in pairs {
        if av < bv {
            v.push(format!(
                "[policy] {a} = {av} is below {b} = {bv}: the ceiling for every vendor must be at least the cold-start limit"
            ));
        }
    }
    v
}

/// Run the subcommand.
pub fn run(args: Args) -> anyhow::Result<u8> {
    match args.command {
        Command::Check { dir, json } => {
            let file = dir.join(labelweir::config::CONFIG_FILE);
            let (vendors, problems) = match Config::from_workspace(&dir) {
                Ok(c) => (c.vendors.clone(), contradictions(&c)),
                Err(e) => (Vec::new(), vec![e.to_string()]),
            };
            if json {
                let v = serde_json::json!({
                    "file": file,
                    "valid": problems.is_empty(),
                    "vendors": vendors,
                    "problems": problems,
                });
                println!("{}", serde_json::to_string_pretty(&v)?);
                return Ok(if problems.is_empty() {
                    exit::OK
                } else {
                    exit::CONFIG
                });
            }
            if !problems.is_empty() {
                return Err(Failure::new(
                    exit::CONFIG,
                    format!("invalid configuration: {}", problems.join("; ")),
                )
                .into());
            }
            println!(
                "{}: valid ({} {}: {})",
                file.display(),
                vendors.len(),
                if vendors.len() == 1 {
                    "vendor"
                } else {
                    "vendors"
                },
                vendors.join(", ")
            );
            Ok(exit::OK)
        }
    }
}
