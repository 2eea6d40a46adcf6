//! The operator commands on stores built through the Store API: `tamis held` (list, show,
//! delete, purge), `tamis report` (by the `X-Tamis-Verdict` id, by Message-ID, unknown and
//! forged ids), `tamis audit` and `tamis figures` (equal to counts made by hand from the
//! definitions in `src/store/figures.rs`). Release over SMTP is in `smtp_client.rs`.

use std::collections::HashMap;
use std::path::{Path, PathBuf};
use std::process::{Command, Output, Stdio};
use std::time::Duration;

use pretty_assertions::assert_eq;
use serde_json::Value;
use tamis::policy::Action;
use tamis::rng::SplitMix64;
use tamis::store::record::now;
use tamis::store::{
    Claim, DomainOutcome, Hold, JournalEntry, MessageKey, NewReport, ReleaseOutcome, ReportKind,
    ReportSource, ReportStatus, SqliteStore, Store, StoreOptions,
};

use crate::python;

/// Runs the `tamis` binary.
pub fn tamis(args: &[&str]) -> Output {
    Command::new(env!("CARGO_BIN_EXE_tamis"))
        .args(args)
        .stdin(Stdio::null())
        .output()
        .expect("run tamis")
}

/// The exit code, stdout and stderr of a run.
pub fn outcome(out: &Output) -> (i32, String, String) {
    (
        out.status.code().unwrap_or(-1),
        String::from_utf8_lossy(&out.stdout).into_owned(),
        String::from_utf8_lossy(&out.stderr).into_owned(),
    )
}

/// Parses a command's JSON output, failing the test with the output when it does not.
pub fn json(out: &Output) -> Value {
    serde_json::from_slice(&out.stdout).unwrap_or_else(|e| {
        panic!(
            "not JSON ({e}):\n{}\nstderr: {}",
            String::from_utf8_lossy(&out.stdout),
            String::from_utf8_lossy(&out.stderr)
        )
    })
}

/// A temporary folder with a configuration naming a store beside it.
pub struct Fixture {
    pub dir: tempfile::TempDir,
    pub config: PathBuf,
    pub store_path: PathBuf,
}

impl Fixture {
    /// A configuration with `[store] path = "store.sqlite"` and `extra` appended; the
    /// store is created.
    pub fn new(extra: &str) -> Fixture {
        let dir = tempfile::tempdir().expect("temp dir");
        let config = dir.path().join("tamis.toml");
        std::fs::write(
            &config,
            format!("[store]\npath = \"store.sqlite\"\n{extra}"),
        )
        .expect("write config");
        let store_path = dir.path().join("store.sqlite");
        drop(open(&store_path));
        Fixture {
            dir,
            config,
            store_path,
        }
    }

    pub fn store(&self) -> SqliteStore {
        open(&self.store_path)
    }

    pub fn config_arg(&self) -> String {
        self.config.display().to_string()
    }
}

pub fn open(path: &Path) -> SqliteStore {
    SqliteStore::open(
        path,
        StoreOptions {
            busy_timeout: Duration::from_secs(10),
            ..StoreOptions::default()
        },
    )
    .expect("open the store")
}

/// A journal entry with one outcome per `(domain, action, enforced)`.
pub fn entry(id: &str, at: i64, margin: f64, outcomes: &[(&str, Action, Action)]) -> JournalEntry {
    JournalEntry {
        verdict_id: id.to_string(),
        at,
        model: "test model".to_string(),
        margin: Some(margin),
        probability: None,
        outcomes: outcomes
            .iter()
            .map(|&(domain, action, enforced)| DomainOutcome {
                domain: domain.to_string(),
                recipients: 1,
                action,
                enforced,
            })
            .collect(),
        size: 0,
        sender_domain: Some("sender.test".to_string()),
        reasons: vec![
            "body:\"claim your\"".to_string(),
            "url:prize.test".to_string(),
        ],
        scanned: true,
        subject: None,
        message_key: None,
    }
}

/// A small message whose bytes differ by `id`.
pub fn message(id: &str) -> Vec<u8> {
    format!(
        "From: Prize Desk <desk@prize.test>\r\nTo: someone@example.org\r\nSubject: You won {id}\r\nMessage-ID: <{id}@prize.test>\r\n\r\nClaim your prize now, {id}.\r\n"
    )
    .into_bytes()
}

/// Holds `bytes` for `recipient` under `id`.
pub fn hold(store: &SqliteStore, id: &str, at: i64, margin: f64, recipient: &str, bytes: &[u8]) {
    let domain = recipient.rsplit('@').next().unwrap_or("");
    let mut e = entry(
        id,
        at,
        margin,
        &[(domain, Action::Quarantine, Action::Quarantine)],
    );
    e.size = bytes.len() as u64;
    e.message_key = MessageKey::of(&format!("<{id}@prize.test>"));
    store
        .hold(
            &e,
            &Hold {
                sender: "desk@prize.test",
                recipients: &[recipient.to_string()],
                message: bytes,
            },
        )
        .expect("hold");
}

