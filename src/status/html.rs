//! Writing HTML safely: one buffer type whose only way to add outside text escapes it.
//!
//! Invariants of everything [`Html`] writes:
//!
//! - outside text ([`Html::text`], [`Html::attr`]) never opens a tag, closes an attribute
//!   or starts a character reference: `&`, `<`, `>`, `"` and `'` are written as references;
//! - it holds no control character, no invisible format character that reorders a line
//!   (bidirectional overrides and the like, see [`crate::logsafe::needs_escape`]) and no
//!   Unicode noncharacter: each is shown as a visible escape such as `\u{202e}`, and a
//!   backslash as `\\`, so what a person reads is what the message carried;
//! - outside text is cut at a stated number of characters, with the count left off shown;
//! - markup is only ever `&'static str` ([`Html::raw`]), so it cannot come from a peer.

use std::fmt::Write as _;

/// An HTML document or fragment being written.
#[derive(Debug, Default)]
pub struct Html {
    out: String,
}

/// Longest outside value written, in characters, unless a call says otherwise.
pub const MAX_TEXT: usize = 300;

impl Html {
    /// An empty buffer.
    pub fn new() -> Html {
        Html {
            out: String::with_capacity(16 * 1024),
        }
    }

    /// Markup written as is. Only literals: nothing from a peer can be markup.
    pub fn raw(&mut self, markup: &'static str) -> &mut Html {
        self.out.push_str(markup);
        self
    }

    /// Outside text, escaped and cut at [`MAX_TEXT`] characters.
    pub fn text(&mut self, value: &str) -> &mut Html {
        self.text_max(value, MAX_TEXT)
    }

    /// Outside text, escaped and cut at `max` characters.
    pub fn text_max(&mut self, value: &str, max: usize) -> &mut Html {
        escape_into(&mut self.out, value, max);
        self
    }

    /// An attribute value (to be written between double quotes), escaped.
    pub fn attr(&mut self, value: &str) -> &mut Html {
        escape_into(&mut self.out, value, MAX_TEXT);
        self
    }

    /// A number or other value whose display holds no markup (numbers, our own names);
    /// escaped all the same, so a mistake cannot open a tag.
    pub fn show(&mut self, value: impl std::fmt::Display) -> &mut Html {
        let mut shown = String::new();
        let _ = write!(shown, "{value}");
        escape_into(&mut self.out, &shown, usize::MAX);
        self
    }

    /// The document written.
    pub fn finish(self) -> String {
        self.out
    }

    /// Appends a fragment written separately (it was built by the same rules).
    pub fn append(&mut self, other: Html) -> &mut Html {
        self.out.push_str(&other.out);
        self
    }

    /// Bytes written so far.
    pub fn len(&self) -> usize {
        self.out.len()
    }

    /// Whether nothing was written.
    pub fn is_empty(&self) -> bool {
        self.out.is_empty()
    }
}

/// Whether `c` is a Unicode noncharacter (U+FDD0..U+FDEF, and the last two code points of
/// every plane), which HTML forbids in text (WHATWG HTML, "noncharacter" parse error).
fn noncharacter(c: char) -> bool {
    let v = u32::from(c);
    (0xfdd0..=0xfdef).contains(&v) || (v & 0xfffe) == 0xfffe
}

fn escape_into(out: &mut String, value: &str, max: usize) {
    for (written, (at, c)) in value.char_indices().enumerate() {
        if written == max {
            let _ = write!(out, "\u{2026}[+{} bytes]", value.len() - at);
            return;
        }
        match c {
            '&' => out.push_str("&amp;"),
            '<' => out.push_str("&lt;"),
            '>' => out.push_str("&gt;"),
            '"' => out.push_str("&quot;"),
            '\'' => out.push_str("&#39;"),
            '\\' => out.push_str("\\\\"),
            '\n' => out.push_str("\\n"),
            '\r' => out.push_str("\\r"),
            '\t' => out.push_str("\\t"),
            c if crate::logsafe::needs_escape(c) || noncharacter(c) => {
                let _ = write!(out, "\\u{{{:x}}}", u32::from(c));
            }
            c => out.push(c),
        }
    }
}

/// Percent-encodes a value for one URL path segment or query value: everything but
/// unreserved characters (RFC 3986 §2.3) is written `%XX` from its UTF-8 bytes.
pub fn url_encode(value: &str) -> String {
    let mut out = String::with_capacity(value.len());
    for b in value.bytes() {
        if b.is_ascii_alphanumeric() || matches!(b, b'-' | b'.' | b'_' | b'~') {
            out.push(char::from(b));
        } else {
            let _ = write!(out, "%{b:02X}");
        }
    }
    out
}

