//! The same text, however it is sent, must look the same to the filter.
//!
//! Fixtures in `tests/fixtures/invariance/` are written by
//! `scripts/gen_invariance_fixtures.py`, whose encodings come from Python's standard library
//! (base64, quopri, codecs) — an implementation independent of tamis. Within a group, every
//! message must give identical body tokens and identical word features. Structural signals
//! (html-only, for instance) may differ: they describe how the text was sent, on purpose.

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

use pretty_assertions::assert_eq;
use tamis::analyze::Analyzer;
use tamis::features::Namespace;

pub fn fixture_dir() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/fixtures/invariance")
}

/// Sorted `.eml` files of one group.
pub fn group_files(group: &str) -> Vec<PathBuf> {
    let mut files: Vec<PathBuf> = std::fs::read_dir(fixture_dir().join(group))
        .expect("fixture group exists")
        .map(|e| e.expect("dir entry").path())
        .filter(|p| p.extension().is_some_and(|e| e == "eml"))
        .collect();
    files.sort();
    files
}

struct Seen {
    body_tokens: Vec<String>,
    word_features: BTreeMap<u32, usize>,
}

fn see(analyzer: &mut Analyzer, path: &Path) -> Seen {
    let raw = std::fs::read(path).expect("read fixture");
    analyzer.vectorize(&raw).expect("fixture is mail");
    let body_tokens = analyzer.fields().body.iter().map(str::to_string).collect();
    let mut word_features = BTreeMap::new();
    analyzer.for_each_feature(|ns, _, index| {
        if matches!(ns, Namespace::Body | Namespace::Subject | Namespace::Hidden) {
            *word_features.entry(index).or_insert(0) += 1;
        }
    });
    Seen {
        body_tokens,
        word_features,
    }
}

fn assert_group_invariant(group: &str, min_files: usize) {
    let files = group_files(group);
    assert!(
        files.len() >= min_files,
        "group {group} has {} files",
        files.len()
    );
    let mut analyzer = Analyzer::default();
    let reference = see(&mut analyzer, &files[0]);
    assert!(
        reference.body_tokens.len() >= 5,
        "{group}: too few tokens to prove anything"
    );
    for path in &files[1..] {
        let seen = see(&mut analyzer, path);
        assert_eq!(
            reference.body_tokens,
            seen.body_tokens,
            "{group}: {} vs {}",
            files[0].display(),
            path.display()
        );
        assert_eq!(
            reference.word_features,
            seen.word_features,
            "{}",
            path.display()
        );
    }
}

#[test]
fn latin_text_is_the_same_in_every_encoding_and_legacy_charset() {
    // 8bit, QP, base64, html-only, multipart/alternative, ISO-8859-15, windows-1252.
    assert_group_invariant("latin", 7);
}

#[test]
fn cyrillic_text_is_the_same_in_utf8_koi8r_and_windows1251() {
    assert_group_invariant("cyrillic", 7);
}

#[test]
fn japanese_text_is_the_same_in_utf8_iso2022jp_and_shift_jis() {
    assert_group_invariant("japanese", 7);
}

#[test]
fn disguised_words_collapse_onto_the_plain_word() {
    // Look-alike letters (UTS #39 confusables), zero-width and soft-hyphen format
    // characters, fullwidth forms (NFKC, UAX #15) and spaced-out letters.
    assert_group_invariant("lookalike", 8);
    let mut analyzer = Analyzer::default();
    let plain = see(&mut analyzer, &fixture_dir().join("lookalike/plain.eml"));
    assert!(plain.body_tokens.iter().any(|t| t == "winner"));
}
