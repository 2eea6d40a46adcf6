//! The one pipeline from raw message bytes to a feature vector.
//!
//! Training, evaluation, scoring and `tamis extract` all go through [`Analyzer`], so a
//! model always sees vectors made by exactly the code that will score with it.

use crate::features::{FeatureSpec, Featurizer, FieldTokens, SparseVector, SpecError};
use crate::mail::{Extracted, Extractor, MailError};

/// Reusable state for `extract → normalize → featurize` under one [`FeatureSpec`].
#[derive(Debug)]
pub struct Analyzer {
    extractor: Extractor,
    featurizer: Featurizer,
    extracted: Extracted,
    fields: FieldTokens,
    vector: SparseVector,
}

impl Default for Analyzer {
    /// An analyzer with the built-in default spec.
    fn default() -> Self {
        // The default spec is checked by the spec's own tests; a failure here is a bug in
        // this binary, not a runtime condition.
        match Analyzer::new(FeatureSpec::default()) {
            Ok(analyzer) => analyzer,
            Err(e) => unreachable!("built-in feature spec rejected: {e}"),
        }
    }
}

impl Analyzer {
    /// An analyzer for `spec`, refused when this binary cannot reproduce it.
    pub fn new(spec: FeatureSpec) -> Result<Self, SpecError> {
        let extractor = Extractor::new(spec.limits);
        let featurizer = Featurizer::new(spec)?;
        Ok(Analyzer {
            extractor,
            featurizer,
            extracted: Extracted::default(),
            fields: FieldTokens::default(),
            vector: SparseVector::new(),
        })
    }

    /// The spec in force.
    pub fn spec(&self) -> &FeatureSpec {
        self.featurizer.spec()
    }

    /// Runs the whole pipeline on `raw`, a file that should hold one message, and returns
    /// the message's vector. Refuses bytes that do not start like mail.
    pub fn vectorize(&mut self, raw: &[u8]) -> Result<&SparseVector, MailError> {
        self.extractor.extract(raw, &mut self.extracted)?;
        Ok(self.featurize())
    }

    /// Runs the whole pipeline on `raw`, a message handed over by a relay, and returns its
    /// vector. Never refuses: relayed bytes are mail by definition, so an odd start is
    /// scored with a signal instead of escaping the filter
    /// ([`crate::mail::Extractor::extract_relayed`]).
    pub fn vectorize_relayed(&mut self, raw: &[u8]) -> &SparseVector {
        self.extractor.extract_relayed(raw, &mut self.extracted);
        self.featurize()
    }

    fn featurize(&mut self) -> &SparseVector {
        self.fields.fill(&self.extracted);
        self.featurizer
            .featurize(&self.fields, &self.extracted, &mut self.vector);
        &self.vector
    }

    /// What the last [`Analyzer::vectorize`] or [`Analyzer::vectorize_relayed`] call
    /// extracted.
    pub fn extracted(&self) -> &Extracted {
        &self.extracted
    }

    /// The normalized tokens of the last message.
    pub fn fields(&self) -> &FieldTokens {
        &self.fields
    }

    /// The vector of the last message.
    pub fn vector(&self) -> &SparseVector {
        &self.vector
    }

    /// Calls `visit(namespace, text, index)` for every feature of the last message.
    pub fn for_each_feature(&mut self, visit: impl FnMut(crate::features::Namespace, &str, u32)) {
        self.featurizer
            .for_each_feature(&self.fields, &self.extracted, visit);
    }
}
