//! The tokenizer state machine behind [`TokenBuffer`].
//!
//! Characters arrive one at a time (or, on the ASCII fast path, one word at a time)
//! already normalized; the machine assembles word tokens directly in the shared
//! string, keeps a look-alike copy of the open token on the side, buffers at most two
//! characters of a script written without spaces, and remembers the last run of
//! single-character tokens so that it can join them in place. Every buffer is owned
//! by the [`TokenBuffer`] and reused, so steady-state tokenizing does not allocate.

use unicode_normalization::{IsNormalized, UnicodeNormalization, is_nfkc_quick};

use super::{CharClass, MAX_TOKEN_BYTES, char_class, confusable_prototype};

/// Longest character unit (a character and the combining marks after it) kept in a
/// script without spaces; extra marks are dropped so that a flood of marks on one
/// character cannot grow a bigram without limit.
const MAX_UNIT_BYTES: usize = 32;

/// Separators that join a run of spaced-out letters when used alone between them.
const JOIN_PUNCT: [char; 8] = ['.', '-', '_', '*', '|', '/', '+', '~'];

/// Fewest single-character tokens separated by one space that are joined: two are
/// too often ordinary words ("a I"), three in a row almost never are.
const MIN_SPACE_RUN: usize = 3;

/// Fewest single-character tokens separated by one punctuation mark that are joined;
/// higher than for spaces so that abbreviations such as "U.S.A." stay apart.
const MIN_PUNCT_RUN: usize = 4;

/// The separators seen since the last token.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
enum Gap {
    /// Nothing yet: the next token touches the previous one.
    Empty,
    /// Exactly one U+0020 space.
    Space,
    /// Exactly one of [`JOIN_PUNCT`].
    Punct(char),
    /// Anything else, including the start of a call.
    #[default]
    Other,
}

impl Gap {
    fn then(self, c: char) -> Gap {
        match self {
            Gap::Empty if c == ' ' => Gap::Space,
            Gap::Empty if JOIN_PUNCT.contains(&c) => Gap::Punct(c),
            _ => Gap::Other,
        }
    }

    fn min_join_run(self) -> Option<usize> {
        match self {
            Gap::Space => Some(MIN_SPACE_RUN),
            Gap::Punct(_) => Some(MIN_PUNCT_RUN),
            Gap::Empty | Gap::Other => None,
        }
    }
}

/// Letter case of a single-character token, as written.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
enum Case {
    /// A digit or a letter without case: fits any run.
    #[default]
    Neutral,
    Upper,
    Lower,
}

impl Case {
    fn of(c: char) -> Case {
        if c.is_uppercase() {
            Case::Upper
        } else if c.is_lowercase() {
            Case::Lower
        } else {
            Case::Neutral
        }
    }

    fn fits(self, other: Case) -> bool {
        self == Case::Neutral || other == Case::Neutral || self == other
    }

    fn and(self, other: Case) -> Case {
        if self == Case::Neutral { other } else { self }
    }
}

/// Which kind of token is being assembled.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
enum Open {
    #[default]
    None,
    Word,
    Unspaced,
}

#[derive(Debug, Clone, Default)]
struct State {
    open: Open,
    /// Separators since the last token.
    gap: Gap,
    /// Separators before the open token.
    tok_gap: Gap,
    /// Start of the open word token in `text`.
    start: usize,
    /// Characters of the open word token, counted after lower-casing.
    chars: usize,
    /// The open word token has a non-ASCII character (so `alt` is live).
    non_ascii: bool,
    /// Every non-ASCII character of the open word token has an ASCII prototype.
    mappable: bool,
    /// The open word token reached [`MAX_TOKEN_BYTES`]; the rest of the run is skipped.
    full: bool,
    /// `alt` reached [`MAX_TOKEN_BYTES`].
    alt_full: bool,
    /// Case of the first character of the open word token, as written.
    case: Case,
    /// Characters units held in `units` (0, 1 or 2).
    unit_count: u8,
    /// Start of the last unit in `units`.
    last_unit: usize,
    /// First token of the current run of single-character tokens.
    run_start: usize,
    /// Length of that run (0: no run).
    run_len: usize,
    /// The separator shared by the run (meaningful from two tokens on).
    run_sep: Gap,
    /// The case shared by the letters of the run.
    run_case: Case,
    /// Case of the last token of the run.
    last_case: Case,
}

