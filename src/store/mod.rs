//! The store: what tamis keeps after a verdict — the verdict journal, the quarantine of held
//! messages, and people's reports about verdicts — behind one [`Store`] trait.
//!
//! The embedded default is [`SqliteStore`]: one SQLite file, nothing to install. The trait
//! is what callers use, so a shared database (PostgreSQL, for many daemons) can implement
//! it later without touching them. Calls are synchronous and may wait for the disk: the
//! daemon makes them from blocking threads, never from async workers.
//!
//! Guarantees every implementation keeps:
//!
//! - **Durability before the answer.** [`Store::hold`] returns only once the message, its
//!   envelope and its journal entry are committed and flushed to disk (fsync), so a
//!   `quarantine` verdict sent after it never loses the message. Journal entries of other
//!   verdicts ([`Store::record`]) are committed as a batch and survive a crash of the
//!   process, not necessarily of the machine. Reports, releases and deletions are flushed
//!   like holds.
//! - **All or nothing.** Each call is one transaction: a failure (disk full, lock timeout)
//!   leaves the store as it was, and nothing already held is lost.
//! - **One release wins.** Of concurrent [`Store::claim_release`] calls for one message,
//!   from any process, exactly one gets [`Claim::Won`].
//! - **Privacy by default.** The journal keeps recipient domains, never local parts; the
//!   Subject only when [`StoreOptions::record_subject`] is on; the Message-ID only as a
//!   hash ([`MessageKey`]). Held messages keep their full envelope: releasing needs it.
//! - **Evidence is checked.** A report counts only when its verdict is in the journal and,
//!   for a user's report, has a recipient in the reporter's domain; anything else is kept
//!   as unmatched and never counted ([`ReportStatus`]).
//!
//! The figures per domain and their exact definitions are in [`figures`]; the audit
//! sample's method in [`sample`]; [`JournalWriter`] batches journal entries for the daemon,
//! and [`HoldWriter`] commits the holds of concurrent sessions together; what the status
//! page reads besides the figures in [`views`].

pub mod batch;
pub mod blob;
pub mod error;
pub mod figures;
pub mod holds;
pub mod record;
pub mod sample;
pub mod sqlite;
pub mod views;

use std::path::Path;
use std::time::Duration;

pub use batch::{BatchSettings, JournalWriter};
pub use error::StoreError;
pub use figures::{DomainFigures, Rate, TargetCheck};
pub use holds::{HoldRequest, HoldSettings, HoldWriter};
pub use record::{
    AuditItem, Claim, DomainOutcome, HeldFilter, HeldMessage, HeldState, HeldSummary, HeldTotals,
    Hold, HoldOutcome, JournalEntry, MessageKey, NewReport, PurgeCounts, ReleaseOutcome,
    ReportKind, ReportReceipt, ReportSource, ReportStatus, ReportTally, StoredReport, UnixTime,
};
pub use sqlite::SqliteStore;
pub use views::{Buckets, DomainHeld, MarginBins, MarginHistogram, VolumeBucket};

use crate::config::StoreConfig;

/// Seconds in a day, for retention periods.
pub const DAY: i64 = 86_400;

/// How a store behaves, whatever its backend.
#[derive(Debug, Clone, PartialEq)]
pub struct StoreOptions {
    /// How long to wait for a lock held by another process or connection before giving
    /// up with [`StoreError::Busy`].
    pub busy_timeout: Duration,
    /// Days a held message is kept before it is purged.
    pub quarantine_days: u32,
    /// Days journal entries and reports are kept (entries of still-held messages are kept
    /// as long as the message).
    pub journal_days: u32,
    /// Whether the journal keeps the Subject of each message.
    pub record_subject: bool,
}

impl Default for StoreOptions {
    /// A 5 s busy timeout and the retention defaults of [`StoreConfig`].
    fn default() -> StoreOptions {
        StoreOptions::from(&StoreConfig::default())
    }
}

impl From<&StoreConfig> for StoreOptions {
    fn from(config: &StoreConfig) -> StoreOptions {
        StoreOptions {
            busy_timeout: Duration::from_secs(5),
            quarantine_days: config.quarantine_days,
            journal_days: config.journal_days,
            record_subject: config.record_subject,
        }
    }
}

/// Opens (creating it if needed) the store a configuration names.
pub fn open(config: &StoreConfig) -> Result<SqliteStore, StoreError> {
    SqliteStore::open(&config.path, StoreOptions::from(config))
}

/// The verdict journal, the quarantine and the reports. See the module documentation for
/// the guarantees every implementation keeps.
pub trait Store: Send + Sync {
    /// Where the store is, for logs and errors.
    fn location(&self) -> &Path;

    // --- Journal ------------------------------------------------------------------------

    /// Appends journal entries in one transaction (a batch of accept and tag verdicts).
    /// An entry whose verdict id is already in the journal is skipped, so a batch retried
    /// after an error is not counted twice.
    fn record(&self, entries: &[JournalEntry]) -> Result<(), StoreError>;

    /// The journal entry of a verdict.
    fn journal_entry(&self, verdict_id: &str) -> Result<Option<JournalEntry>, StoreError>;

    /// The newest verdict for a message with this Message-ID and a recipient in `domain`:
    /// how a report without an `X-Tamis-Verdict` field finds its verdict.
    fn find_verdict(&self, key: &MessageKey, domain: &str) -> Result<Option<String>, StoreError>;

    // --- Quarantine ---------------------------------------------------------------------

