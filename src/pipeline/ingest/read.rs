//! Reading a claimed file: one descriptor, never a link, bounded, read again while it changes.

use std::fs::File;
use std::io::{Read, Seek, SeekFrom};
use std::path::Path;

use rustix::fs::{Mode, OFlags};
use sha2::{Digest, Sha256};

use super::reject;
use crate::pipeline::FileStamp;
use crate::store::RejectReason;

/// The bytes of a claimed file, read through one descriptor.
#[derive(Debug)]
pub struct ReadFile {
    /// The bytes.
    pub bytes: Vec<u8>,
    /// SHA-256, lower-case hex.
    pub sha256: String,
    /// The file's stamp when the bytes were read (see [`FileStamp`]).
    pub stamp: FileStamp,
}

/// Open `processing/<file_name>` without following links and read it, checking that it is a regular file
/// with one link and at most `max_bytes` bytes. An input problem is `Err(Ok(reason))`; a daemon-side I/O
/// error is `Err(Err(..))`.
pub fn read_claimed(
    path: &Path,
    max_bytes: u64,
) -> Result<ReadFile, Result<RejectReason, std::io::Error>> {
    let fd = match rustix::fs::open(
        path,
        OFlags::RDONLY | OFlags::NOFOLLOW | OFlags::NONBLOCK | OFlags::CLOEXEC | OFlags::NOCTTY,
        Mode::empty(),
    ) {
        Ok(fd) => fd,
        Err(e) if e == rustix::io::Errno::LOOP => {
            return Err(Ok(reject(
                "symlink",
                "the entry is a symbolic link; links are never followed",
            )))
        }
        Err(e) if e == rustix::io::Errno::NOENT => return Err(Err(e.into())),
        Err(e) => {
            return Err(Ok(reject(
                "unreadable",
                format!("the entry could not be opened for reading: {e}"),
            )))
        }
    };
    let st = rustix::fs::fstat(&fd).map_err(|e| Err(e.into()))?;
    let ftype = rustix::fs::FileType::from_raw_mode(st.st_mode);
    match ftype {
        rustix::fs::FileType::RegularFile => {}
        rustix::fs::FileType::Directory => {
            return Err(Ok(reject(
                "not_regular_file",
                "the entry is a directory; only files are batches",
            )))
        }
        rustix::fs::FileType::Symlink => {
            return Err(Ok(reject(
                "symlink",
                "the entry is a symbolic link; links are never followed",
            )))
        }
        other => {
            return Err(Ok(reject(
                "not_regular_file",
                format!("the entry is not a regular file ({other:?}); it was not read"),
            )))
        }
    }
    if st.st_nlink != 1 {
        return Err(Ok(reject(
            "hard_link",
            format!(
                "the file has {} hard links; deliver a file with a single link (another name could still change it)",
                st.st_nlink
            ),
        )));
    }
    if st.st_size as u64 > max_bytes {
        return Err(Ok(reject(
            "too_large",
            format!(
                "the file has {} bytes, more than the limit of {max_bytes}",
                st.st_size
            ),
        )));
    }
    // Blocking reads from here on (a regular file never blocks on O_NONBLOCK anyway).
    let mut file = File::from(fd);
    let mut before = stamp_of(&st);
    // A file that changes while it is read (a writer still appending) is read again, a few times; what
    // still changes after that is caught by the scoring worker's check before the verdict.
    for _ in 0..READ_ATTEMPTS {
        let bytes = read_all(&mut file, max_bytes).map_err(Err)?;
        if bytes.len() as u64 > max_bytes {
            return Err(Ok(reject(
                "too_large",
                format!("the file grew past the limit of {max_bytes} bytes while being read"),
            )));
        }
        let after = rustix::fs::fstat(&file)
            .map(|st| stamp_of(&st))
            .map_err(|e| Err(e.into()))?;
        if after == before && after.size == bytes.len() as u64 {
            return Ok(ReadFile {
                sha256: hex::encode(Sha256::digest(&bytes)),
                bytes,
                stamp: after,
            });
        }
        before = after;
        file.seek(SeekFrom::Start(0)).map_err(Err)?;
    }
    let bytes = read_all(&mut file, max_bytes).map_err(Err)?;
    Ok(ReadFile {
        sha256: hex::encode(Sha256::digest(&bytes)),
        bytes,
        // Still changing: the stamp taken before this last read, so the worker's check before the
        // verdict sees any change made during or after it.
        stamp: before,
    })
}

/// Reads of a file that keeps changing while it is read, before it is handed over as it is.
const READ_ATTEMPTS: usize = 4;

/// Read from the start of `file` to its end, at most `max_bytes + 1` bytes.
fn read_all(file: &mut File, max_bytes: u64) -> std::io::Result<Vec<u8>> {
    let mut bytes = Vec::new();
    file.take(max_bytes + 1).read_to_end(&mut bytes)?;
    Ok(bytes)
}

/// The [`FileStamp`] of an `fstat` answer.
// The field types of `stat` differ between targets; the casts are no-ops on some of them.
#[allow(clippy::unnecessary_cast)]
fn stamp_of(st: &rustix::fs::Stat) -> FileStamp {
    FileStamp {
        size: st.st_size.max(0) as u64,
        mtime_sec: st.st_mtime as i64,
        mtime_nsec: st.st_mtime_nsec as i64,
        ino: st.st_ino as u64,
    }
}
