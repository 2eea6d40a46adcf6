//! Text normalization and tokenization: turns the text a reader would see into the
//! word tokens that the feature extractor hashes.
//!
//! The same code runs at training time and at scoring time, so every rule here is
//! part of the model's feature spec: any change that alters tokens must bump
//! [`NORMALIZATION_VERSION`].
//!
//! # Pipeline (invariants of [`TokenBuffer::push_text`])
//!
//! 1. **Characters.** Removed characters ([`CharClass::Removed`]: General Category Cf
//!    such as zero-width space and joiners, word joiner, byte order mark, soft hyphen,
//!    bidi controls and tag characters, plus the other assigned default-ignorable code
//!    points: combining grapheme joiner U+034F, variation selectors U+FE00–FE0F and
//!    U+E0100–E01EF, Mongolian free variation selectors, Hangul fillers, Khmer inherent
//!    vowels) are dropped *before* Unicode NFKC (UAX #15), so that a hidden character
//!    between a letter and its accent neither splits the word nor blocks composition.
//!    The text is then put in NFKC and lower-cased one character at a time with
//!    [`char::to_lowercase`] (full lower-case mapping without context: a final capital
//!    sigma becomes `σ`, never `ς`, and `İ` becomes `i` + U+0307). NFKC runs in the
//!    Stream-Safe Text Format of UAX #15 (a combining grapheme joiner after 30
//!    non-starters, itself removed afterwards) so that a flood of combining marks cannot
//!    make normalization slow. Pure ASCII is already in NFKC, so ASCII stretches skip
//!    the Unicode machinery and are only lower-cased.
//! 2. **Tokens.** A token is a maximal run of letters and numbers (General Category
//!    L*, N*) together with the combining marks (M*) that follow them; every other
//!    character separates tokens. Currency symbols (Sc: `$ € £ ¥` …) are one-character
//!    tokens of their own, because prices matter to a junk filter (common practice).
//!    A token is cut at [`MAX_TOKEN_BYTES`] bytes, at a character boundary: the rest of
//!    the run is skipped, so a long base64 line costs one short token. A combining mark
//!    that follows no letter starts a token of its own.
//! 3. **Look-alikes.** In a token that contains non-ASCII letters, if *every* non-ASCII
//!    character has a prototype made of ASCII letters and digits (the UTS #39 skeleton
//!    of the character as it stood after NFKC, lower-cased), each one is replaced by
//!    its prototype: `winnеr` with a Cyrillic `е` becomes `winner`, and Greek capitals
//!    `ΤΟΚΕΝ` become `token`. A genuine Greek or Russian word nearly always has a
//!    letter with no Latin twin (`п`, `λ`, an accent) and stays as it is. Words made
//!    only of twins (Russian `сор`) do collapse: the price of catching disguises.
//! 4. **Spaced-out letters.** A run of single-character tokens (one letter or digit
//!    each, after step 3) joined by the same separator becomes one token when the
//!    separator is exactly one space and the run has at least 3 tokens
//!    (`w i n n e r` → `winner`), or exactly one of `. - _ * | / + ~` (no spaces) and
//!    the run has at least 4 tokens (`w.i.n.n.e.r` → `winner`; `U.S.A.` and `e.g.`
//!    stay apart). Initials such as `J. R. Smith` (separator `. `) never join. The
//!    letters of a run must also share their case as written (digits fit any run),
//!    so the word in `a W I N N E R` stays apart from `winner`. When the separator
//!    changes, the last token leaves the run if the rest still joins or the run
//!    does not join anyway (`w i n n e r w.i.n.n.e.r` gives `winner` twice).
//!    The joined token is cut at [`MAX_TOKEN_BYTES`] like any other.
//! 5. **Scripts without spaces.** A run of Han, Hiragana, Katakana, Thai, Lao, Khmer
//!    or Myanmar letters is split into overlapping bigrams of characters (a character
//!    counts together with the combining marks after it; a run of one character
//!    gives that character), which is common practice for word features in these
//!    scripts. Hangul is written with spaces and gives ordinary word tokens.
//!
//! Tokens are never empty, never cross two calls of [`TokenBuffer::push_text`], and
//! never contain a separator. After warm-up, tokenizing allocates nothing: tokens
//! live in one reusable string of the [`TokenBuffer`].
//!
//! # Unicode versions
//!
//! The character classes come from the Unicode Character Database of Python's
//! `unicodedata` ([`CHAR_CLASS_UNICODE_VERSION`], 14.0.0 for Python 3.11), generated
//! by `scripts/gen_char_classes.py`; letters assigned after that version count as
//! separators. NFKC comes from the `unicode-normalization` crate and lower-casing
//! from the Rust standard library, each with its own, newer Unicode version. The
//! look-alike table is generated from the `unicode-security` crate's UTS #39
//! skeleton by the ignored test `regenerate_confusables_table`.

