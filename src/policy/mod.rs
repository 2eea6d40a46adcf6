//! Policy: per-recipient-domain thresholds that turn a model's score into an action for
//! each recipient, and the header edits of the verdict (`proto/PROTOCOL.md` §4).
//!
//! A [`Policy`] has a default section and one section per configured recipient domain.
//! Each section sets its thresholds on the margin or on the calibrated probability — one
//! family, never both — with quarantine at or above tag. A score at or above a threshold
//! gets its action, so an equal score is never the milder choice.
//!
//! `tag_only` turns every quarantine into tag: set in a section it applies to that
//! section, set under `[policy]` it applies to every section that does not say otherwise.
//! It defaults to `true`, so quarantine happens only when an operator asks for it.
//!
//! `target_fpr` is each domain's false-positive target — the share of legitimate mail the
//! operator accepts to see held — set per section or policy-wide (default
//! [`DEFAULT_TARGET_FPR`]). Deciding never reads it; the figures compare the measured rate
//! with it.
//!
//! Invariants of a built [`Policy`]: thresholds are finite, probabilities lie in `[0, 1]`,
//! quarantine ≥ tag in every section, domain keys are normalised (see [`domain`]) and
//! distinct. [`Policy::decide`] never panics, whatever the score.

pub mod domain;
pub mod verdict;

use std::collections::BTreeMap;
use std::fmt;

use serde::de::{MapAccess, Visitor};
use serde::{Deserialize, Deserializer, Serialize, Serializer};

use crate::config::{FailureMode, HeaderConfig};
pub use verdict::{
    HeaderEdit, UNSCANNED_FIELD, UnscannedReason, VERDICT_FIELD, format_margin, verdict_id,
};

/// What happens to a message for one recipient: the protocol's own action type
/// (`proto/PROTOCOL.md` §4), so policy and wire can never disagree.
pub use crate::proto::Action;

/// What a section's thresholds are compared with.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum Scale {
    /// The model's margin `w·x + b` (positive leans junk). Works with every model.
    Margin,
    /// The calibrated probability of junk. Needs a model with a calibration.
    Probability,
}

/// A policy that cannot be built, with what to change.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum PolicyError {
    /// A threshold is NaN or infinite.
    #[error("{key} = {value} is not a finite number; write a plain number such as 0.5")]
    NotFinite {
        /// The key, e.g. `tag_margin`.
        key: &'static str,
        /// The value given.
        value: f64,
    },
    /// A probability threshold outside `[0, 1]`.
    #[error("{key} = {value} is not a probability; use a value from 0 to 1")]
    NotAProbability {
        /// The key, e.g. `tag_probability`.
        key: &'static str,
        /// The value given.
        value: f64,
    },
    /// A false-positive target outside `(0, 1)`.
    #[error(
        "{key} = {value} is not a false-positive rate; use a share between 0 and 1, such as 0.001 for 0.1%"
    )]
    NotATarget {
        /// The key, `target_fpr`.
        key: &'static str,
        /// The value given.
        value: f64,
    },
    /// Quarantine would be easier to reach than tagging.
    #[error(
        "quarantine_{scale} ({quarantine}) is below tag_{scale} ({tag}); quarantine must never be easier to reach than tagging: raise quarantine_{scale} to at least {tag}"
    )]
    QuarantineBelowTag {
        /// `margin` or `probability`.
        scale: &'static str,
        /// The tag threshold.
        tag: f64,
        /// The quarantine threshold.
        quarantine: f64,
    },
    /// A section sets keys of both families, or none, or only half of one.
    #[error("{0}")]
    Family(String),
    /// A domain name that is not a valid host name.
    #[error("the domain \"{domain}\" is not valid: {reason}")]
    BadDomain {
        /// The name as given.
        domain: String,
        /// What is wrong with it.
        reason: String,
    },
    /// Two section names that are the same domain once normalised.
    #[error(
        "the domains \"{first}\" and \"{second}\" are the same once lower-cased and without a trailing dot; keep one section"
    )]
    DuplicateDomain {
        /// The first name as given.
        first: String,
        /// The second name as given.
        second: String,
    },
}

