//! Per-domain figures over a window: what the filter did, what people said about it, and
//! the false-positive rate that follows, with its confidence bound.
//!
//! A backend gathers three plain inputs — message counts by action, the matched reports
//! joined to the verdicts they are about, and counts of unmatched reports — and
//! [`compute`] turns them into [`DomainFigures`]; every backend shares this arithmetic.
//!
//! # Definitions (per recipient domain D, window "verdicts made at or after `since`")
//!
//! - A **message** is a journal entry with at least one recipient in D; a message to three
//!   recipients of D counts once. Its *action* is what was done for D; its *enforced action*
//!   is what the policy would have done with `tag_only` off (equal to the action outside
//!   tag-only mode).
//! - Its **label** for D is the kind (junk / not junk) of the latest matched report that
//!   applies to D: a report naming D, or a report by an operator, an auditor or a release
//!   that names no domain (it applies to every recipient domain of the message). A release
//!   is a not-junk report. Reports count whenever they were made; the window selects the
//!   messages, not the reports. Unmatched reports are never labels.
//! - **Legitimate** messages (the false-positive denominator) are those labelled not junk,
//!   plus those with no label whose enforced action is *accept*: mail delivered untouched
//!   that nobody reported is taken as legitimate (common practice in complaint-based
//!   accounting). Unlabelled tagged or held mail is left out of both counts: nobody has
//!   said what it is.
//! - **False positives** are legitimate messages whose enforced action is *quarantine*:
//!   held, or that would have been held had tag-only been off. Only a label can make held
//!   mail legitimate, so this is the count of held (or would-be held) mail that someone
//!   reported not junk or released.
//! - The **false-positive rate** is false positives ÷ legitimate; its bound is the
//!   one-sided 95% Clopper–Pearson upper bound on that proportion (the true rate is at
//!   most this with 95% confidence), and the lower bound likewise.
//! - **Junk** messages are those labelled junk plus those with no label whose enforced
//!   action is quarantine; **caught** are the junk ones whose enforced action is
//!   quarantine. The **catch rate** is caught ÷ junk: the share of known or presumed junk
//!   that quarantine took out of the inbox. Reported junk that was only tagged or
//!   accepted is what lowers it.
//! - The **audit** figures use only audit reports on mail actually held for D: reviewed is
//!   the number of held messages with an audit report, not junk those whose latest audit
//!   report says not junk. Because the audit sample is drawn at random, not by who
//!   complains, not junk ÷ reviewed estimates the share of legitimate mail among held mail
//!   without that bias.
//!
//! The evidence is **too thin** when nothing was said about the window's mail for D (no
//! matched report and no release: a false-positive count of zero then only means nobody
//! looked), or when fewer than [`MIN_LEGITIMATE`] messages are legitimate (even with no
//! false positive the bound could not fall below 1%).

use std::collections::{BTreeMap, HashMap};

use serde::Serialize;

use super::record::{ReportKind, ReportSource, UnixTime};
use crate::policy::Action;
use crate::train::stats::{clopper_pearson, clopper_pearson_upper};

/// Confidence of every bound in the figures.
pub const CONFIDENCE: f64 = 0.95;

/// Fewest legitimate messages for the figures to claim anything: with none of them a
/// false positive, the 95% bound is about `3 / n` ("rule of three"), 1% at 300.
pub const MIN_LEGITIMATE: u64 = 300;

/// Messages of one domain with the same action, enforced action and scan state.
#[derive(Debug, Clone, PartialEq)]
pub struct ActionCount {
    /// The recipient domain.
    pub domain: String,
    /// The action taken.
    pub action: Action,
    /// The action with tag-only off.
    pub enforced: Action,
    /// Whether the messages were scanned.
    pub scanned: bool,
    /// How many.
    pub messages: u64,
}

/// One matched report applied to one message and domain.
#[derive(Debug, Clone, PartialEq)]
pub struct Evidence {
    /// The recipient domain it applies to.
    pub domain: String,
    /// The message (any id unique per message, e.g. the journal row).
    pub message: i64,
    /// The message's action for the domain.
    pub action: Action,
    /// The message's enforced action for the domain.
    pub enforced: Action,
    /// What the report says.
    pub kind: ReportKind,
    /// Who said it.
    pub source: ReportSource,
    /// The report's order of arrival: a larger value is a later report.
    pub order: i64,
}

