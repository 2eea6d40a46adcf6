//! The daemon's metrics: one Prometheus registry built at start-up and passed down, with
//! typed handles for the events the server counts, rendered in the text exposition format.
//!
//! Families (all begin with `tamis_`; counters end in `_total`, units are in the name):
//!
//! | name | type | labels |
//! |---|---|---|
//! | `tamis_messages_total` | counter | `domain`, `action` |
//! | `tamis_margin` | histogram | `domain` |
//! | `tamis_scan_duration_seconds` | histogram | |
//! | `tamis_scanned_bytes_total` | counter | |
//! | `tamis_connections_open` | gauge | |
//! | `tamis_protocol_errors_total` | counter | `kind` |
//! | `tamis_reloads_total` | counter | `outcome` |
//! | `tamis_model_info` | gauge (always 1) | `version`, `trained_at`, `feature_spec` |
//! | `tamis_unscanned_total` | counter | `reason` |
//! | `tamis_accept_errors_total` | counter | |
//! | `tamis_buffered_bytes` | gauge | |
//! | `tamis_buffer_budget_exhausted_total` | counter | |
//! | `tamis_would_quarantine_total` | counter | `domain`, `why` |
//! | `tamis_quarantine_not_held_total` | counter | `reason` |
//! | `tamis_holds_total` | counter | `outcome` |
//! | `tamis_hold_duration_seconds` | histogram | |
//! | `tamis_held_messages` | gauge | |
//! | `tamis_held_bytes` | gauge | |
//! | `tamis_held_stored_bytes` | gauge | |
//! | `tamis_store_errors_total` | counter | `kind` |
//! | `tamis_journal_entries_lost_total` | counter | |
//! | `tamis_reports_total` | counter | `domain`, `kind`, `source`, `enforced` |
//! | `tamis_releases_total` | counter | `domain` |
//! | `tamis_reports_unmatched_total` | counter | `status` |
//! | `tamis_purged_total` | counter | `what` |
//!
//! The held-mail gauges and the report counters come from the store, which other
//! processes write too (the operator commands record reports and releases): the daemon
//! reads them periodically (`crate::server::keeping`). The report counters count what was
//! recorded while this daemon ran, from the newest report it found at start.
//!
//! Invariant: every label takes values from a bounded set. Each distinct label value is
//! a separate time series that the Prometheus server keeps in memory and on disk for as
//! long as it retains data; a label filled from message content (a recipient domain, an
//! error text) lets any sender create series at will, which exhausts the server and makes
//! queries slow. So `domain` is either a domain configured in the policy or `other`,
//! `kind` is one of the protocol's fault names or `other`, and `action`, `outcome` and
//! `reason` come from closed enums. (`tamis_model_info` changes only when an operator
//! loads a model, and keeps a single series.)
//!
//! Series of the bounded label values are created at start-up with value 0, so a rate
//! over them is defined before the first event.

use std::collections::BTreeSet;
use std::sync::RwLock;

use prometheus::core::{Collector, MetricVec, MetricVecBuilder};
use prometheus::{
    Encoder, Histogram, HistogramOpts, HistogramVec, IntCounter, IntCounterVec, IntGauge,
    IntGaugeVec, Opts, Registry, TextEncoder,
};

use crate::policy::domain::normalize;
use crate::policy::{Action, UnscannedReason, domain};

/// The `domain` label value for every domain the policy does not configure.
pub const OTHER: &str = "other";

/// The `kind` values of `tamis_protocol_errors_total`: the `FAULT` names of
/// `proto/PROTOCOL.md` §5, lower-cased.
pub const PROTOCOL_ERROR_KINDS: [&str; 14] = [
    "malformed",
    "unknown_kind",
    "out_of_order",
    "frame_too_large",
    "message_too_large",
    "too_many",
    "field_too_large",
    "idle",
    "version",
    "busy",
    "shutting_down",
    "bad_address",
    "verdict_too_large",
    "denied",
];