// --- held list / show / delete / purge -----------------------------------------------

#[test]
fn held_list_is_newest_first_filtered_and_parses_as_json() {
    let fx = Fixture::new("");
    let store = fx.store();
    let t = now();
    hold(
        &store,
        "HOLDA",
        t - 300,
        1.5,
        "ann@example.org",
        &message("HOLDA"),
    );
    hold(
        &store,
        "HOLDB",
        t - 200,
        3.0,
        "bob@example.org",
        &message("HOLDB"),
    );
    hold(
        &store,
        "HOLDC",
        t - 100,
        2.0,
        "cy@other.test",
        &message("HOLDC"),
    );
    hold(
        &store,
        "HOLDOLD",
        t - 10 * 86_400,
        2.0,
        "dee@example.org",
        &message("HOLDOLD"),
    );
    let cfg = fx.config_arg();

    let out = tamis(&["held", "list", "--config", &cfg, "--format", "json"]);
    let ids: Vec<String> = json(&out)["held"]
        .as_array()
        .map(|a| {
            a.iter()
                .map(|h| h["verdict_id"].as_str().unwrap_or("").to_string())
                .collect()
        })
        .unwrap_or_default();
    assert_eq!(ids, ["HOLDC", "HOLDB", "HOLDA", "HOLDOLD"]);

    let out = tamis(&[
        "held",
        "list",
        "--config",
        &cfg,
        "--format",
        "json",
        "--domain",
        "Example.ORG",
        "--since",
        "7d",
        "--min-margin",
        "2",
    ]);
    let held = json(&out);
    assert_eq!(held["held"].as_array().map(Vec::len), Some(1));
    assert_eq!(held["held"][0]["verdict_id"], "HOLDB");
    assert_eq!(held["held"][0]["recipients"][0], "bob@example.org");
    assert_eq!(held["held"][0]["reasons"][0], "body:\"claim your\"");
    assert_eq!(held["held"][0]["domains"][0]["action"], "quarantine");

    // Text shows the reasons on the line after each message.
    let (code, text, _) = outcome(&tamis(&[
        "held",
        "list",
        "--store",
        &fx.store_path.display().to_string(),
    ]));
    assert_eq!(code, 0);
    assert!(
        text.contains("reasons: body:\"claim your\", url:prize.test"),
        "{text}"
    );
    assert!(text.contains("4 held messages, newest first"), "{text}");
}

#[test]
fn held_show_escapes_what_the_sender_wrote() {
    let fx = Fixture::new("");
    let store = fx.store();
    // A header a sender controls: terminal escapes, a bare CR that would overwrite the
    // line, a right-to-left override, and 8-bit bytes.
    let hostile = b"From: x@prize.test\r\nSubject: hello\x1b[2J\x1b]0;owned\x07 there\rX-Fake: 1\r\nX-Odd: caf\xc3\xa9 \xff \xe2\x80\xae reversed\r\n\r\nBody with \x1b[31mred\x1b[0m text.\r\n";
    hold(&store, "SHOW1", now(), 2.5, "ann@example.org", hostile);
    let cfg = fx.config_arg();
    let out = tamis(&["held", "show", "--config", &cfg, "SHOW1"]);
    let (code, text, err) = outcome(&out);
    assert_eq!(code, 0, "{err}");
    assert!(
        !out.stdout.contains(&0x1b),
        "raw ESC reached the terminal:\n{text}"
    );
    assert!(!out.stdout.contains(&b'\r'), "raw CR reached the terminal");
    assert!(!text.contains('\u{202e}'));
    assert!(text.contains("Subject: hello\\u{1b}[2J"), "{text}");
    assert!(text.contains("\\r"), "{text}");
    assert!(
        text.contains("caf\u{e9} \\xff \\u{202e} reversed"),
        "{text}"
    );
    // What the filter saw: the extracted body and its words.
    assert!(text.contains("--- what the filter saw"), "{text}");
    assert!(text.contains("body words"), "{text}");
    assert!(text.contains("reason      body:\"claim your\""), "{text}");

    let out = tamis(&[
        "held", "show", "--config", &cfg, "--format", "json", "SHOW1",
    ]);
    let shown = json(&out);
    assert_eq!(shown["verdict_id"], "SHOW1");
    assert_eq!(shown["header"][0], "From: x@prize.test");
    assert!(
        shown["seen"]["body_tokens"]
            .as_array()
            .is_some_and(|t| !t.is_empty())
    );

    // --raw to a pipe: the exact bytes.
    let out = tamis(&["held", "show", "--config", &cfg, "--raw", "SHOW1"]);
    assert_eq!(out.status.code(), Some(0));
    assert!(out.stdout == hostile.to_vec(), "--raw changed the bytes");

    // An unknown id is bad input.
    let (code, _, err) = outcome(&tamis(&["held", "show", "--config", &cfg, "NOSUCH"]));
    assert_eq!(code, 2);
    assert!(err.contains("no held message has the verdict id"), "{err}");
}

