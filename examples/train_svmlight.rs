//! Trains the dual coordinate descent SVM on an svmlight file and prints one JSON line:
//! `{"read_seconds", "seconds", "objective", "dual_objective", "iterations", "converged"}`,
//! where `seconds` covers training only, as the benchmark times the reference's `train` alone.
//!
//! Usage: `train_svmlight FILE C LOSS EPS [BIAS]`, LOSS being `hinge` or `squared_hinge`,
//! BIAS the constant feature value (liblinear `-B`, default 1).

use std::fs::File;
use std::io::BufReader;
use std::time::Instant;

use anyhow::{Context, bail};
use tamis::train::solver::{Loss, SvmParamsBuilder, fit_svm};
use tamis::train::svmlight::parse_svmlight;

fn main() -> anyhow::Result<()> {
    let args: Vec<String> = std::env::args().skip(1).collect();
    let (path, c, loss, eps, bias) = match args.as_slice() {
        [path, c, loss, eps] => (path, c, loss, eps, "1"),
        [path, c, loss, eps, bias] => (path, c, loss, eps, bias.as_str()),
        _ => bail!("usage: train_svmlight FILE C LOSS EPS [BIAS]"),
    };
    let loss = match loss.as_str() {
        "hinge" => Loss::Hinge,
        "squared_hinge" => Loss::SquaredHinge,
        other => bail!("LOSS must be hinge or squared_hinge, got {other}"),
    };
    let params = SvmParamsBuilder {
        c: c.parse().context("C")?,
        loss,
        bias: bias.parse().context("BIAS")?,
        tolerance: eps.parse().context("EPS")?,
        ..SvmParamsBuilder::default()
    }
    .validate()?;

    let start = Instant::now();
    let file = File::open(path).with_context(|| format!("open {path}"))?;
    let ds = parse_svmlight(BufReader::new(file), path)?;
    let read_seconds = start.elapsed().as_secs_f64();

    let start = Instant::now();
    let model = fit_svm(&ds, &params);
    let seconds = start.elapsed().as_secs_f64();

    let report = serde_json::json!({
        "read_seconds": read_seconds,
        "seconds": seconds,
        "objective": model.primal_objective(&ds, &params),
        "dual_objective": model.dual_objective(),
        "iterations": model.iterations(),
        "converged": model.converged(),
    });
    println!("{report}");
    Ok(())
}
