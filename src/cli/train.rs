//! `tamis train`: labelled mail in, a model file and a report out.

use std::path::{Path, PathBuf};
use std::time::Instant;

use anyhow::Context;
use serde::Serialize;

use super::input::{
    BadInput, CorpusInput, Format, check_output, peak_memory_bytes, plot_failed, write_failed,
};
use crate::Label;
use crate::features::{FeatureSpec, SparseVector};
use crate::model::file::{ModelFileError, save_model};
use crate::model::{Calibration, LinearModel, Thresholds, TrainingSummary};
use crate::train::dataset::Dataset;
use crate::train::platt::fit_platt;
use crate::train::plots::{FprScale, write_roc_svg, write_score_histograms_svg};
use crate::train::roc::RocCurve;
use crate::train::select::{
    Candidate, balanced_class_weights, better, default_thresholds, evaluate_candidate,
    stratified_folds,
};
use crate::train::solver::{Loss, SvmParamsBuilder, fit_svm};
use crate::train::svmlight::parse_svmlight;
use crate::train::vectorize::progress_bar;

/// The loss the solver minimises.
#[derive(clap::ValueEnum, Clone, Copy, Debug, PartialEq, Eq)]
pub enum LossArg {
    /// Squared hinge (L2-loss SVM): smooth, usually the better default.
    SquaredHinge,
    /// Hinge (L1-loss SVM).
    Hinge,
}

/// How the classes are weighted against each other.
#[derive(clap::ValueEnum, Clone, Copy, Debug, PartialEq, Eq)]
pub enum ClassWeight {
    /// Each class weighs as much in total as the other, whatever their sizes.
    Balanced,
    /// Every message weighs the same.
    None,
}

/// Arguments of `tamis train`.
#[derive(clap::Args, Debug)]
pub struct TrainArgs {
    #[command(flatten)]
    input: CorpusInput,
    /// Train from an svmlight/libsvm file written by `tamis features` instead of from mail.
    /// Give exactly one --ngram: the order the file was written with.
    #[arg(long, value_name = "FILE", conflicts_with_all = ["spam", "ham", "labels"])]
    svmlight: Option<PathBuf>,
    /// Where to write the model.
    #[arg(long, value_name = "MODEL")]
    out: PathBuf,
    /// Also write report.json and SVG plots (ROC curve, score histograms) into this folder.
    #[arg(long, value_name = "DIR")]
    report: Option<PathBuf>,
    /// Word n-gram orders to try (cross-validation picks one).
    #[arg(long, value_delimiter = ',', default_values_t = [1u8, 2, 3])]
    ngram: Vec<u8>,
    /// Regularisation constants C to try (larger fits the training mail more closely).
    #[arg(long = "c", value_delimiter = ',', default_values_t = [0.1, 0.3, 1.0, 3.0, 10.0])]
    c_grid: Vec<f64>,
    /// Number of cross-validation folds.
    #[arg(long, default_value_t = 5)]
    folds: usize,
    /// False-positive rate at which junk caught is compared (0.001 = 0.1% of legitimate mail).
    #[arg(long, default_value_t = 0.001)]
    target_fpr: f64,
    /// Loss function.
    #[arg(long, value_enum, default_value_t = LossArg::SquaredHinge)]
    loss: LossArg,
    /// Class weighting, for corpora with far more of one class.
    #[arg(long, value_enum, default_value_t = ClassWeight::Balanced)]
    class_weight: ClassWeight,
    /// Size of the hashed feature space, as a power of two.
    #[arg(long, default_value_t = FeatureSpec::default().hash_bits)]
    hash_bits: u8,
    /// Seed for fold assignment and the solver's permutations.
    #[arg(long, default_value_t = 7)]
    seed: u64,
    /// Output format of the report on stdout.
    #[arg(long, value_enum, default_value_t = Format::Text)]
    format: Format,
}

