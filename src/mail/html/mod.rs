//! HTML rendered to the text a reader sees.
//!
//! Mail bodies are often HTML only, and markup is where junk mail hides its tricks: words split
//! by empty tags, invisible filler text, entity-encoded letters. [`html_to_text`] walks the
//! markup once, left to right, the way a browser's tokenizer does, and keeps three things
//! apart: text a reader sees, text styled out of sight, and link targets.
//!
//! Invariants:
//! - No input makes it panic. Every step consumes input, nothing is ever rescanned, so time is
//!   linear in the input; memory is the output plus a fixed amount of state, however deeply
//!   tags nest.
//! - `visible.len() + hidden.len() <= max_text_bytes`; once that budget is spent the walk stops.
//! - Character references decode by the rules of Python's `html.unescape` (see
//!   [`decode_char_refs`]); in attribute values the standard's extra rule for legacy names
//!   applies too, so query strings such as `?a=1&copy=2` survive in links.
//!
//! What it deliberately does not do: build a DOM. Hidden text is tracked as one region, the
//! element that hid it plus a count of same-named elements nested inside, so an end tag of an
//! *enclosing* element does not close a hidden `span`; elements that close themselves (`p`,
//! `li`, `td`, ...) follow the standard's implied-end rules closely enough for the common tricks.

mod entities;

use std::borrow::Cow;

use nom::IResult;
use nom::Parser;
use nom::bytes::complete::{tag, take, take_till, take_until};
use nom::character::complete::{anychar, char, digit1, hex_digit1, one_of};
use nom::combinator::recognize;
use nom::error::{Error, ErrorKind};
use nom::sequence::preceded;

/// Most link targets kept per document; later ones are dropped. A real newsletter has a few
/// hundred at most, and the cap bounds the work URL features do downstream.
pub const MAX_LINKS: usize = 1000;

/// Longest link target kept, in bytes; longer ones are cut at a character boundary. The host,
/// which is what the features look at, sits at the start.
pub const MAX_LINK_BYTES: usize = 8192;

/// Reader-visible content of an HTML document.
#[derive(Debug, Clone, Default, PartialEq, Eq)]
pub struct HtmlText {
    /// Text a reader sees. Block elements become a `'\n'`, table cells a space, and any run of
    /// HTML whitespace (also inside `pre`) one space; no separator leads or trails. Content of
    /// `script`, `style`, `title`, `iframe`, `noembed` and `noframes` is dropped; other
    /// content of `head` is kept, because a browser shows it too.
    pub visible: String,
    /// Text hidden from the reader by the `hidden` attribute, by an inline style (`display:
    /// none`, `visibility: hidden`, a font size of zero or about one pixel, zero opacity, a zero
    /// height or width with overflow hidden) or inside `template`. Kept apart so it is learned
    /// in a namespace of its own rather than read as normal text.
    pub hidden: String,
    /// Link targets in document order: `href` of `a` and `area`, `src` of `img`, character
    /// references decoded, ASCII tab and newline removed and ends trimmed as a browser's URL
    /// parser does; empty ones skipped, at most [`MAX_LINKS`] of at most [`MAX_LINK_BYTES`].
    pub links: Vec<String>,
    /// True when the walk stopped because `visible` and `hidden` together reached
    /// `max_text_bytes`; the rest of the document, links included, was not read.
    pub truncated: bool,
}

/// Renders `html` to the text a reader sees, spending at most `max_text_bytes` on
/// [`HtmlText::visible`] and [`HtmlText::hidden`] together.
///
/// Never fails: broken markup is read the way a browser reads it, and a tag, comment or raw
/// text element left open at the end swallows the rest of the input.
pub fn html_to_text(html: &str, max_text_bytes: usize) -> HtmlText {
    let mut walker = Walker::new(max_text_bytes);
    let truncated = walker.run(html).is_err();
    HtmlText {
        visible: walker.visible.out,
        hidden: walker.hidden.out,
        links: walker.links,
        truncated,
    }
}

/// Decodes HTML character references in `s` exactly as Python's `html.unescape` does.
///
/// Named references come from the WHATWG table, with or without `;` for the legacy names,
/// and a legacy name is also found as the longest prefix of a longer run (`&notit;` is
/// `¬it;`). Numeric references, decimal or hex, with or without `;`: zero, surrogates and
/// values past U+10FFFF become U+FFFD, 0x80–0x9F map through windows-1252, and the other
/// control characters and noncharacters are dropped. Anything else stays as written.
///
/// One deliberate difference: a decimal reference of more than 4300 digits, which makes
/// Python raise `ValueError`, decodes to U+FFFD like any other out-of-range number.
pub fn decode_char_refs(s: &str) -> Cow<'_, str> {
    decode_with(s, false)
}

