//! The page's actions that change state — report a message junk or legitimate, release a
//! held message — behind the small [`Operations`] trait, and the form that asks for them.
//!
//! Invariants: an action names one verdict id of printable ASCII (at most 64 bytes) and
//! one of a fixed set of verbs, parsed from at most [`MAX_FIELDS`] form fields; anything
//! else is refused before the store is touched. [`StoreOperations`] records reports in the
//! store (a release counts as a legitimate report there, done by the store itself when a
//! release finishes); it releases through [`crate::release::release`], the routine
//! `tamis held release` uses, so of two releases of one message from the page and the
//! command at once exactly one re-injects it. Without a `[release] next_hop` a release
//! answers [`ActionError::ReleaseUnavailable`].

use std::sync::Arc;

use crate::config::ReleaseConfig;
use crate::release::{Outcome, SmtpDelivery};
use crate::server::engine::SharedEngine;
use crate::store::{NewReport, ReportKind, ReportReceipt, ReportSource, Store, StoreError};

/// Most form fields read from an action request.
pub const MAX_FIELDS: usize = 16;
/// Longest verdict id accepted (the store's own limit).
pub const MAX_VERDICT_ID: usize = 64;

/// What the page can do to the store and to held mail.
pub trait Operations: Send + Sync {
    /// Records a report about a verdict. `domain` is the recipient domain the report is
    /// about (`None`: every recipient domain of the verdict).
    fn report(
        &self,
        verdict_id: &str,
        kind: ReportKind,
        source: ReportSource,
        domain: Option<&str>,
    ) -> Result<ReportReceipt, ActionError>;

    /// Releases a held message to its recipients.
    fn release(&self, verdict_id: &str) -> Result<Released, ActionError>;
}

/// A release that was delivered.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Released {
    /// Recipients the message was delivered to.
    pub recipients: usize,
}

/// Why an action was not done.
#[derive(Debug, thiserror::Error)]
pub enum ActionError {
    /// No SMTP next hop is configured for releases.
    #[error(
        "not available: no release next hop configured; set `next_hop` in the configuration's [release] table, or release with `tamis held release --to FILE`"
    )]
    ReleaseUnavailable,
    /// The next hop did not take the message; it is held again.
    #[error("verdict {0} was NOT released, still held: {1}")]
    Undelivered(String, String),
    /// Delivered, but the store could not record the release.
    #[error(
        "verdict {0} was delivered, but the store could not record the release ({1}); it stays marked as being released, and `tamis held unclaim` would make it releasable (and deliverable) again"
    )]
    Unrecorded(String, StoreError),
    /// Nothing is held under the verdict id.
    #[error("nothing is held under verdict {0}")]
    NotHeld(String),
    /// Another release of the message is in progress.
    #[error("verdict {0} is being released by someone else right now")]
    InProgress(String),
    /// The message was released before.
    #[error("verdict {0} was released already")]
    AlreadyReleased(String),
    /// The store failed.
    #[error(transparent)]
    Store(#[from] StoreError),
}

/// The operations of a store: reports, and releases once a next hop is given.
pub struct StoreOperations {
    store: Arc<dyn Store>,
    release: Option<(ReleaseConfig, SharedEngine)>,
}

impl StoreOperations {
    /// Operations on `store`, without releases.
    pub fn new(store: Arc<dyn Store>) -> StoreOperations {
        StoreOperations {
            store,
            release: None,
        }
    }

    /// The same operations releasing over SMTP to `release.next_hop` (none: releases
    /// stay unavailable); the engine's model gives the feature vector a release records.
    pub fn with_release(mut self, release: &ReleaseConfig, engine: SharedEngine) -> Self {
        self.release = release
            .next_hop
            .is_some()
            .then(|| (release.clone(), engine));
        self
    }
}

impl Operations for StoreOperations {
    fn report(
        &self,
        verdict_id: &str,
        kind: ReportKind,
        source: ReportSource,
        domain: Option<&str>,
    ) -> Result<ReportReceipt, ActionError> {
        let report = NewReport {
            verdict_id: verdict_id.to_string(),
            kind,
            source,
            domain: domain.map(str::to_string),
            at: crate::store::record::now(),
            features: None,
        };
        Ok(self.store.report(&report)?)
    }

    fn release(&self, verdict_id: &str) -> Result<Released, ActionError> {
        let Some((config, engine)) = &self.release else {
            return Err(ActionError::ReleaseUnavailable);
        };
        let Some(mut delivery) = SmtpDelivery::configured(config) else {
            return Err(ActionError::ReleaseUnavailable);
        };
        let mut analyzer =
            crate::analyze::Analyzer::new(engine.current().model().spec().clone()).ok();
        let mut features = |raw: &[u8]| {
            analyzer
                .as_mut()
                .and_then(|a| a.vectorize(raw).ok().cloned())
        };
        let outcome = crate::release::release(
            self.store.as_ref(),
            verdict_id,
            &mut delivery,
            &mut features,
        );
        delivery.close();
        let id = verdict_id.to_string();
        match outcome? {
            Outcome::Released { recipients, .. } => Ok(Released { recipients }),
            Outcome::Unrecorded { error, .. } => Err(ActionError::Unrecorded(id, error)),
            Outcome::Failed(u) => Err(ActionError::Undelivered(id, u.detail)),
            Outcome::NotFound => Err(ActionError::NotHeld(id)),
            Outcome::AlreadyReleased => Err(ActionError::AlreadyReleased(id)),
            Outcome::InProgress => Err(ActionError::InProgress(id)),
        }
    }
}