    /// Holds a message: its journal entry, envelope and compressed bytes, committed and
    /// flushed to disk before returning. Idempotent: holding the same verdict again does
    /// nothing, and the same envelope and bytes still held under another verdict give
    /// [`HoldOutcome::AlreadyHeld`] with that verdict.
    fn hold(&self, entry: &JournalEntry, hold: &Hold<'_>) -> Result<HoldOutcome, StoreError>;

    /// Held messages matching `filter`, newest first.
    fn list_held(&self, filter: &HeldFilter) -> Result<Vec<HeldSummary>, StoreError>;

    /// One held message with its bytes, in any state.
    fn get_held(&self, verdict_id: &str) -> Result<Option<HeldMessage>, StoreError>;

    /// Claims a held message for release, atomically across connections and processes:
    /// only a message in the held state can be claimed, and it then moves to
    /// [`HeldState::Releasing`] until [`Store::finish_release`].
    fn claim_release(&self, verdict_id: &str) -> Result<Claim, StoreError>;

    /// Ends a claimed release: delivered (released, and recorded as a not-junk report of
    /// source [`ReportSource::Release`]) or failed (back to held). `false` when the
    /// message was not being released (nothing changed).
    fn finish_release(
        &self,
        verdict_id: &str,
        outcome: &ReleaseOutcome,
    ) -> Result<bool, StoreError>;

    /// Puts claims older than `claimed_before` back to held: a release that died with its
    /// process. Returns how many. A message put back may have been delivered already;
    /// delivering twice is preferred to losing it.
    fn reset_stale_claims(&self, claimed_before: UnixTime) -> Result<u64, StoreError>;

    /// Deletes a held message (not while it is being released). `false` when there was
    /// nothing to delete.
    fn delete_held(&self, verdict_id: &str) -> Result<bool, StoreError>;

    /// Count and bytes of messages in the held state.
    fn held_totals(&self) -> Result<HeldTotals, StoreError>;

    /// A random sample of up to `size` messages held for `domain` at or after `since`, in
    /// any state, the same for the same seed (see [`sample`]); each with its latest audit
    /// report, if reviewed.
    fn audit_sample(
        &self,
        domain: &str,
        since: UnixTime,
        size: usize,
        seed: u64,
    ) -> Result<Vec<AuditItem>, StoreError>;

    // --- Reports ------------------------------------------------------------------------

    /// Records a report, matched or not (see [`ReportStatus`]), flushed to disk.
    fn report(&self, report: &NewReport) -> Result<ReportReceipt, StoreError>;

    /// Reports made at or after `since`, oldest first, at most `limit`.
    fn reports(&self, since: UnixTime, limit: u32) -> Result<Vec<StoredReport>, StoreError>;

    // --- Figures and retention ----------------------------------------------------------

    /// The figures of each domain over verdicts made at or after `since`, sorted by
    /// domain; only `domain` when given (zero figures if it has no mail).
    fn figures(
        &self,
        since: UnixTime,
        domain: Option<&str>,
    ) -> Result<Vec<DomainFigures>, StoreError>;

    /// Removes held messages past their expiry, and journal entries and reports older than
    /// the journal retention (entries of messages still held are kept with them).
    fn purge_expired(&self, now: UnixTime) -> Result<PurgeCounts, StoreError>;

    /// Removes held messages held before `cutoff`, in any state but releasing (an
    /// operator's purge by age). Returns how many.
    fn purge_held_before(&self, cutoff: UnixTime) -> Result<u64, StoreError>;

    // --- Status page (see [`views`]) ----------------------------------------------------

    /// Messages per time bucket by action, for one recipient domain or, with `None`,
    /// summed over all (a message then counts once per recipient domain, as in the
    /// figures). Exactly `buckets.count` buckets, oldest first; the work is bounded by the
    /// verdicts in the window, not by the journal.
    fn volume(
        &self,
        domain: Option<&str>,
        buckets: &Buckets,
    ) -> Result<Vec<VolumeBucket>, StoreError>;

    /// The margins of `domain`'s messages with verdicts at or after `since` that carry a
    /// label (see [`figures`]: the latest matched report that applies to the domain),
    /// binned by label.
    fn reported_margins(
        &self,
        domain: &str,
        since: UnixTime,
        bins: &MarginBins,
    ) -> Result<MarginHistogram, StoreError>;

    /// Messages in the held state per recipient domain they are held for, sorted by
    /// domain.
    fn held_by_domain(&self) -> Result<Vec<DomainHeld>, StoreError>;

    /// The first `max_bytes` of a held message in any state (enough for its header
    /// section), without inflating the rest; `None` when nothing is held under the id.
    fn held_head(&self, verdict_id: &str, max_bytes: usize) -> Result<Option<Vec<u8>>, StoreError>;

    // --- Following reports (the daemon's metrics) ---------------------------------------

    /// The number of the newest report, 0 when there is none: where a reader that counts
    /// reports from now on starts.
    fn last_report_id(&self) -> Result<i64, StoreError>;

    /// Reports numbered above `after`, recorded by any process (the operator commands
    /// write them), oldest first, at most `limit` reports, each with the outcomes it
    /// applies to ([`ReportTally`]).
    fn reports_after(&self, after: i64, limit: u32) -> Result<Vec<ReportTally>, StoreError>;

    // --- Holding many at once (group commit) --------------------------------------------

    /// Holds several messages with one commit flushed to disk once: for each, what
    /// [`Store::hold`] does, the results in order. A message the store refuses as such
    /// (an invalid entry) costs only itself. The default holds them one by one.
    fn hold_all(
        &self,
        items: &[(&JournalEntry, &Hold<'_>)],
    ) -> Vec<Result<HoldOutcome, StoreError>> {
        items
            .iter()
            .map(|(entry, hold)| self.hold(entry, hold))
            .collect()
    }
}
