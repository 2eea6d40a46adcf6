//! Shared command-line pieces: the corpus arguments, loading with problem reports, and
//! the bad-input error that maps to exit code 2.

use std::path::{Path, PathBuf};

use crate::Label;
use crate::features::FeatureSpec;
use crate::fsio::{FsioError, Problem};
use crate::train::corpus::plan;
use crate::train::vectorize::{LabelledVectors, vectorize_plan};

/// A user error in the input (paths, files, labels): reported and mapped to exit code 2.
#[derive(Debug, thiserror::Error)]
#[error("{0}")]
pub struct BadInput(pub String);

/// Checks an output path given on the command line before any long work: a link, folder,
/// FIFO or device at it, or a missing folder, is bad input reported at once.
pub fn check_output(path: &Path) -> Result<(), BadInput> {
    crate::fsio::check_target(path).map_err(|e| BadInput(e.to_string()))
}

/// Maps a failed write: a refused target is bad input (exit 2), anything else — a full
/// disk, a permission — an operational failure (exit 1).
pub fn write_failed(e: FsioError) -> anyhow::Error {
    match e.problem {
        Problem::NotRegular { .. } => BadInput(e.to_string()).into(),
        _ => e.into(),
    }
}

/// Maps a failed chart the way [`write_failed`] maps a failed write.
pub fn plot_failed(e: crate::train::plots::PlotError) -> anyhow::Error {
    match e {
        crate::train::plots::PlotError::Write(e) => write_failed(e),
        other => other.into(),
    }
}

/// Where labelled mail comes from.
#[derive(clap::Args, Debug, Clone)]
pub struct CorpusInput {
    /// Junk mail: Maildir folders, mbox files, folders of message files, or single files.
    #[arg(long, value_name = "PATH", num_args = 1..)]
    pub spam: Vec<PathBuf>,
    /// Legitimate mail, in the same forms as --spam.
    #[arg(long, value_name = "PATH", num_args = 1..)]
    pub ham: Vec<PathBuf>,
    /// A labels file: one line per path, `path<TAB>spam|ham[<TAB>recipient domain]`; paths
    /// are relative to the labels file. Domains enable per-domain figures.
    #[arg(long, value_name = "FILE")]
    pub labels: Option<PathBuf>,
}

/// At most this many skipped paths are listed one by one.
const PROBLEMS_SHOWN: usize = 20;

impl CorpusInput {
    /// True when no source was given at all.
    pub fn is_empty(&self) -> bool {
        self.spam.is_empty() && self.ham.is_empty() && self.labels.is_none()
    }

    /// Reads and featurizes the corpus; reports skipped paths on stderr. With
    /// `need_both`, a corpus missing a class is bad input.
    pub fn load(&self, spec: &FeatureSpec, need_both: bool) -> anyhow::Result<LabelledVectors> {
        if self.is_empty() {
            return Err(BadInput(
                "no mail given: use --spam PATH... --ham PATH... and/or --labels FILE".into(),
            )
            .into());
        }
        let plan = plan(&self.spam, &self.ham, self.labels.as_deref())
            .map_err(|e| BadInput(e.to_string()))?;
        let data = vectorize_plan(&plan, spec)?;
        report_problems(&data);
        let (n_spam, n_ham) = (data.count(Label::Spam), data.count(Label::Ham));
        if need_both && (n_spam == 0 || n_ham == 0) {
            let missing = if n_spam == 0 {
                "junk (--spam, or `spam` lines in --labels)"
            } else {
                "legitimate (--ham, or `ham` lines in --labels)"
            };
            return Err(BadInput(format!(
                "no {missing} messages could be read ({n_spam} junk, {n_ham} legitimate, {} skipped); both classes are needed",
                data.problems.len()
            ))
            .into());
        }
        if data.rows.is_empty() {
            return Err(BadInput(format!(
                "no message could be read ({} skipped)",
                data.problems.len()
            ))
            .into());
        }
        Ok(data)
    }
}

fn report_problems(data: &LabelledVectors) {
    for problem in data.problems.iter().take(PROBLEMS_SHOWN) {
        eprintln!("tamis: skipped {problem}");
    }
    if data.problems.len() > PROBLEMS_SHOWN {
        eprintln!(
            "tamis: ... and {} more skipped",
            data.problems.len() - PROBLEMS_SHOWN
        );
    }
    if !data.problems.is_empty() {
        eprintln!(
            "tamis: {} path(s) or message(s) skipped, {} message(s) read",
            data.problems.len(),
            data.rows.len()
        );
    }
}

/// Output formats shared by the commands.
#[derive(clap::ValueEnum, Clone, Copy, Debug, PartialEq, Eq)]
pub enum Format {
    /// Readable text.
    Text,
    /// JSON for scripts.
    Json,
}

/// Peak resident memory of this process in bytes, when the platform reports it.
pub fn peak_memory_bytes() -> Option<u64> {
    let status = std::fs::read_to_string("/proc/self/status").ok()?;
    let line = status.lines().find(|l| l.starts_with("VmHWM:"))?;
    let kib: u64 = line.split_whitespace().nth(1)?.parse().ok()?;
    Some(kib * 1024)
}
