//! Command-line subcommands: one file each; the doc comment of each `Args` is its help text.
//!
//! Every subcommand's `run` returns the process exit code on success paths (e.g. `assess` returns 1 for a
//! batch that would be quarantined) and an error otherwise; `main` maps errors to exit codes in one place
//! through [`Failure`].

pub mod assess;
pub mod audit;
pub mod bench;
pub mod config_cmd;
pub mod demo;
pub mod features;
pub mod generate;
pub mod init;
pub mod logging;
pub mod pool;
pub mod progress;
pub mod quarantine;
pub mod run;
pub mod spot;
pub mod trusted;
pub mod vendor;

/// An error that carries the exit code the process should end with.
#[derive(Debug, thiserror::Error)]
#[error("{message}")]
pub struct Failure {
    /// Process exit code.
    pub code: u8,
    /// Message for stderr.
    pub message: String,
}

impl Failure {
    /// A failure with the given exit code.
    pub fn new(code: u8, message: impl Into<String>) -> Self {
        Self {
            code,
            message: message.into(),
        }
    }
}

/// The exit code for a daemon failure: 78 configuration, 74 I/O or storage, 70 internal.
pub fn daemon_exit(e: &labelweir::daemon::DaemonError) -> u8 {
    use labelweir::daemon::ErrorKind;
    match e.kind() {
        ErrorKind::Config => exit::CONFIG,
        ErrorKind::Io => exit::IO,
        ErrorKind::Internal => exit::INTERNAL,
    }
}

/// The exit code for a review failure: 2 for bad input, unknown batches and refused decisions, 74 for
/// store and I/O errors, 70 for engine failures.
pub fn review_exit(e: &labelweir::review::ReviewError) -> u8 {
    use labelweir::review::ReviewError;
    match e {
        ReviewError::NotFound(_) | ReviewError::Refused(_) | ReviewError::Invalid(_) => exit::INPUT,
        ReviewError::Store { .. } | ReviewError::Io { .. } => exit::IO,
        _ => exit::INTERNAL,
    }
}

/// The exit code for a failure of the admin channel itself: 77 not allowed to use it, 75 no answer (in
/// time, or at all: the outcome is unknown, never reported as a storage failure), 74 other I/O.
pub fn admin_exit(e: &labelweir::admin::AdminError) -> u8 {
    use labelweir::admin::AdminError;
    match e {
        AdminError::Denied(_) => exit::NOPERM,
        AdminError::Timeout { .. } | AdminError::NoAnswer(_) => exit::TEMPFAIL,
        _ => exit::IO,
    }
}

/// The exit code for a failure to create or prepare a workspace: 2 bad input, 78 configuration, 74 I/O.
pub fn workspace_exit(e: &labelweir::workspace::WorkspaceError) -> u8 {
    use labelweir::workspace::WorkspaceError;
    match e {
        WorkspaceError::Input(_) => exit::INPUT,
        WorkspaceError::Config(_) => exit::CONFIG,
        _ => exit::IO,
    }
}

/// A workspace failure as the process's error.
pub fn workspace_failure(e: labelweir::workspace::WorkspaceError) -> anyhow::Error {
    Failure::new(workspace_exit(&e), e.to_string()).into()
}

/// Exit codes shared by the subcommands (documented in the README). A command whose output pipe closes
/// early (`labelweir ... | head`) ends quietly on SIGPIPE, as Unix filters do (the shell reports 141).
pub mod exit {
    /// Success; for `assess`, the batch looks clean.
    pub const OK: u8 = 0;
    /// `assess`: the batch would be quarantined under the default policy.
    pub const QUARANTINE: u8 = 1;
    /// Bad input or bad arguments (`assess`, review commands).
    pub const INPUT: u8 = 2;
    /// Internal error (sysexits EX_SOFTWARE).
    pub const INTERNAL: u8 = 70;
    /// I/O or storage error (sysexits EX_IOERR).
    pub const IO: u8 = 74;
    /// The daemon did not answer in time (sysexits EX_TEMPFAIL: try again later).
    pub const TEMPFAIL: u8 = 75;
    /// Not allowed to use the admin socket (sysexits EX_NOPERM).
    pub const NOPERM: u8 = 77;
    /// The daemon's shutdown passed its deadline and the process ended itself (sysexits EX_SOFTWARE);
    /// whatever was unfinished is redone at the next start.
    pub const SHUTDOWN_DEADLINE: u8 = 70;
    /// Configuration error (sysexits EX_CONFIG).
    pub const CONFIG: u8 = 78;
}
