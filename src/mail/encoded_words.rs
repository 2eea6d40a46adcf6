//! Header field values as a reader sees them: unfolding and RFC 2047 encoded words.
//!
//! The work is linear in the value's length, whatever it holds: the value is scanned once
//! for `=?`, and the search for a word's closing `?=` is remembered between words, so no
//! byte is scanned more than a bounded number of times (a value made of repeated `=?`
//! costs what any other value of its length costs). Only the first [`MAX_FIELD_BYTES`] of
//! a value are read; the rest is ignored.
//!
//! The rules, chosen to read ordinary mail exactly as the `mailparse` crate did before
//! this module replaced it for feature text:
//! - a value that is not UTF-8 is read as Latin-1 (RFC 6532 allows UTF-8; older mail
//!   carries stray 8-bit bytes);
//! - each line is trimmed at its start and the line break becomes one space (unfolding,
//!   RFC 5322 §2.2.3);
//! - an encoded word (`=?charset?B|Q?text?=`, RFC 2047 §2) is recognised where it starts
//!   at a line start or after whitespace or one of `"()<>,` and ends before the same or
//!   at the line end; whitespace between two adjacent encoded words is dropped (RFC 2047
//!   §6.2);
//! - the charset is resolved by the WHATWG Encoding Standard (`encoding_rs`), as for body
//!   text; an RFC 2231 §5 language suffix (`utf-8*en`) is tolerated;
//! - B text is base64 (missing padding tolerated, as Python's `email.header` does), Q text
//!   is RFC 2047 §4.2 (`_` is a space, `=XX` an octet; broken escapes as before);
//! - a word that does not decode (unknown charset, bad base64, unknown encoding) is kept as
//!   literal text, as RFC 2047 §6.3 allows.

use std::borrow::Cow;

use encoding_rs::Encoding;
use memchr::memmem;

/// Most bytes of one header field value that are decoded; the rest is ignored. Far above
/// any ordinary field (RFC 5322 §2.1.1 limits a line to 998 characters; subjects run to
/// a few hundred), low enough that a hostile field costs little.
pub const MAX_FIELD_BYTES: usize = 16 << 10;

/// The first [`MAX_FIELD_BYTES`] of `raw` as text: UTF-8 when it is (a character cut by
/// the limit is dropped), else Latin-1.
pub fn field_text(raw: &[u8]) -> Cow<'_, str> {
    let capped = raw.get(..MAX_FIELD_BYTES).unwrap_or(raw);
    match std::str::from_utf8(capped) {
        Ok(text) => Cow::Borrowed(text),
        // Valid UTF-8 cut inside its last character by the limit.
        Err(e) if e.error_len().is_none() && capped.len() < raw.len() => {
            let valid = capped.get(..e.valid_up_to()).unwrap_or_default();
            Cow::Borrowed(std::str::from_utf8(valid).unwrap_or_default())
        }
        Err(_) => Cow::Owned(capped.iter().map(|&b| char::from(b)).collect()),
    }
}

/// Decodes an unstructured field value (such as `Subject`): unfolded, encoded words
/// decoded, at most [`MAX_FIELD_BYTES`] of it read.
pub fn decode_unstructured(raw: &[u8]) -> String {
    decode_unstructured_counted(raw).0
}

/// [`decode_unstructured`], also returning how many bytes the scans examined in all: a
/// measure of work that tests compare across input sizes to check that it stays linear.
pub fn decode_unstructured_counted(raw: &[u8]) -> (String, usize) {
    let text = field_text(raw);
    let mut out = Normalizer::default();
    let work = tokenize(&text, |token| out.push(token));
    (out.finish(), work)
}

