//! From extracted, normalized text to a hashed sparse vector.
//!
//! Each field is a namespace of its own ([`Namespace`]): word n-grams of order 1..=N in the
//! subject, body and hidden text; whole values for URL hosts, the sender's domain,
//! authentication results and structural signals. A feature's key is its namespace tag, a
//! unit separator and its text (`body\x1fclaim your`); MurmurHash3 x86_32 of that key with the
//! spec's seed, reduced modulo `2^b`, is its index (feature hashing, Weinberger et al. 2009).
//! Counts become sublinear term frequencies `1 + ln(tf)` and the vector is scaled to unit
//! L2 norm. [`Featurizer`] reuses its buffers, so after warm-up a message costs no
//! allocation per token or per n-gram.

pub mod murmur3;
pub mod sparse;
pub mod spec;

pub use murmur3::murmur3_x86_32;
pub use sparse::SparseVector;
pub use spec::{FeatureSpec, SpecError};

use crate::mail::Extracted;
use crate::text::TokenBuffer;

/// The field a feature comes from; features of different fields never collide by design
/// (only by the hash, at the rate `2^b` allows).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum Namespace {
    /// Word n-grams of the subject.
    Subject,
    /// Word n-grams of the visible body text.
    Body,
    /// Word n-grams of HTML text hidden from the reader.
    Hidden,
    /// Hosts of URLs, and their parent domain.
    Url,
    /// The domain of the `From` address.
    Sender,
    /// `method=result` of upstream authentication checks.
    Auth,
    /// Structural signals (html-only, attachment types, caps hit...).
    Signal,
}

impl Namespace {
    /// Every namespace, in the order features are generated.
    pub const ALL: [Namespace; 7] = [
        Namespace::Subject,
        Namespace::Body,
        Namespace::Hidden,
        Namespace::Url,
        Namespace::Sender,
        Namespace::Auth,
        Namespace::Signal,
    ];

    /// The tag hashed into every key of this namespace and shown in explanations.
    pub fn tag(self) -> &'static str {
        match self {
            Namespace::Subject => "subject",
            Namespace::Body => "body",
            Namespace::Hidden => "hidden",
            Namespace::Url => "url",
            Namespace::Sender => "from",
            Namespace::Auth => "auth",
            Namespace::Signal => "signal",
        }
    }
}

/// Normalized tokens of the text fields of one message.
#[derive(Debug, Default, Clone)]
pub struct FieldTokens {
    /// Subject tokens.
    pub subject: TokenBuffer,
    /// Visible body tokens, all parts in order.
    pub body: TokenBuffer,
    /// Hidden HTML text tokens.
    pub hidden: TokenBuffer,
}

impl FieldTokens {
    /// Tokenizes the text fields of `extracted`, replacing previous content.
    pub fn fill(&mut self, extracted: &Extracted) {
        self.subject.clear();
        self.body.clear();
        self.hidden.clear();
        self.subject.push_text(&extracted.subject);
        for segment in &extracted.body {
            self.body.push_text(segment);
        }
        for segment in &extracted.hidden {
            self.hidden.push_text(segment);
        }
    }
}

/// Turns a message's fields into feature indices and vectors under one [`FeatureSpec`].
#[derive(Debug, Clone)]
pub struct Featurizer {
    spec: FeatureSpec,
    key: Vec<u8>,
    indices: Vec<u32>,
}

impl Featurizer {
    /// A featurizer for `spec`, refused when this binary cannot reproduce the spec.
    pub fn new(spec: FeatureSpec) -> Result<Self, SpecError> {
        spec.check_supported()?;
        Ok(Featurizer {
            spec,
            key: Vec::new(),
            indices: Vec::new(),
        })
    }

    /// The spec this featurizer implements.
    pub fn spec(&self) -> &FeatureSpec {
        &self.spec
    }

