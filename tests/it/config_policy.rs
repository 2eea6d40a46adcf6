//! The daemon's configuration file, the per-domain policy and the metrics registry.

use std::collections::BTreeSet;
use std::net::SocketAddr;
use std::path::{Path, PathBuf};
use std::process::{Command, Stdio};
use std::time::Duration;

use pretty_assertions::assert_eq;

use tamis::config::{
    Config, ConfigError, FailureMode, HeaderConfig, LogFormat, LogLevel, ModelSource, UnixSocket,
};
use tamis::metrics::{ConnectionGuard, Metrics, ReloadOutcome};
use tamis::policy::{Action, HeaderEdit, Policy, Scale, Thresholds, UnscannedReason};
use tamis::train::tune::{TuneTarget, policy_snippet, tune_domain};

const EXAMPLE: &str = include_str!("../../config/tamis.example.toml");
const SOURCE: &str = "/etc/tamis/tamis.toml";

fn parse(text: &str) -> Result<Config, ConfigError> {
    Config::from_toml_str(text, SOURCE)
}

fn parse_ok(text: &str) -> Config {
    match parse(text) {
        Ok(c) => c,
        Err(e) => panic!("should parse:\n{text}\n---\n{e}"),
    }
}

fn parse_err(text: &str) -> ConfigError {
    match parse(text) {
        Ok(c) => panic!("should be refused:\n{text}\n---\n{c:?}"),
        Err(e) => e,
    }
}

fn addr(text: &str) -> SocketAddr {
    text.parse().unwrap_or_else(|e| panic!("{text}: {e}"))
}

fn strings(items: &[&str]) -> Vec<String> {
    items.iter().map(|s| s.to_string()).collect()
}

// --- The example file --------------------------------------------------------------

#[test]
fn example_parses_and_equals_the_defaults_but_for_its_marked_differences() {
    let example = parse_ok(EXAMPLE);
    let mut expected = Config::default();
    // The three differences the example marks with "EXAMPLE".
    expected.listen.unix = Some(UnixSocket {
        path: PathBuf::from("/run/tamis/tamis.sock"),
        mode: 0o660,
    });
    expected.headers.subject_prefix = Some("[junk?] ".to_string());
    let example_org = Thresholds::on_margin(-0.25, 1.5)
        .map(|t| t.with_tag_only(Some(false)))
        .expect("valid thresholds");
    expected.policy = Policy::new(
        Thresholds::default(),
        [("example.org".to_string(), example_org)],
        true,
    )
    .expect("valid policy");
    assert_eq!(example, expected);
}

#[test]
fn default_config_is_loopback_only_and_tag_only() {
    let c = Config::default();
    assert_eq!(c.listen.tcp, Some(addr("127.0.0.1:7357")));
    assert_eq!(c.metrics, Some(addr("127.0.0.1:9357")));
    assert!(c.listen.tcp.is_some_and(|a| a.ip().is_loopback()));
    assert!(c.metrics.is_some_and(|a| a.ip().is_loopback()));
    assert!(c.listen.unix.is_none());
    assert!(c.policy.tag_only());
    assert_eq!(c.model, ModelSource::Builtin);
    assert_eq!(c.on_failure, FailureMode::Accept);
    assert_eq!(c.limits.max_message_bytes, 10 * 1024 * 1024);
    assert!(c.validate().is_ok());
    // An empty file is the defaults, and the defaults survive a round trip through TOML.
    assert_eq!(parse_ok(""), c);
    let text = c.to_toml_string().expect("serialises");
    assert_eq!(parse_ok(&text), c);
}

/// Every key a configuration can hold, as dotted paths, from its TOML form. Domain names
/// under `policy.domains` are data, not keys, and are skipped.
fn key_paths(value: &toml::Value, prefix: &str, out: &mut BTreeSet<(String, bool)>) {
    if let toml::Value::Table(table) = value {
        for (key, inner) in table {
            let is_table = inner.is_table();
            if prefix == "policy.domains" {
                key_paths(inner, "policy.domains.*", out);
                continue;
            }
            let path = if prefix.is_empty() {
                key.clone()
            } else {
                format!("{prefix}.{key}")
            };
            out.insert((path.clone(), is_table));
            key_paths(inner, &path, out);
        }
    }
}

