//! Startup and recovery: the configuration against what `init` fixed, the folders, the store, and the
//! reconciliation of `processing/` after a stop or a crash.

use std::collections::HashSet;

use super::DaemonError;
use crate::config::Config;
use crate::metrics::Metrics;
use crate::pipeline::score::{self, PoolState, TrustedArrays};
use crate::pipeline::ScoringError;
use crate::pipeline::{file, ingest};
use crate::review;
use crate::store::{AuditRecord, BatchRecord, BatchState, PoolChange, Store, WorkspaceMeta};
use crate::text::escape_name;
use crate::workspace::{prepare_folders, Workspace};

/// What startup opened and found.
pub(crate) struct Opened {
    pub(crate) store: Store,
    pub(crate) meta: WorkspaceMeta,
    /// `Claimed` batches whose files wait in `processing/`.
    pub(crate) redo: Vec<BatchRecord>,
    pub(crate) pool: PoolState,
    pub(crate) trusted: TrustedArrays,
}

/// The blocking part of startup: folders (exit 78 on a bad layout), store (74), the configuration
/// against the workspace, reconciliation, pool summary and trusted set.
pub(crate) fn open(
    ws: &Workspace,
    config: &Config,
    metrics: &Metrics,
) -> Result<Opened, DaemonError> {
    prepare_folders(ws, config)?;
    let store = Store::open_workspace(&ws.root, &config.store)?;
    // The store lock is held: no other writer is at work, so every temporary file is a leftover.
    remove_stale_temps(ws, config);
    let meta = store.workspace_meta()?;
    check_against_meta(config, &meta)?;
    let redo = reconcile(ws, config, &store, Some(metrics))?;
    resume_spot_recalls(ws, config, &store, &meta);
    let pool = score::load_pool(&store, &meta, config)?;
    let trusted = TrustedArrays::load(&store, &meta)?;
    Ok(Opened {
        store,
        meta,
        redo,
        pool,
        trusted,
    })
}

/// Finish the recalls that spot-check signals asked for before a stop or a crash cut them short
/// ([`review::resume_spot_recalls`]), before the pool is loaded. A failure is logged, not fatal: the
/// vendor's hold is in its history already, so its next batches wait for review either way, and the next
/// start tries again.
fn resume_spot_recalls(ws: &Workspace, config: &Config, store: &Store, meta: &WorkspaceMeta) {
    let env = review::ReviewEnv {
        ws,
        config,
        store,
        meta,
        hooks: &review::NoHooks,
        caller: review::Caller::default(),
    };
    match review::resume_spot_recalls(&env) {
        Ok(done) if !done.is_empty() => {
            tracing::warn!(
                recalled = done.len(),
                "recovery: finished the recall of a spot-check signal"
            )
        }
        Ok(_) => {}
        Err(e) => {
            tracing::warn!(error = %e, "recovery: the recall of a spot-check signal failed; retried at the next start")
        }
    }
}

/// Remove the temporary files a killed process left in the folders labelweir writes for others to read
/// (terminal folders and vendor notices); in a listing they would look like a batch filed twice. A
/// folder that cannot be cleaned is logged and left (the files are hidden and harmless to the daemon).
fn remove_stale_temps(ws: &Workspace, config: &Config) {
    let mut dirs: Vec<_> = ["accepted", "quarantine", "rejected"]
        .iter()
        .map(|f| ws.folder(f))
        .collect();
    dirs.extend(config.vendors.iter().map(|v| ws.notices(v)));
    for d in dirs {
        match crate::fsx::remove_stale_temps(&d) {
            Ok(0) => {}
            Ok(n) => {
                tracing::info!(folder = %d.display(), removed = n, "recovery: removed temporary files left by an interrupted write")
            }
            Err(e) if e.kind() == std::io::ErrorKind::NotFound => {}
            Err(e) => {
                tracing::warn!(folder = %d.display(), error = %e, "recovery: cannot remove leftover temporary files")
            }
        }
    }
}