/// The thresholds of one section: the default or one recipient domain.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Thresholds {
    scale: Scale,
    tag: f64,
    quarantine: f64,
    tag_only: Option<bool>,
    target_fpr: Option<f64>,
}

impl Thresholds {
    /// Thresholds on the margin: tag at or above `tag`, quarantine at or above `quarantine`.
    pub fn on_margin(tag: f64, quarantine: f64) -> Result<Thresholds, PolicyError> {
        finite("tag_margin", tag)?;
        finite("quarantine_margin", quarantine)?;
        ordered("margin", tag, quarantine)?;
        Ok(Thresholds {
            scale: Scale::Margin,
            tag,
            quarantine,
            tag_only: None,
            target_fpr: None,
        })
    }

    /// Thresholds on the calibrated probability of junk, both in `[0, 1]`.
    pub fn on_probability(tag: f64, quarantine: f64) -> Result<Thresholds, PolicyError> {
        probability("tag_probability", tag)?;
        probability("quarantine_probability", quarantine)?;
        ordered("probability", tag, quarantine)?;
        Ok(Thresholds {
            scale: Scale::Probability,
            tag,
            quarantine,
            tag_only: None,
            target_fpr: None,
        })
    }

    /// The same thresholds with this section's own `tag_only` setting (`None`: follow
    /// the policy-wide one).
    pub fn with_tag_only(self, tag_only: Option<bool>) -> Thresholds {
        Thresholds { tag_only, ..self }
    }

    /// The same thresholds with this section's own false-positive target (`None`: follow
    /// the policy-wide one). The target must lie strictly between 0 and 1.
    pub fn with_target_fpr(self, target_fpr: Option<f64>) -> Result<Thresholds, PolicyError> {
        if let Some(t) = target_fpr {
            target("target_fpr", t)?;
        }
        Ok(Thresholds { target_fpr, ..self })
    }

    /// This section's own false-positive target, if it has one.
    pub fn target_fpr(&self) -> Option<f64> {
        self.target_fpr
    }

    /// What the thresholds are compared with.
    pub fn scale(&self) -> Scale {
        self.scale
    }

    /// Tag at or above this score.
    pub fn tag(&self) -> f64 {
        self.tag
    }

    /// Quarantine at or above this score (unless tag-only).
    pub fn quarantine(&self) -> f64 {
        self.quarantine
    }

    /// This section's own `tag_only` setting, if it has one.
    pub fn tag_only(&self) -> Option<bool> {
        self.tag_only
    }

    /// The action for a score. `policy_tag_only` applies when the section has no
    /// `tag_only` of its own. A score that is missing (no probability from an
    /// uncalibrated model) or NaN gives [`Action::Defer`]: the relay keeps the message
    /// and retries, which loses nothing while the cause is fixed.
    pub fn action(&self, margin: f64, probability: Option<f64>, policy_tag_only: bool) -> Action {
        let score = match self.scale {
            Scale::Margin => margin,
            Scale::Probability => probability.unwrap_or(f64::NAN),
        };
        if score.is_nan() {
            return Action::Defer;
        }
        if score >= self.quarantine {
            if self.tag_only.unwrap_or(policy_tag_only) {
                Action::Tag
            } else {
                Action::Quarantine
            }
        } else if score >= self.tag {
            Action::Tag
        } else {
            Action::Accept
        }
    }

    /// Whether this section can quarantine at all: its own `tag_only`, or the policy-wide
    /// one when it has none, is off.
    pub fn may_quarantine(&self, policy_tag_only: bool) -> bool {
        !self.tag_only.unwrap_or(policy_tag_only)
    }
}

