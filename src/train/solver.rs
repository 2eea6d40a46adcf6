//! L2-regularised linear SVM trained by dual coordinate descent (Hsieh, Chang, Lin, Keerthi
//! and Sundararajan, "A Dual Coordinate Descent Method for Large-scale Linear SVM", ICML 2008).
//!
//! The primal problem, for labels `y_i ∈ {+1, -1}` and per-class costs `C_i`, is
//!
//! ```text
//! min_w  ½‖w‖² + Σ_i C_i ξ(w; x_i, y_i),   ξ = max(0, 1 − y_i wᵀx_i)     (hinge)
//!                                           ξ = max(0, 1 − y_i wᵀx_i)²    (squared hinge)
//! ```
//!
//! and the solver works on its dual `min_α ½αᵀQ̄α − eᵀα, 0 ≤ α_i ≤ U_i` with
//! `Q̄ = Q + D`, `Q_ij = y_i y_j x_iᵀx_j`; for the hinge loss `U_i = C_i, D_ii = 0`, for the
//! squared hinge `U_i = ∞, D_ii = 1/(2 C_i)`. It follows Algorithm 1 of the paper with a fresh
//! random permutation per outer pass and the shrinking of its Algorithm 3, step for step as the
//! reference implementation liblinear (`solve_l2r_l1l2_svc`, version 2.50) does it, so that the
//! same file and options reach the same objective.
//!
//! The bias follows liblinear's `-B`: when `bias > 0` every row gets a constant extra feature of
//! that value, whose weight is regularised like any other. The fitted intercept is that weight
//! times `bias`, and the primal objective counts `½ (intercept / bias)²`.

use crate::features::SparseVector;
use crate::rng::SplitMix64;

use super::dataset::Dataset;

/// The loss on each training row.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Loss {
    /// `max(0, 1 − y wᵀx)`: liblinear `-s 3`, scikit-learn `loss='hinge'`.
    Hinge,
    /// `max(0, 1 − y wᵀx)²`: liblinear `-s 1`, scikit-learn `loss='squared_hinge'`.
    SquaredHinge,
}

/// Unchecked solver parameters; [`SvmParamsBuilder::validate`] turns them into [`SvmParams`].
#[derive(Debug, Clone, PartialEq)]
pub struct SvmParamsBuilder {
    /// Cost of a training error relative to the regulariser; must be finite and positive.
    pub c: f64,
    /// The loss.
    pub loss: Loss,
    /// liblinear `-B`: value of the constant feature appended to every row; `<= 0` means no
    /// bias term.
    pub bias: f64,
    /// Multiplier of `c` for spam (`+1`) rows (liblinear `-w1`).
    pub weight_pos: f64,
    /// Multiplier of `c` for ham (`-1`) rows (liblinear `-w-1`).
    pub weight_neg: f64,
    /// Stopping tolerance on the projected gradient (liblinear `-e`, default 0.1).
    pub tolerance: f64,
    /// Bound on the outer passes over the data.
    pub max_iterations: usize,
    /// Seed of the permutations.
    pub seed: u64,
    /// Whether to shrink the active set (Algorithm 3 of the paper).
    pub shrinking: bool,
}

impl Default for SvmParamsBuilder {
    /// `c = 1`, squared hinge, `bias = 1`, unit class weights, `tolerance = 0.1`,
    /// `max_iterations = 1000`, `seed = 1`, shrinking on.
    fn default() -> Self {
        SvmParamsBuilder {
            c: 1.0,
            loss: Loss::SquaredHinge,
            bias: 1.0,
            weight_pos: 1.0,
            weight_neg: 1.0,
            tolerance: 0.1,
            max_iterations: 1000,
            seed: 1,
            shrinking: true,
        }
    }
}

/// Why [`SvmParamsBuilder::validate`] refused the parameters.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum ParamError {
    /// `c` is not finite and positive.
    #[error("C must be finite and positive, got {0}")]
    C(f64),
    /// `bias` is NaN or infinite.
    #[error("bias must be a finite number (<= 0 for none), got {0}")]
    Bias(f64),
    /// A class weight is not finite and positive.
    #[error("class weight for {class} must be finite and positive, got {value}")]
    ClassWeight {
        /// `spam` or `ham`.
        class: &'static str,
        /// The value given.
        value: f64,
    },
    /// The tolerance is not finite and positive.
    #[error("tolerance must be finite and positive, got {0}")]
    Tolerance(f64),
    /// `max_iterations` is zero.
    #[error("max_iterations must be at least 1")]
    MaxIterations,
}

