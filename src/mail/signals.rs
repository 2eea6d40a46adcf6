//! Structural signals: facts about a message's shape that a reader does not see as words
//! but that tell junk from legitimate mail, or that record where extraction had to guess.

use std::fmt;

/// One structural fact about a message. Its [`fmt::Display`] form is the token the
/// feature hasher sees and the label `tamis extract` prints.
#[derive(Debug, Clone, PartialEq, Eq, Hash)]
pub enum Signal {
    /// The only readable text came from HTML parts.
    HtmlOnly,
    /// No readable text was found at all.
    NoText,
    /// HTML contained text hidden from the reader by styling.
    HiddenText,
    /// An attachment (or other non-text leaf) of this MIME type was skipped.
    Attachment(String),
    /// A text part named a charset nobody knows; it was decoded on a best-effort basis.
    CharsetUnknown,
    /// A text part's bytes were invalid in the charset it declared.
    CharsetInvalid,
    /// A base64 or quoted-printable body broke the encoding's rules.
    TransferMalformed,
    /// A header section contained lines that could not be parsed, or relayed mail did not
    /// start with a well-formed header field (see [`crate::mail::Extractor::extract_relayed`]).
    HeaderMalformed,
    /// A multipart's boundary never appeared, or its closing boundary never came.
    MultipartUnclosed,
    /// MIME nesting went deeper than the configured limit; deeper parts were skipped.
    TooDeep,
    /// More MIME parts than the configured limit; the rest were skipped.
    TooManyParts,
    /// The raw message was longer than the bytes examined.
    RawCapHit,
    /// The decoded text was longer than the bytes examined.
    TextCapHit,
    /// The message carries more URLs than a bucket boundary (1, 4, 16, 64).
    UrlsAtLeast(u32),
    /// The message contains NUL bytes, which RFC 5322 does not allow.
    NulBytes,
}

impl fmt::Display for Signal {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            Signal::HtmlOnly => f.write_str("html-only"),
            Signal::NoText => f.write_str("no-text"),
            Signal::HiddenText => f.write_str("hidden-text"),
            Signal::Attachment(mime) => write!(f, "attachment:{mime}"),
            Signal::CharsetUnknown => f.write_str("charset-unknown"),
            Signal::CharsetInvalid => f.write_str("charset-invalid"),
            Signal::TransferMalformed => f.write_str("transfer-malformed"),
            Signal::HeaderMalformed => f.write_str("header-malformed"),
            Signal::MultipartUnclosed => f.write_str("multipart-unclosed"),
            Signal::TooDeep => f.write_str("mime-too-deep"),
            Signal::TooManyParts => f.write_str("mime-too-many-parts"),
            Signal::RawCapHit => f.write_str("raw-cap-hit"),
            Signal::TextCapHit => f.write_str("text-cap-hit"),
            Signal::UrlsAtLeast(n) => write!(f, "urls>={n}"),
            Signal::NulBytes => f.write_str("nul-bytes"),
        }
    }
}

/// A set of signals that keeps first-seen order and holds each signal once.
#[derive(Debug, Default, Clone)]
pub struct Signals(Vec<Signal>);

impl Signals {
    /// Records `signal` unless it is already present.
    pub fn add(&mut self, signal: Signal) {
        // Linear search is fine: a message has a handful of signals and attachment types
        // are capped by the part limit.
        if !self.0.contains(&signal) {
            self.0.push(signal);
        }
    }

    /// True when `signal` was recorded.
    pub fn contains(&self, signal: &Signal) -> bool {
        self.0.contains(signal)
    }

    /// The recorded signals in first-seen order.
    pub fn iter(&self) -> impl Iterator<Item = &Signal> {
        self.0.iter()
    }

    /// Forgets all signals, keeping capacity.
    pub fn clear(&mut self) {
        self.0.clear();
    }
}
