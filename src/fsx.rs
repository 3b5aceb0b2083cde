//! The one atomic write and the one directory sync; every file labelweir writes for others to read (filed
//! batches' reports, vendor notices, the configuration at init) goes through [`write_atomic_all`].
//!
//! The recipe (common POSIX practice; rename(2) replaces the target atomically, and fsync(2) on the
//! folder makes the rename durable): each file goes to a temporary name in the same folder and is fsynced,
//! then each is renamed over its final name, then the folder is fsynced **once**. A reader sees each final
//! name absent, old, or complete and new, never partial. After a crash before the folder fsync some
//! renames may be lost; callers redo the whole write (every filing step is idempotent).

use std::fs;
use std::io::{self, Write};
use std::os::unix::fs::PermissionsExt;
use std::path::{Path, PathBuf};

/// Whether an I/O error means the storage is full: no space left (`ENOSPC`), the user's quota reached
/// (`EDQUOT`), or a file past the size limit (`EFBIG`, e.g. `RLIMIT_FSIZE`; the daemon ignores
/// `SIGXFSZ`, so such a write fails with this error instead of killing the process).
pub fn is_storage_full(e: &io::Error) -> bool {
    matches!(
        e.raw_os_error(),
        Some(libc::ENOSPC) | Some(libc::EDQUOT) | Some(libc::EFBIG)
    )
}

/// fsync a directory, which makes the renames and creations inside it durable.
pub fn sync_dir(dir: &Path) -> io::Result<()> {
    fs::File::open(dir)?.sync_all()
}

/// Read a file someone else may control without trusting it: opened with `O_NOFOLLOW | O_NONBLOCK`
/// (a link is never followed, a FIFO never blocks), checked with `fstat` on the open descriptor to be a
/// regular file of at most `max_bytes`, then read through that descriptor. The caller copies the bytes
/// into a file it owns instead of moving or changing the original inode (whose owner, mode and other
/// links belong to whoever made it).
pub fn read_untrusted(path: &Path, max_bytes: u64) -> io::Result<Vec<u8>> {
    use rustix::fs::{FileType, Mode, OFlags};
    use std::io::Read;
    let fd = rustix::fs::open(
        path,
        OFlags::RDONLY | OFlags::NOFOLLOW | OFlags::NONBLOCK | OFlags::CLOEXEC | OFlags::NOCTTY,
        Mode::empty(),
    )?;
    let st = rustix::fs::fstat(&fd)?;
    if FileType::from_raw_mode(st.st_mode) != FileType::RegularFile {
        return Err(io::Error::new(
            io::ErrorKind::InvalidInput,
            "not a regular file",
        ));
    }
    if st.st_size as u64 > max_bytes {
        return Err(io::Error::new(
            io::ErrorKind::InvalidInput,
            "larger than the limit",
        ));
    }
    let mut bytes = Vec::with_capacity(st.st_size.max(0) as usize);
    fs::File::from(fd)
        .take(max_bytes + 1)
        .read_to_end(&mut bytes)?;
    if bytes.len() as u64 > max_bytes {
        return Err(io::Error::new(
            io::ErrorKind::InvalidInput,
            "grew past the limit",
        ));
    }
    Ok(bytes)
}

/// Whether `name` is a temporary name of [`write_atomic_all`] (`.NAME.tmp-PID`).
fn is_temp_name(name: &str) -> bool {
    name.starts_with('.')
        && name.rsplit_once(".tmp-").is_some_and(|(stem, pid)| {
            stem.len() > 1 && !pid.is_empty() && pid.bytes().all(|b| b.is_ascii_digit())
        })
}

/// Remove the temporary files an interrupted [`write_atomic_all`] left in `dir` (a process killed between
/// writing and renaming them). Only call it while no writer can be at work there (the daemon at start,
/// holding the store lock). Returns how many were removed.
pub fn remove_stale_temps(dir: &Path) -> io::Result<usize> {
    let mut removed = 0;
    for e in fs::read_dir(dir)? {
        let e = e?;
        let is_file = e.file_type().is_ok_and(|t| t.is_file());
        if is_file && e.file_name().to_str().is_some_and(is_temp_name) {
            fs::remove_file(e.path())?;
            removed += 1;
        }
    }
    if removed > 0 {
        sync_dir(dir)?;
    }
    Ok(removed)
}

