//! ROC analysis, Platt scaling and Clopper–Pearson intervals checked against the Python
//! reference libraries: scikit-learn (`sklearn.metrics`, `sklearn.calibration`) and SciPy
//! (`scipy.stats.beta`). Datasets are drawn from a seeded generator and sent to Python as
//! JSON; each comparison names the reference function it checks against.

use serde::Deserialize;
use tamis::train::platt::fit_platt;
use tamis::train::roc::{roc_auc, roc_curve};
use tamis::train::stats::{try_clopper_pearson, try_clopper_pearson_upper};

use tamis::rng::SplitMix64 as Rng;

use crate::python;

/// Standard normal by the Box–Muller transform.
fn normal(rng: &mut Rng) -> f64 {
    let u = 1.0 - rng.unit();
    let v = rng.unit();
    (-2.0 * u.ln()).sqrt() * (std::f64::consts::TAU * v).cos()
}

/// Scores and labels (`true` = spam) with both classes present: class-shifted normal
/// scores, optionally rounded so that many scores tie across classes.
fn scored_set(
    rng: &mut Rng,
    len: usize,
    spam_share: f64,
    separation: f64,
    decimals: Option<i32>,
) -> (Vec<f64>, Vec<bool>) {
    let mut labels: Vec<bool> = (0..len).map(|_| rng.unit() < spam_share).collect();
    // Both classes must appear for the curve to exist.
    if let Some(first) = labels.first_mut() {
        *first = true;
    }
    if let Some(last) = labels.last_mut() {
        *last = false;
    }
    let scores = labels
        .iter()
        .map(|&spam| {
            let raw = normal(rng) + if spam { separation } else { 0.0 };
            match decimals {
                Some(d) => {
                    let scale = 10f64.powi(d);
                    (raw * scale).round() / scale
                }
                None => raw,
            }
        })
        .collect();
    (scores, labels)
}

/// Scores travel as IEEE 754 bit patterns: serde_json's default float parser may round a
/// decimal to a neighbouring double, which would break exact threshold comparisons.
fn to_json(sets: &[(Vec<f64>, Vec<bool>)]) -> Vec<u8> {
    let payload: Vec<serde_json::Value> = sets
        .iter()
        .map(|(s, y)| {
            let bits: Vec<u64> = s.iter().map(|v| v.to_bits()).collect();
            serde_json::json!({ "s": bits, "y": y })
        })
        .collect();
    serde_json::to_vec(&payload).unwrap()
}

#[derive(Deserialize)]
struct RocReference {
    auc: f64,
    fpr: Vec<f64>,
    tpr: Vec<f64>,
    /// Bit patterns, without the leading `inf`.
    thresholds: Vec<u64>,
    first_threshold_is_inf: bool,
}

const ROC_SCRIPT: &str = r#"
import json, sys, math
import numpy as np
from sklearn.metrics import roc_auc_score, roc_curve
out = []
for d in json.load(sys.stdin):
    y = np.array(d["y"], dtype=int)
    s = np.array(d["s"], dtype=np.uint64).view(np.float64)
    fpr, tpr, thr = roc_curve(y, s, drop_intermediate=False)
    out.append({
        "auc": float(roc_auc_score(y, s)),
        "fpr": fpr.tolist(), "tpr": tpr.tolist(),
        "thresholds": thr[1:].astype(np.float64).view(np.uint64).tolist(),
        "first_threshold_is_inf": bool(math.isinf(thr[0]) and thr[0] > 0),
    })
print(json.dumps(out))
"#;