/// Bucket bounds of `tamis_margin`: -3 to 3 in steps of 0.25, which resolves the usual
/// tag and quarantine thresholds (around 0 and 1) and leaves the tails to the
/// `-Inf`/`+Inf` buckets.
pub fn margin_buckets() -> Vec<f64> {
    (-12..=12).map(|i| f64::from(i) * 0.25).collect()
}

/// Bucket bounds of `tamis_scan_duration_seconds`: 50 µs to 2.5 s, dense below a
/// millisecond where a typical message should fall.
pub const SCAN_SECONDS_BUCKETS: [f64; 15] = [
    0.000_05, 0.000_1, 0.000_25, 0.000_5, 0.001, 0.002_5, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5,
    1.0, 2.5,
];

/// The `kind` values of `tamis_store_errors_total` beyond [`crate::store::StoreError::kind`]:
/// a journal entry refused because the writer's queue was full, or because the writer had
/// stopped.
pub const JOURNAL_REFUSALS: [&str; 2] = ["queue-full", "stopped"];

/// Every `kind` of [`crate::store::StoreError::kind`], for pre-registering series.
pub const STORE_ERROR_KINDS: [&str; 13] = [
    "missing-folder",
    "not-a-file",
    "read-only",
    "not-a-store",
    "corrupt",
    "newer-schema",
    "busy",
    "full",
    "io",
    "gone",
    "damaged-record",
    "invalid",
    "sqlite",
];

/// The `why` values of `tamis_would_quarantine_total`.
pub const WOULD_QUARANTINE_WHY: [&str; 2] = ["tag-only", "not-held"];

/// The `reason` values of `tamis_quarantine_not_held_total`.
pub const NOT_HELD_REASONS: [&str; 5] = [
    "store-error",
    "over-max-message",
    "over-buffer-budget",
    "field-cut",
    "fields-dropped",
];

/// The `kind` values of `tamis_reports_total`, the `source` values, and the `status`
/// values of `tamis_reports_unmatched_total`, as the store names them.
pub const REPORT_KINDS: [&str; 2] = ["junk", "not-junk"];
/// See [`REPORT_KINDS`].
pub const REPORT_SOURCES: [&str; 4] = ["user", "operator", "audit", "release"];
/// See [`REPORT_KINDS`].
pub const UNMATCHED_STATUSES: [&str; 3] =
    ["unknown-verdict", "domain-mismatch", "no-reporter-domain"];

/// Bucket bounds of `tamis_hold_duration_seconds`: 0.5 ms to 10 s; a hold waits for a
/// flush to disk, and for the busy timeout when another process holds the store.
pub const HOLD_SECONDS_BUCKETS: [f64; 12] = [
    0.000_5, 0.001, 0.002_5, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 1.0, 5.0, 10.0,
];

/// Outcome of a configuration or model reload.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum ReloadOutcome {
    /// The new configuration and model are in use.
    Success,
    /// Something failed; the previous ones stay in use.
    Failure,
}

impl ReloadOutcome {
    /// The `outcome` label value.
    pub fn as_str(self) -> &'static str {
        match self {
            ReloadOutcome::Success => "success",
            ReloadOutcome::Failure => "failure",
        }
    }
}

/// A metric could not be created or registered (a name clash with another component's
/// metric, or an invalid definition).
#[derive(Debug, thiserror::Error)]
#[error("cannot set up metric {name}: {source}; two components may register the same name")]
pub struct MetricsError {
    /// The metric family.
    pub name: &'static str,
    /// The cause.
    #[source]
    pub source: prometheus::Error,
}

