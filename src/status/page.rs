//! The page model: what the overview and a domain's view show, gathered from the store and
//! the policy in force, before any HTML is written.
//!
//! Invariants: every list is bounded — at most [`MAX_DOMAINS`] domains on the overview,
//! [`HELD_PAGE`] held messages per page of a domain's view, the configured audit size —
//! and every store query is one of the trait's bounded ones, so the page costs the same
//! whether the journal holds a thousand rows or a million. A held message's header fields
//! are read from its first [`HEAD_BYTES`] only.

use crate::policy::{Policy, Scale, Thresholds};
use crate::store::figures::{DomainFigures, TargetCheck};
use crate::store::{
    AuditItem, Buckets, HeldFilter, HeldState, HeldSummary, HeldTotals, MarginBins,
    MarginHistogram, Store, StoreError, VolumeBucket,
};

/// Most domains listed on the overview (the busiest first).
pub const MAX_DOMAINS: usize = 200;
/// Held messages per page of a domain's view.
pub const HELD_PAGE: u32 = 50;
/// Bytes of a held message read to show its header fields.
pub const HEAD_BYTES: usize = 16 * 1024;
/// Width of a margin histogram bin.
const BIN_WIDTH: f64 = 0.25;

/// A time window the page can show, cut into buckets for the volume chart.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Window {
    /// Its name in links (`7d`).
    pub name: &'static str,
    /// Bucket width in seconds.
    pub bucket: i64,
    /// Number of buckets.
    pub buckets: u32,
}

/// The windows offered, shortest first.
pub const WINDOWS: [Window; 4] = [
    Window {
        name: "1d",
        bucket: 3600,
        buckets: 24,
    },
    Window {
        name: "7d",
        bucket: 6 * 3600,
        buckets: 28,
    },
    Window {
        name: "30d",
        bucket: 86_400,
        buckets: 30,
    },
    Window {
        name: "90d",
        bucket: 3 * 86_400,
        buckets: 30,
    },
];

/// The window shown when none is asked for.
pub const DEFAULT_WINDOW: Window = WINDOWS[1];

impl Window {
    /// The window named `name`, if offered.
    pub fn named(name: &str) -> Option<Window> {
        WINDOWS.iter().copied().find(|w| w.name == name)
    }

    /// Its buckets, the last one ending at the end of the current bucket (so "now" is in
    /// the last bar).
    pub fn buckets(&self, now: i64) -> Buckets {
        let end = now.div_euclid(self.bucket).saturating_add(1) * self.bucket;
        Buckets {
            since: end.saturating_sub(self.bucket * i64::from(self.buckets)),
            width: self.bucket,
            count: self.buckets,
        }
    }
}

/// The policy section that governs a domain, as the page shows it.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Section {
    /// Whether the domain has its own section (else the default applies).
    pub own: bool,
    /// The thresholds.
    pub thresholds: Thresholds,
    /// Whether quarantine is turned into tag for it.
    pub tag_only: bool,
}

impl Section {
    /// The section of `domain` in `policy`.
    pub fn of(policy: &Policy, domain: &str) -> Section {
        let own = policy.domains().get(domain);
        let thresholds = *own.unwrap_or(policy.default_thresholds());
        Section {
            own: own.is_some(),
            thresholds,
            tag_only: thresholds.tag_only().unwrap_or(policy.tag_only()),
        }
    }
}

/// What the page knows about the daemon itself.
#[derive(Debug, Clone, PartialEq)]
pub struct Context {
    /// When the page was made.
    pub now: i64,
    /// The window shown.
    pub window: Window,
    /// The model in use.
    pub model: String,
    /// The policy in force.
    pub policy: Policy,
    /// Whether actions can be taken (a token is configured).
    pub actions: bool,
    /// The store, for the footer; `None` when the daemon runs without one.
    pub store: Option<String>,
}

impl Context {
    /// The false-positive target `domain` is measured against: its policy section's
    /// `target_fpr`, else the policy-wide one (the same target `tamis figures` uses).
    pub fn target_of(&self, domain: &str) -> f64 {
        self.policy.target_fpr_of_domain(domain)
    }
}