fn finite_positive(x: f64) -> bool {
    x.is_finite() && x > 0.0
}

impl SvmParamsBuilder {
    /// Checks every field and returns the validated parameters.
    pub fn validate(&self) -> Result<SvmParams, ParamError> {
        if !finite_positive(self.c) {
            return Err(ParamError::C(self.c));
        }
        if !self.bias.is_finite() {
            return Err(ParamError::Bias(self.bias));
        }
        for (class, value) in [("spam", self.weight_pos), ("ham", self.weight_neg)] {
            if !finite_positive(value) {
                return Err(ParamError::ClassWeight { class, value });
            }
        }
        if !finite_positive(self.tolerance) {
            return Err(ParamError::Tolerance(self.tolerance));
        }
        if self.max_iterations == 0 {
            return Err(ParamError::MaxIterations);
        }
        let c_pos = self.c * self.weight_pos;
        let c_neg = self.c * self.weight_neg;
        if !finite_positive(c_pos) || !finite_positive(c_neg) {
            return Err(ParamError::C(self.c));
        }
        Ok(SvmParams {
            c: self.c,
            loss: self.loss,
            bias: if self.bias > 0.0 { self.bias } else { 0.0 },
            c_pos,
            c_neg,
            tolerance: self.tolerance,
            max_iterations: self.max_iterations,
            seed: self.seed,
            shrinking: self.shrinking,
        })
    }
}

/// Validated solver parameters.
#[derive(Debug, Clone, PartialEq)]
pub struct SvmParams {
    c: f64,
    loss: Loss,
    bias: f64,
    c_pos: f64,
    c_neg: f64,
    tolerance: f64,
    max_iterations: usize,
    seed: u64,
    shrinking: bool,
}

impl SvmParams {
    /// The base cost `C`.
    pub fn c(&self) -> f64 {
        self.c
    }
    /// The loss.
    pub fn loss(&self) -> Loss {
        self.loss
    }
    /// The constant bias feature's value; `0` when there is no bias term.
    pub fn bias(&self) -> f64 {
        self.bias
    }
    /// Whether a bias term is fitted.
    pub fn has_bias(&self) -> bool {
        self.bias > 0.0
    }
    /// Effective cost of spam (`+1`) rows: `C · weight_pos`.
    pub fn c_pos(&self) -> f64 {
        self.c_pos
    }
    /// Effective cost of ham (`-1`) rows: `C · weight_neg`.
    pub fn c_neg(&self) -> f64 {
        self.c_neg
    }
    /// Stopping tolerance on the projected gradient.
    pub fn tolerance(&self) -> f64 {
        self.tolerance
    }
    /// Bound on the outer passes.
    pub fn max_iterations(&self) -> usize {
        self.max_iterations
    }
    /// Seed of the permutations.
    pub fn seed(&self) -> u64 {
        self.seed
    }
    /// Whether the active set is shrunk.
    pub fn shrinking(&self) -> bool {
        self.shrinking
    }
    fn cost(&self, label: i8) -> f64 {
        if label > 0 { self.c_pos } else { self.c_neg }
    }
}

/// A trained linear SVM: `margin(x) = wᵀx + intercept`, positive for spam.
#[derive(Debug, Clone, PartialEq)]
pub struct FittedSvm {
    weights: Vec<f64>,
    bias: f64,
    iterations: usize,
    converged: bool,
    dual_objective: f64,
}

