//! Logging for the daemon: `--log-format text|json` (default: text on a terminal, JSON otherwise, e.g. under
//! systemd, whose journal keeps each line's fields), on stdout; the filter from `LABELWEIR_LOG` (`EnvFilter`
//! syntax, e.g. `info` or `labelweir=debug`), `info` when unset. An invalid `LABELWEIR_LOG` is an error, not
//! silently ignored.

use std::io::IsTerminal;
use std::sync::OnceLock;

use super::{exit, Failure};

/// How log lines are written.
#[derive(Debug, Clone, Copy, PartialEq, Eq, clap::ValueEnum)]
pub enum LogFormat {
    /// One human-readable line per event.
    Text,
    /// One JSON object per line.
    Json,
}

static FORMAT: OnceLock<LogFormat> = OnceLock::new();

/// Remember the format chosen on the command line (call once, before [`init`]).
pub fn choose(format: Option<LogFormat>) {
    if let Some(f) = format {
        let _ = FORMAT.set(f);
    }
}

/// The format in effect: the one chosen, else text when stdout is a terminal and JSON otherwise.
pub fn format() -> LogFormat {
    FORMAT.get().copied().unwrap_or_else(|| {
        if std::io::stdout().is_terminal() {
            LogFormat::Text
        } else {
            LogFormat::Json
        }
    })
}

/// Install logging to stdout (once per process). Fails on an invalid `LABELWEIR_LOG`.
pub fn init() -> Result<(), Failure> {
    let filter = match std::env::var("LABELWEIR_LOG") {
        Ok(v) if !v.trim().is_empty() => {
            tracing_subscriber::EnvFilter::try_new(&v).map_err(|e| {
                Failure::new(
                    exit::CONFIG,
                    format!(
                    "invalid LABELWEIR_LOG {}: {e} (examples: info, debug, labelweir=debug,warn)",
                    labelweir::text::quote_for_message(&v)
                ),
                )
            })?
        }
        _ => tracing_subscriber::EnvFilter::new("info"),
    };
    let builder = tracing_subscriber::fmt()
        .with_env_filter(filter)
        .with_writer(std::io::stdout);
    let _ = match format() {
        LogFormat::Json => builder.json().try_init(),
        LogFormat::Text => builder
            .with_ansi(std::io::stdout().is_terminal())
            .try_init(),
    };
    Ok(())
}
