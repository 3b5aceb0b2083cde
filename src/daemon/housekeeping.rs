//! Housekeeping on the runtime: readiness (and `READY=1` to systemd), the gauges that are cheaper to read
//! than to track, and review outcomes counted from the audit trail.

use std::net::SocketAddr;
use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::Arc;
use std::time::{Duration, Instant, SystemTime};

use crate::http::Readiness;
use crate::metrics::Metrics;
use crate::store::Store;
use crate::workspace::Workspace;

/// Every 200 ms: readiness gauge and, once, `READY=1` and `on_ready`; every 5 s (off the runtime's
/// workers): the quarantine and store gauges and the review outcomes. Runs until `stop` turns true.
pub(crate) async fn run(
    ws: Workspace,
    store: Store,
    metrics: Arc<Metrics>,
    ready: Arc<Readiness>,
    bound: Option<SocketAddr>,
    on_ready: Option<Arc<dyn Fn(Option<SocketAddr>) + Send + Sync>>,
    mut stop: tokio::sync::watch::Receiver<bool>,
) {
    let audit_seen = Arc::new(AtomicU64::new(u64::MAX));
    let mut notified = false;
    let mut tick = tokio::time::interval(Duration::from_millis(200));
    let mut last_gauges = Instant::now() - Duration::from_secs(60);
    loop {
        tokio::select! {
            _ = tick.tick() => {}
            _ = stop.wait_for(|s| *s) => break,
        }
        let ok = ready.is_ready();
        metrics.ready(ok);
        if ok && !notified {
            notified = true;
            let _ = sd_notify::notify(false, &[sd_notify::NotifyState::Ready]);
            let listen = bound.map_or_else(|| "none".to_string(), |a| a.to_string());
            tracing::info!(listen = %listen, "ready");
            if let Some(f) = &on_ready {
                f(bound);
            }
        }
        if last_gauges.elapsed() >= Duration::from_secs(5) {
            last_gauges = Instant::now();
            let (ws, store, metrics, seen) = (
                ws.clone(),
                store.clone(),
                metrics.clone(),
                audit_seen.clone(),
            );
            let _ = tokio::task::spawn_blocking(move || {
                refresh_gauges(&ws, &store, &metrics);
                count_review_outcomes(&store, &metrics, &seen);
            })
            .await;
        }
    }
}

/// Count review decisions (`release`, `withdraw`, `reject`) as
/// `labelweir_batches_total{outcome="released"|"withdrawn"|"review_rejected"}`
/// by tailing the audit trail, so they are counted whichever path (admin socket or a stopped-daemon
/// command) recorded them. The first call only sets the starting point (`u64::MAX` = not yet set).
pub(crate) fn count_review_outcomes(store: &Store, metrics: &Metrics, seen: &AtomicU64) {
    let after = seen.load(Ordering::SeqCst);
    if after == u64::MAX {
        let last = store.last_audit_seq().unwrap_or(0);
        seen.store(last, Ordering::SeqCst);
        return;
    }
    let Ok(records) = store.audit_since(after) else {
        return;
    };
    let now = chrono::Utc::now().timestamp_millis() as f64 / 1000.0;
    for a in &records {
        let outcome = match a.action.as_str() {
            "release" => "released",
            "withdraw" => "withdrawn",
            "reject" => "review_rejected",
            _ => continue,
        };
        let (Some(vendor), Some(id)) = (&a.vendor, &a.batch_id) else {
            continue;
        };
        let items = a.detail["items_into_pool"].as_u64().or_else(|| {
            store
                .batch(id)
                .ok()
                .flatten()
                .and_then(|b| b.items.map(|n| n as u64))
        });
        metrics.batch_outcome(vendor, outcome, items.unwrap_or(0), 0, now);
    }
    if let Some(last) = records.last() {
        seen.store(last.seq, Ordering::SeqCst);
    }
}

/// Refresh the gauges that are cheaper to read than to track (quarantine queue, store size).
pub(crate) fn refresh_gauges(ws: &Workspace, store: &Store, metrics: &Metrics) {
    let mut n = 0;
    let mut bytes = 0;
    let mut oldest = 0.0f64;
    let now = SystemTime::now();
    if let Ok(rd) = std::fs::read_dir(ws.folder("quarantine")) {
        for e in rd.flatten() {
            let name = e.file_name().to_string_lossy().into_owned();
            if name.starts_with('.') || name.ends_with(".json") || name.ends_with(".html") {
                continue;
            }
            if let Ok(m) = e.metadata() {
                n += 1;
                bytes += m.len();
                if let Ok(t) = m.modified() {
                    oldest = oldest.max(now.duration_since(t).unwrap_or_default().as_secs_f64());
                }
            }
        }
    }
    metrics.quarantine(n, oldest, bytes);
    metrics.store_size(store.size_on_disk());
}
