//! Relayed mail is scored whatever its first line looks like.
//!
//! The daemon once refused, as "not mail", any message whose first header field had an empty
//! name, a space or an 8-bit byte in its name, or that had no header field at all, and then
//! let it through unscanned under the default failure mode: a sender who controls the header
//! could opt junk out of the filter. These tests take junk from the demonstration corpus,
//! add each oddity, and check that the message is still scored, to (nearly) the margin it
//! had without the oddity, both in process and through the daemon on loopback.

use std::io::{Read, Write};
use std::net::TcpStream;
use std::sync::{Arc, OnceLock};
use std::time::Duration;

use bytes::BytesMut;
use tamis::Label;
use tamis::analyze::Analyzer;
use tamis::config::Config;
use tamis::mail::{Extracted, Extractor, MailError, Signal};
use tamis::metrics::Metrics;
use tamis::model::LinearModel;
use tamis::proto::client::Client;
use tamis::proto::{Action, Frame, encode_frame, parse_frame};
use tamis::server::engine::{Decisions, Engine, SharedEngine};
use tamis::server::listen::start;

/// The built-in demonstration model, trained once for this module.
fn model() -> &'static LinearModel {
    static MODEL: OnceLock<LinearModel> = OnceLock::new();
    MODEL.get_or_init(|| tamis::model::builtin::demonstration_model().expect("builds"))
}

fn decisions(config: &Config) -> Decisions {
    Decisions {
        policy: config.policy.clone(),
        headers: config.headers.clone(),
        on_failure: config.on_failure,
    }
}

fn engine() -> Engine {
    Engine::new(model().clone(), "test model", decisions(&Config::default())).expect("engine")
}

/// Junk from the demonstration corpus that the default policy tags: the messages an
/// attacker wants to slip through.
fn tagged_junk(engine: &Engine, count: usize) -> Vec<Vec<u8>> {
    let policy = &engine.decisions().policy;
    let rcpt = ["someone@example.org".to_string()];
    let junk: Vec<Vec<u8>> = tamis::demo::generate(47, 600)
        .filter(|m| m.label == Label::Spam)
        .map(|m| m.bytes)
        .filter(|raw| {
            let score = engine.score(raw).expect("demo junk scores");
            policy.decide(&rcpt, score.margin, score.probability)[0].1 == Action::Tag
        })
        .take(count)
        .collect();
    assert_eq!(junk.len(), count, "enough tagged demo junk");
    junk
}

/// The header section and body of a demo message (the blank line between them dropped).
fn split(raw: &[u8]) -> (&[u8], &[u8]) {
    let at = raw
        .windows(4)
        .position(|w| w == b"\r\n\r\n")
        .expect("demo mail has a blank line after its header");
    (&raw[..at + 2], &raw[at + 4..])
}

/// The oddities that used to make the daemon refuse a message, each as a first field.
const ODD_FIRST_FIELDS: [(&str, &[u8]); 3] = [
    ("a space in the name", b"X Y: z\r\n"),
    ("an empty name", b": z\r\n"),
    ("an 8-bit byte in the name", b"X\xe9: z\r\n"),
];

fn with_first_field(field: &[u8], raw: &[u8]) -> Vec<u8> {
    [field, raw].concat()
}

/// Tolerance on the margin: the oddity adds one signal feature and renormalizes the vector.
fn nearly(odd: f64, plain: f64) -> bool {
    (odd - plain).abs() <= 0.1 + 0.05 * plain.abs()
}

#[test]
fn junk_with_an_odd_first_field_is_scored_as_without_it() {
    let engine = engine();
    let policy = &engine.decisions().policy;
    let rcpt = ["someone@example.org".to_string()];
    for raw in tagged_junk(&engine, 40) {
        let plain = engine.score(&raw).expect("scores");
        for (what, field) in ODD_FIRST_FIELDS {
            let odd = with_first_field(field, &raw);
            let score = engine
                .score(&odd)
                .unwrap_or_else(|e| panic!("{what}: relayed junk not scored: {e}"));
            assert!(
                nearly(score.margin, plain.margin),
                "{what}: margin {} without the oddity, {} with it",
                plain.margin,
                score.margin
            );
            assert_eq!(
                policy.decide(&rcpt, score.margin, score.probability)[0].1,
                Action::Tag,
                "{what}: still tagged"
            );
        }
    }
}

#[test]
fn junk_without_any_header_field_is_scored() {
    let engine = engine();
    let policy = &engine.decisions().policy;
    let rcpt = ["someone@example.org".to_string()];
    let tag_threshold = policy.default_thresholds().tag();
    for raw in tagged_junk(&engine, 40) {
        let (_, body) = split(&raw);
        // What the daemon assembles when a relay sends no FIELD: the blank line, the body.
        let headerless = [b"\r\n".as_slice(), body].concat();
        // The same body behind one neutral field: the message without the oddity.
        let neutral = [b"X-Note: 1\r\n\r\n".as_slice(), body].concat();
        let plain = engine.score(&neutral).expect("scores");
        let score = engine
            .score(&headerless)
            .unwrap_or_else(|e| panic!("headerless relayed junk not scored: {e}"));
        assert!(
            nearly(score.margin, plain.margin),
            "margin {} with a neutral field, {} with none",
            plain.margin,
            score.margin
        );
        assert!(score.margin.is_finite());
        // Same action as the neutral reading unless the two straddle a threshold.
        let action =
            |s: &tamis::server::engine::Score| policy.decide(&rcpt, s.margin, s.probability)[0].1;
        let straddles =
            (plain.margin - tag_threshold).signum() != (score.margin - tag_threshold).signum();
        assert!(straddles || action(&score) == action(&plain));
    }
}

