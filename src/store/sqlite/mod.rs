//! The embedded store: one SQLite file in write-ahead-log mode.
//!
//! One writer connection and one query-only reader connection, each behind a mutex, so
//! lists and figures never wait for a batch being written. Every write is one
//! `BEGIN IMMEDIATE` transaction (the write lock is taken up front, waiting at most the
//! busy timeout), run with `synchronous = FULL` when the call promises durability (holds,
//! reports, releases, deletions) and `NORMAL` otherwise (journal batches, claims, purges).
//! Other processes (the command line next to the daemon) open the same file; SQLite's own
//! locking keeps them consistent, and the claim for release relies on it: the
//! `UPDATE … WHERE state = held` of the winner makes every other claim change no row.

mod fail;
mod open;
pub mod schema;
mod views;

use std::collections::HashMap;
use std::path::{Path, PathBuf};
use std::sync::{Mutex, MutexGuard, PoisonError};

use rusqlite::types::Value;
use rusqlite::{Connection, OptionalExtension, Transaction, TransactionBehavior, params};
use sha2::{Digest, Sha256};

use self::fail::{Ctx, Failure};
use super::blob;
use super::figures::{self, ActionCount, DomainFigures, Evidence, UnmatchedCount};
use super::record::{
    AuditItem, Claim, DomainOutcome, HeldFilter, HeldMessage, HeldState, HeldSummary, HeldTotals,
    Hold, HoldOutcome, JournalEntry, MessageKey, NewReport, PurgeCounts, ReleaseOutcome,
    ReportKind, ReportReceipt, ReportSource, ReportStatus, ReportTally, StoredReport, UnixTime,
    now,
};
use super::views::{Buckets, DomainHeld, MarginBins, MarginHistogram, VolumeBucket};
use super::{DAY, Store, StoreError, StoreOptions, sample};
use crate::policy::{Action, domain};

/// Rows deleted per transaction by a purge, so a large purge never holds the write lock
/// for long (a hold waiting behind it would delay a verdict).
const PURGE_CHUNK: i64 = 2000;
/// Longest verdict id accepted.
const MAX_VERDICT_ID: usize = 64;

/// A store in one SQLite file.
pub struct SqliteStore {
    path: PathBuf,
    /// The device and inode of the file when it was opened: a write is confirmed only
    /// while the path still names this file (see [`SqliteStore::check_in_place`]).
    identity: (u64, u64),
    options: StoreOptions,
    writer: Mutex<Writer>,
    reader: Mutex<Connection>,
}

impl std::fmt::Debug for SqliteStore {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("SqliteStore")
            .field("path", &self.path)
            .field("options", &self.options)
            .finish_non_exhaustive()
    }
}

struct Writer {
    conn: Connection,
    /// Whether `synchronous = FULL` is in force on the connection.
    full_sync: bool,
}

fn lock<T>(mutex: &Mutex<T>) -> MutexGuard<'_, T> {
    // A panic while holding the lock left a transaction that rusqlite rolled back when it
    // was dropped; the connection itself is still sound.
    mutex.lock().unwrap_or_else(PoisonError::into_inner)
}

impl SqliteStore {
    /// Opens the store at `path`, creating the file (mode 0600) if it does not exist, and
    /// brings its schema up to date. Refuses a symbolic link or non-file, a read-only
    /// file, a file that is not a tamis store, and a store of a newer schema.
    pub fn open(path: &Path, options: StoreOptions) -> Result<SqliteStore, StoreError> {
        open::prepare_file(path)?;
        let writer = open::connect(path, options.busy_timeout, true)?;
        let reader = open::connect(path, options.busy_timeout, false)?;
        let identity = file_identity(path).map_err(|e| StoreError::Io {
            path: path.to_path_buf(),
            operation: "open the store",
            detail: e.to_string(),
        })?;
        Ok(SqliteStore {
            path: path.to_path_buf(),
            identity,
            options,
            writer: Mutex::new(Writer {
                conn: writer,
                full_sync: false,
            }),
            reader: Mutex::new(reader),
        })
    }

    /// The options the store was opened with.
    pub fn options(&self) -> &StoreOptions {
        &self.options
    }

    /// SQLite's own consistency check (`PRAGMA integrity_check`): an empty list when it
    /// answers "ok", else its findings.
    pub fn integrity_check(&self) -> Result<Vec<String>, StoreError> {
        self.read("check the store's integrity", |tx| {
            let mut stmt = tx.prepare("PRAGMA integrity_check")?;
            let rows = stmt.query_map([], |r| r.get::<_, String>(0))?;
            let mut found = Vec::new();
            for row in rows {
                let line = row?;
                if line != "ok" {
                    found.push(line);
                }
            }
            Ok(found)
        })
    }

    /// Fails with [`StoreError::Gone`] unless the store path still names the file that
    /// was opened. SQLite goes on writing to a file that was deleted or renamed (its
    /// descriptors stay valid), so without this check a hold committed after an operator
    /// removed the store folder would be confirmed and then lost when the process exits.
    fn check_in_place(&self, operation: &'static str) -> Result<(), StoreError> {
        let gone = |detail: String| StoreError::Gone {
            path: self.path.clone(),
            detail: format!("{detail} while trying to {operation}"),
        };
        match file_identity(&self.path) {
            Ok(identity) if identity == self.identity => Ok(()),
            Ok(_) => Err(gone("another file now has its name".to_string())),
            Err(e) if e.kind() == std::io::ErrorKind::NotFound => {
                Err(gone("the file or its folder no longer exists".to_string()))
            }
            Err(e) => Err(gone(format!("it can no longer be looked up: {e}"))),
        }
    }

