//! Writes a seeded synthetic binary dataset in svmlight format, for the training benchmark.
//!
//! Usage: `gen_svmlight OUT ROWS DIMS SEED`
//!
//! Rows look like hashed text: a skewed shared vocabulary plus overlapping class-leaning bands,
//! about a quarter spam, 3% of labels flipped, sublinear counts scaled to unit length. The data
//! are invented; they measure speed and agreement, never correctness on mail.

use std::fs::File;
use std::io::BufWriter;

use anyhow::{Context, bail};
use tamis::train::svmlight::write_svmlight;

fn main() -> anyhow::Result<()> {
    let args: Vec<String> = std::env::args().skip(1).collect();
    let [out, rows, dims, seed] = args.as_slice() else {
        bail!("usage: gen_svmlight OUT ROWS DIMS SEED");
    };
    let rows: usize = rows.parse().context("ROWS")?;
    let dims: usize = dims.parse().context("DIMS")?;
    let seed: u64 = seed.parse().context("SEED")?;
    if dims == 0 || dims > u32::MAX as usize {
        bail!("DIMS must be in 1..={}", u32::MAX);
    }
    let ds = tamis::train::synthetic::overlapping_classes(rows, dims, 20, 61, seed)?;
    let file = File::create(out).with_context(|| format!("create {out}"))?;
    write_svmlight(&ds, BufWriter::new(file)).with_context(|| format!("write {out}"))?;
    Ok(())
}