/// The training report (stdout in JSON, `report.json`).
#[derive(Serialize)]
struct Report {
    model: String,
    n_spam: usize,
    n_ham: usize,
    skipped: usize,
    candidates: Vec<Candidate>,
    chosen: Candidate,
    folds: usize,
    cv_auc: f64,
    cv_tpr_at_fpr: std::collections::BTreeMap<String, f64>,
    calibration: Option<Calibration>,
    thresholds: Thresholds,
    training_seconds: f64,
    peak_memory_bytes: Option<u64>,
}

struct Best {
    candidate: Candidate,
    margins: Vec<f64>,
    data: Option<Dataset>,
}

/// Runs `tamis train`.
pub fn run(args: &TrainArgs) -> anyhow::Result<u8> {
    let started = Instant::now();
    validate(args)?;
    let base_spec = FeatureSpec {
        hash_bits: args.hash_bits,
        ..FeatureSpec::default()
    };
    let mut best: Option<Best> = None;
    let mut candidates = Vec::new();
    let mut skipped = 0;
    for &order in &args.ngram {
        let spec = FeatureSpec {
            max_ngram: order,
            ..base_spec.clone()
        };
        let data = match &args.svmlight {
            Some(path) => dataset_from_svmlight(path, &spec)?,
            None => {
                let loaded = args.input.load(&spec, true)?;
                skipped = loaded.problems.len();
                to_dataset(loaded.rows, &loaded.labels, &spec)?
            }
        };
        if data.n_pos() < args.folds || data.n_neg() < args.folds {
            return Err(BadInput(format!(
                "{} junk and {} legitimate messages are too few for {}-fold cross-validation",
                data.n_pos(),
                data.n_neg(),
                args.folds
            ))
            .into());
        }
        let folds = stratified_folds(data.labels(), args.folds, args.seed);
        let bar = progress_bar(args.c_grid.len() as u64, &format!("n-gram {order}"));
        let mut best_from_here = false;
        for &c in &args.c_grid {
            let params = solver_params(args, c, &data);
            let (candidate, margins) =
                evaluate_candidate(&data, order, &params, &folds, args.folds, args.target_fpr)?;
            bar.inc(1);
            if best
                .as_ref()
                .is_none_or(|b| better(&candidate, &b.candidate))
            {
                best = Some(Best {
                    candidate: candidate.clone(),
                    margins,
                    data: None,
                });
                best_from_here = true;
            }
            candidates.push(candidate);
        }
        bar.finish_and_clear();
        if best_from_here
            && let Some(b) = best.as_mut()
            && b.candidate.max_ngram == order
        {
            b.data = Some(data);
        }
    }
    let Some(Best {
        candidate: chosen,
        margins,
        data: Some(data),
    }) = best
    else {
        anyhow::bail!("model selection produced no candidate");
    };

    let spec = FeatureSpec {
        max_ngram: chosen.max_ngram,
        ..base_spec
    };
    let params = solver_params(args, chosen.c, &data).validate()?;
    let fitted = fit_svm(&data, &params);
    let positive: Vec<bool> = data.labels().iter().map(|&l| l > 0).collect();
    let curve = RocCurve::from_scores(&margins, &positive)?;
    let calibration = fit_platt(&margins, &positive)
        .ok()
        .map(|p| Calibration { a: p.a(), b: p.b() });
    let thresholds = default_thresholds(&curve, &margins, args.target_fpr)?;
    let mut cv = std::collections::BTreeMap::new();
    for fpr in [0.001, 0.01] {
        cv.insert(fpr.to_string(), curve.tpr_at_fpr(fpr)?.tpr);
    }
    let mut summary = TrainingSummary {
        n_spam: data.n_pos() as u64,
        n_ham: data.n_neg() as u64,
        trained_at_unix: std::time::SystemTime::now()
            .duration_since(std::time::UNIX_EPOCH)
            .map_or(0, |d| d.as_secs()),
        tool_version: env!("CARGO_PKG_VERSION").to_string(),
        solver: format!(
            "{} C={} class-weight={:?} ({} passes{})",
            loss_name(args.loss),
            chosen.c,
            args.class_weight,
            fitted.iterations(),
            if fitted.converged() {
                ""
            } else {
                ", not converged"
            }
        ),
        cross_validation: Default::default(),
    };
    summary.cross_validation.insert("auc".into(), curve.auc());
    for (fpr, tpr) in &cv {
        summary
            .cross_validation
            .insert(format!("tpr_at_fpr_{fpr}"), *tpr);
    }
    let weights: Vec<f32> = fitted.weights().iter().map(|&w| w as f32).collect();
    let model = LinearModel::new(
        spec,
        weights,
        fitted.bias(),
        calibration,
        Some(thresholds),
        summary,
    )?;
    save_model(&model, &args.out).map_err(|e| match e {
        ModelFileError::File(e) => write_failed(e),
        other => other.into(),
    })?;

    let report = Report {
        model: args.out.display().to_string(),
        n_spam: data.n_pos(),
        n_ham: data.n_neg(),
        skipped,
        candidates,
        chosen,
        folds: args.folds,
        cv_auc: curve.auc(),
        cv_tpr_at_fpr: cv,
        calibration,
        thresholds,
        training_seconds: started.elapsed().as_secs_f64(),
        peak_memory_bytes: peak_memory_bytes(),
    };
    if let Some(dir) = &args.report {
        write_report(dir, &report, &curve, &margins, &positive)?;
    }
    match args.format {
        Format::Json => println!("{}", serde_json::to_string(&report)?),
        Format::Text => print_text(&report),
    }
    Ok(super::EXIT_OK)
}