    fn ctx(&self, operation: &'static str) -> Ctx<'_> {
        Ctx {
            path: &self.path,
            operation,
            busy_timeout: self.options.busy_timeout,
        }
    }

    /// Runs `f` in one write transaction, flushed to disk at commit when `durable`.
    fn write<T>(
        &self,
        operation: &'static str,
        durable: bool,
        f: impl FnOnce(&Transaction<'_>, Ctx<'_>) -> Result<T, Failure>,
    ) -> Result<T, StoreError> {
        let ctx = self.ctx(operation);
        let mut guard = lock(&self.writer);
        let writer = &mut *guard;
        if writer.full_sync != durable {
            let level = if durable { "FULL" } else { "NORMAL" };
            writer
                .conn
                .pragma_update(None, "synchronous", level)
                .map_err(|e| ctx.sql(e))?;
            writer.full_sync = durable;
        }
        let tx = writer
            .conn
            .transaction_with_behavior(TransactionBehavior::Immediate)
            .map_err(|e| ctx.sql(e))?;
        let out = f(&tx, ctx).map_err(|e| ctx.map(e))?;
        tx.commit().map_err(|e| ctx.sql(e))?;
        drop(guard);
        // After the commit: a file removed before or during it took the write with it.
        self.check_in_place(operation)?;
        Ok(out)
    }

    /// Runs `f` in one read transaction (a consistent snapshot).
    fn read<T>(
        &self,
        operation: &'static str,
        f: impl FnOnce(&Transaction<'_>) -> Result<T, Failure>,
    ) -> Result<T, StoreError> {
        let ctx = self.ctx(operation);
        let mut guard = lock(&self.reader);
        let tx = guard.transaction().map_err(|e| ctx.sql(e))?;
        f(&tx).map_err(|e| ctx.map(e))
    }

    /// Like [`SqliteStore::read`], for reads that decode records and so need the context.
    fn read_ctx<T>(
        &self,
        operation: &'static str,
        f: impl FnOnce(&Transaction<'_>, Ctx<'_>) -> Result<T, Failure>,
    ) -> Result<T, StoreError> {
        let ctx = self.ctx(operation);
        self.read(operation, |tx| f(tx, ctx))
    }

    /// Deletes rows chunk by chunk, each chunk its own transaction. `select` returns up to
    /// `?2` ids with `?1` as its bound; `delete` removes rows whose id is in `?1`'s list.
    fn purge_in_chunks(
        &self,
        operation: &'static str,
        select: &str,
        table: &str,
        bound: i64,
    ) -> Result<u64, StoreError> {
        let delete = format!("DELETE FROM {table} WHERE id IN ({select})");
        let mut total = 0u64;
        loop {
            let n = self.write(operation, false, |tx, _| {
                Ok(tx.execute(&delete, params![bound, PURGE_CHUNK])?)
            })?;
            total += n as u64;
            if (n as i64) < PURGE_CHUNK {
                return Ok(total);
            }
        }
    }
}

/// A hold checked, compressed and hashed, ready for its transaction.
struct PreparedHold<'a> {
    entry: &'a JournalEntry,
    hold: &'a Hold<'a>,
    stored: Vec<u8>,
    key: Vec<u8>,
    recipients: String,
    expires_at: i64,
}

impl SqliteStore {
    /// Checks a hold and does its CPU work (compression, hashing) before any lock.
    fn prepare_hold<'a>(
        &self,
        entry: &'a JournalEntry,
        hold: &'a Hold<'a>,
    ) -> Result<PreparedHold<'a>, StoreError> {
        let ctx = self.ctx("hold a message");
        check_entry(entry).map_err(|e| ctx.invalid(e))?;
        if hold.recipients.is_empty() {
            return Err(ctx.invalid(format!(
                "verdict {} holds no recipient; give the recipients whose copy is held",
                entry.verdict_id
            )));
        }
        Ok(PreparedHold {
            entry,
            hold,
            stored: blob::compress(hold.message),
            key: content_key(hold),
            recipients: serde_json::to_string(hold.recipients).unwrap_or_else(|_| "[]".to_string()),
            expires_at: entry
                .at
                .saturating_add(i64::from(self.options.quarantine_days) * DAY),
        })
    }
}

/// Writes one hold inside a transaction: nothing when the same message is already held
/// under another verdict.
fn write_hold(
    tx: &Connection,
    ctx: Ctx<'_>,
    p: &PreparedHold<'_>,
    record_subject: bool,
) -> Result<HoldOutcome, Failure> {
    let (entry, hold) = (p.entry, p.hold);
    let earlier: Option<String> = tx
        .prepare_cached(
            "SELECT j.verdict_id FROM held h JOIN journal j ON j.id = h.journal_id
             WHERE h.content_key = ?1 AND h.state = ?2 AND j.verdict_id != ?3 LIMIT 1",
        )?
        .query_row(
            params![p.key, HeldState::Held.code(), entry.verdict_id],
            |r| r.get(0),
        )
        .optional()?;
    if let Some(verdict_id) = earlier {
        return Ok(HoldOutcome::AlreadyHeld { verdict_id });
    }
    let mut models = HashMap::new();
    let journal = match insert_entry(tx, ctx, entry, record_subject, &mut models)? {
        Some(id) => id,
        None => journal_id(tx, &entry.verdict_id)?
            .ok_or_else(|| ctx.damaged("a journal entry vanished inside its transaction"))?,
    };
    let inserted = tx
        .prepare_cached(
            "INSERT INTO held (journal_id, held_at, expires_at, state, state_at, sender, recipients, size, stored_size, content_key)
             VALUES (?1, ?2, ?3, ?4, ?2, ?5, ?6, ?7, ?8, ?9)
             ON CONFLICT (journal_id) DO NOTHING",
        )?
        .execute(params![
            journal,
            entry.at,
            p.expires_at,
            HeldState::Held.code(),
            hold.sender,
            p.recipients,
            to_i64(hold.message.len() as u64, "message size", ctx)?,
            to_i64(p.stored.len() as u64, "stored size", ctx)?,
            p.key,
        ])?;
    if inserted == 1 {
        let held_id = tx.last_insert_rowid();
        tx.prepare_cached("INSERT INTO held_content (held_id, content) VALUES (?1, ?2)")?
            .execute(params![held_id, p.stored])?;
    }
    Ok(HoldOutcome::Held)
}

