//! Threshold tuning: per-domain tag and quarantine thresholds that keep the false-positive
//! rate under a target with stated confidence.
//!
//! For a threshold `t` (a message is flagged when its margin is `>= t`), `k` of the domain's
//! `n` legitimate messages score at or above it. The true false-positive rate is bounded
//! above by the one-sided Clopper–Pearson bound `upper(k, n, confidence)`; the tuned
//! threshold is the lowest one whose bound is still under the target, which catches the most
//! junk the evidence allows. With few legitimate messages even `k = 0` cannot support a
//! small target (about `3 / target` are needed at 95%), and the tuner says so and falls back
//! to a conservative threshold instead of pretending.

use serde::Serialize;

use super::stats::clopper_pearson_upper;

/// What the thresholds must achieve.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct TuneTarget {
    /// Largest acceptable false-positive rate for quarantine, e.g. 0.001.
    pub quarantine_fpr: f64,
    /// Largest acceptable false-positive rate for tagging, e.g. 0.01.
    pub tag_fpr: f64,
    /// Confidence of the upper bound, e.g. 0.95.
    pub confidence: f64,
}

/// One tuned threshold and the evidence behind it.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Threshold {
    /// Margin at or above which the action applies.
    pub margin: f64,
    /// Legitimate messages at or above the threshold.
    pub false_positives: u64,
    /// Upper confidence bound on the false-positive rate.
    pub fpr_upper: f64,
    /// Share of junk at or above the threshold.
    pub junk_caught: f64,
    /// Whether the data support the target at this threshold.
    pub supported: bool,
}

/// Thresholds of one recipient domain (or of all mail, for the default).
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct DomainThresholds {
    /// The recipient domain; `None` for the default over all mail.
    pub domain: Option<String>,
    /// Junk messages evaluated.
    pub n_spam: u64,
    /// Legitimate messages evaluated.
    pub n_ham: u64,
    /// Threshold for tagging.
    pub tag: Threshold,
    /// Threshold for quarantine.
    pub quarantine: Threshold,
    /// Plain-words remarks, e.g. why a fallback was used.
    pub notes: Vec<String>,
}

/// The lowest threshold whose false-positive bound meets `target_fpr`, or `None` when no
/// threshold can be supported by `ham` alone.
pub fn tune_threshold(
    spam: &[f64],
    ham: &[f64],
    target_fpr: f64,
    confidence: f64,
) -> Option<Threshold> {
    let mut ham_desc: Vec<f64> = ham.iter().copied().filter(|s| s.is_finite()).collect();
    ham_desc.sort_by(|a, b| b.total_cmp(a));
    let n = ham_desc.len() as u64;
    if n == 0 {
        return None;
    }
    // The bound grows with k, so the largest allowed k is found by scanning upwards.
    let mut best: Option<Threshold> = None;
    for k in 0..=ham_desc.len() {
        let margin = if k == 0 {
            next_up(ham_desc[0])
        } else {
            ham_desc[k - 1]
        };
        // Ties make a threshold flag more than k messages: count what it really flags.
        let fp = ham_desc.iter().take_while(|&&s| s >= margin).count() as u64;
        let upper = clopper_pearson_upper(fp, n, confidence);
        if upper > target_fpr {
            break;
        }
        best = Some(Threshold {
            margin,
            false_positives: fp,
            fpr_upper: upper,
            junk_caught: share_at_or_above(spam, margin),
            supported: true,
        });
    }
    best
}

/// A threshold above every legitimate score seen: flags none of them, but the data cannot
/// say how many it would flag in the future.
fn conservative(spam: &[f64], ham: &[f64], confidence: f64) -> Threshold {
    let max_ham = ham
        .iter()
        .copied()
        .filter(|s| s.is_finite())
        .fold(f64::NEG_INFINITY, f64::max);
    let margin = if max_ham.is_finite() {
        next_up(max_ham)
    } else {
        0.0
    };
    Threshold {
        margin,
        false_positives: 0,
        fpr_upper: clopper_pearson_upper(0, ham.len() as u64, confidence),
        junk_caught: share_at_or_above(spam, margin),
        supported: false,
    }
}

fn share_at_or_above(scores: &[f64], t: f64) -> f64 {
    if scores.is_empty() {
        return 0.0;
    }
    scores.iter().filter(|&&s| s >= t).count() as f64 / scores.len() as f64
}

fn next_up(x: f64) -> f64 {
    // Smallest step above x, so "score >= threshold" excludes x itself.
    if x.is_finite() {
        let step = x.abs().max(1.0) * f64::EPSILON;
        x + step
    } else {
        x
    }
}

