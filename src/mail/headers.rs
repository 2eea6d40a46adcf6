//! Header sections: lenient parsing and the header-derived signals.
//!
//! `mailparse` splits the section into fields and parses the structured MIME fields (RFC
//! 2231 parameters); this module adds leniency on top — a field that cannot be parsed is
//! skipped rather than failing the whole message — and picks out what the filter uses: the
//! subject (decoded by [`super::encoded_words`]), the sender's domain
//! ([`super::address`]) and the verdicts of an upstream `Authentication-Results` field
//! (RFC 8601). Every value the filter reads is read in time linear in its length, and at
//! most [`super::encoded_words::MAX_FIELD_BYTES`] of it.

use std::borrow::Cow;

use mailparse::{MailHeader, parse_header};

use super::{address, encoded_words};

/// The header fields of one entity and where its body starts.
pub struct HeaderSection<'a> {
    /// Fields in order of appearance.
    pub fields: Vec<MailHeader<'a>>,
    /// Offset of the first body byte in the entity.
    pub body_start: usize,
    /// Some line in the header section could not be parsed and was skipped.
    pub malformed: bool,
}

/// Parses the header section at the start of `raw`, skipping lines that do not parse.
pub fn parse_section(raw: &[u8]) -> HeaderSection<'_> {
    let mut fields = Vec::new();
    let mut malformed = false;
    let mut ix = 0;
    while ix < raw.len() {
        let rest = &raw[ix..];
        if rest.starts_with(b"\n") {
            ix += 1;
            break;
        }
        if rest.starts_with(b"\r\n") {
            ix += 2;
            break;
        }
        // A line that is neither a field nor a continuation ends the header section: some
        // senders omit the blank line before the body (RFC 5322 §2.1 requires it).
        let line_end = memchr::memchr(b'\n', rest).unwrap_or(rest.len());
        let line = &rest[..line_end];
        let is_continuation = line.first().is_some_and(|&b| b == b' ' || b == b'\t');
        if !is_continuation && memchr::memchr(b':', line).is_none() {
            malformed = true;
            break;
        }
        match parse_header(rest) {
            Ok((field, used)) if used > 0 => {
                fields.push(field);
                ix += used;
            }
            _ => {
                malformed = true;
                ix += memchr::memchr(b'\n', rest).map_or(rest.len(), |p| p + 1);
            }
        }
    }
    HeaderSection {
        fields,
        body_start: ix.min(raw.len()),
        malformed,
    }
}

/// The first field called `name` (names compare case-insensitively, RFC 5322 §1.2.2).
fn first_field<'a, 'b>(fields: &'a [MailHeader<'b>], name: &str) -> Option<&'a MailHeader<'b>> {
    fields
        .iter()
        .find(|f| f.get_key_ref().eq_ignore_ascii_case(name))
}