/// The device and inode number of the file at `path`, following no symbolic link.
fn file_identity(path: &Path) -> std::io::Result<(u64, u64)> {
    use std::os::unix::fs::MetadataExt;
    let meta = std::fs::symlink_metadata(path)?;
    Ok((meta.dev(), meta.ino()))
}

// --- Encoding helpers ----------------------------------------------------------------------

fn action_code(action: Action) -> i64 {
    i64::from(action.to_u8())
}

fn action_of(code: i64, ctx: Ctx<'_>) -> Result<Action, Failure> {
    u8::try_from(code)
        .ok()
        .and_then(Action::from_u8)
        .ok_or_else(|| ctx.damaged(format!("unknown action code {code}")))
}

fn to_i64(value: u64, what: &str, ctx: Ctx<'_>) -> Result<i64, Failure> {
    i64::try_from(value)
        .map_err(|_| Failure::Store(ctx.invalid(format!("{what} {value} is too large"))))
}

fn to_u64(value: i64, what: &str, ctx: Ctx<'_>) -> Result<u64, Failure> {
    u64::try_from(value).map_err(|_| ctx.damaged(format!("negative {what} {value}")))
}

fn finite(value: Option<f64>) -> Option<f64> {
    value.filter(|v| v.is_finite())
}

fn check_verdict_id(id: &str) -> Result<(), String> {
    if id.is_empty() || id.len() > MAX_VERDICT_ID || !id.bytes().all(|b| b.is_ascii_graphic()) {
        return Err(format!(
            "the verdict id {id:?} is not 1 to {MAX_VERDICT_ID} printable ASCII characters"
        ));
    }
    Ok(())
}

fn check_entry(entry: &JournalEntry) -> Result<(), String> {
    check_verdict_id(&entry.verdict_id)?;
    let mut seen: Vec<String> = Vec::with_capacity(entry.outcomes.len());
    for outcome in &entry.outcomes {
        let name = domain::normalize(&outcome.domain);
        if seen.contains(&name) {
            return Err(format!(
                "verdict {} lists the domain {name:?} twice; give one outcome per domain (DomainOutcome::group)",
                entry.verdict_id
            ));
        }
        seen.push(name);
    }
    Ok(())
}

// --- Journal rows --------------------------------------------------------------------------

/// Inserts an entry; `None` when its verdict id is already in the journal.
fn insert_entry(
    tx: &Connection,
    ctx: Ctx<'_>,
    entry: &JournalEntry,
    record_subject: bool,
    models: &mut HashMap<String, i64>,
) -> Result<Option<i64>, Failure> {
    let model = match models.get(&entry.model) {
        Some(&id) => id,
        None => {
            tx.prepare_cached(
                "INSERT INTO model (name) VALUES (?1) ON CONFLICT (name) DO NOTHING",
            )?
            .execute([&entry.model])?;
            let id: i64 = tx
                .prepare_cached("SELECT id FROM model WHERE name = ?1")?
                .query_row([&entry.model], |r| r.get(0))?;
            models.insert(entry.model.clone(), id);
            id
        }
    };
    let reasons = serde_json::to_string(&entry.reasons).unwrap_or_else(|_| "[]".to_string());
    let subject = if record_subject {
        entry.subject.as_deref()
    } else {
        None
    };
    let inserted = tx
        .prepare_cached(
            "INSERT INTO journal (verdict_id, at, model_id, margin, probability, size, sender_domain, reasons, scanned, subject, message_key)
             VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8, ?9, ?10, ?11)
             ON CONFLICT (verdict_id) DO NOTHING",
        )?
        .execute(params![
            entry.verdict_id,
            entry.at,
            model,
            finite(entry.margin),
            finite(entry.probability),
            to_i64(entry.size, "message size", ctx)?,
            entry.sender_domain.as_deref().map(domain::normalize),
            reasons,
            entry.scanned,
            subject,
            entry.message_key.map(|k| k.0.to_vec()),
        ])?;
    if inserted == 0 {
        return Ok(None);
    }
    let id = tx.last_insert_rowid();
    let mut stmt = tx.prepare_cached(
        "INSERT INTO journal_domain (journal_id, ord, domain, at, action, enforced, scanned, recipients)
         VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8)",
    )?;
    for (ord, outcome) in entry.outcomes.iter().enumerate() {
        stmt.execute(params![
            id,
            ord as i64,
            domain::normalize(&outcome.domain),
            entry.at,
            action_code(outcome.action),
            action_code(outcome.enforced),
            entry.scanned,
            i64::from(outcome.recipients),
        ])?;
    }
    Ok(Some(id))
}

fn journal_id(tx: &Connection, verdict_id: &str) -> rusqlite::Result<Option<i64>> {
    tx.prepare_cached("SELECT id FROM journal WHERE verdict_id = ?1")?
        .query_row([verdict_id], |r| r.get(0))
        .optional()
}