impl Default for Thresholds {
    /// Tag at margin 0 (the classifier's decision boundary), quarantine at margin 1 (the
    /// edge of the margin a linear SVM is trained to keep) — common practice, not tuned;
    /// `tamis tune` writes tuned values.
    fn default() -> Thresholds {
        Thresholds {
            scale: Scale::Margin,
            tag: 0.0,
            quarantine: 1.0,
            tag_only: None,
            target_fpr: None,
        }
    }
}

fn finite(key: &'static str, value: f64) -> Result<(), PolicyError> {
    if value.is_finite() {
        Ok(())
    } else {
        Err(PolicyError::NotFinite { key, value })
    }
}

fn probability(key: &'static str, value: f64) -> Result<(), PolicyError> {
    finite(key, value)?;
    if (0.0..=1.0).contains(&value) {
        Ok(())
    } else {
        Err(PolicyError::NotAProbability { key, value })
    }
}

fn target(key: &'static str, value: f64) -> Result<(), PolicyError> {
    finite(key, value)?;
    if value > 0.0 && value < 1.0 {
        Ok(())
    } else {
        Err(PolicyError::NotATarget { key, value })
    }
}

fn ordered(scale: &'static str, tag: f64, quarantine: f64) -> Result<(), PolicyError> {
    if quarantine >= tag {
        Ok(())
    } else {
        Err(PolicyError::QuarantineBelowTag {
            scale,
            tag,
            quarantine,
        })
    }
}

/// What the policy decided for one recipient.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Decision {
    /// The recipient as the relay sent it (empty for a refused address).
    pub recipient: String,
    /// The action in force.
    pub action: Action,
    /// The action with `tag_only` off: [`Action::Quarantine`] where tag-only mode tagged a
    /// message it would otherwise have held, else equal to `action`. This is what lets
    /// tag-only mode show what it would have held back.
    pub enforced: Action,
}

/// Per-recipient-domain thresholds → actions.
#[derive(Debug, Clone, PartialEq)]
pub struct Policy {
    tag_only: bool,
    target_fpr: f64,
    default: Thresholds,
    domains: BTreeMap<String, Thresholds>,
}

/// The false-positive target of sections without their own: 0.1% of legitimate mail held
/// (the `tamis tune --target-fpr` default).
pub const DEFAULT_TARGET_FPR: f64 = 0.001;

impl Default for Policy {
    /// Margin thresholds 0 and 1 for all mail, no domain sections, and tag-only on:
    /// nothing is quarantined until an operator turns `tag_only` off.
    fn default() -> Policy {
        Policy {
            tag_only: true,
            target_fpr: DEFAULT_TARGET_FPR,
            default: Thresholds::default(),
            domains: BTreeMap::new(),
        }
    }
}

impl Policy {
    /// Builds a policy. Domain names are normalised and checked; two names that are the
    /// same domain once normalised are an error.
    pub fn new(
        default: Thresholds,
        domains: impl IntoIterator<Item = (String, Thresholds)>,
        tag_only: bool,
    ) -> Result<Policy, PolicyError> {
        let mut map: BTreeMap<String, Thresholds> = BTreeMap::new();
        let mut given: BTreeMap<String, String> = BTreeMap::new();
        for (name, thresholds) in domains {
            let key = domain::validate(&name).map_err(|reason| PolicyError::BadDomain {
                domain: name.clone(),
                reason,
            })?;
            if let Some(first) = given.get(&key) {
                return Err(PolicyError::DuplicateDomain {
                    first: first.clone(),
                    second: name,
                });
            }
            given.insert(key.clone(), name);
            map.insert(key, thresholds);
        }
        Ok(Policy {
            tag_only,
            target_fpr: DEFAULT_TARGET_FPR,
            default,
            domains: map,
        })
    }

    /// The same policy with another policy-wide false-positive target, strictly between 0
    /// and 1.
    pub fn with_target_fpr(self, target_fpr: f64) -> Result<Policy, PolicyError> {
        target("target_fpr", target_fpr)?;
        Ok(Policy { target_fpr, ..self })
    }

