//! The records a store keeps and hands back: journal entries, held messages, reports, and
//! the small value types around them. Plain data, shared by every backend.
//!
//! Invariants kept by the constructors here: domains are normalised the way the policy
//! normalises them ([`crate::policy::domain`]); a [`MessageKey`] never holds the Message-ID
//! itself, only a hash of it; no record type carries the local part of an address except
//! the envelope of a held message, which is needed to deliver it on release.

use serde::{Serialize, Serializer};
use sha2::{Digest, Sha256};

use crate::features::SparseVector;
use crate::policy::Action;
use crate::policy::domain;

/// Seconds since the Unix epoch, as the store keeps every time.
pub type UnixTime = i64;

/// The current time in seconds since the Unix epoch (0 if the clock is before it).
pub fn now() -> UnixTime {
    std::time::SystemTime::now()
        .duration_since(std::time::UNIX_EPOCH)
        .map(|d| i64::try_from(d.as_secs()).unwrap_or(i64::MAX))
        .unwrap_or(0)
}

/// What the policy decided for the recipients of one domain in one message.
///
/// Recipients of the same domain always get the same action (the policy is per domain), so
/// one record per domain loses nothing and keeps no local part.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct DomainOutcome {
    /// The recipient domain, normalised; empty for recipients without a domain (they fall
    /// under the policy's default section).
    pub domain: String,
    /// How many of the message's recipients are in this domain.
    pub recipients: u32,
    /// The action sent to the relay (after the failure mode, if the message could not be
    /// scanned or held: a quarantine that could not be held is journaled as what was sent
    /// instead).
    #[serde(serialize_with = "action_name")]
    pub action: Action,
    /// The action the policy would have taken with `tag_only` off: equal to `action`
    /// unless tag-only mode turned a quarantine into a tag. This is what lets tag-only mode
    /// show what it would have held back.
    #[serde(serialize_with = "action_name")]
    pub enforced: Action,
}

impl DomainOutcome {
    /// Groups per-recipient decisions `(address, action, enforced)` by normalised domain,
    /// in order of first appearance. Local parts are dropped here.
    ///
    /// Recipients of one domain share their section, so their actions agree; should they
    /// not (a caller's bug), the strictest action is kept, so a held message is never
    /// journaled as delivered.
    pub fn group<'a>(
        decisions: impl IntoIterator<Item = (&'a str, Action, Action)>,
    ) -> Vec<DomainOutcome> {
        let mut out: Vec<DomainOutcome> = Vec::new();
        for (address, action, enforced) in decisions {
            let name = domain::recipient_domain(address).unwrap_or_default();
            match out.iter_mut().find(|o| o.domain == name) {
                Some(o) => {
                    o.recipients = o.recipients.saturating_add(1);
                    o.action = stricter(o.action, action);
                    o.enforced = stricter(o.enforced, enforced);
                }
                None => out.push(DomainOutcome {
                    domain: name,
                    recipients: 1,
                    action,
                    enforced,
                }),
            }
        }
        out
    }
}

/// The stricter of two actions: quarantine over defer over tag over accept.
fn stricter(a: Action, b: Action) -> Action {
    let rank = |x: Action| match x {
        Action::Accept => 0,
        Action::Tag => 1,
        Action::Defer => 2,
        Action::Quarantine => 3,
    };
    if rank(b) > rank(a) { b } else { a }
}

/// A hash of a message's Message-ID, so a report can find its verdict by Message-ID and
/// recipient domain without the journal keeping the Message-ID itself.
///
/// The key is the first 16 bytes of SHA-256 over the Message-ID with surrounding blanks
/// and angle brackets removed (`<a@b>` and `a@b` give the same key; case is kept, as
/// RFC 5322 §3.6.4 compares message identifiers as given).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub struct MessageKey(pub [u8; 16]);

impl MessageKey {
    /// The key of a Message-ID field value; `None` when nothing is left once blanks and
    /// brackets are removed.
    pub fn of(message_id: &str) -> Option<MessageKey> {
        let trimmed = message_id
            .trim()
            .trim_start_matches('<')
            .trim_end_matches('>')
            .trim();
        if trimmed.is_empty() {
            return None;
        }
        let digest = Sha256::digest(trimmed.as_bytes());
        let mut key = [0u8; 16];
        key.copy_from_slice(digest.get(..16).unwrap_or(&[0u8; 16]));
        Some(MessageKey(key))
    }
}