fn load_entry(tx: &Connection, ctx: Ctx<'_>, id: i64) -> Result<JournalEntry, Failure> {
    type Raw = (
        String,
        i64,
        String,
        Option<f64>,
        Option<f64>,
        i64,
        Option<String>,
        String,
        bool,
        Option<String>,
        Option<Vec<u8>>,
    );
    let raw: Raw = tx
        .prepare_cached(
            "SELECT j.verdict_id, j.at, m.name, j.margin, j.probability, j.size, j.sender_domain,
                    j.reasons, j.scanned, j.subject, j.message_key
             FROM journal j JOIN model m ON m.id = j.model_id WHERE j.id = ?1",
        )?
        .query_row([id], |r| {
            Ok((
                r.get(0)?,
                r.get(1)?,
                r.get(2)?,
                r.get(3)?,
                r.get(4)?,
                r.get(5)?,
                r.get(6)?,
                r.get(7)?,
                r.get(8)?,
                r.get(9)?,
                r.get(10)?,
            ))
        })?;
    let (
        verdict_id,
        at,
        model,
        margin,
        probability,
        size,
        sender_domain,
        reasons,
        scanned,
        subject,
        key,
    ) = raw;
    let reasons: Vec<String> = serde_json::from_str(&reasons)
        .map_err(|e| ctx.damaged(format!("reasons of verdict {verdict_id}: {e}")))?;
    let message_key = match key {
        None => None,
        Some(bytes) => Some(MessageKey(bytes.try_into().map_err(|_| {
            ctx.damaged(format!(
                "message key of verdict {verdict_id} is not 16 bytes"
            ))
        })?)),
    };
    let mut outcomes = Vec::new();
    let mut stmt = tx.prepare_cached(
        "SELECT domain, recipients, action, enforced FROM journal_domain WHERE journal_id = ?1 ORDER BY ord",
    )?;
    let mut rows = stmt.query([id])?;
    while let Some(row) = rows.next()? {
        let recipients: i64 = row.get(1)?;
        outcomes.push(DomainOutcome {
            domain: row.get(0)?,
            recipients: u32::try_from(recipients)
                .map_err(|_| ctx.damaged(format!("recipient count {recipients}")))?,
            action: action_of(row.get(2)?, ctx)?,
            enforced: action_of(row.get(3)?, ctx)?,
        });
    }
    Ok(JournalEntry {
        verdict_id,
        at,
        model,
        margin,
        probability,
        outcomes,
        size: to_u64(size, "message size", ctx)?,
        sender_domain,
        reasons,
        scanned,
        subject,
        message_key,
    })
}

// --- Held rows -----------------------------------------------------------------------------

const HELD_COLUMNS: &str = "h.id, h.journal_id, h.held_at, h.expires_at, h.state, h.sender, h.recipients, h.size, h.stored_size";

/// The columns of [`HELD_COLUMNS`], before the journal entry is attached.
struct HeldRow {
    id: i64,
    journal_id: i64,
    held_at: i64,
    expires_at: i64,
    state: i64,
    sender: String,
    recipients: String,
    size: i64,
    stored_size: i64,
}

impl HeldRow {
    fn from_row(r: &rusqlite::Row<'_>) -> rusqlite::Result<HeldRow> {
        Ok(HeldRow {
            id: r.get(0)?,
            journal_id: r.get(1)?,
            held_at: r.get(2)?,
            expires_at: r.get(3)?,
            state: r.get(4)?,
            sender: r.get(5)?,
            recipients: r.get(6)?,
            size: r.get(7)?,
            stored_size: r.get(8)?,
        })
    }

    fn summary(self, tx: &Connection, ctx: Ctx<'_>) -> Result<HeldSummary, Failure> {
        let entry = load_entry(tx, ctx, self.journal_id)?;
        let recipients: Vec<String> = serde_json::from_str(&self.recipients).map_err(|e| {
            ctx.damaged(format!(
                "recipients of held verdict {}: {e}",
                entry.verdict_id
            ))
        })?;
        Ok(HeldSummary {
            held_at: self.held_at,
            expires_at: self.expires_at,
            state: HeldState::from_code(self.state)
                .ok_or_else(|| ctx.damaged(format!("unknown held state {}", self.state)))?,
            sender: self.sender,
            recipients,
            size: to_u64(self.size, "held size", ctx)?,
            stored_size: to_u64(self.stored_size, "stored size", ctx)?,
            entry,
        })
    }
}

fn held_row(tx: &Connection, verdict_id: &str) -> rusqlite::Result<Option<HeldRow>> {
    tx.prepare_cached(&format!(
        "SELECT {HELD_COLUMNS} FROM held h JOIN journal j ON j.id = h.journal_id WHERE j.verdict_id = ?1"
    ))?
    .query_row([verdict_id], HeldRow::from_row)
    .optional()
}

fn held_message(tx: &Connection, ctx: Ctx<'_>, row: HeldRow) -> Result<HeldMessage, Failure> {
    let held_id = row.id;
    let summary = row.summary(tx, ctx)?;
    let stored: Vec<u8> = tx
        .prepare_cached("SELECT content FROM held_content WHERE held_id = ?1")?
        .query_row([held_id], |r| r.get(0))?;
    let message = blob::decompress(&stored, summary.size)
        .map_err(|e| ctx.damaged(format!("held message {}: {e}", summary.entry.verdict_id)))?;
    Ok(HeldMessage { summary, message })
}

/// SHA-256 over the envelope and bytes, each part length-prefixed: the same message handed
/// over again gives the same key.
fn content_key(hold: &Hold<'_>) -> Vec<u8> {
    let mut hasher = Sha256::new();
    let mut part = |bytes: &[u8]| {
        hasher.update((bytes.len() as u64).to_le_bytes());
        hasher.update(bytes);
    };
    part(hold.sender.as_bytes());
    part(&(hold.recipients.len() as u64).to_le_bytes());
    for recipient in hold.recipients {
        part(recipient.as_bytes());
    }
    part(hold.message);
    hasher.finalize().to_vec()
}

// --- Reports -------------------------------------------------------------------------------

fn insert_report(
    tx: &Connection,
    report: &NewReport,
    journal: Option<i64>,
    domain: Option<&str>,
    status: ReportStatus,
) -> rusqlite::Result<i64> {
    tx.prepare_cached(
        "INSERT INTO report (verdict_id, journal_id, kind, source, domain, at, status, features)
         VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8)",
    )?
    .execute(params![
        report.verdict_id,
        journal,
        report.kind.code(),
        report.source.code(),
        domain,
        report.at,
        status.code(),
        report.features.as_ref().map(blob::encode_vector),
    ])?;
    Ok(tx.last_insert_rowid())
}

impl Store for SqliteStore {
    fn location(&self) -> &Path {
        &self.path
    }

