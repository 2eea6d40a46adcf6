//! Opening a store file: the checks before SQLite sees the path, the connection settings,
//! and the schema version check and migrations.
//!
//! Invariants: a store file tamis creates has mode 0600 from its first byte (created here
//! with `O_EXCL`, never by SQLite); a path that is a symbolic link or not a regular file is
//! refused, and SQLite is told not to follow links either; a file of a newer schema, or an
//! SQLite database of another program, is refused before anything is written to it. This
//! module never opens an existing store file itself: closing a second descriptor of a file
//! drops the POSIX locks SQLite holds on it in the same process.

use std::fs::OpenOptions;
use std::io::ErrorKind;
use std::os::unix::fs::{OpenOptionsExt, PermissionsExt};
use std::path::Path;
use std::time::Duration;

use rusqlite::{Connection, MAIN_DB, OpenFlags, TransactionBehavior};

use super::fail::{Ctx, Failure};
use super::schema::{APPLICATION_ID, MIGRATIONS, SCHEMA_VERSION};
use crate::store::error::StoreError;

/// Checks the path and creates the file (mode 0600) when it does not exist yet.
pub(crate) fn prepare_file(path: &Path) -> Result<(), StoreError> {
    let owned = || path.to_path_buf();
    match std::fs::symlink_metadata(path) {
        Ok(meta) => {
            let kind = meta.file_type();
            let refuse = |kind: &'static str| {
                Err(StoreError::NotRegularFile {
                    path: owned(),
                    kind,
                })
            };
            if kind.is_symlink() {
                return refuse("a symbolic link");
            }
            if kind.is_dir() {
                return refuse("a folder");
            }
            if !kind.is_file() {
                return refuse("a special file (device, socket or pipe)");
            }
            let mode = meta.permissions().mode() & 0o7777;
            if mode & 0o200 == 0 {
                return Err(StoreError::ReadOnly {
                    path: owned(),
                    detail: format!("its mode {mode:04o} gives its owner no write permission"),
                });
            }
            Ok(())
        }
        Err(e) if e.kind() == ErrorKind::NotFound => {
            let parent = match path.parent() {
                Some(p) if !p.as_os_str().is_empty() => p,
                _ => Path::new("."),
            };
            if !parent.is_dir() {
                return Err(StoreError::MissingFolder { path: owned() });
            }
            // `create_new` is O_CREAT|O_EXCL: it fails on any existing name, a symbolic
            // link included, so the file made here is the one SQLite opens next.
            OpenOptions::new()
                .write(true)
                .create_new(true)
                .mode(0o600)
                .open(path)
                .map(drop)
                .map_err(|e| file_error(path, "create the store file", e))
        }
        Err(e) => Err(file_error(path, "inspect the store path", e)),
    }
}

fn file_error(path: &Path, operation: &'static str, e: std::io::Error) -> StoreError {
    match e.kind() {
        ErrorKind::PermissionDenied | ErrorKind::ReadOnlyFilesystem => StoreError::ReadOnly {
            path: path.to_path_buf(),
            detail: format!("cannot {operation}: {e}"),
        },
        _ => StoreError::Io {
            path: path.to_path_buf(),
            operation,
            detail: e.to_string(),
        },
    }
}

/// Opens a connection with the store's settings. `writer` connections also check the
/// schema version and migrate; reader connections are query-only.
pub(crate) fn connect(
    path: &Path,
    busy_timeout: Duration,
    writer: bool,
) -> Result<Connection, StoreError> {
    let ctx = Ctx {
        path,
        operation: "open the store",
        busy_timeout,
    };
    let flags = OpenFlags::SQLITE_OPEN_READ_WRITE
        | OpenFlags::SQLITE_OPEN_NO_MUTEX
        | OpenFlags::SQLITE_OPEN_NOFOLLOW;
    let mut conn = Connection::open_with_flags(path, flags).map_err(|e| ctx.sql(e))?;
    conn.busy_timeout(busy_timeout).map_err(|e| ctx.sql(e))?;
    if conn.is_readonly(MAIN_DB).map_err(|e| ctx.sql(e))? {
        return Err(StoreError::ReadOnly {
            path: path.to_path_buf(),
            detail: "SQLite could open it for reading only".to_string(),
        });
    }
    if writer {
        check_version(&conn, ctx)?;
    }
    set_pragmas(&conn, writer, ctx)?;
    if writer {
        migrate(&mut conn, ctx)?;
    }
    Ok(conn)
}

