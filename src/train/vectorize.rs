//! Turning a planned corpus into feature vectors, in parallel, with bounded memory.
//!
//! Messages are read in batches by one thread (disk order, one batch in memory) and
//! featurized by all cores (rayon, one [`Analyzer`] per worker). Only the sparse vectors are
//! kept. A progress bar shows on a terminal and stays silent otherwise.

use indicatif::{ProgressBar, ProgressDrawTarget, ProgressStyle};
use rayon::prelude::*;

use super::corpus::{Plan, Problem, RawMessage};
use crate::Label;
use crate::analyze::Analyzer;
use crate::features::{FeatureSpec, SparseVector};

/// Messages read before a batch is featurized; bounds the raw bytes held at once.
const BATCH: usize = 256;

/// Labelled vectors of a corpus, index-aligned.
#[derive(Debug, Default, Clone)]
pub struct LabelledVectors {
    /// Feature vectors.
    pub rows: Vec<SparseVector>,
    /// Label of each row.
    pub labels: Vec<Label>,
    /// Recipient domain of each row, when known.
    pub domains: Vec<Option<String>>,
    /// Where each row came from.
    pub origins: Vec<String>,
    /// Files and messages that were skipped, with the reason.
    pub problems: Vec<Problem>,
}

impl LabelledVectors {
    /// Number of rows labelled `label`.
    pub fn count(&self, label: Label) -> usize {
        self.labels.iter().filter(|&&l| l == label).count()
    }
}

/// A progress bar on stderr when it is a terminal; hidden otherwise.
pub fn progress_bar(len: u64, what: &str) -> ProgressBar {
    let bar = ProgressBar::with_draw_target(Some(len), ProgressDrawTarget::stderr());
    let style = ProgressStyle::with_template(
        "{msg:>12} [{elapsed_precise}] {wide_bar} {pos}/{len} ({per_sec}, eta {eta})",
    )
    .unwrap_or_else(|_| ProgressStyle::default_bar());
    bar.set_style(style);
    bar.set_message(what.to_string());
    bar
}

/// Reads and featurizes every message of `plan` under `spec`.
pub fn vectorize_plan(
    plan: &Plan,
    spec: &FeatureSpec,
) -> Result<LabelledVectors, crate::features::SpecError> {
    spec.check_supported()?;
    let mut out = LabelledVectors {
        problems: plan.problems.clone(),
        ..LabelledVectors::default()
    };
    let bar = progress_bar(plan.files.len() as u64, "reading");
    let mut batch: Vec<RawMessage> = Vec::with_capacity(BATCH);
    let mut files_seen = std::collections::HashSet::new();
    let mut messages = plan.messages(spec.limits.max_raw_bytes);
    loop {
        batch.clear();
        for item in messages.by_ref() {
            match item {
                Ok(message) => {
                    let file = message.origin.split('#').next().unwrap_or("").to_string();
                    if files_seen.insert(file) {
                        bar.inc(1);
                    }
                    batch.push(message);
                }
                Err(problem) => out.problems.push(problem),
            }
            if batch.len() == BATCH {
                break;
            }
        }
        if batch.is_empty() {
            break;
        }
        let results: Vec<Result<SparseVector, String>> = batch
            .par_iter()
            .map_init(
                || Analyzer::new(spec.clone()),
                |analyzer, message| match analyzer {
                    Ok(analyzer) => analyzer
                        .vectorize(&message.bytes)
                        .cloned()
                        .map_err(|e| e.to_string()),
                    Err(e) => Err(e.to_string()),
                },
            )
            .collect();
        for (message, result) in batch.drain(..).zip(results) {
            match result {
                Ok(row) => {
                    out.rows.push(row);
                    out.labels.push(message.label);
                    out.domains.push(message.domain);
                    out.origins.push(message.origin);
                }
                Err(what) => out.problems.push(Problem {
                    path: message.origin.into(),
                    what,
                }),
            }
        }
    }
    bar.finish_and_clear();
    Ok(out)
}
