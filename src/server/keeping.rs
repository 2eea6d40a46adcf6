//! The daemon's side of the store: what happens to a decided message before its verdict
//! goes out, and the store's upkeep while the daemon runs.
//!
//! A session hands over each decided message ([`Decided`]); [`Keeping::settle`] holds it
//! when a recipient is to be quarantined, journals the verdict, and says what to send
//! ([`Settled`]). The store's own rules live in `crate::store`; this module only calls
//! them and turns their outcomes into verdicts, metrics and log lines.
//!
//! Invariants:
//!
//! - **Never a quarantine that was not kept.** A recipient leaves here with the
//!   quarantine action only if [`crate::store::Store::hold`] returned, so the message,
//!   its envelope and its journal entry are on disk before the verdict is sent. A message
//!   not kept whole (it passed `max_message`, the buffer budget ran out, a field was cut
//!   or dropped) is never held: those recipients are tagged. A hold the store refuses
//!   follows the failure mode: `accept` delivers tagged, `defer` defers.
//! - **One verdict per held message.** A message the relay sends again while it is still
//!   held (it never got the first verdict) is answered with the first verdict id, and
//!   nothing new is written.
//! - **The journal records what was sent**: the final actions, with the action the
//!   policy would have taken with tag-only off beside them. Accept, tag and defer verdicts
//!   go through the batching [`JournalWriter`]; held ones are journalled by the hold.
//! - **Every store error is logged and counted**, by kind, and never ends a session.
//! - Blocking: [`Keeping::settle`] waits for the disk; call it from a blocking thread.
//!   Holds of concurrent sessions share one flush to disk ([`HoldWriter`]).

use std::path::Path;
use std::sync::{Arc, RwLock};
use std::time::{Duration, Instant};

use tokio::sync::Notify;
use tokio_util::sync::CancellationToken;

use super::throttle::Throttle;
use crate::config::{FailureMode, StoreConfig, StoreOrigin, default_store_path};
use crate::metrics::Metrics;
use crate::policy::{Action, Decision, domain};
use crate::store::batch::Refused;
use crate::store::{
    BatchSettings, DomainOutcome, HoldOutcome, HoldRequest, HoldSettings, HoldWriter, JournalEntry,
    JournalWriter, MessageKey, ReportKind, ReportSource, ReportStatus, Store, StoreError,
};

/// How many features are named per journal entry.
pub const REASONS_KEPT: usize = 3;

/// Why a message was not kept whole, so that it cannot be held (`proto/PROTOCOL.md`
/// §4.5).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum NotWhole {
    /// It passed `max_message`.
    OverMaxMessage,
    /// The daemon's buffer budget could not pay for the rest of it.
    OverBufferBudget,
    /// A header field value was cut at the field limit.
    FieldCut,
    /// Header fields past the field limit were dropped.
    FieldsDropped,
}

impl NotWhole {
    /// The `reason` label of `tamis_quarantine_not_held_total`.
    pub fn label(self) -> &'static str {
        match self {
            NotWhole::OverMaxMessage => "over-max-message",
            NotWhole::OverBufferBudget => "over-buffer-budget",
            NotWhole::FieldCut => "field-cut",
            NotWhole::FieldsDropped => "fields-dropped",
        }
    }

    /// Why, in words, for the verdict's reasons.
    pub fn explain(self) -> &'static str {
        match self {
            NotWhole::OverMaxMessage => "it is larger than max_message",
            NotWhole::OverBufferBudget => "the daemon's message memory was in use",
            NotWhole::FieldCut => "a header field was cut at the field limit",
            NotWhole::FieldsDropped => "header fields past the field limit were dropped",
        }
    }
}