/// Reports of one reporter domain refused as evidence.
#[derive(Debug, Clone, PartialEq)]
pub struct UnmatchedCount {
    /// The reporter's domain.
    pub domain: String,
    /// How many.
    pub reports: u64,
}

/// Messages by the action taken.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq, Serialize)]
pub struct ActionCounts {
    /// Delivered unchanged.
    pub accept: u64,
    /// Delivered tagged.
    pub tag: u64,
    /// Held.
    pub quarantine: u64,
    /// Deferred (temporary failure).
    pub defer: u64,
}

impl ActionCounts {
    fn add(&mut self, action: Action, n: u64) {
        let slot = match action {
            Action::Accept => &mut self.accept,
            Action::Tag => &mut self.tag,
            Action::Quarantine => &mut self.quarantine,
            Action::Defer => &mut self.defer,
        };
        *slot += n;
    }

    fn get(&self, action: Action) -> u64 {
        match action {
            Action::Accept => self.accept,
            Action::Tag => self.tag,
            Action::Quarantine => self.quarantine,
            Action::Defer => self.defer,
        }
    }

    /// All messages.
    pub fn total(&self) -> u64 {
        self.accept + self.tag + self.quarantine + self.defer
    }
}

/// A proportion with its one-sided 95% Clopper–Pearson bounds.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct Rate {
    /// Numerator.
    pub count: u64,
    /// Denominator.
    pub of: u64,
    /// `count / of`; `None` when `of` is 0.
    pub value: Option<f64>,
    /// The true proportion is at least this with 95% confidence (0 when `count` is 0 or
    /// `of` is 0).
    pub lower: f64,
    /// The true proportion is at most this with 95% confidence (1 when `of` is 0).
    pub upper: f64,
}

impl Rate {
    /// The rate `count / of` with its bounds.
    pub fn new(count: u64, of: u64) -> Rate {
        let count = count.min(of);
        if of == 0 {
            return Rate {
                count,
                of,
                value: None,
                lower: 0.0,
                upper: 1.0,
            };
        }
        // The lower end of the two-sided interval at 1 - 2α leaves α below it: the
        // one-sided lower bound at 1 - α.
        let lower = clopper_pearson(count, of, 1.0 - 2.0 * (1.0 - CONFIDENCE)).0;
        Rate {
            count,
            of,
            value: Some(count as f64 / of as f64),
            lower,
            upper: clopper_pearson_upper(count, of, CONFIDENCE),
        }
    }
}

/// Where a domain stands against its false-positive target.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "kebab-case")]
pub enum TargetCheck {
    /// The upper bound is at or below the target: met with 95% confidence.
    Met,
    /// The lower bound is above the target: missed with 95% confidence.
    Missed,
    /// The evidence cannot tell (the interval contains the target, or it is too thin).
    Undecided,
}

/// The figures of one recipient domain over a window. Field meanings are defined
/// precisely in this module's documentation.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct DomainFigures {
    /// The recipient domain (empty: recipients without a domain).
    pub domain: String,
    /// Start of the window: verdicts made at or after this time.
    pub since: UnixTime,
    /// Messages by the action taken for this domain.
    pub by_action: ActionCounts,
    /// Messages by the action the policy would have taken with tag-only off.
    pub by_enforced_action: ActionCounts,
    /// Messages that would have been held but were not (tag-only mode).
    pub would_quarantine: u64,
    /// Messages that were not scanned (the failure mode decided).
    pub unscanned: u64,
    /// Matched junk reports (users, operators, auditors), counting each report.
    pub reports_junk: u64,
    /// Matched not-junk reports (users, operators, auditors), counting each report;
    /// releases are counted apart.
    pub reports_not_junk: u64,
    /// Releases of held mail.
    pub releases: u64,
    /// Reports naming this domain that were refused as evidence (unknown verdict, or a
    /// verdict without a recipient in this domain), made at or after `since`.
    pub unmatched_reports: u64,
    /// Legitimate messages (the denominator of the false-positive rate).
    pub legitimate: u64,
    /// False positives ÷ legitimate.
    pub false_positives: Rate,
    /// Junk messages (the denominator of the catch rate).
    pub junk: u64,
    /// Caught ÷ junk.
    pub catch_rate: Rate,
    /// Not junk ÷ reviewed, over audited held mail.
    pub audit: Rate,
    /// Whether the evidence is too thin to claim a false-positive rate.
    pub too_thin: bool,
    /// Why, in plain words, when it is.
    pub thin_reason: Option<String>,
}

