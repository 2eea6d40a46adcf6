//! Explanations: which features pushed a message's margin, in words a person can read.

use std::collections::HashMap;

use serde::Serialize;

use super::LinearModel;
use crate::analyze::Analyzer;

/// One feature's share of a margin.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Contribution {
    /// The feature as `namespace:"text"`, e.g. `body:"claim your"` or `url:promo.example`.
    pub feature: String,
    /// `weight × value`; positive pushes towards junk.
    pub contribution: f64,
}

/// The `k` features of the analyzer's last message with the largest absolute contribution
/// to its margin under `model`. Texts that hash to the same index share its contribution
/// equally, so the parts always add up to the margin minus the bias.
pub fn top_contributions(
    model: &LinearModel,
    analyzer: &mut Analyzer,
    k: usize,
) -> Vec<Contribution> {
    let mut texts_per_index: HashMap<u32, Vec<String>> = HashMap::new();
    analyzer.for_each_feature(|ns, text, index| {
        let names = texts_per_index.entry(index).or_default();
        let name = match ns {
            crate::features::Namespace::Subject
            | crate::features::Namespace::Body
            | crate::features::Namespace::Hidden => format!("{}:\"{}\"", ns.tag(), text),
            _ => format!("{}:{}", ns.tag(), text),
        };
        if !names.contains(&name) {
            names.push(name);
        }
    });
    let weights = model.weights();
    let mut parts = Vec::new();
    for (index, value) in analyzer.vector().iter() {
        let weight = f64::from(weights.get(index as usize).copied().unwrap_or(0.0));
        let total = weight * f64::from(value);
        let Some(names) = texts_per_index.get(&index) else {
            continue;
        };
        let share = total / names.len() as f64;
        for name in names {
            parts.push(Contribution {
                feature: name.clone(),
                contribution: share,
            });
        }
    }
    parts.sort_by(|a, b| {
        b.contribution
            .abs()
            .total_cmp(&a.contribution.abs())
            .then_with(|| a.feature.cmp(&b.feature))
    });
    parts.truncate(k);
    parts
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::features::FeatureSpec;
    use crate::model::TrainingSummary;

    #[test]
    fn contributions_add_up_to_the_margin() {
        let spec = FeatureSpec {
            hash_bits: 12,
            ..FeatureSpec::default()
        };
        let weights: Vec<f32> = (0..4096)
            .map(|i| ((i * 37 % 101) as f32 - 50.0) / 25.0)
            .collect();
        let model = LinearModel::new(
            spec.clone(),
            weights,
            0.5,
            None,
            None,
            TrainingSummary::default(),
        )
        .expect("valid model");
        let mut analyzer = Analyzer::new(spec).expect("valid spec");
        let raw = b"From: a@promo.example\r\nSubject: claim your prize\r\n\r\nclaim your prize at https://promo.example/x today\r\n";
        let margin = model.margin(analyzer.vectorize(raw).expect("mail"));
        let all = top_contributions(&model, &mut analyzer, usize::MAX);
        let sum: f64 = all.iter().map(|c| c.contribution).sum();
        assert!(
            (sum + model.bias() - margin).abs() < 1e-9,
            "sum {sum} margin {margin}"
        );
        assert!(all.iter().any(|c| c.feature == "body:\"claim your\""));
        assert!(all.iter().any(|c| c.feature == "url:promo.example"));
        let top3 = top_contributions(&model, &mut analyzer, 3);
        assert_eq!(top3.len(), 3);
        assert!(top3[0].contribution.abs() >= top3[2].contribution.abs());
    }
}