#[test]
fn every_key_appears_in_the_example() {
    // A configuration with every optional part present, so no key is left out of its
    // serialised form.
    let mut full = Config::default();
    full.listen.unix = Some(UnixSocket {
        path: PathBuf::from("/run/tamis/tamis.sock"),
        mode: 0o600,
    });
    full.model = ModelSource::File(PathBuf::from("/var/lib/tamis/current.tamis"));
    full.access.secret_file = Some(PathBuf::from("/etc/tamis/relay.secret"));
    full.limits.max_connections_per_peer = Some(64);
    full.headers.subject_prefix = Some("[junk?] ".to_string());
    let on_margin = Thresholds::on_margin(0.0, 1.0)
        .map(|t| t.with_tag_only(Some(true)))
        .expect("valid");
    let on_probability = Thresholds::on_probability(0.9, 0.99)
        .map(|t| t.with_tag_only(Some(false)))
        .expect("valid");
    full.policy = Policy::new(
        on_margin,
        [
            ("example.org".to_string(), on_margin),
            ("lists.example.org".to_string(), on_probability),
        ],
        false,
    )
    .expect("valid policy");
    let text = full.to_toml_string().expect("serialises");
    assert_eq!(parse_ok(&text), full, "round trip of\n{text}");
    let value: toml::Value = toml::from_str(&text).expect("own output parses");
    let mut keys = BTreeSet::new();
    key_paths(&value, "", &mut keys);
    assert!(keys.len() > 25, "{keys:?}");

    let lines: Vec<&str> = EXAMPLE
        .lines()
        .map(|l| l.trim_start_matches("# "))
        .collect();
    let mut missing = Vec::new();
    for (path, is_table) in &keys {
        let leaf = path.rsplit('.').next().unwrap_or(path);
        let found = if *is_table {
            lines.iter().any(|l| l.starts_with('[') && l.contains(leaf))
        } else {
            lines.iter().any(|l| l.starts_with(&format!("{leaf} = ")))
        };
        if !found {
            missing.push(path.clone());
        }
    }
    assert!(
        missing.is_empty(),
        "keys missing from config/tamis.example.toml: {missing:?}"
    );
}

// --- Values and their forms ---------------------------------------------------------

#[test]
fn durations_and_sizes_take_integers_or_units() {
    let c = parse_ok(
        "[limits]\nidle_timeout = 90\nread_timeout = \"1500ms\"\ngrace_period = \"10m\"\nmax_message_bytes = 2048\nmax_field_bytes = \"1 KiB\"\nmax_frame_bytes = \"1 MiB\"\n",
    );
    assert_eq!(c.limits.idle_timeout, Duration::from_secs(90));
    assert_eq!(c.limits.read_timeout, Duration::from_millis(1500));
    assert_eq!(c.limits.grace_period, Duration::from_secs(600));
    assert_eq!(c.limits.max_message_bytes, 2048);
    assert_eq!(c.limits.max_field_bytes, 1024);
    assert_eq!(c.limits.max_frame_bytes, 1 << 20);
}

#[test]
fn listeners_can_be_turned_off_but_not_all_of_them() {
    let c = parse_ok(
        "metrics = \"off\"\n[listen]\ntcp = \"off\"\n[listen.unix]\npath = \"/run/tamis/tamis.sock\"\nmode = \"0600\"\n",
    );
    assert_eq!(c.listen.tcp, None);
    assert_eq!(c.metrics, None);
    assert_eq!(c.listen.unix.map(|u| u.mode), Some(0o600));

    let e = parse_err("[listen]\ntcp = \"off\"\n");
    assert!(e.to_string().contains("no listener"), "{e}");

    let c = parse_ok("[listen]\ntcp = \"[::1]:7357\"\n");
    assert_eq!(c.listen.tcp, Some(addr("[::1]:7357")));
}

