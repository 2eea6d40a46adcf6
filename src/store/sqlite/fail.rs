//! Turning SQLite's error codes into [`StoreError`]s that name the file and the remedy.
//!
//! Code inside a transaction returns [`Failure`], which is either a raw SQLite error (not
//! yet given its path and operation) or an already specific [`StoreError`]; [`Ctx::map`]
//! finishes both at the transaction's edge.

use std::path::Path;
use std::time::Duration;

use rusqlite::ErrorCode;

use crate::store::error::StoreError;

/// A failure inside a store operation, before it is given its context.
#[derive(Debug)]
pub(crate) enum Failure {
    /// SQLite said no.
    Sql(rusqlite::Error),
    /// Already a specific error.
    Store(StoreError),
}

impl From<rusqlite::Error> for Failure {
    fn from(e: rusqlite::Error) -> Failure {
        Failure::Sql(e)
    }
}

impl From<StoreError> for Failure {
    fn from(e: StoreError) -> Failure {
        Failure::Store(e)
    }
}

/// What an error needs to be specific: the file, the operation and the busy timeout.
#[derive(Clone, Copy)]
pub(crate) struct Ctx<'a> {
    pub path: &'a Path,
    pub operation: &'static str,
    pub busy_timeout: Duration,
}

impl Ctx<'_> {
    /// The specific error for a failure.
    pub fn map(&self, failure: Failure) -> StoreError {
        match failure {
            Failure::Store(e) => e,
            Failure::Sql(e) => self.sql(e),
        }
    }

    /// The specific error for an SQLite error.
    pub fn sql(&self, e: rusqlite::Error) -> StoreError {
        let path = self.path.to_path_buf();
        let operation = self.operation;
        let detail = e.to_string();
        let (code, extended) = match &e {
            rusqlite::Error::SqliteFailure(inner, _) => (Some(inner.code), inner.extended_code),
            _ => (None, 0),
        };
        match code {
            Some(ErrorCode::DatabaseBusy | ErrorCode::DatabaseLocked) => StoreError::Busy {
                path,
                operation,
                waited: self.busy_timeout,
            },
            Some(ErrorCode::DiskFull) => StoreError::Full { path, operation },
            Some(ErrorCode::NotADatabase) => StoreError::NotAStore {
                path,
                detail: "SQLite says the file is not a database".to_string(),
            },
            Some(ErrorCode::DatabaseCorrupt) => StoreError::Corrupt { path, detail },
            Some(ErrorCode::ReadOnly | ErrorCode::PermissionDenied) => {
                StoreError::ReadOnly { path, detail }
            }
            Some(ErrorCode::CannotOpen) => StoreError::ReadOnly {
                path,
                detail: format!(
                    "SQLite could not open the file or create its -wal and -shm files beside it: {detail}"
                ),
            },
            Some(ErrorCode::SystemIoFailure) => StoreError::Io {
                path,
                operation,
                detail: match extended {
                    rusqlite::ffi::SQLITE_IOERR_WRITE => format!(
                        "{detail}: a write was refused, as when the disk is full or the file-size limit is reached"
                    ),
                    rusqlite::ffi::SQLITE_IOERR_FSYNC => {
                        format!("{detail}: flushing to disk failed")
                    }
                    _ => detail,
                },
            },
            _ => StoreError::Sqlite {
                path,
                operation,
                detail,
            },
        }
    }

    /// A damaged-record error for `what`.
    pub fn damaged(&self, what: impl Into<String>) -> Failure {
        Failure::Store(StoreError::DamagedRecord {
            path: self.path.to_path_buf(),
            detail: what.into(),
        })
    }

    /// An invalid-input error.
    pub fn invalid(&self, detail: impl Into<String>) -> StoreError {
        StoreError::Invalid {
            path: self.path.to_path_buf(),
            operation: self.operation,
            detail: detail.into(),
        }
    }
}