#[test]
fn delete_and_purge_remove_held_mail() {
    let fx = Fixture::new("");
    let store = fx.store();
    let t = now();
    hold(
        &store,
        "DEL1",
        t - 60,
        2.0,
        "ann@example.org",
        &message("DEL1"),
    );
    hold(
        &store,
        "OLD1",
        t - 40 * 86_400,
        2.0,
        "ann@example.org",
        &message("OLD1"),
    );
    hold(
        &store,
        "NEW1",
        t - 86_400,
        2.0,
        "ann@example.org",
        &message("NEW1"),
    );
    let cfg = fx.config_arg();

    let out = tamis(&["held", "delete", "--config", &cfg, "DEL1", "GONE"]);
    let (code, text, _) = outcome(&out);
    assert_eq!(code, 3, "one id was not there: {text}");
    assert!(text.contains("DEL1: deleted"), "{text}");
    assert!(text.contains("GONE: no held message"), "{text}");
    assert!(store.get_held("DEL1").expect("read").is_none());

    let out = tamis(&[
        "held",
        "purge",
        "--config",
        &cfg,
        "--older-than",
        "30d",
        "--format",
        "json",
    ]);
    assert_eq!(json(&out)["held"], 1);
    assert!(store.get_held("OLD1").expect("read").is_none());
    assert!(store.get_held("NEW1").expect("read").is_some());

    // Neither --older-than nor --retention: bad input.
    assert_eq!(
        tamis(&["held", "purge", "--config", &cfg]).status.code(),
        Some(2)
    );
    let out = tamis(&[
        "held",
        "purge",
        "--config",
        &cfg,
        "--retention",
        "--format",
        "json",
    ]);
    assert_eq!(json(&out)["held"], 0);
}

#[test]
fn a_missing_store_is_bad_input_and_not_created() {
    let dir = tempfile::tempdir().expect("temp dir");
    let path = dir.path().join("absent.sqlite");
    let (code, _, err) = outcome(&tamis(&[
        "held",
        "list",
        "--store",
        &path.display().to_string(),
    ]));
    assert_eq!(code, 2);
    assert!(err.contains("no store here"), "{err}");
    assert!(!path.exists(), "an operator command created a store");
}

// --- report --------------------------------------------------------------------------

/// A tagged verdict for `domain`, with the key of Message-ID `<mid>`.
fn tagged(store: &SqliteStore, id: &str, domain: &str, mid: Option<&str>) {
    let mut e = entry(id, now() - 60, 0.5, &[(domain, Action::Tag, Action::Tag)]);
    e.message_key = mid.and_then(MessageKey::of);
    store.record(&[e]).expect("record");
}

fn reported_file(dir: &Path, name: &str, field: Option<&str>, mid: Option<&str>) -> String {
    let mut text = String::new();
    if let Some(id) = field {
        text.push_str(&format!("X-Tamis-Verdict: tag; id={id}; margin=0.5000\r\n"));
    }
    if let Some(mid) = mid {
        text.push_str(&format!("Message-ID: <{mid}>\r\n"));
    }
    text.push_str(
        "From: news@shop.test\r\nSubject: Weekly offers\r\n\r\nCheap watches and prizes.\r\n",
    );
    let path = dir.join(name);
    std::fs::write(&path, text).expect("write report file");
    path.display().to_string()
}

fn report_outcomes(out: &Output) -> Vec<(String, bool, String)> {
    json(out)["reports"]
        .as_array()
        .map(|a| {
            a.iter()
                .map(|r| {
                    (
                        r["status"].as_str().unwrap_or("").to_string(),
                        r["counted"].as_bool().unwrap_or(true),
                        r["joined_by"].as_str().unwrap_or("").to_string(),
                    )
                })
                .collect()
        })
        .unwrap_or_default()
}

