//! SMTP (RFC 5321) as tamis speaks it.
//!
//! For now this room holds the client side ([`client`]): how released mail is re-injected
//! into the relay's next hop. The SMTP bridge for relays without a native plug-in will add
//! the server side here, and reuse the client to pass accepted mail on; so the client
//! keeps one connection open for as many transactions as its caller has, and knows
//! nothing about the store or the command line.
//!
//! Invariants of everything in this room: nothing a peer sends reaches a panic (replies
//! are bounded in line length and line count, and parsed without indexing), every wait on
//! the network has a timeout, and a peer's text is escaped before it reaches an error
//! message (see [`crate::logsafe`]).

pub mod client;
pub mod transaction;

pub use client::{
    Connection, Envelope, Extensions, Failure, Reply, SmtpError, Stage, Timeouts, encode_data,
};
pub use transaction::{Answer, BodyType, Handler, Transaction};