fn decode_with(s: &str, in_attribute: bool) -> Cow<'_, str> {
    let Some((head, mut rest)) = s.split_once('&') else {
        return Cow::Borrowed(s);
    };
    let mut out = String::with_capacity(s.len());
    out.push_str(head);
    loop {
        match parse_char_ref(rest, in_attribute) {
            Some((tail, decoded)) => {
                decoded.push_to(&mut out);
                rest = tail;
            }
            None => out.push('&'),
        }
        match rest.split_once('&') {
            Some((text, after)) => {
                out.push_str(text);
                rest = after;
            }
            None => {
                out.push_str(rest);
                return Cow::Owned(out);
            }
        }
    }
}

/// What one character reference stands for.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum Decoded {
    Str(&'static str),
    Char(char),
    /// Code points `html.unescape` drops rather than replaces.
    Nothing,
}

impl Decoded {
    fn push_to(self, out: &mut String) {
        match self {
            Decoded::Str(s) => out.push_str(s),
            Decoded::Char(c) => out.push(c),
            Decoded::Nothing => {}
        }
    }
}

/// Parses the reference that starts right after an `&`; `None` means the `&` is literal.
fn parse_char_ref(i: &str, in_attribute: bool) -> Option<(&str, Decoded)> {
    match i.strip_prefix('#') {
        Some(number) => parse_numeric_ref(number),
        None => parse_named_ref(i, in_attribute),
    }
}

fn parse_numeric_ref(i: &str) -> Option<(&str, Decoded)> {
    // Decimal is tried first, as in Python's pattern, so `&#0x41` is `&#0` followed by `x41`.
    let (rest, digits, radix) = match digit1::<_, Error<&str>>(i) {
        Ok((rest, digits)) => (rest, digits, 10),
        Err(_) => {
            let (rest, digits) = preceded(one_of::<_, _, Error<&str>>("xX"), hex_digit1)
                .parse(i)
                .ok()?;
            (rest, digits, 16)
        }
    };
    // Saturating keeps any overlong number above U+10FFFF, which is all that matters.
    let value = digits.chars().fold(0u32, |acc, c| {
        acc.saturating_mul(radix)
            .saturating_add(c.to_digit(radix).unwrap_or(0))
    });
    let rest = rest.strip_prefix(';').unwrap_or(rest);
    Some((rest, numeric_value(value)))
}

/// Python's `_replace_charref` for numbers: its table of invalid references first, then
/// out-of-range values, then the code points it drops.
fn numeric_value(n: u32) -> Decoded {
    const REPLACEMENT: Decoded = Decoded::Char('\u{FFFD}');
    match n {
        0 => REPLACEMENT,
        0x0D => Decoded::Char('\r'),
        0x80..=0x9F => Decoded::Char(windows_1252(n)),
        0xD800..=0xDFFF => REPLACEMENT,
        n if n > 0x10_FFFF => REPLACEMENT,
        0x01..=0x08 | 0x0B | 0x0E..=0x1F | 0x7F | 0xFDD0..=0xFDEF => Decoded::Nothing,
        n if n & 0xFFFE == 0xFFFE => Decoded::Nothing,
        n => char::from_u32(n).map_or(REPLACEMENT, Decoded::Char),
    }
}

/// Windows-1252 meaning of 0x80–0x9F, which HTML applies to numeric references because
/// documents labelled Latin-1 used those bytes that way; undefined slots map to themselves.
fn windows_1252(n: u32) -> char {
    const TABLE: [char; 32] = [
        '\u{20AC}', '\u{81}', '\u{201A}', '\u{192}', '\u{201E}', '\u{2026}', '\u{2020}',
        '\u{2021}', '\u{2C6}', '\u{2030}', '\u{160}', '\u{2039}', '\u{152}', '\u{8D}', '\u{17D}',
        '\u{8F}', '\u{90}', '\u{2018}', '\u{2019}', '\u{201C}', '\u{201D}', '\u{2022}', '\u{2013}',
        '\u{2014}', '\u{2DC}', '\u{2122}', '\u{161}', '\u{203A}', '\u{153}', '\u{9D}', '\u{17E}',
        '\u{178}',
    ];
    n.checked_sub(0x80)
        .and_then(|k| TABLE.get(usize::try_from(k).ok()?))
        .copied()
        .unwrap_or('\u{FFFD}')
}