#[test]
fn relative_paths_are_relative_to_the_config_folder() {
    let c = parse_ok(
        "[listen.unix]\npath = \"run/tamis.sock\"\n[model]\npath = \"models/current.tamis\"\n",
    );
    assert_eq!(
        c.listen.unix.map(|u| u.path),
        Some(PathBuf::from("/etc/tamis/run/tamis.sock"))
    );
    assert_eq!(
        c.model,
        ModelSource::File(PathBuf::from("/etc/tamis/models/current.tamis"))
    );
    let c = parse_ok("[model]\npath = \"/var/lib/tamis/m.tamis\"\n");
    assert_eq!(
        c.model,
        ModelSource::File(PathBuf::from("/var/lib/tamis/m.tamis"))
    );
}

#[test]
fn load_reads_a_file_and_resolves_against_its_absolute_folder() {
    let dir = tempfile::tempdir().expect("temp dir");
    let path = dir.path().join("tamis.toml");
    std::fs::write(&path, "[model]\npath = \"current.tamis\"\n").expect("write");
    let c = Config::load(&path).expect("loads");
    let ModelSource::File(model) = c.model else {
        panic!("a model path was configured");
    };
    assert!(model.is_absolute());
    assert_eq!(model, dir.path().join("current.tamis"));

    let e = Config::load(&dir.path().join("absent.toml")).expect_err("no such file");
    assert!(matches!(e, ConfigError::Read { .. }));
    assert!(e.to_string().contains("absent.toml"), "{e}");
}

#[test]
fn logging_and_failure_mode_are_typed() {
    let c = parse_ok("on_failure = \"defer\"\n[logging]\nformat = \"json\"\nlevel = \"debug\"\n");
    assert_eq!(c.on_failure, FailureMode::Defer);
    assert_eq!(c.logging.format, LogFormat::Json);
    assert_eq!(c.logging.level, LogLevel::Debug);
    assert_eq!(c.logging.level.as_str(), "debug");
}

// --- Errors ----------------------------------------------------------------------------

#[test]
fn unknown_keys_are_named_with_their_line_and_column() {
    let e = parse_err("[limits]\nmax_connections = 10\nmax_conections = 10\n");
    assert_eq!(e.line_column(), Some((3, 1)));
    let text = e.to_string();
    assert!(
        text.starts_with("/etc/tamis/tamis.toml:3:1: unknown field `max_conections`"),
        "{text}"
    );
    assert!(text.contains("help: "), "{text}");

    let e = parse_err("metric = \"127.0.0.1:9357\"\n");
    assert!(e.message().contains("`metric`"), "{e}");
    let e = parse_err(
        "[policy.domains.\"example.org\"]\ntag_margin = 0\nquarantine_margin = 1\nquarantine = 2\n",
    );
    assert!(e.message().contains("`quarantine`"), "{e}");
    assert_eq!(e.line_column(), Some((4, 1)));
}

#[test]
fn syntax_errors_have_a_place() {
    let e = parse_err("[limits]\nmax_connections = \n");
    let (line, _) = e.line_column().expect("a place");
    assert_eq!(line, 2);
}