/// The daemon's metrics and their registry.
#[derive(Debug)]
pub struct Metrics {
    registry: Registry,
    domains: RwLock<BTreeSet<String>>,
    messages: IntCounterVec,
    margin: HistogramVec,
    scan_seconds: Histogram,
    scanned_bytes: IntCounter,
    connections: IntGauge,
    protocol_errors: IntCounterVec,
    reloads: IntCounterVec,
    model_info: IntGaugeVec,
    unscanned: IntCounterVec,
    accept_errors: IntCounter,
    buffered_bytes: IntGauge,
    budget_exhausted: IntCounter,
    would_quarantine: IntCounterVec,
    not_held: IntCounterVec,
    holds: IntCounterVec,
    hold_seconds: Histogram,
    held_messages: IntGauge,
    held_bytes: IntGauge,
    held_stored_bytes: IntGauge,
    store_errors: IntCounterVec,
    journal_lost: IntCounter,
    reports: IntCounterVec,
    releases: IntCounterVec,
    unmatched: IntCounterVec,
    purged: IntCounterVec,
}

/// Keeps `tamis_connections_open` one higher while it lives.
#[derive(Debug)]
pub struct ConnectionGuard {
    gauge: IntGauge,
}

impl Drop for ConnectionGuard {
    fn drop(&mut self) {
        self.gauge.dec();
    }
}

