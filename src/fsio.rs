//! Safe file I/O: the one way tamis replaces a file, and bounded reads of the files the
//! daemon loads.
//!
//! Writing ([`write_file`], [`write_bytes`]): the new contents go to a uniquely named
//! temporary file created beside the target with create-new semantics (so a planted link or
//! file at a predictable name is never opened), are flushed and fsynced, and the temporary
//! file is renamed over the target; then the folder is fsynced so the rename survives a
//! crash. A reader of the target sees the old file or the new one, never half of either. A
//! target that exists and is not a regular file — a symbolic link, folder, FIFO, device or
//! socket — is refused with an error naming it, before anything is created. A replaced file
//! keeps its permission bits; a new one gets `0666` less the umask, as `open(2)` would give.
//!
//! Reading ([`open_regular`], [`read_regular`], [`with_deadline`]): the file is opened with
//! `O_NONBLOCK`, so opening a FIFO cannot block, and refused unless the opened file is
//! regular; its size is checked against a limit before anything is read, and reading stops
//! at that limit even if the file grows. [`with_deadline`] runs a read on its own thread and
//! gives up after a time limit, for file systems that can stall (a hung network mount): the
//! stalled thread is left behind, the caller gets an error naming the path.
//!
//! Invariant: no error from this module carries the same text twice when printed with its
//! causes (`{:#}`): I/O errors are part of the message, not a separate source.

use std::fs::{File, OpenOptions};
use std::io::{self, BufWriter, Read, Write};
use std::os::unix::fs::{FileTypeExt, OpenOptionsExt, PermissionsExt};
use std::path::{Path, PathBuf};
use std::time::Duration;

/// How long a read of a model or configuration file may take before it is abandoned.
pub const READ_TIMEOUT: Duration = Duration::from_secs(10);

/// A file operation refused or failed, with the path it concerns.
#[derive(Debug, thiserror::Error)]
#[error("{}: {problem}", path.display())]
pub struct FsioError {
    /// The file concerned.
    pub path: PathBuf,
    /// What went wrong.
    pub problem: Problem,
}

/// What went wrong with a file; displayed without the path, which [`FsioError`] adds.
#[derive(Debug, thiserror::Error)]
pub enum Problem {
    /// The path exists but is not a regular file.
    #[error(
        "refusing to {action} it: it is {kind}, not a regular file; give the path of a regular file"
    )]
    NotRegular {
        /// `read` or `write`.
        action: &'static str,
        /// What it is instead, with its article ("a FIFO (named pipe)").
        kind: &'static str,
    },
    /// The file is larger than the reader accepts.
    #[error("the file is {size} bytes, larger than the {limit} bytes accepted for {what}")]
    TooLarge {
        /// Its size.
        size: u64,
        /// The limit.
        limit: u64,
        /// What kind of file it was read as.
        what: &'static str,
    },
    /// Reading did not finish in time.
    #[error(
        "reading did not finish within {} s; the file system may be stalled (a hung network mount?)",
        .0.as_secs()
    )]
    TimedOut(Duration),
    /// An operating-system error.
    #[error("cannot {doing}: {error}")]
    Io {
        /// What was being done ("create a temporary file beside it").
        doing: &'static str,
        /// The error.
        error: io::Error,
    },
}

impl FsioError {
    /// An error about `path`.
    pub fn new(path: &Path, problem: Problem) -> FsioError {
        FsioError {
            path: path.to_path_buf(),
            problem,
        }
    }

    /// An operating-system error met while doing `doing` ("read it") to `path`.
    pub fn io(path: &Path, doing: &'static str, error: io::Error) -> FsioError {
        FsioError::new(path, Problem::Io { doing, error })
    }

    /// The closest `std::io::ErrorKind`, for callers whose errors carry an `io::Error`.
    pub fn kind(&self) -> io::ErrorKind {
        match &self.problem {
            Problem::NotRegular { .. } => io::ErrorKind::InvalidInput,
            Problem::TooLarge { .. } => io::ErrorKind::FileTooLarge,
            Problem::TimedOut(_) => io::ErrorKind::TimedOut,
            Problem::Io { error, .. } => error.kind(),
        }
    }
}

