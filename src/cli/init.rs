//! `labelweir init`: create a workspace.

use std::path::PathBuf;

use super::exit;
use labelweir::workspace::{create_workspace_with, InitExtras};

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
    /// The team's feature table (id + feature columns; CSV, JSON Lines or Parquet): the workspace then
    /// takes features by reference, vendors deliver `id,label` files, and the table grows through
    /// `labelweir features add` or `DIR/features/incoming/`. The trusted file may then be `id,label` too.
    #[arg(long)]
    pub features: Option<PathBuf>,
    /// An existing training pool to start from (id, label and features, or `id,label` with --features),
    /// recorded with its provenance (file, SHA-256, --by, time); the first batch is judged against it.
    #[arg(long)]
    pub pool: Option<PathBuf>,
    /// Print JSON: the workspace, its trusted-item count, vendors, who verified the trusted items.
    #[arg(long)]
    pub json: bool,
}

/// The OS user name: `$USER`, else `$LOGNAME` (empty values skipped), else the name of our user id in
/// /etc/passwd, else `uid <n>`, so that the audit trail never records an anonymous actor.
pub fn os_user() -> String {
    for var in ["USER", "LOGNAME"] {
        if let Ok(v) = std::env::var(var) {
            if !v.trim().is_empty() {
                return v;
            }
        }
    }
    let uid = rustix::process::getuid().as_raw();
    std::fs::read_to_string("/etc/passwd")
        .ok()
        .and_then(|t| {
            t.lines().find_map(|l| {
                let mut f = l.split(':');
                let name = f.next()?;
                let id = f.nth(1)?;
                (id.parse::<u32>().ok()? == uid && !name.is_empty()).then(|| name.to_string())
            })
        })
        .unwrap_or_else(|| format!("uid {uid}"))
}

/// Run the subcommand.
pub fn run(args: Args) -> anyhow::Result<u8> {
    let by = args.by.clone().unwrap_or_else(os_user);
    let extras = InitExtras {
        features: args.features.clone(),
        pool: args.pool.clone(),
    };
    let n = create_workspace_with(&args.dir, &args.trusted, &args.vendors, &by, &extras)
        .map_err(super::workspace_failure)?;
    if args.json {
        let v = serde_json::json!({
            "workspace": args.dir,
            "trusted_items": n,
            "vendors": args.vendors,
            "verified_by": by,
            "inbox": args.dir.join("inbox"),
            "start": format!("labelweir run {}", args.dir.display()),
        });
        println!("{}", serde_json::to_string_pretty(&v)?);
        return Ok(exit::OK);
    }
    println!(
        "created workspace {} with {} trusted items; vendors deliver into {}/inbox/<vendor>/",
        args.dir.display(),
        n,
        args.dir.display()
    );
    if let Some(f) = &args.features {
        println!(
            "features by reference from {}: vendors deliver id,label files; add features with `labelweir features add {} FILE` or by dropping files into {}/features/incoming/",
            f.display(),
            args.dir.display(),
            args.dir.display()
        );
    }
    if let Some(p) = &args.pool {
        println!("imported the training pool from {}", p.display());
    }
    println!("start it with: labelweir run {}", args.dir.display());
    Ok(exit::OK)
}