impl Metrics {
    /// Builds the registry and registers every family. `domains` are the policy's
    /// configured domains: the only `domain` label values besides `other`.
    pub fn new<I, S>(domains: I) -> Result<Metrics, MetricsError>
    where
        I: IntoIterator<Item = S>,
        S: AsRef<str>,
    {
        let registry = Registry::new();
        let messages = register(
            &registry,
            "tamis_messages_total",
            IntCounterVec::new(
                Opts::new(
                    "tamis_messages_total",
                    "Messages decided, by recipient domain and action; a message to several domains counts once in each.",
                ),
                &["domain", "action"],
            ),
        )?;
        let margin = register(
            &registry,
            "tamis_margin",
            HistogramVec::new(
                HistogramOpts::new(
                    "tamis_margin",
                    "Model margin of scanned messages (positive leans junk), by recipient domain.",
                )
                .buckets(margin_buckets()),
                &["domain"],
            ),
        )?;
        let scan_seconds = register(
            &registry,
            "tamis_scan_duration_seconds",
            Histogram::with_opts(
                HistogramOpts::new(
                    "tamis_scan_duration_seconds",
                    "Time from a sealed message to its verdict: extraction, features, scoring and policy.",
                )
                .buckets(SCAN_SECONDS_BUCKETS.to_vec()),
            ),
        )?;
        let scanned_bytes = register(
            &registry,
            "tamis_scanned_bytes_total",
            IntCounter::new(
                "tamis_scanned_bytes_total",
                "Message bytes (header fields and body) scanned.",
            ),
        )?;
        let connections = register(
            &registry,
            "tamis_connections_open",
            IntGauge::new(
                "tamis_connections_open",
                "Relay protocol connections currently open.",
            ),
        )?;
        let protocol_errors = register(
            &registry,
            "tamis_protocol_errors_total",
            IntCounterVec::new(
                Opts::new(
                    "tamis_protocol_errors_total",
                    "Protocol faults sent to relays, by fault kind.",
                ),
                &["kind"],
            ),
        )?;
        let reloads = register(
            &registry,
            "tamis_reloads_total",
            IntCounterVec::new(
                Opts::new(
                    "tamis_reloads_total",
                    "Configuration and model reloads, by outcome; on failure the previous ones stay in use.",
                ),
                &["outcome"],
            ),
        )?;
        let model_info = register(
            &registry,
            "tamis_model_info",
            IntGaugeVec::new(
                Opts::new(
                    "tamis_model_info",
                    "The model in use, as labels; the value is always 1.",
                ),
                &["version", "trained_at", "feature_spec"],
            ),
        )?;
        let unscanned = register(
            &registry,
            "tamis_unscanned_total",
            IntCounterVec::new(
                Opts::new(
                    "tamis_unscanned_total",
                    "Messages answered without a scan, by reason.",
                ),
                &["reason"],
            ),
        )?;
        let accept_errors = register(
            &registry,
            "tamis_accept_errors_total",
            IntCounter::new(
                "tamis_accept_errors_total",
                "Relay connections the listeners failed to accept (out of descriptors, for instance).",
            ),
        )?;
        let buffered_bytes = register(
            &registry,
            "tamis_buffered_bytes",
            IntGauge::new(
                "tamis_buffered_bytes",
                "Bytes held by messages being assembled, against limits.max_buffered_bytes.",
            ),
        )?;
        let budget_exhausted = register(
            &registry,
            "tamis_buffer_budget_exhausted_total",
            IntCounter::new(
                "tamis_buffer_budget_exhausted_total",
                "Messages decided on part of their content because the buffer budget was spent.",
            ),
        )?;
        let would_quarantine = register(
            &registry,
            "tamis_would_quarantine_total",
            IntCounterVec::new(
                Opts::new(
                    "tamis_would_quarantine_total",
                    "Messages the policy would have quarantined for a recipient domain but did not: tag-only mode tagged them (why=tag-only), or they could not be held (why=not-held, see tamis_quarantine_not_held_total).",
                ),
                &["domain", "why"],
            ),
        )?;
        let not_held = register(
            &registry,
            "tamis_quarantine_not_held_total",
            IntCounterVec::new(
                Opts::new(
                    "tamis_quarantine_not_held_total",
                    "Messages to quarantine that were not held, by reason: the store refused them, or the message was not kept whole; their recipients got the failure mode or tag instead.",
                ),
                &["reason"],
            ),
        )?;
        let holds = register(
            &registry,
            "tamis_holds_total",
            IntCounterVec::new(
                Opts::new(
                    "tamis_holds_total",
                    "Messages committed to the store before their quarantine verdict (outcome=held), or found already held from an earlier attempt of the relay (outcome=already-held).",
                ),
                &["outcome"],
            ),
        )?;
        let hold_seconds = register(
            &registry,
            "tamis_hold_duration_seconds",
            Histogram::with_opts(
                HistogramOpts::new(
                    "tamis_hold_duration_seconds",
                    "Time to commit a held message to the store and flush it to disk, successful or not.",
                )
                .buckets(HOLD_SECONDS_BUCKETS.to_vec()),
            ),
        )?;
        let held_messages = register(
            &registry,
            "tamis_held_messages",
            IntGauge::new(
                "tamis_held_messages",
                "Messages held in the store, waiting for a decision.",
            ),
        )?;
        let held_bytes = register(
            &registry,
            "tamis_held_bytes",
            IntGauge::new(
                "tamis_held_bytes",
                "Size of the messages held in the store, as received.",
            ),
        )?;
        let held_stored_bytes = register(
            &registry,
            "tamis_held_stored_bytes",
            IntGauge::new(
                "tamis_held_stored_bytes",
                "Size of the messages held in the store, compressed as stored.",
            ),
        )?;
        let store_errors = register(
            &registry,
            "tamis_store_errors_total",
            IntCounterVec::new(
                Opts::new(
                    "tamis_store_errors_total",
                    "Store operations that failed, by kind of error (and journal entries refused by a full or stopped journal writer).",
                ),
                &["kind"],
            ),
        )?;
        let journal_lost = register(
            &registry,
            "tamis_journal_entries_lost_total",
            IntCounter::new(
                "tamis_journal_entries_lost_total",
                "Verdicts whose journal entry could not be written; the figures miss them.",
            ),
        )?;
        let reports = register(
            &registry,
            "tamis_reports_total",
            IntCounterVec::new(
                Opts::new(
                    "tamis_reports_total",
                    "Reports matched to a verdict, recorded while this daemon ran, by recipient domain, what they say (junk, not-junk), who made them (user, operator, audit, release) and the action the policy took or, in tag-only mode, would have taken for the domain (enforced). A release counts as a not-junk report.",
                ),
                &["domain", "kind", "source", "enforced"],
            ),
        )?;
        let releases = register(
            &registry,
            "tamis_releases_total",
            IntCounterVec::new(
                Opts::new(
                    "tamis_releases_total",
                    "Held messages released while this daemon ran, by recipient domain they were held for.",
                ),
                &["domain"],
            ),
        )?;
        let unmatched = register(
            &registry,
            "tamis_reports_unmatched_total",
            IntCounterVec::new(
                Opts::new(
                    "tamis_reports_unmatched_total",
                    "Reports recorded while this daemon ran that count as no evidence, by why.",
                ),
                &["status"],
            ),
        )?;
        let purged = register(
            &registry,
            "tamis_purged_total",
            IntCounterVec::new(
                Opts::new(
                    "tamis_purged_total",
                    "Records removed by retention: held messages past their expiry, journal entries and reports past the journal retention.",
                ),
                &["what"],
            ),
        )?;
        let metrics = Metrics {
            registry,
            domains: RwLock::new(BTreeSet::new()),
            messages,
            margin,
            scan_seconds,
            scanned_bytes,
            connections,
            protocol_errors,
            reloads,
            model_info,
            unscanned,
            accept_errors,
            buffered_bytes,
            budget_exhausted,
            would_quarantine,
            not_held,
            holds,
            hold_seconds,
            held_messages,
            held_bytes,
            held_stored_bytes,
            store_errors,
            journal_lost,
            reports,
            releases,
            unmatched,
            purged,
        };
        metrics.set_domains(domains);
        for reason in NOT_HELD_REASONS {
            let _ = labelled(&metrics.not_held, &[reason]);
        }
        for outcome in ["held", "already-held"] {
            let _ = labelled(&metrics.holds, &[outcome]);
        }
        for kind in STORE_ERROR_KINDS.iter().chain(JOURNAL_REFUSALS.iter()) {
            let _ = labelled(&metrics.store_errors, &[kind]);
        }
        for status in UNMATCHED_STATUSES {
            let _ = labelled(&metrics.unmatched, &[status]);
        }
        for what in ["held", "journal", "reports"] {
            let _ = labelled(&metrics.purged, &[what]);
        }
        for kind in PROTOCOL_ERROR_KINDS.iter().chain([&OTHER]) {
            let _ = labelled(&metrics.protocol_errors, &[kind]);
        }
        for outcome in [ReloadOutcome::Success, ReloadOutcome::Failure] {
            let _ = labelled(&metrics.reloads, &[outcome.as_str()]);
        }
        for reason in UnscannedReason::ALL {
            let _ = labelled(&metrics.unscanned, &[reason.as_str()]);
        }
        Ok(metrics)
    }