/// One piece of a field value, in order.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum Token<'a> {
    /// Text that is not an encoded word (it may hold whitespace too).
    Text(&'a str),
    /// Text made of whitespace only (possibly empty) just before an encoded word or at
    /// the end of a line.
    Space(&'a str),
    /// A line break between two lines of a folded value.
    LineBreak,
    /// The decoded text of an encoded word.
    Word(String),
}

/// Splits `value` into tokens, calling `emit` for each in order. Returns the number of
/// bytes the scans examined (see [`decode_unstructured_counted`]).
pub fn tokenize<'a>(value: &'a str, mut emit: impl FnMut(Token<'a>)) -> usize {
    let mut work = 0usize;
    for (i, line) in value.lines().enumerate() {
        if i > 0 {
            emit(Token::LineBreak);
        }
        let trimmed = line.trim_start();
        work += line.len() - trimmed.len() + 1;
        work += tokenize_line(trimmed, &mut emit);
    }
    work
}

/// Where the next closing `?=` is, remembered between words of one line so that the
/// search never goes over the same bytes twice.
#[derive(Default)]
struct CloseCache {
    /// The search started at `from` and found `found` (`None`: no close up to the end).
    last: Option<(usize, Option<usize>)>,
}

impl CloseCache {
    /// The first `?=` at or after `from` that is followed by a word boundary.
    fn next_close(&mut self, line: &str, from: usize, work: &mut usize) -> Option<usize> {
        if let Some((start, found)) = self.last
            && start <= from
        {
            match found {
                None => return None,
                Some(at) if at >= from => return Some(at),
                Some(_) => {}
            }
        }
        let bytes = line.as_bytes();
        let finder = memmem::Finder::new(b"?=");
        let mut search = from;
        let found = loop {
            let Some(rest) = bytes.get(search..) else {
                break None;
            };
            match finder.find(rest) {
                Some(offset) => {
                    let at = search + offset;
                    *work += offset + 2;
                    if boundary_after(line, at + 2) {
                        break Some(at);
                    }
                    search = at + 2;
                }
                None => {
                    *work += rest.len();
                    break None;
                }
            }
        };
        self.last = Some((from, found));
        found
    }
}

fn is_boundary_char(c: char) -> bool {
    c.is_whitespace() || matches!(c, '"' | '(' | ')' | '<' | '>' | ',')
}

/// True when an encoded word may start at byte `at` (a `=?` there).
fn boundary_before(line: &str, at: usize) -> bool {
    line.get(..at)
        .and_then(|before| before.chars().next_back())
        .is_none_or(is_boundary_char)
}

/// True when an encoded word may end just before byte `at`.
fn boundary_after(line: &str, at: usize) -> bool {
    line.get(at..)
        .and_then(|after| after.chars().next())
        .is_none_or(is_boundary_char)
}

fn space_or_text(text: &str) -> Token<'_> {
    if text.chars().all(char::is_whitespace) {
        Token::Space(text)
    } else {
        Token::Text(text)
    }
}

fn tokenize_line<'a>(line: &'a str, emit: &mut impl FnMut(Token<'a>)) -> usize {
    let bytes = line.as_bytes();
    let opener = memmem::Finder::new(b"=?");
    let mut closes = CloseCache::default();
    let mut work = 0usize;
    let mut search = 0usize;
    loop {
        let rest = bytes.get(search..).unwrap_or_default();
        let Some(offset) = opener.find(rest) else {
            work += rest.len();
            emit(space_or_text(line.get(search..).unwrap_or_default()));
            return work;
        };
        work += offset + 2;
        let open = search + offset;
        let inner_start = open + 2;
        if !boundary_before(line, open) {
            emit(Token::Text(
                line.get(search..inner_start).unwrap_or_default(),
            ));
            search = inner_start;
            continue;
        }
        let before = line.get(search..open).unwrap_or_default();
        work += before.len();
        emit(space_or_text(before));
        match closes.next_close(line, inner_start, &mut work) {
            Some(close) => {
                let inner = line.get(inner_start..close).unwrap_or_default();
                work += inner.len();
                match decode_word(inner) {
                    Some(word) => emit(Token::Word(word)),
                    None => emit(Token::Text(line.get(open..close + 2).unwrap_or_default())),
                }
                search = close + 2;
            }
            None => {
                emit(Token::Text("=?"));
                search = inner_start;
            }
        }
    }
}

