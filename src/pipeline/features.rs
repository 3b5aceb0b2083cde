//! The team's feature table (features by reference): importing feature-table files, by command
//! (`labelweir features add`) and from the team's drop folder `features/incoming/`.
//!
//! A workspace created with `labelweir init --features FILE` takes features by reference: vendors deliver
//! `id,label` files and the daemon joins each id's features from this table (in
//! the daemon's ingest stage). The table grows only through the two paths here, both the team's:
//!
//! * `labelweir features add DIR FILE` imports a file at once when the daemon is stopped; while it runs
//!   (the store is locked), the command copies the file into `features/incoming/` under a temporary name
//!   and renames it there, and the daemon imports it.
//! * The daemon lists `features/incoming/` at every full rescan (at start and every
//!   `ingest.rescan_interval_secs`). A file is taken once it is older than `ingest.quiet_period_ms`;
//!   temporary names (leading `.`, `.part`, `.tmp`, ...) are left alone, as in the vendors' inbox. An
//!   imported file moves to `features/imported/<import seq>-<name>`; a refused one to
//!   `features/rejected/<time>-<name>` beside a `.reason.txt`. Links, folders and special files are
//!   refused unread.
//!
//! Ids already in the table are replaced by the newer file (last writer wins), and the import record and
//! its audit record say how many were replaced and changed (see [`crate::store`]'s feature trees). The
//! vendors' inbox is a different folder; nothing a vendor drops reaches this table.

use std::path::Path;
use std::time::{Duration, SystemTime};

use chrono::Utc;

use super::ingest::{is_ignored_name, read_claimed, unsafe_name, EntryKind};
use crate::config::Config;
use crate::data::{FeatureTable, Format};
use crate::store::{FeatureImport, Provenance, Store, StoreError};
use crate::workspace::{team_file_options, Workspace};

/// Why a feature-table file was not imported.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum ImportError {
    /// The file is not a usable feature table for this workspace.
    #[error("{0}")]
    Input(String),
    /// The store failed (or the workspace does not take features by reference).
    #[error(transparent)]
    Store(#[from] StoreError),
}

/// Parse `bytes` (the file `name`, format from its extension) against the workspace's feature schema and
/// import them with their provenance.
pub fn import_bytes(
    store: &Store,
    config: &Config,
    name: &str,
    bytes: &[u8],
    sha256: String,
    by: &str,
) -> Result<FeatureImport, ImportError> {
    let schema = store.feature_schema()?.ok_or_else(|| {
        ImportError::Input(
            "this workspace does not take features by reference (it was created without --features)"
                .into(),
        )
    })?;
    let format = Format::from_path(Path::new(name)).ok_or_else(|| {
        ImportError::Input(format!(
            "{name}: unknown file type: expected a .csv, .jsonl or .parquet extension"
        ))
    })?;
    let table = FeatureTable::parse(
        bytes,
        format,
        name,
        &team_file_options(config),
        Some(&schema),
    )
    .map_err(|e| ImportError::Input(e.to_string()))?;
    let provenance = Provenance {
        source: name.to_string(),
        sha256,
        by: by.to_string(),
        at: Utc::now(),
    };
    Ok(store.import_features(&table, provenance)?)
}

/// Import a feature-table file by path (`labelweir features add`).
pub fn import_file(
    store: &Store,
    config: &Config,
    path: &Path,
    by: &str,
) -> Result<FeatureImport, ImportError> {
    use sha2::Digest;
    let bytes =
        std::fs::read(path).map_err(|e| ImportError::Input(format!("{}: {e}", path.display())))?;
    let name = path
        .file_name()
        .map(crate::text::escape_name)
        .unwrap_or_default();
    let sha = hex::encode(sha2::Sha256::digest(&bytes));
    import_bytes(store, config, &name, &bytes, sha, by)
}

/// What happened to one file of `features/incoming/`.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum Taken {
    /// Imported; the file moved to `features/imported/`.
    Imported(FeatureImport),
    /// Refused for the reason given; the file moved to `features/rejected/`.
    Refused {
        /// The file's (escaped) name.
        name: String,
        /// Why.
        reason: String,
    },
}

fn move_out(from: &Path, to_dir: &Path, name: &str) -> std::io::Result<()> {
    std::fs::rename(from, to_dir.join(name))?;
    std::fs::File::open(to_dir)?.sync_all()
}

/// Take the ready files of `features/incoming/` (see the module documentation). A store failure stops the
/// walk (the file stays for the next rescan); anything about a file refuses that file only.
pub fn take_incoming(
    ws: &Workspace,
    store: &Store,
    config: &Config,
    now: SystemTime,
) -> Result<Vec<Taken>, StoreError> {
    let dir = ws.features_incoming();
    let Ok(rd) = std::fs::read_dir(&dir) else {
        return Ok(Vec::new());
    };
    let quiet = Duration::from_millis(config.ingest.quiet_period_ms);
    let mut entries: Vec<_> = rd.flatten().collect();
    entries.sort_by_key(|e| e.file_name());
    let mut out = Vec::new();
    for e in entries {
        let name_os = e.file_name();
        let Ok(meta) = std::fs::symlink_metadata(e.path()) else {
            continue;
        };
        let kind = if meta.file_type().is_symlink() {
            EntryKind::Symlink
        } else if meta.is_dir() {
            EntryKind::Dir
        } else if meta.is_file() {
            EntryKind::File
        } else {
            EntryKind::Special
        };
        if is_ignored_name(&name_os, kind) {
            continue;
        }
        let mtime = meta.modified().unwrap_or(now);
        if now.duration_since(mtime).unwrap_or(quiet) < quiet {
            continue;
        }
        let name = match unsafe_name(&name_os) {
            None => name_os.to_string_lossy().into_owned(),
            Some(_) => "unsafe-name".to_string(),
        };
        let result = match kind {
            EntryKind::File => match read_claimed(&e.path(), 8 << 30) {
                Ok(read) => import_bytes(
                    store,
                    config,
                    &name,
                    &read.bytes,
                    read.sha256,
                    "features/incoming",
                ),
                Err(Ok(reason)) => Err(ImportError::Input(reason.detail)),
                Err(Err(err)) => Err(ImportError::Input(format!("cannot read it: {err}"))),
            },
            _ => Err(ImportError::Input(
                "not a regular file (links, folders and special files are not read)".into(),
            )),
        };
        match result {
            Ok(import) => {
                let to = format!("{:06}-{name}", import.seq);
                if let Err(err) = move_out(&e.path(), &ws.features_imported(), &to) {
                    tracing::error!(file = %name, error = %err, "imported, but could not move it to features/imported/");
                }
                tracing::info!(file = %name, rows = import.rows, added = import.added, replaced = import.replaced, "feature table: file imported");
                out.push(Taken::Imported(import));
            }
            Err(ImportError::Store(err)) => return Err(err),
            Err(ImportError::Input(reason)) => {
                let to = format!("{}-{name}", Utc::now().format("%Y%m%dT%H%M%S%.3fZ"));
                let rejected = ws.features_rejected();
                if let Err(err) = move_out(&e.path(), &rejected, &to) {
                    tracing::error!(file = %name, error = %err, "could not move a refused feature file to features/rejected/");
                }
                let _ = crate::fsx::write_atomic(
                    &rejected,
                    &format!("{to}.reason.txt"),
                    format!("{reason}\n").as_bytes(),
                    Some(0o640),
                );
                tracing::warn!(file = %name, reason = %reason, "feature table: file refused");
                out.push(Taken::Refused { name, reason });
            }
        }
    }
    Ok(out)
}
