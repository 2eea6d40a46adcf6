//! The svmlight / libsvm text format: one row per line, `label index:value index:value ...`.
//!
//! Labels: `+1` and `1` mean spam (the positive class), `-1` and `0` mean ham; these four
//! spellings are the only ones accepted, so a multi-class or regression file is refused rather
//! than silently thresholded. Feature indices are 1-based in the file, as both the svmlight and
//! libsvm conventions have it, and 0-based in the returned [`Dataset`]; index 0 is refused. Within
//! a line indices must be strictly increasing. Values are read as `f32` (the precision of
//! [`SparseVector`]) and must be finite. `#` starts a comment that runs to the end of the line;
//! blank and comment-only lines are skipped. `qid:` tokens are refused: they group rows for
//! ranking, which a binary filter has no use for, and ignoring them would hide a wrong input.
//!
//! Memory per line is bounded: a line longer than the configured limit is an error before it is
//! buffered whole. [`write_svmlight`] writes nothing the parser would change, so
//! write → parse → write is byte-exact. The dimensions are not stored in the file: a parsed
//! dataset's dimensions are one past its largest index.

use std::io::{self, BufRead, Write};

use super::dataset::Dataset;
use crate::features::SparseVector;

/// Default bound on one line's length, in bytes: room for a few hundred thousand features.
pub const DEFAULT_MAX_LINE_BYTES: usize = 8 << 20;

/// Longest excerpt of a bad token kept in an error, so a hostile line cannot make the error
/// message itself unbounded.
const MAX_TOKEN_IN_ERROR: usize = 64;

/// What is wrong with a token; see [`SvmlightError::Syntax`].
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
pub enum SyntaxErrorKind {
    /// The label is not one of `+1`, `1`, `-1`, `0`.
    #[error("label must be +1 or 1 (spam), -1 or 0 (ham)")]
    BadLabel,
    /// A feature token without the `index:value` shape.
    #[error("expected index:value")]
    NotIndexValue,
    /// A `qid:` token.
    #[error("qid (ranking groups) is not supported")]
    Qid,
    /// The index is not a decimal integer.
    #[error("feature index is not a decimal integer")]
    BadIndex,
    /// Index 0: the format's indices start at 1.
    #[error("feature index 0 (indices start at 1)")]
    ZeroIndex,
    /// An index above `u32::MAX`.
    #[error("feature index above {}", u32::MAX)]
    IndexTooLarge,
    /// An index not above the previous one on the same line.
    #[error("feature index not above the previous index {previous}")]
    IndexNotIncreasing {
        /// The previous index on the line, 1-based as in the file.
        previous: u64,
    },
    /// The value is not a number.
    #[error("feature value is not a number")]
    BadValue,
    /// The value is infinite or NaN, or overflows `f32`.
    #[error("feature value is not a finite f32")]
    NonFiniteValue,
}

/// An error reading an svmlight file, with the place it happened.
#[derive(Debug, thiserror::Error)]
pub enum SvmlightError {
    /// The reader failed.
    #[error("{source_name}:{line}: read error: {error}")]
    Io {
        /// Name of the input, as given by the caller.
        source_name: String,
        /// 1-based line being read.
        line: usize,
        /// The underlying error.
        #[source]
        error: io::Error,
    },
    /// A line longer than the limit.
    #[error("{source_name}:{line}: line longer than {limit} bytes")]
    LineTooLong {
        /// Name of the input.
        source_name: String,
        /// 1-based line number.
        line: usize,
        /// The limit in bytes.
        limit: usize,
    },
    /// A malformed token.
    #[error("{source_name}:{line}:{column}: {kind}: `{token}`")]
    Syntax {
        /// Name of the input.
        source_name: String,
        /// 1-based line number.
        line: usize,
        /// 1-based byte column where the bad part starts.
        column: usize,
        /// The bad token (shortened when very long).
        token: String,
        /// What is wrong.
        kind: SyntaxErrorKind,
    },
}

