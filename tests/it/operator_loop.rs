//! The operator's loop end to end, as the acceptance of the store: demo-corpus mail
//! streamed through a real daemon over the relay protocol, quarantine on for one domain
//! and tag-only for another; then a scripted set of reports (`tamis report`) and releases
//! (`tamis held release`); then the per-domain figures of `tamis figures --format json`,
//! of its text output and of the status page's HTML equal the counts this script keeps
//! itself, to the message.
//!
//! The script's counts follow the definitions of `src/store/figures.rs` (through
//! `operator::hand_count`): the action each recipient got on the wire, the action the
//! policy would have taken with tag-only off (decided here from the verdict's margin and
//! the configured thresholds), and each report in the order it was made.

use std::collections::HashMap;
use std::io::{Read, Write};
use std::net::{SocketAddr, TcpStream};
use std::path::Path;
use std::sync::Arc;
use std::time::Duration;

use pretty_assertions::assert_eq;
use serde_json::Value;
use tamis::config::Config;
use tamis::metrics::Metrics;
use tamis::policy::Action;
use tamis::proto::client::Client;
use tamis::server::engine::{Decisions, Engine, SharedEngine};
use tamis::server::keeping::{Keeping, KeepingSettings};
use tamis::server::listen::start_with;
use tamis::store::{ReportKind, ReportSource, SqliteStore, Store, StoreOptions};

use crate::daemon::model;
use crate::operator::{Fixture, Known, hand_count, json, outcome, tamis};

/// Quarantine on (tag from margin 0, hold from 0.5).
const HOLD: &str = "hold.test";
/// Tag-only, same thresholds: what it would hold is tagged and journalled as such.
const WATCH: &str = "watch.test";
const TAG_AT: f64 = 0.0;
const HOLD_AT: f64 = 0.5;

/// One message as the script knows it.
struct Sent {
    id: String,
    domain: &'static str,
    action: Action,
    enforced: Action,
    reports: Vec<(ReportKind, ReportSource)>,
}

fn wire(a: tamis::proto::Action) -> Action {
    match a {
        tamis::proto::Action::Accept => Action::Accept,
        tamis::proto::Action::Tag => Action::Tag,
        tamis::proto::Action::Quarantine => Action::Quarantine,
        tamis::proto::Action::Defer => Action::Defer,
    }
}

/// What the policy decides from the margin, tag-only off.
fn by_margin(margin: f64) -> Action {
    if margin >= HOLD_AT {
        Action::Quarantine
    } else if margin >= TAG_AT {
        Action::Tag
    } else {
        Action::Accept
    }
}

fn get(addr: SocketAddr, path: &str) -> String {
    let mut s = TcpStream::connect(addr).expect("connect");
    s.set_read_timeout(Some(Duration::from_secs(30)))
        .expect("timeout");
    s.write_all(
        format!("GET {path} HTTP/1.1\r\nHost: {addr}\r\nConnection: close\r\n\r\n").as_bytes(),
    )
    .expect("write");
    let mut out = Vec::new();
    let _ = s.read_to_end(&mut out);
    let text = String::from_utf8_lossy(&out).into_owned();
    assert!(text.starts_with("HTTP/1.1 200"), "{path}: {text:.300}");
    text.split_once("\r\n\r\n")
        .map(|(_, b)| b.to_string())
        .unwrap_or_default()
}

// The page's figures and rows are read as the status-page tests read them.
use crate::status_page::{figure, row};