fn parse_named_ref(i: &str, in_attribute: bool) -> Option<(&str, Decoded)> {
    // Python examines `[^\t\n\f <&#;]{1,32};?`; measuring the same span keeps the prefix
    // search below identical to its `for x in range(len(s)-1, 1, -1)`.
    let mut name_end = 0;
    let mut chars = 0usize;
    for (at, c) in i.char_indices() {
        if chars == 32 || matches!(c, '\t' | '\n' | '\x0C' | ' ' | '<' | '&' | '#' | ';') {
            break;
        }
        name_end = at + c.len_utf8();
        chars += 1;
    }
    if chars == 0 {
        return None;
    }
    let (name, after) = i.split_at_checked(name_end)?;
    let semicolon = after.strip_prefix(';');
    if let Some(tail) = semicolon {
        if let Some(value) = i.get(..=name_end).and_then(lookup) {
            return Some((tail, Decoded::Str(value)));
        }
    } else if let Some(value) = lookup(name) {
        return legacy_match(after, value, in_attribute);
    }
    // Names are ASCII alphanumeric, so only the alphanumeric lead of the span can match.
    let span_chars = chars + usize::from(semicolon.is_some());
    let alnum = name.bytes().take_while(u8::is_ascii_alphanumeric).count();
    let longest = alnum
        .min(span_chars.saturating_sub(1))
        .min(entities::MAX_LEGACY_LEN);
    (2..=longest).rev().find_map(|len| {
        let (prefix, tail) = i.split_at_checked(len)?;
        let value = lookup(prefix)?;
        legacy_match(tail, value, in_attribute)
    })
}

/// A legacy name matched without `;`. In an attribute value the standard keeps it literal
/// when a letter, digit or `=` follows, which protects query strings like `&copy=2`.
fn legacy_match<'a>(
    tail: &'a str,
    value: &'static str,
    in_attribute: bool,
) -> Option<(&'a str, Decoded)> {
    let guarded = tail.starts_with(|c: char| c == '=' || c.is_ascii_alphanumeric());
    if in_attribute && guarded {
        None
    } else {
        Some((tail, Decoded::Str(value)))
    }
}

fn lookup(name: &str) -> Option<&'static str> {
    // The references mail is full of skip the binary search.
    match name {
        "nbsp;" => return Some("\u{A0}"),
        "amp;" => return Some("&"),
        _ if name.len() > entities::MAX_NAME_LEN => return None,
        _ => {}
    }
    let at = entities::ENTITIES
        .binary_search_by(|(key, _)| (*key).cmp(name))
        .ok()?;
    entities::ENTITIES.get(at).map(|(_, value)| *value)
}

/// The whitespace HTML collapses; other spaces (no-break, ideographic) are text.
fn is_html_space(c: char) -> bool {
    matches!(c, ' ' | '\t' | '\n' | '\r' | '\x0C')
}

fn is_html_space_byte(b: u8) -> bool {
    matches!(b, b' ' | b'\t' | b'\n' | b'\r' | b'\x0C')
}

/// Length of the leading run of `bytes` that is already in its rendered form: no `&` to
/// decode, and no whitespace except single spaces between other characters. Copying such runs
/// whole, rather than word by word, is what keeps plain text fast.
fn plain_run_len(bytes: &[u8], decode: bool) -> usize {
    let stops = |b: u8| is_html_space_byte(b) || (decode && b == b'&');
    let mut end = 0;
    while let Some(&b) = bytes.get(end) {
        if b == b' ' && end > 0 {
            match bytes.get(end + 1) {
                Some(&next) if !stops(next) => end += 2,
                _ => break,
            }
        } else if stops(b) {
            break;
        } else {
            end += 1;
        }
    }
    end
}

/// Separator owed before the next text of a sink; a break outranks a space.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq, PartialOrd, Ord)]
enum Gap {
    #[default]
    None,
    Space,
    Break,
}

#[derive(Debug, Default)]
struct Sink {
    out: String,
    pending: Gap,
}

/// The output budget ran out; the walk unwinds with `?`.
#[derive(Debug)]
struct Full;

impl Sink {
    /// Appends `s` after any owed separator, within `budget`. On overflow it keeps the part
    /// that fits, so a truncated result is always a prefix of the untruncated one.
    fn push(&mut self, budget: &mut usize, s: &str) -> Result<(), Full> {
        if s.is_empty() {
            return Ok(());
        }
        let separator = match self.pending {
            _ if self.out.is_empty() => None,
            Gap::None => None,
            Gap::Space => Some(' '),
            Gap::Break => Some('\n'),
        };
        let separator_len = usize::from(separator.is_some());
        let Some(room) = budget.checked_sub(separator_len) else {
            return Err(Full);
        };
        let mut fits = room.min(s.len());
        while !s.is_char_boundary(fits) {
            fits -= 1;
        }
        if fits > 0 {
            if let Some(c) = separator {
                self.out.push(c);
            }
            self.out.push_str(s.get(..fits).unwrap_or_default());
            self.pending = Gap::None;
            *budget = room - fits;
        }
        if fits < s.len() { Err(Full) } else { Ok(()) }
    }
}

/// What a tag name means to the walker. Names are matched ASCII case-insensitively.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum Kind {
    A,
    Area,
    Img,
    Br,
    Hr,
    P,
    Li,
    Dt,
    Dd,
    Tr,
    Td,
    Th,
    OptionEl,
    /// Block elements whose start also closes an open `p`.
    Block,
    /// Table sections: a line break, but they leave a `p` alone.
    TableBlock,
    /// Other elements that never have content.
    Void,
    /// Raw text that is not shown.
    RawHidden,
    Xmp,
    Textarea,
    Plaintext,
    Template,
    Other,
}