/// What a file type is, in words, for errors; `None` for a regular file.
fn non_regular_kind(file_type: std::fs::FileType) -> Option<&'static str> {
    if file_type.is_file() {
        None
    } else if file_type.is_symlink() {
        Some("a symbolic link")
    } else if file_type.is_dir() {
        Some("a folder")
    } else if file_type.is_fifo() {
        Some("a FIFO (named pipe)")
    } else if file_type.is_char_device() {
        Some("a character device")
    } else if file_type.is_block_device() {
        Some("a block device")
    } else if file_type.is_socket() {
        Some("a socket")
    } else {
        Some("not a file")
    }
}

/// Checks that `path` can be replaced: it is missing or a regular file (a link is not
/// followed), and its folder exists. Commands call this before long work so a bad output
/// path fails at once; [`write_file`] checks again.
pub fn check_target(path: &Path) -> Result<(), FsioError> {
    if path.as_os_str().is_empty() {
        return Err(FsioError::io(
            path,
            "write an empty path",
            io::Error::new(io::ErrorKind::InvalidInput, "no file name given"),
        ));
    }
    match std::fs::symlink_metadata(path) {
        Ok(meta) => match non_regular_kind(meta.file_type()) {
            Some(kind) => Err(FsioError::new(
                path,
                Problem::NotRegular {
                    action: "write",
                    kind,
                },
            )),
            None => Ok(()),
        },
        Err(e) if e.kind() == io::ErrorKind::NotFound => {
            let folder = folder_of(path);
            match std::fs::metadata(folder) {
                Ok(meta) if meta.is_dir() => Ok(()),
                Ok(_) => Err(FsioError::io(
                    path,
                    "write it",
                    io::Error::new(
                        io::ErrorKind::NotADirectory,
                        format!("{} is not a folder", folder.display()),
                    ),
                )),
                Err(e) => Err(FsioError::io(
                    path,
                    "write it",
                    io::Error::new(e.kind(), format!("its folder {}: {e}", folder.display())),
                )),
            }
        }
        Err(e) => Err(FsioError::io(path, "inspect it", e)),
    }
}

/// The folder a path's file lives in (`.` for a bare file name).
fn folder_of(path: &Path) -> &Path {
    match path.parent() {
        Some(p) if !p.as_os_str().is_empty() => p,
        _ => Path::new("."),
    }
}

/// Replaces `path` with what `write` produces, atomically and durably (see the module
/// comment). On any error the target is left as it was and the temporary file is removed.
pub fn write_file(
    path: &Path,
    write: impl FnOnce(&mut dyn Write) -> io::Result<()>,
) -> Result<(), FsioError> {
    write_file_mode(path, 0o666, write)
}

/// Like [`write_file`], but a new file gets `mode` (less the umask) instead of `0o666`:
/// `0o600` for mail written out of the quarantine, which other users must not read. A
/// replaced file still keeps its own permission bits.
pub fn write_file_mode(
    path: &Path,
    mode: u32,
    write: impl FnOnce(&mut dyn Write) -> io::Result<()>,
) -> Result<(), FsioError> {
    check_target(path)?;
    let folder = folder_of(path);
    let name = path
        .file_name()
        .map(|n| n.to_string_lossy().into_owned())
        .unwrap_or_default();
    let prefix = format!(".{name}.");
    let existing_mode = std::fs::symlink_metadata(path)
        .ok()
        .map(|m| m.permissions().mode() & 0o777);
    let mut temp = tempfile::Builder::new()
        .prefix(&prefix)
        .suffix(".tmp")
        .permissions(std::fs::Permissions::from_mode(mode))
        .tempfile_in(folder)
        .map_err(|e| FsioError::io(path, "create a temporary file beside it", e))?;
    if let Some(mode) = existing_mode {
        temp.as_file()
            .set_permissions(std::fs::Permissions::from_mode(mode))
            .map_err(|e| FsioError::io(path, "keep its permissions", e))?;
    }
    {
        let mut out = BufWriter::new(temp.as_file_mut());
        write(&mut out).map_err(|e| FsioError::io(path, "write it", e))?;
        out.flush()
            .map_err(|e| FsioError::io(path, "write it", e))?;
    }
    temp.as_file()
        .sync_all()
        .map_err(|e| FsioError::io(path, "flush it to disk", e))?;
    // Checked again just before the rename: the window left is the rename itself.
    check_target(path)?;
    temp.persist(path)
        .map_err(|e| FsioError::io(path, "rename the temporary file over it", e.error))?;
    File::open(folder)
        .and_then(|dir| dir.sync_all())
        .map_err(|e| FsioError::io(path, "flush its folder to disk", e))
}