/// Normalized tokens of one field, stored in one reusable buffer (no allocation per
/// token after warm-up).
///
/// See the [module documentation](super) for the rules applied by
/// [`push_text`](Self::push_text).
#[derive(Default, Debug, Clone)]
pub struct TokenBuffer {
    /// Token text, tokens back to back (some bytes may belong to no token).
    text: String,
    /// Byte ranges of the tokens in `text`.
    spans: Vec<(usize, usize)>,
    /// Look-alike spelling of the open word token.
    alt: String,
    /// The last two character units of an open run of a script without spaces.
    units: String,
    state: State,
}

impl TokenBuffer {
    /// An empty buffer.
    pub fn new() -> Self {
        Self::default()
    }

    /// Forget all tokens, keep capacity.
    pub fn clear(&mut self) {
        self.text.clear();
        self.spans.clear();
        self.alt.clear();
        self.units.clear();
        self.state = State::default();
    }

    /// Normalizes `text` and appends its tokens. Separate calls never join tokens
    /// across the call boundary (e.g. separate MIME parts).
    pub fn push_text(&mut self, text: &str) {
        self.state.gap = Gap::Other;
        if text.is_ascii() {
            self.push_ascii(text);
        } else {
            self.push_mixed(text);
        }
        self.end_token();
        self.finish_run();
        self.state.gap = Gap::Other;
    }

    /// Number of tokens.
    pub fn len(&self) -> usize {
        self.spans.len()
    }

    /// Whether there are no tokens.
    pub fn is_empty(&self) -> bool {
        self.spans.is_empty()
    }

    /// Token `i`, in text order.
    pub fn get(&self, i: usize) -> Option<&str> {
        let &(start, end) = self.spans.get(i)?;
        self.text.get(start..end)
    }

