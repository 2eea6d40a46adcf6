//! The feature spec: every parameter that decides which vector a message becomes.
//!
//! A model is only meaningful with the exact spec it was trained with, so the spec is
//! recorded in every model file, and a binary refuses a spec it cannot reproduce
//! ([`FeatureSpec::check_supported`]) rather than scoring with silently different features.

use serde::{Deserialize, Serialize};

use crate::mail::ExtractLimits;
use crate::text::NORMALIZATION_VERSION;

/// Version of the featurization rules in this binary (namespaces, hashing input layout,
/// weighting). Bump on any change that alters vectors.
pub const FEATURE_SPEC_VERSION: u32 = 1;

/// Smallest and largest supported hash-space sizes, in bits.
pub const HASH_BITS_RANGE: std::ops::RangeInclusive<u8> = 10..=28;

/// Largest supported word n-gram order.
pub const MAX_NGRAM_ORDER: u8 = 4;

/// Every parameter of `extract → normalize → featurize`.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
pub struct FeatureSpec {
    /// Featurization rules version ([`FEATURE_SPEC_VERSION`] when built by this binary).
    pub version: u32,
    /// Text normalization rules version ([`NORMALIZATION_VERSION`]).
    pub normalization_version: u32,
    /// Seed of the MurmurHash3 feature hash.
    pub seed: u32,
    /// The vector has `2^hash_bits` dimensions.
    pub hash_bits: u8,
    /// Word n-grams of order 1..=`max_ngram` are used in text fields.
    pub max_ngram: u8,
    /// The namespaces features are drawn from, by tag, in generation order.
    pub namespaces: Vec<String>,
    /// Extraction limits, which decide how much of a message is seen.
    pub limits: ExtractLimits,
}

/// The namespace tags this binary generates, in order.
pub fn supported_namespaces() -> Vec<String> {
    super::Namespace::ALL
        .iter()
        .map(|ns| ns.tag().to_string())
        .collect()
}

impl Default for FeatureSpec {
    fn default() -> Self {
        FeatureSpec {
            version: FEATURE_SPEC_VERSION,
            normalization_version: NORMALIZATION_VERSION,
            seed: 0x7a6d_1501,
            hash_bits: 20,
            max_ngram: 2,
            namespaces: supported_namespaces(),
            limits: ExtractLimits::default(),
        }
    }
}

/// A feature spec this binary cannot honour.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
pub enum SpecError {
    /// The spec was written by rules this binary does not implement.
    #[error(
        "feature spec version {found} is not supported (this binary implements version {supported}); retrain the model with this binary or use the matching tamis release"
    )]
    Version {
        /// Version in the spec.
        found: u32,
        /// Version this binary implements.
        supported: u32,
    },
    /// The spec used other text normalization rules.
    #[error(
        "text normalization version {found} is not supported (this binary implements version {supported}); retrain the model with this binary"
    )]
    Normalization {
        /// Version in the spec.
        found: u32,
        /// Version this binary implements.
        supported: u32,
    },
    /// `hash_bits` outside the supported range.
    #[error("hash_bits = {0} is outside the supported range 10..=28")]
    HashBits(u8),
    /// `max_ngram` outside 1..=4.
    #[error("max_ngram = {0} is outside the supported range 1..=4")]
    MaxNgram(u8),
    /// The spec names namespaces other than the ones this binary generates.
    #[error(
        "feature namespaces {found:?} differ from this binary's {supported:?}; retrain the model with this binary"
    )]
    Namespaces {
        /// Namespaces in the spec.
        found: Vec<String>,
        /// Namespaces this binary generates.
        supported: Vec<String>,
    },
    /// A zero extraction limit would see nothing.
    #[error("extraction limit `{0}` must be greater than zero")]
    ZeroLimit(&'static str),
}

impl FeatureSpec {
    /// Number of dimensions, `2^hash_bits`.
    pub fn dimensions(&self) -> usize {
        1usize << self.hash_bits
    }

    /// Checks that this binary reproduces exactly the vectors the spec describes.
    pub fn check_supported(&self) -> Result<(), SpecError> {
        if self.version != FEATURE_SPEC_VERSION {
            return Err(SpecError::Version {
                found: self.version,
                supported: FEATURE_SPEC_VERSION,
            });
        }
        if self.normalization_version != NORMALIZATION_VERSION {
            return Err(SpecError::Normalization {
                found: self.normalization_version,
                supported: NORMALIZATION_VERSION,
            });
        }
        if !HASH_BITS_RANGE.contains(&self.hash_bits) {
            return Err(SpecError::HashBits(self.hash_bits));
        }
        if !(1..=MAX_NGRAM_ORDER).contains(&self.max_ngram) {
            return Err(SpecError::MaxNgram(self.max_ngram));
        }
        if self.namespaces != supported_namespaces() {
            return Err(SpecError::Namespaces {
                found: self.namespaces.clone(),
                supported: supported_namespaces(),
            });
        }
        let limits = &self.limits;
        for (name, value) in [
            ("max_raw_bytes", limits.max_raw_bytes),
            ("max_text_bytes", limits.max_text_bytes),
            ("max_depth", limits.max_depth),
            ("max_parts", limits.max_parts),
        ] {
            if value == 0 {
                return Err(SpecError::ZeroLimit(name));
            }
        }
        Ok(())
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn default_spec_is_supported() {
        assert_eq!(FeatureSpec::default().check_supported(), Ok(()));
        assert_eq!(FeatureSpec::default().dimensions(), 1 << 20);
    }

    #[test]
    fn foreign_specs_are_refused() {
        let spec = FeatureSpec {
            version: 99,
            ..FeatureSpec::default()
        };
        assert!(matches!(
            spec.check_supported(),
            Err(SpecError::Version { found: 99, .. })
        ));
        let spec = FeatureSpec {
            hash_bits: 40,
            ..FeatureSpec::default()
        };
        assert_eq!(spec.check_supported(), Err(SpecError::HashBits(40)));
        let mut spec = FeatureSpec::default();
        spec.namespaces.retain(|ns| ns != "hidden");
        assert!(matches!(
            spec.check_supported(),
            Err(SpecError::Namespaces { .. })
        ));
    }
}