    /// Calls `visit(namespace, text, index)` for every feature occurrence of the message,
    /// where `text` is the readable key without its namespace tag. Used for vectors and
    /// for explanations, so both always agree.
    pub fn for_each_feature(
        &mut self,
        fields: &FieldTokens,
        extracted: &Extracted,
        mut visit: impl FnMut(Namespace, &str, u32),
    ) {
        let mask = (1u32 << self.spec.hash_bits) - 1;
        let seed = self.spec.seed;
        let max_n = usize::from(self.spec.max_ngram);
        let key = &mut self.key;
        let mut emit = |ns: Namespace, text: &str| {
            key.clear();
            key.extend_from_slice(ns.tag().as_bytes());
            key.push(0x1f);
            key.extend_from_slice(text.as_bytes());
            let index = murmur3_x86_32(key, seed) & mask;
            visit(ns, text, index);
        };
        let mut gram = String::new();
        for (ns, tokens) in [
            (Namespace::Subject, &fields.subject),
            (Namespace::Body, &fields.body),
            (Namespace::Hidden, &fields.hidden),
        ] {
            // m tokens give m - n + 1 n-grams of order n.
            for start in 0..tokens.len() {
                gram.clear();
                for n in 1..=max_n {
                    let Some(token) = tokens.get(start + n - 1) else {
                        break;
                    };
                    if n > 1 {
                        gram.push(' ');
                    }
                    gram.push_str(token);
                    emit(ns, &gram);
                }
            }
        }
        for host in &extracted.url_hosts {
            emit(Namespace::Url, host);
            if let Some(parent) = parent_domain(host) {
                emit(Namespace::Url, parent);
            }
        }
        if let Some(domain) = &extracted.sender_domain {
            emit(Namespace::Sender, domain);
        }
        for result in &extracted.auth_results {
            emit(Namespace::Auth, result);
        }
        for signal in extracted.signals.iter() {
            gram.clear();
            use std::fmt::Write;
            // Writing to a String cannot fail.
            let _ = write!(gram, "{signal}");
            emit(Namespace::Signal, &gram);
        }
        self.key.clear();
    }

    /// The message's feature vector: hashed counts, `1 + ln(tf)`, unit L2 norm.
    pub fn featurize(
        &mut self,
        fields: &FieldTokens,
        extracted: &Extracted,
        out: &mut SparseVector,
    ) {
        let mut indices = std::mem::take(&mut self.indices);
        indices.clear();
        self.for_each_feature(fields, extracted, |_, _, index| indices.push(index));
        indices.sort_unstable();
        out.clear();
        let mut run = indices.iter().peekable();
        while let Some(&index) = run.next() {
            let mut tf = 1u32;
            while run.next_if_eq(&&index).is_some() {
                tf += 1;
            }
            out.push_merging(index, 1.0 + (tf as f32).ln());
        }
        out.normalize_l2();
        self.indices = indices;
    }
}

/// The last two labels of a host name with more than two (`a.b.example.org` →
/// `example.org`): an approximation of the registrable domain without a public-suffix
/// list (common practice). IP literals have no parent.
fn parent_domain(host: &str) -> Option<&str> {
    if host.contains(':') || host.bytes().all(|b| b.is_ascii_digit() || b == b'.') {
        return None;
    }
    let mut dots = host.rmatch_indices('.');
    dots.next()?;
    let (second, _) = dots.next()?;
    host.get(second + 1..)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn parent_domains() {
        assert_eq!(parent_domain("a.b.example.org"), Some("example.org"));
        assert_eq!(parent_domain("example.org"), None);
        assert_eq!(parent_domain("192.0.2.7"), None);
        assert_eq!(parent_domain("2001:db8::1"), None);
    }

    #[test]
    fn ngram_count_is_m_minus_n_plus_one() {
        let mut featurizer = Featurizer::new(FeatureSpec {
            max_ngram: 3,
            ..FeatureSpec::default()
        })
        .expect("valid spec");
        let mut fields = FieldTokens::default();
        fields.body.push_text("one two three four five");
        let extracted = Extracted::default();
        let mut orders = [0usize; 4];
        featurizer.for_each_feature(&fields, &extracted, |ns, text, _| {
            assert_eq!(ns, Namespace::Body);
            orders[text.split(' ').count()] += 1;
        });
        // m = 5 words: 5 unigrams, 4 bigrams, 3 trigrams.
        assert_eq!(orders, [0, 5, 4, 3]);
    }

    #[test]
    fn sublinear_tf_and_unit_norm() {
        let mut featurizer = Featurizer::new(FeatureSpec {
            max_ngram: 1,
            ..FeatureSpec::default()
        })
        .expect("valid spec");
        let mut fields = FieldTokens::default();
        fields.body.push_text("spam spam spam eggs");
        let mut v = SparseVector::new();
        featurizer.featurize(&fields, &Extracted::default(), &mut v);
        assert_eq!(v.nnz(), 2);
        assert!((v.l2_norm() - 1.0).abs() < 1e-6);
        let mut values: Vec<f32> = v.values().to_vec();
        values.sort_by(f32::total_cmp);
        let ratio = values[1] / values[0];
        assert!((ratio - (1.0 + 3f32.ln())).abs() < 1e-5);
    }
}