fn set_pragmas(conn: &Connection, writer: bool, ctx: Ctx<'_>) -> Result<(), StoreError> {
    // WAL: readers never block the writer and a commit is one append (sqlite.org/wal.html).
    let mode: String = conn
        .pragma_update_and_check(None, "journal_mode", "WAL", |r| r.get(0))
        .map_err(|e| ctx.sql(e))?;
    if !mode.eq_ignore_ascii_case("wal") {
        return Err(StoreError::Io {
            path: ctx.path.to_path_buf(),
            operation: ctx.operation,
            detail: format!(
                "the file system refused write-ahead logging (journal mode stayed {mode}); put the store on a local file system"
            ),
        });
    }
    let other = || -> rusqlite::Result<()> {
        // NORMAL: in WAL mode a commit survives a crash of the process, not of the machine;
        // operations that must survive both switch to FULL for their own transaction.
        conn.pragma_update(None, "synchronous", "NORMAL")?;
        conn.pragma_update(None, "foreign_keys", "ON")?;
        if !writer {
            conn.pragma_update(None, "query_only", "ON")?;
        }
        Ok(())
    };
    other().map_err(|e| ctx.sql(e))
}

fn check_version(conn: &Connection, ctx: Ctx<'_>) -> Result<(), StoreError> {
    // The first read of the file: garbage fails here as "not a database".
    let version: i64 = conn
        .pragma_query_value(None, "user_version", |r| r.get(0))
        .map_err(|e| ctx.sql(e))?;
    if version > SCHEMA_VERSION {
        return Err(StoreError::NewerSchema {
            path: ctx.path.to_path_buf(),
            found: version,
            supported: SCHEMA_VERSION,
        });
    }
    let application: i64 = conn
        .pragma_query_value(None, "application_id", |r| r.get(0))
        .map_err(|e| ctx.sql(e))?;
    if application != 0 && application != APPLICATION_ID {
        return Err(StoreError::NotAStore {
            path: ctx.path.to_path_buf(),
            detail: format!(
                "an SQLite database of another program (application id {application:#x})"
            ),
        });
    }
    if version == 0 {
        let objects: i64 = conn
            .query_row("SELECT count(*) FROM sqlite_master", [], |r| r.get(0))
            .map_err(|e| ctx.sql(e))?;
        if objects > 0 {
            return Err(StoreError::NotAStore {
                path: ctx.path.to_path_buf(),
                detail: format!(
                    "an SQLite database with {objects} tables or indexes of another program"
                ),
            });
        }
    }
    Ok(())
}

fn migrate(conn: &mut Connection, ctx: Ctx<'_>) -> Result<(), StoreError> {
    let ctx = Ctx {
        operation: "migrate the store schema",
        ..ctx
    };
    for (from, sql) in MIGRATIONS.iter().enumerate() {
        migrate_step(conn, from as i64, sql).map_err(|f| ctx.map(f))?;
    }
    Ok(())
}

fn migrate_step(conn: &mut Connection, from: i64, sql: &str) -> Result<(), Failure> {
    let tx = conn.transaction_with_behavior(TransactionBehavior::Immediate)?;
    // Another process may have migrated while this one waited for the lock.
    let now: i64 = tx.pragma_query_value(None, "user_version", |r| r.get(0))?;
    if now > from {
        return Ok(());
    }
    tx.execute_batch(sql)?;
    tx.pragma_update(None, "application_id", APPLICATION_ID)?;
    tx.pragma_update(None, "user_version", from + 1)?;
    tx.commit()?;
    Ok(())
}