impl Kind {
    fn of(name: &str) -> Kind {
        let mut buf = [0u8; 10];
        let bytes = name.as_bytes();
        if bytes.len() > buf.len() {
            return Kind::Other;
        }
        for (lower, byte) in buf.iter_mut().zip(bytes) {
            *lower = byte.to_ascii_lowercase();
        }
        match buf.get(..bytes.len()).unwrap_or_default() {
            b"a" => Kind::A,
            b"area" => Kind::Area,
            b"img" => Kind::Img,
            b"br" => Kind::Br,
            b"hr" => Kind::Hr,
            b"p" => Kind::P,
            b"li" => Kind::Li,
            b"dt" => Kind::Dt,
            b"dd" => Kind::Dd,
            b"tr" => Kind::Tr,
            b"td" => Kind::Td,
            b"th" => Kind::Th,
            b"option" => Kind::OptionEl,
            b"address" | b"article" | b"aside" | b"blockquote" | b"center" | b"details"
            | b"dialog" | b"dir" | b"div" | b"dl" | b"fieldset" | b"figcaption" | b"figure"
            | b"footer" | b"form" | b"h1" | b"h2" | b"h3" | b"h4" | b"h5" | b"h6" | b"header"
            | b"hgroup" | b"listing" | b"main" | b"menu" | b"nav" | b"ol" | b"pre" | b"search"
            | b"section" | b"summary" | b"table" | b"ul" => Kind::Block,
            b"tbody" | b"thead" | b"tfoot" | b"caption" => Kind::TableBlock,
            b"base" | b"col" | b"embed" | b"frame" | b"input" | b"keygen" | b"link" | b"meta"
            | b"param" | b"source" | b"track" | b"wbr" => Kind::Void,
            b"script" | b"style" | b"title" | b"iframe" | b"noembed" | b"noframes" => {
                Kind::RawHidden
            }
            b"xmp" => Kind::Xmp,
            b"textarea" => Kind::Textarea,
            b"plaintext" => Kind::Plaintext,
            b"template" => Kind::Template,
            _ => Kind::Other,
        }
    }

    fn breaks_line(self) -> bool {
        matches!(
            self,
            Kind::Br
                | Kind::Hr
                | Kind::P
                | Kind::Li
                | Kind::Dt
                | Kind::Dd
                | Kind::Tr
                | Kind::Block
                | Kind::TableBlock
                | Kind::Xmp
                | Kind::Plaintext
        )
    }

    fn is_void(self) -> bool {
        matches!(
            self,
            Kind::Area | Kind::Img | Kind::Br | Kind::Hr | Kind::Void
        )
    }

    fn closes_p(self) -> bool {
        matches!(
            self,
            Kind::Hr
                | Kind::P
                | Kind::Li
                | Kind::Dt
                | Kind::Dd
                | Kind::Block
                | Kind::Xmp
                | Kind::Plaintext
        )
    }

    /// Elements a same-named start tag closes instead of nesting in.
    fn closed_by_sibling(self) -> bool {
        matches!(
            self,
            Kind::P
                | Kind::Li
                | Kind::Dt
                | Kind::Dd
                | Kind::Tr
                | Kind::Td
                | Kind::Th
                | Kind::OptionEl
        )
    }

    /// Whether a start tag of kind `next` implicitly ends an open element of this kind.
    fn ended_by_start(self, next: Kind) -> bool {
        match self {
            Kind::P => next.closes_p(),
            Kind::Li => next == Kind::Li,
            Kind::Dt | Kind::Dd => matches!(next, Kind::Dt | Kind::Dd),
            Kind::Td | Kind::Th => matches!(next, Kind::Td | Kind::Th | Kind::Tr),
            Kind::Tr => next == Kind::Tr,
            Kind::OptionEl => next == Kind::OptionEl,
            _ => false,
        }
    }

    /// Whether the end tag `name` (of kind `end`) implicitly ends an open element of this
    /// kind because it closes the container such an element lives in.
    fn ended_by_end(self, name: &str, end: Kind) -> bool {
        let is = |container: &str| name.eq_ignore_ascii_case(container);
        match self {
            Kind::P => matches!(
                end,
                Kind::Block | Kind::Li | Kind::Dt | Kind::Dd | Kind::Tr | Kind::Td | Kind::Th
            ),
            Kind::Li => is("ul") || is("ol"),
            Kind::Dt | Kind::Dd => is("dl"),
            Kind::Td | Kind::Th => matches!(end, Kind::Tr | Kind::TableBlock) || is("table"),
            Kind::Tr => end == Kind::TableBlock || is("table"),
            Kind::OptionEl => is("select"),
            _ => false,
        }
    }
}

