//! Platt scaling: turns a linear model's margin into a probability of spam,
//! `P(spam | f) = 1 / (1 + exp(A·f + B))`.
//!
//! The fit is Platt (1999), "Probabilistic outputs for support vector machines and
//! comparisons to regularized likelihood methods", with its smoothed targets, solved by the
//! Newton method with backtracking line search of Lin, Lin & Weng (2007), "A note on Platt's
//! probabilistic outputs for support vector machines", Algorithm 1. That variant never
//! evaluates `exp` of a large positive number, so margins of any size are safe.
//!
//! The margins should come from data the model was not trained on (a held-out split or
//! cross-validation), otherwise the fitted sigmoid is over-confident.

use super::eval_error::{EvalError, check_scored};

// Solver constants of Lin, Lin & Weng (2007), Algorithm 1 (from memory).
const MAX_ITERATIONS: u32 = 100;
const MIN_STEP: f64 = 1e-10;
/// Added to the Hessian diagonal so the Newton system stays solvable when all margins agree.
const HESSIAN_RIDGE: f64 = 1e-12;
const GRADIENT_TOLERANCE: f64 = 1e-5;
/// Armijo sufficient-decrease factor.
const SUFFICIENT_DECREASE: f64 = 1e-4;

/// A fitted sigmoid `P(spam | f) = 1 / (1 + exp(a·f + b))`.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Platt {
    a: f64,
    b: f64,
    iterations: u32,
    converged: bool,
}

impl Platt {
    /// Builds a sigmoid from known parameters, for example read back from a model file.
    /// Returns `None` when either parameter is not finite.
    pub fn from_parameters(a: f64, b: f64) -> Option<Self> {
        (a.is_finite() && b.is_finite()).then_some(Self {
            a,
            b,
            iterations: 0,
            converged: true,
        })
    }

    /// Slope `A`; negative when higher margins mean more likely spam, as they should.
    pub fn a(&self) -> f64 {
        self.a
    }

    /// Offset `B`.
    pub fn b(&self) -> f64 {
        self.b
    }

    /// Newton iterations the fit took (0 for [`Platt::from_parameters`]).
    pub fn iterations(&self) -> u32 {
        self.iterations
    }

    /// Whether the fit met the gradient tolerance. When it did not (iteration limit or a
    /// failed line search), the parameters are still the best found and usable, but a
    /// caller may want to log it.
    pub fn converged(&self) -> bool {
        self.converged
    }

    /// Probability of spam for `margin`. Never overflows: for `|a·margin + b|` beyond about
    /// 745 the result is exactly 0 or 1. A NaN margin gives NaN.
    pub fn probability(&self, margin: f64) -> f64 {
        let z = self.a * margin + self.b;
        if z >= 0.0 {
            let e = (-z).exp();
            e / (1.0 + e)
        } else {
            1.0 / (1.0 + z.exp())
        }
    }
}

/// `log(1 + exp(-|z|))`, the part of the logistic loss that cannot overflow.
fn log1p_exp_neg_abs(z: f64) -> f64 {
    (-z.abs()).exp().ln_1p()
}

/// Cross-entropy of targets `t` against `p_i = 1 / (1 + exp(a f_i + b))`, written so that
/// `exp` only ever sees a non-positive argument.
fn objective(margins: &[f64], targets: &[f64], a: f64, b: f64) -> f64 {
    margins
        .iter()
        .zip(targets)
        .map(|(&f, &t)| {
            let z = f * a + b;
            if z >= 0.0 {
                t * z + log1p_exp_neg_abs(z)
            } else {
                (t - 1.0) * z + log1p_exp_neg_abs(z)
            }
        })
        .sum()
}

