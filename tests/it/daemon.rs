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
fn model() -> &'static LinearModel {
    static MODEL: OnceLock<LinearModel> = OnceLock::new();
    MODEL.get_or_init(|| tamis::model::builtin::demonstration_model().expect("builds"))
}

fn loopback() -> Config {
    let mut config = Config::default();
    config.listen.tcp = Some("127.0.0.1:0".parse().expect("addr"));
    config.metrics = Some("127.0.0.1:0".parse().expect("addr"));
    config
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
        loop {
            if let Some((frame, used)) =
                parse_frame(&self.buf, 1 << 20).expect("server frames parse")
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

fn http_get(addr: SocketAddr, path: &str) -> String {
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
            "tamis_reloads_total", "tamis_model_info"] {
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

fn free_port() -> u16 {
    std::net::TcpListener::bind("127.0.0.1:0")
        .expect("bind")
        .local_addr()
        .expect("addr")
        .port()
}

fn metric(status: SocketAddr, prefix: &str) -> Option<f64> {
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
            "metrics = \"127.0.0.1:{status}\"\n[listen]\ntcp = \"127.0.0.1:{relay}\"\n[model]\npath = \"model.tamis\"\n"
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