/// Decodes the inside of an encoded word (`charset?encoding?text`), or `None` when it is
/// not a well-formed word.
pub fn decode_word(inner: &str) -> Option<String> {
    let (charset, rest) = inner.split_once('?')?;
    let (encoding, text) = rest.split_once('?')?;
    // RFC 2231 §5: `charset*language`; the language does not change the text.
    let charset = charset.split_once('*').map_or(charset, |(c, _)| c);
    let octets = match encoding {
        "B" | "b" => decode_b(text.as_bytes())?,
        "Q" | "q" => decode_q(text),
        _ => return None,
    };
    let encoding = Encoding::for_label_no_replacement(charset.as_bytes())?;
    let (text, _) = encoding.decode_without_bom_handling(&octets);
    Some(text.into_owned())
}

fn base64_value(b: u8) -> Option<u32> {
    let v = match b {
        b'A'..=b'Z' => b - b'A',
        b'a'..=b'z' => b - b'a' + 26,
        b'0'..=b'9' => b - b'0' + 52,
        b'+' => 62,
        b'/' => 63,
        _ => return None,
    };
    Some(u32::from(v))
}

/// RFC 2047 §4.1 (the base64 of RFC 2045 §6.8): padding may be missing, and bits left
/// over in the last character are ignored; anything but the alphabet and final `=` padding
/// makes the word malformed.
fn decode_b(text: &[u8]) -> Option<Vec<u8>> {
    let data_len = text.iter().position(|&b| b == b'=').unwrap_or(text.len());
    let (data, padding) = text.split_at(data_len);
    if padding.len() > 2 || padding.iter().any(|&b| b != b'=') {
        return None;
    }
    let mut out = Vec::with_capacity(data.len() / 4 * 3 + 2);
    let mut acc = 0u32;
    let mut bits = 0u32;
    for &b in data {
        acc = (acc << 6) | base64_value(b)?;
        bits += 6;
        if bits >= 8 {
            bits -= 8;
            out.push((acc >> bits) as u8);
            acc &= (1 << bits) - 1;
        }
    }
    // One character alone carries 6 bits: no whole octet, a broken encoding.
    if data.len() % 4 == 1 {
        return None;
    }
    Some(out)
}

/// RFC 2047 §4.2: `_` is a space, `=XX` the octet XX, anything else stands for itself.
/// Broken escapes read as the previous reader (the `mailparse` crate) read them, so
/// adjacent words glued without whitespace decode as before: `=` with two non-hex
/// characters stays as those three characters, a lone `=` at the end of the text (before
/// any trailing whitespace) is dropped.
fn decode_q(text: &str) -> Vec<u8> {
    let bytes = text.as_bytes();
    let body_len = text
        .trim_end_matches(|c: char| c == '_' || c.is_whitespace())
        .len();
    let (body, tail) = bytes.split_at(body_len);
    let space = |b: u8| if b == b'_' { b' ' } else { b };
    let hex = |b: u8| char::from(b).to_digit(16);
    let mut out = Vec::with_capacity(bytes.len());
    let mut rest = body.iter().copied();
    while let Some(b) = rest.next() {
        if b != b'=' {
            out.push(space(b));
            continue;
        }
        match (rest.next(), rest.next()) {
            (None, _) => {}
            (Some(hi), None) => out.extend([b'=', space(hi)]),
            (Some(hi), Some(lo)) => match (hex(hi), hex(lo)) {
                (Some(h), Some(l)) => out.push((h * 16 + l) as u8),
                _ => out.extend([b'=', space(hi), space(lo)]),
            },
        }
    }
    out.extend(tail.iter().copied().map(space));
    out
}

/// Joins tokens into the displayed value: whitespace between two encoded words goes
/// (RFC 2047 §6.2), every line break becomes a space, whitespace after the last encoded
/// word at the end of the value goes.
#[derive(Default)]
struct Normalizer<'a> {
    out: String,
    held: Held<'a>,
}