    fn record(&self, entries: &[JournalEntry]) -> Result<(), StoreError> {
        let ctx = self.ctx("write journal entries");
        for entry in entries {
            check_entry(entry).map_err(|e| ctx.invalid(e))?;
        }
        let record_subject = self.options.record_subject;
        self.write("write journal entries", false, |tx, ctx| {
            let mut models = HashMap::new();
            for entry in entries {
                insert_entry(tx, ctx, entry, record_subject, &mut models)?;
            }
            Ok(())
        })
    }

    fn journal_entry(&self, verdict_id: &str) -> Result<Option<JournalEntry>, StoreError> {
        self.read_ctx("read a journal entry", |tx, ctx| {
            match journal_id(tx, verdict_id)? {
                Some(id) => Ok(Some(load_entry(tx, ctx, id)?)),
                None => Ok(None),
            }
        })
    }

    fn find_verdict(&self, key: &MessageKey, domain: &str) -> Result<Option<String>, StoreError> {
        let domain = domain::normalize(domain);
        self.read("find a verdict by Message-ID", |tx| {
            Ok(tx
                .prepare_cached(
                    "SELECT j.verdict_id FROM journal j
                     JOIN journal_domain d ON d.journal_id = j.id
                     WHERE j.message_key = ?1 AND d.domain = ?2
                     ORDER BY j.at DESC, j.id DESC LIMIT 1",
                )?
                .query_row(params![key.0.to_vec(), domain], |r| r.get(0))
                .optional()?)
        })
    }

    fn hold(&self, entry: &JournalEntry, hold: &Hold<'_>) -> Result<HoldOutcome, StoreError> {
        let prepared = self.prepare_hold(entry, hold)?;
        let record_subject = self.options.record_subject;
        self.write("hold a message", true, |tx, ctx| {
            write_hold(tx, ctx, &prepared, record_subject)
        })
    }

    fn list_held(&self, filter: &HeldFilter) -> Result<Vec<HeldSummary>, StoreError> {
        let mut sql = format!(
            "SELECT {HELD_COLUMNS} FROM held h JOIN journal j ON j.id = h.journal_id WHERE h.state = ?1"
        );
        let mut values = vec![Value::Integer(filter.state.code())];
        let mut bind = |sql: &mut String, clause: &str, value: Value| {
            values.push(value);
            sql.push_str(&clause.replace('?', &format!("?{}", values.len())));
        };
        if let Some(d) = &filter.domain {
            bind(
                &mut sql,
                " AND EXISTS (SELECT 1 FROM journal_domain d WHERE d.journal_id = h.journal_id AND d.domain = ? AND d.action = 2)",
                Value::Text(domain::normalize(d)),
            );
        }
        if let Some(since) = filter.since {
            bind(&mut sql, " AND h.held_at >= ?", Value::Integer(since));
        }
        if let Some(until) = filter.until {
            bind(&mut sql, " AND h.held_at < ?", Value::Integer(until));
        }
        if let Some(min) = filter.min_margin {
            bind(&mut sql, " AND j.margin >= ?", Value::Real(min));
        }
        if let Some(max) = filter.max_margin {
            bind(&mut sql, " AND j.margin <= ?", Value::Real(max));
        }
        bind(
            &mut sql,
            " ORDER BY h.held_at DESC, h.id DESC LIMIT ?",
            Value::Integer(i64::from(filter.limit)),
        );
        let offset = i64::try_from(filter.offset).unwrap_or(i64::MAX);
        bind(&mut sql, " OFFSET ?", Value::Integer(offset));
        self.read_ctx("list held messages", |tx, ctx| {
            let mut stmt = tx.prepare(&sql)?;
            let rows: Vec<HeldRow> = stmt
                .query_map(rusqlite::params_from_iter(values.iter()), HeldRow::from_row)?
                .collect::<rusqlite::Result<_>>()?;
            rows.into_iter().map(|row| row.summary(tx, ctx)).collect()
        })
    }

    fn get_held(&self, verdict_id: &str) -> Result<Option<HeldMessage>, StoreError> {
        self.read_ctx("read a held message", |tx, ctx| {
            match held_row(tx, verdict_id)? {
                Some(row) => Ok(Some(held_message(tx, ctx, row)?)),
                None => Ok(None),
            }
        })
    }

    fn claim_release(&self, verdict_id: &str) -> Result<Claim, StoreError> {
        self.write("claim a held message for release", false, |tx, ctx| {
            let claimed = tx
                .prepare_cached(
                    "UPDATE held SET state = ?1, state_at = ?2
                     WHERE state = ?3 AND journal_id = (SELECT id FROM journal WHERE verdict_id = ?4)",
                )?
                .execute(params![
                    HeldState::Releasing.code(),
                    now(),
                    HeldState::Held.code(),
                    verdict_id
                ])?;
            let Some(row) = held_row(tx, verdict_id)? else {
                return Ok(Claim::NotFound);
            };
            if claimed == 1 {
                // An error here (a damaged copy) rolls the claim back with the transaction.
                return Ok(Claim::Won(Box::new(held_message(tx, ctx, row)?)));
            }
            Ok(match HeldState::from_code(row.state) {
                Some(HeldState::Released) => Claim::AlreadyReleased,
                _ => Claim::InProgress,
            })
        })
    }

    fn finish_release(
        &self,
        verdict_id: &str,
        outcome: &ReleaseOutcome,
    ) -> Result<bool, StoreError> {
        self.write("finish a release", true, |tx, _| {
            let Some(row) = held_row(tx, verdict_id)? else {
                return Ok(false);
            };
            if row.state != HeldState::Releasing.code() {
                return Ok(false);
            }
            match outcome {
                ReleaseOutcome::Failed => {
                    tx.prepare_cached("UPDATE held SET state = ?1, state_at = ?2 WHERE id = ?3")?
                        .execute(params![HeldState::Held.code(), now(), row.id])?;
                }
                ReleaseOutcome::Delivered { at, features } => {
                    tx.prepare_cached("UPDATE held SET state = ?1, state_at = ?2 WHERE id = ?3")?
                        .execute(params![HeldState::Released.code(), at, row.id])?;
                    let report = NewReport {
                        verdict_id: verdict_id.to_string(),
                        kind: ReportKind::NotJunk,
                        source: ReportSource::Release,
                        domain: None,
                        at: *at,
                        features: features.clone(),
                    };
                    insert_report(
                        tx,
                        &report,
                        Some(row.journal_id),
                        None,
                        ReportStatus::Matched,
                    )?;
                }
            }
            Ok(true)
        })
    }