/// Tunes one set of thresholds. `fallback` (the default's thresholds) is used for an
/// action the domain's own data cannot support, when it is stricter than the domain's
/// conservative threshold.
pub fn tune_domain(
    domain: Option<String>,
    spam: &[f64],
    ham: &[f64],
    target: TuneTarget,
    fallback: Option<&DomainThresholds>,
) -> DomainThresholds {
    let mut notes = Vec::new();
    let mut pick = |name: &str, fpr: f64, fallback: Option<&Threshold>| -> Threshold {
        match tune_threshold(spam, ham, fpr, target.confidence) {
            Some(t) => t,
            None => {
                let needed = (-(1.0 - target.confidence).ln() / fpr).ceil();
                let own = conservative(spam, ham, target.confidence);
                let chosen = match fallback {
                    Some(f) if f.supported && f.margin > own.margin => Threshold {
                        junk_caught: share_at_or_above(spam, f.margin),
                        supported: false,
                        ..f.clone()
                    },
                    _ => own,
                };
                notes.push(format!(
                    "{name}: {} legitimate messages cannot support a false-positive rate of {fpr} at {:.0}% confidence (about {needed} are needed); using the conservative threshold {:.4}",
                    ham.len(),
                    target.confidence * 100.0,
                    chosen.margin
                ));
                chosen
            }
        }
    };
    let tag = pick("tag", target.tag_fpr, fallback.map(|f| &f.tag));
    let mut quarantine = pick(
        "quarantine",
        target.quarantine_fpr,
        fallback.map(|f| &f.quarantine),
    );
    if quarantine.margin < tag.margin {
        // Quarantine must never be easier to reach than tagging.
        quarantine = Threshold {
            margin: tag.margin,
            ..quarantine
        };
    }
    DomainThresholds {
        domain,
        n_spam: spam.len() as u64,
        n_ham: ham.len() as u64,
        tag,
        quarantine,
        notes,
    }
}

/// The thresholds as a policy snippet for the configuration file (TOML).
pub fn policy_snippet(
    all: &DomainThresholds,
    domains: &[DomainThresholds],
    target: TuneTarget,
    model: &str,
) -> String {
    let mut out = String::new();
    out.push_str(&format!(
        "# Written by `tamis tune` for model {model}.\n# Targets: quarantine false-positive rate <= {}, tag <= {}, one-sided {:.0}% Clopper-Pearson bound.\n# Thresholds are margins: a message scoring at or above one gets that action.\n",
        target.quarantine_fpr,
        target.tag_fpr,
        target.confidence * 100.0
    ));
    let mut section = |name: String, t: &DomainThresholds| {
        out.push_str(&format!("\n[{name}]\n"));
        out.push_str(&format!("tag_margin = {}\n", t.tag.margin));
        out.push_str(&format!("quarantine_margin = {}\n", t.quarantine.margin));
        out.push_str(&format!(
            "# evidence: {} legitimate, {} junk; junk caught at quarantine {:.1}%, false-positive bound {:.5}{}\n",
            t.n_ham,
            t.n_spam,
            t.quarantine.junk_caught * 100.0,
            t.quarantine.fpr_upper,
            if t.quarantine.supported { "" } else { " (target NOT supported by the data)" }
        ));
        for note in &t.notes {
            out.push_str(&format!("# note: {note}\n"));
        }
    };
    section("policy.default".to_string(), all);
    for d in domains {
        if let Some(name) = &d.domain {
            section(format!("policy.domains.\"{name}\""), d);
        }
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    fn scores(n: usize, low: f64, high: f64) -> Vec<f64> {
        (0..n)
            .map(|i| low + (high - low) * i as f64 / n as f64)
            .collect()
    }

    const TARGET: TuneTarget = TuneTarget {
        quarantine_fpr: 0.001,
        tag_fpr: 0.01,
        confidence: 0.95,
    };

    #[test]
    fn picks_the_lowest_threshold_whose_bound_meets_the_target() {
        let ham = scores(5000, -2.0, 0.0);
        let spam = scores(1000, -0.5, 2.0);
        let t = tune_threshold(&spam, &ham, 0.001, 0.95).expect("5000 ham support 0.1%");
        // With k = 0 the exact one-sided bound is 1 - 0.05^(1/n) (Clopper–Pearson closed
        // form), 0.000599 for n = 5000; allowing one more false positive must break it.
        assert!(t.supported && t.fpr_upper <= 0.001);
        let next = clopper_pearson_upper(t.false_positives + 1, 5000, 0.95);
        assert!(
            next > 0.001,
            "one more false positive would still fit: {next}"
        );
        let flagged = ham.iter().filter(|&&s| s >= t.margin).count() as u64;
        assert_eq!(flagged, t.false_positives);
        assert!(t.junk_caught > 0.7);
        let zero = clopper_pearson_upper(0, 5000, 0.95);
        assert!((zero - (1.0 - 0.05f64.powf(1.0 / 5000.0))).abs() < 1e-12);
    }

    #[test]
    fn too_little_legitimate_mail_is_said_and_falls_back() {
        let ham = scores(1000, -2.0, 0.0);
        let spam = scores(300, -0.5, 2.0);
        assert_eq!(tune_threshold(&spam, &ham, 0.001, 0.95), None);
        let d = tune_domain(Some("small.test".into()), &spam, &ham, TARGET, None);
        assert!(!d.quarantine.supported);
        assert!(
            d.quarantine.margin > 0.0 - 2.0 / 1000.0,
            "above every ham score"
        );
        assert!(d.notes.iter().any(|n| n.contains("cannot support")));
        assert!(d.tag.supported, "1000 ham do support 1%");
        assert!(d.quarantine.margin >= d.tag.margin);
    }

    #[test]
    fn snippet_lists_every_domain() {
        let ham = scores(5000, -2.0, 0.0);
        let spam = scores(1000, -0.5, 2.0);
        let all = tune_domain(None, &spam, &ham, TARGET, None);
        let one = tune_domain(
            Some("uni-lindqvist.test".into()),
            &spam,
            &ham,
            TARGET,
            Some(&all),
        );
        let text = policy_snippet(&all, &[one], TARGET, "demo.tamis");
        assert!(text.contains("[policy.default]"));
        assert!(text.contains("[policy.domains.\"uni-lindqvist.test\"]"));
        assert!(text.contains("quarantine_margin = "));
    }
}
