//! Filing after a later decision (a review decision or a recall): the batch's file, report and review
//! page move to the folder its state calls for, and the vendor notices stored with the decision (an
//! outbox, in the same transaction) are written and cleared. Both idempotent: `review::finish_pending`
//! redoes what a crash left.

use std::path::PathBuf;

use chrono::Utc;

use super::file::{io_err, FileError};
use crate::config::Config;
use crate::notice::{self, BatchRef};
use crate::store::{AuditRecord, BatchRecord, BatchState, Store};
use crate::workspace::Workspace;

/// The folder a batch's file is in for its state (`None` when it has none).
pub fn folder_for_state(state: BatchState) -> Option<&'static str> {
    match state {
        BatchState::Accepted | BatchState::Released => Some("accepted"),
        BatchState::Quarantined => Some("quarantine"),
        BatchState::Rejected
        | BatchState::Duplicate
        | BatchState::ReviewRejected
        | BatchState::Withdrawn => Some("rejected"),
        BatchState::Claimed | BatchState::Decided | BatchState::Vanished => None,
    }
}

/// The review page's file name, beside the batch's report: `<batch id>.review.html`.
pub fn page_name(batch_id: &str) -> String {
    format!("{batch_id}.review.html")
}

/// The notice's reference to a batch, for a decision taken now.
pub fn batch_ref_now(rec: &BatchRecord) -> BatchRef {
    BatchRef {
        batch_id: rec.id.clone(),
        vendor: rec.vendor.clone(),
        file_name: Some(rec.original_name.clone()),
        sha256: rec.sha256.clone(),
        received_at: rec.claimed_at,
        decided_at: Utc::now(),
    }
}

/// The mode a file the daemon wrote takes in a terminal folder: read-only in `quarantine/` (the evidence a
/// reviewer judges does not change under them), owner read-write and group read elsewhere, as
/// first filing gives it.
pub fn mode_for_folder(folder: &str) -> u32 {
    if folder == "quarantine" {
        0o440
    } else {
        0o640
    }
}

/// Move a decided batch's file (and its report) out of `quarantine/` or `accepted/` into the folder its
/// state calls for, with that folder's mode ([`mode_for_folder`]) on the files the daemon owns: a batch
/// recalled from `accepted/` becomes read-only, a released one writable by its owner again. Idempotent;
/// returns where the file is.
pub fn move_for_state(ws: &Workspace, rec: &BatchRecord) -> Result<Option<PathBuf>, FileError> {
    let Some(dest) = folder_for_state(rec.state) else {
        return Ok(None);
    };
    let dest_dir = ws.folder(dest);
    let target = dest_dir.join(&rec.file_name);
    let report_name = super::file::report_name(rec);
    let page_name = page_name(&rec.id);
    for src in ["quarantine", "accepted"] {
        if src == dest {
            continue;
        }
        let src_dir = ws.folder(src);
        let mut moved = false;
        // The review page `quarantine show` wrote beside the report travels with it.
        for name in [
            rec.file_name.as_str(),
            report_name.as_str(),
            page_name.as_str(),
        ] {
            let from = src_dir.join(name);
            if std::fs::symlink_metadata(&from).is_ok() {
                let to = dest_dir.join(name);
                if std::fs::symlink_metadata(&to).is_ok() {
                    // A previous attempt already put a copy there.
                    std::fs::remove_file(&from).map_err(io_err("remove", &from))?;
                } else {
                    std::fs::rename(&from, &to).map_err(io_err("rename", &from))?;
                }
                moved = true;
            }
        }
        if moved {
            crate::fsx::sync_dir(&dest_dir).map_err(io_err("fsync", &dest_dir))?;
            crate::fsx::sync_dir(&src_dir).map_err(io_err("fsync", &src_dir))?;
        }
    }
    // On every attempt, not only after a rename: a crash between the two is mended by the next.
    for name in [&rec.file_name, &report_name, &page_name] {
        let path = dest_dir.join(name);
        if std::fs::symlink_metadata(&path).is_ok() {
            set_mode_if_ours(&path, mode_for_folder(dest))?;
        }
    }
    Ok(target.exists().then_some(target))
}

/// Give a regular file the daemon alone owns (its user, one link) the mode; anything else (an entry first
/// filing moved as it was because it could not be read) keeps its own.
fn set_mode_if_ours(path: &std::path::Path, mode: u32) -> Result<(), FileError> {
    use std::os::unix::fs::{MetadataExt, PermissionsExt};
    let m = std::fs::symlink_metadata(path).map_err(io_err("stat", path))?;
    let ours = m.uid() == rustix::process::geteuid().as_raw() && m.nlink() == 1;
    if m.is_file() && ours && m.mode() & 0o7777 != mode {
        std::fs::set_permissions(path, std::fs::Permissions::from_mode(mode))
            .map_err(io_err("chmod", path))?;
    }
    Ok(())
}

/// Write a record's pending vendor notices, then remove them from the record in the store together with
/// an audit entry each naming the files ([`Store::notices_sent`]). Writing is idempotent (same file
/// names), so a crash between the two, or two processes finishing the same decision, only writes the
/// same files again. Returns the file names (none when nothing was pending).
pub fn send_pending_notice(
    ws: &Workspace,
    config: &Config,
    store: &Store,
    rec: &BatchRecord,
    by: &str,
) -> Result<Vec<String>, FileError> {
    if rec.pending_notices.is_empty() {
        return Ok(Vec::new());
    }
    let dir = ws.notices(&rec.vendor);
    let mut files = Vec::new();
    let mut audits = Vec::new();
    for pending in &rec.pending_notices {
        let paths = notice::write_notice(&dir, pending, &config.notices)
            .map_err(io_err("write notice", &dir))?;
        let these: Vec<String> = paths
            .iter()
            .filter_map(|p| p.file_name().map(|s| s.to_string_lossy().into_owned()))
            .collect();
        audits.push(
            AuditRecord::new(by, "notice")
                .batch(&rec.id, &rec.vendor)
                .outcome(pending.verdict.as_str())
                .detail(serde_json::json!({ "files": these })),
        );
        files.extend(these);
    }
    // Recorded only if still pending: whoever sent them first keeps the single audit entry.
    store.notices_sent(&rec.id, &rec.pending_notices, &files, audits)?;
    Ok(files)
}