    fn reset_stale_claims(&self, claimed_before: UnixTime) -> Result<u64, StoreError> {
        self.write("reset stale release claims", true, |tx, _| {
            let n = tx
                .prepare_cached(
                    "UPDATE held SET state = ?1, state_at = ?2 WHERE state = ?3 AND state_at < ?4",
                )?
                .execute(params![
                    HeldState::Held.code(),
                    now(),
                    HeldState::Releasing.code(),
                    claimed_before
                ])?;
            Ok(n as u64)
        })
    }

    fn delete_held(&self, verdict_id: &str) -> Result<bool, StoreError> {
        self.write("delete a held message", true, |tx, _| {
            let n = tx
                .prepare_cached(
                    "DELETE FROM held WHERE state != ?1 AND journal_id = (SELECT id FROM journal WHERE verdict_id = ?2)",
                )?
                .execute(params![HeldState::Releasing.code(), verdict_id])?;
            Ok(n == 1)
        })
    }

    fn held_totals(&self) -> Result<HeldTotals, StoreError> {
        self.read("count held messages", |tx| {
            let (messages, bytes, stored): (i64, i64, i64) = tx
                .prepare_cached(
                    "SELECT count(*), coalesce(sum(size), 0), coalesce(sum(stored_size), 0) FROM held WHERE state = ?1",
                )?
                .query_row([HeldState::Held.code()], |r| Ok((r.get(0)?, r.get(1)?, r.get(2)?)))?;
            Ok(HeldTotals {
                messages: messages.max(0) as u64,
                bytes: bytes.max(0) as u64,
                stored_bytes: stored.max(0) as u64,
            })
        })
    }

    fn audit_sample(
        &self,
        domain_name: &str,
        since: UnixTime,
        size: usize,
        seed: u64,
    ) -> Result<Vec<AuditItem>, StoreError> {
        let domain_name = domain::normalize(domain_name);
        self.read_ctx("draw the audit sample", |tx, ctx| {
            let candidates: Vec<String> = tx
                .prepare_cached(
                    "SELECT j.verdict_id FROM journal_domain d
                     JOIN held h ON h.journal_id = d.journal_id
                     JOIN journal j ON j.id = d.journal_id
                     WHERE d.domain = ?1 AND d.action = ?2 AND d.at >= ?3",
                )?
                .query_map(
                    params![domain_name, action_code(Action::Quarantine), since],
                    |r| r.get(0),
                )?
                .collect::<rusqlite::Result<_>>()?;
            let mut items = Vec::new();
            for verdict_id in sample::choose(&candidates, size, seed) {
                let Some(row) = held_row(tx, verdict_id)? else {
                    continue;
                };
                let journal = row.journal_id;
                let held = row.summary(tx, ctx)?;
                let reviewed: Option<i64> = tx
                    .prepare_cached(
                        "SELECT kind FROM report WHERE journal_id = ?1 AND source = ?2 AND status = ?3
                         AND (domain IS NULL OR domain = ?4) ORDER BY id DESC LIMIT 1",
                    )?
                    .query_row(
                        params![
                            journal,
                            ReportSource::Audit.code(),
                            ReportStatus::Matched.code(),
                            domain_name
                        ],
                        |r| r.get(0),
                    )
                    .optional()?;
                let reviewed = match reviewed {
                    None => None,
                    Some(code) => Some(
                        ReportKind::from_code(code)
                            .ok_or_else(|| ctx.damaged(format!("unknown report kind {code}")))?,
                    ),
                };
                items.push(AuditItem { held, reviewed });
            }
            Ok(items)
        })
    }

    fn report(&self, report: &NewReport) -> Result<ReportReceipt, StoreError> {
        let ctx = self.ctx("record a report");
        if report.verdict_id.is_empty() || report.verdict_id.len() > 256 {
            return Err(ctx.invalid("the verdict id is empty or longer than 256 bytes"));
        }
        let reporter = report.domain.as_deref().map(domain::normalize);
        self.write("record a report", true, |tx, _| {
            let journal = journal_id(tx, &report.verdict_id)?;
            let status = match (journal, &reporter) {
                (None, _) => ReportStatus::UnknownVerdict,
                (Some(_), None) if report.source == ReportSource::User => {
                    ReportStatus::NoReporterDomain
                }
                (Some(id), Some(d)) => {
                    let has: bool = tx
                        .prepare_cached(
                            "SELECT EXISTS (SELECT 1 FROM journal_domain WHERE journal_id = ?1 AND domain = ?2)",
                        )?
                        .query_row(params![id, d], |r| r.get(0))?;
                    if has {
                        ReportStatus::Matched
                    } else {
                        ReportStatus::DomainMismatch
                    }
                }
                (Some(_), None) => ReportStatus::Matched,
            };
            let linked = if status.is_matched() { journal } else { None };
            let id = insert_report(tx, report, linked, reporter.as_deref(), status)?;
            Ok(ReportReceipt { id, status })
        })
    }

