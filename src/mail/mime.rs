//! The MIME walk (RFC 2045, RFC 2046): from a message to its leaf parts.
//!
//! The walk is iterative, with an explicit stack, so nesting depth costs heap rather than
//! call stack, and it is capped: parts deeper than `max_depth` or beyond `max_parts` are
//! skipped and recorded as signals rather than failing the message. Each multipart body is
//! scanned once for its own delimiters, so the total work is linear in the message size
//! times the (capped) depth.

use mailparse::{MailHeader, ParsedContentType, parse_content_type};
use memchr::memmem;

use super::headers::{HeaderSection, first_structured, parse_section};
use super::signals::{Signal, Signals};
use super::transfer::TransferEncoding;

/// Limits on the shape of the MIME tree.
#[derive(Debug, Clone, Copy)]
pub struct WalkLimits {
    /// Deepest nesting of multiparts and enclosed messages that is walked.
    pub max_depth: usize,
    /// Most entities (multiparts and leaves together) that are visited.
    pub max_parts: usize,
}

impl Default for WalkLimits {
    fn default() -> Self {
        WalkLimits {
            max_depth: 32,
            max_parts: 512,
        }
    }
}

/// Which leaves the walk visits.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Selection {
    /// What a reader sees: one alternative of each multipart/alternative.
    Reader,
    /// Every leaf, alternatives included (for diagnostics and reference comparisons).
    Every,
}

/// A leaf entity: a part with content rather than children.
pub struct Leaf<'a> {
    /// Lower-cased MIME type, e.g. `text/plain`.
    pub mimetype: &'a str,
    /// The declared charset (`us-ascii` when absent, per RFC 2045 §5.2).
    pub charset: &'a str,
    /// The part is marked `Content-Disposition: attachment`.
    pub is_attachment: bool,
    /// The part's Content-Transfer-Encoding.
    pub transfer: TransferEncoding,
    /// The still-encoded body bytes.
    pub body: &'a [u8],
    /// The leaf was chosen from a multipart/alternative that also offered text/plain.
    pub has_plain_alternative: bool,
}

struct Pending<'a> {
    raw: &'a [u8],
    depth: usize,
    in_digest: bool,
    has_plain_alternative: bool,
}

