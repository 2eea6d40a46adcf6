//! Content-Transfer-Encoding decoders (RFC 2045 §6): base64 and quoted-printable.
//!
//! Both are lenient, as mail in the wild demands: bytes that break the rules are skipped
//! (base64) or kept literally (quoted-printable, as RFC 2045 §6.7 advises), and the
//! caller learns that the input was malformed. Output never exceeds `limit` bytes, so a
//! 50 MB body costs at most `limit` bytes of memory here.

/// Outcome flags of one decode.
#[derive(Debug, Default, Clone, Copy, PartialEq, Eq)]
pub struct DecodeReport {
    /// The input broke the encoding's rules somewhere.
    pub malformed: bool,
    /// Decoding stopped at the output limit.
    pub truncated: bool,
}

/// The transfer encodings tamis decodes; anything else is passed through as is.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum TransferEncoding {
    /// `7bit`, `8bit`, `binary` or absent: the body is the content.
    Identity,
    /// `base64` (RFC 2045 §6.8).
    Base64,
    /// `quoted-printable` (RFC 2045 §6.7).
    QuotedPrintable,
}

impl TransferEncoding {
    /// Reads a Content-Transfer-Encoding value; unknown values are treated as identity,
    /// as RFC 2045 §6.4 suggests treating the body as application/octet-stream data.
    pub fn from_header(value: &str) -> Self {
        let v = value.trim();
        if v.eq_ignore_ascii_case("base64") {
            TransferEncoding::Base64
        } else if v.eq_ignore_ascii_case("quoted-printable") {
            TransferEncoding::QuotedPrintable
        } else {
            TransferEncoding::Identity
        }
    }
}

/// Decodes `input` in `encoding` into `out` (cleared first), writing at most `limit` bytes.
pub fn decode(
    encoding: TransferEncoding,
    input: &[u8],
    limit: usize,
    out: &mut Vec<u8>,
) -> DecodeReport {
    match encoding {
        TransferEncoding::Identity => {
            out.clear();
            let n = input.len().min(limit);
            out.extend_from_slice(input.get(..n).unwrap_or(input));
            DecodeReport {
                malformed: false,
                truncated: n < input.len(),
            }
        }
        TransferEncoding::Base64 => decode_base64(input, limit, out),
        TransferEncoding::QuotedPrintable => decode_quoted_printable(input, limit, out),
    }
}

fn base64_value(byte: u8) -> Option<u8> {
    match byte {
        b'A'..=b'Z' => Some(byte - b'A'),
        b'a'..=b'z' => Some(byte - b'a' + 26),
        b'0'..=b'9' => Some(byte - b'0' + 52),
        b'+' => Some(62),
        b'/' => Some(63),
        _ => None,
    }
}

/// Base64 per RFC 2045 §6.8: characters outside the alphabet are ignored (whitespace is
/// expected, anything else marks the input malformed); `=` ends the data.
pub fn decode_base64(input: &[u8], limit: usize, out: &mut Vec<u8>) -> DecodeReport {
    out.clear();
    let mut report = DecodeReport::default();
    let mut acc: u32 = 0;
    let mut bits = 0u32;
    for &byte in input {
        match base64_value(byte) {
            Some(v) => {
                acc = (acc << 6) | u32::from(v);
                bits += 6;
                if bits >= 8 {
                    bits -= 8;
                    if out.len() >= limit {
                        report.truncated = true;
                        return report;
                    }
                    out.push((acc >> bits) as u8);
                    acc &= (1 << bits) - 1;
                }
            }
            None if byte == b'=' => break,
            None if byte.is_ascii_whitespace() => {}
            None => report.malformed = true,
        }
    }
    // Six leftover bits cannot form a byte: the data was cut short.
    if bits >= 6 {
        report.malformed = true;
    }
    report
}

fn hex_value(byte: u8) -> Option<u8> {
    match byte {
        b'0'..=b'9' => Some(byte - b'0'),
        b'A'..=b'F' => Some(byte - b'A' + 10),
        // Lower case is not allowed by RFC 2045 §6.7 (1) but robust decoders accept it.
        b'a'..=b'f' => Some(byte - b'a' + 10),
        _ => None,
    }
}