/// What an action asks for.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Verb {
    /// A report of this kind, by this kind of reporter.
    Report(ReportKind, ReportSource),
    /// Release the held message.
    Release,
}

impl Verb {
    /// The form value's verb part, as the page writes it.
    pub fn name(self) -> &'static str {
        match self {
            Verb::Report(ReportKind::Junk, ReportSource::Audit) => "audit-junk",
            Verb::Report(ReportKind::NotJunk, ReportSource::Audit) => "audit-legitimate",
            Verb::Report(ReportKind::Junk, _) => "junk",
            Verb::Report(ReportKind::NotJunk, _) => "legitimate",
            Verb::Release => "release",
        }
    }

    fn parse(name: &str) -> Option<Verb> {
        Some(match name {
            "junk" => Verb::Report(ReportKind::Junk, ReportSource::Operator),
            "legitimate" => Verb::Report(ReportKind::NotJunk, ReportSource::Operator),
            "audit-junk" => Verb::Report(ReportKind::Junk, ReportSource::Audit),
            "audit-legitimate" => Verb::Report(ReportKind::NotJunk, ReportSource::Audit),
            "release" => Verb::Release,
            _ => return None,
        })
    }
}

/// One action request, parsed from its form.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct ActionForm {
    /// What to do.
    pub verb: Verb,
    /// To which verdict.
    pub verdict_id: String,
    /// The recipient domain the page was showing (the report is about it); `None` when
    /// the form named none.
    pub domain: Option<String>,
    /// The token typed into the form, if any.
    pub token: Option<String>,
}

/// Parses an action form: `act=VERB:VERDICT_ID`, optional `domain` (the key present with
/// an empty value means recipients without a domain) and `token`. The error says what is
/// wrong.
pub fn parse_form(body: &str) -> Result<ActionForm, String> {
    let mut act = None;
    let mut domain = None;
    let mut token = None;
    for (name, value) in super::html::form_pairs(body, MAX_FIELDS) {
        match name.as_str() {
            "act" => act = Some(value),
            "domain" => domain = Some(value),
            "token" => token = Some(value),
            _ => {}
        }
    }
    let act = act.ok_or("the form has no act field; send act=VERB:VERDICT_ID")?;
    let (verb, verdict_id) = act
        .split_once(':')
        .ok_or("the act field is not VERB:VERDICT_ID")?;
    let verb = Verb::parse(verb)
        .ok_or("unknown verb; use junk, legitimate, audit-junk, audit-legitimate or release")?;
    if verdict_id.is_empty()
        || verdict_id.len() > MAX_VERDICT_ID
        || !verdict_id.bytes().all(|b| b.is_ascii_graphic())
    {
        return Err(format!(
            "the verdict id is not 1 to {MAX_VERDICT_ID} printable ASCII characters"
        ));
    }
    Ok(ActionForm {
        verb,
        verdict_id: verdict_id.to_string(),
        domain,
        token,
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn forms_name_a_verb_and_a_verdict() {
        let form = parse_form("token=abc&act=audit-legitimate%3AV0001&domain=example.org")
            .expect("parses");
        assert_eq!(
            form,
            ActionForm {
                verb: Verb::Report(ReportKind::NotJunk, ReportSource::Audit),
                verdict_id: "V0001".to_string(),
                domain: Some("example.org".to_string()),
                token: Some("abc".to_string()),
            }
        );
        assert_eq!(
            parse_form("act=release:V1").map(|f| f.verb),
            Ok(Verb::Release)
        );
        assert!(parse_form("domain=x").is_err());
        assert!(parse_form("act=delete:V1").is_err());
        assert!(parse_form("act=junk:").is_err());
        assert!(parse_form("act=junk:V%201").is_err(), "a space in the id");
        for verb in [
            Verb::Release,
            Verb::Report(ReportKind::Junk, ReportSource::Operator),
            Verb::Report(ReportKind::NotJunk, ReportSource::Audit),
        ] {
            let body = format!("act={}:V1", verb.name());
            assert_eq!(parse_form(&body).map(|f| f.verb), Ok(verb));
        }
    }

    #[test]
    fn release_says_it_is_not_available_until_a_next_hop_is_wired() {
        let dir = tempfile::tempdir().expect("temp dir");
        let store = crate::store::SqliteStore::open(
            &dir.path().join("s.sqlite"),
            crate::store::StoreOptions::default(),
        )
        .expect("open");
        let ops = StoreOperations::new(Arc::new(store));
        let e = ops.release("V1").expect_err("not wired");
        assert!(
            e.to_string()
                .starts_with("not available: no release next hop configured"),
            "{e}"
        );
    }
}