/// A start tag with the few attributes the walker reads; the first of duplicates wins, as in
/// the standard.
#[derive(Debug, Default)]
struct StartTag<'a> {
    name: &'a str,
    style: Option<&'a str>,
    hidden: bool,
    href: Option<&'a str>,
    src: Option<&'a str>,
}

impl<'a> StartTag<'a> {
    fn note(&mut self, name: &'a str, value: &'a str) {
        let slot = if name.eq_ignore_ascii_case("style") {
            &mut self.style
        } else if name.eq_ignore_ascii_case("href") {
            &mut self.href
        } else if name.eq_ignore_ascii_case("src") {
            &mut self.src
        } else {
            self.hidden |= name.eq_ignore_ascii_case("hidden");
            return;
        };
        slot.get_or_insert(value);
    }
}

/// One step of markup at a `<`.
enum Markup<'a> {
    /// The `<` starts nothing and is text.
    Text,
    /// Markup runs to the end of the input; the standard drops it.
    Unterminated,
    /// A comment, doctype, processing instruction or stray end tag: no text.
    Skip(&'a str),
    Start(StartTag<'a>, &'a str),
    End(&'a str, &'a str),
}

type Parsed<'a, T> = IResult<&'a str, T>;

fn parse_markup(i: &str) -> Markup<'_> {
    let mut next = i.chars().skip(1);
    let found = match (next.next(), next.next()) {
        (Some('!'), _) if i.starts_with("<!--") => {
            parse_comment(i).map(|(rest, ())| Markup::Skip(rest))
        }
        (Some('!' | '?'), _) => parse_bogus_comment(i).map(|(rest, ())| Markup::Skip(rest)),
        (Some('/'), Some(c)) if c.is_ascii_alphabetic() => {
            parse_end_tag(i).map(|(rest, name)| Markup::End(name, rest))
        }
        (Some('/'), Some('>')) => {
            tag::<_, _, Error<&str>>("</>")(i).map(|(rest, _)| Markup::Skip(rest))
        }
        (Some('/'), Some(_)) => parse_bogus_comment(i).map(|(rest, ())| Markup::Skip(rest)),
        (Some(c), _) if c.is_ascii_alphabetic() => {
            parse_start_tag(i).map(|(rest, start)| Markup::Start(start, rest))
        }
        _ => return Markup::Text,
    };
    found.unwrap_or(Markup::Unterminated)
}

fn parse_comment(i: &str) -> Parsed<'_, ()> {
    let (body, _) = tag("<!--")(i)?;
    // `<!-->` and `<!--->` are complete, empty comments.
    if let Some(rest) = body.strip_prefix('>').or_else(|| body.strip_prefix("->")) {
        return Ok((rest, ()));
    }
    let mut from = 0;
    while let Some(found) = body.get(from..).and_then(|tail| tail.find("--")) {
        let dashes = from + found;
        let after = body.get(dashes + 2..).unwrap_or_default();
        if let Some(rest) = after.strip_prefix('>').or_else(|| after.strip_prefix("!>")) {
            return Ok((rest, ()));
        }
        // One past the first dash, so `--->` is still seen as the end.
        from = dashes + 1;
    }
    Err(nom::Err::Error(Error::new(i, ErrorKind::TakeUntil)))
}

/// `<!...>`, `<?...>` and `</` followed by a non-letter run to the first `>`.
fn parse_bogus_comment(i: &str) -> Parsed<'_, ()> {
    let (rest, _) = (take(2usize), take_until(">"), char('>')).parse(i)?;
    Ok((rest, ()))
}

fn parse_tag_name(i: &str) -> Parsed<'_, &str> {
    recognize((
        anychar,
        take_till(|c| is_html_space(c) || c == '/' || c == '>'),
    ))
    .parse(i)
}

fn parse_start_tag(i: &str) -> Parsed<'_, StartTag<'_>> {
    let (i, (_, name)) = (char('<'), parse_tag_name).parse(i)?;
    let mut start = StartTag {
        name,
        ..StartTag::default()
    };
    let (rest, ()) = parse_attributes(i, |attribute, value| start.note(attribute, value))?;
    Ok((rest, start))
}

fn parse_end_tag(i: &str) -> Parsed<'_, &str> {
    let (i, (_, name)) = (tag("</"), parse_tag_name).parse(i)?;
    // End tags may carry attributes; they are parsed only so a quoted `>` cannot end the tag.
    let (rest, ()) = parse_attributes(i, |_, _| {})?;
    Ok((rest, name))
}