    /// The registry, for other components to register their own metrics and for
    /// serving.
    pub fn registry(&self) -> &Registry {
        &self.registry
    }

    /// Replaces the set of domains with their own label value (after a reload changed the
    /// policy). Series of domains no longer configured keep their last values.
    pub fn set_domains<I, S>(&self, domains: I)
    where
        I: IntoIterator<Item = S>,
        S: AsRef<str>,
    {
        let set: BTreeSet<String> = domains.into_iter().map(|d| normalize(d.as_ref())).collect();
        for label in set.iter().map(String::as_str).chain([OTHER]) {
            for action in Action::ALL {
                let _ = labelled(&self.messages, &[label, action.as_str()]);
            }
            let _ = labelled(&self.margin, &[label]);
            for why in WOULD_QUARANTINE_WHY {
                let _ = labelled(&self.would_quarantine, &[label, why]);
            }
            let _ = labelled(&self.releases, &[label]);
            for kind in REPORT_KINDS {
                for source in REPORT_SOURCES {
                    for enforced in Action::ALL {
                        let _ = labelled(&self.reports, &[label, kind, source, enforced.as_str()]);
                    }
                }
            }
        }
        match self.domains.write() {
            Ok(mut guard) => *guard = set,
            Err(poisoned) => *poisoned.into_inner() = set,
        }
    }

    /// The `domain` label value for a domain: itself (normalised) when the policy
    /// configures it, `other` otherwise.
    pub fn domain_label(&self, domain: &str) -> String {
        let domain = normalize(domain);
        let known = match self.domains.read() {
            Ok(guard) => guard.contains(&domain),
            Err(poisoned) => poisoned.into_inner().contains(&domain),
        };
        if known { domain } else { OTHER.to_string() }
    }

