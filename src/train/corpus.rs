//! Corpus readers: labelled messages from Maildir folders, mbox files, directories of
//! message files and a labels file.
//!
//! Reading is planned first ([`plan`]: which files, which label, which domain), then
//! streamed ([`Plan::messages`]): one message in memory at a time per reader, each capped
//! at the extraction limit, so a corpus of any size costs bounded memory. The labels file is
//! streamed line by line, each line capped at [`MAX_LABELS_LINE_BYTES`], so a huge or endless
//! file (a device, a file with no newline) fails at its first long line instead of filling
//! memory. Paths that cannot be read are reported as [`Problem`]s with their path and
//! skipped; the caller counts them.

use std::collections::HashSet;
use std::fs::File;
use std::io::{BufRead, BufReader, Read};
use std::path::{Path, PathBuf};

use super::svmlight::{LineRead, read_bounded_line};
use crate::Label;

/// Longest accepted line of a labels file: a path of up to 4,096 bytes (Linux's `PATH_MAX`,
/// from memory), a label and a domain, with room to spare.
pub const MAX_LABELS_LINE_BYTES: usize = 8 * 1024;

/// A path that could not be used, and why.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Problem {
    /// The file or folder concerned.
    pub path: PathBuf,
    /// What went wrong, in words.
    pub what: String,
}

impl std::fmt::Display for Problem {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        write!(f, "{}: {}", self.path.display(), self.what)
    }
}

/// A malformed labels file: fatal, because guessing labels would poison a model.
#[derive(Debug, thiserror::Error, PartialEq, Eq)]
pub enum LabelsError {
    /// The labels file itself cannot be read.
    #[error("{path}: cannot read labels file: {reason}")]
    Unreadable {
        /// The labels file.
        path: PathBuf,
        /// The I/O error.
        reason: String,
    },
    /// A line longer than [`MAX_LABELS_LINE_BYTES`]: not a labels file, or a damaged one.
    #[error(
        "{path}:{line}: line longer than {limit} bytes; is this a labels file? (expected lines `path<TAB>spam|ham[<TAB>domain]`)"
    )]
    LineTooLong {
        /// The labels file.
        path: PathBuf,
        /// 1-based line number.
        line: usize,
        /// The limit in bytes.
        limit: usize,
    },
    /// A line does not have the form `path<TAB>spam|ham[<TAB>domain]`.
    #[error("{path}:{line}:{column}: {reason} (expected `path<TAB>spam|ham[<TAB>domain]`)")]
    Malformed {
        /// The labels file.
        path: PathBuf,
        /// 1-based line number.
        line: usize,
        /// 1-based column of the offending field.
        column: usize,
        /// What is wrong.
        reason: String,
    },
}

/// How a planned file holds its messages.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum FileKind {
    /// One message per file (`.eml`, Maildir entries).
    Single,
    /// Many messages in the RFC 4155 mbox format.
    Mbox,
}

/// One file to read, with the label and domain its messages get.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct PlannedFile {
    /// Where the file is.
    pub path: PathBuf,
    /// One message or an mbox.
    pub kind: FileKind,
    /// Label of every message in the file.
    pub label: Label,
    /// Recipient domain, when the labels file gives one.
    pub domain: Option<String>,
}

/// The files of a corpus and the problems found while listing them.
#[derive(Debug, Default)]
pub struct Plan {
    /// Files to read, in a stable order.
    pub files: Vec<PlannedFile>,
    /// Paths skipped while planning.
    pub problems: Vec<Problem>,
}

/// One message read from a corpus.
#[derive(Debug, Clone)]
pub struct RawMessage {
    /// Where it came from: the file path, plus `#N` (1-based) for mbox messages.
    pub origin: String,
    /// The message bytes, at most the cap given to [`Plan::messages`] (+1 so the cap can
    /// be detected).
    pub bytes: Vec<u8>,
    /// Its label.
    pub label: Label,
    /// Its recipient domain, if known.
    pub domain: Option<String>,
}

/// Lists the files behind `spam` and `ham` paths and the entries of an optional labels file.
pub fn plan(spam: &[PathBuf], ham: &[PathBuf], labels: Option<&Path>) -> Result<Plan, LabelsError> {
    let mut plan = Plan::default();
    for (paths, label) in [(spam, Label::Spam), (ham, Label::Ham)] {
        for path in paths {
            add_path(&mut plan, path, label, None);
        }
    }
    if let Some(labels) = labels {
        for entry in read_labels(labels)? {
            if entry.path.exists() {
                add_path(&mut plan, &entry.path, entry.label, entry.domain);
            } else {
                plan.problems.push(Problem {
                    path: entry.path,
                    what: format!("named in {} but missing", labels.display()),
                });
            }
        }
    }
    Ok(plan)
}

