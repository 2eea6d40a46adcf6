//! From raw RFC 5322 bytes to the text a reader would see.
//!
//! [`Extractor::extract`] parses the header section, walks the MIME tree ([`mime`]),
//! undoes transfer encodings ([`transfer`]) and charsets ([`charset`]), renders HTML to
//! text ([`html`]), cuts URLs out of the text into hosts ([`urls`]) and records structural
//! [`Signal`]s. It never fails on a message that starts like mail: malformed structure is
//! read on a best-effort basis and recorded as a signal. Work and memory are bounded by
//! [`ExtractLimits`], whatever the input.
//!
//! Two entry points differ only in what they refuse. [`Extractor::extract`] reads files
//! and refuses bytes that do not start like mail ([`MailError`]), so `tamis train` or
//! `tamis score` pointed at a picture says so. [`Extractor::extract_relayed`] reads what a
//! relay handed over, which is mail by definition: it never refuses, and a start that the
//! file reader would refuse becomes [`Signal::HeaderMalformed`], so a sender who controls
//! the first header field cannot opt a message out of scoring.

pub mod address;
pub mod charset;
pub mod encoded_words;
pub mod headers;
pub mod html;
pub mod mime;
pub mod signals;
pub mod transfer;
pub mod urls;

use serde::{Deserialize, Serialize};

pub use signals::{Signal, Signals};

use charset::CharsetOutcome;
use mime::{Leaf, Selection, WalkLimits};

/// Why a byte string could not be read as mail at all.
#[derive(Debug, thiserror::Error, PartialEq, Eq)]
pub enum MailError {
    /// The input is empty.
    #[error("empty input: a message needs at least a header section")]
    Empty,
    /// The input does not start with a header field or an mbox `From ` line.
    #[error(
        "not a mail message: the first line is neither a header field (`Name: value`) nor an mbox `From ` line"
    )]
    NotMail,
}

/// Bounds on the work done for one message.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
pub struct ExtractLimits {
    /// Raw message bytes examined; the rest is ignored (and recorded as a signal).
    pub max_raw_bytes: usize,
    /// Decoded text bytes kept per message, body and hidden text together.
    pub max_text_bytes: usize,
    /// Deepest MIME nesting walked.
    pub max_depth: usize,
    /// Most MIME entities visited.
    pub max_parts: usize,
}

impl Default for ExtractLimits {
    fn default() -> Self {
        ExtractLimits {
            max_raw_bytes: 8 << 20,
            max_text_bytes: 512 << 10,
            max_depth: WalkLimits::default().max_depth,
            max_parts: WalkLimits::default().max_parts,
        }
    }
}

/// What a reader would see in one message, field by field.
#[derive(Debug, Default, Clone)]
pub struct Extracted {
    /// The decoded `Subject` field.
    pub subject: String,
    /// Visible body text, one segment per rendered part, URLs cut out.
    pub body: Vec<String>,
    /// HTML text hidden from the reader by styling.
    pub hidden: Vec<String>,
    /// Hosts of URLs in the text and of HTML links, lower-cased, in order of appearance.
    pub url_hosts: Vec<String>,
    /// Domain of the `From` address.
    pub sender_domain: Option<String>,
    /// `method=result` tokens from the topmost `Authentication-Results` field.
    pub auth_results: Vec<String>,
    /// Structural signals.
    pub signals: Signals,
}

impl Extracted {
    /// Forgets the previous message, keeping allocations for reuse.
    pub fn clear(&mut self) {
        self.subject.clear();
        self.body.clear();
        self.hidden.clear();
        self.url_hosts.clear();
        self.sender_domain = None;
        self.auth_results.clear();
        self.signals.clear();
    }

    fn text_bytes(&self) -> usize {
        self.body.iter().chain(&self.hidden).map(String::len).sum()
    }
}

/// Turns raw messages into [`Extracted`] text, reusing its buffers between messages.
#[derive(Debug, Default)]
pub struct Extractor {
    limits: ExtractLimits,
    decoded: Vec<u8>,
    text: String,
}

impl Extractor {
    /// An extractor bounded by `limits`.
    pub fn new(limits: ExtractLimits) -> Self {
        Extractor {
            limits,
            ..Extractor::default()
        }
    }

