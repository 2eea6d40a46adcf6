//! Model selection by stratified k-fold cross-validation.
//!
//! The criterion is the one an operator lives by: the share of junk caught while the
//! share of legitimate mail flagged stays at or under a target (default 0.1%), measured on
//! out-of-fold margins. Accuracy is never used: with heavy class imbalance it rewards a
//! model that lets junk through. Folds are stratified and seeded, so a run is repeatable.

use rayon::prelude::*;
use serde::Serialize;

use super::dataset::Dataset;
use super::eval_error::EvalError;
use super::roc::RocCurve;
use super::solver::{ParamError, SvmParamsBuilder, fit_svm};
use crate::rng::SplitMix64;

/// Fold number (0..k) of each row: each class is shuffled with `seed` and dealt round-robin,
/// so every fold has the class mix of the whole set (stratification).
pub fn stratified_folds(labels: &[i8], k: usize, seed: u64) -> Vec<usize> {
    let k = k.max(1);
    let mut rng = SplitMix64::new(seed);
    let mut folds = vec![0; labels.len()];
    for class in [1i8, -1] {
        let mut members: Vec<usize> = (0..labels.len()).filter(|&i| labels[i] == class).collect();
        // Fisher–Yates shuffle.
        for i in (1..members.len()).rev() {
            let j = rng.below(i + 1);
            members.swap(i, j);
        }
        for (position, &row) in members.iter().enumerate() {
            folds[row] = position % k;
        }
    }
    folds
}

/// Out-of-fold margins: each row scored by the model trained on the other folds.
pub fn out_of_fold_margins(
    data: &Dataset,
    params: &SvmParamsBuilder,
    folds: &[usize],
    k: usize,
) -> Result<Vec<f64>, ParamError> {
    let params = params.validate()?;
    let per_fold: Vec<Vec<(usize, f64)>> = (0..k)
        .into_par_iter()
        .map(|fold| {
            let train: Vec<usize> = (0..data.len()).filter(|&i| folds[i] != fold).collect();
            let test: Vec<usize> = (0..data.len()).filter(|&i| folds[i] == fold).collect();
            let model = fit_svm(&data.subset(&train), &params);
            test.iter()
                .map(|&i| (i, model.margin(&data.rows()[i])))
                .collect()
        })
        .collect();
    let mut margins = vec![0.0; data.len()];
    for (i, m) in per_fold.into_iter().flatten() {
        margins[i] = m;
    }
    Ok(margins)
}

/// One point of the search grid and how it did.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Candidate {
    /// Word n-gram order.
    pub max_ngram: u8,
    /// Regularisation constant.
    pub c: f64,
    /// Out-of-fold ROC AUC.
    pub auc: f64,
    /// Out-of-fold share of junk caught at the target false-positive rate.
    pub tpr_at_target: f64,
}

/// Scores a parameter setting by cross-validation; returns the candidate and its
/// out-of-fold margins.
pub fn evaluate_candidate(
    data: &Dataset,
    max_ngram: u8,
    params: &SvmParamsBuilder,
    folds: &[usize],
    k: usize,
    target_fpr: f64,
) -> Result<(Candidate, Vec<f64>), SelectError> {
    let margins = out_of_fold_margins(data, params, folds, k)?;
    let positive: Vec<bool> = data.labels().iter().map(|&l| l > 0).collect();
    let curve = RocCurve::from_scores(&margins, &positive)?;
    let point = curve.tpr_at_fpr(target_fpr)?;
    Ok((
        Candidate {
            max_ngram,
            c: params.c,
            auc: curve.auc(),
            tpr_at_target: point.tpr,
        },
        margins,
    ))
}

/// True when `a` should be preferred to `b`: more junk caught at the target, and on a tie
/// the smaller model — lower n-gram order, then stronger regularisation (smaller C).
pub fn better(a: &Candidate, b: &Candidate) -> bool {
    const TIE: f64 = 1e-12;
    if (a.tpr_at_target - b.tpr_at_target).abs() > TIE {
        return a.tpr_at_target > b.tpr_at_target;
    }
    (a.max_ngram, a.c) < (b.max_ngram, b.c)
}

/// Per-class multipliers of C that give each class the same total weight, whatever their
/// sizes (`n / (2 n_class)`): junk, then legitimate.
pub fn balanced_class_weights(data: &Dataset) -> (f64, f64) {
    let n = data.len() as f64;
    (
        n / (2.0 * data.n_pos().max(1) as f64),
        n / (2.0 * data.n_neg().max(1) as f64),
    )
}

/// Default margins from out-of-fold scores: quarantine at the target false-positive rate,
/// tag at ten times it (capped at 100%). A threshold that would flag nothing becomes a finite
/// margin just above every score seen.
pub fn default_thresholds(
    curve: &RocCurve,
    margins: &[f64],
    target: f64,
) -> Result<crate::model::Thresholds, EvalError> {
    let ceiling = margins.iter().copied().fold(f64::NEG_INFINITY, f64::max) + 1e-9;
    let finite = |t: f64| if t.is_finite() { t } else { ceiling };
    let quarantine = finite(curve.tpr_at_fpr(target)?.threshold);
    let tag = finite(curve.tpr_at_fpr((target * 10.0).min(1.0))?.threshold).min(quarantine);
    Ok(crate::model::Thresholds { tag, quarantine })
}

/// Why model selection could not run.
#[derive(Debug, thiserror::Error)]
pub enum SelectError {
    /// Invalid solver parameters.
    #[error(transparent)]
    Params(#[from] ParamError),
    /// The margins could not be evaluated (e.g. a single class).
    #[error(transparent)]
    Eval(#[from] EvalError),
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn folds_are_stratified_and_seeded() {
        let labels: Vec<i8> = (0..103).map(|i| if i % 4 == 0 { 1 } else { -1 }).collect();
        let folds = stratified_folds(&labels, 5, 7);
        assert_eq!(folds, stratified_folds(&labels, 5, 7));
        assert_ne!(folds, stratified_folds(&labels, 5, 8));
        for fold in 0..5 {
            let pos = (0..103)
                .filter(|&i| folds[i] == fold && labels[i] > 0)
                .count();
            let neg = (0..103)
                .filter(|&i| folds[i] == fold && labels[i] < 0)
                .count();
            // 26 junk and 77 legitimate rows: each fold gets 5 or 6, and 15 or 16.
            assert!(
                (5..=6).contains(&pos) && (15..=16).contains(&neg),
                "fold {fold}: {pos}/{neg}"
            );
        }
    }

    #[test]
    fn ties_go_to_the_smaller_model() {
        let c = |n, c, tpr| Candidate {
            max_ngram: n,
            c,
            auc: 0.9,
            tpr_at_target: tpr,
        };
        assert!(better(&c(1, 1.0, 0.8), &c(2, 1.0, 0.8)));
        assert!(better(&c(2, 0.1, 0.8), &c(2, 1.0, 0.8)));
        assert!(better(&c(3, 10.0, 0.81), &c(1, 0.1, 0.8)));
    }
}
