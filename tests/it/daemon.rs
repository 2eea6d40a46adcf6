//! The daemon on loopback: the relay protocol end to end, the independent Python client, the
//! hostile inputs of the issue, shutdown, and its metrics checked by promtool and scraped by
//! a real Prometheus server.

use std::io::{Read, Write};
use std::net::{SocketAddr, TcpStream};
use std::sync::{Arc, OnceLock};
use std::time::Duration;

use bytes::BytesMut;
use tamis::config::Config;
use tamis::metrics::Metrics;
use tamis::model::LinearModel;
use tamis::proto::client::Client;
use tamis::proto::{FaultCode, Frame, encode_frame, parse_frame};
use tamis::server::engine::{Decisions, Engine, SharedEngine};
use tamis::server::listen::{Running, start};

/// The built-in demonstration model, trained once for the whole test binary.
pub(crate) fn model() -> &'static LinearModel {
    static MODEL: OnceLock<LinearModel> = OnceLock::new();
    MODEL.get_or_init(|| tamis::model::builtin::demonstration_model().expect("builds"))
}

fn loopback() -> Config {
    let mut config = Config::default();
    config.listen.tcp = Some("127.0.0.1:0".parse().expect("addr"));
    config.metrics = Some("127.0.0.1:0".parse().expect("addr"));
    config.store.path = fresh_store_path();
    config
}

/// A store file of its own for each daemon, in one temporary folder for the test binary
/// (never the user's own state folder).
pub(crate) fn fresh_store_path() -> std::path::PathBuf {
    use std::sync::atomic::{AtomicUsize, Ordering};
    static DIR: OnceLock<tempfile::TempDir> = OnceLock::new();
    static NEXT: AtomicUsize = AtomicUsize::new(0);
    let dir = DIR.get_or_init(|| {
        tempfile::Builder::new()
            .prefix("tamis-it-stores")
            .tempdir()
            .expect("temp dir")
    });
    dir.path().join(format!(
        "store-{}.sqlite",
        NEXT.fetch_add(1, Ordering::SeqCst)
    ))
}

async fn daemon(config: Config) -> (Running, Arc<Metrics>) {
    let decisions = Decisions {
        policy: config.policy.clone(),
        headers: config.headers.clone(),
        on_failure: config.on_failure,
    };
    let engine = Engine::new(model().clone(), "test model", decisions).expect("engine");
    let metrics = Arc::new(Metrics::new(config.policy.domains().keys()).expect("metrics"));
    tamis::server::build::describe_model(&metrics, engine.model());
    let running = start(&config, SharedEngine::new(engine), Arc::clone(&metrics))
        .await
        .expect("binds on loopback");
    (running, metrics)
}

fn message(n: usize) -> Vec<u8> {
    tamis::demo::generate(21, n + 1)
        .last()
        .expect("a message")
        .bytes
}

/// Raw conversation helper: writes frames or bytes, reads frames back.
struct Raw {
    stream: TcpStream,
    buf: BytesMut,
}

impl Raw {
    fn connect(addr: SocketAddr) -> Raw {
        let stream = TcpStream::connect(addr).expect("connect");
        stream
            .set_read_timeout(Some(Duration::from_secs(20)))
            .expect("timeout");
        Raw {
            stream,
            buf: BytesMut::new(),
        }
    }

    fn send(&mut self, frame: &Frame) {
        let mut out = BytesMut::new();
        encode_frame(frame, &mut out).expect("encodes");
        self.stream.write_all(&out).expect("write");
    }

    /// Starts a message: envelope sender and one recipient.
    fn open_message(&mut self) {
        self.send(&Frame::Sender {
            address: "a@example.net".into(),
        });
        self.send(&Frame::Recipient {
            address: "b@example.org".into(),
        });
    }

    /// Several frames in one write, so they arrive together.
    fn send_together(&mut self, frames: &[Frame]) {
        let mut out = BytesMut::new();
        for frame in frames {
            encode_frame(frame, &mut out).expect("encodes");
        }
        self.stream.write_all(&out).expect("write");
    }

    fn bytes(&mut self, bytes: &[u8]) {
        self.stream.write_all(bytes).expect("write");
    }

    /// The next frame, or `None` when the server closed the connection.
    fn next(&mut self) -> Option<Frame> {
        self.next_within(1 << 20)
    }

    /// The next frame, which must fit `max_frame` (the limit this client announced).
    fn next_within(&mut self, max_frame: u32) -> Option<Frame> {
        loop {
            if let Some((frame, used)) =
                parse_frame(&self.buf, max_frame).expect("server frames parse within the limit")
            {
                let _ = self.buf.split_to(used);
                return Some(frame);
            }
            let mut chunk = [0u8; 4096];
            match self.stream.read(&mut chunk) {
                Ok(0) | Err(_) => return None,
                Ok(n) => self.buf.extend_from_slice(&chunk[..n]),
            }
        }
    }

    fn hello(addr: SocketAddr) -> Raw {
        let mut raw = Raw::connect(addr);
        raw.send(&Frame::Hello {
            version: 1,
            max_frame: 1 << 20,
            client: "test".into(),
            secret: None,
        });
        assert!(matches!(raw.next(), Some(Frame::Welcome { .. })));
        raw
    }

    /// Reads until a fatal fault and the close; returns the fault code.
    fn fatal(&mut self) -> FaultCode {
        loop {
            match self.next() {
                Some(Frame::Fault {
                    code, fatal: true, ..
                }) => {
                    assert!(
                        self.next().is_none(),
                        "the server closes after a fatal fault"
                    );
                    return code;
                }
                Some(_) => continue,
                None => panic!("closed without a fatal fault"),
            }
        }
    }
}

/// A fresh client still gets a verdict: the daemon is healthy after the abuse.
fn still_serves(addr: SocketAddr) {
    let mut client = Client::connect(&addr.to_string(), Duration::from_secs(20)).expect("connect");
    let verdict = client
        .scan(
            "a@example.net",
            &["b@uni-lindqvist.test".to_string()],
            &message(0),
        )
        .expect("verdict");
    assert_eq!(verdict.recipients.len(), 1);
    assert!(verdict.margin.is_finite());
}

