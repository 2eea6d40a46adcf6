//! Errors shared by the evaluation and calibration code: ROC analysis, Platt scaling and
//! binomial confidence intervals.
//!
//! Every function in these modules reports bad input through [`EvalError`] instead of
//! panicking, so a malformed held-out set (one class only, a NaN margin from a broken model)
//! stops a training run with a message that says what to fix.

use std::fmt;

/// One of the two classes of a labelled message.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Class {
    /// Junk mail, the positive class (`true` in label slices).
    Spam,
    /// Legitimate mail, the negative class (`false` in label slices).
    Ham,
}

impl fmt::Display for Class {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(match self {
            Class::Spam => "spam (positive)",
            Class::Ham => "ham (negative)",
        })
    }
}

/// Why an evaluation or calibration could not be computed.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum EvalError {
    /// No scores were given at all.
    #[error("no scores to evaluate: the input is empty")]
    Empty,
    /// Scores and labels differ in length, so they cannot be paired.
    #[error("{scores} scores but {labels} labels: each score needs exactly one label")]
    LengthMismatch {
        /// Number of scores given.
        scores: usize,
        /// Number of labels given.
        labels: usize,
    },
    /// Every label belongs to one class, so rates for the other class are undefined.
    #[error("no {missing} examples: ROC analysis and calibration need both classes")]
    SingleClass {
        /// The class with no examples.
        missing: Class,
    },
    /// A score is NaN or infinite; ordering by score would be meaningless.
    #[error("score at index {index} is not a finite number ({value})")]
    NonFiniteScore {
        /// Position of the first offending score.
        index: usize,
        /// The offending value.
        value: f64,
    },
    /// A requested false-positive rate is NaN or outside [0, 1].
    #[error("target false-positive rate {0} is not in [0, 1]")]
    InvalidTargetRate(f64),
    /// A binomial interval was asked for with zero trials.
    #[error("no trials: a binomial proportion needs at least one trial")]
    NoTrials,
    /// More successes than trials.
    #[error("{successes} successes out of only {trials} trials")]
    SuccessesExceedTrials {
        /// Successes given.
        successes: u64,
        /// Trials given.
        trials: u64,
    },
    /// A confidence level is NaN or outside the open interval (0, 1).
    #[error("confidence level {0} is not strictly between 0 and 1")]
    InvalidConfidence(f64),
}

/// Checks the common preconditions of score/label input: equal lengths, not empty, every
/// score finite, both classes present. Returns the number of positives and negatives.
pub(crate) fn check_scored(scores: &[f64], positive: &[bool]) -> Result<(u64, u64), EvalError> {
    if scores.len() != positive.len() {
        return Err(EvalError::LengthMismatch {
            scores: scores.len(),
            labels: positive.len(),
        });
    }
    if scores.is_empty() {
        return Err(EvalError::Empty);
    }
    if let Some((index, &value)) = scores.iter().enumerate().find(|(_, s)| !s.is_finite()) {
        return Err(EvalError::NonFiniteScore { index, value });
    }
    let spam = positive.iter().filter(|&&p| p).count() as u64;
    let ham = positive.len() as u64 - spam;
    if spam == 0 {
        return Err(EvalError::SingleClass {
            missing: Class::Spam,
        });
    }
    if ham == 0 {
        return Err(EvalError::SingleClass {
            missing: Class::Ham,
        });
    }
    Ok((spam, ham))
}
