//! `tamis features`: the exact vectors the solver sees, in svmlight/libsvm text format.

use std::io::Write;
use std::path::PathBuf;

use super::input::{CorpusInput, check_output, write_failed};
use crate::Label;
use crate::features::FeatureSpec;
use crate::train::dataset::Dataset;
use crate::train::svmlight::write_svmlight;

/// Output formats of `tamis features`.
#[derive(clap::ValueEnum, Clone, Copy, Debug, PartialEq, Eq)]
pub enum FeatureFormat {
    /// svmlight/libsvm text: `+1|-1 index:value ...` with 1-based indices.
    Svmlight,
}

/// Arguments of `tamis features`.
#[derive(clap::Args, Debug)]
pub struct FeaturesArgs {
    #[command(flatten)]
    input: CorpusInput,
    /// Output format.
    #[arg(long, value_enum, default_value_t = FeatureFormat::Svmlight)]
    format: FeatureFormat,
    /// Largest word n-gram order.
    #[arg(long, default_value_t = FeatureSpec::default().max_ngram)]
    ngram: u8,
    /// Size of the hashed feature space, as a power of two.
    #[arg(long, default_value_t = FeatureSpec::default().hash_bits)]
    hash_bits: u8,
    /// Write to this file instead of stdout.
    #[arg(long, value_name = "FILE")]
    out: Option<PathBuf>,
}

/// Runs `tamis features`.
pub fn run(args: &FeaturesArgs) -> anyhow::Result<u8> {
    let spec = FeatureSpec {
        max_ngram: args.ngram,
        hash_bits: args.hash_bits,
        ..FeatureSpec::default()
    };
    spec.check_supported()
        .map_err(|e| super::input::BadInput(e.to_string()))?;
    if let Some(out) = &args.out {
        check_output(out)?;
    }
    let data = args.input.load(&spec, false)?;
    let labels = data
        .labels
        .iter()
        .map(|&l| if l == Label::Spam { 1 } else { -1 })
        .collect();
    let dataset = Dataset::new(data.rows, labels, spec.dimensions())?;
    match &args.out {
        Some(path) => {
            crate::fsio::write_file(path, |w| write_svmlight(&dataset, w)).map_err(write_failed)?
        }
        None => {
            let stdout = std::io::stdout();
            let mut w = std::io::BufWriter::new(stdout.lock());
            write_svmlight(&dataset, &mut w)?;
            w.flush()?;
        }
    }
    Ok(super::EXIT_OK)
}