/// Replaces `path` with `bytes`; see [`write_file`].
pub fn write_bytes(path: &Path, bytes: &[u8]) -> Result<(), FsioError> {
    write_file(path, |out| out.write_all(bytes))
}

/// Opens `path` for reading without blocking on a FIFO, and refuses anything but a regular
/// file. Returns the file and its size.
pub fn open_regular(path: &Path) -> Result<(File, u64), FsioError> {
    let file = OpenOptions::new()
        .read(true)
        .custom_flags(rustix::fs::OFlags::NONBLOCK.bits() as i32)
        .open(path)
        .map_err(|e| FsioError::io(path, "open it", e))?;
    let meta = file
        .metadata()
        .map_err(|e| FsioError::io(path, "inspect it", e))?;
    if let Some(kind) = non_regular_kind(meta.file_type()) {
        return Err(FsioError::new(
            path,
            Problem::NotRegular {
                action: "read",
                kind,
            },
        ));
    }
    Ok((file, meta.len()))
}

/// Reads the whole regular file at `path`, refusing one larger than `limit` bytes (`what`
/// names the kind of file in the error).
pub fn read_regular(path: &Path, limit: u64, what: &'static str) -> Result<Vec<u8>, FsioError> {
    let (file, size) = open_regular(path)?;
    let too_large = |size| FsioError::new(path, Problem::TooLarge { size, limit, what });
    if size > limit {
        return Err(too_large(size));
    }
    let mut bytes = Vec::with_capacity(usize::try_from(size).unwrap_or(0));
    file.take(limit + 1)
        .read_to_end(&mut bytes)
        .map_err(|e| FsioError::io(path, "read it", e))?;
    if bytes.len() as u64 > limit {
        // It grew while being read.
        return Err(too_large(bytes.len() as u64));
    }
    Ok(bytes)
}