/// One message's line in the verdict journal.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct JournalEntry {
    /// The verdict id (`policy::verdict_id`), unique in the store.
    pub verdict_id: String,
    /// When the verdict was made.
    pub at: UnixTime,
    /// Which model scored the message (its origin as the engine names it).
    pub model: String,
    /// The model's margin; `None` when the message was not scanned. A NaN margin is kept
    /// as `None`.
    pub margin: Option<f64>,
    /// The calibrated probability of junk, when the model has a calibration.
    pub probability: Option<f64>,
    /// One outcome per recipient domain.
    pub outcomes: Vec<DomainOutcome>,
    /// Size of the message in bytes, as the relay sent it.
    pub size: u64,
    /// The envelope sender's domain, normalised; `None` for the null sender.
    pub sender_domain: Option<String>,
    /// Names of the features that pushed the margin most (e.g. `body:"claim your"`),
    /// strongest first.
    pub reasons: Vec<String>,
    /// Whether the message was scanned (false: the failure mode decided).
    pub scanned: bool,
    /// The Subject, kept only when the store is configured to record it (privacy: off by
    /// default); a store that does not record it drops it on write.
    pub subject: Option<String>,
    /// The hash of the Message-ID, for finding the verdict of a reported message that
    /// lost its `X-Tamis-Verdict` field.
    #[serde(skip)]
    pub message_key: Option<MessageKey>,
}

impl JournalEntry {
    /// Whether any recipient's message is held (a quarantine action).
    pub fn holds(&self) -> bool {
        self.outcomes.iter().any(|o| o.action == Action::Quarantine)
    }
}

/// The envelope and content of a message to hold, given with its journal entry.
#[derive(Debug, Clone, Copy)]
pub struct Hold<'a> {
    /// The envelope sender (reverse path) as the relay gave it; empty for the null sender.
    pub sender: &'a str,
    /// The recipients whose copy is held (those with the quarantine action), as given.
    pub recipients: &'a [String],
    /// The whole message, exactly as received.
    pub message: &'a [u8],
}

/// What [`crate::store::Store::hold`] did.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum HoldOutcome {
    /// The message is now held under the entry's verdict id, committed to disk.
    Held,
    /// The same message (same envelope and bytes) is already held under another verdict,
    /// from an earlier attempt (the relay retried after tamis stopped between commit and
    /// answer). Nothing new was written; answer with this verdict id.
    AlreadyHeld {
        /// The verdict id under which the message is held.
        verdict_id: String,
    },
}

/// Where a held message is in its life.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "lowercase")]
pub enum HeldState {
    /// Held, waiting for a decision.
    Held,
    /// Claimed by a release in progress.
    Releasing,
    /// Delivered on release; kept until it expires.
    Released,
}

impl HeldState {
    pub(crate) fn code(self) -> i64 {
        match self {
            HeldState::Held => 0,
            HeldState::Releasing => 1,
            HeldState::Released => 2,
        }
    }

    pub(crate) fn from_code(code: i64) -> Option<HeldState> {
        match code {
            0 => Some(HeldState::Held),
            1 => Some(HeldState::Releasing),
            2 => Some(HeldState::Released),
            _ => None,
        }
    }
}

/// A held message without its content, as lists show it.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct HeldSummary {
    /// When it was held.
    pub held_at: UnixTime,
    /// When it will be purged.
    pub expires_at: UnixTime,
    /// Where it is in its life.
    pub state: HeldState,
    /// The envelope sender, as the relay gave it.
    pub sender: String,
    /// The held recipients, as the relay gave them.
    pub recipients: Vec<String>,
    /// Size of the message in bytes.
    pub size: u64,
    /// Size of its compressed copy in the store.
    pub stored_size: u64,
    /// The verdict that held it (id, margin, reasons, outcomes per domain).
    pub entry: JournalEntry,
}

/// A held message with its content.
#[derive(Debug, Clone, PartialEq)]
pub struct HeldMessage {
    /// Everything but the content.
    pub summary: HeldSummary,
    /// The message, byte for byte as it was received.
    pub message: Vec<u8>,
}

/// Which held messages a list returns. Every bound is optional; the default lists the
/// 100 newest messages in the [`HeldState::Held`] state.
#[derive(Debug, Clone, PartialEq)]
pub struct HeldFilter {
    /// Only messages held for a recipient of this domain (normalised on use).
    pub domain: Option<String>,
    /// Held at or after this time.
    pub since: Option<UnixTime>,
    /// Held before this time.
    pub until: Option<UnixTime>,
    /// Margin at or above this.
    pub min_margin: Option<f64>,
    /// Margin at or below this.
    pub max_margin: Option<f64>,
    /// Only messages in this state.
    pub state: HeldState,
    /// At most this many messages.
    pub limit: u32,
    /// Skip this many of the newest first (paging).
    pub offset: u64,
}