    /// Records one message decided for one recipient domain: its action, margin (not
    /// observed when NaN), scan time and size.
    pub fn record_verdict(
        &self,
        domain: &str,
        action: Action,
        margin: f64,
        seconds: f64,
        bytes: u64,
    ) {
        let label = self.domain_label(domain);
        if let Some(c) = labelled(&self.messages, &[&label, action.as_str()]) {
            c.inc();
        }
        if margin.is_finite()
            && let Some(h) = labelled(&self.margin, &[&label])
        {
            h.observe(margin);
        }
        self.record_scan(seconds, bytes);
    }

    /// Records one message decided for several recipients (as [`crate::policy::Policy::decide`]
    /// returns them): each distinct (domain label, action) pair is counted once, the margin
    /// is observed once per distinct domain label, scan time and size once.
    pub fn record_decisions(
        &self,
        decisions: &[(String, Action)],
        margin: f64,
        seconds: f64,
        bytes: u64,
    ) {
        let mut pairs = BTreeSet::new();
        for (recipient, action) in decisions {
            let domain = domain::recipient_domain(recipient).unwrap_or_default();
            pairs.insert((self.domain_label(&domain), *action));
        }
        let mut labels = BTreeSet::new();
        for (label, action) in &pairs {
            if let Some(c) = labelled(&self.messages, &[label, action.as_str()]) {
                c.inc();
            }
            labels.insert(label.as_str());
        }
        if margin.is_finite() {
            for label in labels {
                if let Some(h) = labelled(&self.margin, &[label]) {
                    h.observe(margin);
                }
            }
        }
        self.record_scan(seconds, bytes);
    }

    /// Records one message as [`Metrics::record_decisions`] does, from decisions that
    /// also carry the action with tag-only off: each distinct domain label where the
    /// policy would have quarantined but the action sent is something else is counted in
    /// `tamis_would_quarantine_total`, with `why` tag-only when the action is tag and the
    /// message was not refused a hold, else not-held.
    pub fn record_outcomes(
        &self,
        decisions: &[crate::policy::Decision],
        not_held: bool,
        margin: f64,
        seconds: f64,
        bytes: u64,
    ) {
        let pairs: Vec<(String, Action)> = decisions
            .iter()
            .map(|d| (d.recipient.clone(), d.action))
            .collect();
        self.record_decisions(&pairs, margin, seconds, bytes);
        let mut would = BTreeSet::new();
        for d in decisions {
            if d.enforced == Action::Quarantine && d.action != Action::Quarantine {
                let domain = domain::recipient_domain(&d.recipient).unwrap_or_default();
                would.insert(self.domain_label(&domain));
            }
        }
        let why = if not_held { "not-held" } else { "tag-only" };
        for label in would {
            if let Some(c) = labelled(&self.would_quarantine, &[&label, why]) {
                c.inc();
            }
        }
    }

    /// Counts a message that should have been quarantined but was not held; `reason` is
    /// one of [`NOT_HELD_REASONS`] (anything else is not counted).
    pub fn not_held(&self, reason: &str) {
        if NOT_HELD_REASONS.contains(&reason)
            && let Some(c) = labelled(&self.not_held, &[reason])
        {
            c.inc();
        }
    }

    /// Counts a hold and its time: `true` when the message was newly held, `false` when it
    /// was found already held.
    pub fn hold(&self, newly: bool, seconds: f64) {
        let outcome = if newly { "held" } else { "already-held" };
        if let Some(c) = labelled(&self.holds, &[outcome]) {
            c.inc();
        }
        self.hold_seconds(seconds);
    }

    /// Observes the time of a hold that failed.
    pub fn hold_seconds(&self, seconds: f64) {
        if seconds.is_finite() && seconds >= 0.0 {
            self.hold_seconds.observe(seconds);
        }
    }

