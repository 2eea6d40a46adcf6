//! Values from peers made safe to write into a log line.
//!
//! Anything a relay, a mail or an SMTP client chose — addresses, domains, peer names, field
//! names, fault texts that quote them — goes through [`safe`] (or [`safe_bytes`]) before it
//! reaches `tracing`, in both the human and the JSON log formats.
//!
//! Invariants of the text written by [`Safe`] and [`SafeBytes`]:
//!
//! - it holds no control character (C0, DEL, C1), no line or paragraph separator, and no
//!   bidirectional or zero-width format character: each is written as an escape such as
//!   `\n`, `\r`, `\t` or `\u{1b}`, so a value can neither end its line, forge another one,
//!   move a terminal's cursor nor reorder what a reader sees;
//! - a backslash is written `\\`, so an escape in the log always comes from this module and
//!   a peer cannot write one that reads as an escaped character;
//! - bytes that are not UTF-8 are written `\xNN`;
//! - at most [`MAX_LOGGED`] characters of the value are written; a longer value ends with
//!   `...[+N bytes]`, so one value cannot flood the log.

use std::fmt::{self, Write as _};

/// Most characters of one value written to a log line.
pub const MAX_LOGGED: usize = 200;

/// A value from a peer, escaped when displayed. Build it with [`safe`].
#[derive(Debug, Clone, Copy)]
pub struct Safe<'a> {
    text: &'a str,
}

/// Wraps `text` so that displaying it writes the escaped form described in the module
/// documentation.
pub fn safe(text: &str) -> Safe<'_> {
    Safe { text }
}

/// Raw bytes from a peer, escaped when displayed (UTF-8 sequences as characters, other
/// bytes as `\xNN`). Build it with [`safe_bytes`].
#[derive(Debug, Clone, Copy)]
pub struct SafeBytes<'a> {
    bytes: &'a [u8],
}

/// Wraps `bytes` so that displaying it writes the escaped form described in the module
/// documentation.
pub fn safe_bytes(bytes: &[u8]) -> SafeBytes<'_> {
    SafeBytes { bytes }
}

impl fmt::Display for Safe<'_> {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        let mut out = Limited::new(f);
        for (at, c) in self.text.char_indices() {
            if out.full() {
                return out.finish_cut(self.text.len() - at);
            }
            out.char(c)?;
        }
        Ok(())
    }
}

impl fmt::Display for SafeBytes<'_> {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        let mut out = Limited::new(f);
        let mut rest = self.bytes;
        while !rest.is_empty() {
            if out.full() {
                return out.finish_cut(rest.len());
            }
            match std::str::from_utf8(rest) {
                Ok(text) => {
                    // The tail is UTF-8; `Safe` takes over, within the room left.
                    for (at, c) in text.char_indices() {
                        if out.full() {
                            return out.finish_cut(text.len() - at);
                        }
                        out.char(c)?;
                    }
                    return Ok(());
                }
                Err(e) => {
                    let (good, bad) = rest.split_at(e.valid_up_to());
                    // `valid_up_to` guarantees this prefix is UTF-8.
                    let good = std::str::from_utf8(good).unwrap_or_default();
                    for (at, c) in good.char_indices() {
                        if out.full() {
                            return out.finish_cut(rest.len() - at);
                        }
                        out.char(c)?;
                    }
                    let skip = e.error_len().unwrap_or(bad.len()).max(1);
                    for (i, byte) in bad.iter().take(skip).enumerate() {
                        if out.full() {
                            return out.finish_cut(bad.len() - i);
                        }
                        out.byte(*byte)?;
                    }
                    rest = bad.get(skip..).unwrap_or_default();
                }
            }
        }
        Ok(())
    }
}

/// Writes escaped characters and counts them against [`MAX_LOGGED`].
struct Limited<'f, 'b> {
    f: &'f mut fmt::Formatter<'b>,
    written: usize,
}

impl<'f, 'b> Limited<'f, 'b> {
    fn new(f: &'f mut fmt::Formatter<'b>) -> Self {
        Limited { f, written: 0 }
    }

    fn full(&self) -> bool {
        self.written >= MAX_LOGGED
    }

    fn finish_cut(&mut self, remaining_bytes: usize) -> fmt::Result {
        write!(self.f, "...[+{remaining_bytes} bytes]")
    }

    fn char(&mut self, c: char) -> fmt::Result {
        self.written += 1;
        match c {
            '\\' => self.f.write_str("\\\\"),
            '\n' => self.f.write_str("\\n"),
            '\r' => self.f.write_str("\\r"),
            '\t' => self.f.write_str("\\t"),
            c if needs_escape(c) => write!(self.f, "\\u{{{:x}}}", u32::from(c)),
            c => self.f.write_char(c),
        }
    }

    fn byte(&mut self, b: u8) -> fmt::Result {
        self.written += 1;
        write!(self.f, "\\x{b:02x}")
    }
}

/// Characters written as an escape: controls, and the invisible format characters that
/// break or reorder a line as a terminal or a log viewer shows it.
pub fn needs_escape(c: char) -> bool {
    c.is_control()
        || matches!(
            c,
            // Soft hyphen, Arabic letter mark, Mongolian vowel separator.
            '\u{ad}' | '\u{61c}' | '\u{180e}'
            // Zero-width space/joiners, left-to-right and right-to-left marks.
            | '\u{200b}'..='\u{200f}'
            // Line and paragraph separators, bidirectional embeddings and overrides.
            | '\u{2028}'..='\u{202e}'
            // Word joiner, invisible operators, bidirectional isolates, deprecated formats.
            | '\u{2060}'..='\u{206f}'
            // Byte order mark / zero-width no-break space.
            | '\u{feff}'
            // Interlinear annotation controls.
            | '\u{fff9}'..='\u{fffb}'
            // Tag characters.
            | '\u{e0000}'..='\u{e007f}'
        )
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn controls_and_backslashes_are_escaped() {
        let forged =
            "a@example.org\n2030-01-01T00:00:00Z INFO reloaded\x1b[2J\r\t\\n\u{202e}\u{7f}\u{85}";
        let shown = safe(forged).to_string();
        assert_eq!(
            shown,
            "a@example.org\\n2030-01-01T00:00:00Z INFO reloaded\\u{1b}[2J\\r\\t\\\\n\\u{202e}\\u{7f}\\u{85}"
        );
        assert!(!shown.chars().any(needs_escape));
    }

    #[test]
    fn printable_text_is_unchanged() {
        for text in [
            "user@example.org",
            "josé@bücher.test",
            "\"a b\"@[192.0.2.1]",
            "",
        ] {
            assert_eq!(safe(text).to_string(), text);
        }
    }

    #[test]
    fn long_values_are_cut_with_the_count_of_what_is_left() {
        let long = "x".repeat(MAX_LOGGED + 50);
        let shown = safe(&long).to_string();
        assert_eq!(shown, format!("{}...[+50 bytes]", "x".repeat(MAX_LOGGED)));
        let exact = "y".repeat(MAX_LOGGED);
        assert_eq!(safe(&exact).to_string(), exact);
    }

    #[test]
    fn bytes_that_are_not_utf8_are_hex() {
        assert_eq!(
            safe_bytes(b"X-Name\xff\r\n\xc3\xa9\x1b").to_string(),
            "X-Name\\xff\\r\\n\u{e9}\\u{1b}"
        );
        let long = vec![0xffu8; MAX_LOGGED + 3];
        assert_eq!(
            safe_bytes(&long).to_string(),
            format!("{}...[+3 bytes]", "\\xff".repeat(MAX_LOGGED))
        );
    }
}
