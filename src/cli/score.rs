//! `tamis score`: the margin, probability and strongest features of each message.

use std::io::{Read, Write};
use std::path::PathBuf;

use serde::Serialize;

use super::input::{BadInput, Format};
use super::{EXIT_BAD_INPUT, EXIT_OK};
use crate::analyze::Analyzer;
use crate::model::explain::{Contribution, top_contributions};
use crate::model::file::load_model;

/// Arguments of `tamis score`.
#[derive(clap::Args, Debug)]
pub struct ScoreArgs {
    /// The model to score with.
    #[arg(long, value_name = "MODEL")]
    model: PathBuf,
    /// How many of the strongest features to show per message.
    #[arg(long, default_value_t = 10)]
    top: usize,
    /// Output format: `text`, or `json` (one object per line).
    #[arg(long, value_enum, default_value_t = Format::Text)]
    format: Format,
    /// Message files.
    #[arg(required = true, value_name = "FILE")]
    files: Vec<PathBuf>,
}

#[derive(Serialize)]
struct Line {
    file: String,
    margin: f64,
    probability: Option<f64>,
    /// The action at the model's default thresholds: accept, tag or quarantine.
    action: Option<&'static str>,
    top: Vec<Contribution>,
}

/// Runs `tamis score`.
pub fn run(args: &ScoreArgs) -> anyhow::Result<u8> {
    let model = load_model(&args.model).map_err(|e| BadInput(e.to_string()))?;
    let mut analyzer = Analyzer::new(model.spec().clone())?;
    let cap = model.spec().limits.max_raw_bytes as u64 + 1;
    let stdout = std::io::stdout();
    let mut out = stdout.lock();
    let mut code = EXIT_OK;
    let mut raw = Vec::new();
    for path in &args.files {
        raw.clear();
        if let Err(e) = std::fs::File::open(path).and_then(|f| f.take(cap).read_to_end(&mut raw)) {
            eprintln!("tamis: {}: cannot read: {e}", path.display());
            code = EXIT_BAD_INPUT;
            continue;
        }
        let margin = match analyzer.vectorize(&raw) {
            Ok(x) => model.margin(x),
            Err(e) => {
                eprintln!("tamis: {}: {e}", path.display());
                code = EXIT_BAD_INPUT;
                continue;
            }
        };
        let action = model.thresholds().map(|t| {
            if margin >= t.quarantine {
                "quarantine"
            } else if margin >= t.tag {
                "tag"
            } else {
                "accept"
            }
        });
        let line = Line {
            file: path.display().to_string(),
            margin,
            probability: model.probability(margin),
            action,
            top: top_contributions(&model, &mut analyzer, args.top),
        };
        match args.format {
            Format::Json => {
                serde_json::to_writer(&mut out, &line)?;
                writeln!(out)?;
            }
            Format::Text => {
                write!(out, "{}: margin {:+.4}", line.file, line.margin)?;
                if let Some(p) = line.probability {
                    write!(out, ", P(junk) {p:.4}")?;
                }
                if let Some(a) = line.action {
                    write!(out, ", {a}")?;
                }
                writeln!(out)?;
                for c in &line.top {
                    writeln!(out, "  {:+.4}  {}", c.contribution, c.feature)?;
                }
            }
        }
    }
    out.flush()?;
    Ok(code)
}