/// A decided message, as a session hands it over.
#[derive(Debug)]
pub struct Decided<'a> {
    /// The verdict id made for it.
    pub verdict_id: String,
    /// Which model scored it (the engine's origin).
    pub model: &'a str,
    /// Margin and probability; `None` when it was not scanned.
    pub score: Option<(f64, Option<f64>)>,
    /// What the policy (or the failure mode) decided per recipient.
    pub decisions: Vec<Decision>,
    /// The features that pushed the margin most, strongest first.
    pub features: Vec<String>,
    /// The envelope sender as the relay sent it.
    pub sender: &'a str,
    /// The message as kept (moved into the store's hold writer when it is held).
    pub message: Vec<u8>,
    /// The message's size as the relay sent it (field names, values and body bytes).
    pub size: u64,
    /// The hash of its Message-ID.
    pub message_key: Option<MessageKey>,
    /// Its Subject, when the store records subjects.
    pub subject: Option<String>,
    /// `Err` when the message was not kept whole.
    pub whole: Result<(), NotWhole>,
    /// The failure mode in force.
    pub on_failure: FailureMode,
}

/// What became of a message's quarantine.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum HeldAs {
    /// No recipient was to be quarantined.
    Nothing,
    /// Held now, committed to disk.
    Held,
    /// Already held under the (first) verdict id, from an earlier attempt.
    AlreadyHeld,
    /// To be quarantined but not held; the recipients got another action.
    NotHeld(&'static str),
}

impl HeldAs {
    /// A short word for the verdict log line.
    pub fn as_str(&self) -> &'static str {
        match self {
            HeldAs::Nothing => "no",
            HeldAs::Held => "yes",
            HeldAs::AlreadyHeld => "already",
            HeldAs::NotHeld(_) => "failed",
        }
    }
}

/// What to send for a settled message.
#[derive(Debug, Clone, PartialEq)]
pub struct Settled {
    /// The verdict id to send: the one made for the message, or the first one when it
    /// was already held.
    pub verdict_id: String,
    /// The final decisions.
    pub decisions: Vec<Decision>,
    /// What became of its quarantine.
    pub held: HeldAs,
    /// Lines for the verdict's reasons, saying why a quarantine was not made.
    pub notes: Vec<String>,
}

/// How often the daemon looks after its store; tests shorten them.
#[derive(Debug, Clone, PartialEq)]
pub struct KeepingSettings {
    /// How often the held-mail gauges and the report counters are read from the store.
    pub refresh_every: Duration,
    /// Least time between two refreshes asked for by holds.
    pub refresh_at_most: Duration,
    /// How often expired held mail and journal entries are purged and stale release
    /// claims reset.
    pub purge_every: Duration,
    /// A release claimed longer ago than this is taken as dead and put back to held.
    pub stale_claim: Duration,
    /// How the journal writer batches.
    pub batch: BatchSettings,
    /// How the hold writer groups holds.
    pub holds: HoldSettings,
}

impl Default for KeepingSettings {
    /// Refresh every 10 s (at most once a second after holds), purge every hour, claims
    /// stale after an hour (a release over SMTP takes seconds).
    fn default() -> KeepingSettings {
        KeepingSettings {
            refresh_every: Duration::from_secs(10),
            refresh_at_most: Duration::from_secs(1),
            purge_every: Duration::from_secs(3600),
            stale_claim: Duration::from_secs(3600),
            batch: BatchSettings::default(),
            holds: HoldSettings::default(),
        }
    }
}

/// Why the store could not be opened at start, with where it was looked for.
#[derive(Debug, thiserror::Error)]
pub enum OpenError {
    /// The store refused to open.
    #[error("cannot open the store: {0}")]
    Store(#[from] StoreError),
    /// The user's state folder could not be created.
    #[error(
        "cannot create the folder {} for the store: {source}; create it (mode 0700) or set [store] path in a configuration file",
        folder.display()
    )]
    Folder {
        /// The folder.
        folder: std::path::PathBuf,
        /// Why.
        #[source]
        source: std::io::Error,
    },
    /// The journal writer thread could not start.
    #[error("cannot start the journal writer: {0}")]
    Writer(#[source] std::io::Error),
}

