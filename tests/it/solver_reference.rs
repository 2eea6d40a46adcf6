//! The dual coordinate descent solver against the reference implementations, on one
//! svmlight file they all read: liblinear-official (the reference implementation of Hsieh et
//! al. 2008, `-s 3` / `-s 1` with `-B 1`) and scikit-learn's `LinearSVC(dual=True)`, which
//! bundles its own copy of liblinear and regularises the intercept the same way when
//! `intercept_scaling=1`. All three models are scored by tamis's one primal formula, so the
//! comparison does not rest on any library's own report of its objective.

use std::fs::File;
use std::io::BufReader;

use tamis::features::SparseVector;
use tamis::train::dataset::Dataset;
use tamis::train::solver::{Loss, SvmParamsBuilder, fit_svm, primal_objective};
use tamis::train::svmlight::{parse_svmlight, write_svmlight};

const DIMS: usize = 5_000;

/// Trains liblinear-official and scikit-learn on the files named in argv for each
/// configuration read from stdin; prints one JSON object per configuration with both models'
/// weights as +1-class (spam) decision functions.
const REFERENCE_SCRIPT: &str = r#"
import json, sys
import numpy as np
from liblinear.liblinearutil import svm_read_problem, problem, train
from sklearn.datasets import load_svmlight_file
from sklearn.svm import LinearSVC

train_path, dims = sys.argv[1], int(sys.argv[2])
configs = json.load(sys.stdin)
y, x = svm_read_problem(train_path)
prob = problem(y, x)
X, Y = load_svmlight_file(train_path, n_features=dims)
out = []
for cfg in configs:
    solver = 3 if cfg["loss"] == "hinge" else 1
    m = train(prob, "-s %d -c %r -B 1 -e %r -q" % (solver, cfg["c"], cfg["eps"]))
    w, b = m.get_decfun()
    # liblinear's first class is the one its w points to; it puts +1 first for -1/+1 data
    # but the sign is checked rather than assumed.
    sign = 1.0 if m.get_labels()[0] == 1 else -1.0
    w = [sign * v for v in w] + [0.0] * (dims - len(w))
    svc = LinearSVC(loss=cfg["loss"], dual=True, C=cfg["c"], tol=cfg["eps"],
                    max_iter=100000, fit_intercept=True, intercept_scaling=1.0,
                    random_state=0).fit(X, Y)
    assert list(svc.classes_) == [-1.0, 1.0]
    out.append({
        "liblinear": {"w": w, "b": sign * b},
        "sklearn": {"w": svc.coef_[0].tolist(), "b": float(svc.intercept_[0])},
    })
json.dump(out, sys.stdout)
"#;

/// Text-like rows from the crate's seeded generator (`tamis::train::synthetic`).
fn synthetic(rows: usize, seed: u64) -> Dataset {
    tamis::train::synthetic::overlapping_classes(rows, DIMS, 15, 31, seed)
        .expect("generated rows are valid")
}

fn agreement(w_a: &[f64], b_a: f64, w_b: &[f64], b_b: f64, test: &Dataset) -> f64 {
    let margin = |w: &[f64], b: f64, x: &SparseVector| {
        x.iter()
            .map(|(i, v)| w[i as usize] * f64::from(v))
            .sum::<f64>()
            + b
    };
    let same = test
        .rows()
        .iter()
        .filter(|x| (margin(w_a, b_a, x) > 0.0) == (margin(w_b, b_b, x) > 0.0))
        .count();
    same as f64 / test.len() as f64
}

#[test]
fn dual_cd_matches_liblinear_and_scikit_learn_objective_and_predictions() {
    let dir = tempfile::tempdir().expect("temp dir");
    let train_path = dir.path().join("train.svm");
    write_svmlight(
        &synthetic(3_000, 2024),
        File::create(&train_path).expect("create"),
    )
    .expect("write train file");
    // Every model, tamis's included, trains on the file as read back, so all see the same data.
    let train = parse_svmlight(
        BufReader::new(File::open(&train_path).expect("open")),
        "train.svm",
    )
    .expect("parse train file");
    let train = Dataset::new(train.rows().to_vec(), train.labels().to_vec(), DIMS).expect("dims");
    let test = synthetic(2_000, 7);
    assert!(train.n_pos() * 2 < train.n_neg(), "imbalanced as intended");

    let eps = 0.001;
    let configs: Vec<(f64, Loss)> = [0.1, 1.0, 10.0]
        .into_iter()
        .flat_map(|c| [(c, Loss::Hinge), (c, Loss::SquaredHinge)])
        .collect();
    let request: Vec<_> = configs
        .iter()
        .map(|&(c, loss)| {
            let loss = if loss == Loss::Hinge {
                "hinge"
            } else {
                "squared_hinge"
            };
            serde_json::json!({"c": c, "loss": loss, "eps": eps})
        })
        .collect();
    let stdout = crate::python::run(
        REFERENCE_SCRIPT,
        &[
            train_path.to_str().expect("utf-8 temp path"),
            &DIMS.to_string(),
        ],
        serde_json::to_string(&request).expect("json").as_bytes(),
    );
    let answers: Vec<serde_json::Value> = serde_json::from_slice(&stdout).expect("reference JSON");
    assert_eq!(answers.len(), configs.len());

    for (&(c, loss), answer) in configs.iter().zip(&answers) {
        let params = SvmParamsBuilder {
            c,
            loss,
            bias: 1.0,
            tolerance: eps,
            max_iterations: 1000,
            seed: 1,
            ..SvmParamsBuilder::default()
        }
        .validate()
        .expect("valid parameters");
        let ours = fit_svm(&train, &params);
        let ours_obj = ours.primal_objective(&train, &params);
        for reference in ["liblinear", "sklearn"] {
            let w: Vec<f64> = answer[reference]["w"]
                .as_array()
                .expect("weights")
                .iter()
                .map(|v| v.as_f64().expect("number"))
                .collect();
            let b = answer[reference]["b"].as_f64().expect("bias");
            assert_eq!(w.len(), DIMS);
            let ref_obj = primal_objective(&w, b, &train, &params);
            let rel = (ours_obj - ref_obj) / ref_obj;
            let agree = agreement(ours.weights(), ours.bias(), &w, b, &test);
            eprintln!(
                "C={c} {loss:?} vs {reference}: tamis {ours_obj:.6} ({} passes, converged {}), \
                 reference {ref_obj:.6}, relative difference {rel:+.2e}, test agreement {:.2}%",
                ours.iterations(),
                ours.converged(),
                agree * 100.0
            );
            // Reference: liblinear-official 2.50 (the reference implementation) and
            // scikit-learn LinearSVC (bundled liblinear), same file, C, loss, -B 1, eps.
            assert!(
                rel.abs() <= 1e-3,
                "C={c} {loss:?}: objective {ours_obj} vs {reference} {ref_obj}"
            );
            assert!(
                agree >= 0.995,
                "C={c} {loss:?}: predictions agree with {reference} on {agree}"
            );
        }
    }
}
