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
        };
        metrics.set_domains(domains);
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