    fn reports(&self, since: UnixTime, limit: u32) -> Result<Vec<StoredReport>, StoreError> {
        self.read_ctx("read reports", |tx, ctx| {
            let mut stmt = tx.prepare_cached(
                "SELECT id, verdict_id, kind, source, domain, at, status, features FROM report
                 WHERE at >= ?1 ORDER BY id LIMIT ?2",
            )?;
            let mut rows = stmt.query(params![since, i64::from(limit)])?;
            let mut out = Vec::new();
            while let Some(r) = rows.next()? {
                let kind: i64 = r.get(2)?;
                let source: i64 = r.get(3)?;
                let status: i64 = r.get(6)?;
                let features: Option<Vec<u8>> = r.get(7)?;
                let id: i64 = r.get(0)?;
                out.push(StoredReport {
                    id,
                    verdict_id: r.get(1)?,
                    kind: ReportKind::from_code(kind)
                        .ok_or_else(|| ctx.damaged(format!("report {id}: kind {kind}")))?,
                    source: ReportSource::from_code(source)
                        .ok_or_else(|| ctx.damaged(format!("report {id}: source {source}")))?,
                    domain: r.get(4)?,
                    at: r.get(5)?,
                    status: ReportStatus::from_code(status)
                        .ok_or_else(|| ctx.damaged(format!("report {id}: status {status}")))?,
                    features: match features {
                        None => None,
                        Some(b) => Some(
                            blob::decode_vector(&b)
                                .map_err(|e| ctx.damaged(format!("report {id}: {e}")))?,
                        ),
                    },
                });
            }
            Ok(out)
        })
    }

    fn figures(
        &self,
        since: UnixTime,
        only: Option<&str>,
    ) -> Result<Vec<DomainFigures>, StoreError> {
        let only = only.map(domain::normalize);
        let (domain_clause, domain_param) = match &only {
            Some(d) => (" AND d.domain = ?2", Value::Text(d.clone())),
            // Always true, so both forms take two parameters.
            None => (" AND ?2 IS NULL", Value::Null),
        };
        let counts_sql = format!(
            "SELECT d.domain, d.action, d.enforced, d.scanned, count(*) FROM journal_domain d
             WHERE d.at >= ?1{domain_clause} GROUP BY d.domain, d.action, d.enforced, d.scanned"
        );
        let evidence_sql = format!(
            "SELECT d.domain, d.journal_id, d.action, d.enforced, r.kind, r.source, r.id
             FROM report r JOIN journal_domain d ON d.journal_id = r.journal_id
             WHERE r.status = 0 AND d.at >= ?1 AND (r.domain IS NULL OR r.domain = d.domain){domain_clause}"
        );
        let unmatched_sql = format!(
            "SELECT d.domain, count(*) FROM report d
             WHERE d.status != 0 AND d.at >= ?1 AND d.domain IS NOT NULL{domain_clause} GROUP BY d.domain"
        );
        let mut out = self.read_ctx("compute the figures", |tx, ctx| {
            let args = params![since, domain_param];
            let mut counts = Vec::new();
            let mut stmt = tx.prepare_cached(&counts_sql)?;
            let mut rows = stmt.query(args)?;
            while let Some(r) = rows.next()? {
                counts.push(ActionCount {
                    domain: r.get(0)?,
                    action: action_of(r.get(1)?, ctx)?,
                    enforced: action_of(r.get(2)?, ctx)?,
                    scanned: r.get(3)?,
                    messages: to_u64(r.get(4)?, "count", ctx)?,
                });
            }
            let mut evidence = Vec::new();
            let mut stmt = tx.prepare_cached(&evidence_sql)?;
            let mut rows = stmt.query(args)?;
            while let Some(r) = rows.next()? {
                let kind: i64 = r.get(4)?;
                let source: i64 = r.get(5)?;
                evidence.push(Evidence {
                    domain: r.get(0)?,
                    message: r.get(1)?,
                    action: action_of(r.get(2)?, ctx)?,
                    enforced: action_of(r.get(3)?, ctx)?,
                    kind: ReportKind::from_code(kind)
                        .ok_or_else(|| ctx.damaged(format!("report kind {kind}")))?,
                    source: ReportSource::from_code(source)
                        .ok_or_else(|| ctx.damaged(format!("report source {source}")))?,
                    order: r.get(6)?,
                });
            }
            let mut unmatched = Vec::new();
            let mut stmt = tx.prepare_cached(&unmatched_sql)?;
            let mut rows = stmt.query(args)?;
            while let Some(r) = rows.next()? {
                unmatched.push(UnmatchedCount {
                    domain: r.get(0)?,
                    reports: to_u64(r.get(1)?, "count", ctx)?,
                });
            }
            Ok(figures::compute(since, &counts, &evidence, &unmatched))
        })?;
        if let Some(d) = only
            && out.is_empty()
        {
            out.push(DomainFigures::empty(&d, since));
        }
        Ok(out)
    }

    fn purge_expired(&self, now: UnixTime) -> Result<PurgeCounts, StoreError> {
        let held = self.purge_in_chunks(
            "purge expired held messages",
            "SELECT id FROM held WHERE expires_at <= ?1 AND state != 1 LIMIT ?2",
            "held",
            now,
        )?;
        let cutoff = now.saturating_sub(i64::from(self.options.journal_days) * DAY);
        let journal = self.purge_in_chunks(
            "purge old journal entries",
            "SELECT id FROM journal WHERE at < ?1 AND id NOT IN (SELECT journal_id FROM held) LIMIT ?2",
            "journal",
            cutoff,
        )?;
        let reports = self.purge_in_chunks(
            "purge old reports",
            "SELECT id FROM report WHERE at < ?1 LIMIT ?2",
            "report",
            cutoff,
        )?;
        Ok(PurgeCounts {
            held,
            journal,
            reports,
        })
    }

    fn purge_held_before(&self, cutoff: UnixTime) -> Result<u64, StoreError> {
        self.purge_in_chunks(
            "purge held messages by age",
            "SELECT id FROM held WHERE held_at < ?1 AND state != 1 LIMIT ?2",
            "held",
            cutoff,
        )
    }

    fn volume(
        &self,
        domain_name: Option<&str>,
        buckets: &Buckets,
    ) -> Result<Vec<VolumeBucket>, StoreError> {
        let ctx = self.ctx("count verdicts over time");
        buckets.check().map_err(|e| ctx.invalid(e))?;
        let domain_name = domain_name.map(domain::normalize);
        self.read_ctx("count verdicts over time", |tx, ctx| {
            views::volume(tx, ctx, domain_name.as_deref(), buckets)
        })
    }

