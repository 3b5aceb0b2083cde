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
pub mod init;
pub mod quarantine;
pub mod run;
pub mod trusted;

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

/// Exit codes shared by the subcommands (documented in the README).
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
    /// Configuration error (sysexits EX_CONFIG).
    pub const CONFIG: u8 = 78;
}
