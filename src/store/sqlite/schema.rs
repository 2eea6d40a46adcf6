//! The SQLite schema and its migrations.
//!
//! `PRAGMA user_version` holds the schema version: 0 for a new file, `n` once the first
//! `n` migrations ran. Migrations only ever append: a released one is never edited, and a
//! change is a new migration. Each runs in its own write transaction together with the
//! version bump, so a store is always at exactly one version; a file from a newer
//! version is refused before anything is written. `PRAGMA application_id` marks the file
//! as a tamis store, so another program's database is refused rather than migrated.

/// `PRAGMA application_id` of a tamis store: "TAMS" in ASCII.
pub const APPLICATION_ID: i64 = 0x5441_4d53;

/// Migration `i` takes the schema from version `i` to `i + 1`.
pub const MIGRATIONS: &[&str] = &[V1];

/// The newest schema version this build writes.
pub const SCHEMA_VERSION: i64 = MIGRATIONS.len() as i64;

/// Version 1: journal (with one row per recipient domain), held messages (content in its
/// own table so listing never reads it), reports.
///
/// `journal_domain` repeats the verdict time and scan state so the per-domain figures are
/// answered from its one covering index alone, without touching `journal`. Indexes cost
/// every journal write, so there are no others: a domain is listed once per entry
/// (checked before writing), and figures over all domains scan the same index.
const V1: &str = "
CREATE TABLE model (
    id INTEGER PRIMARY KEY,
    name TEXT NOT NULL UNIQUE
);
CREATE TABLE journal (
    id INTEGER PRIMARY KEY AUTOINCREMENT,
    verdict_id TEXT NOT NULL UNIQUE,
    at INTEGER NOT NULL,
    model_id INTEGER NOT NULL REFERENCES model(id),
    margin REAL,
    probability REAL,
    size INTEGER NOT NULL,
    sender_domain TEXT,
    reasons TEXT NOT NULL,
    scanned INTEGER NOT NULL,
    subject TEXT,
    message_key BLOB
);
CREATE INDEX journal_by_time ON journal(at);
CREATE INDEX journal_by_message_key ON journal(message_key) WHERE message_key IS NOT NULL;
CREATE TABLE journal_domain (
    journal_id INTEGER NOT NULL REFERENCES journal(id) ON DELETE CASCADE,
    ord INTEGER NOT NULL,
    domain TEXT NOT NULL,
    at INTEGER NOT NULL,
    action INTEGER NOT NULL,
    enforced INTEGER NOT NULL,
    scanned INTEGER NOT NULL,
    recipients INTEGER NOT NULL,
    PRIMARY KEY (journal_id, ord)
) WITHOUT ROWID;
CREATE INDEX journal_domain_by_domain ON journal_domain(domain, at, action, enforced, scanned);
CREATE TABLE held (
    id INTEGER PRIMARY KEY AUTOINCREMENT,
    journal_id INTEGER NOT NULL UNIQUE REFERENCES journal(id),
    held_at INTEGER NOT NULL,
    expires_at INTEGER NOT NULL,
    state INTEGER NOT NULL,
    state_at INTEGER NOT NULL,
    sender TEXT NOT NULL,
    recipients TEXT NOT NULL,
    size INTEGER NOT NULL,
    stored_size INTEGER NOT NULL,
    content_key BLOB NOT NULL
);
CREATE INDEX held_by_state ON held(state, held_at);
CREATE INDEX held_by_expiry ON held(expires_at);
CREATE INDEX held_by_content ON held(content_key);
CREATE TABLE held_content (
    held_id INTEGER PRIMARY KEY REFERENCES held(id) ON DELETE CASCADE,
    content BLOB NOT NULL
);
CREATE TABLE report (
    id INTEGER PRIMARY KEY AUTOINCREMENT,
    verdict_id TEXT NOT NULL,
    journal_id INTEGER,
    kind INTEGER NOT NULL,
    source INTEGER NOT NULL,
    domain TEXT,
    at INTEGER NOT NULL,
    status INTEGER NOT NULL,
    features BLOB
);
CREATE INDEX report_by_journal ON report(journal_id) WHERE journal_id IS NOT NULL;
CREATE INDEX report_by_time ON report(at);
";
