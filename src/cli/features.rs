//! `labelweir features`: the team's feature table (workspaces created with `init --features`).

use std::path::PathBuf;

use super::{exit, Failure};
use labelweir::config::Config;
use labelweir::features::{import_file, ImportError};
use labelweir::store::{Store, StoreError};
use labelweir::workspace::Workspace;

/// Manage the team's feature table: the features that `id,label` deliveries are joined with.
///
/// `add` imports a feature-table file (id + the workspace's feature columns; CSV, JSON Lines or Parquet).
/// Ids already in the table take the new file's values (the last import wins; the audit records how many
/// were replaced and changed). While the daemon runs, `add` hands the file to it through
/// `DIR/features/incoming/`. `list` shows every import with its provenance.
#[derive(Debug, clap::Args)]
pub struct Args {
    #[command(subcommand)]
    pub command: Cmd,
}

/// The subcommands.
#[derive(Debug, clap::Subcommand)]
pub enum Cmd {
    /// Import a feature-table file.
    Add {
        /// Workspace folder.
        dir: PathBuf,
        /// The file (.csv, .jsonl or .parquet).
        file: PathBuf,
        /// Who adds it (recorded). Default: the OS user.
        #[arg(long)]
        by: Option<String>,
    },
    /// List the imports into the feature table.
    List {
        /// Workspace folder.
        dir: PathBuf,
    },
}

/// Run the subcommand.
pub fn run(args: Args) -> anyhow::Result<u8> {
    match args.command {
        Cmd::Add { dir, file, by } => add(dir, file, by),
        Cmd::List { dir } => list(dir),
    }
}

fn open(dir: &std::path::Path) -> anyhow::Result<(Config, Result<Store, StoreError>)> {
    let ws = Workspace::new(dir);
    let config =
        Config::from_workspace(&ws.root).map_err(|e| Failure::new(exit::CONFIG, e.to_string()))?;
    let store = Store::open_workspace(dir, &config.store);
    Ok((config, store))
}

fn add(dir: PathBuf, file: PathBuf, by: Option<String>) -> anyhow::Result<u8> {
    let by = by.unwrap_or_else(super::init::os_user);
    let (config, store) = open(&dir)?;
    match store {
        Ok(store) => match import_file(&store, &config, &file, &by) {
            Ok(i) => {
                println!(
                    "imported {} rows from {} (import {}): {} new ids, {} replaced ({} with new values)",
                    i.rows, i.provenance.source, i.seq, i.added, i.replaced, i.changed
                );
                Ok(exit::OK)
            }
            Err(ImportError::Input(m)) => Err(Failure::new(exit::INPUT, m).into()),
            Err(e) => Err(Failure::new(exit::IO, e.to_string()).into()),
        },
        Err(StoreError::Locked(_)) => {
            // The daemon holds the store: hand the file over through the team's drop folder (copied under
            // a temporary name, then renamed, so the daemon never sees half a file).
            let ws = Workspace::new(&dir);
            let name = file
                .file_name()
                .and_then(|n| n.to_str())
                .ok_or_else(|| Failure::new(exit::INPUT, "the file name is not valid UTF-8"))?
                .to_string();
            let bytes = std::fs::read(&file)
                .map_err(|e| Failure::new(exit::INPUT, format!("{}: {e}", file.display())))?;
            labelweir::fsx::write_atomic(&ws.features_incoming(), &name, &bytes, Some(0o640))
                .map_err(|e| Failure::new(exit::IO, e.to_string()))?;
            println!(
                "the daemon is running: {name} was handed to it in {}; it is imported at the next rescan (see `labelweir audit`)",
                ws.features_incoming().display()
            );
            Ok(exit::OK)
        }
        Err(e) => Err(Failure::new(exit::IO, e.to_string()).into()),
    }
}

fn list(dir: PathBuf) -> anyhow::Result<u8> {
    let (_, store) = open(&dir)?;
    let store = store.map_err(|e| Failure::new(exit::IO, e.to_string()))?;
    let Some(names) = store
        .feature_schema()
        .map_err(|e| Failure::new(exit::IO, e.to_string()))?
    else {
        println!("this workspace takes features from the delivered files (no feature table)");
        return Ok(exit::OK);
    };
    let rows = store
        .feature_rows()
        .map_err(|e| Failure::new(exit::IO, e.to_string()))?;
    println!("feature table: {rows} ids × {} features", names.len());
    for i in store
        .feature_imports()
        .map_err(|e| Failure::new(exit::IO, e.to_string()))?
    {
        println!(
            "{:>4}  {}  {}  by {}  sha256 {}  rows {}  new {}  replaced {}  changed {}",
            i.seq,
            i.provenance.at.format("%Y-%m-%d %H:%M:%S"),
            labelweir::text::sanitize(&i.provenance.source),
            labelweir::text::sanitize(&i.provenance.by),
            &i.provenance.sha256[..12.min(i.provenance.sha256.len())],
            i.rows,
            i.added,
            i.replaced,
            i.changed
        );
    }
    Ok(exit::OK)
}
