//! Writes a seeded synthetic binary dataset in svmlight format, for the training benchmark.
//!
//! Usage: `gen_svmlight OUT ROWS DIMS SEED`
//!
//! Rows look like hashed text: a skewed shared vocabulary plus overlapping class-leaning bands,
//! about a quarter spam, 3% of labels flipped, sublinear counts scaled to unit length. The data
//! are invented; they measure speed and agreement, never correctness on mail.

use std::collections::BTreeMap;
use std::fs::File;
use std::io::BufWriter;

use anyhow::{Context, bail};
use tamis::features::SparseVector;
use tamis::train::dataset::Dataset;
use tamis::train::svmlight::write_svmlight;

/// Seeded test data: every choice comes from the crate's SplitMix64.
struct Rng(tamis::rng::SplitMix64);

impl Rng {
    fn next(&mut self) -> u64 {
        self.0.next_u64()
    }
    fn unit(&mut self) -> f64 {
        (self.next() >> 11) as f64 / (1u64 << 53) as f64
    }
    fn below(&mut self, n: usize) -> usize {
        ((u128::from(self.next()) * n as u128) >> 64) as usize
    }
}

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
    let mut rng = Rng(tamis::rng::SplitMix64::new(seed));
    let mut data = Vec::with_capacity(rows);
    let mut labels = Vec::with_capacity(rows);
    for _ in 0..rows {
        let spam = rng.unit() < 0.25;
        let nnz = 20 + rng.below(61);
        let mut counts = BTreeMap::<u32, f32>::new();
        for _ in 0..nnz {
            let u = rng.unit();
            let position = if rng.unit() < 0.35 {
                let (lo, hi) = if spam { (0.20, 0.60) } else { (0.40, 0.90) };
                lo + (hi - lo) * u
            } else {
                u * u
            };
            let index = ((position * dims as f64) as usize).min(dims - 1) as u32;
            *counts.entry(index).or_default() += 1.0;
        }
        let mut x =
            SparseVector::from_pairs(counts.into_iter().map(|(i, c)| (i, 1.0 + c.ln())).collect());
        x.normalize_l2();
        data.push(x);
        let flipped = rng.unit() < 0.03;
        labels.push(if spam != flipped { 1 } else { -1 });
    }
    let ds = Dataset::new(data, labels, dims)?;
    let file = File::create(out).with_context(|| format!("create {out}"))?;
    write_svmlight(&ds, BufWriter::new(file)).with_context(|| format!("write {out}"))?;
    Ok(())
}
