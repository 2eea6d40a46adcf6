//! Sparse vectors: sorted, duplicate-free `(index, value)` pairs.
//!
//! Invariant: `indices` is strictly increasing and `values` has the same length. Every
//! constructor keeps it, which is what makes the merge inner product linear-time.

use serde::Serialize;

/// A sparse vector of `f32` values over `u32` feature indices.
#[derive(Debug, Default, Clone, PartialEq, Serialize)]
pub struct SparseVector {
    indices: Vec<u32>,
    values: Vec<f32>,
}

impl SparseVector {
    /// An empty vector.
    pub fn new() -> Self {
        SparseVector::default()
    }

    /// Builds a vector from pairs in any order; values of repeated indices are summed.
    pub fn from_pairs(mut pairs: Vec<(u32, f32)>) -> Self {
        pairs.sort_unstable_by_key(|&(i, _)| i);
        let mut v = SparseVector::new();
        for (index, value) in pairs {
            v.push_merging(index, value);
        }
        v
    }

    /// Empties the vector, keeping capacity.
    pub fn clear(&mut self) {
        self.indices.clear();
        self.values.clear();
    }

    /// Appends `(index, value)` where `index` is not below the last index; an equal index
    /// is merged by adding the values. Callers feed indices in sorted order.
    pub(crate) fn push_merging(&mut self, index: u32, value: f32) {
        match (self.indices.last(), self.values.last_mut()) {
            (Some(&last), Some(v)) if last == index => *v += value,
            _ => {
                debug_assert!(self.indices.last().is_none_or(|&last| last < index));
                self.indices.push(index);
                self.values.push(value);
            }
        }
    }

    /// Number of stored (non-zero) entries.
    pub fn nnz(&self) -> usize {
        self.indices.len()
    }

    /// True when the vector has no entries.
    pub fn is_empty(&self) -> bool {
        self.indices.is_empty()
    }

    /// Feature indices, strictly increasing.
    pub fn indices(&self) -> &[u32] {
        &self.indices
    }

    /// Values, aligned with [`SparseVector::indices`].
    pub fn values(&self) -> &[f32] {
        &self.values
    }

    /// `(index, value)` pairs in index order.
    pub fn iter(&self) -> impl Iterator<Item = (u32, f32)> + '_ {
        self.indices
            .iter()
            .copied()
            .zip(self.values.iter().copied())
    }

    /// Euclidean norm.
    pub fn l2_norm(&self) -> f64 {
        self.values
            .iter()
            .map(|&v| f64::from(v) * f64::from(v))
            .sum::<f64>()
            .sqrt()
    }

    /// Scales every value so the vector has unit Euclidean norm (no-op when empty).
    pub fn normalize_l2(&mut self) {
        let norm = self.l2_norm();
        if norm > 0.0 {
            for v in &mut self.values {
                *v = (f64::from(*v) / norm) as f32;
            }
        }
    }

    /// Inner product with another sparse vector by a linear-time merge of the two sorted
    /// index lists.
    pub fn dot(&self, other: &SparseVector) -> f64 {
        let (mut i, mut j) = (0, 0);
        let mut sum = 0.0f64;
        while let (Some(&a), Some(&b)) = (self.indices.get(i), other.indices.get(j)) {
            match a.cmp(&b) {
                std::cmp::Ordering::Less => i += 1,
                std::cmp::Ordering::Greater => j += 1,
                std::cmp::Ordering::Equal => {
                    sum += f64::from(self.values[i]) * f64::from(other.values[j]);
                    i += 1;
                    j += 1;
                }
            }
        }
        sum
    }

    /// Inner product with a dense weight vector; indices beyond `dense` count as zero.
    pub fn dot_dense(&self, dense: &[f32]) -> f64 {
        self.iter()
            .map(|(i, v)| f64::from(v) * f64::from(dense.get(i as usize).copied().unwrap_or(0.0)))
            .sum()
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn from_pairs_sorts_and_merges() {
        let v = SparseVector::from_pairs(vec![(5, 1.0), (2, 2.0), (5, 0.5)]);
        assert_eq!(v.indices(), &[2, 5]);
        assert_eq!(v.values(), &[2.0, 1.5]);
    }

    #[test]
    fn merge_dot_matches_dense_dot() {
        let a = SparseVector::from_pairs(vec![(1, 1.0), (3, 2.0), (9, -1.0)]);
        let b = SparseVector::from_pairs(vec![(0, 4.0), (3, 0.5), (9, 2.0), (12, 1.0)]);
        let mut dense = vec![0.0f32; 16];
        for (i, v) in b.iter() {
            dense[i as usize] = v;
        }
        assert_eq!(a.dot(&b), -1.0);
        assert_eq!(a.dot(&b), a.dot_dense(&dense));
        assert_eq!(b.dot(&a), a.dot(&b));
    }

    #[test]
    fn normalizes_to_unit_length() {
        let mut v = SparseVector::from_pairs(vec![(0, 3.0), (7, 4.0)]);
        v.normalize_l2();
        assert!((v.l2_norm() - 1.0).abs() < 1e-6);
        assert_eq!(v.values(), &[0.6, 0.8]);
    }
}