/// The first value of field `name`, decoded (RFC 2047 words, folding removed), at most
/// [`super::encoded_words::MAX_FIELD_BYTES`] of it read.
pub fn first_value(fields: &[MailHeader<'_>], name: &str) -> Option<String> {
    first_field(fields, name).map(|f| encoded_words::decode_unstructured(f.get_value_raw()))
}

/// The value of the first field `name`, unfolded but without RFC 2047 decoding: for the
/// structured MIME fields (Content-Type and friends), where encoded words are not allowed
/// (RFC 2047 §5), so decoding them would only cost time. At most
/// [`super::encoded_words::MAX_FIELD_BYTES`] of the value are read.
pub fn first_structured<'a>(fields: &'a [MailHeader<'_>], name: &str) -> Option<Cow<'a, str>> {
    // RFC 5322 fields are ASCII; stray 8-bit bytes are read as Latin-1 so nothing is lost.
    let text = encoded_words::field_text(first_field(fields, name)?.get_value_raw());
    if text.contains(['\r', '\n']) {
        // Unfolding (RFC 5322 §2.2.3): the line break goes, the whitespace after it stays.
        Some(Cow::Owned(
            text.chars().filter(|&c| c != '\r' && c != '\n').collect(),
        ))
    } else {
        Some(text)
    }
}

/// Domain of the first address in the `From` field, lower-cased.
pub fn sender_domain(fields: &[MailHeader<'_>]) -> Option<String> {
    address::first_domain(first_field(fields, "From")?.get_value_raw())
}

/// Method results of the topmost `Authentication-Results` field (RFC 8601 §2.2), as
/// `method=result` tokens such as `spf=pass` or `dkim=fail`. Only the topmost field is
/// read: it is the one the operator's own border host added (common practice).
pub fn auth_results(fields: &[MailHeader<'_>]) -> Vec<String> {
    // A structured field (RFC 8601 §2.2) without encoded words: no RFC 2047 decoding needed.
    let Some(value) = first_structured(fields, "Authentication-Results") else {
        return Vec::new();
    };
    let mut tokens = Vec::new();
    // The authserv-id comes first and carries no result; results follow after ';'.
    for clause in value.split(';').skip(1) {
        let clause = clause.trim();
        let Some((method, rest)) = clause.split_once('=') else {
            continue;
        };
        let method = method.trim().to_ascii_lowercase();
        let result: String = rest
            .trim_start()
            .chars()
            .take_while(|c| c.is_ascii_alphanumeric())
            .collect::<String>()
            .to_ascii_lowercase();
        let method_ok = !method.is_empty()
            && method.len() <= 16
            && method
                .chars()
                .all(|c| c.is_ascii_alphanumeric() || c == '-');
        if method_ok && !result.is_empty() && result.len() <= 16 {
            tokens.push(format!("{method}={result}"));
        }
        if tokens.len() >= 16 {
            break;
        }
    }
    tokens
}

/// True when the entity's first line looks like the start of an RFC 5322 message: a
/// header field (`name:` with a printable-ASCII name, RFC 5322 §2.2) or an mbox `From `
/// separator line (RFC 4155).
pub fn looks_like_mail(raw: &[u8]) -> bool {
    let first_line = raw.split(|&b| b == b'\n').next().unwrap_or(raw);
    if first_line.starts_with(b"From ") {
        return true;
    }
    let Some(colon) = memchr::memchr(b':', first_line) else {
        return false;
    };
    colon > 0 && first_line[..colon].iter().all(|&b| (33..=126).contains(&b))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn skips_unparsable_lines() {
        let raw = b" leading continuation\nSubject: hi\r\n\r\nbody";
        let section = parse_section(raw);
        assert!(section.malformed);
        assert_eq!(
            first_value(&section.fields, "subject").as_deref(),
            Some("hi")
        );
        assert_eq!(&raw[section.body_start..], b"body");
    }

    #[test]
    fn reads_sender_domain_and_auth_results() {
        let raw = b"From: \"Ada Quill\" <ada@Mail.Example.ORG>\nAuthentication-Results: mx.example.net; spf=pass smtp.mailfrom=example.org; dkim=fail (bad sig) header.d=example.org; dmarc=none\n\n";
        let section = parse_section(raw);
        assert_eq!(
            sender_domain(&section.fields).as_deref(),
            Some("mail.example.org")
        );
        assert_eq!(
            auth_results(&section.fields),
            vec!["spf=pass", "dkim=fail", "dmarc=none"]
        );
    }

    #[test]
    fn sniffs_mail() {
        assert!(looks_like_mail(b"Subject: x\n\nbody"));
        assert!(looks_like_mail(
            b"From alice@example.org Thu Jan  1 00:00:00 2026\n"
        ));
        assert!(!looks_like_mail(b"\x89PNG\r\n\x1a\n"));
        assert!(!looks_like_mail(b""));
        assert!(!looks_like_mail(b"just some words: here"));
    }
}
