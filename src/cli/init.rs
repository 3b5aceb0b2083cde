//! `labelweir init`: create a workspace.

use std::path::PathBuf;

use super::exit;
use labelweir::workspace::create_workspace;

/// Create a workspace: the config file, a drop folder per vendor, the daemon's folders, and the store
/// seeded with the trusted set.
///
/// Layout: `DIR/labelweir.toml`, `DIR/inbox/<vendor>/`, `DIR/processing/`, `DIR/accepted/`, `DIR/quarantine/`,
/// `DIR/rejected/`, `DIR/notices/<vendor>/`, `DIR/state/` (the store). The trusted set's feature columns become
/// the workspace's schema and its labels the classes; features are standardised on it.
#[derive(Debug, clap::Args)]
pub struct Args {
    /// Workspace folder (created if missing; must not hold a workspace already).
    pub dir: PathBuf,
    /// Trusted (expert-verified) items: CSV or JSON Lines with id, label and feature columns.
    #[arg(long)]
    pub trusted: PathBuf,
    /// A contracted vendor (repeat for each); its drop folder is `inbox/<vendor>/`.
    #[arg(long = "vendor", required = true)]
    pub vendors: Vec<String>,
    /// Who verified the trusted items (recorded as their provenance). Default: the OS user.
    #[arg(long)]
    pub by: Option<String>,
}

/// The OS user name, or `unknown`.
pub fn os_user() -> String {
    std::env::var("USER")
        .or_else(|_| std::env::var("LOGNAME"))
        .unwrap_or_else(|_| "unknown".into())
}

/// Run the subcommand.
pub fn run(args: Args) -> anyhow::Result<u8> {
    let by = args.by.clone().unwrap_or_else(os_user);
    let n = create_workspace(&args.dir, &args.trusted, &args.vendors, &by)
        .map_err(super::workspace_failure)?;
    println!(
        "created workspace {} with {} trusted items; vendors deliver into {}/inbox/<vendor>/",
        args.dir.display(),
        n,
        args.dir.display()
    );
    println!("start it with: labelweir run {}", args.dir.display());
    Ok(exit::OK)
}