#[test]
fn reports_join_by_header_then_message_id_and_refuse_what_is_not_evidence() {
    let fx = Fixture::new("");
    let store = fx.store();
    let dir = fx.dir.path();
    tagged(&store, "VHEAD1", "example.org", Some("h1@shop.test"));
    tagged(&store, "VMID2", "example.org", Some("m2@shop.test"));
    tagged(&store, "VOTHER3", "other.test", None);
    tagged(&store, "VCOPY4", "example.org", Some("original@shop.test"));
    let cfg = fx.config_arg();
    let files = [
        // 1. By its X-Tamis-Verdict field.
        reported_file(dir, "1.eml", Some("VHEAD1"), Some("h1@shop.test")),
        // 2. The field was lost (forwarded): by Message-ID and the reporter's domain.
        reported_file(dir, "2.eml", None, Some("m2@shop.test")),
        // 3. An id this store never made (or purged): recorded, not counted.
        reported_file(dir, "3.eml", Some("ZZZZZZZZZZZZZZZZ"), None),
        // 4. A real id, but made for another domain: recorded, not counted.
        reported_file(dir, "4.eml", Some("VOTHER3"), None),
        // 5. A real id of this domain copied into another message: refused.
        reported_file(dir, "5.eml", Some("VCOPY4"), Some("forged@shop.test")),
        // 6. No field and an unknown Message-ID: nothing to join, refused.
        reported_file(dir, "6.eml", None, Some("never@shop.test")),
    ];
    let mut args = vec![
        "report",
        "junk",
        "--by",
        "user",
        "--domain",
        "example.org",
        "--config",
        &cfg,
        "--format",
        "json",
    ];
    args.extend(files.iter().map(String::as_str));
    let out = tamis(&args);
    assert_eq!(out.status.code(), Some(3), "some reports are not counted");
    let got = report_outcomes(&out);
    let expect = |s: &str, c: bool, j: &str| (s.to_string(), c, j.to_string());
    assert_eq!(
        got,
        vec![
            expect("matched", true, "header"),
            expect("matched", true, "message-id"),
            expect("unknown-verdict", false, "header"),
            expect("domain-mismatch", false, "header"),
            expect("refused", false, ""),
            expect("refused", false, ""),
        ]
    );
    assert_eq!(json(&out)["counted"], 2);

    // The store holds exactly the four recorded reports, two of them evidence, each with
    // its feature vector.
    let stored = store.reports(0, 100).expect("reports");
    let summary: Vec<(String, ReportStatus, ReportSource, bool)> = stored
        .iter()
        .map(|r| {
            (
                r.verdict_id.clone(),
                r.status,
                r.source,
                r.features.is_some(),
            )
        })
        .collect();
    assert_eq!(
        summary,
        vec![
            (
                "VHEAD1".to_string(),
                ReportStatus::Matched,
                ReportSource::User,
                true
            ),
            (
                "VMID2".to_string(),
                ReportStatus::Matched,
                ReportSource::User,
                true
            ),
            (
                "ZZZZZZZZZZZZZZZZ".to_string(),
                ReportStatus::UnknownVerdict,
                ReportSource::User,
                true
            ),
            (
                "VOTHER3".to_string(),
                ReportStatus::DomainMismatch,
                ReportSource::User,
                true
            ),
        ]
    );
    assert!(stored.iter().all(|r| r.kind == ReportKind::Junk));

    // The figures count the two as junk reports and the two others as unmatched; the
    // other domain got nothing from the forged id.
    let out = tamis(&["figures", "--config", &cfg, "--format", "json"]);
    let figures = json(&out);
    let by_domain: HashMap<String, &Value> = figures["domains"]
        .as_array()
        .map(|a| {
            a.iter()
                .map(|d| (d["domain"].as_str().unwrap_or("").to_string(), d))
                .collect()
        })
        .unwrap_or_default();
    let ours = by_domain
        .get("example.org")
        .copied()
        .unwrap_or(&Value::Null);
    assert_eq!(ours["reports_junk"], 2);
    assert_eq!(ours["unmatched_reports"], 2);
    let theirs = by_domain.get("other.test").copied().unwrap_or(&Value::Null);
    assert_eq!(theirs["reports_junk"], 0);
    assert_eq!(theirs["reports_legitimate"], 0);

    // Text says it plainly.
    let (code, text, _) = outcome(&tamis(&[
        "report",
        "junk",
        "--by",
        "user",
        "--domain",
        "example.org",
        "--config",
        &cfg,
        &files[3],
    ]));
    assert_eq!(code, 3);
    assert!(
        text.contains("NOT counted: verdict VOTHER3 has no recipient in example.org"),
        "{text}"
    );
    assert!(text.contains("0 of 1 junk report(s) counted"), "{text}");
}

