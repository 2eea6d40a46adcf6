//! Wrapping text into MIME: charsets, transfer encodings, encoded-word headers and
//! multipart trees, written the way mail software commonly writes them.
//!
//! Invariants: every line written is at most 998 octets and ends in CRLF (RFC 5322 §2.1.1);
//! 7bit bodies are pure ASCII; boundaries never occur inside the parts they separate (they
//! carry a random token that the body alphabet of a generated part cannot produce).

use encoding_rs::Encoding;

/// The character sets the demo corpus writes text in.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(crate) enum Charset {
    /// Plain ASCII, labelled `us-ascii`.
    Ascii,
    /// UTF-8.
    Utf8,
    /// ISO-8859-1 (Latin-1).
    Latin1,
    /// ISO-8859-15 (Latin-9, which adds the euro sign).
    Latin9,
    /// Windows-1252.
    Windows1252,
    /// KOI8-R (Russian).
    Koi8R,
    /// Windows-1251 (Cyrillic).
    Windows1251,
    /// ISO-2022-JP (Japanese, 7-bit with escape sequences).
    Iso2022Jp,
}

impl Charset {
    /// The MIME `charset` parameter value.
    pub(crate) fn label(self) -> &'static str {
        match self {
            Charset::Ascii => "us-ascii",
            Charset::Utf8 => "utf-8",
            Charset::Latin1 => "iso-8859-1",
            Charset::Latin9 => "iso-8859-15",
            Charset::Windows1252 => "windows-1252",
            Charset::Koi8R => "koi8-r",
            Charset::Windows1251 => "windows-1251",
            Charset::Iso2022Jp => "iso-2022-jp",
        }
    }

    /// The text in this charset, or `None` when a character has no code in it.
    pub(crate) fn encode(self, text: &str) -> Option<Vec<u8>> {
        let encoding: &'static Encoding = match self {
            Charset::Ascii => {
                return text.is_ascii().then(|| text.as_bytes().to_vec());
            }
            Charset::Utf8 => return Some(text.as_bytes().to_vec()),
            Charset::Latin1 => {
                // encoding_rs follows WHATWG, where the label iso-8859-1 means windows-1252;
                // the two agree on every character up to U+00FF outside the C1 block, so
                // restricting the input to that range yields true Latin-1 bytes.
                if text
                    .chars()
                    .any(|c| c as u32 > 0xff || ('\u{80}'..='\u{9f}').contains(&c))
                {
                    return None;
                }
                encoding_rs::WINDOWS_1252
            }
            Charset::Latin9 => encoding_rs::ISO_8859_15,
            Charset::Windows1252 => encoding_rs::WINDOWS_1252,
            Charset::Koi8R => encoding_rs::KOI8_R,
            Charset::Windows1251 => encoding_rs::WINDOWS_1251,
            Charset::Iso2022Jp => encoding_rs::ISO_2022_JP,
        };
        let (bytes, _, unmappable) = encoding.encode(text);
        if unmappable {
            // encoding_rs would substitute numeric character references; a mail client would
            // not, so the caller falls back to another charset instead.
            None
        } else {
            Some(bytes.into_owned())
        }
    }
}

/// A Content-Transfer-Encoding (RFC 2045 §6).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(crate) enum Cte {
    /// Short lines of ASCII.
    SevenBit,
    /// Short lines of any octets but NUL.
    EightBit,
    /// Quoted-printable.
    QuotedPrintable,
    /// Base64.
    Base64,
}

impl Cte {
    fn label(self) -> &'static str {
        match self {
            Cte::SevenBit => "7bit",
            Cte::EightBit => "8bit",
            Cte::QuotedPrintable => "quoted-printable",
            Cte::Base64 => "base64",
        }
    }
}