/// Attributes up to and including the `>` that ends the tag, as the standard's tokenizer
/// reads them: `/` outside a value is skipped, a name may start with `=`, a value is quoted
/// or runs to whitespace or `>`. Input ending inside the tag is an error.
fn parse_attributes<'a>(
    mut i: &'a str,
    mut on_attribute: impl FnMut(&'a str, &'a str),
) -> Parsed<'a, ()> {
    loop {
        let (rest, _) = take_till(|c| !is_html_space(c) && c != '/')(i)?;
        if let Some(rest) = rest.strip_prefix('>') {
            return Ok((rest, ()));
        }
        let (rest, name) = recognize((
            anychar,
            take_till(|c| is_html_space(c) || matches!(c, '/' | '>' | '=')),
        ))
        .parse(rest)?;
        let (rest, _) = take_till(|c| !is_html_space(c))(rest)?;
        let Some(rest) = rest.strip_prefix('=') else {
            on_attribute(name, "");
            i = rest;
            continue;
        };
        let (rest, _) = take_till(|c| !is_html_space(c))(rest)?;
        let (rest, value) = parse_attribute_value(rest)?;
        on_attribute(name, value);
        i = rest;
    }
}

fn parse_attribute_value(i: &str) -> Parsed<'_, &str> {
    // Dispatch on the first character rather than `alt`: an unclosed quote must fail the tag,
    // not fall back to an unquoted value.
    match i.chars().next() {
        Some(quote @ ('"' | '\'')) => {
            let (rest, (_, value, _)) =
                (char(quote), take_till(move |c| c == quote), char(quote)).parse(i)?;
            Ok((rest, value))
        }
        _ => take_till(|c| is_html_space(c) || c == '>')(i),
    }
}

/// Offset of the end tag `</name` that closes a raw text element, followed as the standard
/// requires by whitespace, `/` or `>`.
fn find_end_tag(haystack: &str, name: &str) -> Option<usize> {
    let mut from = 0;
    while let Some(found) = haystack.get(from..).and_then(|tail| tail.find("</")) {
        let at = from + found;
        let after = haystack.get(at + 2..).unwrap_or_default();
        let name_matches = after
            .get(..name.len())
            .is_some_and(|candidate| candidate.eq_ignore_ascii_case(name));
        let delimited = after
            .as_bytes()
            .get(name.len())
            .is_some_and(|&b| is_html_space_byte(b) || b == b'/' || b == b'>');
        if name_matches && delimited {
            return Some(at);
        }
        from = at + 2;
    }
    None
}

/// The element whose start tag hid its content, and how many same-named elements are open
/// inside it; the region ends when that count returns to zero.
#[derive(Debug)]
struct Region<'a> {
    name: &'a str,
    kind: Kind,
    depth: usize,
}

struct Walker<'a> {
    visible: Sink,
    hidden: Sink,
    budget: usize,
    links: Vec<String>,
    region: Option<Region<'a>>,
}

impl<'a> Walker<'a> {
    fn new(max_text_bytes: usize) -> Self {
        Walker {
            visible: Sink::default(),
            hidden: Sink::default(),
            budget: max_text_bytes,
            links: Vec::new(),
            region: None,
        }
    }

    fn run(&mut self, html: &'a str) -> Result<(), Full> {
        let mut text_from = 0;
        let mut search_from = 0;
        while let Some(found) = html.get(search_from..).and_then(|tail| tail.find('<')) {
            let lt = search_from + found;
            let markup = parse_markup(html.get(lt..).unwrap_or_default());
            if let Markup::Text = markup {
                search_from = lt + 1;
                continue;
            }
            self.text(html.get(text_from..lt).unwrap_or_default(), true)?;
            let rest = match markup {
                Markup::Text | Markup::Unterminated => return Ok(()),
                Markup::Skip(rest) => rest,
                Markup::Start(start, rest) => match self.start_tag(start, rest)? {
                    Some(rest) => rest,
                    None => return Ok(()),
                },
                Markup::End(name, rest) => {
                    self.end_tag(name);
                    rest
                }
            };
            text_from = html.len() - rest.len();
            search_from = text_from;
        }
        self.text(html.get(text_from..).unwrap_or_default(), true)
    }

    fn sink(&mut self) -> &mut Sink {
        if self.region.is_some() {
            &mut self.hidden
        } else {
            &mut self.visible
        }
    }

    fn gap(&mut self, gap: Gap) {
        let sink = self.sink();
        sink.pending = sink.pending.max(gap);
    }

    fn push(&mut self, s: &str) -> Result<(), Full> {
        let sink = if self.region.is_some() {
            &mut self.hidden
        } else {
            &mut self.visible
        };
        sink.push(&mut self.budget, s)
    }