fn report(fx: &Fixture, kind: &str, by: &str, domain: &str, id: &str) -> Value {
    let cfg = fx.config_arg();
    let out = tamis(&[
        "report", kind, "--by", by, "--domain", domain, "--id", id, "--config", &cfg, "--format",
        "json",
    ]);
    json(&out)
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn demo_mail_through_the_daemon_then_reports_and_releases_give_the_scripts_figures() {
    let fx = Fixture::new("");
    std::fs::write(
        &fx.config,
        format!(
            "metrics = \"127.0.0.1:0\"\n[listen]\ntcp = \"127.0.0.1:0\"\n[store]\npath = \"store.sqlite\"\n\
             [policy]\ntag_only = true\n\
             [policy.domains.\"{HOLD}\"]\ntag_margin = {TAG_AT}\nquarantine_margin = {HOLD_AT}\ntag_only = false\n\
             [policy.domains.\"{WATCH}\"]\ntag_margin = {TAG_AT}\nquarantine_margin = {HOLD_AT}\n"
        ),
    )
    .expect("write the configuration");
    let config = Config::load(&fx.config).expect("the configuration loads");
    let decisions = Decisions {
        policy: config.policy.clone(),
        headers: config.headers.clone(),
        on_failure: config.on_failure,
    };
    let engine = Engine::new(model().clone(), "test model", decisions).expect("engine");
    let metrics = Arc::new(Metrics::new(config.policy.domains().keys()).expect("metrics"));
    let store = SqliteStore::open(&fx.store_path, StoreOptions::default()).expect("store");
    let keeping = Keeping::start(
        Arc::new(store),
        Arc::clone(&metrics),
        KeepingSettings::default(),
        false,
    )
    .expect("keeping");
    let running = start_with(&config, SharedEngine::new(engine), metrics, Some(keeping))
        .await
        .expect("binds on loopback");
    let relay = running.tcp.expect("relay listener");

    // 1. The demo corpus through the relay protocol, one recipient each, the domains in
    // turn, on one connection as a relay would.
    let corpus: Vec<_> = tamis::demo::generate(8, 240).collect();
    let mut sent = tokio::task::spawn_blocking(move || {
        let mut client =
            Client::connect(&relay.to_string(), Duration::from_secs(30)).expect("connect");
        let mut sent = Vec::new();
        for (i, m) in corpus.iter().enumerate() {
            let domain = if i % 2 == 0 { HOLD } else { WATCH };
            let rcpt = vec![format!("desk{i}@{domain}")];
            let v = client
                .scan("news@sender.example", &rcpt, &m.bytes)
                .expect("verdict");
            let action = wire(v.recipients[0].action);
            let enforced = by_margin(v.margin);
            // The daemon did what the policy says: quarantine on for HOLD, and for WATCH
            // at most a tag.
            let expected = match (domain, enforced) {
                (WATCH, Action::Quarantine) => Action::Tag,
                (_, a) => a,
            };
            assert_eq!(action, expected, "message {i}, margin {}", v.margin);
            sent.push(Sent {
                id: v.verdict_id,
                domain,
                action,
                enforced,
                reports: Vec::new(),
            });
        }
        client.bye().expect("bye");
        sent
    })
    .await
    .expect("relay");
    // Stopping writes every queued journal entry.
    assert!(running.stop().await);

    let pick = |sent: &[Sent], domain: &str, want: &dyn Fn(&Sent) -> bool, n: usize| {
        let picked: Vec<usize> = (0..sent.len())
            .filter(|&i| sent[i].domain == domain && want(&sent[i]))
            .take(n)
            .collect();
        assert_eq!(
            picked.len(),
            n,
            "the corpus has {n} such messages in {domain}"
        );
        picked
    };
    let held = pick(&sent, HOLD, &|s| s.action == Action::Quarantine, 6);
    // Accepted mail a user says is junk (the demo model misses little, so whatever its
    // label: the figures count what people say).
    let hold_missed = pick(&sent, HOLD, &|s| s.action == Action::Accept, 3);
    let watch_would = pick(&sent, WATCH, &|s| s.enforced == Action::Quarantine, 3);
    let watch_tagged = pick(&sent, WATCH, &|s| s.action == Action::Tag, 2);

    // 2. The scripted reports and releases.
    let released_dir = fx.dir.path().join("released");
    std::fs::create_dir(&released_dir).expect("folder");
    let cfg = fx.config_arg();
    let ids: Vec<String> = held[..2].iter().map(|&i| sent[i].id.clone()).collect();
    let mut args = vec!["held", "release", "--config", &cfg, "--format", "json"];
    let into = released_dir.display().to_string();
    args.extend(["--into", &into]);
    args.extend(ids.iter().map(String::as_str));
    let out = tamis(&args);
    assert_eq!(json(&out)["released"], 2, "{:?}", outcome(&out));
    for &i in &held[..2] {
        sent[i]
            .reports
            .push((ReportKind::NotJunk, ReportSource::Release));
    }
    // Releasing one again does nothing and counts nothing.
    let again = tamis(&[
        "held", "release", "--config", &cfg, "--into", &into, &ids[0],
    ]);
    assert_eq!(outcome(&again).0, 3, "{:?}", outcome(&again));

    let mut scripted: Vec<(usize, &str, &str, ReportKind, ReportSource)> = vec![
        (
            held[2],
            "junk",
            "operator",
            ReportKind::Junk,
            ReportSource::Operator,
        ),
        (
            held[3],
            "legitimate",
            "operator",
            ReportKind::NotJunk,
            ReportSource::Operator,
        ),
        (
            held[4],
            "legitimate",
            "audit",
            ReportKind::NotJunk,
            ReportSource::Audit,
        ),
        (
            held[4],
            "junk",
            "audit",
            ReportKind::Junk,
            ReportSource::Audit,
        ),
    ];
    for &i in &hold_missed {
        scripted.push((i, "junk", "user", ReportKind::Junk, ReportSource::User));
    }
    for &i in &watch_would {
        scripted.push((i, "junk", "user", ReportKind::Junk, ReportSource::User));
    }
    for &i in &watch_tagged {
        scripted.push((
            i,
            "legitimate",
            "user",
            ReportKind::NotJunk,
            ReportSource::User,
        ));
    }
    for (i, kind, by, k, source) in scripted {
        let r = report(&fx, kind, by, sent[i].domain, &sent[i].id);
        assert_eq!(r["counted"], 1, "{r}");
        sent[i].reports.push((k, source));
    }
    // Not evidence: an unknown id, and a HOLD verdict reported for WATCH (forged).
    let unknown = report(&fx, "junk", "user", WATCH, "01NOSUCHVERDICT0");
    assert_eq!(unknown["counted"], 0, "{unknown}");
    let forged = report(&fx, "legitimate", "user", WATCH, &sent[held[5]].id);
    assert_eq!(forged["counted"], 0, "{forged}");

    // 3. The script's own counts.
    let known: Vec<Known> = sent
        .iter()
        .map(|s| Known {
            domain: s.domain,
            in_window: true,
            action: s.action,
            enforced: s.enforced,
            reports: s.reports.clone(),
        })
        .collect();
    let expect: HashMap<&str, crate::operator::Hand> = [
        (HOLD, hand_count(&known, HOLD, 0)),
        (WATCH, hand_count(&known, WATCH, 2)),
    ]
    .into_iter()
    .collect();
    // The script's counts, said plainly: what was held, released, reported.
    let h = &expect[HOLD];
    assert_eq!(h.releases, 2);
    assert_eq!(
        h.false_positives, 3,
        "two released, one reported legitimate"
    );
    assert_eq!(
        h.by_action[2],
        sent.iter()
            .filter(|s| s.domain == HOLD && s.action == Action::Quarantine)
            .count() as u64
    );
    let w = &expect[WATCH];
    assert_eq!(w.by_action[2], 0, "tag-only holds nothing");
    assert!(w.would_quarantine >= 3, "{w:?}");

    // (a) `tamis figures --format json`.
    let out = tamis(&[
        "figures", "--config", &cfg, "--since", "7d", "--format", "json",
    ]);
    assert_eq!(out.status.code(), Some(0), "{:?}", outcome(&out));
    let figures = json(&out);
    let domains = figures["domains"].as_array().cloned().unwrap_or_default();
    let mut too_thin = HashMap::new();
    for d in [HOLD, WATCH] {
        let got = domains
            .iter()
            .find(|x| x["domain"] == d)
            .map(crate::operator::from_json)
            .unwrap_or_default();
        assert_eq!(got, expect[d], "{d}: figures JSON");
        let rate = domains
            .iter()
            .find(|x| x["domain"] == d)
            .and_then(|x| x["false_positives"]["value"].as_f64());
        let want = expect[d].false_positives as f64 / expect[d].legitimate as f64;
        assert_eq!(rate, Some(want), "{d}: the rate");
        let thin = domains
            .iter()
            .find(|x| x["domain"] == d)
            .and_then(|x| x["too_thin"].as_bool());
        too_thin.insert(d, thin.unwrap_or_else(|| panic!("{d}: no too_thin")));
    }

    // (b) The text output: the same counts, line by line.
    let (code, text, _) = outcome(&tamis(&["figures", "--config", &cfg, "--since", "7d"]));
    assert_eq!(code, 0);
    for d in [HOLD, WATCH] {
        let e = &expect[d];
        let part = text
            .split("\n\n")
            .find(|p| p.starts_with(d))
            .unwrap_or_else(|| panic!("no {d} in:\n{text}"));
        for line in [
            format!(
                "messages        {}: accept {}, tag {}, quarantine {}, defer {}",
                e.by_action.iter().sum::<u64>(),
                e.by_action[0],
                e.by_action[1],
                e.by_action[2],
                e.by_action[3]
            ),
            format!(
                "reports         junk {}, legitimate {}; releases {}; unmatched {} (not counted)",
                e.reports_junk, e.reports_legitimate, e.releases, e.unmatched
            ),
            format!(
                "false positives {} of {} legitimate = ",
                e.false_positives, e.legitimate
            ),
        ] {
            assert!(part.contains(&line), "{d}: no {line:?} in\n{part}");
        }
        let would = format!(
            "tag-only        {} tagged message(s) would have been held",
            e.would_quarantine
        );
        assert_eq!(part.contains(&would), e.would_quarantine > 0, "{part}");
    }

    // (c) The status page's HTML, from a daemon on the same store.
    let store = SqliteStore::open(&fx.store_path, StoreOptions::default()).expect("store");
    let metrics = Arc::new(Metrics::new(config.policy.domains().keys()).expect("metrics"));
    let decisions = Decisions {
        policy: config.policy.clone(),
        headers: config.headers.clone(),
        on_failure: config.on_failure,
    };
    let engine = Engine::new(model().clone(), "test model", decisions).expect("engine");
    let keeping = Keeping::start(
        Arc::new(store) as Arc<dyn Store>,
        Arc::clone(&metrics),
        KeepingSettings::default(),
        false,
    )
    .expect("keeping");
    let running = start_with(&config, SharedEngine::new(engine), metrics, Some(keeping))
        .await
        .expect("binds on loopback");
    let status_now = running.status.expect("status listener");
    let overview = tokio::task::spawn_blocking(move || get(status_now, "/?w=7d"))
        .await
        .expect("overview");
    for d in [HOLD, WATCH] {
        let e = &expect[d];
        let line = row(&overview, d);
        let read: Vec<(&str, String)> = [
            "messages",
            "accept",
            "tag",
            "held",
            "would-hold",
            "reports-junk",
            "reports-legitimate",
            "releases",
            "fp",
        ]
        .iter()
        .map(|k| (*k, figure(line, k)))
        .collect();
        let want: Vec<(&str, String)> = vec![
            ("messages", e.by_action.iter().sum::<u64>().to_string()),
            ("accept", e.by_action[0].to_string()),
            ("tag", e.by_action[1].to_string()),
            ("held", e.by_action[2].to_string()),
            ("would-hold", e.would_quarantine.to_string()),
            ("reports-junk", e.reports_junk.to_string()),
            ("reports-legitimate", e.reports_legitimate.to_string()),
            ("releases", e.releases.to_string()),
            (
                "fp",
                // The page marks a rate drawn from too little evidence, as the command does.
                format!(
                    "{}{}",
                    tamis::status::html::percent(e.false_positives as f64 / e.legitimate as f64),
                    if too_thin[d] { " thin" } else { "" }
                ),
            ),
        ];
        assert_eq!(read, want, "{d}: the overview row");
        let path = format!("/domain?d={d}&w=7d");
        let view = tokio::task::spawn_blocking(move || get(status_now, &path))
            .await
            .expect("domain view");
        let said = format!("{} of {} legitimate", e.false_positives, e.legitimate);
        assert!(view.contains(&said), "{d}: no {said:?} on its page");
        assert_eq!(figure(&view, "held"), e.by_action[2].to_string());
        assert_eq!(figure(&view, "releases"), e.releases.to_string());
    }
    assert!(running.stop().await);
    check_released(&fx, &released_dir, &sent, &held[..2]);
}

/// The released files are the held messages, one per release.
fn check_released(fx: &Fixture, dir: &Path, sent: &[Sent], released: &[usize]) {
    let mut names: Vec<String> = std::fs::read_dir(dir)
        .expect("read the folder")
        .filter_map(|e| e.ok())
        .map(|e| e.file_name().to_string_lossy().into_owned())
        .collect();
    names.sort();
    let mut want: Vec<String> = released
        .iter()
        .map(|&i| format!("{}.eml", sent[i].id))
        .collect();
    want.sort();
    assert_eq!(names, want);
    let store = crate::operator::open(&fx.store_path);
    for &i in released {
        let held = store
            .get_held(&sent[i].id)
            .expect("read")
            .expect("kept until it expires");
        let file = std::fs::read(dir.join(format!("{}.eml", sent[i].id))).expect("read");
        assert_eq!(file, held.message, "the bytes released are the bytes held");
    }
}
