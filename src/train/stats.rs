//! Exact binomial confidence intervals (Clopper–Pearson), built on the regularized
//! incomplete beta function and its inverse implemented here.
//!
//! A mail operator reads a measured false-positive rate such as "3 in 40 000" together with
//! its upper bound: the interval says how far the true rate may be from the count seen.
//!
//! Accuracy: the incomplete beta function is evaluated with Lentz's method on the
//! classical continued fraction, with the `x^a (1-x)^b / B(a, b)` prefactor computed from a
//! Stirling-series form that avoids the cancellation of `ln Γ` differences for large
//! arguments; quantiles are found by Newton's method inside a shrinking bracket. Relative
//! errors are around 1e-13 or better for parameters up to about 1e6.

use super::eval_error::EvalError;

/// Largest number of continued-fraction terms; convergence takes about `sqrt(max(a, b))`.
const MAX_CF_TERMS: u32 = 100_000;
/// Smallest magnitude allowed in a Lentz denominator, to step around an exact zero.
const TINY: f64 = 1e-300;
const HALF_LN_TWO_PI: f64 = 0.918_938_533_204_672_8;

/// `ln Γ(z) - [(z - ½) ln z - z + ½ ln 2π]`, the remainder of Stirling's formula.
fn stirling_remainder(z: f64) -> f64 {
    if z >= 10.0 {
        // Stirling series: B₂ₖ / (2k (2k-1) z^(2k-1)), Bernoulli numbers B₂..B₁₄. Seven
        // terms leave an error below 1e-17 at z = 10.
        let r = 1.0 / (z * z);
        (1.0 / 12.0
            + r * (-1.0 / 360.0
                + r * (1.0 / 1260.0
                    + r * (-1.0 / 1680.0
                        + r * (1.0 / 1188.0 + r * (-691.0 / 360_360.0 + r * (1.0 / 156.0)))))))
            / z
    } else {
        ln_gamma(z) - stirling_main(z)
    }
}

fn stirling_main(z: f64) -> f64 {
    (z - 0.5) * z.ln() - z + HALF_LN_TWO_PI
}

/// `ln Γ(z)` for `z > 0`: Stirling's series, after shifting small arguments up with
/// `Γ(z) = Γ(z + n) / (z (z+1) … (z+n-1))`.
fn ln_gamma(z: f64) -> f64 {
    if z >= 10.0 {
        return stirling_main(z) + stirling_remainder(z);
    }
    let mut shifted = z;
    let mut product = 1.0;
    while shifted < 10.0 {
        product *= shifted;
        shifted += 1.0;
    }
    stirling_main(shifted) + stirling_remainder(shifted) - product.ln()
}

/// `ln [x^a (1-x)^b / B(a, b)]`.
///
/// Near the mode, the direct form `a ln x + b ln(1-x) - ln B(a, b)` subtracts numbers of
/// size `a + b` to get a result of size 1, losing digits as the parameters grow. Writing
/// `ln B` with Stirling's formula and `d = x (a+b) - a` gives instead
/// `a ln(1 + d/a) + b ln(1 - d/b) + ½ ln(ab / (2π(a+b))) - Δ` with only small terms.
fn ln_beta_prefactor(a: f64, b: f64, x: f64) -> f64 {
    let sum = a + b;
    let d = x.mul_add(sum, -a);
    let term_a = if (d / a).abs() < 0.5 {
        a * (d / a).ln_1p()
    } else {
        a * (x.ln() + (b / a).ln_1p())
    };
    let term_b = if (d / b).abs() < 0.5 {
        b * (-d / b).ln_1p()
    } else {
        b * ((-x).ln_1p() + (a / b).ln_1p())
    };
    let remainder = stirling_remainder(a) + stirling_remainder(b) - stirling_remainder(sum);
    term_a + term_b + 0.5 * (a.ln() + b.ln() - sum.ln()) - HALF_LN_TWO_PI - remainder
}

