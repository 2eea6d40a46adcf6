//! ROC analysis of a scored held-out set: the curve, its area, the operating point for a
//! false-positive budget, and the confusion table at a threshold.
//!
//! Conventions, fixed for the whole crate:
//! - spam is the positive class (`true` in label slices), ham the negative;
//! - a message is called spam when `score >= threshold`;
//! - the curve has one point per distinct score (ties are never split, since no threshold
//!   can separate equal scores), preceded by a point at threshold `+∞` where nothing is
//!   called spam. This matches `sklearn.metrics.roc_curve(..., drop_intermediate=False)`.
//!
//! Counts are kept as integers next to the rates so that the area and the
//! false-positive budget are decided on exact values, not on rounded fractions.

use super::eval_error::{EvalError, check_scored};

/// One point of a ROC curve, and the threshold that produces it.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct OperatingPoint {
    /// Call a message spam when its score is `>= threshold`. `+∞` means "never".
    pub threshold: f64,
    /// True-positive rate: share of spam called spam.
    pub tpr: f64,
    /// False-positive rate: share of ham called spam.
    pub fpr: f64,
    /// Spam messages called spam at this threshold.
    pub true_pos: u64,
    /// Ham messages called spam at this threshold.
    pub false_pos: u64,
}

/// A ROC curve, ordered by decreasing threshold (so by non-decreasing FPR and TPR).
#[derive(Debug, Clone, PartialEq)]
pub struct RocCurve {
    points: Vec<OperatingPoint>,
    positives: u64,
    negatives: u64,
}

/// The four counts of a binary decision at one threshold.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, serde::Serialize)]
pub struct Confusion {
    /// Spam called spam.
    pub true_pos: u64,
    /// Ham called spam: the costly mistake for a mail operator.
    pub false_pos: u64,
    /// Ham called ham.
    pub true_neg: u64,
    /// Spam called ham.
    pub false_neg: u64,
}

impl Confusion {
    /// Share of spam called spam; `None` when there is no spam.
    pub fn tpr(&self) -> Option<f64> {
        ratio(self.true_pos, self.true_pos + self.false_neg)
    }

    /// Share of ham called spam; `None` when there is no ham.
    pub fn fpr(&self) -> Option<f64> {
        ratio(self.false_pos, self.false_pos + self.true_neg)
    }

    /// Share of messages called spam that are spam; `None` when nothing is called spam.
    pub fn precision(&self) -> Option<f64> {
        ratio(self.true_pos, self.true_pos + self.false_pos)
    }
}

fn ratio(num: u64, den: u64) -> Option<f64> {
    (den > 0).then(|| num as f64 / den as f64)
}

impl RocCurve {
    /// Builds the curve from paired scores and labels (`true` = spam).
    ///
    /// # Errors
    /// [`EvalError::LengthMismatch`], [`EvalError::Empty`], [`EvalError::NonFiniteScore`]
    /// (NaN and ±∞ are refused), or [`EvalError::SingleClass`] when either class is absent.
    pub fn from_scores(scores: &[f64], positive: &[bool]) -> Result<Self, EvalError> {
        let (positives, negatives) = check_scored(scores, positive)?;
        let mut pairs: Vec<(f64, bool)> = scores
            .iter()
            .copied()
            .zip(positive.iter().copied())
            .collect();
        // Scores are finite here, so `partial_cmp` never fails. A stable ascending sort
        // walked backwards makes the reported threshold of a tie group the score of its
        // earliest member, which only matters for -0.0 against 0.0 and matches scikit-learn.
        pairs.sort_by(|a, b| a.0.partial_cmp(&b.0).unwrap_or(std::cmp::Ordering::Equal));
        pairs.reverse();

        let mut points = Vec::with_capacity(pairs.len() + 1);
        points.push(point(f64::INFINITY, 0, 0, positives, negatives));
        let (mut tp, mut fp) = (0u64, 0u64);
        for (i, &(score, is_spam)) in pairs.iter().enumerate() {
            if is_spam {
                tp += 1;
            } else {
                fp += 1;
            }
            let last_of_tie = pairs.get(i + 1).is_none_or(|next| next.0 != score);
            if last_of_tie {
                points.push(point(score, tp, fp, positives, negatives));
            }
        }
        Ok(Self {
            points,
            positives,
            negatives,
        })
    }

    /// The points, from threshold `+∞` (0, 0) down to the lowest score (1, 1).
    pub fn points(&self) -> &[OperatingPoint] {
        &self.points
    }

    /// Number of spam messages behind the curve.
    pub fn positives(&self) -> u64 {
        self.positives
    }