/// Whitespace held back after an encoded word until the next token says whether it stays.
#[derive(Default)]
enum Held<'a> {
    #[default]
    Nothing,
    /// The last token was an encoded word.
    AfterWord,
    /// Whitespace after an encoded word.
    Space(&'a str),
    /// Whitespace and a line break after an encoded word, as the text they stand for.
    Break(String),
}

impl<'a> Normalizer<'a> {
    fn push(&mut self, token: Token<'a>) {
        match token {
            Token::Text(text) => {
                match std::mem::take(&mut self.held) {
                    Held::Space(space) => self.out.push_str(space),
                    Held::Break(space) => self.out.push_str(&space),
                    Held::Nothing | Held::AfterWord => {}
                }
                self.out.push_str(text);
            }
            Token::Space(space) => {
                if matches!(self.held, Held::AfterWord) {
                    self.held = Held::Space(space);
                } else {
                    self.held = Held::Nothing;
                    self.out.push_str(space);
                }
            }
            Token::LineBreak => match std::mem::take(&mut self.held) {
                Held::Space(space) => self.held = Held::Break(format!("{space} ")),
                Held::AfterWord => self.held = Held::Break(" ".to_string()),
                Held::Nothing | Held::Break(_) => self.out.push(' '),
            },
            Token::Word(word) => {
                self.held = Held::AfterWord;
                self.out.push_str(&word);
            }
        }
    }

    fn finish(self) -> String {
        self.out
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn dec(value: &str) -> String {
        decode_unstructured(value.as_bytes())
    }

    #[test]
    fn words_and_whitespace() {
        // RFC 2047 §8 examples (the full table is in tests/it/mime.rs).
        assert_eq!(dec("(=?ISO-8859-1?Q?a?= =?ISO-8859-1?Q?b?=)"), "(ab)");
        assert_eq!(dec("(=?ISO-8859-1?Q?a?= b)"), "(a b)");
        assert_eq!(dec("=?ISO-8859-1?Q?a?=\r\n    =?ISO-8859-1?Q?b?="), "ab");
        assert_eq!(dec("plain\r\n\tfolded"), "plain folded");
        assert_eq!(dec("=?utf-8*en?q?caf=C3=A9?="), "café");
        assert_eq!(dec("=?utf-8?b?w6k?="), "é", "missing padding tolerated");
        assert_eq!(dec("=?utf-8?q?caf\u{e9}?="), "café", "8-bit Q text kept");
    }

    #[test]
    fn broken_q_escapes_read_as_before() {
        assert_eq!(dec("=?utf-8?q?a=?="), "a");
        assert_eq!(dec("=?utf-8?q?a=4?="), "a=4");
        assert_eq!(dec("=?utf-8?q?=G=41?="), "=G=41");
        assert_eq!(
            dec("=?utf-8?q?a=_?="),
            "a ",
            "the `=` before trailing blanks goes"
        );
        assert_eq!(dec("=?utf-8?q?a__?= b"), "a   b");
    }

    #[test]
    fn malformed_words_stay_literal() {
        for literal in [
            "=?x-no-such-charset?q?a?=",
            "=?utf-8?x?a?=",
            "=?utf-8?b?!!!!?=",
            "=?utf-8?b?w?=",
            "=?utf-8?q?unclosed",
            "glued=?utf-8?q?a?=",
            "=?",
            "=??=",
        ] {
            assert_eq!(dec(literal), literal);
        }
    }

    #[test]
    fn the_field_is_read_up_to_the_cap() {
        let mut raw = vec![b'a'; MAX_FIELD_BYTES - 1];
        raw.extend_from_slice("é and more".as_bytes());
        // The limit falls inside `é`: the character goes, the rest is still UTF-8.
        assert_eq!(field_text(&raw).len(), MAX_FIELD_BYTES - 1);
        assert!(field_text(&raw).chars().all(|c| c == 'a'));
        assert_eq!(field_text(b"caf\xe9"), "café", "Latin-1 fallback");
    }
}
