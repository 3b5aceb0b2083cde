//! Filesystem events as hints: the watcher marks a vendor folder dirty on the ingest thread's
//! [`IngestCtl`]; the folder is then listed (rescans are the truth, so a lost event loses nothing).

use std::collections::HashSet;
use std::sync::Arc;
use std::time::Duration;

use super::IngestCtl;
use crate::config::{Config, WatcherKind};
use crate::metrics::Metrics;
use crate::workspace::Workspace;

/// The running filesystem watcher (dropping it stops watching).
pub enum AnyWatcher {
    /// inotify.
    Native(notify::RecommendedWatcher),
    /// Periodic listing (network and FUSE filesystems).
    Poll(notify::PollWatcher),
}

/// Watch every vendor's drop folder (non-recursive, symlinks not followed) and mark it dirty on `ctl` on
/// any event; a queue overflow or a watcher error marks every folder (a full rescan).
pub fn start_watcher(
    ws: &Workspace,
    config: &Config,
    ctl: Arc<IngestCtl>,
    metrics: Arc<Metrics>,
) -> notify::Result<AnyWatcher> {
    use notify::Watcher;
    let inbox = ws.inbox();
    let vendors: HashSet<String> = config.vendors.iter().cloned().collect();
    let handler = move |res: notify::Result<notify::Event>| match res {
        Ok(ev) => {
            if ev.need_rescan() {
                ctl.mark(None, Some("overflow"));
                return;
            }
            for p in &ev.paths {
                let vendor = p
                    .parent()
                    .filter(|d| d.parent() == Some(inbox.as_path()))
                    .and_then(|d| d.file_name())
                    .map(|s| s.to_string_lossy().into_owned())
                    .filter(|v| vendors.contains(v));
                if let Some(v) = vendor {
                    ctl.mark(Some(v), None);
                }
            }
        }
        Err(_) => {
            metrics.watcher_error();
            ctl.mark(None, Some("error"));
        }
    };
    let cfg = notify::Config::default().with_follow_symlinks(false);
    let mut w = match config.ingest.watcher {
        WatcherKind::Native => AnyWatcher::Native(notify::RecommendedWatcher::new(handler, cfg)?),
        WatcherKind::Poll => AnyWatcher::Poll(notify::PollWatcher::new(
            handler,
            cfg.with_poll_interval(Duration::from_millis(config.ingest.poll_interval_ms)),
        )?),
    };
    for v in &config.vendors {
        let p = ws.vendor_inbox(v);
        match &mut w {
            AnyWatcher::Native(x) => x.watch(&p, notify::RecursiveMode::NonRecursive)?,
            AnyWatcher::Poll(x) => x.watch(&p, notify::RecursiveMode::NonRecursive)?,
        }
    }
    Ok(w)
}