    /// The policy-wide false-positive target, used by sections without their own.
    pub fn target_fpr(&self) -> f64 {
        self.target_fpr
    }

    /// The false-positive target of a recipient domain (normalised or not): its section's
    /// own, else the policy-wide one. The share of legitimate mail the operator accepts
    /// to see held; the figures compare the measured rate with it.
    pub fn target_fpr_of_domain(&self, name: &str) -> f64 {
        self.domains
            .get(&domain::normalize(name))
            .and_then(|t| t.target_fpr)
            .or(self.default.target_fpr)
            .unwrap_or(self.target_fpr)
    }

    /// The policy-wide `tag_only`, used by sections without their own.
    pub fn tag_only(&self) -> bool {
        self.tag_only
    }

    /// The thresholds for recipients of unconfigured domains.
    pub fn default_thresholds(&self) -> &Thresholds {
        &self.default
    }

    /// The configured domains (normalised) and their thresholds.
    pub fn domains(&self) -> &BTreeMap<String, Thresholds> {
        &self.domains
    }

    /// The configured domain that governs this recipient, or `None` for the default.
    pub fn domain_of(&self, recipient: &str) -> Option<&str> {
        let domain = domain::recipient_domain(recipient)?;
        self.domains.get_key_value(&domain).map(|(k, _)| k.as_str())
    }

    /// The thresholds that apply to this recipient.
    pub fn thresholds_for(&self, recipient: &str) -> &Thresholds {
        domain::recipient_domain(recipient)
            .and_then(|d| self.domains.get(&d))
            .unwrap_or(&self.default)
    }

    /// Whether any section sets its thresholds on the probability. The server must then
    /// refuse a model without a calibration when it loads one.
    pub fn needs_probability(&self) -> bool {
        std::iter::once(&self.default)
            .chain(self.domains.values())
            .any(|t| t.scale == Scale::Probability)
    }

    /// Whether a message to this recipient may be quarantined: its section is not
    /// tag-only. The daemon keeps the whole message of such a recipient, so that a
    /// quarantine can hold it (`proto/PROTOCOL.md` §4.5).
    pub fn may_quarantine(&self, recipient: &str) -> bool {
        self.thresholds_for(recipient).may_quarantine(self.tag_only)
    }

    /// Whether any section can quarantine: some section, or the default, is not tag-only.
    pub fn quarantines_anywhere(&self) -> bool {
        std::iter::once(&self.default)
            .chain(self.domains.values())
            .any(|t| t.may_quarantine(self.tag_only))
    }

    /// What the policy decides for each recipient, in the order given: the action in
    /// force and the action it would take with `tag_only` off ([`Decision::enforced`]),
    /// which differ only where tag-only mode turned a quarantine into a tag.
    pub fn decide_each(
        &self,
        recipients: &[String],
        margin: f64,
        probability: Option<f64>,
    ) -> Vec<Decision> {
        recipients
            .iter()
            .map(|r| {
                let thresholds = self.thresholds_for(r);
                Decision {
                    recipient: r.clone(),
                    action: thresholds.action(margin, probability, self.tag_only),
                    enforced: thresholds.action(margin, probability, false),
                }
            })
            .collect()
    }

    /// The decisions for a message that could not be scanned: accept or defer, as the
    /// failure mode says, with nothing held back by tag-only mode.
    pub fn unscanned_each(&self, recipients: &[String], mode: FailureMode) -> Vec<Decision> {
        self.unscanned(recipients, mode)
            .into_iter()
            .map(|(recipient, action)| Decision {
                recipient,
                action,
                enforced: action,
            })
            .collect()
    }

    /// The action for each recipient, in the order given, each from its own domain's
    /// section. `probability` is `None` when the model has no calibration; a section on
    /// the probability then defers (see [`Thresholds::action`]), as does any section when
    /// `margin` is NaN.
    pub fn decide(
        &self,
        recipients: &[String],
        margin: f64,
        probability: Option<f64>,
    ) -> Vec<(String, Action)> {
        recipients
            .iter()
            .map(|r| {
                let action = self
                    .thresholds_for(r)
                    .action(margin, probability, self.tag_only);
                (r.clone(), action)
            })
            .collect()
    }

