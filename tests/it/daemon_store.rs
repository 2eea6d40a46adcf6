//! The daemon with its store: quarantined mail held byte for byte before its verdict, every
//! verdict journalled (tag-only mode with what it would have held back), a store that
//! fails, a relay that sends a message again, a daemon killed mid-run, retention, and the
//! metrics read from the store.

use std::io::{Read, Write};
use std::net::{SocketAddr, TcpStream};
use std::path::{Path, PathBuf};
use std::process::{Child, Command, Stdio};
use std::sync::{Arc, OnceLock};
use std::time::{Duration, Instant};

use bytes::BytesMut;
use tamis::config::{Config, FailureMode};
use tamis::metrics::Metrics;
use tamis::proto::client::{Client, split_message};
use tamis::proto::{Action, Frame, Verdict, encode_frame, parse_frame};
use tamis::server::engine::{Decisions, Engine, SharedEngine};
use tamis::server::keeping::{Keeping, KeepingSettings};
use tamis::server::listen::{Running, start_with};
use tamis::store::{
    BatchSettings, Claim, HeldFilter, HeldState, Hold, JournalEntry, MessageKey, NewReport,
    ReleaseOutcome, ReportKind, ReportSource, SqliteStore, Store, StoreOptions,
};

use crate::daemon::{free_port, http_get, metric, model};

/// A domain that quarantines (tag-only off), and one that stays tag-only.
const SECTIONS: &str = "[policy.domains.\"hold.test\"]\ntag_margin = 0.0\nquarantine_margin = 0.5\ntag_only = false\n\
[policy.domains.\"watch.test\"]\ntag_margin = 0.0\nquarantine_margin = 0.5\n";

fn config(extra: &str) -> Config {
    let text =
        format!("metrics = \"127.0.0.1:0\"\n[listen]\ntcp = \"127.0.0.1:0\"\n{extra}\n{SECTIONS}");
    Config::from_toml_str(&text, "/nonexistent/tamis.toml").expect("a valid configuration")
}

fn rcpts(list: &[&str]) -> Vec<String> {
    list.iter().map(|s| s.to_string()).collect()
}

/// The message as a relay hands it over field by field and chunk by chunk, written back
/// as `name: value` CRLF lines, an empty line and the body: the form a held message is
/// kept in (PROTOCOL.md §4.5), so a message already in this form is held byte for byte.
fn canonical(raw: &[u8]) -> Vec<u8> {
    let (fields, body) = split_message(raw);
    let mut out = Vec::new();
    for (name, value) in fields {
        out.extend_from_slice(name.as_bytes());
        out.extend_from_slice(b": ");
        out.extend_from_slice(&value);
        out.extend_from_slice(b"\r\n");
    }
    out.extend_from_slice(b"\r\n");
    out.extend_from_slice(body);
    out
}

/// Demo junk that the built-in model scores at a margin of 1 or more (every section here
/// quarantines from 0.5, the default section from 1), in canonical form.
fn junk() -> &'static [Vec<u8>] {
    static JUNK: OnceLock<Vec<Vec<u8>>> = OnceLock::new();
    JUNK.get_or_init(|| {
        let engine = Engine::new(
            model().clone(),
            "test model",
            Decisions {
                policy: Default::default(),
                headers: Default::default(),
                on_failure: Default::default(),
            },
        )
        .expect("engine");
        tamis::demo::generate(41, 4000)
            .filter(|m| m.label == tamis::Label::Spam)
            .map(|m| canonical(&m.bytes))
            .filter(|raw| engine.score(raw).is_ok_and(|s| s.margin >= 1.0))
            .take(80)
            .collect()
    })
}

/// Demo mail the model accepts (margin below 0), in canonical form.
fn legitimate(n: usize) -> Vec<Vec<u8>> {
    let engine = Engine::new(
        model().clone(),
        "test model",
        Decisions {
            policy: Default::default(),
            headers: Default::default(),
            on_failure: Default::default(),
        },
    )
    .expect("engine");
    tamis::demo::generate(42, 2000)
        .filter(|m| m.label == tamis::Label::Ham)
        .map(|m| canonical(&m.bytes))
        .filter(|raw| engine.score(raw).is_ok_and(|s| s.margin < -0.2))
        .take(n)
        .collect()
}

fn message_id(raw: &[u8]) -> Option<String> {
    split_message(raw)
        .0
        .into_iter()
        .find(|(n, _)| n.eq_ignore_ascii_case("Message-ID"))
        .map(|(_, v)| String::from_utf8_lossy(&v).into_owned())
}

/// Bytes the relay protocol counts as the message's size: field names, values, body.
fn wire_size(raw: &[u8]) -> u64 {
    let (fields, body) = split_message(raw);
    let fields: usize = fields.iter().map(|(n, v)| n.len() + v.len()).sum();
    (fields + body.len()) as u64
}

fn quick_settings() -> KeepingSettings {
    KeepingSettings {
        refresh_every: Duration::from_millis(200),
        refresh_at_most: Duration::from_millis(50),
        ..KeepingSettings::default()
    }
}

struct Daemon {
    running: Running,
    metrics: Arc<Metrics>,
    addr: SocketAddr,
    status: SocketAddr,
}

/// An in-process daemon keeping its store at `path`, opened with `options`.
async fn daemon(
    config: Config,
    path: &Path,
    options: StoreOptions,
    settings: KeepingSettings,
) -> Daemon {
    let decisions = Decisions {
        policy: config.policy.clone(),
        headers: config.headers.clone(),
        on_failure: config.on_failure,
    };
    let engine = Engine::new(model().clone(), "test model", decisions).expect("engine");
    let metrics = Arc::new(Metrics::new(config.policy.domains().keys()).expect("metrics"));
    let record_subject = options.record_subject;
    let store = SqliteStore::open(path, options).expect("open the store");
    let keeping = Keeping::start(
        Arc::new(store),
        Arc::clone(&metrics),
        settings,
        record_subject,
    )
    .expect("keeping");
    let running = start_with(
        &config,
        SharedEngine::new(engine),
        Arc::clone(&metrics),
        Some(keeping),
    )
    .await
    .expect("binds on loopback");
    let addr = running.tcp.expect("tcp");
    let status = running.status.expect("status");
    Daemon {
        running,
        metrics,
        addr,
        status,
    }
}

/// Another handle on the store file, as the operator commands open it.
fn reader(path: &Path) -> SqliteStore {
    SqliteStore::open(path, StoreOptions::default()).expect("open the store again")
}

fn scan(addr: SocketAddr, to: &[&str], raw: &[u8]) -> Verdict {
    let mut client = Client::connect(&addr.to_string(), Duration::from_secs(30)).expect("connect");
    client
        .scan("alice@sender.example", &rcpts(to), raw)
        .expect("verdict")
}

fn actions(v: &Verdict) -> Vec<Action> {
    v.recipients.iter().map(|r| r.action).collect()
}

/// A relay connection speaking frames, reading the server's frames with a timeout.
struct Conn {
    stream: TcpStream,
    buf: BytesMut,
}

impl Conn {
    fn open(addr: SocketAddr) -> Conn {
        let stream = TcpStream::connect(addr).expect("connect");
        let mut conn = Conn {
            stream,
            buf: BytesMut::new(),
        };
        conn.send(&Frame::Hello {
            version: 1,
            max_frame: 1 << 20,
            client: "test".into(),
            secret: None,
        });
        assert!(matches!(
            conn.next(Duration::from_secs(10)),
            Some(Frame::Welcome { .. })
        ));
        conn
    }

