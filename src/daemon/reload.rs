//! SIGHUP: re-read and validate the configuration. A valid file whose changes are all runtime-safe
//! ([`Config::restart_only_changes`] is empty) is published to the pipeline threads, which take it between
//! batches; an invalid file, or one that changes restart-only settings, is reported through
//! `labelweir_config_last_reload_successful 0` and the error log, and the running configuration stays.

use std::path::PathBuf;
use std::sync::Arc;

use crate::config::Config;
use crate::metrics::Metrics;
use crate::pipeline::Shared;

/// Handle SIGHUP until `stop` turns true.
pub(crate) async fn run(
    path: PathBuf,
    started_with: Arc<Config>,
    shared: Arc<Shared>,
    metrics: Arc<Metrics>,
    mut stop: tokio::sync::watch::Receiver<bool>,
) {
    use tokio::signal::unix::{signal, SignalKind};
    let Ok(mut hup) = signal(SignalKind::hangup()) else {
        return;
    };
    loop {
        tokio::select! {
            _ = hup.recv() => {}
            _ = stop.wait_for(|s| *s) => break,
        }
        match Config::from_file(&path) {
            Ok(c) => {
                let running = shared
                    .reload
                    .current()
                    .unwrap_or_else(|| started_with.clone());
                let fixed = running.restart_only_changes(&c);
                if c == *running {
                    metrics.config_loaded(true);
                    tracing::info!("configuration re-read: unchanged and valid");
                } else if fixed.is_empty() {
                    shared.reload.publish(Arc::new(c));
                    metrics.config_loaded(true);
                    tracing::info!("configuration reloaded; it applies from the next batch");
                } else {
                    metrics.config_loaded(false);
                    tracing::error!(
                        settings = %fixed.join(", "),
                        "configuration not reloaded: these settings change only at a restart; keeping the running configuration (restart to apply, or undo them and send SIGHUP again)"
                    );
                }
            }
            Err(e) => {
                metrics.config_loaded(false);
                tracing::error!(error = %e, "configuration on disk is invalid; keeping the running one");
            }
        }
    }
}