/// The temporary name of `name` in `dir`: hidden (the daemon's listings skip dot-files) and per process.
fn temp_path(dir: &Path, name: &str) -> PathBuf {
    dir.join(format!(".{name}.tmp-{}", std::process::id()))
}

/// Write `bytes` to `dir/name` atomically (see the module doc), with permission bits `mode` if given
/// (otherwise the process umask decides). Returns the final path.
pub fn write_atomic(
    dir: &Path,
    name: &str,
    bytes: &[u8],
    mode: Option<u32>,
) -> io::Result<PathBuf> {
    let mut written = write_atomic_all(dir, &[(name, bytes)], mode)?;
    Ok(written.remove(0))
}

/// Write `bytes` to the file at `path` atomically (see the module doc), for a path someone named (an
/// `--output` option): the temporary file goes next to it, in `path`'s folder (the current folder for a
/// bare name). Fails with `InvalidInput` when `path` has no file name or a name that is not UTF-8.
pub fn write_atomic_at(path: &Path, bytes: &[u8], mode: Option<u32>) -> io::Result<PathBuf> {
    let name = path.file_name().and_then(|n| n.to_str()).ok_or_else(|| {
        io::Error::new(
            io::ErrorKind::InvalidInput,
            "the path has no file name, or one that is not UTF-8",
        )
    })?;
    let dir = match path.parent() {
        Some(p) if !p.as_os_str().is_empty() => p,
        _ => Path::new("."),
    };
    write_atomic(dir, name, bytes, mode)
}

/// Write several files into `dir`, each atomically, with one fsync of the folder for all of them (see the
/// module doc). `mode` sets their permission bits (otherwise the umask decides). On an error the
/// temporary files are removed and no final name is touched that was not already renamed. Returns the
/// final paths, in order.
pub fn write_atomic_all<N, B>(
    dir: &Path,
    files: &[(N, B)],
    mode: Option<u32>,
) -> io::Result<Vec<PathBuf>>
where
    N: AsRef<str>,
    B: AsRef<[u8]>,
{
    let remove_temps = |from: usize, to: usize| {
        for (name, _) in &files[from..to] {
            let _ = fs::remove_file(temp_path(dir, name.as_ref()));
        }
    };
    for (i, (name, bytes)) in files.iter().enumerate() {
        let tmp = temp_path(dir, name.as_ref());
        // A read-only leftover of an interrupted attempt cannot be opened for writing: remove it first.
        let _ = fs::remove_file(&tmp);
        let written = fs::OpenOptions::new()
            .write(true)
            .create(true)
            .truncate(true)
            .open(&tmp)
            .and_then(|mut f| {
                f.write_all(bytes.as_ref())?;
                if let Some(mode) = mode {
                    f.set_permissions(fs::Permissions::from_mode(mode))?;
                }
                f.sync_all()
            });
        if let Err(e) = written {
            remove_temps(0, i + 1);
            return Err(e);
        }
    }
    let mut out = Vec::with_capacity(files.len());
    for (i, (name, _)) in files.iter().enumerate() {
        let final_path = dir.join(name.as_ref());
        if let Err(e) = fs::rename(temp_path(dir, name.as_ref()), &final_path) {
            remove_temps(i, files.len());
            return Err(e);
        }
        out.push(final_path);
    }
    sync_dir(dir)?;
    Ok(out)
}

#[cfg(test)]
mod tests {
    use super::*;

    fn names_in(dir: &Path) -> Vec<String> {
        let mut v: Vec<String> = fs::read_dir(dir)
            .unwrap()
            .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
            .collect();
        v.sort();
        v
    }

    #[test]
    fn writes_replace_and_leave_no_temporary_file() {
        let d = tempfile::tempdir().unwrap();
        let p = write_atomic(d.path(), "a.json", b"one", None).unwrap();
        assert_eq!(p, d.path().join("a.json"));
        write_atomic(d.path(), "a.json", b"two", None).unwrap();
        assert_eq!(fs::read(&p).unwrap(), b"two");
        let paths = write_atomic_all(
            d.path(),
            &[
                ("b.md".to_string(), b"bee".to_vec()),
                ("c.csv".into(), b"sea".to_vec()),
            ],
            None,
        )
        .unwrap();
        assert_eq!(paths, vec![d.path().join("b.md"), d.path().join("c.csv")]);
        assert_eq!(fs::read(&paths[1]).unwrap(), b"sea");
        assert_eq!(names_in(d.path()), ["a.json", "b.md", "c.csv"]);
    }