fn validate(args: &TrainArgs) -> anyhow::Result<()> {
    let bad = |m: String| Err(BadInput(m).into());
    // An output that cannot be written fails now, not after the training.
    check_output(&args.out)?;
    if args.svmlight.is_none() && args.input.is_empty() {
        return bad("no training mail: give --spam PATH... --ham PATH..., --labels FILE, or --svmlight FILE".into());
    }
    if args.svmlight.is_some() && args.ngram.len() != 1 {
        return bad(
            "with --svmlight give exactly one --ngram: the order the file was written with".into(),
        );
    }
    if args.ngram.is_empty()
        || args
            .ngram
            .iter()
            .any(|&n| !(1..=crate::features::spec::MAX_NGRAM_ORDER).contains(&n))
    {
        return bad(format!(
            "--ngram values must be between 1 and {}",
            crate::features::spec::MAX_NGRAM_ORDER
        ));
    }
    if args.c_grid.is_empty() || args.c_grid.iter().any(|&c| !(c.is_finite() && c > 0.0)) {
        return bad("--c values must be positive numbers".into());
    }
    if args.folds < 2 {
        return bad("--folds must be at least 2".into());
    }
    if !(args.target_fpr > 0.0 && args.target_fpr < 1.0) {
        return bad("--target-fpr must be between 0 and 1 (e.g. 0.001 for 0.1%)".into());
    }
    Ok(())
}

fn loss_name(loss: LossArg) -> &'static str {
    match loss {
        LossArg::SquaredHinge => "squared-hinge",
        LossArg::Hinge => "hinge",
    }
}

fn solver_params(args: &TrainArgs, c: f64, data: &Dataset) -> SvmParamsBuilder {
    let (weight_pos, weight_neg) = match args.class_weight {
        ClassWeight::None => (1.0, 1.0),
        ClassWeight::Balanced => balanced_class_weights(data),
    };
    SvmParamsBuilder {
        c,
        loss: match args.loss {
            LossArg::SquaredHinge => Loss::SquaredHinge,
            LossArg::Hinge => Loss::Hinge,
        },
        weight_pos,
        weight_neg,
        seed: args.seed,
        ..SvmParamsBuilder::default()
    }
}

fn to_dataset(
    rows: Vec<SparseVector>,
    labels: &[Label],
    spec: &FeatureSpec,
) -> anyhow::Result<Dataset> {
    let labels = labels
        .iter()
        .map(|l| if *l == Label::Spam { 1 } else { -1 })
        .collect();
    Ok(Dataset::new(rows, labels, spec.dimensions())?)
}