/// Continued fraction for `I_x(a, b)` (converges fast for `x < (a+1)/(a+b+2)`), evaluated
/// by the modified Lentz method.
fn beta_continued_fraction(a: f64, b: f64, x: f64) -> f64 {
    let guard = |v: f64| if v.abs() < TINY { TINY } else { v };
    let (sum, a_plus, a_minus) = (a + b, a + 1.0, a - 1.0);
    let mut c = 1.0;
    let mut d = 1.0 / guard(1.0 - sum * x / a_plus);
    let mut h = d;
    for m in 1..=MAX_CF_TERMS {
        let m = f64::from(m);
        let m2 = 2.0 * m;
        let even = m * (b - m) * x / ((a_minus + m2) * (a + m2));
        d = 1.0 / guard(1.0 + even * d);
        c = guard(1.0 + even / c);
        h *= d * c;
        let odd = -(a + m) * (sum + m) * x / ((a + m2) * (a_plus + m2));
        d = 1.0 / guard(1.0 + odd * d);
        c = guard(1.0 + odd / c);
        let delta = d * c;
        h *= delta;
        if (delta - 1.0).abs() <= f64::EPSILON {
            break;
        }
    }
    h
}

/// `(I_x(a, b), 1 - I_x(a, b))`, each computed directly so that a small tail keeps its
/// relative accuracy. Arguments must be valid (checked by callers).
fn beta_inc_pair(a: f64, b: f64, x: f64) -> (f64, f64) {
    if x <= 0.0 {
        return (0.0, 1.0);
    }
    if x >= 1.0 {
        return (1.0, 0.0);
    }
    let prefactor = ln_beta_prefactor(a, b, x).exp();
    if x < (a + 1.0) / (a + b + 2.0) {
        let lower = (prefactor * beta_continued_fraction(a, b, x) / a).clamp(0.0, 1.0);
        (lower, 1.0 - lower)
    } else {
        let upper = upper_tail_small_integer_a(a, b, x)
            .unwrap_or_else(|| prefactor * beta_continued_fraction(b, a, 1.0 - x) / b)
            .clamp(0.0, 1.0);
        (1.0 - upper, upper)
    }
}

/// Largest integer `a` for which [`upper_tail_small_integer_a`] sums its finite series.
const MAX_FINITE_SERIES: f64 = 200.0;

/// `1 - I_x(a, b)` for integer `a`, as the finite sum `(1-x)^b Σ_{j<a} (b)_j x^j / j!`.
///
/// The continued fraction is evaluated at `1 - x` in this region; when `a` is small and `b`
/// large the answer sits at a small `x`, and rounding `1 - x` costs up to `1e-16 / x` of
/// relative accuracy (about 1e-12 for the upper Clopper–Pearson bound of 1 in 100 000).
/// The sum has only positive terms and uses `x` itself. `None` when it does not apply or
/// its terms leave the floating-point range.
fn upper_tail_small_integer_a(a: f64, b: f64, x: f64) -> Option<f64> {
    if a.fract() != 0.0 || a > MAX_FINITE_SERIES {
        return None;
    }
    let mut term = 1.0;
    let mut sum = 1.0;
    let mut j = 0.0;
    while j + 1.0 < a {
        term *= (b + j) / (j + 1.0) * x;
        sum += term;
        j += 1.0;
    }
    let value = (b * (-x).ln_1p() + sum.ln()).exp();
    value.is_finite().then_some(value)
}

fn valid_shape(a: f64, b: f64) -> bool {
    a.is_finite() && b.is_finite() && a > 0.0 && b > 0.0
}

/// The regularized incomplete beta function `I_x(a, b)`, the distribution function of
/// Beta(a, b) at `x`. `None` unless `a > 0`, `b > 0` (finite) and `0 ≤ x ≤ 1`.
pub fn regularized_incomplete_beta(x: f64, a: f64, b: f64) -> Option<f64> {
    (valid_shape(a, b) && (0.0..=1.0).contains(&x)).then(|| beta_inc_pair(a, b, x).0)
}