/// Reads a whole svmlight file with [`DEFAULT_MAX_LINE_BYTES`] as the line limit.
/// `source_name` only labels errors.
pub fn parse_svmlight(reader: impl BufRead, source_name: &str) -> Result<Dataset, SvmlightError> {
    parse_svmlight_with_limit(reader, source_name, DEFAULT_MAX_LINE_BYTES)
}

/// Reads a whole svmlight file, refusing any line longer than `max_line_bytes`.
pub fn parse_svmlight_with_limit(
    mut reader: impl BufRead,
    source_name: &str,
    max_line_bytes: usize,
) -> Result<Dataset, SvmlightError> {
    let mut rows = Vec::new();
    let mut labels = Vec::new();
    let mut dimensions = 0usize;
    let mut buf = Vec::new();
    let mut pairs = Vec::new();
    let mut line_no = 0usize;
    loop {
        line_no += 1;
        match read_bounded_line(&mut reader, &mut buf, max_line_bytes) {
            Ok(LineRead::Eof) => break,
            Ok(LineRead::Line) => {}
            Ok(LineRead::TooLong) => {
                return Err(SvmlightError::LineTooLong {
                    source_name: source_name.to_owned(),
                    line: line_no,
                    limit: max_line_bytes,
                });
            }
            Err(error) => {
                return Err(SvmlightError::Io {
                    source_name: source_name.to_owned(),
                    line: line_no,
                    error,
                });
            }
        }
        let syntax = |column: usize, token: &[u8], kind: SyntaxErrorKind| SvmlightError::Syntax {
            source_name: source_name.to_owned(),
            line: line_no,
            column,
            token: shorten(token),
            kind,
        };
        let content = match memchr::memchr(b'#', &buf) {
            Some(hash) => &buf[..hash],
            None => &buf[..],
        };
        let mut tokens = Tokens::new(content);
        let Some((label_col, label_tok)) = tokens.next() else {
            continue;
        };
        let label = match label_tok {
            b"+1" | b"1" => 1i8,
            b"-1" | b"0" => -1i8,
            _ => return Err(syntax(label_col, label_tok, SyntaxErrorKind::BadLabel)),
        };
        pairs.clear();
        let mut previous = 0u64;
        for (col, tok) in tokens {
            let Some(colon) = memchr::memchr(b':', tok) else {
                return Err(syntax(col, tok, SyntaxErrorKind::NotIndexValue));
            };
            let (key, value) = (&tok[..colon], &tok[colon + 1..]);
            if key == b"qid" {
                return Err(syntax(col, tok, SyntaxErrorKind::Qid));
            }
            let index = parse_index(key).map_err(|kind| syntax(col, tok, kind))?;
            if index <= previous {
                let kind = SyntaxErrorKind::IndexNotIncreasing { previous };
                return Err(syntax(col, tok, kind));
            }
            previous = index;
            let value_col = col + colon + 1;
            let value = parse_value(value).map_err(|kind| syntax(value_col, tok, kind))?;
            // `parse_index` bounds the index to 1..=u32::MAX, so the 0-based one fits u32.
            let zero_based = (index - 1) as u32;
            pairs.push((zero_based, value));
        }
        if let Some(&(last, _)) = pairs.last() {
            dimensions = dimensions.max(last as usize + 1);
        }
        // Pairs are strictly increasing, so the sort inside is a no-op check.
        rows.push(SparseVector::from_pairs(std::mem::take(&mut pairs)));
        labels.push(label);
    }
    // Every label is ±1 and every index below `dimensions` by construction.
    Ok(Dataset::from_checked_parts(rows, labels, dimensions))
}

/// Writes `ds` in svmlight format: `+1`/`-1` labels, 1-based indices, and each value in the
/// shortest decimal form that reads back to the same `f32`.
pub fn write_svmlight(ds: &Dataset, mut out: impl Write) -> io::Result<()> {
    use std::fmt::Write as _;
    let mut line = String::new();
    for (row, &label) in ds.rows().iter().zip(ds.labels()) {
        line.clear();
        line.push_str(if label > 0 { "+1" } else { "-1" });
        for (index, value) in row.iter() {
            // Writing into a String cannot fail.
            let _ = write!(line, " {}:{}", u64::from(index) + 1, value);
        }
        line.push('\n');
        out.write_all(line.as_bytes())?;
    }
    out.flush()
}

