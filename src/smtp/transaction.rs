//! One SMTP transaction as the server side hands it on, and the reply it waits for.
//!
//! This is the seam between the two halves of the SMTP bridge: the server session
//! (`crate::smtp::server`) speaks RFC 5321 to the relay and assembles a [`Transaction`];
//! a [`Handler`] (the bridge, `crate::smtp::bridge`) decides what becomes of it and
//! answers with one [`Answer`], which the session sends as the reply to the end of data.
//!
//! Invariants: a transaction reaches a handler only whole (every byte of its data was
//! received and the end-of-data line was seen; a message over the size limit or cut by
//! the client never reaches it), and the session sends no positive reply to the end of
//! data that the handler did not give (RFC 5321 §6.1: a 250 makes the message ours).

use std::future::Future;

/// The body type the client declared with `MAIL FROM ... BODY=` (RFC 6152).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub enum BodyType {
    /// No `BODY` parameter, or `BODY=7BIT`.
    #[default]
    SevenBit,
    /// `BODY=8BITMIME`.
    EightBitMime,
}

/// A whole transaction received from a client.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Transaction {
    /// The client's address as the listener saw it (for logs).
    pub peer: String,
    /// The name the client gave in `EHLO` or `HELO`.
    pub helo: String,
    /// The reverse path without angle brackets; empty for the null sender.
    pub sender: String,
    /// The forward paths without angle brackets, in the order given; at least one.
    pub recipients: Vec<String>,
    /// `SMTPUTF8` was given on `MAIL FROM` (RFC 6531).
    pub smtputf8: bool,
    /// The declared body type.
    pub body: BodyType,
    /// The message as received: dot-unstuffed, every line ended by CRLF, without the
    /// end-of-data line.
    pub data: Vec<u8>,
}

/// The reply to the end of data: a reply code, an enhanced status code (RFC 3463) and
/// one line of text.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Answer {
    /// The three-digit reply code (RFC 5321 §4.2).
    pub code: u16,
    /// The enhanced status code as `class.subject.detail`, e.g. `(2, 0, 0)`.
    pub enhanced: (u8, u16, u16),
    /// Text for the client; printable ASCII only (the session replaces anything else).
    pub text: String,
}

/// What the server session hands each whole transaction to.
pub trait Handler: Send + Sync + 'static {
    /// Decides what becomes of `transaction` and returns the reply for the client. The
    /// future resolves only once the outcome is safe (delivered downstream or committed
    /// to the store) or has failed; the session waits for it, within its own time limit.
    fn handle(&self, transaction: Transaction) -> impl Future<Output = Answer> + Send;
}