    /// The action for each recipient of a message that could not be scanned: accept or
    /// defer, as the failure mode says.
    pub fn unscanned(&self, recipients: &[String], mode: FailureMode) -> Vec<(String, Action)> {
        let action = match mode {
            FailureMode::Accept => Action::Accept,
            FailureMode::Defer => Action::Defer,
        };
        recipients.iter().map(|r| (r.clone(), action)).collect()
    }

    /// The header edits of a scanned message's verdict (`proto/PROTOCOL.md` §4). Edits
    /// apply only to tagged recipients, so they are produced only for `action == Tag`;
    /// pass `Tag` when any recipient is tagged. They are, in order: the
    /// `X-Tamis-Verdict: tag; id=<verdict_id>; margin=<4 decimals>` field when
    /// `verdict_field` is on, then the subject prefix when one is set.
    pub fn header_edits(
        &self,
        cfg: &HeaderConfig,
        verdict_id: &str,
        action: Action,
        margin: f64,
    ) -> Vec<HeaderEdit> {
        let mut edits = Vec::new();
        if action != Action::Tag {
            return edits;
        }
        if cfg.verdict_field {
            edits.push(HeaderEdit::Add {
                name: VERDICT_FIELD.to_string(),
                value: format!(
                    "{action}; id={}; margin={}",
                    one_line(verdict_id),
                    format_margin(margin)
                ),
            });
        }
        if let Some(prefix) = cfg.subject_prefix.as_deref().filter(|p| !p.is_empty()) {
            edits.push(HeaderEdit::PrefixSubject {
                value: one_line(prefix),
            });
        }
        edits
    }

    /// The header edits of a message that could not be scanned: `X-Tamis-Unscanned:
    /// <reason>` when the failure mode accepts it, nothing when it defers (a deferred
    /// message is not delivered, so it has nothing to edit).
    pub fn unscanned_edits(&self, mode: FailureMode, reason: UnscannedReason) -> Vec<HeaderEdit> {
        match mode {
            FailureMode::Accept => vec![HeaderEdit::Add {
                name: UNSCANNED_FIELD.to_string(),
                value: reason.as_str().to_string(),
            }],
            FailureMode::Defer => Vec::new(),
        }
    }
}

/// Drops control characters, so a value can never end a header line early. Config
/// validation already refuses them; this guards callers that build edits by hand.
fn one_line(text: &str) -> String {
    text.chars().filter(|c| !c.is_control()).collect()
}

// --- TOML form -------------------------------------------------------------------------

/// One section as written in the config file.
#[derive(Debug, Clone, Default, Deserialize, Serialize)]
#[serde(deny_unknown_fields)]
struct RawThresholds {
    #[serde(default, skip_serializing_if = "Option::is_none")]
    tag_margin: Option<f64>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    quarantine_margin: Option<f64>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    tag_probability: Option<f64>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    quarantine_probability: Option<f64>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    tag_only: Option<bool>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    target_fpr: Option<f64>,
}

impl TryFrom<RawThresholds> for Thresholds {
    type Error = PolicyError;