impl DomainFigures {
    /// The figures of a domain with no mail and no reports in the window.
    pub fn empty(domain: &str, since: UnixTime) -> DomainFigures {
        figures_of(domain, since, &Tally::default())
    }

    /// Messages in the window.
    pub fn messages(&self) -> u64 {
        self.by_action.total()
    }

    /// Where the false-positive rate stands against `target` (e.g. 0.001).
    pub fn against(&self, target: f64) -> TargetCheck {
        if self.too_thin {
            TargetCheck::Undecided
        } else if self.false_positives.upper <= target {
            TargetCheck::Met
        } else if self.false_positives.lower > target {
            TargetCheck::Missed
        } else {
            TargetCheck::Undecided
        }
    }
}

#[derive(Default)]
struct Tally {
    by_action: ActionCounts,
    by_enforced: ActionCounts,
    would_quarantine: u64,
    unscanned: u64,
    reports_junk: u64,
    reports_not_junk: u64,
    releases: u64,
    unmatched: u64,
    /// Per message: (enforced action, label, order of the label's report).
    labels: HashMap<i64, (Action, ReportKind, i64)>,
    /// Per held message: (audit label, order).
    audits: HashMap<i64, (ReportKind, i64)>,
}

/// The figures of every domain that has messages or unmatched reports in the inputs,
/// sorted by domain. The inputs are as [`ActionCount`], [`Evidence`] and
/// [`UnmatchedCount`] describe, restricted to the window by the backend.
pub fn compute(
    since: UnixTime,
    counts: &[ActionCount],
    evidence: &[Evidence],
    unmatched: &[UnmatchedCount],
) -> Vec<DomainFigures> {
    let mut tallies: BTreeMap<&str, Tally> = BTreeMap::new();
    for c in counts {
        let t = tallies.entry(&c.domain).or_default();
        t.by_action.add(c.action, c.messages);
        t.by_enforced.add(c.enforced, c.messages);
        if c.enforced == Action::Quarantine && c.action != Action::Quarantine {
            t.would_quarantine += c.messages;
        }
        if !c.scanned {
            t.unscanned += c.messages;
        }
    }
    for e in evidence {
        let t = tallies.entry(&e.domain).or_default();
        match (e.source, e.kind) {
            (ReportSource::Release, _) => t.releases += 1,
            (_, ReportKind::Junk) => t.reports_junk += 1,
            (_, ReportKind::NotJunk) => t.reports_not_junk += 1,
        }
        let label = t
            .labels
            .entry(e.message)
            .or_insert((e.enforced, e.kind, e.order));
        if e.order >= label.2 {
            *label = (e.enforced, e.kind, e.order);
        }
        if e.source == ReportSource::Audit && e.action == Action::Quarantine {
            let audit = t.audits.entry(e.message).or_insert((e.kind, e.order));
            if e.order >= audit.1 {
                *audit = (e.kind, e.order);
            }
        }
    }
    for u in unmatched {
        tallies.entry(&u.domain).or_default().unmatched += u.reports;
    }
    tallies
        .into_iter()
        .map(|(domain, t)| figures_of(domain, since, &t))
        .collect()
}