/// The `p` quantile of Beta(a, b): the `x` with `I_x(a, b) = p`. `None` unless `a > 0`,
/// `b > 0` (finite) and `0 ≤ p ≤ 1`.
pub fn beta_quantile(p: f64, a: f64, b: f64) -> Option<f64> {
    if !(valid_shape(a, b) && (0.0..=1.0).contains(&p)) {
        return None;
    }
    Some(if p <= 0.5 {
        solve_beta(Tail::Lower(p), a, b)
    } else {
        solve_beta(Tail::Upper(1.0 - p), a, b)
    })
}

/// Which tail probability a quantile search matches; the smaller tail is always given, so
/// no accuracy is lost to `1 - p` near 1.
#[derive(Clone, Copy)]
enum Tail {
    /// `I_x(a, b) = p`.
    Lower(f64),
    /// `1 - I_x(a, b) = q`.
    Upper(f64),
}

fn solve_beta(tail: Tail, a: f64, b: f64) -> f64 {
    match tail {
        Tail::Lower(p) if p <= 0.0 => return 0.0,
        Tail::Upper(q) if q <= 0.0 => return 1.0,
        Tail::Lower(p) if p >= 1.0 => return 1.0,
        Tail::Upper(q) if q >= 1.0 => return 0.0,
        _ => {}
    }
    // `excess(x)` is increasing in x and zero at the quantile.
    let excess = |x: f64| {
        let (lower, upper) = beta_inc_pair(a, b, x);
        match tail {
            Tail::Lower(p) => lower - p,
            Tail::Upper(q) => q - upper,
        }
    };
    let (mut lo, mut hi) = (0.0_f64, 1.0_f64);
    let mut x = initial_guess(tail, a, b).clamp(f64::MIN_POSITIVE, 1.0 - f64::EPSILON);
    for _ in 0..400 {
        let g = excess(x);
        if g == 0.0 {
            return x;
        }
        if g < 0.0 {
            lo = x;
        } else {
            hi = x;
        }
        let log_density = ln_beta_prefactor(a, b, x) - x.ln() - (-x).ln_1p();
        let newton = x - g / log_density.exp();
        let next = if newton > lo && newton < hi && newton.is_finite() {
            newton
        } else if lo > 0.0 && hi / lo > 16.0 {
            // The quantile may be many orders of magnitude below the bracket top; halving
            // the exponent gets there in logarithmically many steps.
            (lo * hi).sqrt()
        } else if lo == 0.0 {
            hi / 16.0
        } else {
            0.5 * (lo + hi)
        };
        let settled = (next - x).abs() <= 2.0 * f64::EPSILON * x.max(next)
            || hi - lo <= 2.0 * f64::EPSILON * hi;
        x = next;
        if settled {
            break;
        }
    }
    x
}

/// A starting point for Newton's method. Its accuracy only affects speed: the bracketed
/// search converges from any start. Formulas from Abramowitz & Stegun 26.2.22 (normal
/// quantile) and 26.5.22 (beta quantile for a, b ≥ 1), constants from memory.
fn initial_guess(tail: Tail, a: f64, b: f64) -> f64 {
    let (small, lower_tail) = match tail {
        Tail::Lower(p) => (p, true),
        Tail::Upper(q) => (q, false),
    };
    if a >= 1.0 && b >= 1.0 {
        let t = (-2.0 * small.ln()).sqrt();
        let mut z = (2.30753 + t * 0.27061) / (1.0 + t * (0.99229 + t * 0.04481)) - t;
        if !lower_tail {
            z = -z;
        }
        let al = (z * z - 3.0) / 6.0;
        let h = 2.0 / (1.0 / (2.0 * a - 1.0) + 1.0 / (2.0 * b - 1.0));
        let w = z * (al + h).sqrt() / h
            - (1.0 / (2.0 * b - 1.0) - 1.0 / (2.0 * a - 1.0)) * (al + 5.0 / 6.0 - 2.0 / (3.0 * h));
        let guess = a / (a + b * (2.0 * w).exp());
        if guess.is_finite() {
            return guess;
        }
    }
    let mean = a / (a + b);
    if mean.is_finite() { mean } else { 0.5 }
}