#[test]
fn semantic_errors_are_refused_with_what_to_do() {
    // (text, words the message must contain, line of the error)
    let cases: &[(&str, &str, usize)] = &[
        ("[limits]\nmax_connections = 0\n", "at least 1", 2),
        ("[limits]\nidle_timeout = 0\n", "positive", 2),
        ("[limits]\nread_timeout = \"0s\"\n", "zero", 2),
        ("[limits]\nhandshake_timeout = \"0s\"\n", "zero", 2),
        ("[limits]\nmax_message_bytes = \"0 MiB\"\n", "zero", 2),
        ("[limits]\ngrace_period = \"11m\"\n", "10 minutes", 1),
        ("[limits]\nmax_frame_bytes = 1000\n", "4096", 1),
        ("[limits]\nmax_recipients = 70000\n", "65535", 1),
        ("[limits]\nmax_message_bytes = \"10 MB\"\n", "ambiguous", 2),
        (
            "[limits]\nidle_timeout = \"5 minutes\"\n",
            "not a duration",
            2,
        ),
        (
            "[limits]\nmax_field_bytes = \"2 MiB\"\nmax_message_bytes = \"1 MiB\"\n",
            "max_field_bytes",
            1,
        ),
        ("[listen]\ntcp = \"localhost:7357\"\n", "not an address", 2),
        (
            "[access]\ntcp_allow = [\"10.0.0.0/8\", \"10.1.2.3/16\"]\n",
            "\"10.1.0.0/16\"",
            2,
        ),
        ("[access]\ntcp_allow = [\"intranet\"]\n", "CIDR", 2),
        ("[access]\nsecret = \"inline\"\n", "unknown field", 2),
        ("[limits]\nmax_connections_per_peer = 0\n", "at least 1", 2),
        (
            "[limits]\nmax_connections = 10\nmax_connections_per_peer = 11\n",
            "max_connections_per_peer",
            1,
        ),
        (
            "[listen.unix]\npath = \"/run/x.sock\"\nmode = 432\n",
            "octal string",
            3,
        ),
        (
            "[listen.unix]\npath = \"/run/x.sock\"\nmode = \"0999\"\n",
            "permission mode",
            3,
        ),
        (
            "[listen.unix]\npath = \"/run/x.sock\"\nmode = \"4755\"\n",
            "permission mode",
            3,
        ),
        ("[listen.unix]\nmode = \"0660\"\n", "path", 1),
        (
            "[headers]\nsubject_prefix = \"[junk]\\r\\n\"\n",
            "printable ASCII",
            2,
        ),
        ("[model]\npath = \"\"\n", "empty", 2),
        ("[logging]\nlevel = \"verbose\"\n", "verbose", 2),
        (
            "[policy.default]\ntag_margin = 1.0\nquarantine_margin = 0.5\n",
            "raise quarantine_margin",
            1,
        ),
        ("[policy.default]\ntag_margin = 1.0\n", "set both", 1),
        (
            "[policy.default]\ntag_margin = 0.0\nquarantine_margin = 1.0\ntag_probability = 0.5\nquarantine_probability = 0.9\n",
            "mixes margin and probability",
            1,
        ),
        (
            "[policy.default]\ntag_probability = 0.5\nquarantine_probability = 1.5\n",
            "from 0 to 1",
            1,
        ),
        (
            "[policy.default]\ntag_margin = nan\nquarantine_margin = 1.0\n",
            "finite",
            1,
        ),
        ("[policy.default]\n", "no thresholds", 1),
        (
            "[policy.domains.\"bad_name.test\"]\ntag_margin = 0\nquarantine_margin = 1\n",
            "not valid",
            1,
        ),
        (
            "[policy.domains.\"Example.org\"]\ntag_margin = 0\nquarantine_margin = 1\n[policy.domains.\"example.org.\"]\ntag_margin = 0\nquarantine_margin = 1\n",
            "same once lower-cased",
            1,
        ),
    ];
    for (text, words, line) in cases {
        let e = parse_err(text);
        let shown = e.to_string();
        assert!(shown.contains(words), "{text:?}: {shown}");
        assert!(shown.contains("help: "), "{text:?}: {shown}");
        assert_eq!(
            e.line_column().map(|(l, _)| l),
            Some(*line),
            "{text:?}: {shown}"
        );
    }
    // A rule across sections has no single place, but still names the keys.
    let e = parse_err("metrics = \"127.0.0.1:7357\"\n");
    assert!(e.to_string().contains("listen.tcp"), "{e}");
    assert!(e.to_string().contains("help: "), "{e}");
    let e = parse_err("[access]\ntcp_allow = []\n");
    assert!(e.to_string().contains("no TCP peer could connect"), "{e}");
    // Without TCP, an empty allow-list is fine.
    parse_ok(
        "[listen]\ntcp = \"off\"\n[listen.unix]\npath = \"/run/t.sock\"\n[access]\ntcp_allow = []\n",
    );
}

