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

#[cfg(test)]
mod tests {
    use super::*;
    use crate::policy::Action;
    use crate::store::record::{DomainOutcome, Hold, JournalEntry};
    use crate::store::{HeldState, SqliteStore, StoreOptions};

    /// A delivery that records what it was given and answers as told.
    struct Fake {
        fail: Option<Failure>,
        delivered: Vec<Vec<u8>>,
    }

    impl Deliver for Fake {
        fn deliver(&mut self, held: &HeldMessage) -> Result<String, Undelivered> {
            if let Some(failure) = self.fail {
                return Err(Undelivered {
                    failure,
                    detail: "451 try later".to_string(),
                });
            }
            self.delivered.push(held.message.clone());
            Ok("delivered".to_string())
        }
    }

    fn held_store(dir: &std::path::Path, message: &[u8]) -> SqliteStore {
        let store =
            SqliteStore::open(&dir.join("s.sqlite"), StoreOptions::default()).expect("open");
        let entry = JournalEntry {
            verdict_id: "REL1".to_string(),
            at: now(),
            model: "m".to_string(),
            margin: Some(1.0),
            probability: None,
            outcomes: vec![DomainOutcome {
                domain: "example.org".to_string(),
                recipients: 2,
                action: Action::Quarantine,
                enforced: Action::Quarantine,
            }],
            size: message.len() as u64,
            sender_domain: None,
            reasons: vec![],
            scanned: true,
            subject: None,
            message_key: None,
        };
        let recipients = vec!["a@example.org".to_string(), "b@example.org".to_string()];
        store
            .hold(
                &entry,
                &Hold {
                    sender: "s@example.net",
                    recipients: &recipients,
                    message,
                },
            )
            .expect("hold");
        store
    }

    #[test]
    fn a_failed_delivery_leaves_the_message_held_and_a_good_one_releases_it_once() {
        let dir = tempfile::tempdir().expect("temp dir");
        let message = b"Subject: hi\r\n\r\nbody\r\n".to_vec();
        let store = held_store(dir.path(), &message);
        let mut vectors = 0;
        let mut features = |_: &[u8]| {
            vectors += 1;
            None
        };

        let mut failing = Fake {
            fail: Some(Failure::Transient),
            delivered: Vec::new(),
        };
        let outcome = release(&store, "REL1", &mut failing, &mut features).expect("store");
        assert!(
            matches!(&outcome, Outcome::Failed(u) if u.failure == Failure::Transient),
            "{outcome:?}"
        );
        let state = store
            .get_held("REL1")
            .expect("read")
            .map(|h| h.summary.state);
        assert_eq!(state, Some(HeldState::Held), "back to held, not lost");

        let mut good = Fake {
            fail: None,
            delivered: Vec::new(),
        };
        let outcome = release(&store, "REL1", &mut good, &mut features).expect("store");
        assert!(
            matches!(outcome, Outcome::Released { recipients: 2, .. }),
            "{outcome:?}"
        );
        let again = release(&store, "REL1", &mut good, &mut features).expect("store");
        assert!(matches!(again, Outcome::AlreadyReleased), "{again:?}");
        let missing = release(&store, "NOPE", &mut good, &mut features).expect("store");
        assert!(matches!(missing, Outcome::NotFound), "{missing:?}");
        assert_eq!(good.delivered, vec![message], "delivered once, as held");
        assert_eq!(
            vectors, 1,
            "the vector is taken for the delivered release only"
        );
    }
}