/// What [`read_bounded_line`] found.
pub(crate) enum LineRead {
    /// A line, now in the buffer.
    Line,
    /// The end of the input.
    Eof,
    /// A line longer than the limit; the buffer holds part of it.
    TooLong,
}

/// Reads one line (without its `\n`) into `buf`, never holding more than `limit` bytes.
/// Shared by the readers of line-oriented inputs (svmlight files, labels files).
pub(crate) fn read_bounded_line(
    reader: &mut impl BufRead,
    buf: &mut Vec<u8>,
    limit: usize,
) -> io::Result<LineRead> {
    buf.clear();
    let mut saw_any = false;
    loop {
        let available = match reader.fill_buf() {
            Ok(b) => b,
            Err(e) if e.kind() == io::ErrorKind::Interrupted => continue,
            Err(e) => return Err(e),
        };
        if available.is_empty() {
            return Ok(if saw_any {
                LineRead::Line
            } else {
                LineRead::Eof
            });
        }
        saw_any = true;
        let (chunk, used, done) = match memchr::memchr(b'\n', available) {
            Some(nl) => (&available[..nl], nl + 1, true),
            None => (available, available.len(), false),
        };
        if buf.len() + chunk.len() > limit {
            return Ok(LineRead::TooLong);
        }
        buf.extend_from_slice(chunk);
        reader.consume(used);
        if done {
            return Ok(LineRead::Line);
        }
    }
}

/// Whitespace-separated tokens with their 1-based byte columns.
struct Tokens<'a> {
    bytes: &'a [u8],
    pos: usize,
}

impl<'a> Tokens<'a> {
    fn new(bytes: &'a [u8]) -> Self {
        Tokens { bytes, pos: 0 }
    }
}

impl<'a> Iterator for Tokens<'a> {
    type Item = (usize, &'a [u8]);

    fn next(&mut self) -> Option<Self::Item> {
        let rest = self.bytes.get(self.pos..)?;
        let start = self.pos + rest.iter().position(|b| !b.is_ascii_whitespace())?;
        let tail = &self.bytes[start..];
        let len = tail
            .iter()
            .position(|b| b.is_ascii_whitespace())
            .unwrap_or(tail.len());
        self.pos = start + len;
        Some((start + 1, &tail[..len]))
    }
}

fn parse_index(key: &[u8]) -> Result<u64, SyntaxErrorKind> {
    if key.is_empty() || !key.iter().all(u8::is_ascii_digit) {
        return Err(SyntaxErrorKind::BadIndex);
    }
    let mut index = 0u64;
    for &d in key {
        index = index
            .checked_mul(10)
            .and_then(|i| i.checked_add(u64::from(d - b'0')))
            .ok_or(SyntaxErrorKind::IndexTooLarge)?;
    }
    match index {
        0 => Err(SyntaxErrorKind::ZeroIndex),
        i if i > u64::from(u32::MAX) => Err(SyntaxErrorKind::IndexTooLarge),
        i => Ok(i),
    }
}

fn parse_value(text: &[u8]) -> Result<f32, SyntaxErrorKind> {
    let text = std::str::from_utf8(text).map_err(|_| SyntaxErrorKind::BadValue)?;
    // Rust's float grammar also takes "inf" and "nan"; those are refused just below.
    let value: f32 = text.parse().map_err(|_| SyntaxErrorKind::BadValue)?;
    if value.is_finite() {
        Ok(value)
    } else {
        Err(SyntaxErrorKind::NonFiniteValue)
    }
}

fn shorten(token: &[u8]) -> String {
    let cut = &token[..token.len().min(MAX_TOKEN_IN_ERROR)];
    let mut s = String::from_utf8_lossy(cut).into_owned();
    if cut.len() < token.len() {
        s.push('…');
    }
    s
}

#[cfg(test)]
mod tests {
    use super::*;