/// One node of a MIME tree.
#[derive(Debug, Clone)]
pub(crate) enum Part {
    /// A text leaf. `text` uses `\n` line ends; they become CRLF on output.
    Text {
        subtype: &'static str,
        text: String,
        charset: Charset,
        cte: Cte,
        /// Written as `Content-Disposition: attachment` when set (a text attachment).
        filename: Option<String>,
    },
    /// A binary leaf, always base64.
    Binary {
        mime: &'static str,
        filename: Option<String>,
        data: Vec<u8>,
        content_id: Option<String>,
        inline: bool,
    },
    /// A multipart container.
    Multipart {
        subtype: &'static str,
        boundary: String,
        parts: Vec<Part>,
    },
    /// An embedded message (`message/rfc822`), already encoded.
    Message { bytes: Vec<u8> },
}

/// Appends the MIME header fields of `part`, the blank line and its body to `out`.
///
/// Called right after a message's own header fields, this completes a message; called for a
/// child of a multipart, it writes one body part.
pub(crate) fn encode_part(part: &Part, out: &mut Vec<u8>) {
    match part {
        Part::Text {
            subtype,
            text,
            charset,
            cte,
            filename,
        } => {
            let (bytes, charset) = match charset.encode(text) {
                Some(b) => (b, *charset),
                None => (text.as_bytes().to_vec(), Charset::Utf8),
            };
            let cte = effective_cte(*cte, &bytes);
            push_line(
                out,
                &format!(
                    "Content-Type: text/{subtype}; charset=\"{}\"",
                    charset.label()
                ),
            );
            push_line(out, &format!("Content-Transfer-Encoding: {}", cte.label()));
            if let Some(name) = filename {
                push_line(
                    out,
                    &format!("Content-Disposition: attachment; filename=\"{name}\""),
                );
            }
            out.extend_from_slice(b"\r\n");
            encode_body(&bytes, cte, out);
        }
        Part::Binary {
            mime,
            filename,
            data,
            content_id,
            inline,
        } => {
            match filename {
                Some(name) => push_line(out, &format!("Content-Type: {mime}; name=\"{name}\"")),
                None => push_line(out, &format!("Content-Type: {mime}")),
            }
            push_line(out, "Content-Transfer-Encoding: base64");
            if let Some(id) = content_id {
                push_line(out, &format!("Content-ID: <{id}>"));
            }
            let disposition = if *inline { "inline" } else { "attachment" };
            match filename {
                Some(name) => push_line(
                    out,
                    &format!("Content-Disposition: {disposition};\r\n\tfilename=\"{name}\""),
                ),
                None => push_line(out, &format!("Content-Disposition: {disposition}")),
            }
            out.extend_from_slice(b"\r\n");
            base64_lines(data, out);
        }
        Part::Multipart {
            subtype,
            boundary,
            parts,
        } => {
            push_line(
                out,
                &format!("Content-Type: multipart/{subtype};\r\n\tboundary=\"{boundary}\""),
            );
            out.extend_from_slice(b"\r\n");
            if *subtype != "digest" {
                push_line(
                    out,
                    "(Several parts follow; a MIME-aware reader shows them.)",
                );
            }
            for child in parts {
                out.extend_from_slice(b"\r\n--");
                out.extend_from_slice(boundary.as_bytes());
                out.extend_from_slice(b"\r\n");
                encode_part(child, out);
            }
            out.extend_from_slice(b"\r\n--");
            out.extend_from_slice(boundary.as_bytes());
            out.extend_from_slice(b"--\r\n");
        }
        Part::Message { bytes } => {
            push_line(out, "Content-Type: message/rfc822");
            out.extend_from_slice(b"\r\n");
            out.extend_from_slice(bytes);
        }
    }
}

/// The requested encoding, upgraded when the bytes cannot travel in it.
fn effective_cte(requested: Cte, bytes: &[u8]) -> Cte {
    let long_line = bytes.split(|b| *b == b'\n').any(|l| l.len() > 900);
    match requested {
        Cte::SevenBit if !bytes.is_ascii() || long_line => Cte::QuotedPrintable,
        Cte::EightBit if long_line => Cte::QuotedPrintable,
        other => other,
    }
}