struct LabelEntry {
    path: PathBuf,
    label: Label,
    domain: Option<String>,
}

fn read_labels(path: &Path) -> Result<Vec<LabelEntry>, LabelsError> {
    let unreadable = |e: std::io::Error| LabelsError::Unreadable {
        path: path.to_path_buf(),
        reason: e.to_string(),
    };
    let base = path.parent().unwrap_or(Path::new("."));
    let mut reader = BufReader::new(File::open(path).map_err(unreadable)?);
    let mut entries = Vec::new();
    let mut buf = Vec::new();
    let mut n = 0;
    loop {
        n += 1;
        match read_bounded_line(&mut reader, &mut buf, MAX_LABELS_LINE_BYTES).map_err(unreadable)? {
            LineRead::Eof => break,
            LineRead::Line => {}
            LineRead::TooLong => {
                return Err(LabelsError::LineTooLong {
                    path: path.to_path_buf(),
                    line: n,
                    limit: MAX_LABELS_LINE_BYTES,
                });
            }
        }
        let malformed = |column: usize, reason: String| LabelsError::Malformed {
            path: path.to_path_buf(),
            line: n,
            column,
            reason,
        };
        let Ok(line) = std::str::from_utf8(&buf) else {
            return Err(malformed(1, "the line is not UTF-8".into()));
        };
        let trimmed = line.trim_end_matches('\r');
        if trimmed.trim().is_empty() || trimmed.starts_with('#') {
            continue;
        }
        let fields: Vec<&str> = trimmed.split('\t').collect();
        let (file, label) = match fields.as_slice() {
            [file, label, ..] if fields.len() <= 3 => (*file, *label),
            _ => {
                return Err(malformed(
                    1,
                    format!("{} tab-separated fields", fields.len()),
                ));
            }
        };
        if file.is_empty() {
            return Err(malformed(1, "empty path".into()));
        }
        let label_column = file.chars().count() + 2;
        let label = match label.trim() {
            "spam" => Label::Spam,
            "ham" => Label::Ham,
            other => return Err(malformed(label_column, format!("unknown label `{other}`"))),
        };
        let domain = fields
            .get(2)
            .map(|d| d.trim().trim_end_matches('.').to_ascii_lowercase())
            .filter(|d| !d.is_empty());
        let file = Path::new(file);
        let full = if file.is_absolute() {
            file.to_path_buf()
        } else {
            base.join(file)
        };
        entries.push(LabelEntry {
            path: full,
            label,
            domain,
        });
    }
    Ok(entries)
}

fn add_path(plan: &mut Plan, path: &Path, label: Label, domain: Option<String>) {
    let mut visited = HashSet::new();
    add_path_inner(plan, path, label, &domain, &mut visited);
}

fn add_path_inner(
    plan: &mut Plan,
    path: &Path,
    label: Label,
    domain: &Option<String>,
    visited: &mut HashSet<PathBuf>,
) {
    // `metadata` follows symbolic links, as the labels format promises.
    let meta = match std::fs::metadata(path) {
        Ok(meta) => meta,
        Err(e) => {
            plan.problems.push(Problem {
                path: path.to_path_buf(),
                what: format!("cannot read: {e}"),
            });
            return;
        }
    };
    if meta.is_file() {
        let kind = if starts_like_mbox(path) {
            FileKind::Mbox
        } else {
            FileKind::Single
        };
        plan.files.push(PlannedFile {
            path: path.to_path_buf(),
            kind,
            label,
            domain: domain.clone(),
        });
        return;
    }
    if !meta.is_dir() {
        plan.problems.push(Problem {
            path: path.to_path_buf(),
            what: "neither a file nor a folder".into(),
        });
        return;
    }
    // A symlink cycle would otherwise recurse forever.
    let canonical = std::fs::canonicalize(path).unwrap_or_else(|_| path.to_path_buf());
    if !visited.insert(canonical) {
        return;
    }
    // Maildir (common practice): messages live in cur/ and new/; tmp/ holds deliveries in
    // progress and is never read.
    let is_maildir = ["cur", "new", "tmp"].iter().all(|d| path.join(d).is_dir());
    let children: Vec<PathBuf> = if is_maildir {
        vec![path.join("cur"), path.join("new")]
    } else {
        match std::fs::read_dir(path) {
            Ok(entries) => {
                let mut children: Vec<PathBuf> = entries
                    .filter_map(|e| match e {
                        Ok(e) => Some(e.path()),
                        Err(err) => {
                            plan.problems.push(Problem {
                                path: path.to_path_buf(),
                                what: format!("cannot list: {err}"),
                            });
                            None
                        }
                    })
                    .filter(|p| !is_hidden(p))
                    .collect();
                children.sort();
                children
            }
            Err(e) => {
                plan.problems.push(Problem {
                    path: path.to_path_buf(),
                    what: format!("cannot list: {e}"),
                });
                return;
            }
        }
    };
    for child in children {
        add_path_inner(plan, &child, label, domain, visited);
    }
}

