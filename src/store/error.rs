//! The store's error type.

use std::path::PathBuf;

/// Errors from the store.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum StoreError {
    /// sled reported an I/O or corruption error.
    #[error("store error during {op}: {source}")]
    Sled {
        /// What was being done.
        op: &'static str,
        /// The cause.
        source: sled::Error,
    },
    /// Another process (usually the running daemon) holds the store.
    #[error("the store at {0} is in use by another process (is the daemon running? use its admin socket)")]
    Locked(PathBuf),
    /// The workspace has not been initialised, or the store's layout is from another version.
    #[error("store at {path}: {message}")]
    Layout {
        /// Store folder.
        path: PathBuf,
        /// What is wrong.
        message: String,
    },
    /// A stored value could not be decoded.
    #[error("corrupt {what} record {key}: {message}")]
    Corrupt {
        /// Which tree.
        what: &'static str,
        /// The key, printable.
        key: String,
        /// The decoder's message.
        message: String,
    },
    /// A batch is not in a state that allows the transition (e.g. a second reviewer's decision).
    #[error("batch {batch} is {found}, expected one of: {expected}")]
    Conflict {
        /// The batch.
        batch: String,
        /// Its current state.
        found: String,
        /// States that would have allowed the transition.
        expected: String,
    },
    /// The batch's record refuses the change (e.g. a spot check answered already).
    #[error("batch {batch}: {why}")]
    Refused {
        /// The batch.
        batch: String,
        /// Why, in words.
        why: String,
    },
    /// No such record.
    #[error("no {what} {key}")]
    NotFound {
        /// Which kind of record.
        what: &'static str,
        /// The key.
        key: String,
    },
    /// A value could not be encoded.
    #[error("cannot encode {what}: {message}")]
    Encode {
        /// Which kind of record.
        what: &'static str,
        /// The encoder's message.
        message: String,
    },
}

/// Whether `e` or one of its causes is an I/O error that means a full storage
/// ([`crate::fsx::is_storage_full`]), also inside the store's own error type.
pub fn storage_full_in(e: &(dyn std::error::Error + 'static)) -> bool {
    std::iter::successors(Some(e), |err| err.source()).any(|err| {
        let io = match err.downcast_ref::<sled::Error>() {
            Some(sled::Error::Io(io)) => Some(io),
            _ => err.downcast_ref::<std::io::Error>(),
        };
        io.is_some_and(crate::fsx::is_storage_full)
    })
}

impl StoreError {
    pub(crate) fn sled(op: &'static str) -> impl FnOnce(sled::Error) -> StoreError {
        move |source| StoreError::Sled { op, source }
    }
}