fn check_counts(successes: u64, trials: u64, confidence: f64) -> Result<(), EvalError> {
    if trials == 0 {
        return Err(EvalError::NoTrials);
    }
    if successes > trials {
        return Err(EvalError::SuccessesExceedTrials { successes, trials });
    }
    if !(confidence > 0.0 && confidence < 1.0) {
        return Err(EvalError::InvalidConfidence(confidence));
    }
    Ok(())
}

/// Two-sided Clopper–Pearson interval `(lower, upper)` for a binomial proportion after
/// `successes` out of `trials`, at `confidence` (for example 0.95): each side leaves
/// `(1 - confidence) / 2` outside. Exact (beta quantiles), hence conservative.
///
/// `lower` is 0 when `successes == 0` and `upper` is 1 when `successes == trials`.
///
/// Never fails: on input that admits no interval (zero trials, more successes than
/// trials, a confidence not strictly between 0 and 1) it returns the uninformative
/// `(0.0, 1.0)`, so a threshold tuned on it is refused rather than accepted. Use
/// [`try_clopper_pearson`] to get the reason instead.
pub fn clopper_pearson(successes: u64, trials: u64, confidence: f64) -> (f64, f64) {
    try_clopper_pearson(successes, trials, confidence).unwrap_or((0.0, 1.0))
}

/// One-sided Clopper–Pearson upper bound: the rate `u` with
/// `P(true rate ≤ u) ≥ confidence`, all of `1 - confidence` left above it. This is the
/// bound to quote for "the false-positive rate is at most u with 95 % confidence"; it is
/// lower than the upper end of [`clopper_pearson`] at the same confidence, which leaves
/// only half of `1 - confidence` above. It is 1 when `successes == trials`.
///
/// Never fails: on invalid input (see [`clopper_pearson`]) it returns the uninformative
/// 1.0. Use [`try_clopper_pearson_upper`] to get the reason instead.
pub fn clopper_pearson_upper(successes: u64, trials: u64, confidence: f64) -> f64 {
    try_clopper_pearson_upper(successes, trials, confidence).unwrap_or(1.0)
}

/// [`clopper_pearson`], reporting invalid input as an error.
///
/// # Errors
/// [`EvalError::NoTrials`], [`EvalError::SuccessesExceedTrials`], or
/// [`EvalError::InvalidConfidence`] unless `0 < confidence < 1`.
pub fn try_clopper_pearson(
    successes: u64,
    trials: u64,
    confidence: f64,
) -> Result<(f64, f64), EvalError> {
    check_counts(successes, trials, confidence)?;
    let tail = (1.0 - confidence) / 2.0;
    let (k, n) = (successes as f64, trials as f64);
    let lower = if successes == 0 {
        0.0
    } else {
        solve_beta(Tail::Lower(tail), k, n - k + 1.0)
    };
    Ok((lower, upper_bound(successes, trials, tail)))
}

/// [`clopper_pearson_upper`], reporting invalid input as an error.
///
/// # Errors
/// As [`try_clopper_pearson`].
pub fn try_clopper_pearson_upper(
    successes: u64,
    trials: u64,
    confidence: f64,
) -> Result<f64, EvalError> {
    check_counts(successes, trials, confidence)?;
    Ok(upper_bound(successes, trials, 1.0 - confidence))
}

