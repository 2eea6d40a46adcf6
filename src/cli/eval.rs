//! `tamis eval`: how good a model is on labelled mail, overall and per recipient domain.

use std::collections::BTreeMap;
use std::path::PathBuf;

use anyhow::Context;
use serde::Serialize;

use super::input::{BadInput, CorpusInput, Format, plot_failed};
use crate::Label;
use crate::model::LinearModel;
use crate::model::file::load_model;
use crate::train::plots::{FprScale, write_roc_svg, write_score_histograms_svg};
use crate::train::roc::{Confusion, OperatingPoint, RocCurve};

/// Arguments of `tamis eval`.
#[derive(clap::Args, Debug)]
pub struct EvalArgs {
    /// The model to evaluate.
    #[arg(long, value_name = "MODEL")]
    model: PathBuf,
    #[command(flatten)]
    input: CorpusInput,
    /// Output format.
    #[arg(long, value_enum, default_value_t = Format::Text)]
    format: Format,
    /// Write roc.svg and scores.svg into this folder.
    #[arg(long, value_name = "DIR")]
    plot: Option<PathBuf>,
}

/// Figures of one set of messages.
#[derive(Serialize)]
pub struct Figures {
    n_spam: usize,
    n_ham: usize,
    /// ROC AUC; absent when a class is missing.
    auc: Option<f64>,
    /// Junk caught at false-positive rates "0.001" and "0.01".
    tpr_at_fpr: BTreeMap<String, f64>,
    /// Confusion table at the model's tag threshold.
    at_tag: Option<Confusion>,
    /// Confusion table at the model's quarantine threshold.
    at_quarantine: Option<Confusion>,
}

#[derive(Serialize)]
struct Report {
    model: String,
    #[serde(flatten)]
    all: Figures,
    domains: BTreeMap<String, Figures>,
}

/// Margins of every loaded message under `model`, with labels and domains.
pub struct Scored {
    /// Margin of each message.
    pub margins: Vec<f64>,
    /// Whether each message is junk.
    pub positive: Vec<bool>,
    /// Recipient domain of each message.
    pub domains: Vec<Option<String>>,
}

/// Loads `input` with the model's feature spec and scores it.
pub fn score_corpus(model: &LinearModel, input: &CorpusInput) -> anyhow::Result<Scored> {
    let data = input.load(model.spec(), false)?;
    Ok(Scored {
        margins: data.rows.iter().map(|r| model.margin(r)).collect(),
        positive: data.labels.iter().map(|&l| l == Label::Spam).collect(),
        domains: data.domains,
    })
}

fn figures(model: &LinearModel, margins: &[f64], positive: &[bool]) -> anyhow::Result<Figures> {
    let n_spam = positive.iter().filter(|&&p| p).count();
    let n_ham = positive.len() - n_spam;
    let mut tpr_at_fpr = BTreeMap::new();
    let mut auc = None;
    if n_spam > 0 && n_ham > 0 {
        let curve = RocCurve::from_scores(margins, positive)?;
        auc = Some(curve.auc());
        for fpr in [0.001, 0.01] {
            tpr_at_fpr.insert(fpr.to_string(), curve.tpr_at_fpr(fpr)?.tpr);
        }
    }
    let confusion = |t: f64| crate::train::roc::confusion_table(margins, positive, t).ok();
    let thresholds = model.thresholds();
    Ok(Figures {
        n_spam,
        n_ham,
        auc,
        tpr_at_fpr,
        at_tag: thresholds.and_then(|t| confusion(t.tag)),
        at_quarantine: thresholds.and_then(|t| confusion(t.quarantine)),
    })
}