impl Default for HeldFilter {
    fn default() -> HeldFilter {
        HeldFilter {
            domain: None,
            since: None,
            until: None,
            min_margin: None,
            max_margin: None,
            state: HeldState::Held,
            limit: 100,
            offset: 0,
        }
    }
}

/// The answer to a claim for release.
#[derive(Debug, Clone, PartialEq)]
pub enum Claim {
    /// This caller won the claim: re-inject the message, then call
    /// [`crate::store::Store::finish_release`].
    Won(Box<HeldMessage>),
    /// Another release of this message is in progress.
    InProgress,
    /// The message was already released.
    AlreadyReleased,
    /// No held message has this verdict id (never held, deleted or purged).
    NotFound,
}

/// How a claimed release ended.
#[derive(Debug, Clone, PartialEq)]
pub enum ReleaseOutcome {
    /// Re-injected (or written out): mark it released and count it as a not-junk report.
    Delivered {
        /// When.
        at: UnixTime,
        /// The message's hashed feature vector, for retraining without content.
        features: Option<SparseVector>,
    },
    /// Re-injection failed: the message goes back to the held state.
    Failed,
}

/// What a reporter says about a message.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Serialize)]
#[serde(rename_all = "kebab-case")]
pub enum ReportKind {
    /// It is junk.
    Junk,
    /// It is legitimate mail.
    NotJunk,
}

impl ReportKind {
    pub(crate) fn code(self) -> i64 {
        match self {
            ReportKind::Junk => 0,
            ReportKind::NotJunk => 1,
        }
    }

    pub(crate) fn from_code(code: i64) -> Option<ReportKind> {
        match code {
            0 => Some(ReportKind::Junk),
            1 => Some(ReportKind::NotJunk),
            _ => None,
        }
    }
}

/// Who made a report.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Serialize)]
#[serde(rename_all = "lowercase")]
pub enum ReportSource {
    /// A recipient: must name their domain, and it must be one of the verdict's.
    User,
    /// An operator.
    Operator,
    /// A person reviewing the audit sample.
    Audit,
    /// A release of held mail (recorded by `finish_release`).
    Release,
}

impl ReportSource {
    pub(crate) fn code(self) -> i64 {
        match self {
            ReportSource::User => 0,
            ReportSource::Operator => 1,
            ReportSource::Audit => 2,
            ReportSource::Release => 3,
        }
    }

    pub(crate) fn from_code(code: i64) -> Option<ReportSource> {
        match code {
            0 => Some(ReportSource::User),
            1 => Some(ReportSource::Operator),
            2 => Some(ReportSource::Audit),
            3 => Some(ReportSource::Release),
            _ => None,
        }
    }
}

/// A report to record.
#[derive(Debug, Clone, PartialEq)]
pub struct NewReport {
    /// The verdict reported on (from `X-Tamis-Verdict`, or found by Message-ID).
    pub verdict_id: String,
    /// Junk or not junk.
    pub kind: ReportKind,
    /// Who says so.
    pub source: ReportSource,
    /// The reporter's recipient domain. Required for [`ReportSource::User`]; for the
    /// other sources `None` means the report is about every recipient domain of the
    /// verdict.
    pub domain: Option<String>,
    /// When.
    pub at: UnixTime,
    /// The message's hashed feature vector, for retraining without content.
    pub features: Option<SparseVector>,
}

/// Whether a report counts as evidence, and if not, why.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Serialize)]
#[serde(rename_all = "kebab-case")]
pub enum ReportStatus {
    /// Joined to its verdict: counted in the figures.
    Matched,
    /// No verdict with this id is in the journal (never made here, or purged).
    UnknownVerdict,
    /// The verdict exists but none of its recipients is in the reporter's domain: a
    /// forged or mistaken id.
    DomainMismatch,
    /// A user report that names no domain, so it cannot be checked.
    NoReporterDomain,
}

