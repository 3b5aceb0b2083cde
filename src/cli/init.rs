//! `labelweir init`: create a workspace.

use std::path::PathBuf;

use anyhow::Context;
use chrono::Utc;

use super::{exit, Failure};
use crate::config::{self, Config, Workspace};
use crate::data::{self, Classes, TableOptions};
use crate::model::{FeatureMap, Standardizer};
use crate::store::{AuditRecord, Store, TrustedItem, WorkspaceMeta, RECORD_VERSION};

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

/// Create the workspace; returns the number of trusted items stored.
pub fn create_workspace(
    dir: &std::path::Path,
    trusted: &std::path::Path,
    vendors: &[String],
    by: &str,
) -> anyhow::Result<usize> {
    let cfg_text = config::render_with_vendors(vendors);
    let cfg = Config::parse_str(&cfg_text, &dir.join(config::CONFIG_FILE))
        .and_then(|c| c.validate().map(|_| c))
        .map_err(|e| Failure::new(exit::INPUT, e.to_string()))?;
    let ws = Workspace::new(dir);
    if ws.config_file().exists() || ws.state().exists() {
        return Err(Failure::new(
            exit::INPUT,
            format!("{} already holds a workspace", dir.display()),
        )
        .into());
    }
    let opts = TableOptions {
        id_column: cfg.schema.id_column.clone(),
        label_column: cfg.schema.label_column.clone(),
        ..TableOptions::default()
    };
    let table = data::read_table(trusted, &opts, None)
        .map_err(|e| Failure::new(exit::INPUT, e.to_string()))?;
    let classes = Classes::from_labels(&table.labels);
    if classes.len() < 2 {
        return Err(Failure::new(
            exit::INPUT,
            "the trusted set needs items of at least two classes",
        )
        .into());
    }
    let standardizer = Standardizer::fit(&[table.features.view()])
        .map_err(|e| Failure::new(exit::INPUT, e.to_string()))?;
    let feature_map = FeatureMap::new(standardizer, cfg.model.feature_map, cfg.model.seed)
        .map_err(|e| Failure::new(exit::CONFIG, e.to_string()))?;
    let meta = WorkspaceMeta {
        version: RECORD_VERSION,
        classes: classes.names().to_vec(),
        features: table.feature_names.clone(),
        feature_map,
        feature_map_setting: serde_json::to_value(cfg.model.feature_map)?,
        created_at: Utc::now(),
    };
    let now = Utc::now();
    let source = trusted
        .file_name()
        .map(crate::ingest::escape_name)
        .unwrap_or_default();
    let items: Vec<TrustedItem> = (0..table.len())
        .map(|i| TrustedItem {
            version: RECORD_VERSION,
            id: table.ids[i].clone(),
            label: table.labels[i].clone(),
            features: table.features.row(i).to_vec(),
            weight: 1.0,
            added_by: by.to_string(),
            added_at: now,
            source: source.clone(),
        })
        .collect();
    std::fs::create_dir_all(dir).with_context(|| format!("create {}", dir.display()))?;
    crate::daemon::prepare_folders(&ws, &cfg)
        .map_err(|e| Failure::new(e.exit_code(), e.to_string()))?;
    use std::os::unix::fs::PermissionsExt;
    for (d, mode) in [
        ("processing", 0o750),
        ("quarantine", 0o750),
        ("state", 0o700),
    ] {
        std::fs::set_permissions(ws.folder(d), std::fs::Permissions::from_mode(mode))
            .with_context(|| format!("chmod {d}"))?;
    }
    crate::actions::write_atomic_mode(dir, config::CONFIG_FILE, cfg_text.as_bytes(), 0o640)
        .with_context(|| format!("write {}", ws.config_file().display()))?;
    let store =
        Store::open(&ws.state(), &cfg.store).map_err(|e| Failure::new(exit::IO, e.to_string()))?;
    let audit = AuditRecord::new(by, "init").detail(serde_json::json!({
        "vendors": vendors,
        "trusted_items": items.len(),
        "trusted_source": source,
        "classes": meta.classes,
        "features": meta.features.len(),
    }));
    store
        .initialise(&meta, &items, audit)
        .map_err(|e| Failure::new(exit::IO, e.to_string()))?;
    Ok(items.len())
}

/// Run the subcommand.
pub fn run(args: Args) -> anyhow::Result<u8> {
    let by = args.by.clone().unwrap_or_else(os_user);
    let n = create_workspace(&args.dir, &args.trusted, &args.vendors, &by)?;
    println!(
        "created workspace {} with {} trusted items; vendors deliver into {}/inbox/<vendor>/",
        args.dir.display(),
        n,
        args.dir.display()
    );
    println!("start it with: labelweir run {}", args.dir.display());
    Ok(exit::OK)
}