    fn send(&mut self, frame: &Frame) {
        let mut out = BytesMut::new();
        encode_frame(frame, &mut out).expect("encodes");
        self.stream.write_all(&out).expect("write");
    }

    /// Sends a whole message (in 60 KiB chunks) and SEAL, without waiting.
    fn message(&mut self, to: &[&str], raw: &[u8]) {
        self.send(&Frame::Sender {
            address: "alice@sender.example".into(),
        });
        for r in to {
            self.send(&Frame::Recipient {
                address: r.to_string(),
            });
        }
        let (fields, body) = split_message(raw);
        for (name, value) in fields {
            self.send(&Frame::Field { name, value });
        }
        for piece in body.chunks(60 * 1024) {
            self.send(&Frame::Chunk {
                data: piece.to_vec(),
            });
        }
        self.send(&Frame::Seal);
    }

    /// The next frame within `wait`; `None` on silence or close.
    fn next(&mut self, wait: Duration) -> Option<Frame> {
        let deadline = Instant::now() + wait;
        loop {
            if let Some((frame, used)) = parse_frame(&self.buf, 1 << 20).expect("frames parse") {
                let _ = self.buf.split_to(used);
                return Some(frame);
            }
            let left = deadline.saturating_duration_since(Instant::now());
            if left.is_zero() {
                return None;
            }
            self.stream.set_read_timeout(Some(left)).expect("timeout");
            let mut chunk = [0u8; 8192];
            match self.stream.read(&mut chunk) {
                Ok(0) | Err(_) => return None,
                Ok(n) => self.buf.extend_from_slice(&chunk[..n]),
            }
        }
    }

    /// Frames up to and including the verdict.
    fn until_verdict(&mut self, wait: Duration) -> (Vec<Frame>, Verdict) {
        let mut before = Vec::new();
        loop {
            match self.next(wait) {
                Some(Frame::Verdict(v)) => return (before, v),
                Some(other) => before.push(other),
                None => panic!("no verdict within {wait:?}; got {before:?}"),
            }
        }
    }
}

fn metric_line(status: SocketAddr, series: &str) -> Option<f64> {
    metric(status, &format!("{series} "))
}