    #[test]
    fn mode_is_applied_and_a_read_only_leftover_is_replaced() {
        let d = tempfile::tempdir().unwrap();
        // An interrupted earlier attempt left its temporary file read-only.
        let leftover = temp_path(d.path(), "r.json");
        fs::write(&leftover, b"stale").unwrap();
        fs::set_permissions(&leftover, fs::Permissions::from_mode(0o440)).unwrap();
        let p = write_atomic(d.path(), "r.json", b"fresh", Some(0o440)).unwrap();
        assert_eq!(fs::read(&p).unwrap(), b"fresh");
        assert_eq!(
            fs::metadata(&p).unwrap().permissions().mode() & 0o777,
            0o440
        );
        assert!(!leftover.exists());
    }

    #[test]
    fn a_failed_write_removes_its_temporary_files() {
        let d = tempfile::tempdir().unwrap();
        // The second file's final name is a non-empty folder, so its rename fails after the first one.
        fs::create_dir(d.path().join("blocked")).unwrap();
        fs::write(d.path().join("blocked").join("x"), b"x").unwrap();
        let r = write_atomic_all(d.path(), &[("ok", &b"1"[..]), ("blocked", &b"2"[..])], None);
        assert!(r.is_err());
        assert_eq!(names_in(d.path()), ["blocked", "ok"]);
        let missing = d.path().join("missing");
        assert!(write_atomic(&missing, "a", b"1", None).is_err());
        assert!(!missing.exists());
    }

    #[test]
    fn stale_temporary_files_are_recognised_and_removed() {
        let d = tempfile::tempdir().unwrap();
        let tmp = temp_path(d.path(), "b00000001.csv");
        assert!(is_temp_name(&tmp.file_name().unwrap().to_string_lossy()));
        fs::write(&tmp, b"half").unwrap();
        for keep in [
            ".hidden",
            ".x.tmp-",
            ".x.tmp-12a",
            "b.csv.tmp-1",
            "b00000001.csv",
        ] {
            assert!(!is_temp_name(keep), "{keep}");
            fs::write(d.path().join(keep), b"k").unwrap();
        }
        assert_eq!(remove_stale_temps(d.path()).unwrap(), 1);
        assert!(!tmp.exists());
        assert_eq!(names_in(d.path()).len(), 5);
    }

    /// Every temporary file is written before the first rename: when a later file of the group cannot
    /// even be written, no final name changes (a writer that renamed each file as soon as it was written
    /// would already have replaced `a.json`).
    #[test]
    fn a_group_renames_nothing_until_every_file_is_written() {
        let d = tempfile::tempdir().unwrap();
        write_atomic(d.path(), "a.json", b"old", None).unwrap();
        let r = write_atomic_all(
            d.path(),
            &[
                ("a.json", &b"new"[..]),
                ("no-such-folder/b.json", &b"b"[..]),
            ],
            None,
        );
        assert!(r.is_err());
        assert_eq!(fs::read(d.path().join("a.json")).unwrap(), b"old");
        assert_eq!(names_in(d.path()), ["a.json"]);
    }

    #[test]
    fn a_named_path_is_written_atomically_in_its_own_folder() {
        let d = tempfile::tempdir().unwrap();
        let p = d.path().join("audit.txt");
        fs::write(&p, b"old").unwrap();
        assert_eq!(write_atomic_at(&p, b"new", Some(0o600)).unwrap(), p);
        assert_eq!(fs::read(&p).unwrap(), b"new");
        assert_eq!(
            fs::metadata(&p).unwrap().permissions().mode() & 0o777,
            0o600
        );
        assert_eq!(names_in(d.path()), ["audit.txt"]);
        // No file name, or a folder that does not exist: an error, nothing written.
        assert!(write_atomic_at(d.path(), b"x", None).is_err());
        assert!(write_atomic_at(Path::new("/"), b"x", None).is_err());
        assert!(write_atomic_at(&d.path().join("missing").join("a"), b"x", None).is_err());
        assert_eq!(names_in(d.path()), ["audit.txt"]);
    }

    #[test]
    fn sync_dir_needs_an_existing_folder() {
        let d = tempfile::tempdir().unwrap();
        sync_dir(d.path()).unwrap();
        assert!(sync_dir(&d.path().join("missing")).is_err());
    }
}