#[test]
fn roc_auc_and_curve_match_scikit_learn_including_ties() {
    let mut rng = Rng::new(0x7A31_5EED);
    let mut sets = Vec::new();
    for i in 0..320 {
        let len = 2 + rng.below(400);
        // From balanced down to one spam in fifty: held-out mail is heavily imbalanced.
        let spam_share = [0.5, 0.3, 0.1, 0.02][i % 4];
        let separation = rng.unit() * 3.0;
        // Rounding to one or two decimals (or to integers) makes ties common.
        let decimals = [None, Some(2), Some(1), Some(0)][(i / 4) % 4];
        sets.push(scored_set(&mut rng, len, spam_share, separation, decimals));
    }
    let reference: Vec<RocReference> =
        serde_json::from_slice(&python::run(ROC_SCRIPT, &[], &to_json(&sets))).unwrap();
    assert_eq!(reference.len(), sets.len());

    let (mut max_auc, mut max_rate) = (0.0_f64, 0.0_f64);
    for (i, ((scores, labels), expected)) in sets.iter().zip(&reference).enumerate() {
        let auc = roc_auc(scores, labels).unwrap();
        // sklearn.metrics.roc_auc_score
        let deviation = (auc - expected.auc).abs();
        assert!(
            deviation <= 1e-9,
            "set {i}: auc {auc} vs sklearn {}",
            expected.auc
        );
        max_auc = max_auc.max(deviation);

        // sklearn.metrics.roc_curve(drop_intermediate=False)
        let curve = roc_curve(scores, labels).unwrap();
        let points = curve.points();
        assert!(expected.first_threshold_is_inf);
        assert_eq!(
            points.len(),
            expected.fpr.len(),
            "set {i}: number of points"
        );
        assert_eq!(points.first().map(|p| p.threshold), Some(f64::INFINITY));
        let thresholds: Vec<u64> = points
            .iter()
            .skip(1)
            .map(|p| p.threshold.to_bits())
            .collect();
        assert_eq!(thresholds, expected.thresholds, "set {i}: thresholds");
        for (p, (&fpr, &tpr)) in points.iter().zip(expected.fpr.iter().zip(&expected.tpr)) {
            let deviation = (p.fpr - fpr).abs().max((p.tpr - tpr).abs());
            assert!(
                deviation <= 1e-12,
                "set {i}: point {p:?} vs sklearn ({fpr}, {tpr})"
            );
            max_rate = max_rate.max(deviation);
        }
    }
    eprintln!("roc vs sklearn: max |auc diff| = {max_auc:e}, max |rate diff| = {max_rate:e}");
}

const PLATT_SCRIPT: &str = r#"
import json, sys
import numpy as np
from sklearn.calibration import _sigmoid_calibration
out = []
for d in json.load(sys.stdin):
    margins = np.array(d["s"], dtype=np.uint64).view(np.float64)
    a, b = _sigmoid_calibration(margins, np.array(d["y"], dtype=int))
    out.append([float(a), float(b)])
print(json.dumps(out))
"#;

/// scikit-learn 1.7 keeps Platt's fit in the private function
/// `sklearn.calibration._sigmoid_calibration(predictions, y)`, which returns `(a, b)` with
/// `P = 1 / (1 + exp(a·f + b))` and Platt's smoothed targets; it is what
/// `CalibratedClassifierCV(method='sigmoid')` calls. It minimises the same objective with
/// L-BFGS, so the two optima agree up to the solvers' tolerances.
#[test]
fn platt_parameters_match_scikit_learn_sigmoid_calibration() {
    let mut rng = Rng::new(0x0B1A_7701);
    let mut sets = Vec::new();
    // (size, spam share, separation, margin scale): overlapping, well separated, imbalanced,
    // and margins beyond 30 (where scikit-learn rescales before fitting).
    for &(len, share, separation, scale) in &[
        (60, 0.5, 1.0, 1.0),
        (500, 0.5, 2.0, 1.0),
        (2000, 0.1, 2.5, 1.0),
        (5000, 0.03, 3.0, 1.0),
        (800, 0.4, 1.5, 50.0),
        (300, 0.5, 0.2, 0.01),
        (1000, 0.6, 4.0, 1.0),
    ] {
        let (mut scores, labels) = scored_set(&mut rng, len, share, separation, None);
        for s in &mut scores {
            *s = (*s - separation / 2.0) * scale;
        }
        sets.push((scores, labels));
    }
    let reference: Vec<[f64; 2]> =
        serde_json::from_slice(&python::run(PLATT_SCRIPT, &[], &to_json(&sets))).unwrap();

    let (mut max_a, mut max_b) = (0.0_f64, 0.0_f64);
    for (i, ((margins, labels), [a, b])) in sets.iter().zip(&reference).enumerate() {
        let platt = fit_platt(margins, labels).unwrap();
        assert!(platt.converged(), "set {i} did not converge");
        // sklearn.calibration._sigmoid_calibration: slope and offset within 1e-3
        // (relative to the slope's size for the rescaled sets).
        let da = (platt.a() - a).abs() / a.abs().max(1.0);
        let db = (platt.b() - b).abs() / b.abs().max(1.0);
        assert!(da <= 1e-3, "set {i}: A {} vs sklearn {a}", platt.a());
        assert!(db <= 1e-3, "set {i}: B {} vs sklearn {b}", platt.b());
        max_a = max_a.max(da);
        max_b = max_b.max(db);
    }
    eprintln!("platt vs sklearn: max A diff = {max_a:e}, max B diff = {max_b:e}");
}

