//! A labelled set of sparse rows for binary classification.
//!
//! Invariants, checked once by [`Dataset::new`] so solvers need not re-check them: there is
//! one label per row, every label is `+1` (spam, the positive class) or `-1` (ham), and every
//! feature index of every row is below [`Dataset::dimensions`].

use crate::features::SparseVector;

/// Why a set of rows and labels does not form a [`Dataset`].
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
pub enum DatasetError {
    /// The row and label counts differ.
    #[error("{rows} rows but {labels} labels")]
    LengthMismatch {
        /// Number of rows given.
        rows: usize,
        /// Number of labels given.
        labels: usize,
    },
    /// A label other than `+1` or `-1`.
    #[error("row {row}: label {label} is neither +1 (spam) nor -1 (ham)")]
    BadLabel {
        /// 0-based row number.
        row: usize,
        /// The offending label.
        label: i8,
    },
    /// A feature index at or beyond the declared dimensions.
    #[error("row {row}: feature index {index} is not below the dimensions {dimensions}")]
    IndexOutOfRange {
        /// 0-based row number.
        row: usize,
        /// The 0-based feature index.
        index: u32,
        /// The declared number of dimensions.
        dimensions: usize,
    },
}

/// Labelled sparse rows: `+1` is spam (the positive class), `-1` is ham.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct Dataset {
    rows: Vec<SparseVector>,
    labels: Vec<i8>,
    dimensions: usize,
}

impl Dataset {
    /// Checks the invariants in the module documentation and builds the dataset.
    pub fn new(
        rows: Vec<SparseVector>,
        labels: Vec<i8>,
        dimensions: usize,
    ) -> Result<Dataset, DatasetError> {
        if rows.len() != labels.len() {
            return Err(DatasetError::LengthMismatch {
                rows: rows.len(),
                labels: labels.len(),
            });
        }
        if let Some((row, &label)) = labels.iter().enumerate().find(|&(_, &l)| l != 1 && l != -1) {
            return Err(DatasetError::BadLabel { row, label });
        }
        for (row, x) in rows.iter().enumerate() {
            // Indices are increasing, so the last one is the largest.
            if let Some(&index) = x.indices().last()
                && index as usize >= dimensions
            {
                return Err(DatasetError::IndexOutOfRange {
                    row,
                    index,
                    dimensions,
                });
            }
        }
        Ok(Dataset {
            rows,
            labels,
            dimensions,
        })
    }

    /// Builds a dataset whose invariants the caller has already established (a parser that
    /// checked every label and index as it read them), without a second pass over the rows.
    pub(crate) fn from_checked_parts(
        rows: Vec<SparseVector>,
        labels: Vec<i8>,
        dimensions: usize,
    ) -> Dataset {
        debug_assert_eq!(rows.len(), labels.len());
        debug_assert!(labels.iter().all(|&l| l == 1 || l == -1));
        Dataset {
            rows,
            labels,
            dimensions,
        }
    }

    /// The rows, in input order.
    pub fn rows(&self) -> &[SparseVector] {
        &self.rows
    }

    /// The labels, aligned with [`Dataset::rows`]: `+1` spam, `-1` ham.
    pub fn labels(&self) -> &[i8] {
        &self.labels
    }

    /// Size of the feature space: every index is below it.
    pub fn dimensions(&self) -> usize {
        self.dimensions
    }

    /// Number of rows.
    pub fn len(&self) -> usize {
        self.rows.len()
    }

    /// True when there are no rows.
    pub fn is_empty(&self) -> bool {
        self.rows.is_empty()
    }

    /// Number of spam (`+1`) rows.
    pub fn n_pos(&self) -> usize {
        self.labels.iter().filter(|&&l| l > 0).count()
    }

    /// Number of ham (`-1`) rows.
    pub fn n_neg(&self) -> usize {
        self.labels.len() - self.n_pos()
    }

    /// The rows at `indices`, in that order (repeats allowed), with the same dimensions.
    ///
    /// # Panics
    ///
    /// When an index is not below [`Dataset::len`]: the indices come from the caller's own
    /// fold or sample logic, never from input data, so a bad one is a bug to surface.
    pub fn subset(&self, indices: &[usize]) -> Dataset {
        Dataset {
            rows: indices.iter().map(|&i| self.rows[i].clone()).collect(),
            labels: indices.iter().map(|&i| self.labels[i]).collect(),
            dimensions: self.dimensions,
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn row(pairs: &[(u32, f32)]) -> SparseVector {
        SparseVector::from_pairs(pairs.to_vec())
    }

    #[test]
    fn counts_classes_and_subsets_in_order() {
        let ds = Dataset::new(
            vec![row(&[(0, 1.0)]), row(&[(2, 1.0)]), row(&[(1, 2.0)])],
            vec![1, -1, -1],
            3,
        )
        .unwrap();
        assert_eq!((ds.len(), ds.n_pos(), ds.n_neg()), (3, 1, 2));
        let sub = ds.subset(&[2, 0, 2]);
        assert_eq!(sub.labels(), &[-1, 1, -1]);
        assert_eq!(sub.rows()[1], row(&[(0, 1.0)]));
        assert_eq!(sub.dimensions(), 3);
    }

    #[test]
    fn rejects_mismatch_bad_label_and_out_of_range_index() {
        assert_eq!(
            Dataset::new(vec![row(&[])], vec![], 1),
            Err(DatasetError::LengthMismatch { rows: 1, labels: 0 })
        );
        assert_eq!(
            Dataset::new(vec![row(&[])], vec![0], 1),
            Err(DatasetError::BadLabel { row: 0, label: 0 })
        );
        assert_eq!(
            Dataset::new(vec![row(&[(0, 1.0)]), row(&[(4, 1.0)])], vec![1, -1], 4),
            Err(DatasetError::IndexOutOfRange {
                row: 1,
                index: 4,
                dimensions: 4
            })
        );
    }
}
