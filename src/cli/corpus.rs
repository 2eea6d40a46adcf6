//! `tamis corpus`: writes the invented demonstration corpus to a directory.
//!
//! The corpus lets people try training, evaluation and the daemon without anyone's real
//! mail. It is invented from end to end, so the command says so every time it runs: a score
//! measured on it is a smoke test of the plumbing, not evidence of accuracy.

use std::path::PathBuf;

use anyhow::Context;

use crate::demo::{self, LABELS_FILE};

/// Shown after the options in `tamis corpus --help`.
const AFTER_HELP: &str = "\
Writes OUT/ham/NNNNNN.eml, OUT/spam/NNNNNN.eml and OUT/labels.tsv, whose lines are
`relative/path<TAB>spam|ham<TAB>recipient-domain`. The same seed and count always give
byte-identical files, and a smaller count gives a prefix of a larger one.

Everything in the corpus is invented: the organisations, people and products, all text, and
all domains (reserved names such as *.example and *.test). Use it to try the tools; do not
read a model's score on it as evidence of how well tamis filters real mail.

Example:
  tamis corpus --out demo-corpus --count 5000 --seed 7";

/// Arguments of `tamis corpus`.
#[derive(clap::Args, Debug)]
#[command(after_help = AFTER_HELP)]
pub struct CorpusArgs {
    /// Directory to write into; created if missing. Existing files of the same names are
    /// overwritten, other files are left alone.
    #[arg(long, value_name = "DIR")]
    pub out: PathBuf,
    /// Number of messages to generate.
    #[arg(long, value_name = "N", default_value_t = 2000)]
    pub count: usize,
    /// Seed of the generator; each seed gives a different, reproducible corpus.
    #[arg(long, value_name = "S", default_value_t = 7)]
    pub seed: u64,
}

/// Writes the corpus and prints a summary of what was written.
pub fn run(args: &CorpusArgs) -> anyhow::Result<()> {
    let summary = demo::write_corpus(&args.out, args.seed, args.count)
        .map_err(super::input::write_failed)
        .with_context(|| format!("writing the demo corpus to {}", args.out.display()))?;
    let overall = summary.overall;
    println!(
        "wrote {} messages ({} ham, {} spam; {:.1} MB) to {} (seed {})",
        overall.total(),
        overall.ham,
        overall.spam,
        summary.bytes as f64 / 1e6,
        args.out.display(),
        args.seed
    );
    println!("labels: {}", args.out.join(LABELS_FILE).display());
    println!(
        "{:<28} {:>6} {:>6} {:>7}",
        "recipient domain", "ham", "spam", "ham %"
    );
    for (domain, counts) in &summary.per_domain {
        let share = if counts.total() == 0 {
            0.0
        } else {
            100.0 * counts.ham as f64 / counts.total() as f64
        };
        println!(
            "{domain:<28} {:>6} {:>6} {share:>6.1}%",
            counts.ham, counts.spam
        );
    }
    println!(
        "note: this corpus is invented demonstration data (made-up organisations, people and \
         text on reserved domains). Use it to try the tools; scores measured on it are not \
         evidence of accuracy on real mail."
    );
    Ok(())
}