const CLOPPER_PEARSON_SCRIPT: &str = r#"
import json, sys
from scipy.stats import beta
out = []
for k, n, c in json.load(sys.stdin):
    alpha = 1.0 - c
    lower = 0.0 if k == 0 else beta.ppf(alpha / 2, k, n - k + 1)
    upper = 1.0 if k == n else beta.ppf(1 - alpha / 2, k + 1, n - k)
    one_sided = 1.0 if k == n else beta.ppf(c, k + 1, n - k)
    out.append([float(lower), float(upper), float(one_sided)])
print(json.dumps(out))
"#;

#[test]
fn clopper_pearson_matches_scipy_beta_quantiles() {
    let mut cases: Vec<(u64, u64, f64)> = Vec::new();
    for &n in &[
        1u64, 2, 3, 5, 10, 20, 50, 100, 999, 1000, 10_000, 40_000, 100_000,
    ] {
        let mut ks = vec![
            0,
            1,
            2,
            3,
            n / 1000,
            n / 100,
            n / 10,
            n / 3,
            n / 2,
            n - 1,
            n,
        ];
        ks.retain(|&k| k <= n);
        ks.sort_unstable();
        ks.dedup();
        for k in ks {
            for confidence in [0.95, 0.99] {
                cases.push((k, n, confidence));
            }
        }
    }
    let payload = serde_json::to_vec(&cases).unwrap();
    let reference: Vec<[f64; 3]> =
        serde_json::from_slice(&python::run(CLOPPER_PEARSON_SCRIPT, &[], &payload)).unwrap();
    assert_eq!(reference.len(), cases.len());

    let (mut max_abs, mut max_rel) = (0.0_f64, 0.0_f64);
    for (&(k, n, confidence), &[lower, upper, one_sided]) in cases.iter().zip(&reference) {
        let (lo, hi) = try_clopper_pearson(k, n, confidence).unwrap();
        let one = try_clopper_pearson_upper(k, n, confidence).unwrap();
        // scipy.stats.beta.ppf(alpha/2, k, n-k+1), beta.ppf(1-alpha/2, k+1, n-k) and, one-sided,
        // beta.ppf(confidence, k+1, n-k); 0 and 1 at the edges.
        for (what, got, want) in [
            ("lower", lo, lower),
            ("upper", hi, upper),
            ("one-sided upper", one, one_sided),
        ] {
            let abs = (got - want).abs();
            let rel = if want == 0.0 { abs } else { abs / want };
            assert!(
                abs <= 1e-9 && rel <= 1e-9,
                "k={k} n={n} confidence={confidence}: {what} {got} vs scipy {want}"
            );
            max_abs = max_abs.max(abs);
            max_rel = max_rel.max(rel);
        }
    }
    eprintln!(
        "clopper-pearson vs scipy ({} cases): max abs diff = {max_abs:e}, max rel diff = {max_rel:e}",
        cases.len()
    );
}