    /// Number of ham messages behind the curve.
    pub fn negatives(&self) -> u64 {
        self.negatives
    }

    /// Area under the curve by the trapezoidal rule, so a tie between a spam and a ham
    /// counts one half, as in `sklearn.metrics.roc_auc_score`.
    pub fn auc(&self) -> f64 {
        // Twice the area in units of one (spam, ham) pair is an integer; summing it exactly
        // leaves a single rounding at the final division.
        let twice_pairs: u128 = self
            .points
            .windows(2)
            .map(|w| {
                let dfp = u128::from(w[1].false_pos - w[0].false_pos);
                dfp * u128::from(w[1].true_pos + w[0].true_pos)
            })
            .sum();
        twice_pairs as f64 / (2.0 * self.positives as f64 * self.negatives as f64)
    }

    /// See [`tpr_at_fpr`].
    ///
    /// # Errors
    /// [`EvalError::InvalidTargetRate`] when `target_fpr` is NaN or outside [0, 1].
    pub fn tpr_at_fpr(&self, target_fpr: f64) -> Result<OperatingPoint, EvalError> {
        if !(0.0..=1.0).contains(&target_fpr) {
            return Err(EvalError::InvalidTargetRate(target_fpr));
        }
        // FPR never decreases along the curve, so the admissible points form a prefix, and
        // the first point (threshold +∞, FPR 0) is always in it.
        let admissible = self.points.partition_point(|p| p.fpr <= target_fpr);
        let prefix = self.points.get(..admissible).unwrap_or(&[]);
        let Some(best) = prefix.last() else {
            return Err(EvalError::InvalidTargetRate(target_fpr));
        };
        // Of the points with the best TPR, the first has the fewest false positives.
        let first_best = prefix.partition_point(|p| p.true_pos < best.true_pos);
        Ok(prefix.get(first_best).copied().unwrap_or(*best))
    }

    /// Confusion table when messages with `score >= threshold` are called spam. A NaN
    /// threshold calls nothing spam, as every comparison with NaN is false.
    pub fn confusion_at(&self, threshold: f64) -> Confusion {
        let reached = self.points.partition_point(|p| p.threshold >= threshold);
        let (tp, fp) = match reached.checked_sub(1).and_then(|i| self.points.get(i)) {
            Some(p) => (p.true_pos, p.false_pos),
            None => (0, 0),
        };
        Confusion {
            true_pos: tp,
            false_pos: fp,
            true_neg: self.negatives - fp,
            false_neg: self.positives - tp,
        }
    }
}

fn point(threshold: f64, tp: u64, fp: u64, positives: u64, negatives: u64) -> OperatingPoint {
    OperatingPoint {
        threshold,
        tpr: tp as f64 / positives as f64,
        fpr: fp as f64 / negatives as f64,
        true_pos: tp,
        false_pos: fp,
    }
}

/// The ROC curve of `scores` against `positive` (`true` = spam); see [`RocCurve::from_scores`].
///
/// # Errors
/// As [`RocCurve::from_scores`].
pub fn roc_curve(scores: &[f64], positive: &[bool]) -> Result<RocCurve, EvalError> {
    RocCurve::from_scores(scores, positive)
}

/// Area under the ROC curve: the probability that a random spam scores above a random ham,
/// ties counting one half. Equals `sklearn.metrics.roc_auc_score` including ties.
///
/// # Errors
/// As [`RocCurve::from_scores`]; in particular a single-class input is an error, not NaN.
pub fn roc_auc(scores: &[f64], positive: &[bool]) -> Result<f64, EvalError> {
    Ok(RocCurve::from_scores(scores, positive)?.auc())
}

/// The operating point with the highest TPR whose FPR is at most `target_fpr`; among
/// equal TPRs the one with the fewest false positives (the highest threshold). Call a
/// message spam when `score >= point.threshold`; a threshold of `+∞` means no threshold
/// meets the budget with any spam caught.
///
/// # Errors
/// [`EvalError::InvalidTargetRate`] when `target_fpr` is NaN or outside [0, 1].
pub fn tpr_at_fpr(curve: &RocCurve, target_fpr: f64) -> Result<OperatingPoint, EvalError> {
    curve.tpr_at_fpr(target_fpr)
}