    fn parse(text: &str) -> Result<Dataset, SvmlightError> {
        parse_svmlight(text.as_bytes(), "t.svm")
    }

    fn syntax_error(text: &str) -> (usize, usize, String, SyntaxErrorKind) {
        match parse(text) {
            Err(SvmlightError::Syntax {
                line,
                column,
                token,
                kind,
                ..
            }) => (line, column, token, kind),
            other => panic!("expected a syntax error, got {other:?}"),
        }
    }

    #[test]
    fn maps_labels_and_shifts_indices_to_zero_based() {
        let ds = parse("+1 1:0.5 3:2\n1 2:1\n-1 7:1e-3 # trailing\n0\n").unwrap();
        assert_eq!(ds.labels(), &[1, 1, -1, -1]);
        assert_eq!(ds.rows()[0].indices(), &[0, 2]);
        assert_eq!(ds.rows()[0].values(), &[0.5, 2.0]);
        assert_eq!(ds.rows()[2].iter().collect::<Vec<_>>(), vec![(6, 1e-3)]);
        assert!(ds.rows()[3].is_empty());
        assert_eq!(ds.dimensions(), 7);
    }

    #[test]
    fn skips_blank_and_comment_lines_and_accepts_crlf_and_tabs() {
        let ds = parse("# header\n\n   \n+1\t1:1\r\n-1 2:1").unwrap();
        assert_eq!(ds.len(), 2);
        assert_eq!(ds.rows()[1].indices(), &[1]);
    }

    #[test]
    fn errors_carry_line_column_and_token() {
        assert_eq!(
            syntax_error("+1 1:1\n2 1:1\n"),
            (2, 1, "2".into(), SyntaxErrorKind::BadLabel)
        );
        assert_eq!(
            syntax_error("-1 0:1\n"),
            (1, 4, "0:1".into(), SyntaxErrorKind::ZeroIndex)
        );
        assert_eq!(
            syntax_error("-1 3:1 3:2\n"),
            (
                1,
                8,
                "3:2".into(),
                SyntaxErrorKind::IndexNotIncreasing { previous: 3 }
            )
        );
        assert_eq!(
            syntax_error("-1 3:1 2:2\n").3,
            SyntaxErrorKind::IndexNotIncreasing { previous: 3 }
        );
        assert_eq!(
            syntax_error("+1  12:x\n"),
            (1, 8, "12:x".into(), SyntaxErrorKind::BadValue)
        );
        assert_eq!(syntax_error("+1 1:inf").3, SyntaxErrorKind::NonFiniteValue);
        assert_eq!(syntax_error("+1 1:1e40").3, SyntaxErrorKind::NonFiniteValue);
        assert_eq!(syntax_error("+1 qid:3 1:1").3, SyntaxErrorKind::Qid);
        assert_eq!(syntax_error("+1 7").3, SyntaxErrorKind::NotIndexValue);
        assert_eq!(syntax_error("+1 -2:1").3, SyntaxErrorKind::BadIndex);
        assert_eq!(
            syntax_error("+1 4294967296:1").3,
            SyntaxErrorKind::IndexTooLarge
        );
        assert_eq!(
            syntax_error("+1 99999999999999999999999:1").3,
            SyntaxErrorKind::IndexTooLarge
        );
        assert_eq!(syntax_error("+1 1:\u{e9}").3, SyntaxErrorKind::BadValue);
        let message = parse("+1 1:1\n-1 0:1\n").unwrap_err().to_string();
        assert_eq!(
            message,
            "t.svm:2:4: feature index 0 (indices start at 1): `0:1`"
        );
    }

    #[test]
    fn largest_index_is_accepted() {
        let ds = parse("+1 4294967295:1").unwrap();
        assert_eq!(ds.rows()[0].indices(), &[u32::MAX - 1]);
        assert_eq!(ds.dimensions(), u32::MAX as usize);
    }

