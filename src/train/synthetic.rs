//! Seeded synthetic datasets shaped like hashed mail, for the solver's benchmark and its
//! reference tests. Invented data: they measure speed and agreement between solvers, never
//! correctness on mail.

use std::collections::BTreeMap;

use super::dataset::{Dataset, DatasetError};
use crate::features::SparseVector;
use crate::rng::SplitMix64;

/// Rows look like hashed text: a skewed shared vocabulary plus class-leaning bands that
/// overlap, about a quarter junk, 3% of labels flipped so the classes are not separable, and
/// sublinear counts scaled to unit length as the featurizer produces. Each row draws
/// `min_terms + below(extra_terms)` term occurrences.
pub fn overlapping_classes(
    rows: usize,
    dims: usize,
    min_terms: usize,
    extra_terms: usize,
    seed: u64,
) -> Result<Dataset, DatasetError> {
    let mut rng = SplitMix64::new(seed);
    let mut data = Vec::with_capacity(rows);
    let mut labels = Vec::with_capacity(rows);
    let last = dims.saturating_sub(1);
    for _ in 0..rows {
        let spam = rng.unit() < 0.25;
        let terms = min_terms + rng.below(extra_terms);
        let mut counts = BTreeMap::<u32, f32>::new();
        for _ in 0..terms {
            let u = rng.unit();
            let position = if rng.unit() < 0.35 {
                let (lo, hi) = if spam { (0.20, 0.60) } else { (0.40, 0.90) };
                lo + (hi - lo) * u
            } else {
                u * u
            };
            let index = ((position * dims as f64) as usize).min(last) as u32;
            *counts.entry(index).or_default() += 1.0;
        }
        let mut x =
            SparseVector::from_pairs(counts.into_iter().map(|(i, c)| (i, 1.0 + c.ln())).collect());
        x.normalize_l2();
        data.push(x);
        let flipped = rng.unit() < 0.03;
        labels.push(if spam != flipped { 1 } else { -1 });
    }
    Dataset::new(data, labels, dims)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn seeded_and_shaped_as_asked() {
        let a = overlapping_classes(400, 1000, 15, 31, 5).expect("valid");
        let b = overlapping_classes(400, 1000, 15, 31, 5).expect("valid");
        assert_eq!(a.rows(), b.rows());
        assert_eq!(a.labels(), b.labels());
        assert!(
            a.n_pos() > 60 && a.n_pos() < 150,
            "about a quarter junk: {}",
            a.n_pos()
        );
        assert!(
            a.rows()
                .iter()
                .all(|r| r.nnz() <= 45 && (r.l2_norm() - 1.0).abs() < 1e-5)
        );
    }
}
