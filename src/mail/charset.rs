//! Charset decoding of text parts into UTF-8.
//!
//! Labels are resolved by the WHATWG Encoding Standard (through `encoding_rs`), which is
//! how mail clients resolve them too: `iso-8859-1` reads as windows-1252, `ks_c_5601-1987`
//! as EUC-KR, and so on. A label nobody knows, or bytes that lie about their label, never
//! stop extraction: the text is decoded on a best-effort basis and the trick is recorded.

use encoding_rs::{Encoding, UTF_8, WINDOWS_1252};

/// How well the declared charset matched the bytes.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum CharsetOutcome {
    /// The declared (or default) charset decoded the bytes cleanly.
    Clean,
    /// The label is unknown; UTF-8 or windows-1252 was used instead.
    UnknownLabel,
    /// The bytes are not valid in the declared charset; invalid sequences became U+FFFD.
    InvalidBytes,
}

/// Decodes `bytes` declared as `label` and appends the text to `out`.
pub fn decode_into(label: &str, bytes: &[u8], out: &mut String) -> CharsetOutcome {
    let label = label.trim();
    let unlabelled = label.is_empty()
        || label.eq_ignore_ascii_case("us-ascii")
        || label.eq_ignore_ascii_case("ascii");
    if unlabelled {
        // Mail labelled (or defaulted to) US-ASCII routinely carries 8-bit text; UTF-8 is
        // the likeliest reading today and windows-1252 the classic fallback (common practice).
        decode_guessing(bytes, out);
        return CharsetOutcome::Clean;
    }
    match Encoding::for_label(label.as_bytes()) {
        Some(encoding) => {
            let (text, had_errors) = encoding.decode_without_bom_handling(bytes);
            out.push_str(&text);
            if had_errors {
                CharsetOutcome::InvalidBytes
            } else {
                CharsetOutcome::Clean
            }
        }
        None => {
            decode_guessing(bytes, out);
            CharsetOutcome::UnknownLabel
        }
    }
}

fn decode_guessing(bytes: &[u8], out: &mut String) {
    match std::str::from_utf8(bytes) {
        Ok(text) => out.push_str(text),
        Err(_) => {
            let (text, _) = WINDOWS_1252.decode_without_bom_handling(bytes);
            out.push_str(&text);
        }
    }
}

/// Decodes bytes that carry no charset label at all (e.g. raw 8-bit header values).
pub fn decode_unlabelled(bytes: &[u8]) -> std::borrow::Cow<'_, str> {
    match std::str::from_utf8(bytes) {
        Ok(text) => std::borrow::Cow::Borrowed(text),
        Err(_) => UTF_8.decode_without_bom_handling(bytes).0,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn dec(label: &str, bytes: &[u8]) -> (String, CharsetOutcome) {
        let mut out = String::new();
        let outcome = decode_into(label, bytes, &mut out);
        (out, outcome)
    }

    #[test]
    fn legacy_charsets_decode() {
        // Byte values from the charsets' published code charts (ISO 8859-1, KOI8-R, ISO-2022-JP RFC 1468).
        assert_eq!(dec("iso-8859-1", b"caf\xe9").0, "café");
        assert_eq!(dec("KOI8-R", b"\xd0\xd2\xc9\xd7\xc5\xd4").0, "привет");
        assert_eq!(
            dec("iso-2022-jp", b"\x1b$B$3$s$K$A$O\x1b(B").0,
            "こんにちは"
        );
        assert_eq!(dec("windows-1251", b"\xef\xf0\xe8").0, "при");
    }

    #[test]
    fn unknown_and_lying_charsets_are_best_effort() {
        assert_eq!(
            dec("x-no-such-charset", "naïve".as_bytes()),
            ("naïve".to_string(), CharsetOutcome::UnknownLabel)
        );
        let (text, outcome) = dec("utf-8", b"caf\xe9 ok");
        assert_eq!(outcome, CharsetOutcome::InvalidBytes);
        assert!(text.ends_with(" ok"));
        assert_eq!(dec("us-ascii", b"caf\xe9").0, "café");
    }
}