fn is_hidden(path: &Path) -> bool {
    path.file_name()
        .and_then(|n| n.to_str())
        .is_some_and(|n| n.starts_with('.'))
}

fn starts_like_mbox(path: &Path) -> bool {
    let mut head = [0u8; 5];
    File::open(path)
        .and_then(|mut f| f.read_exact(&mut head))
        .is_ok()
        && &head == b"From "
}

impl Plan {
    /// Streams every message of the plan in order; each is read whole but at most
    /// `max_bytes + 1` bytes are kept. Unreadable files yield a [`Problem`].
    pub fn messages(
        &self,
        max_bytes: usize,
    ) -> impl Iterator<Item = Result<RawMessage, Problem>> + '_ {
        self.files.iter().flat_map(
            move |file| -> Box<dyn Iterator<Item = Result<RawMessage, Problem>>> {
                match file.kind {
                    FileKind::Single => Box::new(std::iter::once(read_single(file, max_bytes))),
                    FileKind::Mbox => match File::open(&file.path) {
                        Ok(f) => Box::new(
                            MboxReader::new(BufReader::new(f), max_bytes)
                                .enumerate()
                                .map(move |(i, message)| match message {
                                    Ok(bytes) => Ok(RawMessage {
                                        origin: format!("{}#{}", file.path.display(), i + 1),
                                        bytes,
                                        label: file.label,
                                        domain: file.domain.clone(),
                                    }),
                                    Err(e) => Err(Problem {
                                        path: file.path.clone(),
                                        what: format!("read error in message {}: {e}", i + 1),
                                    }),
                                }),
                        ),
                        Err(e) => Box::new(std::iter::once(Err(Problem {
                            path: file.path.clone(),
                            what: format!("cannot read: {e}"),
                        }))),
                    },
                }
            },
        )
    }
}

fn read_single(file: &PlannedFile, max_bytes: usize) -> Result<RawMessage, Problem> {
    let mut bytes = Vec::new();
    File::open(&file.path)
        .and_then(|f| f.take(max_bytes as u64 + 1).read_to_end(&mut bytes))
        .map_err(|e| Problem {
            path: file.path.clone(),
            what: format!("cannot read: {e}"),
        })?;
    Ok(RawMessage {
        origin: file.path.display().to_string(),
        bytes,
        label: file.label,
        domain: file.domain.clone(),
    })
}

/// Splits an mbox stream into messages (RFC 4155): a message starts at a line beginning
/// with `From ` at the start of the file or after an empty line. Lines of the form
/// `>From `, `>>From `... lose one `>` (the mboxrd rule; for mboxo files, which quote only
/// `From `, it gives the same result on every line mboxo produces).
pub struct MboxReader<R> {
    reader: R,
    max_bytes: usize,
    line: Vec<u8>,
    pending_separator: bool,
    done: bool,
}

impl<R: BufRead> MboxReader<R> {
    /// A reader over `reader` keeping at most `max_bytes + 1` bytes of each message.
    pub fn new(reader: R, max_bytes: usize) -> Self {
        MboxReader {
            reader,
            max_bytes,
            line: Vec::new(),
            pending_separator: false,
            done: false,
        }
    }
}

impl<R: BufRead> Iterator for MboxReader<R> {
    type Item = std::io::Result<Vec<u8>>;