/// One domain's line on the overview.
#[derive(Debug, Clone, PartialEq)]
pub struct DomainLine {
    /// Its figures over the window.
    pub figures: DomainFigures,
    /// Messages held for it now.
    pub held: u64,
    /// Its false-positive target.
    pub target: f64,
    /// Where it stands against the target.
    pub check: TargetCheck,
    /// Its policy section.
    pub section: Section,
}

/// The overview: every domain in a line, and the volume of all of them.
#[derive(Debug, Clone, PartialEq)]
pub struct Overview {
    /// About the daemon.
    pub context: Context,
    /// Domains, busiest first, at most [`MAX_DOMAINS`].
    pub domains: Vec<DomainLine>,
    /// Domains left off the list.
    pub more_domains: usize,
    /// Verdicts per bucket over all domains.
    pub volume: Vec<VolumeBucket>,
    /// Held mail totals.
    pub held: HeldTotals,
}

/// A held message as a list shows it.
#[derive(Debug, Clone, PartialEq)]
pub struct HeldLine {
    /// Envelope, verdict, reasons.
    pub summary: HeldSummary,
    /// The From field, decoded.
    pub from: Option<String>,
    /// The Subject field, decoded.
    pub subject: Option<String>,
}

/// A domain's view.
#[derive(Debug, Clone, PartialEq)]
pub struct DomainView {
    /// About the daemon.
    pub context: Context,
    /// The domain (empty: recipients without a domain).
    pub domain: String,
    /// Its figures over the window.
    pub figures: DomainFigures,
    /// Its false-positive target.
    pub target: f64,
    /// Where it stands against the target.
    pub check: TargetCheck,
    /// Its policy section.
    pub section: Section,
    /// Verdicts per bucket.
    pub volume: Vec<VolumeBucket>,
    /// Margins of reported mail.
    pub margins: MarginHistogram,
    /// Held mail, newest first, one page.
    pub held: Vec<HeldLine>,
    /// Offset of the page of held mail shown.
    pub held_offset: u64,
    /// Whether more held mail follows this page.
    pub held_more: bool,
    /// The audit queue: the sample, not yet reviewed first.
    pub audit: Vec<(AuditItem, HeldLine)>,
}

/// Gathers the overview.
pub fn overview(store: &dyn Store, context: Context) -> Result<Overview, StoreError> {
    let buckets = context.window.buckets(context.now);
    let figures = store.figures(buckets.since, None)?;
    let held_counts = store.held_by_domain()?;
    let mut lines: Vec<DomainLine> = figures
        .into_iter()
        .map(|f| {
            let held = held_counts
                .iter()
                .find(|h| h.domain == f.domain)
                .map_or(0, |h| h.messages);
            line(&context, f, held)
        })
        .collect();
    // Domains with their own section but no mail in the window still get a line, and so
    // do domains with mail held from before the window.
    let mut missing: Vec<(String, u64)> = context
        .policy
        .domains()
        .keys()
        .map(|d| (d.clone(), 0))
        .chain(held_counts.iter().map(|h| (h.domain.clone(), h.messages)))
        .collect();
    missing.sort();
    missing.dedup_by(|a, b| a.0 == b.0);
    for (domain, _) in missing {
        if !lines.iter().any(|l| l.figures.domain == domain) {
            let held = held_counts
                .iter()
                .find(|h| h.domain == domain)
                .map_or(0, |h| h.messages);
            let empty = DomainFigures::empty(&domain, buckets.since);
            lines.push(line(&context, empty, held));
        }
    }
    lines.sort_by(|a, b| {
        b.figures
            .messages()
            .cmp(&a.figures.messages())
            .then(b.held.cmp(&a.held))
            .then(a.figures.domain.cmp(&b.figures.domain))
    });
    let more_domains = lines.len().saturating_sub(MAX_DOMAINS);
    lines.truncate(MAX_DOMAINS);
    Ok(Overview {
        volume: store.volume(None, &buckets)?,
        held: store.held_totals()?,
        domains: lines,
        more_domains,
        context,
    })
}

fn line(context: &Context, figures: DomainFigures, held: u64) -> DomainLine {
    let target = context.target_of(&figures.domain);
    DomainLine {
        target,
        check: figures.against(target),
        section: Section::of(&context.policy, &figures.domain),
        figures,
        held,
    }
}