    /// Emits a run of character data, collapsing whitespace and, unless it is raw text,
    /// decoding character references.
    fn text(&mut self, run: &str, decode: bool) -> Result<(), Full> {
        let mut rest = run;
        while let Some(&first) = rest.as_bytes().first() {
            if is_html_space_byte(first) {
                rest = rest.trim_start_matches(is_html_space);
                self.gap(Gap::Space);
            } else if decode && first == b'&' {
                let after = rest.get(1..).unwrap_or_default();
                rest = match parse_char_ref(after, false) {
                    Some((tail, decoded)) => {
                        self.decoded(decoded)?;
                        tail
                    }
                    None => {
                        self.push("&")?;
                        after
                    }
                };
            } else {
                let (word, tail) = rest
                    .split_at_checked(plain_run_len(rest.as_bytes(), decode))
                    .unwrap_or((rest, ""));
                self.push(word)?;
                rest = tail;
            }
        }
        Ok(())
    }

    fn decoded(&mut self, decoded: Decoded) -> Result<(), Full> {
        let mut buf = [0u8; 4];
        let text = match decoded {
            Decoded::Str(s) => s,
            Decoded::Char(c) => c.encode_utf8(&mut buf),
            Decoded::Nothing => return Ok(()),
        };
        // A reference to whitespace (`&#32;`, `&Tab;`) collapses like the character itself.
        if text.chars().all(is_html_space) {
            self.gap(Gap::Space);
            Ok(())
        } else {
            self.push(text)
        }
    }

    /// Handles a start tag; returns where the walk resumes, `None` when the element's content
    /// ran to the end of the input.
    fn start_tag(&mut self, start: StartTag<'a>, rest: &'a str) -> Result<Option<&'a str>, Full> {
        let kind = Kind::of(start.name);
        self.collect_link(kind, &start);
        if let Some(region) = self.region.as_mut() {
            if region.kind.ended_by_start(kind) {
                self.region = None;
            } else if !kind.is_void()
                && !kind.closed_by_sibling()
                && start.name.eq_ignore_ascii_case(region.name)
            {
                region.depth = region.depth.saturating_add(1);
            }
        }
        if self.region.is_none() && !kind.is_void() && (kind == Kind::Template || hides(&start)) {
            self.region = Some(Region {
                name: start.name,
                kind,
                depth: 1,
            });
        }
        if kind.breaks_line() {
            self.gap(Gap::Break);
        } else if matches!(kind, Kind::Td | Kind::Th) {
            self.gap(Gap::Space);
        }
        match kind {
            // The end tag is left in place so the main loop handles it like any other.
            Kind::RawHidden => Ok(find_end_tag(rest, start.name).and_then(|at| rest.get(at..))),
            Kind::Textarea | Kind::Xmp => {
                let end = find_end_tag(rest, start.name);
                let content = end.and_then(|at| rest.get(..at)).unwrap_or(rest);
                self.text(content, kind == Kind::Textarea)?;
                Ok(end.and_then(|at| rest.get(at..)))
            }
            Kind::Plaintext => {
                self.text(rest, false)?;
                Ok(None)
            }
            _ => Ok(Some(rest)),
        }
    }

    fn end_tag(&mut self, name: &str) {
        let kind = Kind::of(name);
        if kind.breaks_line() {
            self.gap(Gap::Break);
        } else if matches!(kind, Kind::Td | Kind::Th) {
            self.gap(Gap::Space);
        }
        if let Some(region) = self.region.as_mut() {
            if name.eq_ignore_ascii_case(region.name) {
                region.depth = region.depth.saturating_sub(1);
                if region.depth == 0 {
                    self.region = None;
                }
            } else if region.kind.ended_by_end(name, kind) {
                self.region = None;
            }
        }
    }

    fn collect_link(&mut self, kind: Kind, start: &StartTag<'_>) {
        let target = match kind {
            Kind::A | Kind::Area => start.href,
            Kind::Img => start.src,
            _ => None,
        };
        let Some(raw) = target else { return };
        if self.links.len() >= MAX_LINKS {
            return;
        }
        let decoded = decode_with(raw, true);
        // A browser's URL parser trims C0 controls and spaces and drops tabs and newlines
        // anywhere, so `ex&#10;ample.test` is the host `example.test`.
        let trimmed = decoded.trim_matches(|c: char| c <= ' ');
        let mut link = if trimmed.contains(['\t', '\n', '\r']) {
            trimmed.replace(['\t', '\n', '\r'], "")
        } else {
            trimmed.to_owned()
        };
        if link.is_empty() {
            return;
        }
        if link.len() > MAX_LINK_BYTES {
            let mut cut = MAX_LINK_BYTES;
            while !link.is_char_boundary(cut) {
                cut -= 1;
            }
            link.truncate(cut);
        }
        self.links.push(link);
    }
}

/// Whether the start tag's own attributes hide its content.
fn hides(start: &StartTag<'_>) -> bool {
    start.hidden
        || start
            .style
            .is_some_and(|style| style_hides(&decode_with(style, true)))
}