/// Decodes a percent-encoded segment or form value (`+` as a space when `plus_is_space`, as
/// `application/x-www-form-urlencoded` has it). `None` for a broken `%` escape or bytes
/// that are not UTF-8.
pub fn url_decode(value: &str, plus_is_space: bool) -> Option<String> {
    let bytes = value.as_bytes();
    let mut out = Vec::with_capacity(bytes.len());
    let mut i = 0;
    while let Some(&b) = bytes.get(i) {
        match b {
            b'%' => {
                let hex = bytes.get(i + 1..i + 3)?;
                let hex = std::str::from_utf8(hex).ok()?;
                out.push(u8::from_str_radix(hex, 16).ok()?);
                i += 3;
            }
            b'+' if plus_is_space => {
                out.push(b' ');
                i += 1;
            }
            _ => {
                out.push(b);
                i += 1;
            }
        }
    }
    String::from_utf8(out).ok()
}

/// The `name=value` pairs of a query string or form body, decoded; pairs that do not
/// decode are skipped, and at most `max` pairs are read.
pub fn form_pairs(text: &str, max: usize) -> Vec<(String, String)> {
    text.split('&')
        .filter(|p| !p.is_empty())
        .take(max)
        .filter_map(|pair| {
            let (name, value) = pair.split_once('=').unwrap_or((pair, ""));
            Some((url_decode(name, true)?, url_decode(value, true)?))
        })
        .collect()
}

/// A time as `YYYY-MM-DD HH:MM` in UTC.
pub fn utc(time: i64) -> String {
    let days = time.div_euclid(86_400);
    let seconds = time.rem_euclid(86_400);
    let (y, m, d) = crate::calendar::civil_from_days(days);
    format!(
        "{y:04}-{m:02}-{d:02} {:02}:{:02}",
        seconds / 3600,
        (seconds % 3600) / 60
    )
}

/// A count with thin spaces between groups of three digits, as the page shows counts.
pub fn count(n: u64) -> String {
    let digits = n.to_string();
    let mut out = String::with_capacity(digits.len() + digits.len() / 3);
    for (i, c) in digits.chars().enumerate() {
        if i > 0 && (digits.len() - i).is_multiple_of(3) {
            out.push('\u{202f}');
        }
        out.push(c);
    }
    out
}

/// A rate as a percentage with enough digits for small rates (0.0123% rather than 0.01%).
pub fn percent(rate: f64) -> String {
    let p = rate * 100.0;
    if !p.is_finite() {
        "–".to_string()
    } else if p == 0.0 {
        "0%".to_string()
    } else if p >= 10.0 {
        format!("{p:.1}%")
    } else if p >= 1.0 {
        format!("{p:.2}%")
    } else if p >= 0.01 {
        format!("{p:.3}%")
    } else {
        format!("{p:.1e}%")
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn outside_text_cannot_open_a_tag_or_leave_an_attribute() {
        let mut h = Html::new();
        h.raw("<p title=\"")
            .attr("\" onmouseover=\"x()")
            .raw("\">")
            .text("<script>alert('1')</script> & \u{202e}gnp.exe\u{0}\u{fffe}\\")
            .raw("</p>");
        assert_eq!(
            h.finish(),
            "<p title=\"&quot; onmouseover=&quot;x()\">&lt;script&gt;alert(&#39;1&#39;)&lt;/script&gt; &amp; \\u{202e}gnp.exe\\u{0}\\u{fffe}\\\\</p>"
        );
    }

    #[test]
    fn long_text_is_cut_with_the_count_left_off() {
        let mut h = Html::new();
        h.text_max("abcdef", 3);
        assert_eq!(h.finish(), "abc\u{2026}[+3 bytes]");
    }

    #[test]
    fn url_values_round_trip() {
        for value in ["example.org", "a b/c?d=e&f", "<\"x\">", "\u{e9}t\u{e9}", ""] {
            let encoded = url_encode(value);
            assert!(encoded.bytes().all(|b| b.is_ascii_graphic()), "{encoded}");
            assert!(!encoded.contains(['<', '"', '&', '/', '?']), "{encoded}");
            assert_eq!(url_decode(&encoded, false).as_deref(), Some(value));
        }
        assert_eq!(url_decode("%zz", false), None);
        assert_eq!(url_decode("%4", false), None);
        assert_eq!(url_decode("%ff", false), None, "not UTF-8");
        assert_eq!(
            form_pairs("a=1&b=x+y%21&&c", 10),
            vec![
                ("a".to_string(), "1".to_string()),
                ("b".to_string(), "x y!".to_string()),
                ("c".to_string(), String::new())
            ]
        );
    }

    #[test]
    fn times_are_utc_dates() {
        // 2000-03-01 00:00 UTC is 951868800 s after the epoch (from memory, checked with
        // `date -u -d @951868800`).
        assert_eq!(utc(951_868_800), "2000-03-01 00:00");
        assert_eq!(utc(0), "1970-01-01 00:00");
        assert_eq!(utc(1_700_000_000), "2023-11-14 22:13");
    }

    #[test]
    fn counts_and_percentages_read_well() {
        assert_eq!(count(1_234_567), "1\u{202f}234\u{202f}567");
        assert_eq!(count(999), "999");
        assert_eq!(percent(0.00123), "0.123%");
        assert_eq!(percent(0.5), "50.0%");
        assert_eq!(percent(0.0), "0%");
    }
}