#[test]
fn reports_by_verdict_id_and_their_checks() {
    let fx = Fixture::new("");
    let store = fx.store();
    tagged(&store, "VID1", "example.org", None);
    hold(
        &store,
        "VHELD2",
        now() - 30,
        2.0,
        "ann@example.org",
        &message("VHELD2"),
    );
    let cfg = fx.config_arg();
    let out = tamis(&[
        "report",
        "legitimate",
        "--id",
        "VID1",
        "--id",
        "VHELD2",
        "--config",
        &cfg,
        "--format",
        "json",
    ]);
    assert_eq!(out.status.code(), Some(0));
    let got = json(&out);
    assert_eq!(got["kind"], "legitimate");
    assert_eq!(got["counted"], 2);
    let stored = store.reports(0, 10).expect("reports");
    assert_eq!(stored.len(), 2);
    assert!(
        stored
            .iter()
            .all(|r| r.kind == ReportKind::NotJunk && r.source == ReportSource::Operator)
    );
    // Only the held one has bytes to take a vector from.
    assert_eq!(
        stored
            .iter()
            .map(|r| r.features.is_some())
            .collect::<Vec<_>>(),
        vec![false, true]
    );
    // Bad arguments are refused before anything is recorded.
    for args in [
        vec!["report", "junk", "--config", &cfg],
        vec![
            "report", "junk", "--by", "user", "--id", "VID1", "--config", &cfg,
        ],
        vec!["report", "junk", "/dev/null", "--config", &cfg],
        vec!["report", "junk", "--id", "bad id", "--config", &cfg],
        vec!["report", "not-junk", "--id", "VID1", "--config", &cfg],
    ] {
        let (code, _, err) = outcome(&tamis(&args));
        assert_eq!(code, 2, "{args:?}: {err}");
    }
    assert_eq!(store.reports(0, 10).expect("reports").len(), 2);
}

// --- audit ---------------------------------------------------------------------------

#[test]
fn the_audit_sample_is_repeatable_and_answers_feed_the_audit_rate() {
    let fx = Fixture::new("");
    let store = fx.store();
    let t = now();
    for i in 0..30 {
        let id = format!("AUD{i:02}");
        hold(
            &store,
            &id,
            t - 1000 + i,
            2.0,
            "ann@example.org",
            &message(&id),
        );
    }
    hold(
        &store,
        "ELSEWHERE",
        t - 10,
        2.0,
        "bo@other.test",
        &message("ELSEWHERE"),
    );
    let cfg = fx.config_arg();
    let sample = |seed: &str| {
        let out = tamis(&[
            "audit",
            "sample",
            "--config",
            &cfg,
            "--domain",
            "example.org",
            "--size",
            "5",
            "--seed",
            seed,
            "--format",
            "json",
        ]);
        let ids: Vec<String> = json(&out)["samples"][0]["messages"]
            .as_array()
            .map(|a| {
                a.iter()
                    .map(|m| m["verdict_id"].as_str().unwrap_or("").to_string())
                    .collect()
            })
            .unwrap_or_default();
        ids
    };
    let first = sample("7");
    assert_eq!(first.len(), 5);
    assert_eq!(sample("7"), first, "the same seed gives the same sample");
    assert_ne!(sample("8"), first, "another seed gives another sample");

    // Two answers: one junk, one legitimate; an answer about mail of another domain is
    // not recorded.
    let a = format!("{}=junk", first[0]);
    let b = format!("{}=legitimate", first[1]);
    let out = tamis(&[
        "audit",
        "answer",
        "--config",
        &cfg,
        "--domain",
        "example.org",
        &a,
        &b,
        "ELSEWHERE=junk",
        "--format",
        "json",
    ]);
    assert_eq!(out.status.code(), Some(3));
    let counted: Vec<bool> = json(&out)["answers"]
        .as_array()
        .map(|a| {
            a.iter()
                .map(|x| x["counted"].as_bool().unwrap_or(true))
                .collect()
        })
        .unwrap_or_default();
    assert_eq!(counted, vec![true, true, false]);
    let stored = store.reports(0, 10).expect("reports");
    assert_eq!(stored.len(), 2);
    assert!(
        stored
            .iter()
            .all(|r| r.source == ReportSource::Audit && r.features.is_some())
    );

    // The sample shows who was reviewed; the figures' audit rate is 1 of 2.
    let out = tamis(&[
        "audit",
        "sample",
        "--config",
        &cfg,
        "--domain",
        "example.org",
        "--size",
        "5",
        "--seed",
        "7",
        "--format",
        "json",
    ]);
    let reviewed = &json(&out)["samples"][0];
    assert_eq!(reviewed["reviewed"], 2);
    assert_eq!(reviewed["messages"][0]["reviewed"], "junk");
    assert_eq!(reviewed["messages"][1]["reviewed"], "legitimate");
    let out = tamis(&[
        "figures",
        "--config",
        &cfg,
        "--domain",
        "example.org",
        "--format",
        "json",
    ]);
    let f = &json(&out)["domains"][0];
    assert_eq!(
        (
            f["audit_legitimate"]["count"].clone(),
            f["audit_legitimate"]["of"].clone()
        ),
        (Value::from(1), Value::from(2))
    );
}