impl FittedSvm {
    /// One weight per dimension of the training data.
    pub fn weights(&self) -> &[f64] {
        &self.weights
    }
    /// The intercept added to `wᵀx` (the bias feature's weight times its value; 0 without one).
    pub fn bias(&self) -> f64 {
        self.bias
    }
    /// Outer passes made, counting the final check without shrinking.
    pub fn iterations(&self) -> usize {
        self.iterations
    }
    /// Whether the stopping rule was met before `max_iterations`.
    pub fn converged(&self) -> bool {
        self.converged
    }
    /// The minimised dual objective `½αᵀQ̄α − eᵀα` at the end (what liblinear prints as
    /// "Objective value"); its negative is a lower bound on the primal objective.
    pub fn dual_objective(&self) -> f64 {
        self.dual_objective
    }
    /// `wᵀx + intercept`; indices beyond the trained dimensions count as zero.
    pub fn margin(&self, x: &SparseVector) -> f64 {
        dot_dense(&self.weights, x) + self.bias
    }
    /// The primal objective of this model on `ds` under `params`; see [`primal_objective`].
    pub fn primal_objective(&self, ds: &Dataset, params: &SvmParams) -> f64 {
        primal_objective(&self.weights, self.bias, ds, params)
    }
}

fn dot_dense(weights: &[f64], x: &SparseVector) -> f64 {
    x.iter()
        .map(|(i, v)| weights.get(i as usize).copied().unwrap_or(0.0) * f64::from(v))
        .sum()
}

/// `½‖w‖² + ½(intercept/bias)² + Σ C_i ξ_i` for any linear model, so that a model trained
/// elsewhere is scored by the same formula. The intercept term is the bias feature's squared
/// weight, regularised as liblinear does with `-B bias > 0`; without a bias term it is left out
/// (and `intercept` should be 0).
pub fn primal_objective(weights: &[f64], intercept: f64, ds: &Dataset, params: &SvmParams) -> f64 {
    let mut reg: f64 = weights.iter().map(|w| w * w).sum();
    if params.has_bias() {
        let wb = intercept / params.bias();
        reg += wb * wb;
    }
    let mut loss = 0.0;
    for (x, &y) in ds.rows().iter().zip(ds.labels()) {
        let xi = (1.0 - f64::from(y) * (dot_dense(weights, x) + intercept)).max(0.0);
        let xi = match params.loss() {
            Loss::Hinge => xi,
            Loss::SquaredHinge => xi * xi,
        };
        loss += params.cost(y) * xi;
    }
    0.5 * reg + loss
}

/// The rows in one flat compressed-sparse-row block, so the inner loop walks contiguous memory
/// instead of chasing one allocation per row.
struct Csr {
    offsets: Vec<usize>,
    indices: Vec<u32>,
    values: Vec<f32>,
}

impl Csr {
    fn new(ds: &Dataset) -> Csr {
        let nnz = ds.rows().iter().map(SparseVector::nnz).sum();
        let mut csr = Csr {
            offsets: Vec::with_capacity(ds.len() + 1),
            indices: Vec::with_capacity(nnz),
            values: Vec::with_capacity(nnz),
        };
        csr.offsets.push(0);
        for x in ds.rows() {
            csr.indices.extend_from_slice(x.indices());
            csr.values.extend_from_slice(x.values());
            csr.offsets.push(csr.indices.len());
        }
        csr
    }

    fn row(&self, i: usize) -> (&[u32], &[f32]) {
        let (start, end) = (self.offsets[i], self.offsets[i + 1]);
        (&self.indices[start..end], &self.values[start..end])
    }
}