#[test]
fn access_defaults_to_loopback_and_the_secret_file_is_checked_at_load() {
    use std::os::unix::fs::PermissionsExt;
    let c = Config::default();
    let ranges: Vec<String> = c.access.tcp_allow.iter().map(|r| r.to_string()).collect();
    assert_eq!(ranges, strings(&["127.0.0.0/8", "::1/128"]));
    assert_eq!(c.access.secret_file, None);
    let c =
        parse_ok("[access]\ntcp_allow = [\"192.0.2.0/24\", \"2001:db8::/32\", \"198.51.100.7\"]\n");
    assert_eq!(c.access.tcp_allow.len(), 3);

    let dir = tempfile::tempdir().expect("temp dir");
    let config = dir.path().join("tamis.toml");
    std::fs::write(&config, "[access]\nsecret_file = \"relay.secret\"\n").expect("write");
    let secret = dir.path().join("relay.secret");
    // Missing, then readable by everyone, then fine.
    let e = Config::load(&config).expect_err("no secret file");
    assert!(e.to_string().contains("access.secret_file"), "{e}");
    std::fs::write(&secret, "an-example-secret-of-32-bytes-ok\n").expect("write");
    std::fs::set_permissions(&secret, std::fs::Permissions::from_mode(0o644)).expect("chmod");
    let e = Config::load(&config).expect_err("exposed");
    assert!(e.to_string().contains("chmod 0600"), "{e}");
    std::fs::set_permissions(&secret, std::fs::Permissions::from_mode(0o600)).expect("chmod");
    let c = Config::load(&config).expect("loads");
    assert_eq!(c.access.secret_file, Some(secret.clone()));
    // The secret itself never appears in the configuration's text.
    let text = c.to_toml_string().expect("serialises");
    assert!(!text.contains("an-example-secret"), "{text}");
}

// --- Policy ------------------------------------------------------------------------------

/// `tamis tune` writes a snippet meant to be pasted into this file: it must parse as is,
/// with the tuned thresholds exactly (Rust prints an f64 in its shortest round-trip
/// form, and whole numbers without a decimal point, which TOML reads as integers).
#[test]
fn a_tune_snippet_pasted_into_the_config_parses() {
    let target = TuneTarget {
        quarantine_fpr: 0.001,
        tag_fpr: 0.01,
        confidence: 0.95,
    };
    let spread = |n: usize, low: f64, high: f64| -> Vec<f64> {
        (0..n)
            .map(|i| low + (high - low) * i as f64 / n as f64)
            .collect()
    };
    let all = tune_domain(
        None,
        &spread(1000, -0.5, 2.0),
        &spread(5000, -2.0, 0.0),
        target,
        None,
    );
    let small = tune_domain(
        Some("uni-lindqvist.test".to_string()),
        &spread(40, 0.0, 2.0),
        &spread(50, -2.0, -1.0),
        target,
        Some(&all),
    );
    let snippet = policy_snippet(&all, std::slice::from_ref(&small), target, "demo.tamis");
    let text = format!("[logging]\nlevel = \"info\"\n\n{snippet}");
    let c = parse_ok(&text);
    let d = c.policy.default_thresholds();
    assert_eq!(d.scale(), Scale::Margin);
    assert_eq!(d.tag(), all.tag.margin);
    assert_eq!(d.quarantine(), all.quarantine.margin);
    let s = c
        .policy
        .domains()
        .get("uni-lindqvist.test")
        .expect("domain section");
    assert_eq!(s.tag(), small.tag.margin);
    assert_eq!(s.quarantine(), small.quarantine.margin);
    // Pasting does not switch quarantine on by itself.
    assert!(c.policy.tag_only());

    // Whole-number thresholds come out as TOML integers.
    let c = parse_ok("[policy.default]\ntag_margin = 0\nquarantine_margin = 2\n");
    assert_eq!(c.policy.default_thresholds().quarantine(), 2.0);
}

