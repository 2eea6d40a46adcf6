//! `tamis tune`: per-domain tag and quarantine thresholds from labelled mail, written as a
//! policy snippet for the configuration file.

use std::collections::BTreeMap;
use std::path::PathBuf;

use serde::Serialize;

use super::eval::score_corpus;
use super::input::{BadInput, CorpusInput, Format, check_output, write_failed};
use crate::model::file::load_model;
use crate::train::tune::{DomainThresholds, TuneTarget, policy_snippet, tune_domain};

/// Arguments of `tamis tune`.
#[derive(clap::Args, Debug)]
pub struct TuneArgs {
    /// The model whose margins are thresholded.
    #[arg(long, value_name = "MODEL")]
    model: PathBuf,
    #[command(flatten)]
    input: CorpusInput,
    /// Largest acceptable share of legitimate mail quarantined (0.001 = 0.1%).
    #[arg(long, default_value_t = 0.001)]
    target_fpr: f64,
    /// Largest acceptable share of legitimate mail tagged.
    #[arg(long, default_value_t = 0.01)]
    tag_fpr: f64,
    /// Confidence of the upper bound on the false-positive rate (Clopper–Pearson, one-sided).
    #[arg(long, default_value_t = 0.95)]
    confidence: f64,
    /// Write the policy snippet to this file instead of stdout.
    #[arg(long, value_name = "FILE")]
    out: Option<PathBuf>,
    /// `text` prints the TOML policy snippet; `json` prints the thresholds and evidence.
    #[arg(long, value_enum, default_value_t = Format::Text)]
    format: Format,
}

#[derive(Serialize)]
struct Report<'a> {
    target: TuneTarget,
    default: &'a DomainThresholds,
    domains: &'a [DomainThresholds],
}

/// Runs `tamis tune`.
pub fn run(args: &TuneArgs) -> anyhow::Result<u8> {
    for (name, v) in [
        ("--target-fpr", args.target_fpr),
        ("--tag-fpr", args.tag_fpr),
        ("--confidence", args.confidence),
    ] {
        if !(v > 0.0 && v < 1.0) {
            return Err(BadInput(format!("{name} must be between 0 and 1, got {v}")).into());
        }
    }
    if args.tag_fpr < args.target_fpr {
        return Err(BadInput(
            "--tag-fpr must be at least --target-fpr: tagging is the milder action".into(),
        )
        .into());
    }
    if let Some(out) = &args.out {
        check_output(out)?;
    }
    let model = load_model(&args.model).map_err(|e| BadInput(e.to_string()))?;
    let scored = score_corpus(&model, &args.input)?;
    let target = TuneTarget {
        quarantine_fpr: args.target_fpr,
        tag_fpr: args.tag_fpr,
        confidence: args.confidence,
    };
    let split = |keep: &dyn Fn(usize) -> bool| {
        let mut spam = Vec::new();
        let mut ham = Vec::new();
        for (i, (&m, &p)) in scored.margins.iter().zip(&scored.positive).enumerate() {
            if keep(i) {
                if p { spam.push(m) } else { ham.push(m) }
            }
        }
        (spam, ham)
    };
    let (spam, ham) = split(&|_| true);
    if ham.is_empty() {
        return Err(BadInput("tuning needs legitimate mail (--ham or `ham` lines in --labels): false positives are measured on it".into()).into());
    }
    let default = tune_domain(None, &spam, &ham, target, None);
    let names: BTreeMap<&str, ()> = scored
        .domains
        .iter()
        .flatten()
        .map(|d| (d.as_str(), ()))
        .collect();
    let mut domains = Vec::new();
    for name in names.keys() {
        let (spam, ham) = split(&|i| scored.domains[i].as_deref() == Some(*name));
        domains.push(tune_domain(
            Some((*name).to_string()),
            &spam,
            &ham,
            target,
            Some(&default),
        ));
    }
    let text = match args.format {
        Format::Text => policy_snippet(
            &default,
            &domains,
            target,
            &args.model.display().to_string(),
        ),
        Format::Json => {
            serde_json::to_string(&Report {
                target,
                default: &default,
                domains: &domains,
            })? + "\n"
        }
    };
    match &args.out {
        Some(path) => crate::fsio::write_bytes(path, text.as_bytes()).map_err(write_failed)?,
        None => print!("{text}"),
    }
    for d in std::iter::once(&default).chain(&domains) {
        for note in &d.notes {
            eprintln!(
                "tamis: {}: {note}",
                d.domain.as_deref().unwrap_or("all mail")
            );
        }
    }
    Ok(super::EXIT_OK)
}