/// Margin bins wide enough for the standard range and the section's thresholds, when they
/// are on the margin.
pub fn bins_for(section: &Section) -> MarginBins {
    let (mut low, mut high) = (-3.0f64, 3.0f64);
    if section.thresholds.scale() == Scale::Margin {
        low = low.min(((section.thresholds.tag() - 0.5) / BIN_WIDTH).floor() * BIN_WIDTH);
        high = high.max(((section.thresholds.quarantine() + 0.5) / BIN_WIDTH).ceil() * BIN_WIDTH);
        low = low.max(-50.0);
        high = high.min(50.0);
    }
    let count = ((high - low) / BIN_WIDTH).round().clamp(1.0, 400.0) as u32;
    MarginBins::new(low, high, count).unwrap_or(MarginBins {
        low: -3.0,
        high: 3.0,
        count: 24,
    })
}

/// Reads a held message's From and Subject from its first bytes.
fn held_line(store: &dyn Store, summary: HeldSummary) -> Result<HeldLine, StoreError> {
    let head = store.held_head(&summary.entry.verdict_id, HEAD_BYTES)?;
    let (from, subject) = match head {
        Some(bytes) => {
            let section = crate::mail::headers::parse_section(&bytes);
            (
                crate::mail::headers::first_value(&section.fields, "From"),
                crate::mail::headers::first_value(&section.fields, "Subject"),
            )
        }
        None => (None, None),
    };
    Ok(HeldLine {
        summary,
        from,
        subject,
    })
}

/// Gathers a domain's view; `held_offset` pages through its held mail.
pub fn domain(
    store: &dyn Store,
    context: Context,
    domain: &str,
    held_offset: u64,
    audit_size: usize,
    audit_seed: u64,
) -> Result<DomainView, StoreError> {
    let buckets = context.window.buckets(context.now);
    let figures = store
        .figures(buckets.since, Some(domain))?
        .into_iter()
        .next()
        .unwrap_or_else(|| DomainFigures::empty(domain, buckets.since));
    let section = Section::of(&context.policy, domain);
    let filter = HeldFilter {
        domain: Some(domain.to_string()),
        state: HeldState::Held,
        limit: HELD_PAGE + 1,
        offset: held_offset,
        ..HeldFilter::default()
    };
    let mut held = store.list_held(&filter)?;
    let held_more = held.len() > HELD_PAGE as usize;
    held.truncate(HELD_PAGE as usize);
    let held = held
        .into_iter()
        .map(|s| held_line(store, s))
        .collect::<Result<Vec<_>, _>>()?;
    let mut audit = store.audit_sample(domain, buckets.since, audit_size, audit_seed)?;
    // Not yet reviewed first; the sample's own order otherwise.
    audit.sort_by_key(|a| a.reviewed.is_some());
    let audit = audit
        .into_iter()
        .map(|a| {
            let line = held_line(store, a.held.clone())?;
            Ok((a, line))
        })
        .collect::<Result<Vec<_>, StoreError>>()?;
    let target = context.target_of(domain);
    Ok(DomainView {
        target,
        check: figures.against(target),
        volume: store.volume(Some(domain), &buckets)?,
        margins: store.reported_margins(domain, buckets.since, &bins_for(&section))?,
        domain: domain.to_string(),
        figures,
        section,
        held,
        held_offset,
        held_more,
        audit,
        context,
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_last_bucket_holds_now() {
        let b = DEFAULT_WINDOW.buckets(1_000_000);
        assert!(b.since <= 1_000_000 - 7 * 86_400 + 6 * 3600);
        assert!(b.until() > 1_000_000 && b.until() - 1_000_000 <= 6 * 3600);
        assert_eq!(b.count, 28);
        assert_eq!(Window::named("30d").map(|w| w.buckets), Some(30));
        assert_eq!(Window::named("1y"), None);
    }

    #[test]
    fn bins_take_in_the_thresholds() {
        let section = Section {
            own: true,
            thresholds: Thresholds::on_margin(-4.1, 5.0).expect("valid"),
            tag_only: false,
        };
        let bins = bins_for(&section);
        assert!(bins.low <= -4.6 && bins.high >= 5.5, "{bins:?}");
        assert!((bins.width() - BIN_WIDTH).abs() < 1e-9);
        let plain = bins_for(&Section::of(&Policy::default(), "a.test"));
        assert_eq!((plain.low, plain.high, plain.count), (-3.0, 3.0, 24));
    }
}
