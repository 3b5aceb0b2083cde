//! `labelweir run`: the daemon in the foreground.

use std::net::SocketAddr;
use std::path::PathBuf;
use std::time::Duration;

use super::{exit, Failure};
use labelweir::config::Config;
use labelweir::daemon::{self, RunOptions};
use labelweir::workspace::Workspace;

/// Run the daemon on a workspace in the foreground until SIGINT or SIGTERM.
///
/// The first signal stops claiming, finishes the batch in hand, flushes the store and exits 0; a second
/// signal exits at once (anything unfinished is redone at the next start). SIGHUP re-reads and validates
/// the config and applies a valid one at once (an invalid one is logged and the running config stays).
/// Exit codes: 0 clean stop, 78 configuration (also an invalid LABELWEIR_LOG), 74 I/O or storage, 70
/// internal error. Logs go to stdout: readable text on a terminal, JSON lines otherwise, e.g. under
/// systemd (--log-format to choose); filter with LABELWEIR_LOG, e.g. LABELWEIR_LOG=debug.
#[derive(Debug, clap::Args)]
pub struct Args {
    /// Workspace folder (created by `labelweir init`).
    pub dir: PathBuf,
    /// Serve /metrics, /livez and /readyz on this address instead of the configured one.
    #[arg(long)]
    pub listen: Option<SocketAddr>,
    /// Allow --listen on an address other than loopback (refused otherwise: the endpoints have no
    /// authentication); a warning is logged.
    #[arg(long)]
    pub allow_remote_listen: bool,
}

/// Install logging (see [`super::logging`]; once per process).
pub fn init_logging() -> Result<(), Failure> {
    super::logging::init()
}

/// How long a stop may take before the process ends itself: one scoring run (`model.time_budget_ms`)
/// plus 20 s for filing, the flush and open connections; below the unit's `TimeoutStopSec=60s` at the
/// default budget (raise both together).
pub fn shutdown_deadline(config: &Config) -> Duration {
    Duration::from_millis(config.model.time_budget_ms) + Duration::from_secs(20)
}

/// Resolves on the first SIGINT or SIGTERM; a second one exits the process at once (status 130), and so
/// does the passing of `deadline` after the first (status 70). The deadline runs on a thread of its own,
/// so it fires even when the runtime's threads are stuck.
pub async fn signals(deadline: Duration) {
    use tokio::signal::unix::{signal, SignalKind};
    let (Ok(mut int), Ok(mut term)) = (
        signal(SignalKind::interrupt()),
        signal(SignalKind::terminate()),
    ) else {
        std::future::pending::<()>().await;
        return;
    };
    tokio::select! {
        _ = int.recv() => {}
        _ = term.recv() => {}
    }
    let _ = std::thread::Builder::new()
        .name("labelweir-stop-deadline".into())
        .spawn(move || {
            std::thread::sleep(deadline);
            eprintln!(
                "labelweir: shutdown did not finish within {} s, exiting; unfinished work is redone at the next start",
                deadline.as_secs()
            );
            std::process::exit(exit::SHUTDOWN_DEADLINE.into());
        });
    tokio::spawn(async move {
        tokio::select! {
            _ = int.recv() => {}
            _ = term.recv() => {}
        }
        eprintln!("labelweir: second signal, exiting at once");
        std::process::exit(130);
    });
}

/// Build a runtime and run the daemon until a signal.
pub fn run_daemon(dir: PathBuf, config: Config, opts: RunOptions) -> anyhow::Result<u8> {
    let rt = tokio::runtime::Builder::new_multi_thread()
        .worker_threads(2)
        .enable_all()
        .thread_name("labelweir-rt")
        .build()
        .map_err(|e| Failure::new(exit::INTERNAL, format!("cannot start the runtime: {e}")))?;
    let ws = Workspace::new(dir);
    let deadline = shutdown_deadline(&config);
    ignore_file_size_signal();
    log_panics();
    rt.block_on(daemon::run(ws, config, opts, signals(deadline)))
        .map_err(|e| {
            if e.storage_full() {
                tracing::error!(error = %e, "storage full: stopping; free space (or raise the quota or file size limit) and start again");
                Failure::new(exit::IO, format!("storage full: {e}"))
            } else {
                Failure::new(super::daemon_exit(&e), e.to_string())
            }
        })?;
    Ok(exit::OK)
}

/// Log a panic on any of the daemon's threads as an error line with the thread's name, the message and the
/// place, then give it to the default report on stderr: a log reader (or the journal's JSON fields) sees
/// which thread died, not only the unstructured stderr text.
fn log_panics() {
    let default = std::panic::take_hook();
    std::panic::set_hook(Box::new(move |info| {
        let payload = info.payload();
        let message = payload
            .downcast_ref::<&str>()
            .map(|s| (*s).to_string())
            .or_else(|| payload.downcast_ref::<String>().cloned())
            .unwrap_or_else(|| "(no message)".into());
        let place = info
            .location()
            .map_or_else(String::new, |l| format!("{}:{}", l.file(), l.line()));
        tracing::error!(
            thread = std::thread::current().name().unwrap_or("unnamed"),
            panic = %message,
            place = %place,
            "a thread panicked"
        );
        default(info);
    }));
}

/// Ignore SIGXFSZ, so a write past the file size limit (`RLIMIT_FSIZE`, `LimitFSIZE=` in a unit) fails
/// with `EFBIG` — handled like a full disk — instead of killing the daemon with a core dump.
fn ignore_file_size_signal() {
    // SAFETY: setting a signal's disposition to SIG_IGN installs no handler function and touches no
    // memory of ours; it is done before the runtime's threads start work.
    unsafe {
        libc::signal(libc::SIGXFSZ, libc::SIG_IGN);
    }
}

/// Run the subcommand.
pub fn run(args: Args) -> anyhow::Result<u8> {
    init_logging()?;
    let config = Config::from_workspace(&args.dir)
        .map_err(|e| Failure::new(exit::CONFIG, format!("invalid configuration: {e}")))?;
    run_daemon(
        args.dir,
        config,
        RunOptions {
            listen: args.listen,
            allow_remote_listen: args.allow_remote_listen,
            ..RunOptions::default()
        },
    )
}