    fn try_from(raw: RawThresholds) -> Result<Thresholds, PolicyError> {
        let margin = (raw.tag_margin, raw.quarantine_margin);
        let prob = (raw.tag_probability, raw.quarantine_probability);
        let has_margin = margin.0.is_some() || margin.1.is_some();
        let has_prob = prob.0.is_some() || prob.1.is_some();
        let thresholds = match (margin, prob) {
            _ if has_margin && has_prob => {
                return Err(PolicyError::Family(
                    "this section mixes margin and probability thresholds; keep either tag_margin and quarantine_margin, or tag_probability and quarantine_probability".to_string(),
                ));
            }
            ((Some(tag), Some(quarantine)), _) => Thresholds::on_margin(tag, quarantine)?,
            (_, (Some(tag), Some(quarantine))) => Thresholds::on_probability(tag, quarantine)?,
            ((Some(_), None), _) => return Err(half("tag_margin", "quarantine_margin")),
            ((None, Some(_)), _) => return Err(half("quarantine_margin", "tag_margin")),
            (_, (Some(_), None)) => {
                return Err(half("tag_probability", "quarantine_probability"));
            }
            (_, (None, Some(_))) => {
                return Err(half("quarantine_probability", "tag_probability"));
            }
            _ => {
                return Err(PolicyError::Family(
                    "this section sets no thresholds; add tag_margin and quarantine_margin (or tag_probability and quarantine_probability)".to_string(),
                ));
            }
        };
        thresholds
            .with_tag_only(raw.tag_only)
            .with_target_fpr(raw.target_fpr)
    }
}

fn half(present: &str, missing: &str) -> PolicyError {
    PolicyError::Family(format!(
        "this section sets {present} but not {missing}; set both"
    ))
}

impl From<Thresholds> for RawThresholds {
    fn from(t: Thresholds) -> RawThresholds {
        let mut raw = RawThresholds {
            tag_only: t.tag_only,
            target_fpr: t.target_fpr,
            ..RawThresholds::default()
        };
        match t.scale {
            Scale::Margin => {
                raw.tag_margin = Some(t.tag);
                raw.quarantine_margin = Some(t.quarantine);
            }
            Scale::Probability => {
                raw.tag_probability = Some(t.tag);
                raw.quarantine_probability = Some(t.quarantine);
            }
        }
        raw
    }
}

impl<'de> Deserialize<'de> for Thresholds {
    fn deserialize<D: Deserializer<'de>>(deserializer: D) -> Result<Thresholds, D::Error> {
        let raw = RawThresholds::deserialize(deserializer)?;
        Thresholds::try_from(raw).map_err(serde::de::Error::custom)
    }
}

impl Serialize for Thresholds {
    fn serialize<S: Serializer>(&self, serializer: S) -> Result<S::Ok, S::Error> {
        RawThresholds::from(*self).serialize(serializer)
    }
}

/// A section name under `[policy.domains]`, normalised and checked as it is read, so an
/// error points at the name itself.
struct DomainKey {
    given: String,
    key: String,
}

impl<'de> Deserialize<'de> for DomainKey {
    fn deserialize<D: Deserializer<'de>>(deserializer: D) -> Result<DomainKey, D::Error> {
        let given = String::deserialize(deserializer)?;
        match domain::validate(&given) {
            Ok(key) => Ok(DomainKey { given, key }),
            Err(reason) => Err(serde::de::Error::custom(PolicyError::BadDomain {
                domain: given,
                reason,
            })),
        }
    }
}

/// The `[policy.domains]` table, refusing two names for one domain (a plain map would
/// silently keep the last).
struct Domains(BTreeMap<String, Thresholds>);

impl<'de> Deserialize<'de> for Domains {
    fn deserialize<D: Deserializer<'de>>(deserializer: D) -> Result<Domains, D::Error> {
        struct DomainsVisitor;
        impl<'de> Visitor<'de> for DomainsVisitor {
            type Value = Domains;

            fn expecting(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
                f.write_str("a table of recipient domains, each with its thresholds")
            }

            fn visit_map<A: MapAccess<'de>>(self, mut access: A) -> Result<Domains, A::Error> {
                let mut map = BTreeMap::new();
                let mut given: BTreeMap<String, String> = BTreeMap::new();
                while let Some(name) = access.next_key::<DomainKey>()? {
                    let thresholds: Thresholds = access.next_value()?;
                    if let Some(first) = given.get(&name.key) {
                        return Err(serde::de::Error::custom(PolicyError::DuplicateDomain {
                            first: first.clone(),
                            second: name.given,
                        }));
                    }
                    given.insert(name.key.clone(), name.given);
                    map.insert(name.key, thresholds);
                }
                Ok(Domains(map))
            }
        }
        deserializer.deserialize_map(DomainsVisitor)
    }
}