#[test]
fn the_oddity_is_recorded_as_a_signal_and_files_are_still_refused() {
    let raw = tamis::demo::generate(47, 1)
        .next()
        .expect("a message")
        .bytes;
    let mut analyzer = Analyzer::default();
    analyzer.vectorize_relayed(&raw);
    assert!(
        !analyzer
            .extracted()
            .signals
            .contains(&Signal::HeaderMalformed),
        "a well-formed message carries no header signal"
    );
    let (_, body) = split(&raw);
    let headerless = [b"\r\n".as_slice(), body].concat();
    let mut odd_inputs: Vec<(&str, Vec<u8>)> = ODD_FIRST_FIELDS
        .iter()
        .map(|(what, field)| (*what, with_first_field(field, &raw)))
        .collect();
    odd_inputs.push(("no header field", headerless));
    for (what, odd) in &odd_inputs {
        let vector = analyzer.vectorize_relayed(odd).clone();
        assert!(!vector.is_empty(), "{what}: features were read");
        assert!(
            analyzer
                .extracted()
                .signals
                .contains(&Signal::HeaderMalformed),
            "{what}: the oddity is recorded"
        );
        // Files given to the CLI keep the "is this mail" check.
        assert_eq!(
            analyzer.vectorize(odd).err(),
            Some(MailError::NotMail),
            "{what}: a file is still refused"
        );
    }
    // Empty relayed input is scored too (as a message with nothing to read).
    let mut out = Extracted::default();
    Extractor::default().extract_relayed(b"", &mut out);
    assert!(out.signals.contains(&Signal::HeaderMalformed));
    assert!(out.signals.contains(&Signal::NoText));
}

#[test]
fn relayed_and_file_readings_agree_on_well_formed_mail() {
    // The relayed mode only adds what the file reader would refuse; on mail the file
    // reader accepts, both must give the same vector (so models trained from files score
    // relayed mail exactly as before).
    let mut analyzer = Analyzer::default();
    for m in tamis::demo::generate(48, 200) {
        let file = analyzer.vectorize(&m.bytes).expect("demo mail").clone();
        let relayed = analyzer.vectorize_relayed(&m.bytes).clone();
        assert_eq!(file, relayed, "{}", m.name);
    }
}

async fn daemon() -> tamis::server::listen::Running {
    let mut config = Config::default();
    config.listen.tcp = Some("127.0.0.1:0".parse().expect("addr"));
    let engine = Engine::new(model().clone(), "test model", decisions(&config)).expect("engine");
    let metrics = Arc::new(Metrics::new(config.policy.domains().keys()).expect("metrics"));
    start(&config, SharedEngine::new(engine), metrics)
        .await
        .expect("binds on loopback")
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn the_daemon_scores_junk_whose_first_field_is_odd() {
    let running = daemon().await;
    let addr = running.tcp.expect("tcp");
    let junk = tagged_junk(&engine(), 3);
    tokio::task::spawn_blocking(move || {
        let mut client =
            Client::connect(&addr.to_string(), Duration::from_secs(20)).expect("connect");
        let rcpts = vec!["someone@example.org".to_string()];
        for raw in &junk {
            let plain = client.scan("s@example.net", &rcpts, raw).expect("verdict");
            // The client sends one FIELD per header field: here `X Y` comes first.
            let odd = with_first_field(b"X Y: z\r\n", raw);
            let verdict = client.scan("s@example.net", &rcpts, &odd).expect("verdict");
            assert!(verdict.margin.is_finite(), "scored: {verdict:?}");
            assert!(nearly(verdict.margin, plain.margin));
            assert_eq!(verdict.recipients[0].action, Action::Tag);
            assert!(
                !verdict.edits.iter().any(|e| e.name == "X-Tamis-Unscanned"),
                "{verdict:?}"
            );
        }
        client.bye().expect("bye");
    })
    .await
    .expect("task");
    assert!(running.stop().await);
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn the_daemon_scores_a_message_without_header_fields() {
    let running = daemon().await;
    let addr = running.tcp.expect("tcp");
    let verdict = tokio::task::spawn_blocking(move || {
        let mut stream = TcpStream::connect(addr).expect("connect");
        stream
            .set_read_timeout(Some(Duration::from_secs(20)))
            .expect("timeout");
        // No FIELD frame, then bytes that are not text at all: still relayed mail.
        let mut out = BytesMut::new();
        for frame in [
            Frame::Hello {
                version: 1,
                max_frame: 1 << 20,
                client: "test".into(),
                secret: None,
            },
            Frame::Sender {
                address: "s@example.net".into(),
            },
            Frame::Recipient {
                address: "someone@example.org".into(),
            },
            Frame::Chunk {
                data: b"\x89PNG\r\n\x1a\n\0\0".to_vec(),
            },
            Frame::Seal,
        ] {
            encode_frame(&frame, &mut out).expect("encodes");
        }
        stream.write_all(&out).expect("write");
        let mut buf = BytesMut::new();
        loop {
            if let Some((frame, used)) = parse_frame(&buf, 1 << 20).expect("server frames parse") {
                let _ = buf.split_to(used);
                match frame {
                    Frame::Verdict(v) => return v,
                    Frame::Welcome { .. } | Frame::Fault { fatal: false, .. } => continue,
                    other => panic!("{other:?}"),
                }
            }
            let mut chunk = [0u8; 4096];
            match stream.read(&mut chunk) {
                Ok(0) | Err(_) => panic!("closed before a verdict"),
                Ok(n) => buf.extend_from_slice(&chunk[..n]),
            }
        }
    })
    .await
    .expect("task");
    assert!(verdict.margin.is_finite(), "scored: {verdict:?}");
    assert!(
        !verdict.edits.iter().any(|e| e.name == "X-Tamis-Unscanned"),
        "{verdict:?}"
    );
    assert!(running.stop().await);
}
