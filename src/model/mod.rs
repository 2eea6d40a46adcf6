//! Linear models: weights over the hashed feature space, a bias, a calibration that reads
//! a margin as a probability, and the record of how the model was made.
//!
//! A [`LinearModel`] is immutable once built. Its weight vector always has exactly
//! `2^hash_bits` entries of its [`FeatureSpec`], so scoring never indexes out of range.
//! The file format lives in [`file`] and is specified in `proto/MODEL_FORMAT.md`.

pub mod builtin;
pub mod explain;
pub mod file;

use serde::{Deserialize, Serialize};

use crate::features::{FeatureSpec, SparseVector};

/// Platt scaling parameters: `P(junk | margin) = 1 / (1 + exp(a * margin + b))`.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct Calibration {
    /// Slope (negative for a useful model).
    pub a: f64,
    /// Offset.
    pub b: f64,
}

impl Calibration {
    /// The probability that a message with this margin is junk, computed without overflow
    /// for any finite margin.
    pub fn probability(&self, margin: f64) -> f64 {
        let t = self.a * margin + self.b;
        if t >= 0.0 {
            let e = (-t).exp();
            e / (1.0 + e)
        } else {
            1.0 / (1.0 + t.exp())
        }
    }
}

/// Margins at which a message is tagged or quarantined, chosen at training time from
/// out-of-fold margins; `tamis tune` refines them per domain.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct Thresholds {
    /// Tag at or above this margin.
    pub tag: f64,
    /// Quarantine at or above this margin.
    pub quarantine: f64,
}

/// How and from what a model was trained, as shown in reports and recorded in the file.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, Default)]
pub struct TrainingSummary {
    /// Junk messages trained on.
    pub n_spam: u64,
    /// Legitimate messages trained on.
    pub n_ham: u64,
    /// Training time, seconds since the Unix epoch (UTC).
    pub trained_at_unix: u64,
    /// The tamis version that trained the model.
    pub tool_version: String,
    /// Loss and regularisation, e.g. `squared-hinge C=0.5`.
    pub solver: String,
    /// Cross-validation figures, free-form key → value (e.g. `tpr_at_fpr_0.001`).
    pub cross_validation: std::collections::BTreeMap<String, f64>,
}

/// A model whose weights, bias and spec did not fit together.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
pub enum ModelError {
    /// The weight count differs from the spec's dimension.
    #[error("model has {found} weights but its feature spec needs {expected} (2^hash_bits)")]
    Dimensions {
        /// Weights present.
        found: usize,
        /// Weights the spec requires.
        expected: usize,
    },
    /// A weight, the bias or the calibration is NaN or infinite.
    #[error("model contains a non-finite number in {0}")]
    NonFinite(&'static str),
    /// The spec cannot be reproduced by this binary.
    #[error(transparent)]
    Spec(#[from] crate::features::SpecError),
}

/// A trained linear classifier over hashed features.
#[derive(Debug, Clone, PartialEq)]
pub struct LinearModel {
    spec: FeatureSpec,
    weights: Vec<f32>,
    bias: f64,
    calibration: Option<Calibration>,
    thresholds: Option<Thresholds>,
    summary: TrainingSummary,
}

impl LinearModel {
    /// Assembles a model, checking that every part fits the others.
    pub fn new(
        spec: FeatureSpec,
        weights: Vec<f32>,
        bias: f64,
        calibration: Option<Calibration>,
        thresholds: Option<Thresholds>,
        summary: TrainingSummary,
    ) -> Result<Self, ModelError> {
        spec.check_supported()?;
        if weights.len() != spec.dimensions() {
            return Err(ModelError::Dimensions {
                found: weights.len(),
                expected: spec.dimensions(),
            });
        }
        if !weights.iter().all(|w| w.is_finite()) {
            return Err(ModelError::NonFinite("weights"));
        }
        if !bias.is_finite() {
            return Err(ModelError::NonFinite("bias"));
        }
        if calibration.is_some_and(|c| !c.a.is_finite() || !c.b.is_finite()) {
            return Err(ModelError::NonFinite("calibration"));
        }
        if thresholds.is_some_and(|t| !t.tag.is_finite() || !t.quarantine.is_finite()) {
            return Err(ModelError::NonFinite("thresholds"));
        }
        Ok(LinearModel {
            spec,
            weights,
            bias,
            calibration,
            thresholds,
            summary,
        })
    }

    /// The feature spec every scored message must be featurized with.
    pub fn spec(&self) -> &FeatureSpec {
        &self.spec
    }

    /// The weight of each hashed feature.
    pub fn weights(&self) -> &[f32] {
        &self.weights
    }

    /// The bias (added to every margin).
    pub fn bias(&self) -> f64 {
        self.bias
    }

    /// The Platt calibration, when the model has one.
    pub fn calibration(&self) -> Option<Calibration> {
        self.calibration
    }

    /// The default tag and quarantine margins, when training chose them.
    pub fn thresholds(&self) -> Option<Thresholds> {
        self.thresholds
    }

    /// How the model was trained.
    pub fn summary(&self) -> &TrainingSummary {
        &self.summary
    }

    /// `w · x + b`: positive leans junk, negative leans legitimate.
    pub fn margin(&self, x: &SparseVector) -> f64 {
        x.dot_dense(&self.weights) + self.bias
    }

    /// The calibrated probability of junk for `margin`, when the model is calibrated.
    pub fn probability(&self, margin: f64) -> Option<f64> {
        self.calibration.map(|c| c.probability(margin))
    }
}