fn encode_body(bytes: &[u8], cte: Cte, out: &mut Vec<u8>) {
    match cte {
        Cte::SevenBit | Cte::EightBit => {
            for line in bytes.split(|b| *b == b'\n') {
                out.extend_from_slice(line.strip_suffix(b"\r").unwrap_or(line));
                out.extend_from_slice(b"\r\n");
            }
        }
        Cte::QuotedPrintable => quoted_printable(bytes, out),
        Cte::Base64 => {
            let crlf = to_crlf(bytes);
            base64_lines(&crlf, out);
        }
    }
}

fn to_crlf(bytes: &[u8]) -> Vec<u8> {
    let mut out = Vec::with_capacity(bytes.len() + bytes.len() / 40);
    for line in bytes.split(|b| *b == b'\n') {
        out.extend_from_slice(line.strip_suffix(b"\r").unwrap_or(line));
        out.extend_from_slice(b"\r\n");
    }
    out
}

fn push_line(out: &mut Vec<u8>, line: &str) {
    out.extend_from_slice(line.as_bytes());
    out.extend_from_slice(b"\r\n");
}

const B64: &[u8; 64] = b"ABCDEFGHIJKLMNOPQRSTUVWXYZabcdefghijklmnopqrstuvwxyz0123456789+/";

/// Standard base64 (RFC 4648 §4) with padding, no line breaks.
pub(crate) fn base64(data: &[u8]) -> String {
    let mut out = String::with_capacity(data.len().div_ceil(3) * 4);
    let sym = |v: u32| char::from(B64.get((v & 63) as usize).copied().unwrap_or(b'A'));
    for chunk in data.chunks(3) {
        let b0 = u32::from(chunk.first().copied().unwrap_or(0));
        let b1 = u32::from(chunk.get(1).copied().unwrap_or(0));
        let b2 = u32::from(chunk.get(2).copied().unwrap_or(0));
        let n = (b0 << 16) | (b1 << 8) | b2;
        out.push(sym(n >> 18));
        out.push(sym(n >> 12));
        out.push(if chunk.len() > 1 { sym(n >> 6) } else { '=' });
        out.push(if chunk.len() > 2 { sym(n) } else { '=' });
    }
    out
}

/// Base64 body text in lines of 76 characters (RFC 2045 §6.8).
fn base64_lines(data: &[u8], out: &mut Vec<u8>) {
    // 57 input octets make exactly one 76-character line.
    for chunk in data.chunks(57) {
        out.extend_from_slice(base64(chunk).as_bytes());
        out.extend_from_slice(b"\r\n");
    }
}

/// Quoted-printable body (RFC 2045 §6.7): hard line breaks stay CRLF, soft breaks keep every
/// encoded line within 76 characters, trailing white space is encoded.
fn quoted_printable(bytes: &[u8], out: &mut Vec<u8>) {
    const HEX: &[u8; 16] = b"0123456789ABCDEF";
    for line in bytes.split(|b| *b == b'\n') {
        let line = line.strip_suffix(b"\r").unwrap_or(line);
        let mut width = 0usize;
        for (i, &b) in line.iter().enumerate() {
            let last = i + 1 == line.len();
            let literal =
                (b == b' ' || b == b'\t') && !last || (33..=126).contains(&b) && b != b'=';
            let piece_len = if literal { 1 } else { 3 };
            // Leave room for the '=' of a soft break.
            if width + piece_len > 75 {
                out.extend_from_slice(b"=\r\n");
                width = 0;
            }
            if literal {
                out.push(b);
            } else {
                out.push(b'=');
                out.push(HEX.get(usize::from(b >> 4)).copied().unwrap_or(b'0'));
                out.push(HEX.get(usize::from(b & 15)).copied().unwrap_or(b'0'));
            }
            width += piece_len;
        }
        out.extend_from_slice(b"\r\n");
    }
}