    #[test]
    fn long_lines_are_refused_before_buffering() {
        let features: String = (1..=100).map(|i| format!("{i}:1 ")).collect();
        let text = format!("+1 1:1\n-1 {features}\n");
        let err = parse_svmlight_with_limit(text.as_bytes(), "big", 64).unwrap_err();
        assert!(matches!(
            err,
            SvmlightError::LineTooLong {
                line: 2,
                limit: 64,
                ..
            }
        ));
        assert!(parse_svmlight_with_limit(text.as_bytes(), "big", 1024).is_ok());
    }

    #[test]
    fn long_tokens_are_shortened_in_errors() {
        let text = format!("+1 1:{}", "x".repeat(1000));
        let (_, _, token, _) = syntax_error(&text);
        assert!(token.chars().count() <= MAX_TOKEN_IN_ERROR + 1);
    }

    #[test]
    fn write_then_parse_then_write_is_byte_exact() {
        let rows = vec![
            SparseVector::from_pairs(vec![(0, 0.1), (4, -3.25), (9, 1e-30), (10, 0.0)]),
            SparseVector::new(),
            SparseVector::from_pairs(vec![(u32::MAX - 1, f32::MAX), (7, f32::MIN_POSITIVE)]),
        ];
        let ds = Dataset::new(rows, vec![1, -1, -1], u32::MAX as usize).unwrap();
        let mut first = Vec::new();
        write_svmlight(&ds, &mut first).unwrap();
        let back = parse_svmlight(&first[..], "mem").unwrap();
        assert_eq!(back, ds);
        let mut second = Vec::new();
        write_svmlight(&back, &mut second).unwrap();
        assert_eq!(first, second);
        assert!(first.starts_with(b"+1 1:0.1 5:-3.25 "));
    }

    #[test]
    fn io_errors_name_the_line() {
        struct Failing(usize);
        impl io::Read for Failing {
            fn read(&mut self, buf: &mut [u8]) -> io::Result<usize> {
                if self.0 == 0 {
                    return Err(io::Error::other("disk gone"));
                }
                self.0 = 0;
                buf[..7].copy_from_slice(b"+1 1:1\n");
                Ok(7)
            }
        }
        let err = parse_svmlight(io::BufReader::new(Failing(1)), "f").unwrap_err();
        assert!(matches!(err, SvmlightError::Io { line: 2, .. }), "{err}");
    }

    proptest::proptest! {
        #[test]
        fn arbitrary_bytes_never_panic(
            bytes in proptest::collection::vec(proptest::prelude::any::<u8>(), 0..200),
        ) {
            let _ = parse_svmlight(&bytes[..], "fuzz");
        }

        #[test]
        fn arbitrary_datasets_round_trip(
            rows in proptest::collection::vec(
                proptest::collection::btree_map(0u32..1000, -1e6f32..1e6, 0..20),
                0..20,
            ),
            seed in 0u64..1000,
        ) {
            let labels: Vec<i8> = (0..rows.len() as u64)
                .map(|i| if (i + seed).is_multiple_of(3) { 1 } else { -1 })
                .collect();
            let rows: Vec<SparseVector> = rows
                .into_iter()
                .map(|m| SparseVector::from_pairs(m.into_iter().collect()))
                .collect();
            let dims = rows
                .iter()
                .filter_map(|r| r.indices().last())
                .map(|&i| i as usize + 1)
                .max()
                .unwrap_or(0);
            let ds = Dataset::new(rows, labels, dims).unwrap();
            let mut first = Vec::new();
            write_svmlight(&ds, &mut first).unwrap();
            let back = parse_svmlight(&first[..], "mem").unwrap();
            proptest::prop_assert_eq!(&back, &ds);
            let mut second = Vec::new();
            write_svmlight(&back, &mut second).unwrap();
            proptest::prop_assert_eq!(first, second);
        }
    }
}