    /// All tokens in text order.
    pub fn iter(&self) -> impl Iterator<Item = &str> + '_ {
        self.spans
            .iter()
            .filter_map(|&(start, end)| self.text.get(start..end))
    }

    /// Sends ASCII stretches down the fast path and the rest through NFKC. A stretch
    /// handed to NFKC runs from an ASCII whitespace byte to the next one, because a
    /// combining mark can compose with the ASCII letter (or `=`, `<`, `>`) before it,
    /// while whitespace composes with nothing on either side.
    fn push_mixed(&mut self, text: &str) {
        let bytes = text.as_bytes();
        let mut pos = 0;
        while pos < bytes.len() {
            let rest = bytes.get(pos..).unwrap_or_default();
            let Some(offset) = rest.iter().position(|b| !b.is_ascii()) else {
                self.push_ascii(text.get(pos..).unwrap_or_default());
                break;
            };
            let first = pos + offset;
            let split = bytes
                .get(pos..first)
                .and_then(|s| s.iter().rposition(u8::is_ascii_whitespace))
                .map_or(pos, |i| pos + i + 1);
            let end = bytes
                .get(first..)
                .and_then(|s| s.iter().position(u8::is_ascii_whitespace))
                .map_or(bytes.len(), |i| first + i);
            self.push_ascii(text.get(pos..split).unwrap_or_default());
            self.push_unicode(text.get(split..end).unwrap_or_default());
            pos = end;
        }
    }

    fn push_ascii(&mut self, text: &str) {
        let bytes = text.as_bytes();
        let mut i = 0;
        while let Some(&b) = bytes.get(i) {
            if b.is_ascii_alphanumeric() {
                let end = bytes
                    .get(i..)
                    .unwrap_or_default()
                    .iter()
                    .position(|b| !b.is_ascii_alphanumeric())
                    .map_or(bytes.len(), |n| i + n);
                self.ascii_word(text.get(i..end).unwrap_or_default());
                i = end;
            } else {
                // `$` is the only currency symbol (Sc) in ASCII.
                if b == b'$' {
                    self.currency('$');
                } else {
                    self.separator(char::from(b));
                }
                i += 1;
            }
        }
    }

    fn push_unicode(&mut self, text: &str) {
        let kept = || {
            text.chars()
                .filter(|&c| char_class(c) != CharClass::Removed)
        };
        // Most text is already in NFKC, and the quick check (UAX #15) is far cheaper
        // than decomposing and recomposing. Its answer "maybe" takes the full path.
        if is_nfkc_quick(kept()) == IsNormalized::Yes {
            self.push_normalized(kept());
        } else {
            self.push_normalized(kept().stream_safe().nfkc());
        }
    }

    fn push_normalized(&mut self, chars: impl Iterator<Item = char>) {
        for orig in chars {
            // A character with the Lowercase property is its own lower case (checked
            // for every code point by a test); the property is a cheap bit lookup,
            // the mapping a binary search.
            if orig.is_lowercase() {
                self.push_lowered(orig, orig);
            } else {
                for lower in orig.to_lowercase() {
                    self.push_lowered(lower, orig);
                }
            }
        }
    }

    fn push_lowered(&mut self, lower: char, orig: char) {
        match char_class(lower) {
            CharClass::Separator => self.separator(lower),
            CharClass::Removed => {}
            CharClass::Currency => self.currency(lower),
            CharClass::Word => {
                if self.state.open != Open::Word {
                    self.end_token();
                    self.begin_word();
                }
                self.word_char(lower, orig);
            }
            CharClass::Mark => match self.state.open {
                Open::Unspaced => self.unit_mark(lower),
                Open::Word => self.word_char(lower, orig),
                Open::None => {
                    self.begin_word();
                    self.word_char(lower, orig);
                }
            },
            CharClass::Unspaced => self.unit_start(lower),
        }
    }

    #[inline]
    fn separator(&mut self, c: char) {
        if self.state.open != Open::None {
            self.end_token();
        }
        self.state.gap = self.state.gap.then(c);
    }

    fn currency(&mut self, c: char) {
        self.end_token();
        self.finish_run();
        let start = self.text.len();
        self.text.push(c);
        self.spans.push((start, self.text.len()));
        self.state.gap = Gap::Empty;
    }

    fn end_token(&mut self) {
        match self.state.open {
            Open::None => {}
            Open::Word => self.finish_word(),
            Open::Unspaced => self.finish_unspaced(),
        }
        self.state.open = Open::None;
    }

    fn open_token(&mut self, kind: Open) {
        let st = &mut self.state;
        st.open = kind;
        st.tok_gap = st.gap;
        st.gap = Gap::Empty;
    }

    fn begin_word(&mut self) {
        self.open_token(Open::Word);
        let st = &mut self.state;
        st.start = self.text.len();
        st.chars = 0;
        st.non_ascii = false;
        st.mappable = true;
        st.full = false;
        st.alt_full = false;
        st.case = Case::Neutral;
    }

    /// Appends a run of ASCII letters and digits to the open word token.
    fn ascii_word(&mut self, word: &str) {
        if self.state.open != Open::Word {
            self.end_token();
            self.begin_word();
        }
        if self.state.chars == 0
            && let Some(&first) = word.as_bytes().first()
        {
            self.state.case = Case::of(char::from(first));
        }
        self.state.chars += word.len();
        if self.state.full {
            return;
        }
        let used = self.text.len().saturating_sub(self.state.start);
        let room = MAX_TOKEN_BYTES.saturating_sub(used);
        let piece = if word.len() > room {
            self.state.full = true;
            word.get(..room).unwrap_or_default()
        } else {
            word
        };
        let at = self.text.len();
        self.text.push_str(piece);
        if let Some(pushed) = self.text.get_mut(at..) {
            pushed.make_ascii_lowercase();
        }
        if self.state.non_ascii && !self.state.alt_full {
            let at = self.alt.len();
            push_capped(&mut self.alt, 0, piece, &mut self.state.alt_full);
            if let Some(pushed) = self.alt.get_mut(at..) {
                pushed.make_ascii_lowercase();
            }
        }
    }

    /// Appends one lower-cased character to the open word token; `orig` is the
    /// character before lower-casing, whose look-alike prototype counts (a capital
    /// Greek upsilon looks like `Y`, its small letter like `u`).
    fn word_char(&mut self, lower: char, orig: char) {
        let st = &mut self.state;
        if st.chars == 0 {
            st.case = Case::of(orig);
        }
        st.chars += 1;
        if st.full {
            return;
        }
        let mut buf = [0; 4];
        let encoded: &str = lower.encode_utf8(&mut buf);
        if !push_capped(&mut self.text, st.start, encoded, &mut st.full) {
            return;
        }
        if lower.is_ascii() {
            if st.non_ascii && !st.alt_full {
                push_capped(&mut self.alt, 0, encoded, &mut st.alt_full);
            }
            return;
        }
        if !st.non_ascii {
            st.non_ascii = true;
            self.alt.clear();
            let before = self.text.len() - encoded.len();
            self.alt
                .push_str(self.text.get(st.start..before).unwrap_or_default());
        }
        if st.mappable {
            match confusable_prototype(orig) {
                Some(proto) if !st.alt_full => {
                    push_capped(&mut self.alt, 0, proto, &mut st.alt_full);
                }
                Some(_) => {}
                None => st.mappable = false,
            }
        }
    }

    fn finish_word(&mut self) {
        let st = &self.state;
        let start = st.start;
        if st.non_ascii && st.mappable && self.text.is_char_boundary(start) {
            self.text.truncate(start);
            self.text.push_str(&self.alt);
        }
        let end = self.text.len();
        if end > start {
            let single = st.chars == 1;
            let (gap, case) = (st.tok_gap, st.case);
            self.add_word((start, end), single, gap, case);
        }
    }

    /// Records a finished word token and extends, closes or starts the run of
    /// single-character tokens. A run keeps one separator and one letter case, so
    /// that the word "a" before "W I N N E R" stays a word of its own.
    fn add_word(&mut self, span: (usize, usize), single: bool, gap: Gap, case: Case) {
        if !single {
            self.finish_run();
            self.spans.push(span);
            return;
        }
        let joinable = gap.min_join_run().is_some();
        let st = &mut self.state;
        let fits = st.run_case.fits(case);
        if st.run_len > 0 && joinable && fits && (st.run_len == 1 || st.run_sep == gap) {
            if st.run_len == 1 {
                st.run_sep = gap;
            }
            st.run_len += 1;
            st.run_case = st.run_case.and(case);
            st.last_case = case;
            self.spans.push(span);
            return;
        }
        let pair_case = st.last_case.and(case);
        if st.run_len >= 2 && joinable && st.last_case.fits(case) {
            // The separator changed (or the case, with a neutral last token): the
            // last token may rather open a new run ("w i n n e r w.i.n.n.e.r" is
            // two words). It leaves the old run when the rest of the old run still
            // joins, or when the old run does not join anyway.
            let (run_start, run_len, run_sep) = (st.run_start, st.run_len, st.run_sep);
            let min = run_sep.min_join_run().unwrap_or(usize::MAX);
            st.run_len = 0;
            if run_len != min {
                if run_len > min {
                    let (first, count) = self.without_leading_word(run_start, run_len - 1, min);
                    self.join(first, count);
                }
                let st = &mut self.state;
                st.run_start = self.spans.len().saturating_sub(1);
                st.run_len = 2;
                st.run_sep = gap;
                st.run_case = pair_case;
                st.last_case = case;
                self.spans.push(span);
                return;
            }
            let (first, count) = self.without_leading_word(run_start, run_len, min);
            self.join(first, count);
        } else {
            self.finish_run();
        }
        let st = &mut self.state;
        st.run_start = self.spans.len();
        st.run_len = 1;
        st.run_sep = Gap::Other;
        st.run_case = case;
        st.last_case = case;
        self.spans.push(span);
    }

    /// Closes the run of single-character tokens at the end of `spans`, joining it
    /// into one token when it is long enough.
    #[inline]
    fn finish_run(&mut self) {
        let st = &mut self.state;
        if st.run_len == 0 {
            return;
        }
        let (run_start, run_len) = (st.run_start, st.run_len);
        st.run_len = 0;
        if let Some(min) = st.run_sep.min_join_run()
            && run_len >= min
        {
            let (run_start, run_len) = self.without_leading_word(run_start, run_len, min);
            self.join(run_start, run_len);
        }
    }

    /// "a w i n n e r": the article in front of a spaced-out word is a word of its own,
    /// not the word's first letter. A run that starts with one of the common one-letter
    /// words `a` or `i` and still joins without it leaves that letter out. This loses the
    /// first letter of spaced words that begin with it ("a m a z i n g" gives "a"
    /// "mazing"), which is the lesser harm (common practice has no better rule without
    /// a dictionary).
    fn without_leading_word(&self, run_start: usize, run_len: usize, min: usize) -> (usize, usize) {
        let first = self
            .spans
            .get(run_start)
            .and_then(|&(a, b)| self.text.get(a..b));
        if run_len > min && matches!(first, Some("a" | "i")) {
            (run_start + 1, run_len - 1)
        } else {
            (run_start, run_len)
        }
    }

    /// Replaces the `count` tokens from `first` on by one token spanning them, cut at
    /// [`MAX_TOKEN_BYTES`]. Tokens of a run sit back to back in `text`.
    fn join(&mut self, first: usize, count: usize) {
        if count < 2 {
            return;
        }
        let last = first + count - 1;
        let (Some(&(start, _)), Some(&(_, stop))) = (self.spans.get(first), self.spans.get(last))
        else {
            return;
        };
        let mut end = stop.min(start + MAX_TOKEN_BYTES);
        while end > start && !self.text.is_char_boundary(end) {
            end -= 1;
        }
        if let Some(slot) = self.spans.get_mut(first) {
            *slot = (start, end);
        }
        self.spans.drain(first + 1..=last);
    }

    /// A letter of a script without spaces: starts a new character unit.
    fn unit_start(&mut self, c: char) {
        if self.state.open != Open::Unspaced {
            self.end_token();
            self.open_token(Open::Unspaced);
            self.units.clear();
            self.state.unit_count = 0;
            self.state.last_unit = 0;
        }
        match self.state.unit_count {
            0 => {
                self.units.push(c);
                self.state.unit_count = 1;
                self.state.last_unit = 0;
            }
            1 => {
                self.state.last_unit = self.units.len();
                self.units.push(c);
                self.state.unit_count = 2;
            }
            _ => {
                self.emit_units();
                let last = self.state.last_unit;
                if self.units.is_char_boundary(last) {
                    self.units.replace_range(..last, "");
                }
                self.state.last_unit = self.units.len();
                self.units.push(c);
            }
        }
    }

    fn unit_mark(&mut self, c: char) {
        let unit_len = self.units.len().saturating_sub(self.state.last_unit);
        if unit_len + c.len_utf8() <= MAX_UNIT_BYTES {
            self.units.push(c);
        }
    }

    fn emit_units(&mut self) {
        self.finish_run();
        let start = self.text.len();
        self.text.push_str(&self.units);
        self.spans.push((start, self.text.len()));
    }

    fn finish_unspaced(&mut self) {
        if self.state.unit_count > 0 {
            self.emit_units();
        }
        self.units.clear();
        self.state.unit_count = 0;
        self.state.last_unit = 0;
    }
}

/// Appends `piece` to `buf` unless the part of `buf` from `start` would exceed
/// [`MAX_TOKEN_BYTES`], in which case it sets `full` and appends nothing. Returns
/// whether it appended. A look-alike prototype of several letters is all or nothing.
fn push_capped(buf: &mut String, start: usize, piece: &str, full: &mut bool) -> bool {
    let used = buf.len().saturating_sub(start);
    if used + piece.len() > MAX_TOKEN_BYTES {
        *full = true;
        return false;
    }
    buf.push_str(piece);
    true
}