    /// The limits this extractor enforces.
    pub fn limits(&self) -> ExtractLimits {
        self.limits
    }

    /// Extracts `raw`, a file that should hold one message, into `out` (cleared first).
    /// Refuses input that is empty or does not start like mail.
    pub fn extract(&mut self, raw: &[u8], out: &mut Extracted) -> Result<(), MailError> {
        out.clear();
        if raw.is_empty() {
            return Err(MailError::Empty);
        }
        if !headers::looks_like_mail(raw) {
            return Err(MailError::NotMail);
        }
        self.extract_checked(raw, out);
        Ok(())
    }

    /// Extracts `raw`, a message handed over by a relay, into `out` (cleared first).
    ///
    /// Never refuses: whatever can be read is read. When the file reader
    /// ([`Extractor::extract`]) would have refused the bytes — no header field at all, or a
    /// first line that is not a well-formed field (empty name, a space or an 8-bit byte in
    /// the name) — [`Signal::HeaderMalformed`] is recorded and the rest is read as usual.
    /// On bytes the file reader accepts, both give the same result.
    pub fn extract_relayed(&mut self, raw: &[u8], out: &mut Extracted) {
        out.clear();
        let odd_start = raw.is_empty() || !headers::looks_like_mail(raw);
        self.extract_checked(raw, out);
        if odd_start {
            out.signals.add(Signal::HeaderMalformed);
        }
    }

    fn extract_checked(&mut self, raw: &[u8], out: &mut Extracted) {
        let mut raw = raw;
        if raw.len() > self.limits.max_raw_bytes {
            raw = raw.get(..self.limits.max_raw_bytes).unwrap_or(raw);
            out.signals.add(Signal::RawCapHit);
        }
        raw = strip_mbox_from_line(raw);
        if memchr::memchr(0, raw).is_some() {
            out.signals.add(Signal::NulBytes);
        }

        let top = headers::parse_section(raw);
        out.subject = headers::first_value(&top.fields, "Subject").unwrap_or_default();
        out.sender_domain = headers::sender_domain(&top.fields);
        out.auth_results = headers::auth_results(&top.fields);

        let limits = WalkLimits {
            max_depth: self.limits.max_depth,
            max_parts: self.limits.max_parts,
        };
        let mut saw_plain = false;
        let mut saw_html = false;
        let mut url_count = 0usize;
        let mut signals = std::mem::take(&mut out.signals);
        mime::walk(
            raw,
            &top,
            limits,
            Selection::Reader,
            &mut signals,
            |leaf, signals| {
                saw_plain |= leaf.has_plain_alternative;
                let kind = text_kind(leaf);
                let Some(kind) = kind else {
                    signals.add(Signal::Attachment(attachment_type(leaf.mimetype)));
                    return;
                };
                let budget = self.limits.max_text_bytes.saturating_sub(out.text_bytes());
                if budget == 0 {
                    signals.add(Signal::TextCapHit);
                    return;
                }
                if !decode_leaf(leaf, budget, &mut self.decoded, &mut self.text, signals) {
                    signals.add(Signal::TextCapHit);
                }
                match kind {
                    TextKind::Plain => {
                        saw_plain = true;
                        let mut segment = String::with_capacity(self.text.len());
                        url_count += urls::cut_urls(&self.text, &mut segment, &mut out.url_hosts);
                        out.body.push(segment);
                    }
                    TextKind::Html => {
                        saw_html = true;
                        let rendered = html::html_to_text(&self.text, budget);
                        if rendered.truncated {
                            signals.add(Signal::TextCapHit);
                        }
                        for link in &rendered.links {
                            url_count += 1;
                            if out.url_hosts.len() < urls::MAX_HOSTS
                                && let Some(host) = urls::host_of(link)
                            {
                                out.url_hosts.push(host);
                            }
                        }
                        let mut segment = String::with_capacity(rendered.visible.len());
                        url_count +=
                            urls::cut_urls(&rendered.visible, &mut segment, &mut out.url_hosts);
                        out.body.push(segment);
                        if !rendered.hidden.trim().is_empty() {
                            signals.add(Signal::HiddenText);
                            out.hidden.push(rendered.hidden);
                        }
                    }
                }
            },
        );
        out.signals = signals;
        if saw_html && !saw_plain {
            out.signals.add(Signal::HtmlOnly);
        }
        if out.body.iter().all(|s| s.trim().is_empty()) {
            out.signals.add(Signal::NoText);
        }
        for bucket in [1, 4, 16, 64] {
            if url_count >= bucket as usize {
                out.signals.add(Signal::UrlsAtLeast(bucket));
            }
        }
    }
}