/// Opens the store a configuration names. When the path is the user's own state folder
/// chosen by default ([`StoreOrigin::User`]), the folder is created first (mode 0700).
/// Blocking.
pub fn open_store(config: &StoreConfig) -> Result<crate::store::SqliteStore, OpenError> {
    let (default, origin) = default_store_path();
    if origin == StoreOrigin::User
        && config.path == default
        && let Some(folder) = config.path.parent()
        && !folder.exists()
    {
        create_private_folder(folder).map_err(|source| OpenError::Folder {
            folder: folder.to_path_buf(),
            source,
        })?;
    }
    Ok(crate::store::open(config)?)
}

fn create_private_folder(folder: &Path) -> std::io::Result<()> {
    use std::os::unix::fs::DirBuilderExt;
    std::fs::DirBuilder::new()
        .recursive(true)
        .mode(0o700)
        .create(folder)
}

/// The store as the daemon uses it: holds, the journal writer, and upkeep.
pub struct Keeping {
    store: Arc<dyn Store>,
    holds: HoldWriter,
    journal: RwLock<Option<JournalWriter>>,
    metrics: Arc<Metrics>,
    settings: KeepingSettings,
    record_subject: bool,
    error_log: Arc<Throttle>,
    wake: Notify,
}

impl std::fmt::Debug for Keeping {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("Keeping")
            .field("store", &self.store.location())
            .finish_non_exhaustive()
    }
}

/// Least time between two log lines about store errors.
const LOG_INTERVAL: Duration = Duration::from_secs(1);

impl Keeping {
    /// Starts keeping `store`: the journal writer thread starts here. `record_subject`
    /// says whether sessions should collect the Subject for the journal.
    pub fn start(
        store: Arc<dyn Store>,
        metrics: Arc<Metrics>,
        settings: KeepingSettings,
        record_subject: bool,
    ) -> Result<Arc<Keeping>, OpenError> {
        let error_log = Arc::new(Throttle::new(LOG_INTERVAL));
        let on_error = {
            let (metrics, log) = (Arc::clone(&metrics), Arc::clone(&error_log));
            Box::new(move |e: &StoreError, lost: usize| {
                metrics.store_error(e.kind());
                metrics.journal_lost(lost as u64);
                if let Some(held_back) = log.admit(tokio::time::Instant::now()) {
                    tracing::error!(error = %e, lost, held_back, "journal entries not written");
                }
            })
        };
        let writer = JournalWriter::start(Arc::clone(&store), settings.batch.clone(), on_error)
            .map_err(OpenError::Writer)?;
        let holds = HoldWriter::start(Arc::clone(&store), settings.holds.clone())
            .map_err(OpenError::Writer)?;
        Ok(Arc::new(Keeping {
            store,
            holds,
            journal: RwLock::new(Some(writer)),
            metrics,
            settings,
            record_subject,
            error_log,
            wake: Notify::new(),
        }))
    }

    /// The store.
    pub fn store(&self) -> &Arc<dyn Store> {
        &self.store
    }

    /// Whether sessions should collect each message's Subject for the journal.
    pub fn records_subject(&self) -> bool {
        self.record_subject
    }