fn content_type(fields: &[MailHeader<'_>], in_digest: bool) -> ParsedContentType {
    match first_structured(fields, "Content-Type") {
        Some(value) => {
            let mut ctype = parse_content_type(&value);
            // RFC 2045 §5.2: a syntactically invalid type (no subtype) means text/plain.
            if !ctype.mimetype.contains('/') {
                ctype.mimetype = "text/plain".to_string();
            }
            // RFC 2231 §4: `name*=charset'lang'value` where the charset label was not one
            // the header parser knew; boundaries and charsets are ASCII, so decode here.
            for name in ["boundary", "charset"] {
                if !ctype.params.contains_key(name)
                    && let Some(value) = ctype.params.get(&format!("{name}*"))
                {
                    let decoded = rfc2231_value(value);
                    if name == "charset" {
                        ctype.charset = decoded.clone();
                    }
                    ctype.params.insert(name.to_string(), decoded);
                }
            }
            ctype
        }
        // RFC 2046 §5.1.5: in a digest the default type is message/rfc822.
        None if in_digest => ParsedContentType {
            mimetype: "message/rfc822".to_string(),
            ..ParsedContentType::default()
        },
        None => ParsedContentType::default(),
    }
}

/// The value part of an RFC 2231 extended parameter (`charset'lang'percent-encoded`).
fn rfc2231_value(raw: &str) -> String {
    let encoded = raw.splitn(3, '\'').nth(2).unwrap_or(raw);
    let bytes = encoded.as_bytes();
    let mut out = Vec::with_capacity(bytes.len());
    let mut i = 0;
    while i < bytes.len() {
        let hex = |b: Option<&u8>| b.and_then(|b| (*b as char).to_digit(16));
        match (bytes[i], hex(bytes.get(i + 1)), hex(bytes.get(i + 2))) {
            (b'%', Some(hi), Some(lo)) => {
                out.push((hi * 16 + lo) as u8);
                i += 3;
            }
            (b, _, _) => {
                out.push(b);
                i += 1;
            }
        }
    }
    String::from_utf8_lossy(&out).into_owned()
}

fn is_attachment(fields: &[MailHeader<'_>]) -> bool {
    first_structured(fields, "Content-Disposition")
        .map(|v| mailparse::parse_content_disposition(&v).disposition)
        == Some(mailparse::DispositionType::Attachment)
}

/// Walks the entity `raw`, whose header section `top` the caller has already parsed, and
/// calls `visit` for every leaf chosen by `selection`, in document order.
pub fn walk<'a>(
    raw: &'a [u8],
    top: &HeaderSection<'a>,
    limits: WalkLimits,
    selection: Selection,
    signals: &mut Signals,
    mut visit: impl FnMut(&Leaf<'_>, &mut Signals),
) {
    let mut stack: Vec<Pending<'a>> = Vec::new();
    let mut visited = 0usize;
    let mut first = Some(top);
    let mut next = Some(Pending {
        raw,
        depth: 0,
        in_digest: false,
        has_plain_alternative: false,
    });
    while let Some(entity) = next.take().or_else(|| stack.pop()) {
        visited += 1;
        if visited > limits.max_parts {
            signals.add(Signal::TooManyParts);
            return;
        }
        let owned_section;
        let section = match first.take() {
            Some(s) => s,
            None => {
                owned_section = parse_section(entity.raw);
                &owned_section
            }
        };
        if section.malformed {
            signals.add(Signal::HeaderMalformed);
        }
        let body = entity.raw.get(section.body_start..).unwrap_or_default();
        let ctype = content_type(&section.fields, entity.in_digest);
        let boundary = ctype.params.get("boundary").filter(|b| !b.is_empty());

        if ctype.mimetype.starts_with("multipart/")
            && let Some(boundary) = boundary
        {
            if entity.depth >= limits.max_depth {
                signals.add(Signal::TooDeep);
                continue;
            }
            let (parts, closed) = split_multipart(body, boundary.as_bytes());
            if !closed {
                signals.add(Signal::MultipartUnclosed);
            }
            if parts.is_empty() && !closed {
                // No delimiter at all: read the body as text rather than lose it, so junk
                // cannot hide behind a broken boundary.
                let leaf = Leaf {
                    mimetype: "text/plain",
                    charset: "us-ascii",
                    is_attachment: false,
                    transfer: TransferEncoding::Identity,
                    body,
                    has_plain_alternative: entity.has_plain_alternative,
                };
                visit(&leaf, signals);
                continue;
            }
            let in_digest = ctype.mimetype == "multipart/digest";
            let mut has_plain_alternative = entity.has_plain_alternative;
            let chosen: Vec<&'a [u8]> =
                if selection == Selection::Reader && ctype.mimetype == "multipart/alternative" {
                    let (choice, offered_plain) = choose_alternative(&parts);
                    has_plain_alternative |= offered_plain;
                    vec![choice]
                } else {
                    parts
                };
            for part in chosen.into_iter().rev() {
                stack.push(Pending {
                    raw: part,
                    depth: entity.depth + 1,
                    in_digest,
                    has_plain_alternative,
                });
            }
            continue;
        }

        let read_enclosed = selection == Selection::Every || !is_attachment(&section.fields);
        if ctype.mimetype == "message/rfc822" && read_enclosed {
            if entity.depth >= limits.max_depth {
                signals.add(Signal::TooDeep);
                continue;
            }
            stack.push(Pending {
                raw: body,
                depth: entity.depth + 1,
                in_digest: false,
                has_plain_alternative: false,
            });
            continue;
        }

        let transfer = first_structured(&section.fields, "Content-Transfer-Encoding")
            .map_or(TransferEncoding::Identity, |v| {
                TransferEncoding::from_header(&v)
            });
        // A multipart without a boundary cannot be split: read it as text (RFC 2046 makes
        // the parameter mandatory, so this is malformed mail, often deliberately).
        let mimetype = if ctype.mimetype.starts_with("multipart/") {
            signals.add(Signal::MultipartUnclosed);
            "text/plain"
        } else {
            &ctype.mimetype
        };
        let leaf = Leaf {
            mimetype,
            charset: &ctype.charset,
            is_attachment: is_attachment(&section.fields),
            transfer,
            body,
            has_plain_alternative: entity.has_plain_alternative,
        };
        visit(&leaf, signals);
    }
}

/// Picks the alternative a reader would see: RFC 2046 §5.1.4 orders alternatives from
/// plainest to richest, and mail readers show the richest they can render, so the last
/// HTML or nested multipart wins, then the last plain text, then the last part. Also
/// tells whether a text/plain alternative was on offer.
fn choose_alternative<'a>(parts: &[&'a [u8]]) -> (&'a [u8], bool) {
    let types: Vec<String> = parts
        .iter()
        .map(|p| content_type(&parse_section(p).fields, false).mimetype)
        .collect();
    let pick = |pred: &dyn Fn(&str) -> bool| {
        types
            .iter()
            .rposition(|t| pred(t))
            .and_then(|i| parts.get(i).copied())
    };
    let choice = pick(&|t| t == "text/html" || t.starts_with("multipart/"))
        .or_else(|| pick(&|t| t == "text/plain"))
        .or_else(|| parts.last().copied())
        .unwrap_or_default();
    (choice, types.iter().any(|t| t == "text/plain"))
}