fn figures_of(domain: &str, since: UnixTime, t: &Tally) -> DomainFigures {
    let labelled_with =
        |enforced: Action| t.labels.values().filter(|(e, _, _)| *e == enforced).count() as u64;
    let labelled = |kind: ReportKind, enforced: Option<Action>| {
        t.labels
            .values()
            .filter(|(e, k, _)| *k == kind && enforced.is_none_or(|x| x == *e))
            .count() as u64
    };
    // Unlabelled messages per enforced action: all of them minus the labelled ones. The
    // saturation only matters if a backend's inputs disagree (evidence outside the counts).
    let unlabelled = |enforced: Action| {
        t.by_enforced
            .get(enforced)
            .saturating_sub(labelled_with(enforced))
    };
    let legitimate = labelled(ReportKind::NotJunk, None) + unlabelled(Action::Accept);
    let false_positives = labelled(ReportKind::NotJunk, Some(Action::Quarantine));
    let presumed_junk = unlabelled(Action::Quarantine);
    let junk = labelled(ReportKind::Junk, None) + presumed_junk;
    let caught = labelled(ReportKind::Junk, Some(Action::Quarantine)) + presumed_junk;
    let reviewed = t.audits.len() as u64;
    let audit_not_junk = t
        .audits
        .values()
        .filter(|(k, _)| *k == ReportKind::NotJunk)
        .count() as u64;
    let feedback = t.reports_junk + t.reports_not_junk + t.releases;
    let thin_reason = if feedback == 0 {
        Some(
            "no report and no release about this mail yet: zero false positives only means nobody looked"
                .to_string(),
        )
    } else if legitimate < MIN_LEGITIMATE {
        Some(format!(
            "only {legitimate} legitimate messages; at least {MIN_LEGITIMATE} are needed before even zero false positives bounds the rate below 1%"
        ))
    } else {
        None
    };
    DomainFigures {
        domain: domain.to_string(),
        since,
        by_action: t.by_action,
        by_enforced_action: t.by_enforced,
        would_quarantine: t.would_quarantine,
        unscanned: t.unscanned,
        reports_junk: t.reports_junk,
        reports_not_junk: t.reports_not_junk,
        releases: t.releases,
        unmatched_reports: t.unmatched,
        legitimate,
        false_positives: Rate::new(false_positives, legitimate),
        junk,
        catch_rate: Rate::new(caught, junk),
        audit: Rate::new(audit_not_junk, reviewed),
        too_thin: thin_reason.is_some(),
        thin_reason,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn count(domain: &str, action: Action, enforced: Action, n: u64) -> ActionCount {
        ActionCount {
            domain: domain.to_string(),
            action,
            enforced,
            scanned: true,
            messages: n,
        }
    }

    fn said(message: i64, enforced: Action, kind: ReportKind, order: i64) -> Evidence {
        Evidence {
            domain: "a.test".to_string(),
            message,
            action: enforced,
            enforced,
            kind,
            source: ReportSource::User,
            order,
        }
    }

    #[test]
    fn the_latest_report_labels_a_message() {
        let counts = [
            count("a.test", Action::Accept, Action::Accept, 1000),
            count("a.test", Action::Quarantine, Action::Quarantine, 10),
        ];
        let evidence = [
            // Held message 1: first called junk, then not junk: a false positive.
            said(1, Action::Quarantine, ReportKind::Junk, 1),
            said(1, Action::Quarantine, ReportKind::NotJunk, 5),
            // Accepted message 2 reported junk: not legitimate, a missed junk.
            said(2, Action::Accept, ReportKind::Junk, 2),
        ];
        let f = &compute(0, &counts, &evidence, &[])[0];
        assert_eq!(f.false_positives.count, 1);
        // 999 unreported accepted + 1 reported not junk.
        assert_eq!(f.legitimate, 1000);
        // 9 unreported held + 1 reported junk (accepted, so not caught).
        assert_eq!(f.junk, 10);
        assert_eq!(f.catch_rate.count, 9);
        assert_eq!((f.reports_junk, f.reports_not_junk), (2, 1));
        assert!(!f.too_thin);
    }

    #[test]
    fn no_feedback_is_too_thin() {
        let counts = [count("a.test", Action::Accept, Action::Accept, 5000)];
        let f = &compute(0, &counts, &[], &[])[0];
        assert!(f.too_thin);
        assert_eq!(f.against(0.01), TargetCheck::Undecided);
    }

    #[test]
    fn rates_of_nothing_claim_nothing() {
        let r = Rate::new(0, 0);
        assert_eq!((r.value, r.lower, r.upper), (None, 0.0, 1.0));
    }
}