// --- figures -------------------------------------------------------------------------

/// One message of the seeded store, with what the test knows about it.
pub(crate) struct Known {
    pub domain: &'static str,
    pub in_window: bool,
    pub action: Action,
    pub enforced: Action,
    /// (kind, source) of each matched report, in the order made.
    pub reports: Vec<(ReportKind, ReportSource)>,
}

#[derive(Debug, Default, PartialEq)]
pub(crate) struct Hand {
    pub by_action: [u64; 4],
    pub would_quarantine: u64,
    pub reports_junk: u64,
    pub reports_legitimate: u64,
    pub releases: u64,
    pub unmatched: u64,
    pub legitimate: u64,
    pub false_positives: u64,
    pub junk: u64,
    pub caught: u64,
    pub reviewed: u64,
    pub audit_legitimate: u64,
}

fn slot(a: Action) -> usize {
    match a {
        Action::Accept => 0,
        Action::Tag => 1,
        Action::Quarantine => 2,
        Action::Defer => 3,
    }
}

/// Counts by hand, following the definitions of `src/store/figures.rs` one by one.
pub(crate) fn hand_count(known: &[Known], domain: &str, unmatched: u64) -> Hand {
    let mut h = Hand {
        unmatched,
        ..Hand::default()
    };
    for k in known.iter().filter(|k| k.domain == domain && k.in_window) {
        h.by_action[slot(k.action)] += 1;
        if k.action != Action::Quarantine && k.enforced == Action::Quarantine {
            h.would_quarantine += 1;
        }
        for (kind, source) in &k.reports {
            match (source, kind) {
                (ReportSource::Release, _) => h.releases += 1,
                (_, ReportKind::Junk) => h.reports_junk += 1,
                (_, ReportKind::NotJunk) => h.reports_legitimate += 1,
            }
        }
        // The label is the latest report's kind.
        let label = k.reports.last().map(|(kind, _)| *kind);
        let enforced_q = k.enforced == Action::Quarantine;
        match label {
            Some(ReportKind::NotJunk) => {
                h.legitimate += 1;
                if enforced_q {
                    h.false_positives += 1;
                }
            }
            Some(ReportKind::Junk) => {
                h.junk += 1;
                if enforced_q {
                    h.caught += 1;
                }
            }
            None if k.enforced == Action::Accept => h.legitimate += 1,
            None if enforced_q => {
                h.junk += 1;
                h.caught += 1;
            }
            None => {}
        }
        if k.action == Action::Quarantine {
            let audits: Vec<ReportKind> = k
                .reports
                .iter()
                .filter(|(_, s)| *s == ReportSource::Audit)
                .map(|(kind, _)| *kind)
                .collect();
            if let Some(last) = audits.last() {
                h.reviewed += 1;
                if *last == ReportKind::NotJunk {
                    h.audit_legitimate += 1;
                }
            }
        }
    }
    h
}

pub(crate) fn from_json(d: &Value) -> Hand {
    let n = |v: &Value| v.as_u64().unwrap_or(u64::MAX);
    let a = &d["by_action"];
    Hand {
        by_action: [
            n(&a["accept"]),
            n(&a["tag"]),
            n(&a["quarantine"]),
            n(&a["defer"]),
        ],
        would_quarantine: n(&d["would_quarantine"]),
        reports_junk: n(&d["reports_junk"]),
        reports_legitimate: n(&d["reports_legitimate"]),
        releases: n(&d["releases"]),
        unmatched: n(&d["unmatched_reports"]),
        legitimate: n(&d["legitimate"]),
        false_positives: n(&d["false_positives"]["count"]),
        junk: n(&d["junk"]),
        caught: n(&d["catch_rate"]["count"]),
        reviewed: n(&d["audit_legitimate"]["of"]),
        audit_legitimate: n(&d["audit_legitimate"]["count"]),
    }
}