fn two_domain_policy() -> Policy {
    parse_ok(
        "[policy]\ntag_only = false\n\
         [policy.default]\ntag_margin = 0.0\nquarantine_margin = 1.0\n\
         [policy.domains.\"example.org\"]\ntag_margin = -0.5\nquarantine_margin = 0.5\n\
         [policy.domains.\"Lists.Example.ORG.\"]\ntag_probability = 0.9\nquarantine_probability = 0.99\ntag_only = true\n",
    )
    .policy
}

#[test]
fn each_recipient_gets_the_action_of_its_own_domain() {
    let p = two_domain_policy();
    assert!(p.needs_probability());
    assert_eq!(
        p.domains().keys().cloned().collect::<Vec<_>>(),
        strings(&["example.org", "lists.example.org"])
    );
    let rcpts = strings(&[
        "alice@example.org",
        "bob@EXAMPLE.ORG.",
        "list@lists.example.org",
        "carol@sub.example.org",
        "dave@elsewhere.test",
        "postmaster",
    ]);
    let got = p.decide(&rcpts, 0.7, Some(0.999));
    let want = vec![
        ("alice@example.org".to_string(), Action::Quarantine),
        ("bob@EXAMPLE.ORG.".to_string(), Action::Quarantine),
        // 0.999 ≥ 0.99, but this section is tag-only.
        ("list@lists.example.org".to_string(), Action::Tag),
        // Subdomains are not their parent: the default applies.
        ("carol@sub.example.org".to_string(), Action::Tag),
        ("dave@elsewhere.test".to_string(), Action::Tag),
        ("postmaster".to_string(), Action::Tag),
    ];
    assert_eq!(got, want);

    let got = p.decide(&rcpts[..1], -0.6, None);
    assert_eq!(got[0].1, Action::Accept);
    // A probability section without a probability defers rather than guess.
    let got = p.decide(&rcpts[2..3], 5.0, None);
    assert_eq!(got[0].1, Action::Defer);
}

#[test]
fn header_edits_follow_the_protocol() {
    // proto/PROTOCOL.md §4: "X-Tamis-Verdict: <action>; id=<verdict_id>; margin=<margin, 4
    // decimals>" on tagged mail; op 2 puts the value in front of Subject.
    let p = Policy::default();
    let cfg = HeaderConfig {
        verdict_field: true,
        subject_prefix: Some("[junk?] ".to_string()),
    };
    let edits = p.header_edits(&cfg, "01HZX3KQ9V0000AB", Action::Tag, 0.123_456);
    assert_eq!(
        edits,
        vec![
            HeaderEdit::Add {
                name: "X-Tamis-Verdict".to_string(),
                value: "tag; id=01HZX3KQ9V0000AB; margin=0.1235".to_string(),
            },
            HeaderEdit::PrefixSubject {
                value: "[junk?] ".to_string(),
            },
        ]
    );
    assert_eq!(
        edits.iter().map(|e| (e.op(), e.name())).collect::<Vec<_>>(),
        vec![(1, "X-Tamis-Verdict"), (2, "Subject")]
    );
    for action in [Action::Accept, Action::Quarantine, Action::Defer] {
        assert!(
            p.header_edits(&cfg, "x", action, 2.0).is_empty(),
            "{action}"
        );
    }
    let quiet = HeaderConfig {
        verdict_field: false,
        subject_prefix: None,
    };
    assert!(p.header_edits(&quiet, "x", Action::Tag, 2.0).is_empty());
    let negative = p.header_edits(&HeaderConfig::default(), "x", Action::Tag, -1.5);
    assert_eq!(negative[0].value(), "tag; id=x; margin=-1.5000");
}