/// Splits a multipart body at its delimiter lines (RFC 2046 §5.1.1). Returns the body
/// parts and whether the close delimiter was seen. The CRLF before each delimiter belongs
/// to the delimiter; preamble and epilogue are dropped.
pub fn split_multipart<'a>(body: &'a [u8], boundary: &[u8]) -> (Vec<&'a [u8]>, bool) {
    let mut delimiter = Vec::with_capacity(boundary.len() + 2);
    delimiter.extend_from_slice(b"--");
    delimiter.extend_from_slice(boundary);
    let finder = memmem::Finder::new(&delimiter);

    let mut parts = Vec::new();
    let mut part_start: Option<usize> = None;
    for at in finder.find_iter(body) {
        let at_line_start = at == 0 || body.get(at - 1) == Some(&b'\n');
        if !at_line_start {
            continue;
        }
        let after = at + delimiter.len();
        let rest = body.get(after..).unwrap_or_default();
        let is_close = rest.starts_with(b"--");
        let tail = if is_close { &rest[2..] } else { rest };
        // A longer boundary that merely starts with ours is not our delimiter.
        let line_end = memchr::memchr(b'\n', tail).unwrap_or(tail.len());
        if !tail[..line_end].iter().all(|b| b.is_ascii_whitespace()) {
            continue;
        }
        if let Some(start) = part_start.take() {
            parts.push(trim_delimiter_crlf(body.get(start..at).unwrap_or_default()));
        }
        if is_close {
            return (parts, true);
        }
        let next_line = after + line_end + 1;
        part_start = Some(next_line.min(body.len()));
    }
    if let Some(start) = part_start {
        parts.push(body.get(start..).unwrap_or_default());
    }
    (parts, false)
}

fn trim_delimiter_crlf(part: &[u8]) -> &[u8] {
    let part = part.strip_suffix(b"\n").unwrap_or(part);
    part.strip_suffix(b"\r").unwrap_or(part)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn splits_parts_and_ignores_longer_boundaries() {
        let body =
            b"preamble\r\n--b\r\nA: 1\r\n\r\none\r\n--bx\r\n--b\r\n\r\ntwo\r\n--b--\r\nepilogue";
        let (parts, closed) = split_multipart(body, b"b");
        assert!(closed);
        assert_eq!(
            parts,
            vec![&b"A: 1\r\n\r\none\r\n--bx"[..], &b"\r\ntwo"[..]]
        );
    }

    #[test]
    fn unclosed_multipart_runs_to_end() {
        let (parts, closed) = split_multipart(b"--b\n\nonly part", b"b");
        assert!(!closed);
        assert_eq!(parts, vec![&b"\nonly part"[..]]);
    }
}