    /// Holds, journals and settles a decided message (see the module invariants).
    /// Blocking: it waits for the disk when the message is held.
    pub fn settle(&self, decided: Decided<'_>) -> Settled {
        let quarantined = decided
            .decisions
            .iter()
            .any(|d| d.action == Action::Quarantine);
        if !quarantined {
            let settled = Settled {
                verdict_id: decided.verdict_id.clone(),
                decisions: decided.decisions.clone(),
                held: HeldAs::Nothing,
                notes: Vec::new(),
            };
            self.journal(entry(&decided, &settled.decisions, &settled.verdict_id));
            return settled;
        }
        if let Err(why) = decided.whole {
            // Kept in part only: holding it would keep less than the relay handed over.
            self.metrics.not_held(why.label());
            let settled = not_held(&decided, FailureMode::Accept, why.label(), why.explain());
            self.journal(entry(&decided, &settled.decisions, &settled.verdict_id));
            return settled;
        }
        let held: Vec<String> = decided
            .decisions
            .iter()
            .filter(|d| d.action == Action::Quarantine)
            .map(|d| d.recipient.clone())
            .collect();
        let journal_entry = entry(&decided, &decided.decisions, &decided.verdict_id);
        let mut decided = decided;
        let message = std::mem::take(&mut decided.message);
        let bytes = message.len() as u64;
        let request = HoldRequest {
            entry: journal_entry,
            sender: decided.sender.to_string(),
            recipients: held,
            message,
        };
        let started = Instant::now();
        let outcome = self.holds.hold(request);
        let seconds = started.elapsed().as_secs_f64();
        match outcome {
            Ok(HoldOutcome::Held) => {
                self.metrics.hold(true, seconds);
                // The gauges move now; the store's own totals follow shortly.
                self.metrics.add_held(bytes, 0);
                self.wake.notify_one();
                Settled {
                    verdict_id: decided.verdict_id,
                    decisions: decided.decisions,
                    held: HeldAs::Held,
                    notes: Vec::new(),
                }
            }
            Ok(HoldOutcome::AlreadyHeld { verdict_id }) => {
                self.metrics.hold(false, seconds);
                tracing::info!(
                    verdict_id = %verdict_id,
                    new_verdict_id = %decided.verdict_id,
                    "message already held: the relay sent it again; answering with its first verdict"
                );
                Settled {
                    verdict_id,
                    decisions: decided.decisions,
                    held: HeldAs::AlreadyHeld,
                    notes: Vec::new(),
                }
            }
            Err(e) => {
                self.metrics.hold_seconds(seconds);
                self.metrics.store_error(e.kind());
                self.metrics.not_held("store-error");
                if let Some(held_back) = self.error_log.admit(tokio::time::Instant::now()) {
                    tracing::error!(
                        verdict_id = %decided.verdict_id,
                        error = %e,
                        on_failure = decided.on_failure.as_str(),
                        held_back,
                        "a message to quarantine could not be held; its recipients follow the failure mode"
                    );
                }
                let explain = format!("the store refused it ({})", e.kind());
                let settled = not_held(&decided, decided.on_failure, "store-error", &explain);
                self.journal(entry(&decided, &settled.decisions, &settled.verdict_id));
                settled
            }
        }
    }

    /// Queues a journal entry; a refusal is counted and logged, never waited for.
    fn journal(&self, entry: JournalEntry) {
        let refused = match self.journal.read() {
            Ok(guard) => match guard.as_ref() {
                Some(writer) => writer.submit(entry).err(),
                None => Some(Refused::Stopped),
            },
            Err(_) => Some(Refused::Stopped),
        };
        if let Some(why) = refused {
            let kind = match why {
                Refused::QueueFull => "queue-full",
                Refused::Stopped => "stopped",
            };
            self.metrics.store_error(kind);
            self.metrics.journal_lost(1);
            if let Some(held_back) = self.error_log.admit(tokio::time::Instant::now()) {
                tracing::error!(error = %why, held_back, "a journal entry was dropped");
            }
        }
    }

    /// Stops the hold writer, writes what the journal writer has queued and stops it,
    /// waiting at most `within`.
    /// Returns false when the time ran out first (the writer goes on in the background
    /// until the process exits).
    pub async fn close(self: &Arc<Self>, within: Duration) -> bool {
        let writer = match self.journal.write() {
            Ok(mut guard) => guard.take(),
            Err(poisoned) => poisoned.into_inner().take(),
        };
        let keeping = Arc::clone(self);
        let closing = tokio::task::spawn_blocking(move || {
            // Sessions are done: no hold is waiting, the thread just stops.
            keeping.holds.close();
            if let Some(writer) = writer {
                writer.close();
            }
        });
        match tokio::time::timeout(within, closing).await {
            Ok(_) => true,
            Err(_) => {
                tracing::warn!(
                    "the grace period ended before the journal was written; entries still queued may be lost"
                );
                false
            }
        }
    }

