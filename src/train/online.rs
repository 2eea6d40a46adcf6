//! Online updates of a linear model, one labelled vector at a time, for learning from users'
//! reports between full retrainings.
//!
//! Two published rules: the classic perceptron (update by `y·x` on a mistake) and PA-I from
//! Crammer, Dekel, Keshet, Shalev-Shwartz and Singer, "Online Passive-Aggressive Algorithms"
//! (JMLR 2006), §3: with hinge loss `ℓ = max(0, 1 − y·margin)` the step is
//! `τ = min(C, ℓ / ‖x‖²)` and the update `w ← w + τ·y·x`.
//!
//! The bias is handled as in the batch solver (liblinear's `-B`): a constant feature of value
//! `bias_feature` is appended to every vector, its weight updated and counted in `‖x‖²` like any
//! other, so a model trained by [`super::solver::fit_svm`] can be continued here unchanged.
//! Every update checks its input before touching the weights, so a refused update leaves the
//! model as it was.

use crate::features::SparseVector;

/// Why an update was refused.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum OnlineError {
    /// A label other than `+1` (spam) or `-1` (ham).
    #[error("label {0} is neither +1 (spam) nor -1 (ham)")]
    BadLabel(i8),
    /// A feature index at or beyond the model's dimensions.
    #[error("feature index {index} is not below the model's dimensions {dimensions}")]
    IndexOutOfRange {
        /// The 0-based index.
        index: u32,
        /// The model's dimensions.
        dimensions: usize,
    },
    /// A PA-I aggressiveness `C` that is not finite and positive.
    #[error("aggressiveness C must be finite and positive, got {0}")]
    Aggressiveness(f64),
}

/// A dense linear model `margin(x) = wᵀx + w_b·bias_feature` updated online.
#[derive(Debug, Clone, PartialEq)]
pub struct OnlineLinear {
    weights: Vec<f64>,
    bias_weight: f64,
    bias_feature: f64,
}

impl OnlineLinear {
    /// The zero model over `dimensions` features; `bias_feature <= 0` (or NaN) means no bias.
    pub fn new(dimensions: usize, bias_feature: f64) -> Self {
        OnlineLinear {
            weights: vec![0.0; dimensions],
            bias_weight: 0.0,
            bias_feature: normalized_bias(bias_feature),
        }
    }

    /// Starts from existing weights and intercept (for instance a fitted SVM's), with the same
    /// `bias_feature` the model was trained with. Without a bias feature the intercept is
    /// dropped, since nothing could update it.
    pub fn from_weights(weights: Vec<f64>, intercept: f64, bias_feature: f64) -> Self {
        let bias_feature = normalized_bias(bias_feature);
        let bias_weight = if bias_feature > 0.0 {
            intercept / bias_feature
        } else {
            0.0
        };
        OnlineLinear {
            weights,
            bias_weight,
            bias_feature,
        }
    }

    /// The feature weights.
    pub fn weights(&self) -> &[f64] {
        &self.weights
    }

    /// The intercept added to `wᵀx`.
    pub fn intercept(&self) -> f64 {
        self.bias_weight * self.bias_feature
    }

    /// Number of features.
    pub fn dimensions(&self) -> usize {
        self.weights.len()
    }

    /// `wᵀx + intercept`; indices beyond the dimensions count as zero.
    pub fn margin(&self, x: &SparseVector) -> f64 {
        let wx: f64 = x
            .iter()
            .map(|(i, v)| self.weights.get(i as usize).copied().unwrap_or(0.0) * f64::from(v))
            .sum();
        wx + self.intercept()
    }

    /// Perceptron rule: on a mistake (`y·margin <= 0`) adds `y·x` (and `y·bias_feature` to the
    /// bias weight). Returns whether the model changed.
    pub fn perceptron_update(&mut self, x: &SparseVector, y: i8) -> Result<bool, OnlineError> {
        let y = self.check(x, y)?;
        if y * self.margin(x) > 0.0 {
            return Ok(false);
        }
        self.add(x, y);
        Ok(true)
    }

    /// PA-I rule with aggressiveness `c`: returns the step `τ` taken (0 when the margin was
    /// already at least 1, or when `x` and the bias feature are both empty and no step can
    /// change the margin).
    pub fn passive_aggressive_update(
        &mut self,
        x: &SparseVector,
        y: i8,
        c: f64,
    ) -> Result<f64, OnlineError> {
        if !(c.is_finite() && c > 0.0) {
            return Err(OnlineError::Aggressiveness(c));
        }
        let y = self.check(x, y)?;
        let loss = (1.0 - y * self.margin(x)).max(0.0);
        let norm2 = x.l2_norm().powi(2) + self.bias_feature * self.bias_feature;
        if loss == 0.0 || norm2 == 0.0 {
            return Ok(0.0);
        }
        let tau = c.min(loss / norm2);
        self.add(x, tau * y);
        Ok(tau)
    }

    /// Validates label and indices before any weight moves; returns `y` as `f64`.
    fn check(&self, x: &SparseVector, y: i8) -> Result<f64, OnlineError> {
        if y != 1 && y != -1 {
            return Err(OnlineError::BadLabel(y));
        }
        // Indices are increasing, so only the last can be out of range.
        if let Some(&index) = x.indices().last()
            && index as usize >= self.weights.len()
        {
            return Err(OnlineError::IndexOutOfRange {
                index,
                dimensions: self.weights.len(),
            });
        }
        Ok(f64::from(y))
    }

    /// `w ← w + step·x`, bias feature included; indices already checked.
    fn add(&mut self, x: &SparseVector, step: f64) {
        for (i, v) in x.iter() {
            if let Some(w) = self.weights.get_mut(i as usize) {
                *w += step * f64::from(v);
            }
        }
        self.bias_weight += step * self.bias_feature;
    }
}