#[derive(Clone, Copy)]
enum TextKind {
    Plain,
    Html,
}

fn text_kind(leaf: &Leaf<'_>) -> Option<TextKind> {
    if leaf.is_attachment {
        return None;
    }
    match leaf.mimetype {
        "text/plain" | "text" | "" => Some(TextKind::Plain),
        "text/html" => Some(TextKind::Html),
        _ => None,
    }
}

/// The MIME type as a signal value: known shape only, so a hostile type string cannot
/// mint unbounded distinct features.
fn attachment_type(mimetype: &str) -> String {
    let ok = mimetype.len() <= 64
        && mimetype
            .bytes()
            .all(|b| b.is_ascii_alphanumeric() || b"/.+-_".contains(&b));
    if ok {
        mimetype.to_string()
    } else {
        "invalid".to_string()
    }
}

/// Undoes the transfer encoding and charset of `leaf` into `text` (cleared first), keeping
/// at most `budget` bytes. Returns false when the text was cut at the budget.
fn decode_leaf(
    leaf: &Leaf<'_>,
    budget: usize,
    decoded: &mut Vec<u8>,
    text: &mut String,
    signals: &mut Signals,
) -> bool {
    let report = transfer::decode(leaf.transfer, leaf.body, budget, decoded);
    if report.malformed {
        signals.add(Signal::TransferMalformed);
    }
    text.clear();
    match charset::decode_into(leaf.charset, decoded, text) {
        CharsetOutcome::Clean => {}
        CharsetOutcome::UnknownLabel => signals.add(Signal::CharsetUnknown),
        CharsetOutcome::InvalidBytes => signals.add(Signal::CharsetInvalid),
    }
    let mut complete = !report.truncated;
    if text.len() > budget {
        let mut cut = budget;
        while !text.is_char_boundary(cut) {
            cut -= 1;
        }
        text.truncate(cut);
        complete = false;
    }
    complete
}

fn strip_mbox_from_line(raw: &[u8]) -> &[u8] {
    if raw.starts_with(b"From ") {
        let end = memchr::memchr(b'\n', raw).map_or(raw.len(), |p| p + 1);
        raw.get(end..).unwrap_or_default()
    } else {
        raw
    }
}

/// One decoded text leaf, as listed by [`decoded_text_parts`].
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct TextPart {
    /// The part's MIME type.
    pub mimetype: String,
    /// The part's text after transfer and charset decoding (HTML is not rendered).
    pub text: String,
}

/// Every `text/*` leaf of `raw` in document order, alternatives and attachments included,
/// decoded but not rendered: the view a reference parser's part walk gives.
pub fn decoded_text_parts(raw: &[u8], limits: ExtractLimits) -> Result<Vec<TextPart>, MailError> {
    if raw.is_empty() {
        return Err(MailError::Empty);
    }
    if !headers::looks_like_mail(raw) {
        return Err(MailError::NotMail);
    }
    let raw = strip_mbox_from_line(raw.get(..limits.max_raw_bytes).unwrap_or(raw));
    let top = headers::parse_section(raw);
    let walk_limits = WalkLimits {
        max_depth: limits.max_depth,
        max_parts: limits.max_parts,
    };
    let mut parts = Vec::new();
    let mut signals = Signals::default();
    let mut decoded = Vec::new();
    let mut text = String::new();
    mime::walk(
        raw,
        &top,
        walk_limits,
        Selection::Every,
        &mut signals,
        |leaf, signals| {
            if leaf.mimetype.starts_with("text/") {
                decode_leaf(
                    leaf,
                    limits.max_text_bytes,
                    &mut decoded,
                    &mut text,
                    signals,
                );
                parts.push(TextPart {
                    mimetype: leaf.mimetype.to_string(),
                    text: text.clone(),
                });
            }
        },
    );
    Ok(parts)
}
