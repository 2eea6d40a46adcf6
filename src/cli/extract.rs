//! `tamis extract`: shows what the filter sees in each message.

use std::io::{Read, Write};
use std::path::{Path, PathBuf};

use anyhow::Context;
use serde::Serialize;

use crate::analyze::Analyzer;
use crate::features::FeatureSpec;

use super::{EXIT_BAD_INPUT, EXIT_OK};

/// Output formats.
#[derive(clap::ValueEnum, Clone, Copy, Debug, PartialEq, Eq)]
pub enum Format {
    /// A readable block per file.
    Text,
    /// One JSON object per line per file, for scripts.
    Json,
}

/// Arguments of `tamis extract`.
#[derive(clap::Args, Debug)]
pub struct ExtractArgs {
    /// Output format: `text` for people, `json` (one object per line) for scripts.
    #[arg(long, value_enum, default_value_t = Format::Text)]
    format: Format,
    /// Largest word n-gram order counted as features.
    #[arg(long, default_value_t = FeatureSpec::default().max_ngram)]
    ngram: u8,
    /// Size of the hashed feature space, as a power of two.
    #[arg(long, default_value_t = FeatureSpec::default().hash_bits)]
    hash_bits: u8,
    /// Message files (RFC 5322, one message per file, e.g. `.eml`).
    #[arg(required = true, value_name = "FILE")]
    files: Vec<PathBuf>,
}

#[derive(Serialize)]
struct Report<'a> {
    file: String,
    subject_tokens: Vec<&'a str>,
    body_tokens: Vec<&'a str>,
    hidden_tokens: Vec<&'a str>,
    url_hosts: &'a [String],
    sender_domain: Option<&'a str>,
    auth_results: &'a [String],
    signals: Vec<String>,
    features: usize,
}

/// Runs `tamis extract`; returns the exit code.
pub fn run(args: &ExtractArgs) -> anyhow::Result<u8> {
    let spec = FeatureSpec {
        max_ngram: args.ngram,
        hash_bits: args.hash_bits,
        ..FeatureSpec::default()
    };
    let mut analyzer = Analyzer::new(spec).context("invalid feature options")?;
    let max_raw = analyzer.spec().limits.max_raw_bytes;
    let stdout = std::io::stdout();
    let mut out = stdout.lock();
    let mut code = EXIT_OK;
    let mut raw = Vec::new();
    for path in &args.files {
        if let Err(e) = read_capped(path, max_raw, &mut raw) {
            eprintln!("tamis: {}: cannot read: {e}", path.display());
            code = EXIT_BAD_INPUT;
            continue;
        }
        if let Err(e) = analyzer.vectorize(&raw) {
            eprintln!("tamis: {}: {e}", path.display());
            code = EXIT_BAD_INPUT;
            continue;
        }
        let report = report(path, &analyzer);
        match args.format {
            Format::Json => {
                serde_json::to_writer(&mut out, &report)?;
                writeln!(out)?;
            }
            Format::Text => write_text(&mut out, &report, analyzer.spec())?,
        }
    }
    out.flush()?;
    Ok(code)
}

/// Reads at most `cap + 1` bytes, so the extractor can tell that the cap was hit without
/// a huge file being read whole.
fn read_capped(path: &Path, cap: usize, buf: &mut Vec<u8>) -> std::io::Result<()> {
    buf.clear();
    let file = std::fs::File::open(path)?;
    file.take(cap as u64 + 1).read_to_end(buf)?;
    Ok(())
}

fn report<'a>(path: &Path, analyzer: &'a Analyzer) -> Report<'a> {
    let extracted = analyzer.extracted();
    let fields = analyzer.fields();
    Report {
        file: path.display().to_string(),
        subject_tokens: fields.subject.iter().collect(),
        body_tokens: fields.body.iter().collect(),
        hidden_tokens: fields.hidden.iter().collect(),
        url_hosts: &extracted.url_hosts,
        sender_domain: extracted.sender_domain.as_deref(),
        auth_results: &extracted.auth_results,
        signals: extracted.signals.iter().map(ToString::to_string).collect(),
        features: analyzer.vector().nnz(),
    }
}

fn write_text(out: &mut impl Write, r: &Report<'_>, spec: &FeatureSpec) -> std::io::Result<()> {
    writeln!(out, "== {}", r.file)?;
    for (name, tokens) in [
        ("subject", &r.subject_tokens),
        ("body", &r.body_tokens),
        ("hidden", &r.hidden_tokens),
    ] {
        writeln!(
            out,
            "{name:<9} {:>5} tokens: {}",
            tokens.len(),
            tokens.join(" ")
        )?;
    }
    writeln!(out, "{:<9} {}", "url hosts", r.url_hosts.join(", "))?;
    writeln!(out, "{:<9} {}", "sender", r.sender_domain.unwrap_or("-"))?;
    writeln!(out, "{:<9} {}", "auth", r.auth_results.join(", "))?;
    writeln!(out, "{:<9} {}", "signals", r.signals.join(", "))?;
    writeln!(
        out,
        "{:<9} {} distinct (word n-grams up to {}, 2^{} buckets)",
        "features", r.features, spec.max_ngram, spec.hash_bits
    )?;
    writeln!(out)
}