impl ReportStatus {
    /// The status as a stable name, as in JSON output and metric labels.
    pub fn as_str(self) -> &'static str {
        match self {
            ReportStatus::Matched => "matched",
            ReportStatus::UnknownVerdict => "unknown-verdict",
            ReportStatus::DomainMismatch => "domain-mismatch",
            ReportStatus::NoReporterDomain => "no-reporter-domain",
        }
    }

    pub(crate) fn code(self) -> i64 {
        match self {
            ReportStatus::Matched => 0,
            ReportStatus::UnknownVerdict => 1,
            ReportStatus::DomainMismatch => 2,
            ReportStatus::NoReporterDomain => 3,
        }
    }

    pub(crate) fn from_code(code: i64) -> Option<ReportStatus> {
        match code {
            0 => Some(ReportStatus::Matched),
            1 => Some(ReportStatus::UnknownVerdict),
            2 => Some(ReportStatus::DomainMismatch),
            3 => Some(ReportStatus::NoReporterDomain),
            _ => None,
        }
    }

    /// Whether the report counts as evidence.
    pub fn is_matched(self) -> bool {
        self == ReportStatus::Matched
    }
}

/// What recording a report did.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
pub struct ReportReceipt {
    /// The store's number for the report.
    pub id: i64,
    /// Whether it counts as evidence, and why not.
    pub status: ReportStatus,
}

/// A report as the store keeps it.
#[derive(Debug, Clone, PartialEq)]
pub struct StoredReport {
    /// The store's own number for it.
    pub id: i64,
    /// The verdict id as given.
    pub verdict_id: String,
    /// Junk or not junk.
    pub kind: ReportKind,
    /// Who.
    pub source: ReportSource,
    /// The reporter's domain, normalised.
    pub domain: Option<String>,
    /// When.
    pub at: UnixTime,
    /// Whether it counts, and why not.
    pub status: ReportStatus,
    /// The hashed feature vector, when one was given.
    pub features: Option<SparseVector>,
}

/// Rows removed by a purge.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq, Serialize)]
pub struct PurgeCounts {
    /// Held messages removed.
    pub held: u64,
    /// Journal entries removed.
    pub journal: u64,
    /// Reports removed.
    pub reports: u64,
}

/// Held mail totals, for metrics.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq, Serialize)]
pub struct HeldTotals {
    /// Messages in the held state.
    pub messages: u64,
    /// Their size as received.
    pub bytes: u64,
    /// Their size in the store (compressed).
    pub stored_bytes: u64,
}

/// One message of an audit sample.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct AuditItem {
    /// The held message.
    pub held: HeldSummary,
    /// The latest audit report on it for this domain, if it has been reviewed.
    pub reviewed: Option<ReportKind>,
}

/// A report as the daemon's metrics count it: what it says, who said it, and the
/// outcome of each recipient domain of its verdict that it applies to.
#[derive(Debug, Clone, PartialEq)]
pub struct ReportTally {
    /// The store's number for the report; numbers only grow.
    pub id: i64,
    /// Junk or not junk.
    pub kind: ReportKind,
    /// Who.
    pub source: ReportSource,
    /// Whether it counts as evidence.
    pub status: ReportStatus,
    /// For a matched report, the outcome of each recipient domain it applies to (the
    /// reporter's domain, or every domain of the verdict for a report naming none), in the
    /// verdict's order; empty for an unmatched report or one whose verdict was purged.
    pub outcomes: Vec<DomainOutcome>,
}

/// Serialises an action by its protocol name.
pub(crate) fn action_name<S: Serializer>(
    action: &Action,
    serializer: S,
) -> Result<S::Ok, S::Error> {
    serializer.serialize_str(action.as_str())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn grouping_drops_local_parts_and_counts_recipients() {
        let outcomes = DomainOutcome::group([
            ("alice@Example.ORG", Action::Tag, Action::Quarantine),
            ("postmaster", Action::Accept, Action::Accept),
            ("bob@example.org.", Action::Tag, Action::Quarantine),
        ]);
        assert_eq!(outcomes.len(), 2);
        assert_eq!(outcomes[0].domain, "example.org");
        assert_eq!(outcomes[0].recipients, 2);
        assert_eq!(outcomes[0].enforced, Action::Quarantine);
        assert_eq!(outcomes[1].domain, "");
        let text = format!("{outcomes:?}");
        assert!(!text.contains("alice") && !text.contains("bob"), "{text}");
    }

    #[test]
    fn message_keys_ignore_brackets_but_not_case() {
        assert_eq!(
            MessageKey::of("<a1@mail.test>"),
            MessageKey::of(" a1@mail.test ")
        );
        assert_ne!(
            MessageKey::of("<A1@mail.test>"),
            MessageKey::of("<a1@mail.test>")
        );
        assert_eq!(MessageKey::of(" <> "), None);
    }
}