#[test]
fn unscanned_mail_is_accepted_with_a_field_or_deferred() {
    let p = Policy::default();
    let rcpts = strings(&["a@example.org", "b@example.test"]);
    assert!(
        p.unscanned(&rcpts, FailureMode::Accept)
            .iter()
            .all(|(_, a)| *a == Action::Accept)
    );
    assert!(
        p.unscanned(&rcpts, FailureMode::Defer)
            .iter()
            .all(|(_, a)| *a == Action::Defer)
    );
    let edits = p.unscanned_edits(FailureMode::Accept, UnscannedReason::ScanTimeout);
    assert_eq!(
        edits,
        vec![HeaderEdit::Add {
            name: "X-Tamis-Unscanned".to_string(),
            value: "scan-timeout".to_string(),
        }]
    );
    assert!(
        p.unscanned_edits(FailureMode::Defer, UnscannedReason::ScanFailed)
            .is_empty()
    );
}

#[test]
fn verdict_ids_are_short_unique_and_sorted() {
    let ids: Vec<String> = (0..1000).map(|_| tamis::policy::verdict_id()).collect();
    assert!(ids.iter().all(|id| id.len() == 16));
    let mut sorted = ids.clone();
    sorted.sort();
    sorted.dedup();
    assert_eq!(sorted, ids);
}

// --- Metrics -------------------------------------------------------------------------------

const FAMILIES: [&str; 10] = [
    "tamis_messages_total",
    "tamis_margin",
    "tamis_scan_duration_seconds",
    "tamis_scanned_bytes_total",
    "tamis_connections_open",
    "tamis_protocol_errors_total",
    "tamis_reloads_total",
    "tamis_model_info",
    "tamis_unscanned_total",
    "tamis_accept_errors_total",
];

/// Metrics after a few of every event, and one connection still open.
fn busy_metrics() -> (Metrics, ConnectionGuard) {
    let policy = two_domain_policy();
    let m = Metrics::new(policy.domains().keys()).expect("metrics");
    let rcpts = strings(&[
        "a@example.org",
        "b@Lists.Example.org",
        "c@random-1.test",
        "d@random-2.test",
    ]);
    let decisions = policy.decide(&rcpts, 0.7, Some(0.95));
    m.record_decisions(&decisions, 0.7, 0.000_4, 12_345);
    m.record_verdict("EXAMPLE.ORG", Action::Accept, -1.25, 0.002, 800);
    m.record_verdict("unknown.test", Action::Tag, f64::NAN, 0.001, 100);
    let open = m.connection_opened();
    m.protocol_error("MALFORMED");
    m.protocol_error("something new");
    m.reload(ReloadOutcome::Success);
    m.reload(ReloadOutcome::Failure);
    m.set_model_info("1", "2024-05-01T00:00:00Z", "v1 bits=20 ngrams=2");
    m.unscanned(UnscannedReason::ModelUnavailable);
    (m, open)
}

#[test]
fn render_contains_every_family() {
    let (m, _open) = busy_metrics();
    let text = m.render();
    for family in FAMILIES {
        assert!(
            text.contains(&format!("# TYPE {family} ")),
            "{family} missing:\n{text}"
        );
    }
    assert!(
        text.contains("tamis_messages_total{action=\"quarantine\",domain=\"example.org\"} 1"),
        "{text}"
    );
    assert!(
        text.contains("tamis_messages_total{action=\"accept\",domain=\"example.org\"} 1"),
        "{text}"
    );
    assert!(text.contains("tamis_scanned_bytes_total 13245"), "{text}");
    assert!(text.contains("tamis_connections_open 1"), "{text}");
    assert!(
        text.contains("tamis_protocol_errors_total{kind=\"malformed\"} 1"),
        "{text}"
    );
    assert!(
        text.contains("tamis_reloads_total{outcome=\"failure\"} 1"),
        "{text}"
    );
    assert!(
        text.contains("tamis_unscanned_total{reason=\"model-unavailable\"} 1"),
        "{text}"
    );
    assert!(text.contains("tamis_model_info{feature_spec=\"v1 bits=20 ngrams=2\",trained_at=\"2024-05-01T00:00:00Z\",version=\"1\"} 1"), "{text}");
    assert!(
        text.contains("tamis_margin_bucket{domain=\"example.org\",le=\"-3\"}"),
        "{text}"
    );
    assert!(
        text.contains("tamis_margin_bucket{domain=\"example.org\",le=\"3\"}"),
        "{text}"
    );
}