/// Runs `tamis eval`.
pub fn run(args: &EvalArgs) -> anyhow::Result<u8> {
    let model = load_model(&args.model).map_err(|e| BadInput(e.to_string()))?;
    let scored = score_corpus(&model, &args.input)?;
    let all = figures(&model, &scored.margins, &scored.positive)?;
    let mut by_domain: BTreeMap<String, (Vec<f64>, Vec<bool>)> = BTreeMap::new();
    for ((m, p), d) in scored
        .margins
        .iter()
        .zip(&scored.positive)
        .zip(&scored.domains)
    {
        if let Some(d) = d {
            let entry = by_domain.entry(d.clone()).or_default();
            entry.0.push(*m);
            entry.1.push(*p);
        }
    }
    let mut domains = BTreeMap::new();
    for (d, (m, p)) in &by_domain {
        domains.insert(d.clone(), figures(&model, m, p)?);
    }
    let report = Report {
        model: args.model.display().to_string(),
        all,
        domains,
    };
    if let Some(dir) = &args.plot {
        plot(dir, &model, &scored)?;
    }
    match args.format {
        Format::Json => println!("{}", serde_json::to_string(&report)?),
        Format::Text => print_text(&report),
    }
    Ok(super::EXIT_OK)
}

fn plot(dir: &std::path::Path, model: &LinearModel, scored: &Scored) -> anyhow::Result<()> {
    std::fs::create_dir_all(dir).with_context(|| format!("create {}", dir.display()))?;
    let curve = RocCurve::from_scores(&scored.margins, &scored.positive)
        .map_err(|e| BadInput(format!("cannot plot: {e}")))?;
    let mut marks = Vec::new();
    if let Some(t) = model.thresholds() {
        marks.push(("tag", operating_point(&curve, t.tag)));
        marks.push(("quarantine", operating_point(&curve, t.quarantine)));
    }
    write_roc_svg(
        &dir.join("roc.svg"),
        &curve,
        curve.auc(),
        &marks,
        FprScale::Log,
    )
    .map_err(plot_failed)?;
    let spam: Vec<f64> = scored
        .margins
        .iter()
        .zip(&scored.positive)
        .filter(|(_, p)| **p)
        .map(|(m, _)| *m)
        .collect();
    let ham: Vec<f64> = scored
        .margins
        .iter()
        .zip(&scored.positive)
        .filter(|(_, p)| !**p)
        .map(|(m, _)| *m)
        .collect();
    let lines: Vec<(&str, f64)> = model
        .thresholds()
        .map(|t| vec![("tag", t.tag), ("quarantine", t.quarantine)])
        .unwrap_or_default();
    write_score_histograms_svg(&dir.join("scores.svg"), &spam, &ham, &lines)
        .map_err(plot_failed)?;
    Ok(())
}

fn operating_point(curve: &RocCurve, threshold: f64) -> OperatingPoint {
    let c = curve.confusion_at(threshold);
    OperatingPoint {
        threshold,
        tpr: c.tpr().unwrap_or(0.0),
        fpr: c.fpr().unwrap_or(0.0),
        true_pos: c.true_pos,
        false_pos: c.false_pos,
    }
}

fn print_figures(name: &str, f: &Figures) {
    println!("{name}: {} junk, {} legitimate", f.n_spam, f.n_ham);
    match f.auc {
        Some(auc) => println!("  ROC AUC {auc:.5}"),
        None => println!("  ROC AUC: needs both classes"),
    }
    for (fpr, tpr) in &f.tpr_at_fpr {
        println!(
            "  junk caught at {fpr} false-positive rate: {:.2}%",
            tpr * 100.0
        );
    }
    for (action, c) in [("tag", &f.at_tag), ("quarantine", &f.at_quarantine)] {
        if let Some(c) = c {
            println!(
                "  at the {action} threshold: {} junk caught, {} missed; {} legitimate flagged (false positives), {} passed",
                c.true_pos, c.false_neg, c.false_pos, c.true_neg
            );
        }
    }
}

fn print_text(r: &Report) {
    print_figures(&format!("all mail, model {}", r.model), &r.all);
    for (d, f) in &r.domains {
        print_figures(&format!("domain {d}"), f);
    }
}