#[test]
fn figures_equal_hand_counts_on_a_seeded_store() {
    // Two domains: quarantine on for one, tag-only for the other (would-be quarantines
    // are tagged). Messages inside and outside the 7-day window; reports from users,
    // operators, auditors and releases, some messages reported twice (the later report
    // wins), and unmatched reports that must never count.
    let fx = Fixture::new("[policy]\ntarget_fpr = 0.05\n");
    let store = fx.store();
    let mut rng = SplitMix64::new(2026);
    let t = now();
    let mut known = Vec::new();
    let mut batch = Vec::new();
    for (d, domain) in ["held.example.org", "tagonly.example.org"]
        .iter()
        .enumerate()
    {
        for i in 0..700 {
            let in_window = i < 600;
            let at = if in_window {
                t - 3600 - rng.below(5 * 86_400) as i64
            } else {
                t - 9 * 86_400 - rng.below(86_400) as i64
            };
            let r = rng.unit();
            let enforced = if r < 0.7 {
                Action::Accept
            } else if r < 0.85 {
                Action::Tag
            } else {
                Action::Quarantine
            };
            let action = if d == 1 && enforced == Action::Quarantine {
                Action::Tag
            } else {
                enforced
            };
            let id = format!("F{d}{i:04}");
            if action == Action::Quarantine {
                let recipient = format!("user{i}@{domain}");
                hold(&store, &id, at, 1.5, &recipient, &message(&id));
                // `hold` journals with its own margin; the outcome is what matters here.
            } else {
                batch.push(entry(&id, at, 0.2, &[(domain, action, enforced)]));
            }
            known.push((
                id,
                Known {
                    domain,
                    in_window,
                    action,
                    enforced,
                    reports: Vec::new(),
                },
            ));
        }
    }
    store.record(&batch).expect("journal");

    let user = |id: &str, kind, domain: &str| NewReport {
        verdict_id: id.to_string(),
        kind,
        source: ReportSource::User,
        domain: Some(domain.to_string()),
        at: t,
        features: None,
    };
    /// Records a report that must match, and remembers it.
    fn said(store: &SqliteStore, report: NewReport, made: &mut Vec<(ReportKind, ReportSource)>) {
        let receipt = store.report(&report).expect("report");
        assert_eq!(
            receipt.status,
            ReportStatus::Matched,
            "{}",
            report.verdict_id
        );
        made.push((report.kind, report.source));
    }
    for (id, k) in known.iter_mut() {
        let r = rng.unit();
        let made = &mut k.reports;
        let domain = k.domain;
        match (k.action, k.enforced) {
            (Action::Accept, _) if r < 0.04 => {
                said(&store, user(id, ReportKind::Junk, domain), made);
                if r < 0.01 {
                    // An operator overrules the user: the later report is the label.
                    let overrule = NewReport {
                        source: ReportSource::Operator,
                        domain: None,
                        ..user(id, ReportKind::NotJunk, domain)
                    };
                    said(&store, overrule, made);
                }
            }
            (Action::Tag, Action::Tag) if r < 0.2 => {
                said(&store, user(id, ReportKind::Junk, domain), made);
            }
            (Action::Tag, Action::Tag) if r < 0.3 => {
                said(&store, user(id, ReportKind::NotJunk, domain), made);
            }
            (Action::Tag, Action::Quarantine) if r < 0.15 => {
                said(&store, user(id, ReportKind::NotJunk, domain), made);
            }
            (Action::Tag, Action::Quarantine) if r < 0.25 => {
                said(&store, user(id, ReportKind::Junk, domain), made);
            }
            (Action::Quarantine, _) if r < 0.12 => {
                // A release: claimed, delivered, recorded by the store as legitimate.
                assert!(matches!(
                    store.claim_release(id).expect("claim"),
                    Claim::Won(_)
                ));
                let delivered = ReleaseOutcome::Delivered {
                    at: t,
                    features: None,
                };
                assert!(store.finish_release(id, &delivered).expect("finish"));
                made.push((ReportKind::NotJunk, ReportSource::Release));
            }
            (Action::Quarantine, _) if r < 0.3 => {
                let kind = if r < 0.2 {
                    ReportKind::Junk
                } else {
                    ReportKind::NotJunk
                };
                let audit = |kind| NewReport {
                    source: ReportSource::Audit,
                    ..user(id, kind, domain)
                };
                said(&store, audit(kind), made);
                if r < 0.14 {
                    // Reviewed twice: the later answer stands.
                    said(&store, audit(ReportKind::NotJunk), made);
                }
            }
            (Action::Quarantine, _) if r < 0.35 => {
                said(&store, user(id, ReportKind::Junk, domain), made);
            }
            _ => {}
        }
    }
    // Unmatched: unknown ids and an id of the other domain, all naming the first domain.
    for i in 0..3 {
        let receipt = store
            .report(&user(
                &format!("UNKNOWN{i}"),
                ReportKind::Junk,
                "held.example.org",
            ))
            .expect("report");
        assert_eq!(receipt.status, ReportStatus::UnknownVerdict);
    }
    let foreign = known
        .iter()
        .find(|(_, k)| k.domain == "tagonly.example.org")
        .map(|(id, _)| id.clone())
        .unwrap_or_default();
    let receipt = store
        .report(&user(&foreign, ReportKind::NotJunk, "held.example.org"))
        .expect("report");
    assert_eq!(receipt.status, ReportStatus::DomainMismatch);

    let known: Vec<Known> = known.into_iter().map(|(_, k)| k).collect();
    let out = tamis(&[
        "figures",
        "--config",
        &fx.config_arg(),
        "--since",
        "7d",
        "--format",
        "json",
    ]);
    assert_eq!(out.status.code(), Some(0));
    let figures = json(&out);
    let domains = figures["domains"].as_array().cloned().unwrap_or_default();
    let names: Vec<&str> = domains
        .iter()
        .map(|d| d["domain"].as_str().unwrap_or(""))
        .collect();
    assert_eq!(names, ["held.example.org", "tagonly.example.org"]);
    for (d, unmatched) in [("held.example.org", 4), ("tagonly.example.org", 0)] {
        let got = domains
            .iter()
            .find(|x| x["domain"] == d)
            .map(from_json)
            .unwrap_or_default();
        let hand = hand_count(&known, d, unmatched);
        assert_eq!(got, hand, "{d}");
        assert!(
            hand.false_positives > 0 && hand.legitimate > 300,
            "{d}: {hand:?}"
        );
    }
    let tag_only = &domains[1];
    assert!(tag_only["would_quarantine"].as_u64().unwrap_or(0) > 0);
    assert_eq!(tag_only["target_fpr"], 0.05);

    // The upper bound is the one-sided 95% Clopper–Pearson bound: scipy.stats.beta.ppf(
    // 0.95, k + 1, n - k) (the Clopper–Pearson construction; SciPy as the reference).
    for d in &domains {
        let k = d["false_positives"]["count"].as_u64().unwrap_or(0);
        let n = d["false_positives"]["of"].as_u64().unwrap_or(0);
        let upper = d["false_positives"]["upper_95"].as_f64().unwrap_or(-1.0);
        let script = "import sys\nfrom scipy.stats import beta\nk, n = int(sys.argv[1]), int(sys.argv[2])\nprint(repr(float(beta.ppf(0.95, k + 1, n - k))))";
        let reference: f64 =
            String::from_utf8_lossy(&python::run(script, &[&k.to_string(), &n.to_string()], b""))
                .trim()
                .parse()
                .unwrap_or(f64::NAN);
        assert!(
            (upper - reference).abs() < 1e-9,
            "{k}/{n}: {upper} vs {reference}"
        );
        let check = d["target"].as_str().unwrap_or("");
        let lower = d["false_positives"]["lower_95"].as_f64().unwrap_or(-1.0);
        let expected = if upper <= 0.05 {
            "met"
        } else if lower > 0.05 {
            "missed"
        } else {
            "undecided"
        };
        assert_eq!(check, expected, "{d}");
    }

    // The text form shows the same counts and the target.
    let (code, text, _) = outcome(&tamis(&["figures", "--config", &fx.config_arg()]));
    assert_eq!(code, 0);
    let hand = hand_count(&known, "held.example.org", 4);
    assert!(
        text.contains(&format!(
            "false positives {} of {} legitimate",
            hand.false_positives, hand.legitimate
        )),
        "{text}"
    );
    assert!(text.contains("target 5.00%"), "{text}");
}