/// How an encoded-word carries its octets (RFC 2047 §4).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(crate) enum WordEncoding {
    /// "B": base64.
    B,
    /// "Q": a quoted-printable variant for headers.
    Q,
}

/// Header text as written on the wire: unchanged when it is plain ASCII, otherwise a run of
/// RFC 2047 encoded-words folded onto continuation lines, each word at most 66 characters.
///
/// Each word holds whole characters, and for stateful charsets each word is encoded
/// separately so it starts and ends in the initial state, as RFC 2047 §5 requires.
pub(crate) fn encode_words(text: &str, charset: Charset, how: WordEncoding) -> String {
    if text.is_ascii() && !text.contains("=?") {
        return text.to_string();
    }
    let charset = if charset.encode(text).is_some() && charset != Charset::Ascii {
        charset
    } else {
        Charset::Utf8
    };
    let overhead = charset.label().len() + 7; // =?cs?X?...?=
    // 66 rather than the 75 of RFC 2047 §2, so that a word that follows "Subject: " still
    // keeps its line within 76 characters, as §2 also asks.
    let budget = 66usize.saturating_sub(overhead);
    let mut words: Vec<String> = Vec::new();
    let mut chunk = String::new();
    for c in text.chars() {
        let mut candidate = chunk.clone();
        candidate.push(c);
        let encoded = encode_word_payload(&candidate, charset, how);
        if encoded.len() > budget && !chunk.is_empty() {
            words.push(encode_word_payload(&chunk, charset, how));
            chunk.clear();
        }
        chunk.push(c);
    }
    if !chunk.is_empty() {
        words.push(encode_word_payload(&chunk, charset, how));
    }
    let tag = match how {
        WordEncoding::B => 'B',
        WordEncoding::Q => 'Q',
    };
    words
        .iter()
        .map(|w| format!("=?{}?{tag}?{w}?=", charset.label()))
        .collect::<Vec<_>>()
        .join("\r\n ")
}

fn encode_word_payload(text: &str, charset: Charset, how: WordEncoding) -> String {
    let bytes = charset
        .encode(text)
        .unwrap_or_else(|| text.as_bytes().to_vec());
    match how {
        WordEncoding::B => base64(&bytes),
        WordEncoding::Q => {
            let mut s = String::with_capacity(bytes.len() * 2);
            for b in bytes {
                match b {
                    b' ' => s.push('_'),
                    b'a'..=b'z' | b'A'..=b'Z' | b'0'..=b'9' | b'!' | b'*' | b'+' | b'-' | b'/' => {
                        s.push(char::from(b))
                    }
                    _ => s.push_str(&format!("={b:02X}")),
                }
            }
            s
        }
    }
}

/// A display name and address as a header value, quoting or encoding the name as needed.
pub(crate) fn mailbox(name: &str, addr: &str, charset: Charset, how: WordEncoding) -> String {
    if name.is_empty() {
        return format!("<{addr}>");
    }
    if name.is_ascii() {
        if name
            .chars()
            .any(|c| matches!(c, ',' | '.' | '(' | ')' | '<' | '>' | '@' | ':' | ';' | '"'))
        {
            return format!("\"{}\" <{addr}>", name.replace('"', "'"));
        }
        return format!("{name} <{addr}>");
    }
    format!("{} <{addr}>", encode_words(name, charset, how))
}

