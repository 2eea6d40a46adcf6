//! Why a store operation failed, with the store's path and what to do about it.
//!
//! Every variant names the store file, so a log line is enough to act on. The daemon
//! treats any of them the same way (apply the failure mode, count the error, stay up);
//! the variants exist so that people get a specific message and tests can tell them apart.

use std::path::PathBuf;
use std::time::Duration;

/// A store operation that failed.
#[derive(Debug, Clone, thiserror::Error)]
pub enum StoreError {
    /// The folder that should hold the store does not exist.
    #[error(
        "{}: the folder for the store does not exist; create it (owned by the daemon's user, mode 0700) or set [store] path to a file in an existing folder",
        path.display()
    )]
    MissingFolder {
        /// The store path.
        path: PathBuf,
    },
    /// The path is a symbolic link, a folder or some other non-file.
    #[error(
        "{}: the store path is {kind}, not a regular file; point [store] path at a plain file (a symbolic link is refused so the store cannot be redirected)",
        path.display()
    )]
    NotRegularFile {
        /// The store path.
        path: PathBuf,
        /// What it is instead, e.g. "a symbolic link".
        kind: &'static str,
    },
    /// The file or its folder cannot be written by this process, or its mode takes write
    /// permission away from its owner.
    #[error(
        "{}: the store is read-only ({detail}); give the daemon's user write permission on the file and its folder (SQLite writes `-wal` and `-shm` files beside it)",
        path.display()
    )]
    ReadOnly {
        /// The store path.
        path: PathBuf,
        /// What refused the write.
        detail: String,
    },
    /// The file is not an SQLite database, or is one that tamis did not create.
    #[error(
        "{}: not a tamis store ({detail}); move the file aside and let tamis create a new one, or point [store] path at the right file",
        path.display()
    )]
    NotAStore {
        /// The store path.
        path: PathBuf,
        /// What was found.
        detail: String,
    },
    /// SQLite found the database damaged.
    #[error(
        "{}: the store is damaged ({detail}); stop tamis, copy the file aside, and restore it from a backup or recover it with the sqlite3 shell's `.recover`",
        path.display()
    )]
    Corrupt {
        /// The store path.
        path: PathBuf,
        /// SQLite's message.
        detail: String,
    },
    /// The store was written by a newer tamis with a schema this build does not know.
    #[error(
        "{}: the store has schema version {found}, newer than this build of tamis knows ({supported}); run the newer tamis, or point [store] path at another file (the store is left untouched)",
        path.display()
    )]
    NewerSchema {
        /// The store path.
        path: PathBuf,
        /// The version in the file.
        found: i64,
        /// The newest version this build knows.
        supported: i64,
    },
    /// Another process or connection kept the store locked for the whole busy timeout.
    #[error(
        "{}: the store stayed locked by another process or connection for {waited:?} while trying to {operation}; find what holds it (`fuser` on the file) and let it finish",
        path.display()
    )]
    Busy {
        /// The store path.
        path: PathBuf,
        /// What was being done.
        operation: &'static str,
        /// The busy timeout that ran out.
        waited: Duration,
    },
    /// No space left, or a file-size limit reached.
    #[error(
        "{}: the disk is full or a file-size limit was reached while trying to {operation}; nothing was half-written (the transaction was rolled back); free space or raise the limit",
        path.display()
    )]
    Full {
        /// The store path.
        path: PathBuf,
        /// What was being done.
        operation: &'static str,
    },
    /// A read or write of the store's files failed.
    #[error(
        "{}: an input/output error while trying to {operation} ({detail}); the transaction was rolled back; check free space, the file-size limit (`ulimit -f`) and the kernel log",
        path.display()
    )]
    Io {
        /// The store path.
        path: PathBuf,
        /// What was being done.
        operation: &'static str,
        /// The system's or SQLite's message.
        detail: String,
    },
    /// The store file was removed or replaced while this process had it open: what it
    /// writes now goes to a file nobody will read again, so a write reported as done would
    /// be lost. Every write fails with this until the process opens the store again.
    #[error(
        "{}: the store file was removed or replaced while tamis had it open ({detail}); what was just written is not in the file at this path, so it was not counted as kept; restore the file or folder, or restart tamis to open a new store there",
        path.display()
    )]
    Gone {
        /// The store path.
        path: PathBuf,
        /// What changed.
        detail: String,
    },
    /// A stored record could not be read back (a damaged blob, an unknown code).
    #[error(
        "{}: a stored record is damaged ({detail}); the rest of the store is usable; run `PRAGMA integrity_check` on a copy",
        path.display()
    )]
    DamagedRecord {
        /// The store path.
        path: PathBuf,
        /// What is wrong and where.
        detail: String,
    },
    /// A caller gave a record the store cannot keep.
    #[error("{}: cannot {operation}: {detail}", path.display())]
    Invalid {
        /// The store path.
        path: PathBuf,
        /// What was being done.
        operation: &'static str,
        /// What is wrong with the input.
        detail: String,
    },
    /// Any other SQLite failure.
    #[error(
        "{}: SQLite failed while trying to {operation} ({detail}); this is unexpected, please report it with this message",
        path.display()
    )]
    Sqlite {
        /// The store path.
        path: PathBuf,
        /// What was being done.
        operation: &'static str,
        /// SQLite's message.
        detail: String,
    },
}

impl StoreError {
    /// The store path the error is about.
    pub fn path(&self) -> &std::path::Path {
        match self {
            StoreError::MissingFolder { path }
            | StoreError::NotRegularFile { path, .. }
            | StoreError::ReadOnly { path, .. }
            | StoreError::NotAStore { path, .. }
            | StoreError::Corrupt { path, .. }
            | StoreError::NewerSchema { path, .. }
            | StoreError::Busy { path, .. }
            | StoreError::Full { path, .. }
            | StoreError::Io { path, .. }
            | StoreError::Gone { path, .. }
            | StoreError::DamagedRecord { path, .. }
            | StoreError::Invalid { path, .. }
            | StoreError::Sqlite { path, .. } => path,
        }
    }

    /// A short fixed name of the kind of error, for a metric label.
    pub fn kind(&self) -> &'static str {
        match self {
            StoreError::MissingFolder { .. } => "missing-folder",
            StoreError::NotRegularFile { .. } => "not-a-file",
            StoreError::ReadOnly { .. } => "read-only",
            StoreError::NotAStore { .. } => "not-a-store",
            StoreError::Corrupt { .. } => "corrupt",
            StoreError::NewerSchema { .. } => "newer-schema",
            StoreError::Busy { .. } => "busy",
            StoreError::Full { .. } => "full",
            StoreError::Io { .. } => "io",
            StoreError::Gone { .. } => "gone",
            StoreError::DamagedRecord { .. } => "damaged-record",
            StoreError::Invalid { .. } => "invalid",
            StoreError::Sqlite { .. } => "sqlite",
        }
    }
}