#[test]
fn thin_evidence_is_said_plainly() {
    let fx = Fixture::new("");
    let store = fx.store();
    let t = now();
    let entries: Vec<JournalEntry> = (0..50)
        .map(|i| {
            entry(
                &format!("THIN{i}"),
                t - 60,
                -1.0,
                &[("quiet.example.org", Action::Accept, Action::Accept)],
            )
        })
        .collect();
    store.record(&entries).expect("record");
    let cfg = fx.config_arg();
    let out = tamis(&["figures", "--config", &cfg, "--format", "json"]);
    let d = &json(&out)["domains"][0];
    assert_eq!(d["too_thin"], true);
    assert_eq!(d["target"], "undecided");
    let (_, text, _) = outcome(&tamis(&["figures", "--config", &cfg]));
    assert!(
        text.contains("cannot tell: the evidence is too thin"),
        "{text}"
    );
    assert!(text.contains("nobody looked"), "{text}");
    // A domain with no mail at all still gets its (empty) figures.
    let out = tamis(&[
        "figures",
        "--config",
        &cfg,
        "--domain",
        "silent.example.org",
        "--format",
        "json",
    ]);
    assert_eq!(json(&out)["domains"][0]["messages"], 0);
    // The definitions are in the long help.
    let (_, help, _) = outcome(&tamis(&["figures", "--help"]));
    assert!(
        help.contains("Clopper-Pearson") && help.contains("too thin"),
        "{help}"
    );
}