/// Waits until a metric series reaches `want` (the store is read periodically).
fn wait_for_metric(status: SocketAddr, series: &str, want: f64) {
    let started = Instant::now();
    let mut last = None;
    while started.elapsed() < Duration::from_secs(15) {
        last = metric_line(status, series);
        if last == Some(want) {
            return;
        }
        std::thread::sleep(Duration::from_millis(50));
    }
    panic!("{series} stayed at {last:?}, expected {want}");
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_quarantined_message_is_held_byte_for_byte_and_its_verdict_waits_for_the_commit() {
    let dir = tempfile::tempdir().expect("temp dir");
    let path = dir.path().join("store.sqlite");
    let options = StoreOptions {
        busy_timeout: Duration::from_secs(20),
        ..StoreOptions::default()
    };
    let d = daemon(config(""), &path, options, quick_settings()).await;
    let addr = d.addr;
    let store_path = path.clone();
    tokio::task::spawn_blocking(move || {
        let first = &junk()[0];
        let v = scan(addr, &["bob@hold.test", "carol@watch.test"], first);
        assert_eq!(actions(&v), vec![Action::Quarantine, Action::Tag]);
        let store = reader(&store_path);
        let held = store
            .get_held(&v.verdict_id)
            .expect("read")
            .expect("held under its verdict id");
        assert!(
            held.message == *first,
            "held bytes differ from the message sent ({} vs {} bytes)",
            held.message.len(),
            first.len()
        );
        assert_eq!(held.summary.sender, "alice@sender.example");
        assert_eq!(held.summary.recipients, vec!["bob@hold.test".to_string()]);
        assert_eq!(held.summary.state, HeldState::Held);
        let entry = held.summary.entry;
        let outcomes: Vec<(&str, Action, Action)> = entry
            .outcomes
            .iter()
            .map(|o| (o.domain.as_str(), o.action, o.enforced))
            .collect();
        assert_eq!(
            outcomes,
            vec![
                ("hold.test", Action::Quarantine, Action::Quarantine),
                ("watch.test", Action::Tag, Action::Quarantine),
            ]
        );
        assert_eq!(entry.model, "test model");
        assert_eq!(
            entry.subject, None,
            "no Subject unless the store records it"
        );
        assert!(entry.scanned);
        assert_eq!(entry.margin, Some(v.margin));
        assert_eq!(entry.size, wire_size(first));
        assert_eq!(entry.sender_domain.as_deref(), Some("sender.example"));
        assert_eq!(
            entry.message_key,
            message_id(first).and_then(|id| MessageKey::of(&id))
        );
        assert!(
            (1..=3).contains(&entry.reasons.len()) && entry.reasons.iter().all(|r| r.contains(':')),
            "{:?}",
            entry.reasons
        );

        // Another connection takes the store's write lock: the hold must wait for it, and
        // so must the verdict.
        let lock = rusqlite::Connection::open(&store_path).expect("another connection");
        lock.execute_batch("BEGIN EXCLUSIVE").expect("lock");
        let second = &junk()[1];
        let mut conn = Conn::open(addr);
        conn.message(&["dan@hold.test"], second);
        let early = conn.next(Duration::from_millis(1500));
        assert!(
            !matches!(early, Some(Frame::Verdict(_))),
            "a verdict came while the store could not commit: {early:?}"
        );
        assert_eq!(store.held_totals().expect("totals").messages, 1);
        lock.execute_batch("ROLLBACK").expect("unlock");
        let (_, v) = conn.until_verdict(Duration::from_secs(20));
        assert_eq!(actions(&v), vec![Action::Quarantine]);
        let held = store.get_held(&v.verdict_id).expect("read").expect("held");
        assert!(held.message == *second);
        assert_eq!(store.held_totals().expect("totals").messages, 2);
    })
    .await
    .expect("task");
    assert!(d.running.stop().await);
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_message_sent_again_while_held_gets_its_first_verdict_and_is_held_once() {
    let dir = tempfile::tempdir().expect("temp dir");
    let path = dir.path().join("store.sqlite");
    let options = StoreOptions {
        record_subject: true,
        ..StoreOptions::default()
    };
    let d = daemon(config(""), &path, options, quick_settings()).await;
    let (addr, status) = (d.addr, d.status);
    let store_path = path.clone();
    tokio::task::spawn_blocking(move || {
        let raw = &junk()[2];
        let to = ["bob@hold.test", "eve@hold.test"];
        let first = scan(addr, &to, raw);
        let again = scan(addr, &to, raw);
        assert_eq!(actions(&first), vec![Action::Quarantine; 2]);
        assert_eq!(
            again.verdict_id, first.verdict_id,
            "one verdict per held message"
        );
        assert_eq!(actions(&again), actions(&first));
        // Other recipients make another message: held on its own.
        let other = scan(addr, &["zoe@hold.test"], raw);
        assert_ne!(other.verdict_id, first.verdict_id);
        let store = reader(&store_path);
        assert_eq!(store.held_totals().expect("totals").messages, 2);
        // This store records subjects (off by default: see the byte-for-byte test).
        let subject = split_message(raw)
            .0
            .into_iter()
            .find(|(n, _)| n.eq_ignore_ascii_case("Subject"))
            .map(|(_, v)| String::from_utf8_lossy(&v).into_owned());
        let entry = store
            .journal_entry(&first.verdict_id)
            .expect("read")
            .expect("journalled");
        assert!(subject.is_some());
        assert_eq!(entry.subject, subject);
        assert_eq!(
            metric_line(status, "tamis_holds_total{outcome=\"already-held\"}"),
            Some(1.0)
        );
        assert_eq!(
            metric_line(status, "tamis_holds_total{outcome=\"held\"}"),
            Some(2.0)
        );
    })
    .await
    .expect("task");
    assert!(d.running.stop().await);
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_message_not_kept_whole_is_tagged_and_never_quarantined() {
    let dir = tempfile::tempdir().expect("temp dir");
    let path = dir.path().join("store.sqlite");
    let cfg = config("[limits]\nmax_message_bytes = \"16 KiB\"\nmax_field_bytes = \"8 KiB\"\n");
    let d = daemon(cfg, &path, StoreOptions::default(), quick_settings()).await;
    let (addr, status) = (d.addr, d.status);
    let store_path = path.clone();
    let verdict = tokio::task::spawn_blocking(move || {
        let mut raw = junk()[3].clone();
        // Junk, then enough more of it to pass max_message.
        let body: Vec<u8> = raw[raw.len() / 2..].to_vec();
        while raw.len() < 40 * 1024 {
            raw.extend_from_slice(&body);
        }
        let mut conn = Conn::open(addr);
        conn.message(&["bob@hold.test"], &raw);
        let (before, v) = conn.until_verdict(Duration::from_secs(20));
        assert!(
            before.iter().any(|f| matches!(
                f,
                Frame::Fault {
                    code: tamis::proto::FaultCode::MessageTooLarge,
                    ..
                }
            )),
            "{before:?}"
        );
        assert_eq!(
            actions(&v),
            vec![Action::Tag],
            "never a quarantine not kept"
        );
        assert!(
            v.reasons
                .iter()
                .any(|r| r.contains("not held") && r.contains("max_message")),
            "{:?}",
            v.reasons
        );
        assert!(
            v.edits.iter().any(|e| e.name == "X-Tamis-Verdict"),
            "delivered tagged"
        );
        assert_eq!(
            reader(&store_path).held_totals().expect("totals").messages,
            0
        );
        assert_eq!(
            metric_line(
                status,
                "tamis_quarantine_not_held_total{reason=\"over-max-message\"}"
            ),
            Some(1.0)
        );
        assert_eq!(
            metric_line(
                status,
                "tamis_would_quarantine_total{domain=\"hold.test\",why=\"not-held\"}"
            ),
            Some(1.0)
        );
        v
    })
    .await
    .expect("task");
    assert!(d.running.stop().await, "stops and writes the journal");
    let entry = reader(&path)
        .journal_entry(&verdict.verdict_id)
        .expect("read")
        .expect("journalled");
    assert_eq!(
        (entry.outcomes[0].action, entry.outcomes[0].enforced),
        (Action::Tag, Action::Quarantine),
        "the journal records the action sent and the one that was not made"
    );
}

/// PROTOCOL.md §4.5: `ENOUGH` only when no recipient may be quarantined; otherwise the
/// whole message up to max_message is kept, and held byte for byte.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn no_enough_while_a_recipient_may_be_quarantined_and_the_whole_message_is_held() {
    let dir = tempfile::tempdir().expect("temp dir");
    let path = dir.path().join("store.sqlite");
    let d = daemon(config(""), &path, StoreOptions::default(), quick_settings()).await;
    let addr = d.addr;
    let store_path = path.clone();
    tokio::task::spawn_blocking(move || {
        // 9 MiB: past the model's 8 MiB scan limit, within the 10 MiB max_message.
        let mut raw = junk()[4].clone();
        let line = b"Claim your prize now, winners are drawn today, act now.\r\n";
        while raw.len() < 9 << 20 {
            raw.extend_from_slice(line);
        }
        let mut conn = Conn::open(addr);
        conn.message(&["carol@watch.test"], &raw);
        let (before, v) = conn.until_verdict(Duration::from_secs(60));
        assert!(
            before.iter().any(|f| matches!(f, Frame::Enough)),
            "tag-only recipient: the server may say it has enough: {before:?}"
        );
        assert_eq!(actions(&v), vec![Action::Tag]);

        conn.message(&["bob@hold.test"], &raw);
        let (before, v) = conn.until_verdict(Duration::from_secs(60));
        assert!(
            !before.iter().any(|f| matches!(f, Frame::Enough)),
            "no ENOUGH while a recipient may be quarantined: {before:?}"
        );
        assert_eq!(actions(&v), vec![Action::Quarantine]);
        let held = reader(&store_path)
            .get_held(&v.verdict_id)
            .expect("read")
            .expect("held");
        assert_eq!(held.message.len(), raw.len());
        assert!(held.message == raw, "held whole, byte for byte");
    })
    .await
    .expect("task");
    assert!(d.running.stop().await);
}

/// A store the daemon cannot write: the hold fails, the recipients follow the failure
/// mode, the error is logged and counted, the daemon keeps serving, and nothing held
/// before is lost.
mod store_failures {
    use super::*;

    #[tokio::test(flavor = "multi_thread", worker_threads = 2)]
    async fn a_locked_store_defers_or_tags_and_the_daemon_stays_up() {
        for (mode, instead) in [
            (FailureMode::Defer, Action::Defer),
            (FailureMode::Accept, Action::Tag),
        ] {
            let dir = tempfile::tempdir().expect("temp dir");
            let path = dir.path().join("store.sqlite");
            let mut cfg = config("");
            cfg.on_failure = mode;
            let options = StoreOptions {
                busy_timeout: Duration::from_millis(300),
                ..StoreOptions::default()
            };
            let d = daemon(cfg, &path, options, quick_settings()).await;
            let (addr, status) = (d.addr, d.status);
            let store_path = path.clone();
            let refused = tokio::task::spawn_blocking(move || {
                let kept = scan(addr, &["bob@hold.test"], &junk()[5]);
                assert_eq!(actions(&kept), vec![Action::Quarantine]);

                let lock = rusqlite::Connection::open(&store_path).expect("another connection");
                lock.execute_batch("BEGIN EXCLUSIVE").expect("lock");
                let v = scan(addr, &["bob@hold.test", "carol@watch.test"], &junk()[6]);
                lock.execute_batch("ROLLBACK").expect("unlock");
                assert_eq!(actions(&v), vec![instead, Action::Tag], "{mode:?}");
                assert!(
                    v.reasons
                        .iter()
                        .any(|r| r.contains("not held") && r.contains("busy")),
                    "{:?}",
                    v.reasons
                );
                assert!(
                    metric_line(status, "tamis_store_errors_total{kind=\"busy\"}")
                        .is_some_and(|n| n >= 1.0)
                );
                assert_eq!(
                    metric_line(
                        status,
                        "tamis_quarantine_not_held_total{reason=\"store-error\"}"
                    ),
                    Some(1.0)
                );
                // Still serving, and holding again once the lock is gone.
                let after = scan(addr, &["bob@hold.test"], &junk()[7]);
                assert_eq!(actions(&after), vec![Action::Quarantine]);
                let store = reader(&store_path);
                for id in [&kept.verdict_id, &after.verdict_id] {
                    assert!(store.get_held(id).expect("read").is_some(), "{id} kept");
                }
                assert!(store.get_held(&v.verdict_id).expect("read").is_none());
                v.verdict_id
            })
            .await
            .expect("task");
            assert!(d.running.stop().await);
            let entry = reader(&path)
                .journal_entry(&refused)
                .expect("read")
                .expect("the refused hold is journalled with what was sent");
            assert_eq!(
                (entry.outcomes[0].action, entry.outcomes[0].enforced),
                (instead, Action::Quarantine)
            );
            assert_eq!(
                reader(&path).integrity_check().expect("check"),
                Vec::<String>::new()
            );
        }
    }

    #[tokio::test(flavor = "multi_thread", worker_threads = 2)]
    async fn a_store_folder_moved_or_removed_mid_run_is_an_error_not_a_silent_loss() {
        let dir = tempfile::tempdir().expect("temp dir");
        let folder = dir.path().join("state");
        std::fs::create_dir(&folder).expect("mkdir");
        let path = folder.join("store.sqlite");
        let d = daemon(config(""), &path, StoreOptions::default(), quick_settings()).await;
        let (addr, status) = (d.addr, d.status);
        let moved = dir.path().join("moved");
        tokio::task::spawn_blocking(move || {
            let kept = scan(addr, &["bob@hold.test"], &junk()[8]);
            assert_eq!(actions(&kept), vec![Action::Quarantine]);
            std::fs::rename(&folder, &moved).expect("move the store folder away");
            let v = scan(addr, &["bob@hold.test"], &junk()[9]);
            // SQLite goes on writing to a file that was moved or deleted; the daemon must
            // not take that for a message kept at the store's path.
            assert_eq!(
                actions(&v),
                vec![Action::Tag],
                "accept mode: delivered tagged"
            );
            assert!(
                v.reasons.iter().any(|r| r.contains("gone")),
                "{:?}",
                v.reasons
            );
            assert!(
                metric_line(status, "tamis_store_errors_total{kind=\"gone\"}")
                    .is_some_and(|n| n >= 1.0)
            );
            {
                // Nothing held before the move was lost: it is in the file, wherever it
                // went. (The refused message may be there too, having reached the file
                // before the move was seen: then it is delivered and kept, never lost.)
                let store = reader(&moved.join("store.sqlite"));
                let held = store
                    .get_held(&kept.verdict_id)
                    .expect("read")
                    .expect("still held");
                assert!(held.message == junk()[8]);
                // SQLite's own consistency check (PRAGMA integrity_check).
                assert_eq!(
                    store.integrity_check().expect("check"),
                    Vec::<String>::new()
                );
            }
            // Removed altogether: still an error, and the daemon still serves.
            std::fs::remove_dir_all(&moved).expect("remove");
            let gone = scan(addr, &["bob@hold.test"], &junk()[10]);
            assert_eq!(actions(&gone), vec![Action::Tag]);
            let fine = scan(addr, &["carol@watch.test"], &junk()[11]);
            assert_eq!(actions(&fine), vec![Action::Tag], "the daemon stays up");
            assert!(
                metric_line(status, "tamis_store_errors_total{kind=\"gone\"}")
                    .is_some_and(|n| n >= 2.0)
            );
        })
        .await
        .expect("task");
        // Journal entries written into the removed file are lost with it: counted, and
        // the stop reports nothing worse.
        let _ = d.running.stop().await;
    }

    /// RLIMIT_FSIZE stands in for a full disk, as in `tests/it/store.rs`: a child daemon
    /// whose files may not grow past 1 MiB ignores SIGXFSZ and gets EFBIG.
    #[test]
    fn a_full_disk_tags_the_message_and_loses_nothing_held() {
        let dir = tempfile::tempdir().expect("temp dir");
        let store_path = dir.path().join("store.sqlite");
        let small = legitimate_held(&store_path);
        let (relay, status) = (free_port(), free_port());
        let cfg = write_config(dir.path(), relay, status, "");
        let mut child = Command::new("sh")
            .args(["-c", "trap '' XFSZ; ulimit -f 2048; exec \"$0\" \"$@\""])
            .arg(env!("CARGO_BIN_EXE_tamis"))
            .args(["serve", "--config"])
            .arg(&cfg)
            .stdout(Stdio::null())
            .stderr(Stdio::piped())
            .spawn()
            .expect("start the daemon");
        let relay_addr = SocketAddr::from(([127, 0, 0, 1], relay));
        let status_addr = SocketAddr::from(([127, 0, 0, 1], status));
        wait_up(&mut child, relay_addr);
        let raw = junk_with_random_attachment(3 << 20);
        let v = scan(relay_addr, &["bob@hold.test"], &raw);
        assert_eq!(actions(&v), vec![Action::Tag], "{:?}", v.reasons);
        assert!(
            v.reasons.iter().any(|r| r.contains("not held")),
            "{:?}",
            v.reasons
        );
        let errors = ["full", "io"]
            .iter()
            .filter_map(|k| {
                metric_line(
                    status_addr,
                    &format!("tamis_store_errors_total{{kind=\"{k}\"}}"),
                )
            })
            .sum::<f64>();
        assert!(errors >= 1.0, "the store error is counted");
        // A small message still fits: the daemon goes on.
        let after = scan(relay_addr, &["bob@hold.test"], &junk()[13]);
        assert_eq!(actions(&after), vec![Action::Quarantine]);
        stop(&mut child);
        let store = reader(&store_path);
        assert_eq!(
            store.integrity_check().expect("check"),
            Vec::<String>::new()
        );
        assert!(
            store.get_held(&small).expect("read").is_some(),
            "held before: still held"
        );
        assert!(store.get_held(&after.verdict_id).expect("read").is_some());
        assert!(store.get_held(&v.verdict_id).expect("read").is_none());
    }
}

/// Holds one message directly in a new store at `path`; returns its verdict id.
fn legitimate_held(path: &Path) -> String {
    let store = SqliteStore::open(path, StoreOptions::default()).expect("open");
    let raw = &legitimate(1)[0];
    let entry = JournalEntry {
        verdict_id: "EARLIER".to_string(),
        at: tamis::store::record::now(),
        model: "test model".to_string(),
        margin: Some(0.7),
        probability: None,
        outcomes: tamis::store::DomainOutcome::group([(
            "bob@hold.test",
            Action::Quarantine,
            Action::Quarantine,
        )]),
        size: raw.len() as u64,
        sender_domain: None,
        reasons: Vec::new(),
        scanned: true,
        subject: None,
        message_key: None,
    };
    store
        .hold(
            &entry,
            &Hold {
                sender: "",
                recipients: &["bob@hold.test".to_string()],
                message: raw,
            },
        )
        .expect("hold");
    entry.verdict_id
}

/// A junk message in several MIME parts with one more: an attachment of `size` random
/// bytes, whose compressed copy alone is larger than the file-size limit of the full-disk
/// test. Attachments are not read as text, so it still scores as junk.
fn junk_with_random_attachment(size: usize) -> Vec<u8> {
    let engine = Engine::new(
        model().clone(),
        "test model",
        Decisions {
            policy: Default::default(),
            headers: Default::default(),
            on_failure: Default::default(),
        },
    )
    .expect("engine");
    let mut rng = tamis::rng::SplitMix64::new(7);
    let mut blob = Vec::new();
    while blob.len() < size {
        blob.extend_from_slice(&rng.next_u64().to_le_bytes());
    }
    let mut part = b"Content-Type: application/octet-stream\r\nContent-Transfer-Encoding: base64\r\nContent-Disposition: attachment; filename=\"data.bin\"\r\n\r\n".to_vec();
    for line in base64(&blob).as_bytes().chunks(76) {
        part.extend_from_slice(line);
        part.extend_from_slice(b"\r\n");
    }
    for raw in junk() {
        let text = String::from_utf8_lossy(raw);
        let Some(boundary) = text
            .split("boundary=\"")
            .nth(1)
            .and_then(|rest| rest.split('"').next())
        else {
            continue;
        };
        let close = format!("--{boundary}--");
        let Some(at) = text.rfind(&close) else {
            continue;
        };
        let mut out = raw[..at].to_vec();
        out.extend_from_slice(format!("--{boundary}\r\n").as_bytes());
        out.extend_from_slice(&part);
        out.extend_from_slice(&raw[at..]);
        if engine.score(&out).is_ok_and(|s| s.margin >= 1.0) {
            return out;
        }
    }
    panic!("no multipart demo junk still scores as junk with an attachment added");
}

fn base64(bytes: &[u8]) -> String {
    const A: &[u8; 64] = b"ABCDEFGHIJKLMNOPQRSTUVWXYZabcdefghijklmnopqrstuvwxyz0123456789+/";
    let mut out = String::new();
    for c in bytes.chunks(3) {
        let n = (u32::from(c[0]) << 16)
            | (u32::from(*c.get(1).unwrap_or(&0)) << 8)
            | u32::from(*c.get(2).unwrap_or(&0));
        for (i, shift) in [18, 12, 6, 0].into_iter().enumerate() {
            if i <= c.len() {
                out.push(A[((n >> shift) & 63) as usize] as char);
            } else {
                out.push('=');
            }
        }
    }
    out
}

/// A configuration file for a child daemon: the quarantining sections, JSON logs and the
/// store beside it (unless `extra` says otherwise).
fn write_config(dir: &Path, relay: u16, status: u16, extra: &str) -> PathBuf {
    let path = dir.join("tamis.toml");
    let store = if extra.contains("[store]") {
        String::new()
    } else {
        "[store]\npath = \"store.sqlite\"\n".to_string()
    };
    std::fs::write(
        &path,
        format!(
            "metrics = \"127.0.0.1:{status}\"\n[listen]\ntcp = \"127.0.0.1:{relay}\"\n[logging]\nformat = \"json\"\n{store}{extra}\n{SECTIONS}"
        ),
    )
    .expect("write config");
    path
}

fn wait_up(child: &mut Child, relay: SocketAddr) {
    for _ in 0..300 {
        if let Some(exit) = child.try_wait().expect("poll") {
            let mut err = String::new();
            if let Some(mut e) = child.stderr.take() {
                let _ = e.read_to_string(&mut err);
            }
            panic!("the daemon exited at start ({exit:?}): {err}");
        }
        if Client::connect(&relay.to_string(), Duration::from_secs(2)).is_ok() {
            return;
        }
        std::thread::sleep(Duration::from_millis(50));
    }
    let _ = child.kill();
    panic!("the daemon did not start listening");
}

/// SIGTERM, then the exit; returns what it wrote on stderr.
fn stop(child: &mut Child) -> String {
    let ok = Command::new("kill")
        .args(["-TERM", &child.id().to_string()])
        .status()
        .expect("kill")
        .success();
    assert!(ok);
    let mut err = String::new();
    if let Some(mut e) = child.stderr.take() {
        let _ = e.read_to_string(&mut err);
    }
    let exit = child.wait().expect("wait");
    assert!(exit.success(), "graceful exit: {exit:?}: {err}");
    err
}

#[test]
fn tag_only_mode_journals_counts_and_logs_the_quarantine_it_would_have_made() {
    let dir = tempfile::tempdir().expect("temp dir");
    let (relay, status) = (free_port(), free_port());
    let cfg = write_config(dir.path(), relay, status, "");
    let mut child = Command::new(env!("CARGO_BIN_EXE_tamis"))
        .args(["serve", "--config"])
        .arg(&cfg)
        .stdout(Stdio::null())
        .stderr(Stdio::piped())
        .spawn()
        .expect("start the daemon");
    let relay = SocketAddr::from(([127, 0, 0, 1], relay));
    let status = SocketAddr::from(([127, 0, 0, 1], status));
    wait_up(&mut child, relay);
    let v = scan(relay, &["carol@watch.test"], &junk()[14]);
    let plain = scan(relay, &["carol@watch.test"], &legitimate(1)[0]);
    assert_eq!(actions(&v), vec![Action::Tag]);
    assert_eq!(actions(&plain), vec![Action::Accept]);
    assert!(
        v.reasons
            .iter()
            .any(|r| r == "would be quarantined with tag_only off"),
        "{:?}",
        v.reasons
    );
    assert_eq!(
        metric_line(
            status,
            "tamis_would_quarantine_total{domain=\"watch.test\",why=\"tag-only\"}"
        ),
        Some(1.0)
    );
    let err = stop(&mut child);
    assert!(
        err.contains(&format!(
            "tamis: store {} (configured in [store] path)",
            dir.path().join("store.sqlite").display()
        )),
        "{err}"
    );
    let line = err
        .lines()
        .filter_map(|l| serde_json::from_str::<serde_json::Value>(l).ok())
        .find(|e| e["fields"]["verdict_id"] == v.verdict_id.as_str())
        .unwrap_or_else(|| panic!("no log line for {}: {err}", v.verdict_id));
    assert_eq!(line["fields"]["action"], "tag", "{line}");
    assert_eq!(line["fields"]["would_be"], "quarantine", "{line}");
    assert_eq!(line["fields"]["held"], "no", "{line}");

    // Written at shutdown at the latest; nothing held.
    let store = reader(&dir.path().join("store.sqlite"));
    let entry = store
        .journal_entry(&v.verdict_id)
        .expect("read")
        .expect("journalled");
    assert_eq!(
        (entry.outcomes[0].action, entry.outcomes[0].enforced),
        (Action::Tag, Action::Quarantine)
    );
    assert!(
        !entry.reasons.is_empty(),
        "features named for a tagged verdict"
    );
    let accepted = store
        .journal_entry(&plain.verdict_id)
        .expect("read")
        .expect("journalled");
    assert_eq!(
        (accepted.outcomes[0].action, accepted.outcomes[0].enforced),
        (Action::Accept, Action::Accept)
    );
    assert!(
        accepted.reasons.is_empty(),
        "a plain accept names no feature"
    );
    assert_eq!(store.held_totals().expect("totals").messages, 0);
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn shutdown_writes_every_queued_journal_entry() {
    let dir = tempfile::tempdir().expect("temp dir");
    let path = dir.path().join("store.sqlite");
    let settings = KeepingSettings {
        // Batches would wait a minute: only the shutdown can have written them.
        batch: BatchSettings {
            max_batch: 100_000,
            max_delay: Duration::from_secs(60),
            queue: 100_000,
        },
        ..quick_settings()
    };
    let d = daemon(config(""), &path, StoreOptions::default(), settings).await;
    let addr = d.addr;
    let ids = tokio::task::spawn_blocking(move || {
        let mut client =
            Client::connect(&addr.to_string(), Duration::from_secs(30)).expect("connect");
        let mail = legitimate(40);
        let mut ids = Vec::new();
        for (i, raw) in mail.iter().chain(junk().iter().take(40)).enumerate() {
            let to = if i % 2 == 0 {
                "carol@watch.test"
            } else {
                "x@elsewhere.example"
            };
            let v = client.scan("", &rcpts(&[to]), raw).expect("verdict");
            ids.push(v.verdict_id);
        }
        ids
    })
    .await
    .expect("task");
    let store = reader(&path);
    let before = ids
        .iter()
        .filter(|id| store.journal_entry(id).ok().flatten().is_some())
        .count();
    assert_eq!(before, 0, "nothing written before the batch is due");
    assert!(d.running.stop().await);
    for id in &ids {
        assert!(
            store.journal_entry(id).expect("read").is_some(),
            "{id} journalled at shutdown"
        );
    }
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn held_mail_gauges_and_report_counters_follow_the_store() {
    let dir = tempfile::tempdir().expect("temp dir");
    let path = dir.path().join("store.sqlite");
    // A report recorded before the daemon starts is not counted by it.
    let earlier = legitimate_held(&path);
    reader(&path)
        .report(&NewReport {
            verdict_id: earlier.clone(),
            kind: ReportKind::NotJunk,
            source: ReportSource::Operator,
            domain: None,
            at: tamis::store::record::now(),
            features: None,
        })
        .expect("report");
    let d = daemon(config(""), &path, StoreOptions::default(), quick_settings()).await;
    let (addr, status, metrics) = (d.addr, d.status, Arc::clone(&d.metrics));
    let store_path = path.clone();
    tokio::task::spawn_blocking(move || {
        let a = scan(addr, &["bob@hold.test"], &junk()[15]);
        let b = scan(addr, &["bob@hold.test", "carol@watch.test"], &junk()[16]);
        let t = scan(addr, &["carol@watch.test"], &junk()[17]);
        let store = reader(&store_path);
        let totals = store.held_totals().expect("totals");
        assert_eq!(totals.messages, 3, "two held now, one before");
        wait_for_metric(status, "tamis_held_messages", 3.0);
        wait_for_metric(status, "tamis_held_bytes", totals.bytes as f64);
        wait_for_metric(status, "tamis_held_stored_bytes", totals.stored_bytes as f64);

        // What the operator commands do, from their own connection: a user says the
        // first held message was legitimate, the second is released, a forged id is
        // refused, and the tagged one is reported junk.
        // A person reports what was delivered to them, long after the journal's batch
        // (at most 100 ms) was written; wait for it here.
        let started = Instant::now();
        while store.journal_entry(&t.verdict_id).expect("read").is_none() {
            assert!(started.elapsed() < Duration::from_secs(10), "never journalled");
            std::thread::sleep(Duration::from_millis(20));
        }
        let now = tamis::store::record::now();
        let user = |id: &str, kind, domain: &str| NewReport {
            verdict_id: id.to_string(),
            kind,
            source: ReportSource::User,
            domain: Some(domain.to_string()),
            at: now,
            features: None,
        };
        store
            .report(&user(&a.verdict_id, ReportKind::NotJunk, "hold.test"))
            .expect("report");
        store
            .report(&user("NO-SUCH-VERDICT", ReportKind::NotJunk, "hold.test"))
            .expect("report");
        store
            .report(&user(&t.verdict_id, ReportKind::Junk, "watch.test"))
            .expect("report");
        match store.claim_release(&b.verdict_id).expect("claim") {
            Claim::Won(_) => {}
            other => panic!("claim: {other:?}"),
        }
        assert!(
            store
                .finish_release(
                    &b.verdict_id,
                    &ReleaseOutcome::Delivered {
                        at: now,
                        features: None
                    }
                )
                .expect("finish")
        );
        let series = |domain: &str, kind: &str, source: &str, enforced: &str| {
            format!(
                "tamis_reports_total{{domain=\"{domain}\",enforced=\"{enforced}\",kind=\"{kind}\",source=\"{source}\"}}"
            )
        };
        wait_for_metric(
            status,
            &series("hold.test", "not-junk", "user", "quarantine"),
            1.0,
        );
        // The release applies to both domains of its verdict; it was held for one.
        wait_for_metric(
            status,
            &series("hold.test", "not-junk", "release", "quarantine"),
            1.0,
        );
        wait_for_metric(
            status,
            &series("watch.test", "not-junk", "release", "quarantine"),
            1.0,
        );
        wait_for_metric(status, "tamis_releases_total{domain=\"hold.test\"}", 1.0);
        wait_for_metric(status, "tamis_releases_total{domain=\"watch.test\"}", 0.0);
        wait_for_metric(
            status,
            &series("watch.test", "junk", "user", "quarantine"),
            1.0,
        );
        wait_for_metric(
            status,
            "tamis_reports_unmatched_total{status=\"unknown-verdict\"}",
            1.0,
        );
        wait_for_metric(status, "tamis_held_messages", 2.0);
        assert_eq!(
            metric_line(
                status,
                &series("hold.test", "not-junk", "operator", "quarantine")
            ),
            Some(0.0),
            "the report made before the start is not counted"
        );
        assert_eq!(metrics.held().0, 2);

        // External check: `promtool check metrics` (Debian's prometheus package).
        let body = http_get(status, "/metrics")
            .split("\r\n\r\n")
            .nth(1)
            .expect("body")
            .to_string();
        let mut promtool = Command::new("promtool")
            .args(["check", "metrics"])
            .stdin(Stdio::piped())
            .stdout(Stdio::piped())
            .stderr(Stdio::piped())
            .spawn()
            .expect("promtool");
        promtool
            .stdin
            .take()
            .expect("stdin")
            .write_all(body.as_bytes())
            .expect("feed");
        let out = promtool.wait_with_output().expect("promtool");
        assert!(
            out.status.success() && out.stdout.is_empty() && out.stderr.is_empty(),
            "promtool: {}{}",
            String::from_utf8_lossy(&out.stdout),
            String::from_utf8_lossy(&out.stderr)
        );
    })
    .await
    .expect("task");
    assert!(d.running.stop().await);
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn retention_purges_expired_mail_and_puts_stale_claims_back() {
    let dir = tempfile::tempdir().expect("temp dir");
    let path = dir.path().join("store.sqlite");
    let fresh = legitimate_held(&path);
    let old_id = {
        let store = reader(&path);
        let raw = &legitimate(2)[1];
        let entry = JournalEntry {
            verdict_id: "OLD".to_string(),
            // Past the 30 days of quarantine_days.
            at: tamis::store::record::now() - 40 * 86_400,
            model: "test model".to_string(),
            margin: Some(0.9),
            probability: None,
            outcomes: tamis::store::DomainOutcome::group([(
                "bob@hold.test",
                Action::Quarantine,
                Action::Quarantine,
            )]),
            size: raw.len() as u64,
            sender_domain: None,
            reasons: Vec::new(),
            scanned: true,
            subject: None,
            message_key: None,
        };
        store
            .hold(
                &entry,
                &Hold {
                    sender: "",
                    recipients: &["bob@hold.test".to_string()],
                    message: raw,
                },
            )
            .expect("hold");
        // A release that died with its process.
        assert!(matches!(
            store.claim_release(&fresh).expect("claim"),
            Claim::Won(_)
        ));
        entry.verdict_id
    };
    // Claims of a second or more are stale here.
    std::thread::sleep(Duration::from_millis(1100));
    let settings = KeepingSettings {
        purge_every: Duration::from_millis(200),
        stale_claim: Duration::from_secs(1),
        ..quick_settings()
    };
    let d = daemon(config(""), &path, StoreOptions::default(), settings).await;
    let status = d.status;
    let store_path = path.clone();
    tokio::task::spawn_blocking(move || {
        wait_for_metric(status, "tamis_purged_total{what=\"held\"}", 1.0);
        let store = reader(&store_path);
        assert!(store.get_held(&old_id).expect("read").is_none(), "expired");
        let started = Instant::now();
        loop {
            let state = store
                .get_held(&fresh)
                .expect("read")
                .map(|m| m.summary.state);
            if state == Some(HeldState::Held) {
                break;
            }
            assert!(
                started.elapsed() < Duration::from_secs(10),
                "the stale claim was not put back: {state:?}"
            );
            std::thread::sleep(Duration::from_millis(50));
        }
        let listed = store.list_held(&HeldFilter::default()).expect("list");
        assert_eq!(listed.len(), 1);
    })
    .await
    .expect("task");
    assert!(d.running.stop().await);
}

/// The relay's view of one message in the crash test.
#[derive(Debug, Clone)]
struct Sent {
    raw: Vec<u8>,
    /// The verdict id and actions, when a verdict came.
    answer: Option<(String, Vec<Action>)>,
}

/// Four relay connections stream distinct junk to a quarantining domain until the daemon
/// is killed with SIGKILL; a new daemon on the same store gets every unanswered message
/// again, as a relay retries. Every message answered with quarantine is in the store
/// under the verdict id it was answered with, none twice, and the file passes SQLite's
/// own check.
#[test]
fn a_daemon_killed_mid_run_loses_and_duplicates_no_held_message() {
    let dir = tempfile::tempdir().expect("temp dir");
    let store_path = dir.path().join("store.sqlite");
    let (relay, status) = (free_port(), free_port());
    let cfg = write_config(dir.path(), relay, status, "");
    let relay = SocketAddr::from(([127, 0, 0, 1], relay));
    let spawn = || {
        Command::new(env!("CARGO_BIN_EXE_tamis"))
            .args(["serve", "--config"])
            .arg(&cfg)
            .stdout(Stdio::null())
            .stderr(Stdio::null())
            .spawn()
            .expect("start the daemon")
    };
    let mut child = spawn();
    wait_up(&mut child, relay);
    // Distinct messages: each junk message once per connection, told apart by a field.
    let mail: Vec<Vec<Vec<u8>>> = (0..4)
        .map(|c| {
            junk()
                .iter()
                .map(|raw| {
                    let mut m = format!("X-Test-Copy: {c}\r\n").into_bytes();
                    m.extend_from_slice(raw);
                    m
                })
                .collect()
        })
        .collect();
    let threads: Vec<_> = mail
        .into_iter()
        .map(|mine| {
            std::thread::spawn(move || {
                let mut out: Vec<Sent> = Vec::new();
                let Ok(mut client) = Client::connect(&relay.to_string(), Duration::from_secs(10))
                else {
                    return mine
                        .into_iter()
                        .map(|raw| Sent { raw, answer: None })
                        .collect();
                };
                let mut dead = false;
                for raw in mine {
                    let answer = if dead {
                        None
                    } else {
                        match client.scan("alice@sender.example", &rcpts(&["bob@hold.test"]), &raw)
                        {
                            Ok(v) => Some((v.verdict_id.clone(), actions(&v))),
                            Err(_) => {
                                dead = true;
                                None
                            }
                        }
                    };
                    out.push(Sent { raw, answer });
                }
                out
            })
        })
        .collect();
    // Kill once some verdicts are out and traffic is flowing.
    let started = Instant::now();
    let status = SocketAddr::from(([127, 0, 0, 1], status));
    while metric_line(status, "tamis_holds_total{outcome=\"held\"}").unwrap_or(0.0) < 20.0 {
        assert!(started.elapsed() < Duration::from_secs(60), "no traffic");
        std::thread::sleep(Duration::from_millis(5));
    }
    child.kill().expect("SIGKILL");
    let _ = child.wait();
    let mut sent: Vec<Sent> = threads
        .into_iter()
        .flat_map(|t| t.join().expect("client thread"))
        .collect();
    let answered = sent.iter().filter(|s| s.answer.is_some()).count();
    assert!(
        answered >= 20 && answered < sent.len(),
        "{answered} of {}",
        sent.len()
    );

    // The relay retries what was not answered, on a new daemon over the same store.
    let mut child = spawn();
    wait_up(&mut child, relay);
    let mut client = Client::connect(&relay.to_string(), Duration::from_secs(30)).expect("connect");
    let mut retried_already_held = 0;
    for s in sent.iter_mut().filter(|s| s.answer.is_none()) {
        let v = client
            .scan("alice@sender.example", &rcpts(&["bob@hold.test"]), &s.raw)
            .expect("verdict after the restart");
        s.answer = Some((v.verdict_id.clone(), actions(&v)));
    }
    // Some answered messages sent again, as after a lost verdict: their first id comes back.
    for s in sent.iter().filter(|s| s.answer.is_some()).take(5) {
        let v = client
            .scan("alice@sender.example", &rcpts(&["bob@hold.test"]), &s.raw)
            .expect("verdict");
        if let Some((id, _)) = &s.answer
            && v.verdict_id == *id
        {
            retried_already_held += 1;
        }
    }
    stop(&mut child);
    assert_eq!(
        retried_already_held, 5,
        "a message held once is answered with its id"
    );

    let store = reader(&store_path);
    // SQLite's own consistency check (PRAGMA integrity_check).
    assert_eq!(
        store.integrity_check().expect("check"),
        Vec::<String>::new()
    );
    let mut ids = std::collections::BTreeSet::new();
    for s in &sent {
        let Some((id, acts)) = &s.answer else {
            panic!("unanswered after the retry");
        };
        assert_eq!(acts, &vec![Action::Quarantine]);
        let held = store
            .get_held(id)
            .expect("read")
            .unwrap_or_else(|| panic!("{id} answered with quarantine but not in the store"));
        assert!(held.message == s.raw, "{id}: held bytes differ");
        assert!(ids.insert(id.clone()), "{id} answered for two messages");
    }
    let totals = store.held_totals().expect("totals");
    assert_eq!(
        totals.messages as usize,
        sent.len(),
        "every message held exactly once"
    );
}

/// With no `[store] path`, the daemon uses the service's state directory, or the user's
/// own state folder (created, mode 0700), and says which; a store it cannot open stops the
/// start with the path in the message.
#[test]
fn the_default_store_location_works_for_a_service_and_for_a_user() {
    use std::os::unix::fs::PermissionsExt;
    let dir = tempfile::tempdir().expect("temp dir");
    let state = dir.path().join("state");
    std::fs::create_dir(&state).expect("mkdir");
    let home = dir.path().join("home");
    std::fs::create_dir(&home).expect("mkdir");
    let system_usable = Path::new("/var/lib/tamis").is_dir();
    let cases: Vec<(Vec<(&str, PathBuf)>, PathBuf)> = vec![
        (
            vec![("STATE_DIRECTORY", state.clone())],
            state.join("store.sqlite"),
        ),
        (
            vec![("HOME", home.clone())],
            home.join(".local/state/tamis/store.sqlite"),
        ),
    ];
    for (env, expected) in cases {
        if system_usable && env[0].0 == "HOME" {
            // This machine has a system state folder, which comes first.
            continue;
        }
        let (relay, status) = (free_port(), free_port());
        // No [store] section: the default applies.
        let cfg = write_config(dir.path(), relay, status, "[store]\n");
        let mut cmd = Command::new(env!("CARGO_BIN_EXE_tamis"));
        cmd.args(["serve", "--config"])
            .arg(&cfg)
            .env_remove("STATE_DIRECTORY")
            .env_remove("XDG_STATE_HOME")
            .stdout(Stdio::null())
            .stderr(Stdio::piped());
        for (k, v) in &env {
            cmd.env(k, v);
        }
        let mut child = cmd.spawn().expect("start");
        wait_up(&mut child, SocketAddr::from(([127, 0, 0, 1], relay)));
        let err = stop(&mut child);
        assert!(
            err.contains(&format!("tamis: store {} (", expected.display())),
            "{env:?}: {err}"
        );
        assert!(expected.is_file(), "{}", expected.display());
        let folder = expected.parent().expect("folder");
        if env[0].0 == "HOME" {
            let mode = std::fs::metadata(folder)
                .expect("stat")
                .permissions()
                .mode()
                & 0o777;
            assert_eq!(mode, 0o700, "the user's state folder is private");
        }
    }

    // A configured store whose folder is missing: a clear error naming the path.
    let (relay, status) = (free_port(), free_port());
    let missing = dir.path().join("no-such-folder").join("store.sqlite");
    let cfg = write_config(
        dir.path(),
        relay,
        status,
        &format!("[store]\npath = \"{}\"\n", missing.display()),
    );
    let out = Command::new(env!("CARGO_BIN_EXE_tamis"))
        .args(["serve", "--config"])
        .arg(&cfg)
        .output()
        .expect("run");
    let err = String::from_utf8_lossy(&out.stderr);
    assert_eq!(out.status.code(), Some(1), "{err}");
    assert!(
        err.contains(&missing.display().to_string()) && err.contains("does not exist"),
        "{err}"
    );
}

/// The false-positive rate per domain that README's PromQL gives from the daemon's
/// counters, evaluated by a real Prometheus server scraping the daemon, equals the rate
/// the store's figures compute from the journal and the reports.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn the_documented_promql_gives_the_false_positive_rate_of_the_figures() {
    let dir = tempfile::tempdir().expect("temp dir");
    let path = dir.path().join("store.sqlite");
    let d = daemon(config(""), &path, StoreOptions::default(), quick_settings()).await;
    let (addr, status) = (d.addr, d.status);
    let store_path = path.clone();
    let prom_dir = dir.path().join("prometheus");
    tokio::task::spawn_blocking(move || {
        let readme = include_str!("../../README.md");
        let query = promql_block(readme, "tamis_reports_total").replace("[7d]", "[1h]");
        // External check: a real Prometheus server (Debian's prometheus package).
        let port = free_port();
        std::fs::create_dir(&prom_dir).expect("mkdir");
        let config = prom_dir.join("prometheus.yml");
        std::fs::write(
            &config,
            format!(
                "global:\n  scrape_interval: 1s\nscrape_configs:\n  - job_name: tamis\n    static_configs:\n      - targets: ['{status}']\n"
            ),
        )
        .expect("write config");
        let mut server = Command::new("prometheus")
            .arg(format!("--config.file={}", config.display()))
            .arg(format!("--storage.tsdb.path={}", prom_dir.join("data").display()))
            .arg(format!("--web.listen-address=127.0.0.1:{port}"))
            .stdout(Stdio::null())
            .stderr(Stdio::null())
            .spawn()
            .expect("prometheus is installed by scripts/test");
        let api = SocketAddr::from(([127, 0, 0, 1], port));
        let value = |q: &str| -> Option<f64> {
            TcpStream::connect(api).ok()?;
            let reply = http_get(
                api,
                &format!("/api/v1/query?query={}", percent_encode(q)),
            );
            let body = reply.split("\r\n\r\n").nth(1)?;
            let json: serde_json::Value = serde_json::from_str(body).ok()?;
            json["data"]["result"]
                .as_array()?
                .iter()
                .find(|r| r["metric"]["domain"] == "hold.test")?["value"][1]
                .as_str()?
                .parse()
                .ok()
        };
        // The first scrape sees the counters at zero.
        let started = Instant::now();
        while value("tamis_messages_total{action=\"accept\"}").is_none() {
            assert!(started.elapsed() < Duration::from_secs(60), "never scraped");
            std::thread::sleep(Duration::from_millis(200));
        }
        // Traffic: legitimate mail accepted, junk held; people say some held mail was
        // legitimate.
        let mut client =
            Client::connect(&addr.to_string(), Duration::from_secs(30)).expect("connect");
        let to = rcpts(&["bob@hold.test"]);
        let accepted = legitimate(12);
        for raw in &accepted {
            let v = client.scan("alice@sender.example", &to, raw).expect("verdict");
            assert_eq!(actions(&v), vec![Action::Accept]);
        }
        let mut held = Vec::new();
        for raw in junk().iter().skip(20).take(6) {
            let v = client.scan("alice@sender.example", &to, raw).expect("verdict");
            assert_eq!(actions(&v), vec![Action::Quarantine]);
            held.push(v.verdict_id);
        }
        let store = reader(&store_path);
        for id in held.iter().take(2) {
            store
                .report(&NewReport {
                    verdict_id: id.clone(),
                    kind: ReportKind::NotJunk,
                    source: ReportSource::User,
                    domain: Some("hold.test".to_string()),
                    at: tamis::store::record::now(),
                    features: None,
                })
                .expect("report");
        }
        wait_for_metric(
            status,
            "tamis_reports_total{domain=\"hold.test\",enforced=\"quarantine\",kind=\"not-junk\",source=\"user\"}",
            2.0,
        );
        // The figures over the same mail, from the store.
        let started = Instant::now();
        let figures = loop {
            let f = store.figures(0, Some("hold.test")).expect("figures");
            if f.first().is_some_and(|f| f.by_action.accept == 12) {
                break f;
            }
            assert!(started.elapsed() < Duration::from_secs(10), "journal incomplete");
            std::thread::sleep(Duration::from_millis(50));
        };
        let expected = figures[0].false_positives.value.expect("a rate");
        assert!((expected - 2.0 / 14.0).abs() < 1e-12, "{expected}");
        // Prometheus catches up within a few scrapes.
        let started = Instant::now();
        let mut got = None;
        while started.elapsed() < Duration::from_secs(30) {
            got = value(&query);
            if got.is_some_and(|g| (g - expected).abs() < 1e-9) {
                break;
            }
            std::thread::sleep(Duration::from_millis(500));
        }
        let _ = server.kill();
        let _ = server.wait();
        assert!(
            got.is_some_and(|g| (g - expected).abs() < 1e-9),
            "PromQL gave {got:?}, the figures {expected}: {query}"
        );
    })
    .await
    .expect("task");
    assert!(d.running.stop().await);
}

/// The text of the first ```promql block of `text` that mentions `needle`, without its
/// comment lines.
fn promql_block(text: &str, needle: &str) -> String {
    text.split("```promql")
        .skip(1)
        .filter_map(|rest| rest.split("```").next())
        .find(|block| block.contains(needle))
        .unwrap_or_else(|| panic!("README has no ```promql block with {needle}"))
        .lines()
        .filter(|l| !l.trim_start().starts_with('#'))
        .collect::<Vec<_>>()
        .join(" ")
}

fn percent_encode(text: &str) -> String {
    text.bytes()
        .map(|b| match b {
            b'A'..=b'Z' | b'a'..=b'z' | b'0'..=b'9' | b'-' | b'_' | b'.' | b'~' => {
                (b as char).to_string()
            }
            _ => format!("%{b:02X}"),
        })
        .collect()
}