/// Quoted-printable per RFC 2045 §6.7: `=XX` octets, `=` at end of line is a soft line
/// break, trailing whitespace on a line is transport padding and removed (rule 3).
pub fn decode_quoted_printable(input: &[u8], limit: usize, out: &mut Vec<u8>) -> DecodeReport {
    out.clear();
    let mut report = DecodeReport::default();
    for raw_line in input.split_inclusive(|&b| b == b'\n') {
        let (line, had_newline) = match raw_line.strip_suffix(b"\n") {
            Some(l) => (l.strip_suffix(b"\r").unwrap_or(l), true),
            None => (raw_line, false),
        };
        let body = trim_trailing_whitespace(line);
        let (body, soft_break) = match body.strip_suffix(b"=") {
            Some(b) => (b, true),
            None => (body, false),
        };
        let mut i = 0;
        while i < body.len() {
            if out.len() >= limit {
                report.truncated = true;
                return report;
            }
            let byte = body[i];
            if byte == b'=' {
                let hi = body.get(i + 1).copied().and_then(hex_value);
                let lo = body.get(i + 2).copied().and_then(hex_value);
                if let (Some(hi), Some(lo)) = (hi, lo) {
                    out.push(hi << 4 | lo);
                    i += 3;
                    continue;
                }
                // RFC 2045 §6.7 note (2): keep an invalid `=` sequence as it stands.
                report.malformed = true;
            }
            out.push(byte);
            i += 1;
        }
        if had_newline && !soft_break {
            if out.len() >= limit {
                report.truncated = true;
                return report;
            }
            out.push(b'\n');
        }
    }
    report
}

fn trim_trailing_whitespace(line: &[u8]) -> &[u8] {
    let end = line
        .iter()
        .rposition(|&b| b != b' ' && b != b'\t')
        .map_or(0, |p| p + 1);
    line.get(..end).unwrap_or(line)
}

#[cfg(test)]
mod tests {
    use super::*;

    fn qp(s: &str) -> (String, DecodeReport) {
        let mut out = Vec::new();
        let r = decode_quoted_printable(s.as_bytes(), usize::MAX, &mut out);
        (String::from_utf8_lossy(&out).into_owned(), r)
    }

    fn b64(s: &str) -> (Vec<u8>, DecodeReport) {
        let mut out = Vec::new();
        let r = decode_base64(s.as_bytes(), usize::MAX, &mut out);
        (out, r)
    }

    #[test]
    fn quoted_printable_rfc2045_rules() {
        // RFC 2045 §6.7 rule (1): "=3D" is "=", "=0D=0A" a line break.
        assert_eq!(qp("a=3Db").0, "a=b");
        // Rule (3): trailing whitespace is padding and is removed.
        assert_eq!(qp("word   \nnext").0, "word\nnext");
        // Rule (5): a soft line break "=" at end of line joins the lines.
        assert_eq!(
            qp("Now's the time =\nfor all folk").0,
            "Now's the time for all folk"
        );
        // Soft break followed by padding whitespace (rule 3 applies first).
        assert_eq!(qp("abc= \t\r\ndef").0, "abcdef");
        // RFC 2045 §6.7 note (2): a malformed "=" sequence is kept literally.
        let (text, report) = qp("50=% off =ZZ");
        assert_eq!(text, "50=% off =ZZ");
        assert!(report.malformed);
    }

    #[test]
    fn base64_skips_whitespace_and_reports_junk() {
        // RFC 4648 §10 test vectors.
        assert_eq!(b64("Zm9vYmFy").0, b"foobar");
        assert_eq!(b64("Zm9v\r\nYmE=").0, b"fooba");
        assert_eq!(b64("Zg==").0, b"f");
        let (out, report) = b64("Zm9v!YmFy");
        assert_eq!(out, b"foobar");
        assert!(report.malformed);
    }

    #[test]
    fn decoders_stop_at_limit() {
        let mut out = Vec::new();
        let r = decode_base64(&b"QUFB".repeat(1000), 10, &mut out);
        assert_eq!(out.len(), 10);
        assert!(r.truncated);
        let r = decode_quoted_printable(&b"=41".repeat(1000), 7, &mut out);
        assert_eq!(out, b"AAAAAAA");
        assert!(r.truncated);
    }
}