/// Trains the SVM on `ds`. Never fails: an empty dataset gives the zero model.
pub fn fit_svm(ds: &Dataset, params: &SvmParams) -> FittedSvm {
    let csr = Csr::new(ds);
    let l = ds.len();
    let bias = params.bias();
    let mut w = vec![0.0f64; ds.dimensions()];
    // Weight of the constant bias feature; kept apart from `w` so `w` stays one per dimension.
    let mut w_bias = 0.0f64;

    // Indexed by class: 0 ham, 1 spam.
    let (diag, upper) = match params.loss() {
        Loss::Hinge => ([0.0, 0.0], [params.c_neg(), params.c_pos()]),
        Loss::SquaredHinge => (
            [0.5 / params.c_neg(), 0.5 / params.c_pos()],
            [f64::INFINITY, f64::INFINITY],
        ),
    };
    let class: Vec<usize> = ds.labels().iter().map(|&y| usize::from(y > 0)).collect();
    let mut alpha = vec![0.0f64; l];
    let mut qd = Vec::with_capacity(l);
    let mut index = Vec::with_capacity(l);
    for i in 0..l {
        let (_, vals) = csr.row(i);
        let norm2: f64 = vals.iter().map(|&v| f64::from(v) * f64::from(v)).sum();
        let q = diag[class[i]] + norm2 + bias * bias;
        qd.push(q);
        if q > 0.0 {
            index.push(i);
        } else {
            // Only with the hinge loss and no bias can a row be all zeros with Q_ii = 0: it
            // cannot move `w`, its loss is 1 whatever `w` is, and its optimal α is its bound.
            // Leaving it out keeps the division below finite and the stopping rule reachable.
            alpha[i] = upper[class[i]];
        }
    }
    let l_eff = index.len();
    let mut active_size = l_eff;
    let mut rng = SplitMix64::new(params.seed());
    let eps = params.tolerance();
    let shrinking = params.shrinking();
    let mut pg_max_old = f64::INFINITY;
    let mut pg_min_old = f64::NEG_INFINITY;
    let mut iterations = 0usize;
    let mut converged = l_eff == 0;

    while !converged && iterations < params.max_iterations() {
        let mut pg_max_new = f64::NEG_INFINITY;
        let mut pg_min_new = f64::INFINITY;

        for i in 0..active_size {
            let j = i + rng.below(active_size - i);
            index.swap(i, j);
        }

        let mut s = 0;
        while s < active_size {
            let i = index[s];
            let (idx, vals) = csr.row(i);
            let yi = if class[i] == 1 { 1.0 } else { -1.0 };
            let mut wx = w_bias * bias;
            for (&j, &v) in idx.iter().zip(vals) {
                wx += w[j as usize] * f64::from(v);
            }
            let c = upper[class[i]];
            let d_ii = diag[class[i]];
            let a = alpha[i];
            let g = yi * wx - 1.0 + a * d_ii;

            let mut pg = 0.0;
            if a == 0.0 {
                if shrinking && g > pg_max_old {
                    active_size -= 1;
                    index.swap(s, active_size);
                    continue;
                } else if g < 0.0 {
                    pg = g;
                }
            } else if a == c {
                if shrinking && g < pg_min_old {
                    active_size -= 1;
                    index.swap(s, active_size);
                    continue;
                } else if g > 0.0 {
                    pg = g;
                }
            } else {
                pg = g;
            }
            pg_max_new = pg_max_new.max(pg);
            pg_min_new = pg_min_new.min(pg);

            // The same threshold as the reference: below it an update only adds rounding noise.
            if pg.abs() > 1.0e-12 {
                let new = (a - g / qd[i]).max(0.0).min(c);
                alpha[i] = new;
                let d = (new - a) * yi;
                for (&j, &v) in idx.iter().zip(vals) {
                    w[j as usize] += d * f64::from(v);
                }
                w_bias += d * bias;
            }
            s += 1;
        }

        iterations += 1;

        // liblinear 2.50 also asks both bounds to be within eps of zero, not only their gap.
        if pg_max_new - pg_min_new <= eps && pg_max_new.abs() <= eps && pg_min_new.abs() <= eps {
            if active_size == l_eff {
                converged = true;
            } else {
                // Shrinking may have dropped a variable too early: one more full pass decides.
                active_size = l_eff;
                pg_max_old = f64::INFINITY;
                pg_min_old = f64::NEG_INFINITY;
            }
            continue;
        }
        pg_max_old = if pg_max_new <= 0.0 {
            f64::INFINITY
        } else {
            pg_max_new
        };
        pg_min_old = if pg_min_new >= 0.0 {
            f64::NEG_INFINITY
        } else {
            pg_min_new
        };
    }

    let mut v: f64 = w.iter().map(|x| x * x).sum::<f64>() + w_bias * w_bias;
    for (i, &a) in alpha.iter().enumerate() {
        v += a * (a * diag[class[i]] - 2.0);
    }
    FittedSvm {
        weights: w,
        bias: w_bias * bias,
        iterations,
        converged,
        dual_objective: v / 2.0,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn ds(rows: &[&[(u32, f32)]], labels: &[i8], dims: usize) -> Dataset {
        let rows = rows
            .iter()
            .map(|r| SparseVector::from_pairs(r.to_vec()))
            .collect();
        Dataset::new(rows, labels.to_vec(), dims).unwrap()
    }

    fn params(c: f64, loss: Loss, bias: f64, tol: f64) -> SvmParams {
        SvmParamsBuilder {
            c,
            loss,
            bias,
            tolerance: tol,
            ..SvmParamsBuilder::default()
        }
        .validate()
        .unwrap()
    }

    /// A small noisy problem built from a seeded generator.
    fn noisy(n: usize, dims: u32, seed: u64) -> Dataset {
        let mut rng = SplitMix64::new(seed);
        let mut rows = Vec::new();
        let mut labels = Vec::new();
        for _ in 0..n {
            let y: i8 = if rng.below(3) == 0 { 1 } else { -1 };
            let mut pairs = Vec::new();
            for _ in 0..5 {
                let base = if y > 0 { 0 } else { dims / 3 };
                let j = base + rng.below((dims * 2 / 3) as usize) as u32;
                pairs.push((j, 1.0 + rng.below(3) as f32));
            }
            // Label noise keeps the problem non-separable, so both bounds of α are reached.
            let y = if rng.below(10) == 0 { -y } else { y };
            rows.push(SparseVector::from_pairs(pairs));
            labels.push(y);
        }
        Dataset::new(rows, labels, dims as usize).unwrap()
    }

    #[test]
    fn validate_refuses_bad_parameters() {
        let good = SvmParamsBuilder::default();
        let with = |f: fn(&mut SvmParamsBuilder)| {
            let mut b = good.clone();
            f(&mut b);
            b.validate()
        };
        assert_eq!(with(|b| b.c = 0.0), Err(ParamError::C(0.0)));
        assert!(matches!(with(|b| b.c = f64::NAN), Err(ParamError::C(_))));
        assert!(matches!(
            with(|b| b.bias = f64::INFINITY),
            Err(ParamError::Bias(_))
        ));
        assert!(matches!(
            with(|b| b.weight_neg = -1.0),
            Err(ParamError::ClassWeight { class: "ham", .. })
        ));
        assert_eq!(with(|b| b.tolerance = 0.0), Err(ParamError::Tolerance(0.0)));
        assert_eq!(
            with(|b| b.max_iterations = 0),
            Err(ParamError::MaxIterations)
        );
        assert!(with(|b| b.c = 1e308).is_ok());
        assert!(matches!(
            with(|b| {
                b.c = 1e308;
                b.weight_pos = 10.0
            }),
            Err(ParamError::C(_))
        ));
        let p = with(|b| b.bias = -1.0).unwrap();
        assert!(!p.has_bias());
        assert_eq!(p.bias(), 0.0);
    }

    #[test]
    fn two_point_problem_matches_hand_solution() {
        // x₁ = (1), y₁ = +1; x₂ = (−1), y₂ = −1; no bias, hinge, C = 10. By symmetry
        // w = 2α with α₁ = α₂ = α; the dual ½·4α²·… gives w = 1 (margin exactly 1), ξ = 0,
        // primal ½ = −dual.
        let data = ds(&[&[(0, 1.0)], &[(0, -1.0)]], &[1, -1], 1);
        let p = params(10.0, Loss::Hinge, 0.0, 1e-6);
        let m = fit_svm(&data, &p);
        assert!(m.converged());
        assert!((m.weights()[0] - 1.0).abs() < 1e-6, "{:?}", m.weights());
        assert_eq!(m.bias(), 0.0);
        assert!((m.primal_objective(&data, &p) - 0.5).abs() < 1e-6);
        assert!((m.dual_objective() + 0.5).abs() < 1e-6);
    }

    #[test]
    fn squared_hinge_one_point_closed_form() {
        // One row x = (1), y = +1, no bias: minimise ½w² + C(1 − w)² → w = 2C/(1 + 2C).
        let data = ds(&[&[(0, 1.0)]], &[1], 1);
        for c in [0.1, 1.0, 5.0] {
            let p = params(c, Loss::SquaredHinge, 0.0, 1e-9);
            let m = fit_svm(&data, &p);
            let expected = 2.0 * c / (1.0 + 2.0 * c);
            assert!(
                (m.weights()[0] - expected).abs() < 1e-9,
                "C={c}: {:?}",
                m.weights()
            );
        }
    }

    #[test]
    fn duality_gap_closes_for_both_losses_with_and_without_bias() {
        let data = noisy(300, 1000, 7);
        for loss in [Loss::Hinge, Loss::SquaredHinge] {
            for bias in [0.0, 1.0, 2.5] {
                for c in [0.1, 1.0, 10.0] {
                    let p = params(c, loss, bias, 1e-4);
                    let m = fit_svm(&data, &p);
                    assert!(m.converged(), "{loss:?} B={bias} C={c}");
                    let primal = m.primal_objective(&data, &p);
                    let gap = primal + m.dual_objective();
                    assert!(
                        gap >= -1e-9,
                        "weak duality: {primal} {}",
                        m.dual_objective()
                    );
                    assert!(
                        gap <= 1e-3 * primal.max(1.0),
                        "{loss:?} B={bias} C={c}: gap {gap}"
                    );
                    if bias == 0.0 {
                        assert_eq!(m.bias(), 0.0);
                    }
                }
            }
        }
    }

    #[test]
    fn shrinking_and_seed_do_not_change_the_optimum() {
        let data = noisy(300, 1000, 11);
        let base = SvmParamsBuilder {
            c: 1.0,
            loss: Loss::Hinge,
            tolerance: 1e-5,
            ..SvmParamsBuilder::default()
        };
        let objective = |b: SvmParamsBuilder| {
            let p = b.validate().unwrap();
            fit_svm(&data, &p).primal_objective(&data, &p)
        };
        let reference = objective(base.clone());
        for b in [
            SvmParamsBuilder {
                shrinking: false,
                ..base.clone()
            },
            SvmParamsBuilder {
                seed: 99,
                ..base.clone()
            },
        ] {
            let o = objective(b);
            assert!(
                (o - reference).abs() <= 1e-4 * reference,
                "{o} vs {reference}"
            );
        }
    }

    #[test]
    fn same_seed_gives_identical_model() {
        let data = noisy(200, 40, 3);
        let p = params(1.0, Loss::SquaredHinge, 1.0, 0.01);
        assert_eq!(fit_svm(&data, &p), fit_svm(&data, &p));
    }

    #[test]
    fn class_weights_raise_the_cost_of_one_class() {
        let data = noisy(300, 60, 5);
        let fit = |weight_neg: f64| {
            let p = SvmParamsBuilder {
                weight_neg,
                tolerance: 1e-4,
                ..SvmParamsBuilder::default()
            }
            .validate()
            .unwrap();
            fit_svm(&data, &p)
        };
        let ham_errors = |m: &FittedSvm| {
            data.rows()
                .iter()
                .zip(data.labels())
                .filter(|&(x, &y)| y < 0 && m.margin(x) >= 0.0)
                .count()
        };
        assert!(ham_errors(&fit(20.0)) < ham_errors(&fit(1.0)));
    }

    #[test]
    fn degenerate_inputs_do_not_panic() {
        let p = params(1.0, Loss::Hinge, 0.0, 0.1);
        let empty = Dataset::default();
        let m = fit_svm(&empty, &p);
        assert!(m.converged() && m.weights().is_empty());
        let zeros = ds(&[&[], &[(1, 1.0)]], &[1, -1], 2);
        let m = fit_svm(&zeros, &p);
        assert!(m.converged());
        assert!(m.weights().iter().all(|w| w.is_finite()));
        // An index beyond the trained dimensions scores as zero.
        assert_eq!(m.margin(&SparseVector::from_pairs(vec![(50, 1.0)])), 0.0);
    }

    #[test]
    fn stops_at_max_iterations() {
        let data = noisy(300, 60, 9);
        let p = SvmParamsBuilder {
            c: 100.0,
            loss: Loss::Hinge,
            tolerance: 1e-12,
            max_iterations: 3,
            ..SvmParamsBuilder::default()
        }
        .validate()
        .unwrap();
        let m = fit_svm(&data, &p);
        assert_eq!(m.iterations(), 3);
        assert!(!m.converged());
    }
}