/// Fits Platt's sigmoid to held-out `margins` with labels `positive` (`true` = spam).
///
/// Targets are smoothed as in Platt (1999): spam `(N₊ + 1) / (N₊ + 2)`, ham `1 / (N₋ + 2)`,
/// which keeps separable data from driving `A` to infinity.
///
/// # Errors
/// [`EvalError::LengthMismatch`], [`EvalError::Empty`], [`EvalError::NonFiniteScore`], or
/// [`EvalError::SingleClass`]: a sigmoid fitted to one class says nothing about the other.
pub fn fit_platt(margins: &[f64], positive: &[bool]) -> Result<Platt, EvalError> {
    let (spam, ham) = check_scored(margins, positive)?;
    let (spam, ham) = (spam as f64, ham as f64);
    let hi = (spam + 1.0) / (spam + 2.0);
    let lo = 1.0 / (ham + 2.0);
    let targets: Vec<f64> = positive.iter().map(|&p| if p { hi } else { lo }).collect();

    // Start from the smoothed prior: every margin mapped to the base rate of spam.
    let mut a = 0.0;
    let mut b = ((ham + 1.0) / (spam + 1.0)).ln();
    let mut value = objective(margins, &targets, a, b);
    let mut iterations = 0;
    let mut converged = false;

    while iterations < MAX_ITERATIONS {
        let (mut h11, mut h22, mut h21) = (HESSIAN_RIDGE, HESSIAN_RIDGE, 0.0);
        let (mut g1, mut g2) = (0.0, 0.0);
        for (&f, &t) in margins.iter().zip(&targets) {
            let z = f * a + b;
            // p = 1/(1+e^z), q = 1-p, each from the side where exp cannot overflow.
            let (p, q) = if z >= 0.0 {
                let e = (-z).exp();
                (e / (1.0 + e), 1.0 / (1.0 + e))
            } else {
                let e = z.exp();
                (1.0 / (1.0 + e), e / (1.0 + e))
            };
            let d2 = p * q;
            h11 += f * f * d2;
            h22 += d2;
            h21 += f * d2;
            let d1 = t - p;
            g1 += f * d1;
            g2 += d1;
        }
        if g1.abs() < GRADIENT_TOLERANCE && g2.abs() < GRADIENT_TOLERANCE {
            converged = true;
            break;
        }
        iterations += 1;

        let det = h11 * h22 - h21 * h21;
        if !(det.is_finite() && det > 0.0) {
            // The ridge keeps the exact determinant positive; only rounding can get here,
            // and then no Newton step is trustworthy.
            break;
        }
        let da = -(h22 * g1 - h21 * g2) / det;
        let db = -(-h21 * g1 + h11 * g2) / det;
        let slope = g1 * da + g2 * db;

        let mut step = 1.0;
        let mut accepted = false;
        while step >= MIN_STEP {
            let (na, nb) = (a + step * da, b + step * db);
            let new_value = objective(margins, &targets, na, nb);
            if new_value < value + SUFFICIENT_DECREASE * step * slope {
                (a, b, value) = (na, nb, new_value);
                accepted = true;
                break;
            }
            step /= 2.0;
        }
        if !accepted {
            // Happens when the optimum is already met to rounding precision.
            break;
        }
    }

    Ok(Platt {
        a,
        b,
        iterations,
        converged,
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::train::eval_error::Class;

    #[test]
    fn probability_is_stable_for_huge_margins() {
        let platt = Platt::from_parameters(-2.0, 0.5).unwrap();
        assert_eq!(platt.probability(1e6), 1.0);
        assert_eq!(platt.probability(-1e6), 0.0);
        assert_eq!(platt.probability(f64::MAX), 1.0);
        assert!(platt.probability(f64::NAN).is_nan());
        // Derived by hand: a·f + b = 0 at f = 0.25.
        assert_eq!(platt.probability(0.25), 0.5);
    }

    #[test]
    fn separable_data_gives_a_finite_decreasing_sigmoid() {
        let margins = [-3.0, -2.0, -1.5, 1.0, 2.0, 4.0];
        let labels = [false, false, false, true, true, true];
        let platt = fit_platt(&margins, &labels).unwrap();
        assert!(platt.a().is_finite() && platt.a() < 0.0);
        assert!(platt.converged());
        // Target smoothing caps the fitted probability below 1 on the training margins.
        assert!(platt.probability(4.0) < 1.0);
        assert!(platt.probability(-3.0) > 0.0);
    }

    #[test]
    fn huge_margins_do_not_overflow_the_fit() {
        let margins = [-1e300, -5e299, 1e300, 7e299, -1.0, 2.0];
        let labels = [false, false, true, true, true, false];
        let platt = fit_platt(&margins, &labels).unwrap();
        assert!(platt.a().is_finite() && platt.b().is_finite());
    }

    #[test]
    fn bad_input_is_reported() {
        assert_eq!(fit_platt(&[], &[]), Err(EvalError::Empty));
        assert_eq!(
            fit_platt(&[1.0, 2.0], &[false, false]),
            Err(EvalError::SingleClass {
                missing: Class::Spam
            })
        );
        assert!(matches!(
            fit_platt(&[f64::INFINITY, 2.0], &[true, false]),
            Err(EvalError::NonFiniteScore { index: 0, .. })
        ));
        assert!(Platt::from_parameters(f64::NAN, 0.0).is_none());
    }
}