fn dataset_from_svmlight(path: &Path, spec: &FeatureSpec) -> anyhow::Result<Dataset> {
    let file = std::fs::File::open(path)
        .map_err(|e| BadInput(format!("{}: cannot read: {e}", path.display())))?;
    let parsed = parse_svmlight(std::io::BufReader::new(file), &path.display().to_string())
        .map_err(|e| BadInput(e.to_string()))?;
    if parsed.dimensions() > spec.dimensions() {
        return Err(BadInput(format!(
            "{}: feature index {} does not fit 2^{} dimensions; pass the --hash-bits the file was written with",
            path.display(),
            parsed.dimensions(),
            spec.hash_bits
        ))
        .into());
    }
    let rows = parsed.rows().to_vec();
    Ok(Dataset::new(
        rows,
        parsed.labels().to_vec(),
        spec.dimensions(),
    )?)
}

fn write_report(
    dir: &Path,
    report: &Report,
    curve: &RocCurve,
    margins: &[f64],
    positive: &[bool],
) -> anyhow::Result<()> {
    std::fs::create_dir_all(dir).with_context(|| format!("create {}", dir.display()))?;
    crate::fsio::write_bytes(
        &dir.join("report.json"),
        &serde_json::to_vec_pretty(report)?,
    )
    .map_err(write_failed)?;
    let marks = [
        ("quarantine", curve.tpr_at_fpr(0.001)?),
        ("tag", curve.tpr_at_fpr(0.01)?),
    ];
    write_roc_svg(
        &dir.join("roc.svg"),
        curve,
        curve.auc(),
        &marks,
        FprScale::Log,
    )
    .map_err(plot_failed)?;
    let class = |want: bool| -> Vec<f64> {
        margins
            .iter()
            .zip(positive)
            .filter(|&(_, &p)| p == want)
            .map(|(&m, _)| m)
            .collect()
    };
    let (spam, ham) = (class(true), class(false));
    write_score_histograms_svg(
        &dir.join("scores.svg"),
        &spam,
        &ham,
        &[
            ("tag", report.thresholds.tag),
            ("quarantine", report.thresholds.quarantine),
        ],
    )
    .map_err(plot_failed)?;
    Ok(())
}

fn print_text(r: &Report) {
    println!(
        "trained {} on {} junk and {} legitimate messages ({} skipped)",
        r.model, r.n_spam, r.n_ham, r.skipped
    );
    println!(
        "\n{}-fold cross-validation (junk caught at 0.1% false positives):",
        r.folds
    );
    println!("  {:>6} {:>8} {:>8} {:>10}", "n-gram", "C", "AUC", "caught");
    for c in &r.candidates {
        let mark = if c == &r.chosen { "  <- chosen" } else { "" };
        println!(
            "  {:>6} {:>8} {:>8.5} {:>9.2}%{mark}",
            c.max_ngram,
            c.c,
            c.auc,
            c.tpr_at_target * 100.0
        );
    }
    println!("\nout-of-fold figures of the chosen setting:");
    println!("  ROC AUC {:.5}", r.cv_auc);
    for (fpr, tpr) in &r.cv_tpr_at_fpr {
        println!(
            "  junk caught at {fpr} false-positive rate: {:.2}%",
            tpr * 100.0
        );
    }
    if let Some(c) = r.calibration {
        println!(
            "  Platt calibration: P(junk) = 1 / (1 + exp({:.4} * margin + {:.4}))",
            c.a, c.b
        );
    }
    println!(
        "  default thresholds: tag at margin >= {:.4}, quarantine at margin >= {:.4}",
        r.thresholds.tag, r.thresholds.quarantine
    );
    println!("\ntraining took {:.1} s", r.training_seconds);
    if let Some(peak) = r.peak_memory_bytes {
        println!("peak memory {:.0} MiB", peak as f64 / (1024.0 * 1024.0));
    }
    println!("Run `tamis tune` on held-out mail before letting this model quarantine anything.");
}