pub(crate) fn http_get(addr: SocketAddr, path: &str) -> String {
    let mut s = TcpStream::connect(addr).expect("connect");
    s.set_read_timeout(Some(Duration::from_secs(10)))
        .expect("timeout");
    write!(s, "GET {path} HTTP/1.1\r\nHost: localhost\r\n\r\n").expect("write");
    let mut out = String::new();
    let _ = s.read_to_string(&mut out);
    out
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn verdicts_per_recipient_domain_with_tag_header() {
    let (running, _) = daemon(loopback()).await;
    let addr = running.tcp.expect("tcp");
    let spam = tamis::demo::generate(5, 60)
        .find(|m| m.label == tamis::Label::Spam)
        .expect("a junk message");
    let verdict = tokio::task::spawn_blocking(move || {
        let mut client =
            Client::connect(&addr.to_string(), Duration::from_secs(20)).expect("connect");
        let rcpts = vec![
            "x@uni-lindqvist.test".to_string(),
            "y@harbourhost.example".to_string(),
        ];
        client
            .scan("s@example.net", &rcpts, &spam.bytes)
            .expect("verdict")
    })
    .await
    .expect("task");
    assert_eq!(verdict.recipients.len(), 2);
    assert_eq!(verdict.recipients[0].address, "x@uni-lindqvist.test");
    assert!(
        verdict.margin > 0.0,
        "demo junk scores positive: {}",
        verdict.margin
    );
    // Built-in defaults are tag-only: junk is tagged, never quarantined.
    assert!(
        verdict
            .recipients
            .iter()
            .all(|r| r.action == tamis::proto::Action::Tag)
    );
    let header = verdict
        .edits
        .iter()
        .find(|e| e.name == "X-Tamis-Verdict")
        .expect("verdict field");
    assert!(
        header
            .value
            .starts_with(&format!("tag; id={}; margin=", verdict.verdict_id))
    );
    assert!(running.stop().await);
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn python_client_replays_vectors_and_agrees_with_tamis_check_on_1000_messages() {
    let (running, _) = daemon(loopback()).await;
    let addr = running.tcp.expect("tcp");
    let root = env!("CARGO_MANIFEST_DIR");
    tokio::task::spawn_blocking(move || {
        // The Python client was written from proto/PROTOCOL.md alone.
        let replay = std::process::Command::new(crate::python::interpreter())
            .arg(format!("{root}/clients/python/replay_vectors.py"))
            .output()
            .expect("run replay");
        let text = String::from_utf8_lossy(&replay.stdout);
        assert!(
            replay.status.success(),
            "{text}{}",
            String::from_utf8_lossy(&replay.stderr)
        );
        assert!(text.trim_end().ends_with(" 0 failed"), "{text}");

        let dir = tempfile::tempdir().expect("temp dir");
        let mut files = Vec::new();
        for m in tamis::demo::generate(33, 1000) {
            let path = dir.path().join(&m.name);
            std::fs::write(&path, &m.bytes).expect("write");
            files.push(path);
        }
        let out = std::process::Command::new(crate::python::interpreter())
            .arg(format!("{root}/clients/python/tamis_client.py"))
            .args(["--connect", &addr.to_string(), "--from", "s@example.net"])
            .args([
                "--rcpt",
                "a@uni-lindqvist.test",
                "--rcpt",
                "b@ostara-tools.example",
            ])
            .args(["--format", "json"])
            .args(&files)
            .output()
            .expect("run the Python client");
        assert!(
            out.status.success(),
            "{}",
            String::from_utf8_lossy(&out.stderr)
        );
        let python: Vec<serde_json::Value> = String::from_utf8_lossy(&out.stdout)
            .lines()
            .map(|l| serde_json::from_str(l).expect("JSON line"))
            .collect();
        assert_eq!(python.len(), 1000, "one verdict per message, one session");
        let mut client =
            Client::connect(&addr.to_string(), Duration::from_secs(20)).expect("connect");
        let rcpts = vec![
            "a@uni-lindqvist.test".to_string(),
            "b@ostara-tools.example".to_string(),
        ];
        for (path, theirs) in files.iter().zip(&python) {
            let raw = std::fs::read(path).expect("read");
            let ours = client.scan("s@example.net", &rcpts, &raw).expect("verdict");
            for r in &ours.recipients {
                assert_eq!(
                    theirs["actions"][&r.address],
                    r.action.as_str(),
                    "{}",
                    path.display()
                );
            }
            let margin = theirs["margin"].as_f64().expect("margin");
            assert!(
                (margin - ours.margin).abs() < 1e-12,
                "{}: {margin} vs {}",
                path.display(),
                ours.margin
            );
        }
    })
    .await
    .expect("task");
    assert!(running.stop().await);
}

mod hostile {
    use super::*;

    async fn check(
        config: Config,
        abuse: impl FnOnce(SocketAddr) -> FaultCode + Send + 'static,
        want: FaultCode,
    ) {
        let (running, metrics) = daemon(config).await;
        let addr = running.tcp.expect("tcp");
        let code = tokio::task::spawn_blocking(move || {
            let code = abuse(addr);
            still_serves(addr);
            code
        })
        .await
        .expect("task");
        assert_eq!(code, want);
        let text = metrics.render();
        let counted = format!(
            "tamis_protocol_errors_total{{kind=\"{}\"}} ",
            want.name().to_lowercase()
        );
        let line = text
            .lines()
            .find(|l| l.to_lowercase().starts_with(&counted.to_lowercase()))
            .unwrap_or_else(|| panic!("no {counted} in\n{text}"));
        assert!(!line.ends_with(" 0"), "{line}");
        assert!(running.stop().await);
    }

    #[tokio::test(flavor = "multi_thread", worker_threads = 2)]
    async fn garbage_bytes() {
        check(
            loopback(),
            |addr| {
                let mut raw = Raw::connect(addr);
                raw.bytes(b"\x00\x00\x00\x05\xee garbage that is no frame");
                raw.fatal()
            },
            FaultCode::UnknownKind,
        )
        .await;
    }

    #[tokio::test(flavor = "multi_thread", worker_threads = 2)]
    async fn four_gibibyte_length_prefix() {
        check(
            loopback(),
            |addr| {
                let mut raw = Raw::connect(addr);
                raw.bytes(&[0xff, 0xff, 0xff, 0xff, 0x01]);
                raw.fatal()
            },
            FaultCode::FrameTooLarge,
        )
        .await;
    }

    #[tokio::test(flavor = "multi_thread", worker_threads = 2)]
    async fn zero_length_frame() {
        check(
            loopback(),
            |addr| {
                let mut raw = Raw::hello(addr);
                raw.bytes(&[0, 0, 0, 0]);
                raw.fatal()
            },
            FaultCode::Malformed,
        )
        .await;
    }

    #[tokio::test(flavor = "multi_thread", worker_threads = 2)]
    async fn body_before_envelope() {
        check(
            loopback(),
            |addr| {
                let mut raw = Raw::hello(addr);
                raw.send(&Frame::Chunk {
                    data: b"early".to_vec(),
                });
                raw.fatal()
            },
            FaultCode::OutOfOrder,
        )
        .await;
    }

    #[tokio::test(flavor = "multi_thread", worker_threads = 2)]
    async fn two_seals() {
        check(
            loopback(),
            |addr| {
                let mut raw = Raw::hello(addr);
                raw.open_message();
                raw.send(&Frame::Seal);
                assert!(matches!(raw.next(), Some(Frame::Verdict(_))));
                raw.send(&Frame::Seal);
                raw.fatal()
            },
            FaultCode::OutOfOrder,
        )
        .await;
    }

    #[tokio::test(flavor = "multi_thread", worker_threads = 2)]
    async fn client_vanishes_mid_message_and_truncated_frame() {
        check(
            short_timeouts(),
            |addr| {
                {
                    let mut raw = Raw::hello(addr);
                    raw.open_message();
                    raw.bytes(&[0, 0, 0, 200, 0x06, 0, 0]);
                }
                // Then one that stalls inside a frame until the read timeout.
                let mut raw = Raw::hello(addr);
                raw.bytes(&[0, 0, 0, 9, 0x09, 1, 2]);
                raw.fatal()
            },
            FaultCode::Idle,
        )
        .await;
    }

    fn short_timeouts() -> Config {
        let mut config = loopback();
        config.limits.read_timeout = Duration::from_millis(500);
        config.limits.idle_timeout = Duration::from_secs(1);
        config
    }

    #[tokio::test(flavor = "multi_thread", worker_threads = 2)]
    async fn a_byte_per_interval_is_cut_by_the_read_timeout() {
        check(
            short_timeouts(),
            |addr| {
                let mut raw = Raw::hello(addr);
                let mut frame = BytesMut::new();
                encode_frame(&Frame::Ping { token: 7 }, &mut frame).expect("encodes");
                // 7 bytes at 200 ms each: 1.4 s on one unfinished frame, against a 500 ms read
                // timeout that counts from the frame's first byte, not from the last read. The
                // fault must already be waiting; a per-read timeout would only fire at 1.9 s.
                for byte in frame.iter().take(7) {
                    let _ = raw.stream.write_all(&[*byte]);
                    std::thread::sleep(Duration::from_millis(200));
                }
                raw.stream
                    .set_read_timeout(Some(Duration::from_millis(100)))
                    .expect("timeout");
                raw.fatal()
            },
            FaultCode::Idle,
        )
        .await;
    }

    #[tokio::test(flavor = "multi_thread", worker_threads = 2)]
    async fn thousands_of_idle_connections_are_closed_and_the_limit_answers_busy() {
        let mut config = short_timeouts();
        config.limits.max_connections = 1800;
        config.limits.idle_timeout = Duration::from_secs(10);
        check(
            config,
            |addr| {
                let idle: Vec<Raw> = (0..1800).map(|_| Raw::hello(addr)).collect();
                let busy: Vec<FaultCode> = (0..200)
                    .map(|_| {
                        let mut extra = Raw::connect(addr);
                        extra.send(&Frame::Hello {
                            version: 1,
                            max_frame: 1 << 20,
                            client: "one too many".into(),
                            secret: None,
                        });
                        extra.fatal()
                    })
                    .collect();
                assert!(busy.iter().all(|c| *c == FaultCode::Busy));
                for mut conn in idle {
                    assert_eq!(conn.fatal(), FaultCode::Idle);
                }
                busy[0]
            },
            FaultCode::Busy,
        )
        .await;
    }

    #[tokio::test(flavor = "multi_thread", worker_threads = 2)]
    async fn message_over_the_size_limit_still_gets_a_verdict() {
        let mut config = loopback();
        config.limits.max_message_bytes = 64 * 1024;
        check(
            config,
            |addr| {
                let mut raw = Raw::hello(addr);
                raw.open_message();
                raw.send(&Frame::Field {
                    name: "Subject".into(),
                    value: b"big".to_vec(),
                });
                for _ in 0..8 {
                    raw.send(&Frame::Chunk {
                        data: vec![b'x'; 16 * 1024],
                    });
                }
                raw.send(&Frame::Seal);
                let mut notices = Vec::new();
                loop {
                    match raw.next().expect("open") {
                        Frame::Fault {
                            code, fatal: false, ..
                        } => notices.push(code),
                        Frame::Verdict(v) => {
                            assert!(v.margin.is_finite());
                            break;
                        }
                        _ => {}
                    }
                }
                notices[0]
            },
            FaultCode::MessageTooLarge,
        )
        .await;
    }

    #[tokio::test(flavor = "multi_thread", worker_threads = 2)]
    async fn one_megabyte_header_field() {
        let mut config = loopback();
        config.limits.max_frame_bytes = 2 << 20;
        check(
            config,
            |addr| {
                let mut raw = Raw::hello(addr);
                raw.open_message();
                raw.send(&Frame::Field {
                    name: "X-Long".into(),
                    value: vec![b'y'; 1 << 20],
                });
                raw.send(&Frame::Seal);
                let mut first = None;
                loop {
                    match raw.next().expect("open") {
                        Frame::Fault {
                            code, fatal: false, ..
                        } => {
                            first.get_or_insert(code);
                        }
                        Frame::Verdict(_) => break,
                        _ => {}
                    }
                }
                first.expect("a notice")
            },
            FaultCode::FieldTooLarge,
        )
        .await;
    }

    #[tokio::test(flavor = "multi_thread", worker_threads = 2)]
    async fn a_frame_over_the_limit_is_refused_before_its_payload() {
        check(
            loopback(),
            |addr| {
                let mut raw = Raw::hello(addr);
                raw.bytes(&[0x00, 0x10, 0x00, 0x01, 0x05]);
                raw.fatal()
            },
            FaultCode::FrameTooLarge,
        )
        .await;
    }
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn unix_socket_with_configured_mode() {
    use std::os::unix::fs::PermissionsExt;
    let dir = tempfile::tempdir().expect("temp dir");
    let path = dir.path().join("tamis.sock");
    let mut config = loopback();
    config.listen.tcp = None;
    config.listen.unix = Some(tamis::config::UnixSocket {
        path: path.clone(),
        mode: 0o600,
    });
    let (running, _) = daemon(config).await;
    let mode = std::fs::metadata(&path)
        .expect("socket")
        .permissions()
        .mode()
        & 0o777;
    assert_eq!(mode, 0o600);
    let address = format!("unix:{}", path.display());
    let verdict = tokio::task::spawn_blocking(move || {
        let mut client = Client::connect(&address, Duration::from_secs(20)).expect("connect");
        client
            .scan("a@example.net", &["b@example.org".to_string()], &message(3))
            .expect("verdict")
    })
    .await
    .expect("task");
    assert!(verdict.margin.is_finite());
    assert!(running.stop().await);
    assert!(!path.exists(), "the socket file is removed at shutdown");
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn shutdown_finishes_open_messages_and_refuses_new_ones() {
    let (running, _) = daemon(loopback()).await;
    let addr = running.tcp.expect("tcp");
    let token = running.shutdown_token();
    let (ready_tx, ready_rx) = std::sync::mpsc::channel();
    let (go_tx, go_rx) = std::sync::mpsc::channel::<()>();
    let conversation = tokio::task::spawn_blocking(move || {
        let mut raw = Raw::hello(addr);
        raw.open_message();
        raw.send(&Frame::Chunk { data: message(1) });
        // PING/PONG: the server has read everything before it, so the message is open on
        // its side before the shutdown starts.
        raw.send(&Frame::Ping { token: 9 });
        assert_eq!(raw.next(), Some(Frame::Pong { token: 9 }));
        ready_tx.send(()).expect("signal");
        go_rx.recv().expect("wait");
        raw.send(&Frame::Seal);
        let verdict = raw.next();
        // With no message open any more, the server says goodbye and closes (§8).
        let after = raw.next();
        let closed = raw.next().is_none();
        (verdict, after, closed)
    });
    tokio::task::spawn_blocking(move || ready_rx.recv().expect("ready"))
        .await
        .expect("task");
    token.cancel();
    tokio::time::sleep(Duration::from_millis(200)).await;
    go_tx.send(()).expect("go");
    let (verdict, after, closed) = conversation.await.expect("task");
    assert!(
        matches!(verdict, Some(Frame::Verdict(_))),
        "the open message finished: {verdict:?}"
    );
    assert_eq!(after, Some(Frame::ServerBye));
    assert!(closed);
    assert!(
        running.stop().await,
        "every task finished within the grace period"
    );
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_sender_after_shutdown_is_refused() {
    let (running, _) = daemon(loopback()).await;
    let addr = running.tcp.expect("tcp");
    let token = running.shutdown_token();
    let (ready_tx, ready_rx) = std::sync::mpsc::channel();
    let (go_tx, go_rx) = std::sync::mpsc::channel::<()>();
    let conversation = tokio::task::spawn_blocking(move || {
        let mut raw = Raw::hello(addr);
        // A message is open, so the connection stays up through the shutdown...
        raw.open_message();
        // PING/PONG: the server has read everything before it, so the message is open on
        // its side before the shutdown starts.
        raw.send(&Frame::Ping { token: 9 });
        assert_eq!(raw.next(), Some(Frame::Pong { token: 9 }));
        ready_tx.send(()).expect("signal");
        go_rx.recv().expect("wait");
        // ...and the next message, pipelined behind the seal in the same write, is refused.
        raw.send_together(&[
            Frame::Seal,
            Frame::Sender {
                address: "c@example.net".into(),
            },
        ]);
        assert!(matches!(raw.next(), Some(Frame::Verdict(_))));
        raw.fatal()
    });
    tokio::task::spawn_blocking(move || ready_rx.recv().expect("ready"))
        .await
        .expect("task");
    token.cancel();
    tokio::time::sleep(Duration::from_millis(200)).await;
    go_tx.send(()).expect("go");
    assert_eq!(conversation.await.expect("task"), FaultCode::ShuttingDown);
    assert!(running.stop().await);
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn metrics_pass_promtool_and_are_scraped_by_prometheus() {
    let (running, _) = daemon(loopback()).await;
    let addr = running.tcp.expect("tcp");
    let status = running.status.expect("status");
    tokio::task::spawn_blocking(move || {
        still_serves(addr);
        assert!(http_get(status, "/healthz").contains("alive"));
        assert!(http_get(status, "/readyz").starts_with("HTTP/1.1 200"));
        let response = http_get(status, "/metrics");
        let body = response.split("\r\n\r\n").nth(1).expect("body").to_string();
        for family in ["tamis_messages_total", "tamis_margin", "tamis_scan_duration_seconds",
            "tamis_scanned_bytes_total", "tamis_connections_open", "tamis_protocol_errors_total",
            "tamis_reloads_total", "tamis_model_info", "tamis_would_quarantine_total",
            "tamis_quarantine_not_held_total", "tamis_holds_total", "tamis_hold_duration_seconds",
            "tamis_held_messages", "tamis_held_bytes", "tamis_store_errors_total",
            "tamis_journal_entries_lost_total", "tamis_reports_total", "tamis_releases_total",
            "tamis_reports_unmatched_total", "tamis_purged_total"] {
            assert!(body.contains(family), "{family} missing");
        }
        // External check: `promtool check metrics` from Debian's prometheus package.
        let mut promtool = std::process::Command::new("promtool")
            .args(["check", "metrics"])
            .stdin(std::process::Stdio::piped())
            .stdout(std::process::Stdio::piped())
            .stderr(std::process::Stdio::piped())
            .spawn()
            .expect("promtool is installed by scripts/test (Debian package prometheus)");
        promtool.stdin.take().expect("stdin").write_all(body.as_bytes()).expect("feed");
        let out = promtool.wait_with_output().expect("promtool");
        assert!(out.status.success() && out.stdout.is_empty() && out.stderr.is_empty(),
            "promtool: {}{}", String::from_utf8_lossy(&out.stdout), String::from_utf8_lossy(&out.stderr));

        // External check: a real Prometheus server scrapes the daemon on loopback.
        let dir = tempfile::tempdir().expect("temp dir");
        let port = std::net::TcpListener::bind("127.0.0.1:0").expect("free port").local_addr().expect("addr").port();
        let config = dir.path().join("prometheus.yml");
        std::fs::write(&config, format!(
            "global:\n  scrape_interval: 1s\nscrape_configs:\n  - job_name: tamis\n    static_configs:\n      - targets: ['{status}']\n"
        )).expect("write config");
        let mut server = std::process::Command::new("prometheus")
            .arg(format!("--config.file={}", config.display()))
            .arg(format!("--storage.tsdb.path={}", dir.path().join("data").display()))
            .arg(format!("--web.listen-address=127.0.0.1:{port}"))
            .stdout(std::process::Stdio::null())
            .stderr(std::process::Stdio::null())
            .spawn()
            .expect("prometheus is installed by scripts/test");
        let api: SocketAddr = format!("127.0.0.1:{port}").parse().expect("addr");
        let mut scraped = false;
        for _ in 0..60 {
            std::thread::sleep(Duration::from_millis(500));
            if TcpStream::connect(api).is_err() {
                continue;
            }
            let reply = http_get(api, "/api/v1/query?query=tamis_connections_open");
            if reply.contains("\"result\":[{") {
                scraped = true;
                break;
            }
        }
        let _ = server.kill();
        let _ = server.wait();
        assert!(scraped, "Prometheus never stored a tamis_ series from the daemon");
    })
    .await
    .expect("task");
    assert!(running.stop().await);
}

pub(crate) fn free_port() -> u16 {
    std::net::TcpListener::bind("127.0.0.1:0")
        .expect("bind")
        .local_addr()
        .expect("addr")
        .port()
}

pub(crate) fn metric(status: SocketAddr, prefix: &str) -> Option<f64> {
    let text = http_get(status, "/metrics");
    text.lines()
        .find(|l| l.starts_with(prefix))
        .and_then(|l| l.rsplit(' ').next())
        .and_then(|v| v.parse().ok())
}

#[test]
fn a_garbage_model_before_sighup_leaves_the_old_model_serving() {
    let dir = tempfile::tempdir().expect("temp dir");
    let model_path = dir.path().join("model.tamis");
    tamis::model::file::save_model(model(), &model_path).expect("save");
    let (relay, status) = (free_port(), free_port());
    let config = dir.path().join("tamis.toml");
    std::fs::write(
        &config,
        format!(
            "metrics = \"127.0.0.1:{status}\"\n[listen]\ntcp = \"127.0.0.1:{relay}\"\n[model]\npath = \"model.tamis\"\n[store]\npath = \"store.sqlite\"\n"
        ),
    )
    .expect("write config");
    let check = std::process::Command::new(env!("CARGO_BIN_EXE_tamis"))
        .args(["config", "check"])
        .arg(&config)
        .output()
        .expect("config check");
    assert!(
        check.status.success(),
        "{}",
        String::from_utf8_lossy(&check.stderr)
    );
    let mut daemon = std::process::Command::new(env!("CARGO_BIN_EXE_tamis"))
        .arg("serve")
        .arg("--config")
        .arg(&config)
        .stdout(std::process::Stdio::null())
        .stderr(std::process::Stdio::null())
        .spawn()
        .expect("start the daemon");
    let status: SocketAddr = format!("127.0.0.1:{status}").parse().expect("addr");
    let relay: SocketAddr = format!("127.0.0.1:{relay}").parse().expect("addr");
    let mut ready = false;
    for _ in 0..100 {
        std::thread::sleep(Duration::from_millis(100));
        if TcpStream::connect(status).is_ok()
            && http_get(status, "/readyz").starts_with("HTTP/1.1 200")
        {
            ready = true;
            break;
        }
    }
    assert!(ready, "daemon did not become ready");
    let scan = || {
        let mut client =
            Client::connect(&relay.to_string(), Duration::from_secs(20)).expect("connect");
        client
            .scan("a@example.net", &["b@example.org".to_string()], &message(2))
            .expect("verdict")
            .margin
    };
    let before = scan();
    std::fs::write(&model_path, b"this is not a model").expect("overwrite");
    let hup = |pid: u32| {
        let ok = std::process::Command::new("kill")
            .args(["-HUP", &pid.to_string()])
            .status()
            .expect("kill")
            .success();
        assert!(ok);
    };
    hup(daemon.id());
    let failure = "tamis_reloads_total{outcome=\"failure\"}";
    let mut counted = None;
    for _ in 0..100 {
        std::thread::sleep(Duration::from_millis(100));
        counted = metric(status, failure);
        if counted == Some(1.0) {
            break;
        }
    }
    assert_eq!(counted, Some(1.0), "the failed reload is counted");
    assert_eq!(scan(), before, "the old model still serves");
    tamis::model::file::save_model(model(), &model_path).expect("restore");
    hup(daemon.id());
    let success = "tamis_reloads_total{outcome=\"success\"}";
    let mut counted = None;
    for _ in 0..100 {
        std::thread::sleep(Duration::from_millis(100));
        counted = metric(status, success);
        if counted == Some(1.0) {
            break;
        }
    }
    assert_eq!(counted, Some(1.0), "the good reload is counted");
    let term = std::process::Command::new("kill")
        .args(["-TERM", &daemon.id().to_string()])
        .status()
        .expect("kill");
    assert!(term.success());
    let exit = daemon.wait().expect("wait");
    assert!(exit.success(), "graceful exit: {exit:?}");
}

#[test]
fn tamis_demo_prints_a_verdict_table_per_domain() {
    let dir = tempfile::tempdir().expect("temp dir");
    let out = std::process::Command::new(env!("CARGO_BIN_EXE_tamis"))
        .args(["demo", "--messages", "80", "--dir"])
        .arg(dir.path())
        // The demo's daemon keeps its store in the default place: keep it in the test's
        // folder, not the user's own state folder.
        .env("STATE_DIRECTORY", dir.path())
        .output()
        .expect("run tamis demo");
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let text = String::from_utf8_lossy(&out.stdout);
    for domain in ["harbourhost.example", "uni-lindqvist.test"] {
        assert!(text.contains(domain), "{text}");
    }
    assert!(text.contains("/metrics"));
    let rows: usize = text
        .lines()
        .filter(|l| l.contains(".example ") || l.contains(".test "))
        .filter_map(|l| l.split_whitespace().nth(1)?.parse::<usize>().ok())
        .sum();
    assert_eq!(rows, 80, "every streamed message is in the table:\n{text}");
    assert!(dir.path().join("model.tamis").exists());
}

/// Log events captured in memory: one entry per event, as the subscriber wrote it.
#[derive(Clone, Default)]
struct CapturedLog(Arc<std::sync::Mutex<Vec<Vec<u8>>>>);

/// Collects one event's bytes and files them when the subscriber drops it.
struct EventWriter {
    log: CapturedLog,
    bytes: Vec<u8>,
}

impl Write for EventWriter {
    fn write(&mut self, buf: &[u8]) -> std::io::Result<usize> {
        self.bytes.extend_from_slice(buf);
        Ok(buf.len())
    }

    fn flush(&mut self) -> std::io::Result<()> {
        Ok(())
    }
}

impl Drop for EventWriter {
    fn drop(&mut self) {
        if let Ok(mut events) = self.log.0.lock() {
            events.push(std::mem::take(&mut self.bytes));
        }
    }
}

impl<'a> tracing_subscriber::fmt::MakeWriter<'a> for CapturedLog {
    type Writer = EventWriter;

    fn make_writer(&'a self) -> EventWriter {
        EventWriter {
            log: self.clone(),
            bytes: Vec::new(),
        }
    }
}

impl CapturedLog {
    fn events(&self) -> Vec<String> {
        self.0
            .lock()
            .map(|e| {
                e.iter()
                    .map(|b| String::from_utf8_lossy(b).into_owned())
                    .collect()
            })
            .unwrap_or_default()
    }
}

/// A recipient carrying a newline, a forged log line and terminal escapes (ESC [2J clears
/// the screen) must not produce a second line in either log format. The daemon runs on
/// this test's single thread, so the scoped subscriber sees every event of its tasks.
#[tokio::test]
async fn a_recipient_cannot_forge_a_log_line() {
    use tracing_subscriber::layer::SubscriberExt;
    let human = CapturedLog::default();
    let json = CapturedLog::default();
    let subscriber = tracing_subscriber::registry()
        .with(tracing_subscriber::filter::LevelFilter::DEBUG)
        .with(
            tracing_subscriber::fmt::layer()
                .with_ansi(false)
                .with_writer(human.clone()),
        )
        .with(
            tracing_subscriber::fmt::layer()
                .json()
                .with_writer(json.clone()),
        );
    // With a single dispatcher registered, tracing-core (0.1.36, `Rebuilder::JustOne`) decides
    // whether a callsite is enabled from the default of whichever thread reaches it first,
    // which in a parallel test run is another test's thread with no subscriber. A second,
    // idle dispatcher makes it ask every registered dispatcher, this test's included.
    let _second = tracing::Dispatch::new(tracing_subscriber::registry());
    let _guard = tracing::subscriber::set_default(subscriber);
    let (running, _) = daemon(loopback()).await;
    let addr = running.tcp.expect("tcp");
    let forged = "x@example.org\n2030-01-01T00:00:00.000000Z  INFO tamis::cli::serve: reloaded configuration and model model=\"evil\"\x1b[2J\x1b[H";
    let verdict = tokio::task::spawn_blocking(move || {
        let mut raw = Raw::hello(addr);
        raw.send(&Frame::Sender {
            address: "a@example.net".into(),
        });
        raw.send(&Frame::Recipient {
            address: forged.into(),
        });
        let whole = message(4);
        let (fields, body) = tamis::proto::client::split_message(&whole);
        for (name, value) in fields {
            raw.send(&Frame::Field { name, value });
        }
        raw.send(&Frame::Chunk {
            data: body.to_vec(),
        });
        raw.send(&Frame::Seal);
        loop {
            match raw.next() {
                Some(Frame::Verdict(v)) => return v,
                Some(_) => continue,
                None => panic!("closed without a verdict"),
            }
        }
    })
    .await
    .expect("task");
    assert_eq!(verdict.recipients.len(), 1, "the recipient keeps its place");
    assert!(running.stop().await);
    drop(_guard);

    let human = human.events();
    assert!(human.iter().any(|e| e.contains(" verdict")), "{human:#?}");
    // The value is logged (escaped), so the checks below are not vacuous.
    assert!(
        human
            .iter()
            .any(|e| e.contains("example.org\\n2030-01-01") && e.contains("\\u{1b}[2")),
        "{human:#?}"
    );
    for event in &human {
        // One event, one line: the only line break is the one that ends it.
        let body = event.strip_suffix('\n').unwrap_or(event);
        assert!(
            !body.chars().any(|c| c.is_control()),
            "a control character reached the human log: {event:?}"
        );
    }
    let json = json.events();
    assert!(!json.is_empty());
    for event in &json {
        let body = event.strip_suffix('\n').unwrap_or(event);
        assert!(!body.contains('\n'), "{event:?}");
        let value: serde_json::Value = serde_json::from_str(body).expect("one JSON object");
        let mut texts = Vec::new();
        collect_strings(&value, &mut texts);
        for text in texts {
            // After JSON decoding, the logged values themselves carry no control character.
            assert!(
                !text.chars().any(|c| c.is_control()),
                "a control character in a logged value: {text:?}"
            );
        }
    }
}

fn collect_strings(value: &serde_json::Value, out: &mut Vec<String>) {
    match value {
        serde_json::Value::String(s) => out.push(s.clone()),
        serde_json::Value::Array(items) => items.iter().for_each(|v| collect_strings(v, out)),
        serde_json::Value::Object(map) => map.values().for_each(|v| collect_strings(v, out)),
        _ => {}
    }
}

/// Every non-fatal fault and the verdict of one sealed message, read within `max_frame`.
fn notices_and_verdict(raw: &mut Raw, max_frame: u32) -> (Vec<FaultCode>, tamis::proto::Verdict) {
    let mut notices = Vec::new();
    loop {
        match raw.next_within(max_frame) {
            Some(Frame::Fault {
                code, fatal: false, ..
            }) => notices.push(code),
            Some(Frame::Verdict(v)) => return (notices, v),
            Some(Frame::Enough) => {}
            other => panic!("expected a verdict, got {other:?} (notices {notices:?})"),
        }
    }
}

/// A client announcing the smallest `max_frame` (4096).
fn hello_small(addr: SocketAddr) -> Raw {
    let mut raw = Raw::connect(addr);
    raw.send(&Frame::Hello {
        version: 1,
        max_frame: 4096,
        client: "small frames".into(),
        secret: None,
    });
    assert!(matches!(raw.next_within(4096), Some(Frame::Welcome { .. })));
    raw
}

/// Sends the fields and body of a demo message, then `SEAL`.
fn send_content(raw: &mut Raw, n: usize) {
    let whole = message(n);
    let (fields, body) = tamis::proto::client::split_message(&whole);
    let mut frames: Vec<Frame> = fields
        .into_iter()
        .map(|(name, value)| Frame::Field { name, value })
        .collect();
    frames.push(Frame::Chunk {
        data: body.to_vec(),
    });
    frames.push(Frame::Seal);
    raw.send_together(&frames);
}

/// Issue reproducer: one 4,011-byte recipient address with `max_frame` 4096 used to make a
/// verdict that did not fit, and the server closed without one. RFC 5321 §4.5.3.1.3 caps a
/// path at 256 octets.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn an_over_long_recipient_is_refused_but_the_message_gets_its_verdict() {
    let (running, metrics) = daemon(loopback()).await;
    let addr = running.tcp.expect("tcp");
    let (notices, verdict) = tokio::task::spawn_blocking(move || {
        let mut raw = hello_small(addr);
        raw.send(&Frame::Sender {
            address: "a@example.net".into(),
        });
        let long = format!("{}@example.org", "a".repeat(3999));
        assert_eq!(long.len(), 4011);
        raw.send(&Frame::Recipient { address: long });
        raw.send(&Frame::Recipient {
            address: "b@example.org".into(),
        });
        send_content(&mut raw, 5);
        notices_and_verdict(&mut raw, 4096)
    })
    .await
    .expect("task");
    assert_eq!(notices, vec![FaultCode::BadAddress]);
    let listed: Vec<&str> = verdict
        .recipients
        .iter()
        .map(|r| r.address.as_str())
        .collect();
    assert_eq!(
        listed,
        vec!["", "b@example.org"],
        "kept in place, not echoed"
    );
    assert!(verdict.margin.is_finite(), "the message was scored");
    assert!(
        metrics
            .render()
            .contains("tamis_protocol_errors_total{kind=\"bad_address\"} 1")
    );
    assert!(running.stop().await);
}

/// A recipient that is not an RFC 5321 address falls under the default thresholds, even when
/// its text names a domain with a section of its own.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_malformed_recipient_is_decided_under_the_default_thresholds() {
    let mut config = loopback();
    config.policy = tamis::policy::Policy::new(
        // Default: everything accepted; example.org: everything tagged.
        tamis::policy::Thresholds::on_margin(1000.0, 2000.0).expect("thresholds"),
        [(
            "example.org".to_string(),
            tamis::policy::Thresholds::on_margin(-1000.0, 1000.0).expect("thresholds"),
        )],
        true,
    )
    .expect("policy");
    let (running, _) = daemon(config).await;
    let addr = running.tcp.expect("tcp");
    let (notices, verdict) = tokio::task::spawn_blocking(move || {
        let mut raw = Raw::hello(addr);
        raw.send(&Frame::Sender {
            address: "not an address".into(),
        });
        for r in [
            "good@example.org",
            "bad user@example.org",
            "other@example.org",
        ] {
            raw.send(&Frame::Recipient { address: r.into() });
        }
        send_content(&mut raw, 6);
        notices_and_verdict(&mut raw, 1 << 20)
    })
    .await
    .expect("task");
    assert_eq!(notices, vec![FaultCode::BadAddress, FaultCode::BadAddress]);
    let got: Vec<(&str, tamis::proto::Action)> = verdict
        .recipients
        .iter()
        .map(|r| (r.address.as_str(), r.action))
        .collect();
    use tamis::proto::Action::{Accept, Tag};
    assert_eq!(
        got,
        vec![
            ("good@example.org", Tag),
            ("", Accept),
            ("other@example.org", Tag)
        ]
    );
    assert!(running.stop().await);
}

/// Issue reproducer: 1,000 recipients and a client `max_frame` of 4096 used to make a verdict
/// that did not fit, and the server closed without one. Now the recipients that fit are kept
/// in order, the rest are refused with TOO_MANY, and the verdict fits.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_thousand_recipients_with_the_smallest_frame_limit_still_get_a_verdict() {
    let (running, _) = daemon(loopback()).await;
    let addr = running.tcp.expect("tcp");
    let sent: Vec<String> = (0..1000)
        .map(|i| format!("user{i:04}@uni-lindqvist.test"))
        .collect();
    let rcpts = sent.clone();
    let (notices, verdict) = tokio::task::spawn_blocking(move || {
        let mut raw = hello_small(addr);
        let mut frames = vec![Frame::Sender {
            address: "a@example.net".into(),
        }];
        frames.extend(
            rcpts
                .into_iter()
                .map(|address| Frame::Recipient { address }),
        );
        raw.send_together(&frames);
        send_content(&mut raw, 7);
        notices_and_verdict(&mut raw, 4096)
    })
    .await
    .expect("task");
    assert_eq!(notices, vec![FaultCode::TooMany]);
    // 27-byte addresses take 30 bytes each of the 4096 - 1024 the recipients may use.
    assert_eq!(sent[0].len(), 27);
    assert_eq!(verdict.recipients.len(), (4096 - 1024) / 30);
    for (listed, sent) in verdict.recipients.iter().zip(&sent) {
        assert_eq!(&listed.address, sent, "a prefix of what was sent, in order");
    }
    assert!(verdict.margin.is_finite());
    assert!(running.stop().await);
}

/// Sends one message of `fields` and `body` on a fresh connection; its verdict.
fn scan_fields(addr: SocketAddr, fields: &[(&str, &[u8])], body: &[u8]) -> tamis::proto::Verdict {
    let mut raw = Raw::hello(addr);
    raw.open_message();
    let mut frames: Vec<Frame> = fields
        .iter()
        .map(|(name, value)| Frame::Field {
            name: name.to_string(),
            value: value.to_vec(),
        })
        .collect();
    frames.push(Frame::Chunk {
        data: body.to_vec(),
    });
    frames.push(Frame::Seal);
    raw.send_together(&frames);
    notices_and_verdict(&mut raw, 1 << 20).1
}

/// Issue 11: a FIELD name (or value) holding CR or LF was written verbatim into the message
/// assembled for scoring, so a relay's field could forge further header fields — here a
/// Content-Transfer-Encoding that turns the body into base64 noise. PROTOCOL.md §2 now says
/// CR, LF, NUL and ':' in a name, and line breaks in a value that are not folding, are
/// assembled as spaces: the verdict must equal that of the same message with spaces there.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn line_breaks_in_field_names_and_values_cannot_forge_header_fields() {
    let (running, _) = daemon(loopback()).await;
    let addr = running.tcp.expect("tcp");
    tokio::task::spawn_blocking(move || {
        let body: &[u8] = b"Buy cheap watches now! Limited offer, click here to order today.\r\n";
        let base: [(&str, &[u8]); 2] = [
            ("From", b"Shop <deals@example.net>"),
            ("Subject", b"cheap watches"),
        ];
        let margin_with = |extra: (&str, &[u8])| {
            let mut fields = base.to_vec();
            fields.push(extra);
            scan_fields(addr, &fields, body).margin
        };
        let forged_name = margin_with(("X-A\r\nContent-Transfer-Encoding", b"base64"));
        let spaced_name = margin_with(("X-A  Content-Transfer-Encoding", b"base64"));
        let real = margin_with(("Content-Transfer-Encoding", b"base64"));
        assert_ne!(
            real.to_bits(),
            spaced_name.to_bits(),
            "the forged field would matter"
        );
        assert_eq!(forged_name.to_bits(), spaced_name.to_bits());
        let colon_nul = margin_with(("X-A:\0Content-Transfer-Encoding", b"base64"));
        assert_eq!(colon_nul.to_bits(), spaced_name.to_bits());

        let forged_value = margin_with(("X-B", b"x\r\nContent-Transfer-Encoding: base64"));
        let spaced_value = margin_with(("X-B", b"x  Content-Transfer-Encoding: base64"));
        assert_eq!(forged_value.to_bits(), spaced_value.to_bits());
        // Folding (CRLF or LF followed by a blank) is kept as it is.
        let folded = margin_with(("X-B", b"x\r\n Content-Transfer-Encoding: base64"));
        assert!(folded.is_finite());
    })
    .await
    .expect("task");
    assert!(running.stop().await);
}

/// Issue reproducer, scaled down: 250 connections each holding an 8.4 MB message peaked at
/// 2.14 GB. Now every open message is paid from one budget (here 4 MiB for 12 connections
/// holding 1 MiB each at once, then 2 MiB): the budget is never passed, a message that
/// cannot get more is decided on what it has (MESSAGE_TOO_LARGE, then its verdict), and
/// the bytes are returned after the verdicts.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn open_messages_share_one_buffer_budget() {
    const CONNECTIONS: usize = 12;
    const BUDGET: u64 = 4 << 20;
    let mut config = loopback();
    config.limits.max_buffered_bytes = BUDGET;
    let (running, metrics) = daemon(config).await;
    let addr = running.tcp.expect("tcp");
    let line = b"Our quarterly catalogue of garden furniture is out; order before Friday.\r\n";
    let piece: Vec<u8> = line.iter().copied().cycle().take(60 * 1024).collect();
    let barrier = Arc::new(std::sync::Barrier::new(CONNECTIONS));
    let clients: Vec<_> = (0..CONNECTIONS)
        .map(|i| {
            let (piece, barrier) = (piece.clone(), Arc::clone(&barrier));
            tokio::task::spawn_blocking(move || {
                let mut raw = Raw::hello(addr);
                raw.open_message();
                raw.send(&Frame::Field {
                    name: "Subject".into(),
                    value: format!("catalogue {i}").into_bytes(),
                });
                let stream_mib = |raw: &mut Raw| {
                    for _ in 0..17 {
                        raw.send(&Frame::Chunk {
                            data: piece.clone(),
                        });
                    }
                };
                stream_mib(&mut raw);
                // The server has taken in this first MiB before anyone goes on.
                raw.send(&Frame::Ping { token: 1 });
                let mut notices = Vec::new();
                loop {
                    match raw.next().expect("open") {
                        Frame::Pong { token: 1 } => break,
                        Frame::Fault {
                            code, fatal: false, ..
                        } => notices.push(code),
                        Frame::Enough => {}
                        other => panic!("{other:?}"),
                    }
                }
                barrier.wait();
                stream_mib(&mut raw);
                raw.send(&Frame::Seal);
                let (more, verdict) = notices_and_verdict(&mut raw, 1 << 20);
                notices.extend(more);
                (notices, verdict)
            })
        })
        .collect();
    let mut cut = 0;
    for client in clients {
        let (notices, verdict) = client.await.expect("task");
        assert!(verdict.margin.is_finite(), "scored: {verdict:?}");
        if notices.contains(&FaultCode::MessageTooLarge) {
            cut += 1;
        }
    }
    let budget = running.buffer_budget();
    assert!(
        budget.peak() <= BUDGET,
        "peak {} over {BUDGET}",
        budget.peak()
    );
    assert!(
        budget.peak() > BUDGET / 2,
        "the budget was used: {}",
        budget.peak()
    );
    assert!(cut >= CONNECTIONS - 4, "only {cut} messages were cut");
    assert_eq!(budget.held(), 0, "every byte returned after the verdicts");
    let text = metrics.render();
    assert!(text.contains("\ntamis_buffered_bytes 0\n"), "{text}");
    assert!(
        text.contains(&format!("\ntamis_buffer_budget_exhausted_total {cut}\n")),
        "{text}"
    );
    assert!(running.stop().await);
}

/// Who may connect over TCP (PROTOCOL.md §3): an allow-list of address ranges, a cap per
/// peer address and a shared secret in HELLO. Issue 7, item 3: any local user could take
/// every connection slot.
mod access {
    use super::*;

    fn hello_with(addr: SocketAddr, secret: Option<&[u8]>) -> Raw {
        let mut raw = Raw::connect(addr);
        raw.send(&Frame::Hello {
            version: 1,
            max_frame: 1 << 20,
            client: "access".into(),
            secret: secret.map(<[u8]>::to_vec),
        });
        raw
    }

    fn protocol_errors(metrics: &Metrics, kind: &str) -> String {
        let prefix = format!("tamis_protocol_errors_total{{kind=\"{kind}\"}} ");
        metrics
            .render()
            .lines()
            .find(|l| l.starts_with(&prefix))
            .map(|l| l.trim_start_matches(&prefix).to_string())
            .unwrap_or_default()
    }

    #[tokio::test(flavor = "multi_thread", worker_threads = 2)]
    async fn a_peer_outside_the_allow_list_is_denied() {
        let mut config = loopback();
        config.access.tcp_allow = vec!["192.0.2.0/24".parse().expect("cidr")];
        let (running, metrics) = daemon(config).await;
        let addr = running.tcp.expect("tcp");
        let code = tokio::task::spawn_blocking(move || hello_with(addr, None).fatal())
            .await
            .expect("task");
        assert_eq!(code, FaultCode::Denied);
        assert_eq!(protocol_errors(&metrics, "denied"), "1");
        assert!(running.stop().await);
    }

    #[tokio::test(flavor = "multi_thread", worker_threads = 2)]
    async fn a_shared_secret_is_required_when_configured() {
        use std::os::unix::fs::PermissionsExt;
        let dir = tempfile::tempdir().expect("temp dir");
        let path = dir.path().join("relay.secret");
        std::fs::write(&path, "5f2b6c0e9d8a7b1c4e3f2a1b0c9d8e7f\n").expect("write");
        std::fs::set_permissions(&path, std::fs::Permissions::from_mode(0o600)).expect("chmod");
        let mut config = loopback();
        config.access.secret_file = Some(path.clone());
        let (running, metrics) = daemon(config).await;
        let addr = running.tcp.expect("tcp");
        let root = env!("CARGO_MANIFEST_DIR");
        tokio::task::spawn_blocking(move || {
            let good = b"5f2b6c0e9d8a7b1c4e3f2a1b0c9d8e7f";
            assert_eq!(hello_with(addr, None).fatal(), FaultCode::Denied);
            assert_eq!(
                hello_with(addr, Some(b"5f2b6c0e9d8a7b1c4e3f2a1b0c9d8e70")).fatal(),
                FaultCode::Denied
            );
            assert_eq!(
                hello_with(addr, Some(&good[..31])).fatal(),
                FaultCode::Denied
            );
            let mut raw = hello_with(addr, Some(good));
            assert!(matches!(raw.next(), Some(Frame::Welcome { .. })));
            let mut client =
                Client::connect_with_secret(&addr.to_string(), Duration::from_secs(20), Some(good))
                    .expect("connect");
            let verdict = client
                .scan("a@example.net", &["b@example.org".to_string()], &message(9))
                .expect("verdict");
            assert!(verdict.margin.is_finite());
            // The independent Python client, written from PROTOCOL.md, reads the same file.
            let file = dir.path().join("m.eml");
            std::fs::write(&file, message(9)).expect("write");
            let out = std::process::Command::new(crate::python::interpreter())
                .arg(format!("{root}/clients/python/tamis_client.py"))
                .args(["--connect", &addr.to_string(), "--from", "a@example.net"])
                .args([
                    "--rcpt",
                    "b@example.org",
                    "--format",
                    "json",
                    "--secret-file",
                ])
                .arg(&path)
                .arg(&file)
                .output()
                .expect("run the Python client");
            let text = String::from_utf8_lossy(&out.stdout);
            assert!(
                out.status.success(),
                "{text}{}",
                String::from_utf8_lossy(&out.stderr)
            );
            let line: serde_json::Value = serde_json::from_str(text.trim()).expect("JSON");
            assert_eq!(line["margin"].as_f64(), Some(verdict.margin));
            // `tamis check` presents the same file's secret, and is denied without it.
            let check = |secret: Option<&std::path::Path>| {
                let mut cmd = std::process::Command::new(env!("CARGO_BIN_EXE_tamis"));
                cmd.args(["check", "--connect", &addr.to_string(), "--format", "json"])
                    .args(["--rcpt", "b@example.org"]);
                if let Some(secret) = secret {
                    cmd.arg("--secret-file").arg(secret);
                }
                cmd.arg(&file).output().expect("run tamis check")
            };
            let out = check(Some(&path));
            let text = String::from_utf8_lossy(&out.stdout);
            assert!(
                out.status.success(),
                "{text}{}",
                String::from_utf8_lossy(&out.stderr)
            );
            let line: serde_json::Value = serde_json::from_str(text.trim()).expect("JSON");
            assert_eq!(line["margin"].as_f64(), Some(verdict.margin));
            let out = check(None);
            assert!(!out.status.success());
            let err = String::from_utf8_lossy(&out.stderr);
            assert!(err.contains("secret"), "{err}");
        })
        .await
        .expect("task");
        assert_eq!(protocol_errors(&metrics, "denied"), "4");
        assert!(running.stop().await);
    }

    #[tokio::test(flavor = "multi_thread", worker_threads = 2)]
    async fn one_peer_cannot_take_more_than_its_share_of_connections() {
        let mut config = loopback();
        config.limits.max_connections_per_peer = Some(3);
        let (running, _) = daemon(config).await;
        let addr = running.tcp.expect("tcp");
        tokio::task::spawn_blocking(move || {
            let mut held: Vec<Raw> = (0..3).map(|_| Raw::hello(addr)).collect();
            let mut fourth = hello_with(addr, None);
            assert_eq!(fourth.fatal(), FaultCode::Busy);
            // A slot given back is free again.
            let mut first = held.remove(0);
            first.send(&Frame::ClientBye);
            assert_eq!(first.next(), Some(Frame::ServerBye));
            assert_eq!(first.next(), None);
            let mut again = None;
            for _ in 0..100 {
                let mut raw = hello_with(addr, None);
                match raw.next() {
                    Some(Frame::Welcome { .. }) => {
                        again = Some(raw);
                        break;
                    }
                    _ => std::thread::sleep(Duration::from_millis(20)),
                }
            }
            assert!(again.is_some(), "the freed slot was never offered again");
        })
        .await
        .expect("task");
        assert!(running.stop().await);
    }
}

/// Timeouts, on tokio's paused clock: the runtime jumps to the next timer whenever every
/// task waits, so minutes pass in milliseconds and the times measured are exact. Sessions
/// run over an in-memory stream, which wakes the other side as soon as bytes are written;
/// loopback TCP may deliver them a moment later, after the clock has already jumped.
mod timers {
    use super::*;
    use tamis::server::session::{Context, serve_connection};
    use tokio::io::{AsyncReadExt, AsyncWriteExt, DuplexStream};
    use tokio::time::Instant;

    /// One session served over an in-memory stream; the client's end.
    fn session(config: &Config) -> AsyncRaw {
        let decisions = Decisions {
            policy: config.policy.clone(),
            headers: config.headers.clone(),
            on_failure: config.on_failure,
        };
        let engine = Engine::new(model().clone(), "test model", decisions).expect("engine");
        let metrics = Arc::new(Metrics::new(config.policy.domains().keys()).expect("metrics"));
        let ctx = Arc::new(Context::new(
            SharedEngine::new(engine),
            metrics,
            config.limits.clone(),
        ));
        let (client, server) = tokio::io::duplex(1 << 20);
        tokio::spawn(serve_connection(server, "test".to_string(), ctx));
        AsyncRaw {
            stream: client,
            buf: BytesMut::new(),
        }
    }

    struct AsyncRaw {
        stream: DuplexStream,
        buf: BytesMut,
    }

    impl AsyncRaw {
        async fn hello(config: &Config) -> AsyncRaw {
            let mut raw = session(config);
            raw.send(&Frame::Hello {
                version: 1,
                max_frame: 1 << 20,
                client: "timers".into(),
                secret: None,
            })
            .await;
            assert!(matches!(raw.next().await, Some(Frame::Welcome { .. })));
            raw
        }

        async fn send(&mut self, frame: &Frame) {
            let mut out = BytesMut::new();
            encode_frame(frame, &mut out).expect("encodes");
            // The server may have closed already; what it sent before is still read.
            let _ = self.stream.write_all(&out).await;
        }

        async fn next(&mut self) -> Option<Frame> {
            loop {
                if let Some((frame, used)) =
                    parse_frame(&self.buf, 1 << 20).expect("server frames parse")
                {
                    let _ = self.buf.split_to(used);
                    return Some(frame);
                }
                match self.stream.read_buf(&mut self.buf).await {
                    Ok(0) | Err(_) => return None,
                    Ok(_) => {}
                }
            }
        }
    }

    fn is_idle_fault(frame: &Option<Frame>) -> bool {
        matches!(
            frame,
            Some(Frame::Fault {
                code: FaultCode::Idle,
                fatal: true,
                ..
            })
        )
    }

    /// Issue reproducer: the 5-minute idle timeout applied before HELLO too, so a silent
    /// connection held its slot for 5 minutes. A connection must say HELLO within the
    /// handshake timeout (default 10 s).
    #[tokio::test(start_paused = true)]
    async fn a_connection_that_never_says_hello_is_closed_after_the_handshake_timeout() {
        let config = loopback();
        let mut silent = session(&config);
        let start = Instant::now();
        let got = silent.next().await;
        let waited = start.elapsed();
        assert!(is_idle_fault(&got), "{got:?}");
        assert!(silent.next().await.is_none(), "closed after the fault");
        assert!(
            waited >= Duration::from_secs(10) && waited < Duration::from_secs(11),
            "{waited:?}"
        );
        // A HELLO that trickles in a byte at a time does not extend it either.
        let mut slow = session(&config);
        let start = Instant::now();
        let mut hello = BytesMut::new();
        encode_frame(
            &Frame::Hello {
                version: 1,
                max_frame: 1 << 20,
                client: "slow".into(),
                secret: None,
            },
            &mut hello,
        )
        .expect("encodes");
        for byte in hello.iter().take(hello.len() - 1) {
            let _ = slow.stream.write_all(&[*byte]).await;
            tokio::time::sleep(Duration::from_millis(500)).await;
        }
        let got = slow.next().await;
        assert!(is_idle_fault(&got), "{got:?}");
        assert!(
            start.elapsed() < Duration::from_secs(11),
            "{:?}",
            start.elapsed()
        );
    }

    /// Issue reproducer: a connection that sent PING within each idle period kept its slot
    /// for ever. PING is answered but does not extend the idle timeout; a message does.
    #[tokio::test(start_paused = true)]
    async fn ping_alone_does_not_keep_a_connection_open() {
        let mut raw = AsyncRaw::hello(&loopback()).await;
        let start = Instant::now();
        let mut token = 0;
        let mut message_sent = false;
        let closed_at = loop {
            assert!(
                start.elapsed() < Duration::from_secs(1200),
                "still open after 20 minutes of PINGs"
            );
            match tokio::time::timeout(Duration::from_secs(70), raw.next()).await {
                Err(_) if !message_sent && start.elapsed() >= Duration::from_secs(200) => {
                    // Activity at 210 s: the idle timeout now runs from here.
                    message_sent = true;
                    raw.send(&Frame::Sender {
                        address: "a@example.net".into(),
                    })
                    .await;
                    raw.send(&Frame::Recipient {
                        address: "b@example.org".into(),
                    })
                    .await;
                    raw.send(&Frame::Chunk { data: message(8) }).await;
                    raw.send(&Frame::Seal).await;
                    let verdict = raw.next().await;
                    assert!(matches!(verdict, Some(Frame::Verdict(_))), "{verdict:?}");
                }
                Err(_) => {
                    token += 1;
                    raw.send(&Frame::Ping { token }).await;
                    assert_eq!(raw.next().await, Some(Frame::Pong { token }));
                }
                Ok(frame) => {
                    assert!(is_idle_fault(&frame), "{frame:?}");
                    break start.elapsed();
                }
            }
        };
        assert!(token >= 5, "PINGs were answered meanwhile ({token})");
        // Idle timeout (300 s) after the message at 210 s.
        assert!(
            closed_at >= Duration::from_secs(510) && closed_at < Duration::from_secs(511),
            "{closed_at:?}"
        );
    }
}