    /// Looks after the store until `shutdown`: reads the held-mail totals and new reports
    /// into the metrics (every [`KeepingSettings::refresh_every`], and shortly after
    /// holds), purges expired records and resets stale release claims (every
    /// [`KeepingSettings::purge_every`], and once at start).
    pub async fn maintain(self: Arc<Self>, shutdown: CancellationToken) {
        let mut cursor = None;
        let mut next_purge = tokio::time::Instant::now();
        loop {
            if tokio::time::Instant::now() >= next_purge {
                next_purge = tokio::time::Instant::now() + self.settings.purge_every;
                let keeping = Arc::clone(&self);
                let _ = tokio::task::spawn_blocking(move || keeping.purge()).await;
            }
            let keeping = Arc::clone(&self);
            cursor = tokio::task::spawn_blocking(move || keeping.refresh(cursor))
                .await
                .unwrap_or(cursor);
            let rest = tokio::time::sleep(self.settings.refresh_at_most);
            tokio::select! {
                _ = shutdown.cancelled() => return,
                _ = rest => {}
            }
            let until = tokio::time::sleep(
                self.settings
                    .refresh_every
                    .saturating_sub(self.settings.refresh_at_most),
            );
            tokio::select! {
                _ = shutdown.cancelled() => return,
                _ = until => {}
                _ = self.wake.notified() => {}
            }
        }
    }

    /// Reads the held-mail totals and the reports numbered above `cursor` into the
    /// metrics; returns the new cursor. With no cursor yet, starts from the newest report
    /// (counters count what happens while the daemon runs). Blocking.
    fn refresh(&self, cursor: Option<i64>) -> Option<i64> {
        match self.store.held_totals() {
            Ok(totals) => self.metrics.set_held(&totals),
            Err(e) => self.store_failed(&e, "read the held-mail totals"),
        }
        let mut cursor = match cursor {
            Some(c) => c,
            None => match self.store.last_report_id() {
                Ok(c) => return Some(c),
                Err(e) => {
                    self.store_failed(&e, "find the newest report");
                    return None;
                }
            },
        };
        const PAGE: u32 = 1000;
        loop {
            let page = match self.store.reports_after(cursor, PAGE) {
                Ok(page) => page,
                Err(e) => {
                    self.store_failed(&e, "read new reports");
                    return Some(cursor);
                }
            };
            for tally in &page {
                cursor = cursor.max(tally.id);
                if tally.status != ReportStatus::Matched {
                    self.metrics.unmatched_report(tally.status.as_str());
                    continue;
                }
                for outcome in &tally.outcomes {
                    self.metrics.report(
                        &outcome.domain,
                        kind_name(tally.kind),
                        source_name(tally.source),
                        outcome.enforced,
                    );
                    if tally.source == ReportSource::Release && outcome.action == Action::Quarantine
                    {
                        self.metrics.release(&outcome.domain);
                    }
                }
            }
            if page.len() < PAGE as usize {
                return Some(cursor);
            }
        }
    }