    /// Sets the held-mail gauges from the store's totals.
    pub fn set_held(&self, totals: &crate::store::HeldTotals) {
        let gauge = |g: &IntGauge, v: u64| g.set(i64::try_from(v).unwrap_or(i64::MAX));
        gauge(&self.held_messages, totals.messages);
        gauge(&self.held_bytes, totals.bytes);
        gauge(&self.held_stored_bytes, totals.stored_bytes);
    }

    /// Adds one newly held message to the held-mail gauges, until the next refresh from
    /// the store sets them.
    pub fn add_held(&self, bytes: u64, stored_bytes: u64) {
        self.held_messages.inc();
        self.held_bytes
            .add(i64::try_from(bytes).unwrap_or(i64::MAX));
        self.held_stored_bytes
            .add(i64::try_from(stored_bytes).unwrap_or(i64::MAX));
    }

    /// The held-mail gauges: messages, bytes and stored bytes.
    pub fn held(&self) -> (i64, i64, i64) {
        (
            self.held_messages.get(),
            self.held_bytes.get(),
            self.held_stored_bytes.get(),
        )
    }

    /// Counts a store error of this kind ([`crate::store::StoreError::kind`] or one of
    /// [`JOURNAL_REFUSALS`]); an unknown kind counts as `sqlite`.
    pub fn store_error(&self, kind: &str) {
        let known = STORE_ERROR_KINDS
            .iter()
            .chain(JOURNAL_REFUSALS.iter())
            .find(|k| **k == kind)
            .copied()
            .unwrap_or("sqlite");
        if let Some(c) = labelled(&self.store_errors, &[known]) {
            c.inc();
        }
    }

    /// Counts journal entries that could not be written.
    pub fn journal_lost(&self, entries: u64) {
        self.journal_lost.inc_by(entries);
    }

    /// Counts one matched report for one recipient domain. `kind`, `source` and
    /// `enforced` must come from [`REPORT_KINDS`], [`REPORT_SOURCES`] and the actions;
    /// anything else is not counted.
    pub fn report(&self, domain: &str, kind: &str, source: &str, enforced: Action) {
        if !REPORT_KINDS.contains(&kind) || !REPORT_SOURCES.contains(&source) {
            return;
        }
        let label = self.domain_label(domain);
        if let Some(c) = labelled(&self.reports, &[&label, kind, source, enforced.as_str()]) {
            c.inc();
        }
    }

    /// Counts a release of a message held for a recipient domain.
    pub fn release(&self, domain: &str) {
        let label = self.domain_label(domain);
        if let Some(c) = labelled(&self.releases, &[&label]) {
            c.inc();
        }
    }

    /// Counts a report that is no evidence; `status` is one of [`UNMATCHED_STATUSES`].
    pub fn unmatched_report(&self, status: &str) {
        if UNMATCHED_STATUSES.contains(&status)
            && let Some(c) = labelled(&self.unmatched, &[status])
        {
            c.inc();
        }
    }

    /// Counts records removed by retention: `what` is `held`, `journal` or `reports`.
    pub fn purged(&self, what: &str, n: u64) {
        if ["held", "journal", "reports"].contains(&what)
            && let Some(c) = labelled(&self.purged, &[what])
        {
            c.inc_by(n);
        }
    }

    fn record_scan(&self, seconds: f64, bytes: u64) {
        if seconds.is_finite() && seconds >= 0.0 {
            self.scan_seconds.observe(seconds);
        }
        self.scanned_bytes.inc_by(bytes);
    }

    /// Counts an open connection until the guard is dropped.
    pub fn connection_opened(&self) -> ConnectionGuard {
        self.connections.inc();
        ConnectionGuard {
            gauge: self.connections.clone(),
        }
    }