#[test]
fn domain_labels_are_bounded_to_the_policy() {
    let (m, _open) = busy_metrics();
    for i in 0..200 {
        m.record_verdict(
            &format!("sender-made-{i}.test"),
            Action::Tag,
            0.5,
            0.001,
            10,
        );
    }
    let text = m.render();
    let mut domains = BTreeSet::new();
    for line in text.lines().filter(|l| !l.starts_with('#')) {
        if let Some(rest) = line.split("domain=\"").nth(1) {
            domains.insert(rest.split('"').next().unwrap_or("").to_string());
        }
    }
    assert_eq!(
        domains,
        ["example.org", "lists.example.org", "other"]
            .iter()
            .map(|s| s.to_string())
            .collect()
    );
    // 200 here, one from `unknown.test`, and one for the message whose two unconfigured
    // recipient domains both count as `other` (once per message, not per recipient).
    assert!(
        text.contains("tamis_messages_total{action=\"tag\",domain=\"other\"} 202"),
        "{text}"
    );
    let kinds: BTreeSet<&str> = text
        .lines()
        .filter(|l| l.starts_with("tamis_protocol_errors_total"))
        .filter_map(|l| l.split("kind=\"").nth(1))
        .filter_map(|r| r.split('"').next())
        .collect();
    assert!(
        kinds.contains("other") && kinds.len() == tamis::metrics::PROTOCOL_ERROR_KINDS.len() + 1,
        "{kinds:?}"
    );
    for code in tamis::proto::FaultCode::ALL {
        assert!(
            kinds.contains(code.name().to_lowercase().as_str()),
            "{code}"
        );
    }

    // A reload that adds a domain gives it its own label from then on.
    m.set_domains(["example.org", "new.example.org"]);
    m.record_verdict("new.example.org", Action::Accept, 0.0, 0.001, 1);
    assert!(m.render().contains("domain=\"new.example.org\""));
    assert_eq!(m.domain_label("sender-made-1.test"), "other");
}

/// Checks the exposition text with Prometheus's own linter, `promtool check metrics`
/// (Debian package `prometheus`). Without promtool the test reports that it did not run,
/// unless TAMIS_REQUIRE_PROMTOOL=1 makes that a failure.
#[test]
fn promtool_accepts_the_exposition() {
    let required = std::env::var("TAMIS_REQUIRE_PROMTOOL").is_ok_and(|v| v == "1");
    let (m, _open) = busy_metrics();
    let text = m.render();
    let child = Command::new("promtool")
        .args(["check", "metrics"])
        .stdin(Stdio::piped())
        .stdout(Stdio::piped())
        .stderr(Stdio::piped())
        .spawn();
    let mut child = match child {
        Ok(c) => c,
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => {
            assert!(
                !required,
                "TAMIS_REQUIRE_PROMTOOL=1 but promtool is not on PATH; install it (Debian: apt-get install prometheus) or unset the variable"
            );
            eprintln!("promtool not found on PATH: `promtool check metrics` did NOT run");
            return;
        }
        Err(e) => panic!("cannot start promtool: {e}"),
    };
    if let Some(mut stdin) = child.stdin.take() {
        use std::io::Write;
        stdin.write_all(text.as_bytes()).expect("write to promtool");
    }
    let out = child.wait_with_output().expect("promtool finishes");
    let report = format!(
        "{}{}",
        String::from_utf8_lossy(&out.stdout),
        String::from_utf8_lossy(&out.stderr)
    );
    assert!(
        out.status.success() && report.trim().is_empty(),
        "promtool check metrics: {}\n{report}\n--- text ---\n{text}",
        out.status
    );
}

#[test]
fn example_path_is_where_the_docs_say() {
    assert!(
        Path::new(env!("CARGO_MANIFEST_DIR"))
            .join("config/tamis.example.toml")
            .is_file()
    );
}