fn yes() -> bool {
    true
}

fn default_target_fpr() -> f64 {
    DEFAULT_TARGET_FPR
}

/// The `[policy]` table as written in the config file.
#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct RawPolicy {
    #[serde(default = "yes")]
    tag_only: bool,
    #[serde(default = "default_target_fpr")]
    target_fpr: f64,
    #[serde(default)]
    default: Thresholds,
    #[serde(default)]
    domains: Option<Domains>,
}

#[derive(Serialize)]
struct RawPolicyOut<'a> {
    tag_only: bool,
    target_fpr: f64,
    default: &'a Thresholds,
    domains: &'a BTreeMap<String, Thresholds>,
}

impl<'de> Deserialize<'de> for Policy {
    fn deserialize<D: Deserializer<'de>>(deserializer: D) -> Result<Policy, D::Error> {
        let raw = RawPolicy::deserialize(deserializer)?;
        target("target_fpr", raw.target_fpr).map_err(serde::de::Error::custom)?;
        Ok(Policy {
            tag_only: raw.tag_only,
            target_fpr: raw.target_fpr,
            default: raw.default,
            domains: raw.domains.map(|d| d.0).unwrap_or_default(),
        })
    }
}

impl Serialize for Policy {
    fn serialize<S: Serializer>(&self, serializer: S) -> Result<S::Ok, S::Error> {
        RawPolicyOut {
            tag_only: self.tag_only,
            target_fpr: self.target_fpr,
            default: &self.default,
            domains: &self.domains,
        }
        .serialize(serializer)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn policy() -> Policy {
        let strict = Thresholds::on_margin(-0.5, 0.5)
            .map(|t| t.with_tag_only(Some(false)))
            .unwrap_or_default();
        let relaxed = Thresholds::on_probability(0.9, 0.99).unwrap_or_default();
        Policy::new(
            Thresholds::on_margin(0.0, 1.0).unwrap_or_default(),
            [
                ("Strict.Example.ORG".to_string(), strict),
                ("relaxed.test".to_string(), relaxed),
            ],
            true,
        )
        .unwrap_or_default()
    }

    #[test]
    fn thresholds_are_inclusive() {
        let t = Thresholds::on_margin(0.0, 1.0).unwrap_or_default();
        assert_eq!(t.action(-0.0001, None, false), Action::Accept);
        assert_eq!(t.action(0.0, None, false), Action::Tag);
        assert_eq!(t.action(1.0, None, false), Action::Quarantine);
        assert_eq!(t.action(1.0, None, true), Action::Tag);
        assert_eq!(t.action(f64::INFINITY, None, false), Action::Quarantine);
        assert_eq!(t.action(f64::NEG_INFINITY, None, false), Action::Accept);
        assert_eq!(t.action(f64::NAN, None, false), Action::Defer);
    }

    #[test]
    fn each_recipient_gets_its_own_domains_action() {
        let p = policy();
        let rcpts: Vec<String> = [
            "a@strict.example.org",
            "b@STRICT.example.org.",
            "c@relaxed.test",
            "d@elsewhere.test",
            "postmaster",
        ]
        .iter()
        .map(|s| s.to_string())
        .collect();
        let got = p.decide(&rcpts, 0.7, Some(0.95));
        let actions: Vec<Action> = got.iter().map(|(_, a)| *a).collect();
        assert_eq!(
            actions,
            vec![
                Action::Quarantine, // own tag_only = false overrides the policy's true
                Action::Quarantine,
                Action::Tag, // probability 0.95 ≥ 0.9
                Action::Tag, // default: margin 0.7 ≥ 0
                Action::Tag, // no '@': default
            ]
        );
        assert_eq!(got[1].0, "b@STRICT.example.org.");
    }

    #[test]
    fn probability_sections_defer_without_a_probability() {
        let p = policy();
        assert!(p.needs_probability());
        assert!(!Policy::default().needs_probability());
        let got = p.decide(&["x@relaxed.test".to_string()], 5.0, None);
        assert_eq!(got[0].1, Action::Defer);
    }

    #[test]
    fn false_positive_targets_fall_back_from_section_to_default_to_policy() {
        let own = Thresholds::default()
            .with_target_fpr(Some(0.01))
            .unwrap_or_default();
        let p = Policy::new(
            Thresholds::default(),
            [
                ("own.example.org".to_string(), own),
                ("plain.example.org".to_string(), Thresholds::default()),
            ],
            true,
        )
        .and_then(|p| p.with_target_fpr(0.002))
        .unwrap_or_default();
        assert_eq!(p.target_fpr_of_domain("Own.Example.ORG."), 0.01);
        assert_eq!(p.target_fpr_of_domain("plain.example.org"), 0.002);
        assert_eq!(p.target_fpr_of_domain("elsewhere.test"), 0.002);
        assert_eq!(Policy::default().target_fpr(), DEFAULT_TARGET_FPR);
        for bad in [0.0, 1.0, -0.1, f64::NAN] {
            assert!(Thresholds::default().with_target_fpr(Some(bad)).is_err());
            assert!(Policy::default().with_target_fpr(bad).is_err());
        }
    }

    #[test]
    fn tag_only_keeps_the_quarantine_it_would_have_made() {
        let p = policy();
        let rcpts: Vec<String> = ["a@strict.example.org", "d@elsewhere.test", "e@x.test"]
            .iter()
            .map(|s| s.to_string())
            .collect();
        let got = p.decide_each(&rcpts, 2.0, Some(0.5));
        let pairs: Vec<(Action, Action)> = got.iter().map(|d| (d.action, d.enforced)).collect();
        assert_eq!(
            pairs,
            vec![
                (Action::Quarantine, Action::Quarantine), // own tag_only = false
                (Action::Tag, Action::Quarantine),        // tag-only: would have held
                (Action::Tag, Action::Quarantine),
            ]
        );
        let low = p.decide_each(&rcpts[1..2], 0.5, None);
        assert_eq!((low[0].action, low[0].enforced), (Action::Tag, Action::Tag));
        assert!(p.may_quarantine("a@strict.example.org"));
        assert!(!p.may_quarantine("d@elsewhere.test"));
        assert!(p.quarantines_anywhere());
        assert!(!Policy::default().quarantines_anywhere());
        let unscanned = p.unscanned_each(&rcpts[..1], FailureMode::Defer);
        assert_eq!(
            (unscanned[0].action, unscanned[0].enforced),
            (Action::Defer, Action::Defer)
        );
    }

    #[test]
    fn default_policy_never_quarantines() {
        let p = Policy::default();
        let got = p.decide(&["x@example.org".to_string()], 100.0, None);
        assert_eq!(got[0].1, Action::Tag);
    }

    #[test]
    fn builder_refuses_bad_thresholds() {
        assert!(matches!(
            Thresholds::on_margin(1.0, 0.5),
            Err(PolicyError::QuarantineBelowTag { .. })
        ));
        assert!(matches!(
            Thresholds::on_margin(f64::NAN, 0.5),
            Err(PolicyError::NotFinite { .. })
        ));
        assert!(matches!(
            Thresholds::on_probability(0.5, 1.5),
            Err(PolicyError::NotAProbability { .. })
        ));
        let dup = Policy::new(
            Thresholds::default(),
            [
                ("example.org".to_string(), Thresholds::default()),
                ("EXAMPLE.org.".to_string(), Thresholds::default()),
            ],
            true,
        );
        assert!(matches!(dup, Err(PolicyError::DuplicateDomain { .. })));
    }
}
