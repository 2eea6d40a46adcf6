//! The built-in demonstration model, trained on start-up from the invented demo corpus.
//!
//! It lets `tamis serve` and `tamis demo` run on a fresh machine with no files at all. It
//! has learned invented mail, not the operator's: every caller must say so loudly, and it
//! must be replaced by a model trained with `tamis train` on the operator's own mail.
//! Training is deterministic (fixed seed, fixed parameters), so every start gives the same
//! model.

use super::{Calibration, LinearModel, ModelError, TrainingSummary};
use crate::Label;
use crate::analyze::Analyzer;
use crate::features::FeatureSpec;
use crate::train::dataset::{Dataset, DatasetError};
use crate::train::platt::fit_platt;
use crate::train::roc::RocCurve;
use crate::train::select::{
    balanced_class_weights, default_thresholds, out_of_fold_margins, stratified_folds,
};
use crate::train::solver::{ParamError, SvmParamsBuilder, fit_svm};

/// Messages of the demo corpus the built-in model learns from.
const MESSAGES: usize = 3000;
/// Seed of that corpus (the `tamis corpus` default).
const SEED: u64 = 7;

/// The warning every user of the built-in model must show.
pub const WARNING: &str = "using the built-in DEMONSTRATION model, trained on invented mail: it knows nothing about your users' mail. Train one with `tamis train` on your own reports and set `model.path` before relying on any verdict.";

/// Why the demonstration model could not be built (a bug in this binary, never input).
#[derive(Debug, thiserror::Error)]
pub enum BuiltinError {
    /// Solver parameters rejected.
    #[error(transparent)]
    Params(#[from] ParamError),
    /// Dataset invariant broken.
    #[error(transparent)]
    Dataset(#[from] DatasetError),
    /// Model invariant broken.
    #[error(transparent)]
    Model(#[from] ModelError),
    /// Evaluation failed.
    #[error(transparent)]
    Eval(#[from] crate::train::eval_error::EvalError),
    /// The feature spec was refused.
    #[error(transparent)]
    Spec(#[from] crate::features::SpecError),
}

/// The feature spec of the demonstration model, without training it: what a command
/// needs to vectorize mail the way the built-in model would see it.
pub fn demonstration_spec() -> FeatureSpec {
    FeatureSpec {
        hash_bits: 18,
        ..FeatureSpec::default()
    }
}

/// Trains the demonstration model (about a second in a release build).
pub fn demonstration_model() -> Result<LinearModel, BuiltinError> {
    let spec = demonstration_spec();
    let mut analyzer = Analyzer::new(spec.clone())?;
    let mut rows = Vec::with_capacity(MESSAGES);
    let mut labels = Vec::with_capacity(MESSAGES);
    for message in crate::demo::generate(SEED, MESSAGES) {
        // Demo messages are well-formed by construction; one that is not is left out.
        if let Ok(x) = analyzer.vectorize(&message.bytes) {
            rows.push(x.clone());
            labels.push(if message.label == Label::Spam { 1 } else { -1 });
        }
    }
    let data = Dataset::new(rows, labels, spec.dimensions())?;
    let (weight_pos, weight_neg) = balanced_class_weights(&data);
    let params = SvmParamsBuilder {
        c: 1.0,
        weight_pos,
        weight_neg,
        seed: SEED,
        ..SvmParamsBuilder::default()
    };
    let folds = stratified_folds(data.labels(), 3, SEED);
    let margins = out_of_fold_margins(&data, &params, &folds, 3)?;
    let positive: Vec<bool> = data.labels().iter().map(|&l| l > 0).collect();
    let platt = fit_platt(&margins, &positive)?;
    let curve = RocCurve::from_scores(&margins, &positive)?;
    let thresholds = default_thresholds(&curve, &margins, 0.001)?;
    let fitted = fit_svm(&data, &params.validate()?);
    let summary = TrainingSummary {
        n_spam: data.n_pos() as u64,
        n_ham: data.n_neg() as u64,
        trained_at_unix: 0,
        tool_version: env!("CARGO_PKG_VERSION").to_string(),
        solver: "built-in demonstration model: squared-hinge C=1 on invented mail".to_string(),
        cross_validation: [("auc".to_string(), curve.auc())].into_iter().collect(),
    };
    Ok(LinearModel::new(
        spec,
        fitted.weights().iter().map(|&w| w as f32).collect(),
        fitted.bias(),
        Some(Calibration {
            a: platt.a(),
            b: platt.b(),
        }),
        Some(thresholds),
        summary,
    )?)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_demonstration_model_is_deterministic_and_separates_demo_mail() {
        let a = demonstration_model().expect("builds");
        let b = demonstration_model().expect("builds");
        assert_eq!(a, b);
        assert_eq!(a.spec(), &demonstration_spec());
        let mut analyzer = Analyzer::new(a.spec().clone()).expect("spec");
        let mut right = 0;
        let held: Vec<_> = crate::demo::generate(99, 200).collect();
        for m in &held {
            let margin = a.margin(analyzer.vectorize(&m.bytes).expect("mail"));
            if (margin > 0.0) == (m.label == Label::Spam) {
                right += 1;
            }
        }
        // Invented data and 1.7% label noise: this checks the plumbing, not accuracy.
        assert!(right >= 180, "{right} of 200");
    }
}