/// Runs `read` on its own thread and waits at most `timeout` for it. On time-out the thread
/// is left to finish (or stall) on its own and the error names `path`.
pub fn with_deadline<T, E>(
    path: &Path,
    timeout: Duration,
    read: impl FnOnce() -> Result<T, E> + Send + 'static,
) -> Result<T, E>
where
    T: Send + 'static,
    E: From<FsioError> + Send + 'static,
{
    let (tx, rx) = std::sync::mpsc::sync_channel(1);
    let spawned = std::thread::Builder::new()
        .name("tamis-read".into())
        .spawn(move || {
            let _ = tx.send(read());
        });
    if let Err(e) = spawned {
        return Err(FsioError::io(path, "start a reader thread", e).into());
    }
    match rx.recv_timeout(timeout) {
        Ok(result) => result,
        Err(_) => Err(FsioError::new(path, Problem::TimedOut(timeout)).into()),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn mkfifo(path: &Path) {
        let ok = std::process::Command::new("mkfifo")
            .arg(path)
            .status()
            .map(|s| s.success());
        assert_eq!(ok.ok(), Some(true), "mkfifo {}", path.display());
    }

    #[test]
    fn replaces_a_file_and_keeps_its_mode() {
        let dir = tempfile::tempdir().expect("temp dir");
        let path = dir.path().join("out.txt");
        std::fs::write(&path, b"old").expect("write");
        std::fs::set_permissions(&path, std::fs::Permissions::from_mode(0o640)).expect("chmod");
        write_bytes(&path, b"new").expect("replaced");
        assert_eq!(std::fs::read(&path).expect("read"), b"new");
        let mode = std::fs::metadata(&path).expect("meta").permissions().mode();
        assert_eq!(mode & 0o777, 0o640);
        // Only the target is left in the folder.
        assert_eq!(std::fs::read_dir(dir.path()).expect("list").count(), 1);
    }

    #[test]
    fn a_failed_write_leaves_the_target_and_no_temporary_file() {
        let dir = tempfile::tempdir().expect("temp dir");
        let path = dir.path().join("out.txt");
        std::fs::write(&path, b"old").expect("write");
        let err = write_file(&path, |out| {
            out.write_all(b"half")?;
            Err(io::Error::other("disk on fire"))
        })
        .expect_err("fails");
        assert!(err.to_string().contains("disk on fire"), "{err}");
        assert_eq!(std::fs::read(&path).expect("read"), b"old");
        assert_eq!(std::fs::read_dir(dir.path()).expect("list").count(), 1);
    }

    #[test]
    fn non_regular_targets_are_refused_untouched() {
        let dir = tempfile::tempdir().expect("temp dir");
        let victim = dir.path().join("victim");
        std::fs::write(&victim, b"precious").expect("write");
        let link = dir.path().join("link");
        std::os::unix::fs::symlink(&victim, &link).expect("link");
        let fifo = dir.path().join("fifo");
        mkfifo(&fifo);
        for (path, kind) in [
            (&link, "symbolic link"),
            (&fifo, "FIFO"),
            (&dir.path().to_path_buf(), "folder"),
            (&PathBuf::from("/dev/null"), "character device"),
        ] {
            let err = write_bytes(path, b"x").expect_err("refused");
            let text = err.to_string();
            assert!(
                text.contains(&path.display().to_string()) && text.contains(kind),
                "{text}"
            );
        }
        assert_eq!(std::fs::read(&victim).expect("read"), b"precious");
        assert!(
            std::fs::symlink_metadata(&link)
                .expect("meta")
                .file_type()
                .is_symlink()
        );
    }

    #[test]
    fn a_missing_folder_is_named() {
        let dir = tempfile::tempdir().expect("temp dir");
        let path = dir.path().join("no/such/out.txt");
        let text = check_target(&path).expect_err("refused").to_string();
        assert!(text.contains("no/such"), "{text}");
    }

    #[test]
    fn reads_refuse_fifos_without_blocking_and_check_the_size_first() {
        let dir = tempfile::tempdir().expect("temp dir");
        let fifo = dir.path().join("fifo");
        mkfifo(&fifo);
        let err = read_regular(&fifo, 100, "a test file").expect_err("refused");
        assert!(
            matches!(err.problem, Problem::NotRegular { kind, .. } if kind.contains("FIFO")),
            "{err}"
        );
        let big = dir.path().join("big");
        File::create(&big)
            .and_then(|f| f.set_len(1 << 40))
            .expect("sparse file");
        let err = read_regular(&big, 100, "a test file").expect_err("refused");
        assert!(
            matches!(
                err.problem,
                Problem::TooLarge {
                    size: 1_099_511_627_776,
                    limit: 100,
                    ..
                }
            ),
            "{err}"
        );
        let small = dir.path().join("small");
        std::fs::write(&small, b"12345").expect("write");
        assert_eq!(
            read_regular(&small, 5, "a test file").expect("read"),
            b"12345"
        );
    }

    #[test]
    fn a_stalled_read_is_abandoned_at_the_deadline() {
        let (release, stalled) = std::sync::mpsc::channel::<()>();
        let started = std::time::Instant::now();
        let result: Result<(), FsioError> = with_deadline(
            Path::new("/stalled/mount"),
            Duration::from_millis(200),
            move || {
                let _ = stalled.recv();
                Ok(())
            },
        );
        let err = result.expect_err("timed out");
        assert!(matches!(err.problem, Problem::TimedOut(_)), "{err}");
        assert!(err.to_string().starts_with("/stalled/mount: "), "{err}");
        assert!(started.elapsed() < Duration::from_secs(5));
        drop(release);
    }
}
