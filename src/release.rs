//! Releasing held mail: the one routine `tamis held release` and the status page share —
//! claim the message in the store, deliver it, record how that ended — and the SMTP
//! delivery to the configured next hop.
//!
//! Invariants: a release goes through [`Store::claim_release`] and then
//! [`Store::finish_release`], so of two releases of one message, from any processes or
//! threads, exactly one delivers it; a message whose delivery failed is put back in the
//! held state, never lost; a delivered release counts as a legitimate report (recorded by
//! the store in `finish_release`, with the message's feature vector when one is given).
//! Mail goes out byte for byte as it was held. This module knows nothing of the command
//! line or of HTTP: callers turn an [`Outcome`] into their own words.

use crate::features::SparseVector;
use crate::smtp::{Connection, Envelope, Failure, Timeouts};
use crate::store::record::now;
use crate::store::{Claim, HeldMessage, ReleaseOutcome, Store, StoreError};

/// A delivery that did not happen: the kind of failure and what the far side said.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Undelivered {
    /// Transient (4xx), permanent (5xx or not sendable) or the connection.
    pub failure: Failure,
    /// What went wrong, for a person.
    pub detail: String,
}

/// Where a claimed message goes.
pub trait Deliver {
    /// Delivers one claimed message; on success, a few words on where it went.
    fn deliver(&mut self, held: &HeldMessage) -> Result<String, Undelivered>;
}

/// How one release ended.
#[derive(Debug)]
pub enum Outcome {
    /// Delivered and recorded as released (and as a legitimate report).
    Released {
        /// Where it went, as the delivery said.
        detail: String,
        /// Recipients it was delivered to.
        recipients: usize,
    },
    /// Delivered, but the store could not record it: the message stays marked as being
    /// released (`tamis held unclaim` would make it releasable, and deliverable, again).
    Unrecorded {
        /// Where it went.
        detail: String,
        /// Why the store could not record it.
        error: StoreError,
    },
    /// Not delivered: the message is held again.
    Failed(Undelivered),
    /// Nothing is held under the id (never held, deleted or purged).
    NotFound,
    /// The message was released before; nothing done.
    AlreadyReleased,
    /// Another release of the message is in progress; nothing done.
    InProgress,
}

/// Releases the message held under `verdict_id` through `delivery`. `features` gives the
/// message's hashed feature vector for the legitimate report a release counts as (`None`:
/// recorded without one). Errors only when the store fails before or after a failed
/// delivery; a delivered message whose release could not be recorded is
/// [`Outcome::Unrecorded`].
pub fn release(
    store: &dyn Store,
    verdict_id: &str,
    delivery: &mut dyn Deliver,
    features: &mut dyn FnMut(&[u8]) -> Option<SparseVector>,
) -> Result<Outcome, StoreError> {
    let held = match store.claim_release(verdict_id)? {
        Claim::Won(held) => held,
        Claim::NotFound => return Ok(Outcome::NotFound),
        Claim::AlreadyReleased => return Ok(Outcome::AlreadyReleased),
        Claim::InProgress => return Ok(Outcome::InProgress),
    };
    match delivery.deliver(&held) {
        Ok(detail) => {
            let outcome = ReleaseOutcome::Delivered {
                at: now(),
                features: features(&held.message),
            };
            match store.finish_release(verdict_id, &outcome) {
                Ok(_) => Ok(Outcome::Released {
                    detail,
                    recipients: held.summary.recipients.len(),
                }),
                Err(error) => Ok(Outcome::Unrecorded { detail, error }),
            }
        }
        Err(undelivered) => {
            store.finish_release(verdict_id, &ReleaseOutcome::Failed)?;
            Ok(Outcome::Failed(undelivered))
        }
    }
}

/// This machine's host name, for `EHLO` when none is configured (`localhost` when it
/// cannot be read or is not a valid HELO name).
pub fn host_name() -> String {
    std::fs::read_to_string("/proc/sys/kernel/hostname")
        .ok()
        .map(|s| s.trim().to_string())
        .filter(|s| crate::smtp::client::check_helo_name(s).is_ok())
        .unwrap_or_else(|| "localhost".to_string())
}

/// Delivery over SMTP to a next hop, keeping one connection for every message it is
/// given (on a runtime of its own: call it from a thread that may block).
pub struct SmtpDelivery {
    next_hop: String,
    helo_name: String,
    timeouts: Timeouts,
    runtime: Option<tokio::runtime::Runtime>,
    connection: Option<Connection<tokio::net::TcpStream>>,
}

impl SmtpDelivery {
    /// Delivery to `next_hop` (`host:port`), greeting it as `helo_name`.
    pub fn new(next_hop: &str, helo_name: &str, timeouts: Timeouts) -> SmtpDelivery {
        SmtpDelivery {
            next_hop: next_hop.to_string(),
            helo_name: helo_name.to_string(),
            timeouts,
            runtime: None,
            connection: None,
        }
    }

    /// Delivery to `[release] next_hop` with the configured name and timeouts; `None`
    /// when no next hop is configured.
    pub fn configured(config: &crate::config::ReleaseConfig) -> Option<SmtpDelivery> {
        let next_hop = config.next_hop.as_ref()?;
        let helo_name = config.helo_name.clone().unwrap_or_else(host_name);
        Some(SmtpDelivery::new(next_hop, &helo_name, config.timeouts()))
    }

    /// The next hop, `host:port`.
    pub fn next_hop(&self) -> &str {
        &self.next_hop
    }

    /// Says goodbye to the next hop, if connected. The messages are delivered by then; a
    /// failed goodbye changes nothing.
    pub fn close(mut self) {
        if let (Some(runtime), Some(connection)) = (self.runtime.take(), self.connection.take()) {
            let _ = runtime.block_on(connection.quit());
        }
    }
}

impl Deliver for SmtpDelivery {
    fn deliver(&mut self, held: &HeldMessage) -> Result<String, Undelivered> {
        let runtime = match &self.runtime {
            Some(r) => r,
            None => match tokio::runtime::Builder::new_current_thread()
                .enable_all()
                .build()
            {
                Ok(r) => self.runtime.insert(r),
                Err(e) => {
                    return Err(Undelivered {
                        failure: Failure::Connection,
                        detail: format!("cannot start the network runtime: {e}"),
                    });
                }
            },
        };
        if self.connection.as_ref().is_some_and(|c| !c.is_usable()) {
            self.connection = None;
        }
        let connection = match &mut self.connection {
            Some(c) => c,
            None => match runtime.block_on(Connection::connect(
                &self.next_hop,
                &self.helo_name,
                self.timeouts,
            )) {
                Ok(c) => self.connection.insert(c),
                Err(e) => {
                    return Err(Undelivered {
                        failure: e.failure(),
                        detail: e.to_string(),
                    });
                }
            },
        };
        let envelope = Envelope {
            sender: &held.summary.sender,
            recipients: &held.summary.recipients,
        };
        match runtime.block_on(connection.send(&envelope, &held.message)) {
            Ok(reply) => Ok(format!("re-injected to {} ({reply})", self.next_hop)),
            Err(e) => Err(Undelivered {
                failure: e.failure(),
                detail: e.to_string(),
            }),
        }
    }
}
