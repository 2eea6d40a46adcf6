//! tamis: an inline mail filter for the people who run mail relays.
//!
//! Components, in the order a message flows through them:
//!
//! 1. [`mail`] — raw RFC 5322 bytes to the text a reader would see: MIME walk, transfer
//!    encodings, charsets, HTML rendered to text, URLs, header signals.
//! 2. [`text`] — Unicode normalization and tokenization: NFKC, case folding, format
//!    characters removed, look-alike letters mapped to a common skeleton, spaced-out letters
//!    rejoined, unspaced scripts split into character n-grams.
//! 3. [`features`] — word n-grams per field namespace, hashed with MurmurHash3 into a sparse
//!    vector with sublinear term frequency and L2 normalisation, described by a versioned
//!    [`features::FeatureSpec`].
//! 4. [`analyze`] — the one pipeline that runs `mail → text → features`, shared by training
//!    and scoring so both see exactly the same vector.
//!
//! 5. [`proto`] — the relay protocol's frames, codec and state machine (`proto/PROTOCOL.md`).
//! 6. [`store`] — what is kept after a verdict: the verdict journal, held (quarantined)
//!    messages, reports about verdicts, and the per-domain false-positive figures built
//!    from them; SQLite by default, behind a trait.
//!
//! 7. [`smtp`] — SMTP as tamis speaks it: for now the client that re-injects released mail
//!    into the relay's next hop.
//! 7. [`status`] — the status page on the metrics listener: per domain, volume, the
//!    false-positive estimate against its target, thresholds, held mail and the audit
//!    queue, read-only unless a token is configured.
//!
//! [`fsio`] is the one way files are replaced (temporary file, fsync, rename) and the
//! bounded, non-blocking way model and configuration files are read.
//! [`logsafe`] escapes every value that comes from a peer before it reaches a log line.
//!
//! [`demo`] generates the invented demonstration corpus used by examples and benchmarks.
#![forbid(unsafe_code)]

pub mod analyze;
pub mod calendar;
pub mod cli;
pub mod config;
pub mod demo;
pub mod features;
pub mod fsio;
pub mod label;
pub mod logsafe;
pub mod mail;
pub mod metrics;
pub mod model;
pub mod policy;
pub mod proto;
pub mod release;
pub mod rng;
pub mod server;
pub mod smtp;
pub mod status;
pub mod store;
pub mod text;
pub mod train;

pub use label::Label;
