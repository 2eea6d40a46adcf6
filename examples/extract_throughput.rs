//! Measures `Analyzer::vectorize` throughput over every `*.eml` file under a directory and
//! prints one JSON line, the format `benches/compare.sh` puts beside the Python baseline.
//!
//! ```text
//! cargo run --release --example extract_throughput -- DIR [PASSES]
//! ```
//!
//! Files are read into memory first; only the passes over the in-memory messages are timed,
//! after one untimed warm-up pass that sizes the reusable buffers.

use std::path::{Path, PathBuf};
use std::time::Instant;

use anyhow::{Context, bail};
use tamis::analyze::Analyzer;

const DEFAULT_PASSES: u32 = 5;

fn collect(dir: &Path, out: &mut Vec<PathBuf>) -> anyhow::Result<()> {
    let entries = std::fs::read_dir(dir).with_context(|| format!("reading {}", dir.display()))?;
    for entry in entries {
        let path = entry?.path();
        if path.is_dir() {
            collect(&path, out)?;
        } else if path.extension().is_some_and(|e| e == "eml") {
            out.push(path);
        }
    }
    Ok(())
}

fn main() -> anyhow::Result<()> {
    let mut args = std::env::args_os().skip(1);
    let Some(dir) = args.next().map(PathBuf::from) else {
        bail!("usage: extract_throughput DIR [PASSES]");
    };
    let passes = match args.next() {
        Some(p) => p
            .to_string_lossy()
            .parse::<u32>()
            .context("PASSES must be a positive integer")?
            .max(1),
        None => DEFAULT_PASSES,
    };
    let mut paths = Vec::new();
    collect(&dir, &mut paths)?;
    // A stable order keeps runs comparable with the Python baseline, which sorts too.
    paths.sort();
    if paths.is_empty() {
        bail!("no .eml files under {}", dir.display());
    }
    let messages = paths
        .iter()
        .map(|p| std::fs::read(p).with_context(|| format!("reading {}", p.display())))
        .collect::<anyhow::Result<Vec<Vec<u8>>>>()?;
    let bytes: u64 = messages.iter().map(|m| m.len() as u64).sum();

    let mut analyzer = Analyzer::default();
    let mut failures = 0usize;
    let mut nnz = 0usize;
    let run = |analyzer: &mut Analyzer, nnz: &mut usize, failures: &mut usize| {
        for raw in &messages {
            match analyzer.vectorize(raw) {
                Ok(v) => *nnz += v.nnz(),
                Err(_) => *failures += 1,
            }
        }
    };
    run(&mut analyzer, &mut nnz, &mut failures);
    let warm_failures = failures;
    let start = Instant::now();
    for _ in 0..passes {
        run(&mut analyzer, &mut nnz, &mut failures);
    }
    let seconds = start.elapsed().as_secs_f64() / f64::from(passes);
    std::hint::black_box(nnz);
    let line = serde_json::json!({
        "impl": "tamis",
        "messages": messages.len(),
        "bytes": bytes,
        "seconds": seconds,
        "mb_per_s": bytes as f64 / 1e6 / seconds,
        "msgs_per_s": messages.len() as f64 / seconds,
        "passes": passes,
        "failed": warm_failures,
    });
    println!("{line}");
    Ok(())
}
