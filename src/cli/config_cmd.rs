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
    /// Validate DIR/labelweir.toml: syntax, unknown keys, value ranges. Exit 0 when valid, 78 when not.
    Check {
        /// Workspace folder.
        dir: PathBuf,
    },
}

/// Run the subcommand.
pub fn run(args: Args) -> anyhow::Result<u8> {
    match args.command {
        Command::Check { dir } => match Config::from_workspace(&dir) {
            Ok(c) => {
                println!(
                    "{}: valid ({} vendor(s): {})",
                    dir.join(labelweir::config::CONFIG_FILE).display(),
                    c.vendors.len(),
                    c.vendors.join(", ")
                );
                Ok(exit::OK)
            }
            Err(e) => Err(Failure::new(exit::CONFIG, format!("invalid configuration: {e}")).into()),
        },
    }
}