/// Confusion table when messages with `score >= threshold` are called spam, counted
/// directly from the scores. Unlike the curve, one class may be absent here.
///
/// # Errors
/// [`EvalError::LengthMismatch`] or [`EvalError::NonFiniteScore`]; an empty input gives
/// an all-zero table.
pub fn confusion_table(
    scores: &[f64],
    positive: &[bool],
    threshold: f64,
) -> Result<Confusion, EvalError> {
    if scores.len() != positive.len() {
        return Err(EvalError::LengthMismatch {
            scores: scores.len(),
            labels: positive.len(),
        });
    }
    let mut table = Confusion::default();
    for (index, (&score, &is_spam)) in scores.iter().zip(positive).enumerate() {
        if !score.is_finite() {
            return Err(EvalError::NonFiniteScore {
                index,
                value: score,
            });
        }
        match (score >= threshold, is_spam) {
            (true, true) => table.true_pos += 1,
            (true, false) => table.false_pos += 1,
            (false, true) => table.false_neg += 1,
            (false, false) => table.true_neg += 1,
        }
    }
    Ok(table)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::train::eval_error::Class;

    #[test]
    fn ties_between_classes_count_one_half() {
        // Derived by hand: one spam and one ham with the same score form one pair that
        // is neither won nor lost.
        assert_eq!(roc_auc(&[0.5, 0.5], &[true, false]), Ok(0.5));
        // Pairs (spam, ham): (0.9,0.1) won, (0.9,0.4) won, (0.4,0.1) won, (0.4,0.4) tie → 3.5/4.
        let auc = roc_auc(&[0.9, 0.4, 0.4, 0.1], &[true, true, false, false]);
        assert_eq!(auc, Ok(0.875));
    }

    #[test]
    fn one_point_per_distinct_score() {
        let curve = roc_curve(&[0.2, 0.8, 0.8, 0.5], &[false, true, false, true]).unwrap();
        let thresholds: Vec<f64> = curve.points().iter().map(|p| p.threshold).collect();
        assert_eq!(thresholds, vec![f64::INFINITY, 0.8, 0.5, 0.2]);
        let last = curve.points().last().unwrap();
        assert_eq!((last.tpr, last.fpr), (1.0, 1.0));
    }

    #[test]
    fn bad_input_is_reported_not_panicked() {
        assert_eq!(roc_auc(&[], &[]), Err(EvalError::Empty));
        assert_eq!(
            roc_auc(&[1.0, 2.0], &[true, true]),
            Err(EvalError::SingleClass {
                missing: Class::Ham
            })
        );
        assert_eq!(
            roc_auc(&[1.0], &[false]),
            Err(EvalError::SingleClass {
                missing: Class::Spam
            })
        );
        assert!(matches!(
            roc_auc(&[1.0, f64::NAN], &[true, false]),
            Err(EvalError::NonFiniteScore { index: 1, .. })
        ));
        assert!(matches!(
            roc_auc(&[1.0, 2.0], &[true]),
            Err(EvalError::LengthMismatch {
                scores: 2,
                labels: 1
            })
        ));
        let curve = roc_curve(&[1.0, 2.0], &[false, true]).unwrap();
        assert!(curve.tpr_at_fpr(f64::NAN).is_err());
        assert!(curve.tpr_at_fpr(-0.1).is_err());
        assert_eq!(curve.confusion_at(f64::NAN).true_pos, 0);
    }

    #[test]
    fn operating_point_respects_the_false_positive_budget() {
        // Ham at 0.1..=0.9 (nine), spam at 0.55, 0.95, 0.97. With no false positive allowed
        // the best is threshold 0.95 (two spam); with one in nine, 0.9 adds a ham but no spam,
        // so the cheaper 0.95 is kept.
        let mut scores: Vec<f64> = (1..=9).map(|i| f64::from(i) / 10.0).collect();
        let mut labels = vec![false; 9];
        scores.extend([0.55, 0.95, 0.97]);
        labels.extend([true, true, true]);
        let curve = roc_curve(&scores, &labels).unwrap();
        let zero = curve.tpr_at_fpr(0.0).unwrap();
        assert_eq!(
            (zero.threshold, zero.true_pos, zero.false_pos),
            (0.95, 2, 0)
        );
        let one = curve.tpr_at_fpr(1.0 / 9.0).unwrap();
        assert_eq!((one.threshold, one.true_pos, one.false_pos), (0.95, 2, 0));
        let five = curve.tpr_at_fpr(5.0 / 9.0).unwrap();
        assert_eq!(
            (five.threshold, five.true_pos, five.false_pos),
            (0.55, 3, 4)
        );
        let direct = confusion_table(&scores, &labels, five.threshold).unwrap();
        assert_eq!(direct, curve.confusion_at(five.threshold));
        assert_eq!(direct.fpr(), Some(4.0 / 9.0));
    }
}