fn upper_bound(successes: u64, trials: u64, tail: f64) -> f64 {
    if successes == trials {
        return 1.0;
    }
    let (k, n) = (successes as f64, trials as f64);
    solve_beta(Tail::Upper(tail), k + 1.0, n - k)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn ln_gamma_matches_factorials() {
        // Γ(n) = (n-1)!, exact integers.
        let mut factorial = 1.0_f64;
        for n in 1..=30 {
            let expected = factorial.ln();
            let got = ln_gamma(f64::from(n));
            assert!(
                (got - expected).abs() <= 1e-14 * expected.abs().max(1.0),
                "n={n}"
            );
            factorial *= f64::from(n);
        }
        // Γ(½) = √π. The shift to z ≥ 10 subtracts two logarithms near 14, so a few units
        // in the last place of those are the expected error.
        let half = ln_gamma(0.5) - 0.5 * std::f64::consts::PI.ln();
        assert!(half.abs() < 4e-15, "{half:e}");
    }

    #[test]
    fn closed_forms_of_the_incomplete_beta() {
        // I_x(1, b) = 1 - (1-x)^b and I_x(a, 1) = x^a, by direct integration.
        for &x in &[1e-9, 0.01, 0.3, 0.5, 0.9, 0.999] {
            for &s in &[1.0, 2.5, 40.0, 1e4] {
                let f: f64 = x;
                let one_b = regularized_incomplete_beta(x, 1.0, s).unwrap();
                let expected = -(s * (-f).ln_1p()).exp_m1();
                assert!((one_b - expected).abs() <= 1e-13 * expected, "x={x} b={s}");
                let a_one = regularized_incomplete_beta(x, s, 1.0).unwrap();
                let expected = f.powf(s);
                assert!(
                    (a_one - expected).abs() <= 1e-13 * expected + 1e-300,
                    "x={x} a={s}"
                );
            }
        }
    }

    #[test]
    fn quantile_inverts_the_distribution() {
        for &(a, b) in &[
            (1.0, 1.0),
            (3.0, 7.0),
            (0.5, 0.5),
            (1.0, 100_000.0),
            (5e4, 5e4),
        ] {
            for &p in &[1e-10, 0.005, 0.025, 0.5, 0.975, 0.995] {
                let x = beta_quantile(p, a, b).unwrap();
                let back = regularized_incomplete_beta(x, a, b).unwrap();
                assert!(
                    (back - p).abs() <= 1e-11 * p.min(1.0 - p).max(1e-3),
                    "a={a} b={b} p={p}"
                );
            }
        }
    }

    #[test]
    fn invalid_arguments_are_refused() {
        assert_eq!(try_clopper_pearson(1, 0, 0.95), Err(EvalError::NoTrials));
        assert_eq!(
            try_clopper_pearson(5, 4, 0.95),
            Err(EvalError::SuccessesExceedTrials {
                successes: 5,
                trials: 4
            })
        );
        assert!(try_clopper_pearson(1, 4, 1.0).is_err());
        assert!(try_clopper_pearson_upper(1, 4, f64::NAN).is_err());
        // The infallible forms fall back to the interval that claims nothing.
        assert_eq!(clopper_pearson(1, 0, 0.95), (0.0, 1.0));
        assert_eq!(clopper_pearson_upper(1, 4, f64::NAN), 1.0);
        assert_eq!(beta_quantile(0.5, -1.0, 1.0), None);
        assert_eq!(regularized_incomplete_beta(1.5, 1.0, 1.0), None);
    }

    #[test]
    fn edges_are_exact() {
        assert_eq!(clopper_pearson(0, 10, 0.95).0, 0.0);
        assert_eq!(clopper_pearson(10, 10, 0.95).1, 1.0);
        // With no successes the one-sided bound solves (1-u)^n = 1 - confidence, which for
        // n = 3000 at 95 % is the "rule of three" 1 - 0.05^(1/3000) ≈ 3/3000.
        let u = clopper_pearson_upper(0, 3000, 0.95);
        let expected = -(0.05_f64.ln() / 3000.0).exp_m1();
        assert!((u - expected).abs() <= 1e-13 * expected);
        // Reference: bisection on (1-u)^99998 (1 + 99998u + 99998·99999/2 u²) = 0.05 with
        // Python's `decimal` module at 50 digits, 6.29565839608670470e-5.
        let u = clopper_pearson_upper(2, 100_000, 0.95);
        assert!((u - 6.295_658_396_086_705e-5).abs() <= 1e-14 * u);
    }
}