mod classes;
mod confusables;
mod tokenize;

pub use classes::CHAR_CLASS_UNICODE_VERSION;
pub use tokenize::TokenBuffer;

/// Version of the normalization rules; recorded in the feature spec of every model.
/// Bump on any change that alters tokens.
pub const NORMALIZATION_VERSION: u32 = 1;

/// Longest token kept, in bytes of UTF-8; longer runs are cut at a character
/// boundary. Natural-language words are far shorter; longer runs are encoded data.
pub const MAX_TOKEN_BYTES: usize = 64;

/// What a character does in tokenization (see the module documentation).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum CharClass {
    /// Separates tokens: spaces, punctuation, symbols, controls, unassigned.
    Separator,
    /// Letter or number of a script written with spaces between words.
    Word,
    /// Combining mark: continues the token it follows.
    Mark,
    /// Letter or number of a script written without spaces (split into bigrams).
    Unspaced,
    /// Currency symbol: a one-character token.
    Currency,
    /// Invisible format or default-ignorable character: dropped.
    Removed,
}

/// Class of `c` according to the generated table (Unicode
/// [`CHAR_CLASS_UNICODE_VERSION`]).
#[inline]
pub fn char_class(c: char) -> CharClass {
    let cp = u32::from(c);
    if let Some(class) = LOW_CLASSES.get(cp as usize) {
        return *class;
    }
    lookup_ranges(cp)
}

/// Code points of the Basic Multilingual Plane, where nearly all text lives, are
/// looked up in a flat array (64 KiB) instead of by binary search.
const LOW_LIMIT: usize = 0x10000;

static LOW_CLASSES: [CharClass; LOW_LIMIT] = build_low_classes();

const fn build_low_classes() -> [CharClass; LOW_LIMIT] {
    let mut out = [CharClass::Separator; LOW_LIMIT];
    let ranges = &classes::CLASS_RANGES;
    let mut i = 0;
    while i < ranges.len() {
        let (lo, hi, class) = ranges[i];
        let mut cp = lo as usize;
        while cp <= hi as usize && cp < LOW_LIMIT {
            out[cp] = class;
            cp += 1;
        }
        i += 1;
    }
    out
}

fn lookup_ranges(cp: u32) -> CharClass {
    let ranges = &classes::CLASS_RANGES;
    // Index of the first range starting after `cp`; the candidate is the one before.
    let after = ranges.partition_point(|&(lo, _, _)| lo <= cp);
    match after.checked_sub(1).and_then(|i| ranges.get(i)) {
        Some(&(_, hi, class)) if cp <= hi => class,
        _ => CharClass::Separator,
    }
}

/// ASCII prototype (lower-case letters and digits) of a non-ASCII letter or digit
/// that looks like it, from the UTS #39 skeleton; `None` when it has none.
///
/// The keys are the characters that can occur in a token after NFKC, in either case.
pub fn confusable_prototype(c: char) -> Option<&'static str> {
    let table = &confusables::CONFUSABLES;
    table
        .binary_search_by_key(&c, |&(k, _)| k)
        .ok()
        .and_then(|i| table.get(i))
        .map(|&(_, proto)| proto)
}

/// The whole look-alike table, sorted by character; used to check it against its
/// source.
pub fn confusable_table() -> &'static [(char, &'static str)] {
    &confusables::CONFUSABLES
}

/// Normalizes and tokenizes `text` into owned strings: a convenience for tests and
/// the command line; the scoring path uses [`TokenBuffer`].
pub fn normalize_tokens(text: &str) -> Vec<String> {
    let mut buf = TokenBuffer::new();
    buf.push_text(text);
    buf.iter().map(str::to_owned).collect()
}