fn normalized_bias(bias_feature: f64) -> f64 {
    if bias_feature.is_finite() && bias_feature > 0.0 {
        bias_feature
    } else {
        0.0
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn x(pairs: &[(u32, f32)]) -> SparseVector {
        SparseVector::from_pairs(pairs.to_vec())
    }

    fn close(a: &[f64], b: &[f64]) -> bool {
        a.len() == b.len() && a.iter().zip(b).all(|(p, q)| (p - q).abs() < 1e-12)
    }

    #[test]
    fn perceptron_hand_computed_sequence() {
        let mut m = OnlineLinear::new(3, 1.0);
        // Margin 0 counts as a mistake: w = (1, 0, 2), w_b = 1.
        assert_eq!(m.perceptron_update(&x(&[(0, 1.0), (2, 2.0)]), 1), Ok(true));
        assert!(close(m.weights(), &[1.0, 0.0, 2.0]));
        assert_eq!(m.intercept(), 1.0);
        // Margin 0 + 1 = 1 on a ham row: w = (1, −1, 2), w_b = 0.
        assert_eq!(m.perceptron_update(&x(&[(1, 1.0)]), -1), Ok(true));
        assert!(close(m.weights(), &[1.0, -1.0, 2.0]));
        assert_eq!(m.intercept(), 0.0);
        // Margin 1 + 4 = 5 on a spam row: no change.
        assert_eq!(m.perceptron_update(&x(&[(0, 1.0), (2, 2.0)]), 1), Ok(false));
        assert!(close(m.weights(), &[1.0, -1.0, 2.0]));
    }

    #[test]
    fn pa1_hand_computed_steps() {
        let mut m = OnlineLinear::new(2, 1.0);
        // ℓ = 1, ‖x‖² = 1 + 1 + 1 (bias) = 3, τ = min(1, 1/3).
        let tau = m.passive_aggressive_update(&x(&[(0, 1.0), (1, 1.0)]), 1, 1.0);
        assert!((tau.unwrap() - 1.0 / 3.0).abs() < 1e-12);
        assert!(close(m.weights(), &[1.0 / 3.0, 1.0 / 3.0]));
        // Unclipped PA lands exactly on margin 1.
        assert!((m.margin(&x(&[(0, 1.0), (1, 1.0)])) - 1.0).abs() < 1e-12);
        // Ham x = (0, 2): margin 2/3 + 1/3 = 1, ℓ = 2, ‖x‖² = 4 + 1 = 5, τ = 0.4.
        let tau = m
            .passive_aggressive_update(&x(&[(1, 2.0)]), -1, 1.0)
            .unwrap();
        assert!((tau - 0.4).abs() < 1e-12);
        assert!(close(m.weights(), &[1.0 / 3.0, 1.0 / 3.0 - 0.8]));
        assert!((m.intercept() - (1.0 / 3.0 - 0.4)).abs() < 1e-12);
        assert!((m.margin(&x(&[(1, 2.0)])) + 1.0).abs() < 1e-12);
        // Already beyond margin 1: passive.
        assert_eq!(
            m.passive_aggressive_update(&x(&[(1, 2.0)]), -1, 1.0),
            Ok(0.0)
        );
    }

    #[test]
    fn pa1_step_is_clipped_at_c() {
        let mut m = OnlineLinear::new(2, 1.0);
        // τ = min(0.1, 1/3) = 0.1: w = (0.1, 0.1), w_b = 0.1, margin 0.3.
        let tau = m.passive_aggressive_update(&x(&[(0, 1.0), (1, 1.0)]), 1, 0.1);
        assert_eq!(tau, Ok(0.1));
        assert!((m.margin(&x(&[(0, 1.0), (1, 1.0)])) - 0.3).abs() < 1e-12);
    }

    #[test]
    fn without_bias_the_intercept_stays_zero() {
        let mut m = OnlineLinear::new(1, 0.0);
        // ℓ = 1, ‖x‖² = 4, τ = 0.25, w = −0.5.
        let tau = m
            .passive_aggressive_update(&x(&[(0, 2.0)]), -1, 10.0)
            .unwrap();
        assert_eq!(tau, 0.25);
        assert_eq!(m.weights(), &[-0.5]);
        assert_eq!(m.intercept(), 0.0);
        // Nothing to move: no step, no NaN.
        assert_eq!(m.passive_aggressive_update(&x(&[]), 1, 1.0), Ok(0.0));
        assert!(m.perceptron_update(&x(&[]), 1).unwrap());
        assert_eq!(m.weights(), &[-0.5]);
    }

    #[test]
    fn refused_updates_leave_the_model_unchanged() {
        let mut m = OnlineLinear::from_weights(vec![1.0, 2.0], 0.5, 2.0);
        assert_eq!(m.intercept(), 0.5);
        let before = m.clone();
        assert_eq!(
            m.perceptron_update(&x(&[(0, 1.0)]), 0),
            Err(OnlineError::BadLabel(0))
        );
        assert_eq!(
            m.passive_aggressive_update(&x(&[(0, 1.0), (2, 1.0)]), 1, 1.0),
            Err(OnlineError::IndexOutOfRange {
                index: 2,
                dimensions: 2
            })
        );
        assert_eq!(
            m.passive_aggressive_update(&x(&[(0, 1.0)]), 1, f64::NAN)
                .unwrap_err()
                .to_string(),
            "aggressiveness C must be finite and positive, got NaN"
        );
        assert_eq!(m, before);
    }
}