    /// Counts a protocol fault. `kind` is a `FAULT` name of `proto/PROTOCOL.md` §5 in any
    /// case (`MALFORMED`, `frame_too_large`); anything else counts as `other`.
    pub fn protocol_error(&self, kind: &str) {
        let kind = kind.to_ascii_lowercase();
        let label = PROTOCOL_ERROR_KINDS
            .iter()
            .find(|k| **k == kind)
            .copied()
            .unwrap_or(OTHER);
        if let Some(c) = labelled(&self.protocol_errors, &[label]) {
            c.inc();
        }
    }

    /// Counts a connection a listener failed to accept.
    pub fn accept_error(&self) {
        self.accept_errors.inc();
    }

    /// The gauge of bytes held by messages being assembled, for the buffer budget to move.
    pub fn buffered_bytes_gauge(&self) -> IntGauge {
        self.buffered_bytes.clone()
    }

    /// Counts a message cut short because the buffer budget was spent.
    pub fn budget_exhausted(&self) {
        self.budget_exhausted.inc();
    }

    /// Counts a reload and its outcome.
    pub fn reload(&self, outcome: ReloadOutcome) {
        if let Some(c) = labelled(&self.reloads, &[outcome.as_str()]) {
            c.inc();
        }
    }

    /// Counts a message answered without a scan.
    pub fn unscanned(&self, reason: UnscannedReason) {
        if let Some(c) = labelled(&self.unscanned, &[reason.as_str()]) {
            c.inc();
        }
    }

    /// Describes the model in use: one series with value 1, replacing the previous one.
    /// `trained_at` is best given as RFC 3339 UTC or Unix seconds.
    pub fn set_model_info(&self, version: &str, trained_at: &str, feature_spec: &str) {
        self.model_info.reset();
        if let Some(g) = labelled(&self.model_info, &[version, trained_at, feature_spec]) {
            g.set(1);
        }
    }

    /// Every family in the registry in the text exposition format (version 0.0.4). If
    /// encoding fails the text is a single comment saying why, which scrapers ignore.
    pub fn render(&self) -> String {
        let mut buf = Vec::new();
        let encoder = TextEncoder::new();
        match encoder.encode(&self.registry.gather(), &mut buf) {
            Ok(()) => String::from_utf8(buf)
                .unwrap_or_else(|_| "# metrics text was not UTF-8\n".to_string()),
            Err(e) => format!("# cannot encode metrics: {}\n", one_line(&e.to_string())),
        }
    }

    /// The content type of [`Metrics::render`]'s text, for the HTTP response.
    pub fn content_type(&self) -> &'static str {
        prometheus::TEXT_FORMAT
    }
}

fn one_line(text: &str) -> String {
    text.chars()
        .map(|c| if c.is_control() { ' ' } else { c })
        .collect()
}

fn register<C: Collector + Clone + 'static>(
    registry: &Registry,
    name: &'static str,
    collector: prometheus::Result<C>,
) -> Result<C, MetricsError> {
    let collector = collector.map_err(|source| MetricsError { name, source })?;
    registry
        .register(Box::new(collector.clone()))
        .map_err(|source| MetricsError { name, source })?;
    Ok(collector)
}

/// The child series for these label values; `None` only if the count of values is wrong,
/// which the fixed call sites rule out (`with_label_values` would panic instead).
fn labelled<T: MetricVecBuilder>(vec: &MetricVec<T>, values: &[&str]) -> Option<T::M> {
    vec.get_metric_with_label_values(values).ok()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn margin_buckets_span_minus_three_to_three() {
        let b = margin_buckets();
        assert_eq!(b.first().copied(), Some(-3.0));
        assert_eq!(b.last().copied(), Some(3.0));
        assert!(b.windows(2).all(|w| w[0] < w[1]));
    }

    #[test]
    fn connection_guard_counts_down_on_drop() {
        let m = Metrics::new(["example.org"]);
        let Ok(m) = m else {
            panic!("metrics set up");
        };
        let a = m.connection_opened();
        let b = m.connection_opened();
        assert_eq!(m.connections.get(), 2);
        drop(a);
        drop(b);
        assert_eq!(m.connections.get(), 0);
    }
}