    /// Purges what retention allows and puts stale release claims back. Blocking.
    fn purge(&self) {
        match self.store.purge_expired(crate::store::record::now()) {
            Ok(counts) => {
                self.metrics.purged("held", counts.held);
                self.metrics.purged("journal", counts.journal);
                self.metrics.purged("reports", counts.reports);
                if counts.held + counts.journal + counts.reports > 0 {
                    tracing::info!(
                        held = counts.held,
                        journal = counts.journal,
                        reports = counts.reports,
                        "purged records past their retention"
                    );
                    self.wake.notify_one();
                }
            }
            Err(e) => self.store_failed(&e, "purge expired records"),
        }
        let stale = i64::try_from(self.settings.stale_claim.as_secs()).unwrap_or(i64::MAX);
        let before = crate::store::record::now().saturating_sub(stale);
        match self.store.reset_stale_claims(before) {
            Ok(0) => {}
            Ok(n) => tracing::warn!(
                messages = n,
                "releases that never finished were put back to held (their process died?)"
            ),
            Err(e) => self.store_failed(&e, "reset stale release claims"),
        }
    }

    fn store_failed(&self, e: &StoreError, what: &str) {
        self.metrics.store_error(e.kind());
        if let Some(held_back) = self.error_log.admit(tokio::time::Instant::now()) {
            tracing::error!(error = %e, held_back, "could not {what}");
        }
    }
}

/// Settles a decided message when the daemon keeps no store: nothing is journalled, and
/// a quarantine cannot be held, so it follows the failure mode. (The configuration
/// refuses a policy that quarantines without a store; this covers a policy built in
/// code.)
pub fn settle_without_store(decided: Decided<'_>, metrics: &Metrics) -> Settled {
    if decided
        .decisions
        .iter()
        .any(|d| d.action == Action::Quarantine)
    {
        metrics.not_held("store-error");
        return not_held(
            &decided,
            decided.on_failure,
            "store-error",
            "the daemon keeps no store (store.enabled = false)",
        );
    }
    Settled {
        verdict_id: decided.verdict_id,
        decisions: decided.decisions,
        held: HeldAs::Nothing,
        notes: Vec::new(),
    }
}

/// The decisions with every quarantine replaced: `Accept` mode tags (the message is
/// delivered, marked as the junk it scored as), `Defer` mode defers (the relay keeps it
/// and retries).
fn not_held(
    decided: &Decided<'_>,
    mode: FailureMode,
    label: &'static str,
    explain: &str,
) -> Settled {
    let instead = match mode {
        FailureMode::Accept => Action::Tag,
        FailureMode::Defer => Action::Defer,
    };
    let decisions = decided
        .decisions
        .iter()
        .map(|d| Decision {
            action: if d.action == Action::Quarantine {
                instead
            } else {
                d.action
            },
            ..d.clone()
        })
        .collect();
    Settled {
        verdict_id: decided.verdict_id.clone(),
        decisions,
        held: HeldAs::NotHeld(label),
        notes: vec![format!(
            "not held: {explain}; {} instead of quarantine",
            instead.as_str()
        )],
    }
}

/// The journal entry of a message with these final decisions.
fn entry(decided: &Decided<'_>, decisions: &[Decision], verdict_id: &str) -> JournalEntry {
    JournalEntry {
        verdict_id: verdict_id.to_string(),
        at: crate::store::record::now(),
        model: decided.model.to_string(),
        margin: decided.score.map(|(m, _)| m).filter(|m| m.is_finite()),
        probability: decided.score.and_then(|(_, p)| p).filter(|p| p.is_finite()),
        outcomes: DomainOutcome::group(
            decisions
                .iter()
                .map(|d| (d.recipient.as_str(), d.action, d.enforced)),
        ),
        size: decided.size,
        sender_domain: domain::recipient_domain(decided.sender),
        reasons: decided.features.clone(),
        scanned: decided.score.is_some(),
        subject: decided.subject.clone(),
        message_key: decided.message_key,
    }
}

fn kind_name(kind: ReportKind) -> &'static str {
    match kind {
        ReportKind::Junk => "junk",
        ReportKind::NotJunk => "not-junk",
    }
}

fn source_name(source: ReportSource) -> &'static str {
    match source {
        ReportSource::User => "user",
        ReportSource::Operator => "operator",
        ReportSource::Audit => "audit",
        ReportSource::Release => "release",
    }
}