/// An RFC 5322 §3.3 date-time for `unix` seconds shown in the zone `offset_minutes` east of UTC.
pub(crate) fn rfc5322_date(unix: i64, offset_minutes: i32) -> String {
    let local = unix + i64::from(offset_minutes) * 60;
    let days = local.div_euclid(86_400);
    let secs = local.rem_euclid(86_400);
    let (y, m, d) = crate::calendar::civil_from_days(days);
    const WEEKDAYS: [&str; 7] = ["Thu", "Fri", "Sat", "Sun", "Mon", "Tue", "Wed"];
    const MONTHS: [&str; 12] = [
        "Jan", "Feb", "Mar", "Apr", "May", "Jun", "Jul", "Aug", "Sep", "Oct", "Nov", "Dec",
    ];
    // 1970-01-01 was a Thursday.
    let wd = WEEKDAYS
        .get(days.rem_euclid(7) as usize)
        .copied()
        .unwrap_or("Mon");
    let mon = MONTHS
        .get((m as usize).saturating_sub(1))
        .copied()
        .unwrap_or("Jan");
    let sign = if offset_minutes < 0 { '-' } else { '+' };
    let off = offset_minutes.unsigned_abs();
    format!(
        "{wd}, {d} {mon} {y} {:02}:{:02}:{:02} {sign}{:02}{:02}",
        secs / 3600,
        (secs / 60) % 60,
        secs % 60,
        off / 60,
        off % 60
    )
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn base64_matches_rfc4648_vectors() {
        // RFC 4648 §10 test vectors.
        let cases = [
            ("", ""),
            ("f", "Zg=="),
            ("fo", "Zm8="),
            ("foo", "Zm9v"),
            ("foob", "Zm9vYg=="),
            ("fooba", "Zm9vYmE="),
            ("foobar", "Zm9vYmFy"),
        ];
        for (input, expected) in cases {
            assert_eq!(base64(input.as_bytes()), expected);
        }
    }

    #[test]
    fn quoted_printable_lines_stay_short_and_decode() {
        let text = "Grüße aus dem Büro — ".repeat(20) + "end  ";
        let mut out = Vec::new();
        quoted_printable(text.as_bytes(), &mut out);
        for line in out.split(|b| *b == b'\n') {
            assert!(line.len() <= 77, "line too long: {}", line.len());
        }
        let raw = [
            b"Content-Transfer-Encoding: quoted-printable\r\n\r\n".as_slice(),
            &out,
        ]
        .concat();
        let parsed = mailparse::parse_mail(&raw).map(|m| m.get_body_raw());
        let Ok(Ok(decoded)) = parsed else {
            panic!("mailparse rejected the body");
        };
        assert_eq!(
            String::from_utf8_lossy(&decoded).strip_suffix("\r\n"),
            Some(text.as_str())
        );
    }

    #[test]
    fn encoded_words_round_trip_through_mailparse() {
        let cases = [
            ("Rückmeldung zur Prüfung", Charset::Latin9, WordEncoding::Q),
            (
                "Счёт за услуги хостинга за март",
                Charset::Koi8R,
                WordEncoding::B,
            ),
            (
                "会議の日程について（再送）ご確認ください",
                Charset::Iso2022Jp,
                WordEncoding::B,
            ),
            (
                "Réunion du comité de pilotage — ordre du jour",
                Charset::Utf8,
                WordEncoding::Q,
            ),
        ];
        for (text, cs, how) in cases {
            let header = format!("Subject: {}\r\n\r\n", encode_words(text, cs, how));
            for line in header.split("\r\n") {
                assert!(line.len() <= 78, "{line}");
            }
            let Ok((h, _)) = mailparse::parse_header(header.as_bytes()) else {
                panic!("header did not parse: {header}");
            };
            assert_eq!(h.get_value(), text);
        }
    }

    #[test]
    fn dates_are_rfc5322() {
        assert_eq!(rfc5322_date(0, 0), "Thu, 1 Jan 1970 00:00:00 +0000");
        // 2026-03-02T08:30:00Z shown in +0100.
        assert_eq!(
            rfc5322_date(1_772_440_200, 60),
            "Mon, 2 Mar 2026 09:30:00 +0100"
        );
        assert_eq!(
            rfc5322_date(1_772_440_200, -300),
            "Mon, 2 Mar 2026 03:30:00 -0500"
        );
    }
}