/// Check that the configuration agrees with what `init` fixed.
pub fn check_against_meta(config: &Config, meta: &WorkspaceMeta) -> Result<(), DaemonError> {
    if !config.schema.features.is_empty() && config.schema.features != meta.features {
        return Err(DaemonError::Config(
            "schema.features differs from the feature columns fixed at init".into(),
        ));
    }
    let setting = serde_json::to_value(config.model.feature_map).unwrap_or_default();
    if setting != meta.feature_map_setting {
        return Err(DaemonError::Config(format!(
            "model.feature_map is {setting} but the workspace was created with {}; it cannot change after init",
            meta.feature_map_setting
        )));
    }
    Ok(())
}

/// Reconcile the store with the folders after a start: file batches left `Decided`, finish review
/// decisions a crash interrupted (file moves, pending vendor notices), forget claims whose rename never
/// happened, and return the `Claimed` batches whose files wait in `processing/`.
pub fn reconcile(
    ws: &Workspace,
    config: &Config,
    store: &Store,
    metrics: Option<&Metrics>,
) -> Result<Vec<BatchRecord>, DaemonError> {
    match review::finish_pending(ws, config, store) {
        Ok(0) => {}
        Ok(n) => tracing::info!(done = n, "recovery: finished interrupted review decisions"),
        Err(e) => {
            tracing::warn!(error = %e, "recovery: finishing interrupted review decisions failed; the next review command retries")
        }
    }
    for rec in store.batches_in(&[BatchState::Decided])? {
        tracing::info!(batch_id = %rec.id, vendor = %rec.vendor, "recovery: filing a decided batch");
        file::settle(ws, config, store, metrics, &rec, None)
            .map_err(|e| DaemonError::Scoring(ScoringError::Filing(e)))?;
    }
    let mut redo = Vec::new();
    let mut known = HashSet::new();
    for rec in store.batches()? {
        known.insert(rec.file_name.clone());
        if rec.state != BatchState::Claimed {
            continue;
        }
        let left_in_place = ingest::is_claimed_folder(&rec)
            && std::fs::symlink_metadata(
                ws.vendor_inbox(&rec.vendor)
                    .join(ingest::folder_left_in_place(&rec.id)),
            )
            .is_ok();
        if left_in_place || std::fs::symlink_metadata(ws.processing().join(&rec.file_name)).is_ok()
        {
            redo.push(rec);
        } else {
            let escaped = rec.original_name.contains("\\x") || rec.original_name.contains("\\u{");
            let in_inbox =
                std::fs::symlink_metadata(ws.vendor_inbox(&rec.vendor).join(&rec.original_name))
                    .is_ok();
            if escaped || in_inbox {
                // Recorded, but the rename into processing/ never happened: the file is still in the
                // inbox and will be found again (an escaped name cannot be looked up; assume the same).
                store.forget_claim(&rec.id)?;
            } else {
                // Claimed and renamed, then removed from processing/ by someone before a verdict.
                tracing::warn!(batch_id = %rec.id, vendor = %rec.vendor, "a claimed file vanished from processing/ before its verdict");
                let audit = AuditRecord::new("daemon", "vanished")
                    .batch(&rec.id, &rec.vendor)
                    .outcome(BatchState::Vanished.as_str())
                    .reason("the claimed file was removed from processing/ before a verdict");
                store.transition(
                    &rec.id,
                    &[BatchState::Claimed],
                    BatchState::Vanished,
                    PoolChange::None,
                    vec![audit],
                    |_| {},
                )?;
            }
        }
    }
    if let Ok(rd) = std::fs::read_dir(ws.processing()) {
        for e in rd.flatten() {
            let name = e.file_name().to_string_lossy().into_owned();
            if !name.starts_with('.') && !known.contains(&name) {
                tracing::warn!(file = %escape_name(&e.file_name()), "processing/ holds a file the store does not know; left alone");
            }
        }
    }
    Ok(redo)
}