    fn reported_margins(
        &self,
        domain_name: &str,
        since: UnixTime,
        bins: &MarginBins,
    ) -> Result<MarginHistogram, StoreError> {
        let ctx = self.ctx("read the margins of reported mail");
        MarginBins::new(bins.low, bins.high, bins.count).map_err(|e| ctx.invalid(e))?;
        let domain_name = domain::normalize(domain_name);
        self.read_ctx("read the margins of reported mail", |tx, ctx| {
            views::reported_margins(tx, ctx, &domain_name, since, bins)
        })
    }

    fn held_by_domain(&self) -> Result<Vec<DomainHeld>, StoreError> {
        self.read_ctx("count held mail per domain", |tx, ctx| {
            views::held_by_domain(tx, ctx)
        })
    }

    fn held_head(&self, verdict_id: &str, max_bytes: usize) -> Result<Option<Vec<u8>>, StoreError> {
        self.read_ctx("read the start of a held message", |tx, ctx| {
            views::held_head(tx, ctx, verdict_id, max_bytes)
        })
    }

    fn last_report_id(&self) -> Result<i64, StoreError> {
        self.read("find the newest report", |tx| {
            Ok(tx
                .prepare_cached("SELECT coalesce(max(id), 0) FROM report")?
                .query_row([], |r| r.get(0))?)
        })
    }

    fn reports_after(&self, after: i64, limit: u32) -> Result<Vec<ReportTally>, StoreError> {
        self.read_ctx("read new reports", |tx, ctx| {
            // One row per report and domain it applies to; a report with none (unmatched,
            // or its verdict purged) still gives one row, with NULL domain columns.
            let mut stmt = tx.prepare_cached(
                "SELECT r.id, r.kind, r.source, r.status, d.domain, d.recipients, d.action, d.enforced
                 FROM report r
                 LEFT JOIN journal_domain d ON d.journal_id = r.journal_id AND r.status = 0
                      AND (r.domain IS NULL OR r.domain = d.domain)
                 WHERE r.id IN (SELECT id FROM report WHERE id > ?1 ORDER BY id LIMIT ?2)
                 ORDER BY r.id, d.ord",
            )?;
            let mut rows = stmt.query(params![after, i64::from(limit)])?;
            let mut out: Vec<ReportTally> = Vec::new();
            while let Some(r) = rows.next()? {
                let id: i64 = r.get(0)?;
                if out.last().is_none_or(|t| t.id != id) {
                    let (kind, source, status): (i64, i64, i64) = (r.get(1)?, r.get(2)?, r.get(3)?);
                    out.push(ReportTally {
                        id,
                        kind: ReportKind::from_code(kind)
                            .ok_or_else(|| ctx.damaged(format!("report {id}: kind {kind}")))?,
                        source: ReportSource::from_code(source)
                            .ok_or_else(|| ctx.damaged(format!("report {id}: source {source}")))?,
                        status: ReportStatus::from_code(status)
                            .ok_or_else(|| ctx.damaged(format!("report {id}: status {status}")))?,
                        outcomes: Vec::new(),
                    });
                }
                let domain: Option<String> = r.get(4)?;
                if let (Some(domain), Some(tally)) = (domain, out.last_mut()) {
                    let recipients: i64 = r.get(5)?;
                    tally.outcomes.push(DomainOutcome {
                        domain,
                        recipients: u32::try_from(recipients)
                            .map_err(|_| ctx.damaged(format!("recipient count {recipients}")))?,
                        action: action_of(r.get(6)?, ctx)?,
                        enforced: action_of(r.get(7)?, ctx)?,
                    });
                }
            }
            Ok(out)
        })
    }

    fn hold_all(
        &self,
        items: &[(&JournalEntry, &Hold<'_>)],
    ) -> Vec<Result<HoldOutcome, StoreError>> {
        // Checked, compressed and hashed first, outside the write lock.
        let prepared: Vec<Result<PreparedHold<'_>, StoreError>> = items
            .iter()
            .map(|(entry, hold)| self.prepare_hold(entry, hold))
            .collect();
        let record_subject = self.options.record_subject;
        let written = self.write("hold messages", true, |tx, ctx| {
            let mut out = Vec::with_capacity(prepared.len());
            for item in &prepared {
                let Ok(p) = item else {
                    out.push(None);
                    continue;
                };
                // A savepoint per message: one that cannot be kept costs only itself.
                tx.execute_batch("SAVEPOINT one_hold")?;
                match write_hold(tx, ctx, p, record_subject) {
                    Ok(outcome) => {
                        tx.execute_batch("RELEASE one_hold")?;
                        out.push(Some(Ok(outcome)));
                    }
                    Err(Failure::Store(
                        e @ (StoreError::Invalid { .. } | StoreError::DamagedRecord { .. }),
                    )) => {
                        tx.execute_batch("ROLLBACK TO one_hold; RELEASE one_hold")?;
                        out.push(Some(Err(e)));
                    }
                    Err(other) => return Err(other),
                }
            }
            Ok(out)
        });
        match written {
            Ok(results) => prepared
                .into_iter()
                .zip(results)
                .map(|(p, r)| match (p, r) {
                    (Err(e), _) => Err(e),
                    (Ok(_), Some(r)) => r,
                    (Ok(_), None) => Err(self.ctx("hold messages").invalid("no result")),
                })
                .collect(),
            // Too large together (a full disk, a file-size limit): each on its own, so the
            // ones that still fit are kept.
            Err(StoreError::Full { .. } | StoreError::Io { .. }) if items.len() > 1 => items
                .iter()
                .map(|(entry, hold)| self.hold(entry, hold))
                .collect(),
            Err(e) => prepared
                .into_iter()
                .map(|p| match p {
                    Err(own) => Err(own),
                    Ok(_) => Err(e.clone()),
                })
                .collect(),
        }
    }
}