/// Reads an inline style for the declarations that put text out of a reader's sight.
/// Property names and keywords are ASCII case-insensitive, `!important` is ignored.
fn style_hides(style: &str) -> bool {
    let mut zero_box = false;
    let mut clipped = false;
    for declaration in style.split(';') {
        let Some((property, value)) = declaration.split_once(':') else {
            continue;
        };
        let property = property.trim();
        let value = css_value(value);
        let is = |name: &str| property.eq_ignore_ascii_case(name);
        let keyword = |word: &str| value.eq_ignore_ascii_case(word);
        if is("display") && keyword("none")
            || is("visibility") && (keyword("hidden") || keyword("collapse"))
            || is("font-size") && tiny_font(value)
            || is("opacity") && transparent(value)
        {
            return true;
        }
        if ["height", "max-height", "width", "max-width"]
            .into_iter()
            .any(is)
        {
            zero_box |= css_number(value).is_some_and(|(n, _)| n <= 0.0);
        }
        if ["overflow", "overflow-x", "overflow-y"].into_iter().any(is) {
            clipped |= keyword("hidden") || keyword("clip");
        }
    }
    zero_box && clipped
}

fn css_value(value: &str) -> &str {
    let value = value.trim();
    match value.rsplit_once('!') {
        Some((before, flag)) if flag.trim().eq_ignore_ascii_case("important") => before.trim(),
        _ => value,
    }
}

/// A CSS number and its unit, e.g. `0.5px` is `(0.5, "px")`.
fn css_number(value: &str) -> Option<(f64, &str)> {
    let end = value
        .find(|c: char| !(c.is_ascii_digit() || matches!(c, '.' | '+' | '-')))
        .unwrap_or(value.len());
    let (number, unit) = value.split_at_checked(end)?;
    let number: f64 = number.parse().ok()?;
    number.is_finite().then_some((number, unit.trim()))
}

fn tiny_font(value: &str) -> bool {
    let Some((size, unit)) = css_number(value) else {
        return false;
    };
    let unit_is = |names: &[&str]| names.iter().any(|name| unit.eq_ignore_ascii_case(name));
    size >= 0.0
        && (size <= 0.0
            || unit_is(&["px", "pt"]) && size <= 1.0
            || unit_is(&["em", "rem", "ex", "ch"]) && size <= 0.1
            || unit == "%" && size <= 10.0)
}

fn transparent(value: &str) -> bool {
    match css_number(value) {
        Some((alpha, "")) => alpha <= 0.01,
        Some((alpha, "%")) => alpha <= 1.0,
        _ => false,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn visible(html: &str) -> String {
        html_to_text(html, 1 << 20).visible
    }

    #[test]
    fn entity_table_is_sorted_for_binary_search() {
        assert!(entities::ENTITIES.windows(2).all(|w| match w {
            [a, b] => a.0 < b.0,
            _ => true,
        }));
    }

    #[test]
    fn words_split_by_tags_stay_joined() {
        assert_eq!(visible("fr<b></b>ee of<i>f</i>er"), "free offer");
    }

    #[test]
    fn whitespace_collapses_and_blocks_break() {
        assert_eq!(visible("  a \r\n\t b <p> c </p><div>d</div> "), "a b\nc\nd");
        assert_eq!(visible("<td>x</td><td>y</td>"), "x y");
    }

    #[test]
    fn hidden_p_ends_at_next_block() {
        let text = html_to_text("<p style='display:none'>junk<div>shown</div>", 100);
        assert_eq!(text.visible, "shown");
        assert_eq!(text.hidden, "junk");
    }

    #[test]
    fn nested_same_name_keeps_region() {
        let text = html_to_text("<span hidden>a<span>b</span>c</span>d", 100);
        assert_eq!((text.visible.as_str(), text.hidden.as_str()), ("d", "abc"));
    }

    #[test]
    fn style_detection() {
        assert!(style_hides("color:red; DISPLAY : None !important"));
        assert!(style_hides("font-size:0"));
        assert!(style_hides("font-size: 1px"));
        assert!(!style_hides("font-size: 12px"));
        assert!(style_hides("opacity:0.0"));
        assert!(style_hides("max-height:0;overflow:hidden"));
        assert!(!style_hides("max-height:0"));
        assert!(!style_hides("display:block"));
    }

    #[test]
    fn attribute_legacy_guard() {
        // WHATWG HTML Living Standard, named character reference state: in an attribute a
        // legacy name without ';' followed by '=' or an alphanumeric stays literal.
        assert_eq!(
            decode_with("?a=1&copy=2&amp;b&ampx&lt", true),
            "?a=1&copy=2&b&ampx<"
        );
        assert_eq!(decode_char_refs("?a=1&copy=2"), "?a=1©=2");
    }

    #[test]
    fn truncation_keeps_a_prefix() {
        let text = html_to_text("héllo wörld", 8);
        assert!(text.truncated);
        assert_eq!(text.visible, "héllo w");
    }
}