    fn next(&mut self) -> Option<Self::Item> {
        if self.done {
            return None;
        }
        let mut message = Vec::new();
        let mut started = self.pending_separator;
        let mut previous_blank = true;
        loop {
            self.line.clear();
            match self.reader.read_until(b'\n', &mut self.line) {
                Ok(0) => {
                    self.done = true;
                    return started.then(|| Ok(strip_final_blank(message)));
                }
                Ok(_) => {}
                Err(e) => {
                    self.done = true;
                    return Some(Err(e));
                }
            }
            let is_separator = previous_blank && self.line.starts_with(b"From ");
            if is_separator {
                if started {
                    self.pending_separator = true;
                    return Some(Ok(strip_final_blank(message)));
                }
                started = true;
                previous_blank = false;
                continue;
            }
            if !started {
                // Text before the first separator is not a message (RFC 4155 §2).
                previous_blank = is_blank(&self.line);
                continue;
            }
            previous_blank = is_blank(&self.line);
            if message.len() <= self.max_bytes {
                let unquoted = unquote_from(&self.line);
                let room = self.max_bytes + 1 - message.len();
                message.extend_from_slice(&unquoted[..unquoted.len().min(room)]);
            }
        }
    }
}

fn is_blank(line: &[u8]) -> bool {
    line == b"\n" || line == b"\r\n"
}

fn unquote_from(line: &[u8]) -> &[u8] {
    let quotes = line.iter().take_while(|&&b| b == b'>').count();
    if quotes > 0 && line[quotes..].starts_with(b"From ") {
        &line[1..]
    } else {
        line
    }
}

/// The blank line before the next separator belongs to the mbox, not the message.
fn strip_final_blank(mut message: Vec<u8>) -> Vec<u8> {
    if message.ends_with(b"\r\n\r\n") {
        message.truncate(message.len() - 2);
    } else if message.ends_with(b"\n\n") {
        message.truncate(message.len() - 1);
    }
    message
}

#[cfg(test)]
mod tests {
    use super::*;

    fn split(mbox: &str) -> Vec<String> {
        MboxReader::new(mbox.as_bytes(), 1 << 20)
            .map(|m| String::from_utf8(m.expect("in-memory read")).expect("utf-8"))
            .collect()
    }

    #[test]
    fn mbox_messages_and_from_quoting() {
        // RFC 4155 §2: separator lines, and the quoting of body lines that begin "From ".
        let mbox = "From a@example.org Mon Jan  1 00:00:00 2026\nSubject: one\n\n>From here\n>>From there\n\nFrom b@example.org Mon Jan  1 00:00:01 2026\nSubject: two\n\nbody\n";
        assert_eq!(
            split(mbox),
            vec![
                "Subject: one\n\nFrom here\n>From there\n",
                "Subject: two\n\nbody\n"
            ]
        );
    }

    #[test]
    fn from_inside_a_paragraph_is_not_a_separator() {
        let mbox = "From a@example.org x\nSubject: one\n\ntext\nFrom the start\n";
        assert_eq!(split(mbox).len(), 1);
    }

    #[test]
    fn labels_lines_are_capped_and_named_by_number() {
        let dir = tempfile::tempdir().expect("temp dir");
        let labels = dir.path().join("labels.tsv");
        let long = "x".repeat(MAX_LABELS_LINE_BYTES + 1);
        std::fs::write(&labels, format!("# corpus\n\n{long}\tspam\n")).expect("write");
        match plan(&[], &[], Some(&labels)) {
            Err(LabelsError::LineTooLong { line: 3, limit, .. }) => {
                assert_eq!(limit, MAX_LABELS_LINE_BYTES)
            }
            other => panic!("{other:?}"),
        }
        std::fs::write(&labels, b"a.eml\tspam\n\xff.eml\tham\n").expect("write");
        match plan(&[], &[], Some(&labels)) {
            Err(LabelsError::Malformed {
                line: 2, reason, ..
            }) => {
                assert!(reason.contains("UTF-8"), "{reason}")
            }
            other => panic!("{other:?}"),
        }
    }

    #[test]
    fn messages_are_capped() {
        let mut mbox = String::from("From a x\nSubject: big\n\n");
        mbox.push_str(&"y".repeat(10_000));
        let messages: Vec<_> = MboxReader::new(mbox.as_bytes(), 100).collect();
        assert_eq!(messages.len(), 1);
        assert_eq!(messages[0].as_ref().map(Vec::len).ok(), Some(101));
    }
}
