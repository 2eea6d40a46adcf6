//! Release over SMTP against a real SMTP server: Python's `aiosmtpd` (from PyPI, in
//! `scripts/requirements.txt`), started by each test on 127.0.0.1 with a handler that
//! writes every message it receives, its envelope and `MAIL` parameters to a folder.
//!
//! Checked: the bytes delivered equal the bytes held (the server undoes the transparency
//! of RFC 5321 §4.5.2 itself); two releases of the same messages at once deliver each
//! exactly once; a next hop that is down, or that answers 4xx or 5xx, leaves the message
//! held and the command says so; the JSON output parses.

use std::io::{BufRead, BufReader};
use std::path::{Path, PathBuf};
use std::process::{Child, ChildStdin, Command, Stdio};

use pretty_assertions::assert_eq;
use serde_json::Value;
use tamis::store::{HeldState, ReportKind, ReportSource, ReportStatus, Store};

use crate::operator::{Fixture, hold, json, outcome, tamis};
use crate::python;

/// The sink: an aiosmtpd server whose handler stores each message as `<n>.eml` (the
/// content after the server undid dot-stuffing) and `<n>.json` (envelope and `MAIL`
/// options), written before the server answers 250. `mode` makes it refuse instead:
/// `reject-rcpt` (550 to every RCPT), `tempfail-data` (451 after the data).
const SINK: &str = r#"
import asyncio, itertools, json, os, sys
from aiosmtpd.smtp import SMTP

out_dir, mode = sys.argv[1], sys.argv[2]
counter = itertools.count(1)

class Handler:
    async def handle_RCPT(self, server, session, envelope, address, rcpt_options):
        if mode == "reject-rcpt":
            return "550 5.1.1 no such mailbox here"
        envelope.rcpt_tos.append(address)
        return "250 OK"

    async def handle_DATA(self, server, session, envelope):
        if mode == "tempfail-data":
            return "451 4.3.0 queue full, try again later"
        n = next(counter)
        base = os.path.join(out_dir, str(n))
        with open(base + ".tmp", "wb") as f:
            f.write(envelope.original_content)
        meta = {"mail_from": envelope.mail_from, "rcpt_tos": envelope.rcpt_tos,
                "mail_options": envelope.mail_options}
        with open(base + ".json", "w") as f:
            json.dump(meta, f)
        os.rename(base + ".tmp", base + ".eml")
        return "250 2.0.0 stored as " + str(n)

async def main():
    loop = asyncio.get_running_loop()
    server = await loop.create_server(
        lambda: SMTP(Handler(), hostname="sink.example.org", enable_SMTPUTF8=True),
        "127.0.0.1", 0)
    print(server.sockets[0].getsockname()[1], flush=True)
    # Serve until the test closes our standard input.
    await loop.run_in_executor(None, sys.stdin.read)
    server.close()

asyncio.run(main())
"#;

pub(crate) struct Sink {
    child: Child,
    stdin: Option<ChildStdin>,
    port: u16,
    dir: PathBuf,
}

impl Sink {
    pub(crate) fn start(dir: &Path, mode: &str) -> Sink {
        let out = dir.join(format!("sink-{mode}"));
        std::fs::create_dir_all(&out).expect("sink folder");
        let mut child = Command::new(python::interpreter())
            .arg("-c")
            .arg(SINK)
            .arg(&out)
            .arg(mode)
            .stdin(Stdio::piped())
            .stdout(Stdio::piped())
            .stderr(Stdio::inherit())
            .spawn()
            .expect("start the aiosmtpd sink");
        let stdin = child.stdin.take();
        let mut line = String::new();
        if let Some(stdout) = child.stdout.take() {
            let _ = BufReader::new(stdout).read_line(&mut line);
        }
        let port: u16 = line.trim().parse().unwrap_or_else(|_| {
            let _ = child.kill();
            panic!("the sink did not report its port (is aiosmtpd installed? pip install -r scripts/requirements.txt): {line:?}")
        });
        Sink {
            child,
            stdin,
            port,
            dir: out,
        }
    }

    pub(crate) fn address(&self) -> String {
        format!("127.0.0.1:{}", self.port)
    }

    /// The messages received so far, in order: (content, envelope and options).
    pub(crate) fn received(&self) -> Vec<(Vec<u8>, Value)> {
        let mut out = Vec::new();
        for n in 1.. {
            let eml = self.dir.join(format!("{n}.eml"));
            let Ok(content) = std::fs::read(&eml) else {
                break;
            };
            let meta = std::fs::read(self.dir.join(format!("{n}.json")))
                .ok()
                .and_then(|b| serde_json::from_slice(&b).ok())
                .unwrap_or(Value::Null);
            out.push((content, meta));
        }
        out
    }
}

impl Drop for Sink {
    fn drop(&mut self) {
        drop(self.stdin.take());
        let _ = self.child.kill();
        let _ = self.child.wait();
    }
}

/// A configuration with the store and `[release]` pointing at `next_hop`.
fn fixture(next_hop: &str) -> Fixture {
    Fixture::new(&format!(
        "[release]\nnext_hop = \"{next_hop}\"\nhelo_name = \"filter.example.org\"\nconnect_timeout = \"5s\"\ncommand_timeout = \"20s\"\n"
    ))
}

/// A message that exercises the transparency rules: lines that begin with a dot, a line
/// holding only a dot (which would end the data if sent as it is), a line of two dots,
/// and 8-bit UTF-8 text (sent with BODY=8BITMIME).
pub(crate) fn tricky_message(id: &str) -> Vec<u8> {
    format!(
        "From: Ops Desk <desk@prize.test>\r\nTo: ann@example.org\r\nSubject: Held {id}\r\nMessage-ID: <{id}@prize.test>\r\nMIME-Version: 1.0\r\nContent-Type: text/plain; charset=utf-8\r\nContent-Transfer-Encoding: 8bit\r\n\r\nFirst line.\r\n.\r\n..\r\n.leading dot\r\n. spaced\r\nCafé crème, naïve façade.\r\n\r\n.\r\nLast line.\r\n"
    )
    .into_bytes()
}

#[test]
fn a_release_delivers_exactly_the_held_bytes() {
    let dir = tempfile::tempdir().expect("temp dir");
    let sink = Sink::start(dir.path(), "accept");
    let fx = fixture(&sink.address());
    let store = fx.store();
    let bytes = tricky_message("REL1");
    hold(
        &store,
        "REL1",
        tamis::store::record::now() - 60,
        2.0,
        "ann@example.org",
        &bytes,
    );
    let out = tamis(&["held", "release", "--config", &fx.config_arg(), "REL1"]);
    let (code, text, err) = outcome(&out);
    assert_eq!(code, 0, "{text}{err}");
    assert!(
        text.contains(&format!("REL1: re-injected to {}", sink.address())),
        "{text}"
    );
    assert!(text.contains("250 2.0.0 stored as 1"), "{text}");

    let received = sink.received();
    assert_eq!(received.len(), 1);
    let (content, meta) = &received[0];
    // RFC 5321 §4.5.2: the server removed the dots the client added; what is left must be
    // the held message byte for byte.
    assert!(
        *content == bytes,
        "delivered bytes differ:\n{}\n---\n{}",
        String::from_utf8_lossy(content),
        String::from_utf8_lossy(&bytes)
    );
    assert_eq!(meta["mail_from"], "desk@prize.test");
    assert_eq!(meta["rcpt_tos"], serde_json::json!(["ann@example.org"]));
    // RFC 6152: 8-bit content is announced as such.
    assert!(
        meta["mail_options"]
            .as_array()
            .is_some_and(|o| o.iter().any(|x| x == "BODY=8BITMIME")),
        "{meta}"
    );

    // The store: released, and a legitimate report from the release with the vector.
    let held = store
        .get_held("REL1")
        .expect("read")
        .expect("kept until it expires");
    assert_eq!(held.summary.state, HeldState::Released);
    let reports = store.reports(0, 10).expect("reports");
    assert_eq!(reports.len(), 1);
    assert_eq!(
        (reports[0].kind, reports[0].source, reports[0].status),
        (
            ReportKind::NotJunk,
            ReportSource::Release,
            ReportStatus::Matched
        )
    );
    assert!(reports[0].features.as_ref().is_some_and(|v| v.nnz() > 0));

    // Released again: nothing happens, and the command says so.
    let out = tamis(&[
        "held",
        "release",
        "--config",
        &fx.config_arg(),
        "REL1",
        "--format",
        "json",
    ]);
    assert_eq!(out.status.code(), Some(3));
    assert_eq!(json(&out)["results"][0]["outcome"], "already-released");
    assert_eq!(sink.received().len(), 1);
}

#[test]
fn the_null_sender_and_several_messages_share_one_connection() {
    let dir = tempfile::tempdir().expect("temp dir");
    let sink = Sink::start(dir.path(), "accept");
    let fx = fixture(&sink.address());
    let store = fx.store();
    let t = tamis::store::record::now();
    let mut expected = Vec::new();
    for i in 0..3 {
        let id = format!("MANY{i}");
        let bytes = tricky_message(&id);
        hold(
            &store,
            &id,
            t - 60 + i,
            2.0,
            &format!("user{i}@example.org"),
            &bytes,
        );
        expected.push(bytes);
    }
    // A bounce (null sender, RFC 5321 §4.5.5) held too.
    let bounce =
        b"From: MAILER-DAEMON@relay.example.org\r\nSubject: Undelivered\r\n\r\nSorry.\r\n".to_vec();
    let mut e = crate::operator::entry(
        "BOUNCE",
        t - 10,
        1.2,
        &[(
            "example.org",
            tamis::policy::Action::Quarantine,
            tamis::policy::Action::Quarantine,
        )],
    );
    e.size = bounce.len() as u64;
    store
        .hold(
            &e,
            &tamis::store::Hold {
                sender: "",
                recipients: &["postmaster@example.org".to_string()],
                message: &bounce,
            },
        )
        .expect("hold");
    let out = tamis(&[
        "held",
        "release",
        "--config",
        &fx.config_arg(),
        "MANY0",
        "MANY1",
        "MANY2",
        "BOUNCE",
        "--format",
        "json",
    ]);
    assert_eq!(out.status.code(), Some(0));
    let result = json(&out);
    assert_eq!(result["released"], 4);
    let received = sink.received();
    assert_eq!(received.len(), 4);
    for (i, bytes) in expected.iter().enumerate() {
        assert!(received[i].0 == *bytes, "message {i} differs");
    }
    assert!(received[3].0 == bounce);
    assert_eq!(received[3].1["mail_from"], "<>");
}

#[test]
fn two_releases_at_once_deliver_each_message_once() {
    let dir = tempfile::tempdir().expect("temp dir");
    let sink = Sink::start(dir.path(), "accept");
    let fx = fixture(&sink.address());
    let store = fx.store();
    let t = tamis::store::record::now();
    let ids: Vec<String> = (0..4).map(|i| format!("RACE{i}")).collect();
    for (i, id) in ids.iter().enumerate() {
        hold(
            &store,
            id,
            t - 60 + i as i64,
            2.0,
            "ann@example.org",
            &tricky_message(id),
        );
    }
    let spawn = || {
        let mut cmd = Command::new(env!("CARGO_BIN_EXE_tamis"));
        cmd.args([
            "held",
            "release",
            "--config",
            &fx.config_arg(),
            "--format",
            "json",
        ])
        .args(&ids)
        .stdout(Stdio::piped())
        .stderr(Stdio::piped());
        cmd.spawn().expect("start a release")
    };
    let (a, b) = (spawn(), spawn());
    let outs = [
        a.wait_with_output().expect("first release"),
        b.wait_with_output().expect("second release"),
    ];
    // Each message was re-injected exactly once, whoever won it.
    let received = sink.received();
    let mut subjects: Vec<String> = received
        .iter()
        .map(|(c, _)| {
            String::from_utf8_lossy(c)
                .lines()
                .find_map(|l| l.strip_prefix("Subject: Held ").map(str::to_string))
                .unwrap_or_default()
        })
        .collect();
    subjects.sort();
    assert_eq!(subjects, ids);
    let mut released = 0;
    for out in &outs {
        let r = json(out);
        released += r["released"].as_u64().unwrap_or(0);
        for item in r["results"].as_array().cloned().unwrap_or_default() {
            let o = item["outcome"].as_str().unwrap_or("");
            assert!(
                ["released", "in-progress", "already-released"].contains(&o),
                "{item}"
            );
        }
    }
    assert_eq!(released, 4);
    let reports = store.reports(0, 100).expect("reports");
    assert_eq!(reports.len(), 4, "one legitimate report per release");
}

#[test]
fn a_next_hop_that_is_down_leaves_the_message_held() {
    // A port nothing listens on: bind one, note it, let it go.
    let port = std::net::TcpListener::bind("127.0.0.1:0")
        .and_then(|l| l.local_addr())
        .map(|a| a.port())
        .expect("a free port");
    let fx = fixture(&format!("127.0.0.1:{port}"));
    let store = fx.store();
    let t = tamis::store::record::now();
    hold(
        &store,
        "DOWN1",
        t - 60,
        2.0,
        "ann@example.org",
        &tricky_message("DOWN1"),
    );
    hold(
        &store,
        "DOWN2",
        t - 50,
        2.0,
        "ann@example.org",
        &tricky_message("DOWN2"),
    );
    let out = tamis(&[
        "held",
        "release",
        "--config",
        &fx.config_arg(),
        "DOWN1",
        "DOWN2",
    ]);
    let (code, text, err) = outcome(&out);
    assert_eq!(code, 1, "{text}{err}");
    assert!(text.contains("DOWN1: NOT released, still held"), "{text}");
    assert!(text.contains("cannot connect"), "{text}");
    assert!(text.contains("DOWN2: not tried, still held"), "{text}");
    assert!(text.contains("0 of 2 message(s) released"), "{text}");
    for id in ["DOWN1", "DOWN2"] {
        let held = store.get_held(id).expect("read").expect("still there");
        assert_eq!(held.summary.state, HeldState::Held, "{id}");
    }
    assert!(store.reports(0, 10).expect("reports").is_empty());

    let out = tamis(&[
        "held",
        "release",
        "--config",
        &fx.config_arg(),
        "DOWN1",
        "--format",
        "json",
    ]);
    let r = json(&out);
    assert_eq!(r["results"][0]["outcome"], "failed");
    assert_eq!(r["results"][0]["failure"], "connection");
}

#[test]
fn refusals_leave_the_message_held_and_say_whether_to_retry() {
    let dir = tempfile::tempdir().expect("temp dir");
    for (mode, failure, advice) in [
        ("tempfail-data", "transient", "try again later"),
        ("reject-rcpt", "permanent", "release it with --to FILE"),
    ] {
        let sink = Sink::start(dir.path(), mode);
        let fx = fixture(&sink.address());
        let store = fx.store();
        hold(
            &store,
            "REFUSED",
            tamis::store::record::now() - 60,
            2.0,
            "ann@example.org",
            &tricky_message("REFUSED"),
        );
        let (code, text, _) = outcome(&tamis(&[
            "held",
            "release",
            "--config",
            &fx.config_arg(),
            "REFUSED",
        ]));
        assert_eq!(code, 1, "{mode}: {text}");
        assert!(text.contains("NOT released, still held"), "{mode}: {text}");
        assert!(text.contains(advice), "{mode}: {text}");
        let code = if mode == "reject-rcpt" { "550" } else { "451" };
        assert!(text.contains(code), "{mode}: {text}");
        let out = tamis(&[
            "held",
            "release",
            "--config",
            &fx.config_arg(),
            "REFUSED",
            "--format",
            "json",
        ]);
        assert_eq!(json(&out)["results"][0]["failure"], failure);
        let held = store.get_held("REFUSED").expect("read").expect("kept");
        assert_eq!(held.summary.state, HeldState::Held, "{mode}");
        assert!(sink.received().is_empty(), "{mode}");
        assert!(store.reports(0, 10).expect("reports").is_empty(), "{mode}");
    }
}

#[test]
fn a_release_to_a_file_writes_the_exact_bytes_privately() {
    let fx = Fixture::new("");
    let store = fx.store();
    let bytes = tricky_message("FILE1");
    hold(
        &store,
        "FILE1",
        tamis::store::record::now() - 60,
        2.0,
        "ann@example.org",
        &bytes,
    );
    hold(
        &store,
        "FILE2",
        tamis::store::record::now() - 50,
        2.0,
        "ann@example.org",
        &tricky_message("FILE2"),
    );
    let cfg = fx.config_arg();
    // No next hop configured: release over SMTP is refused with what to do.
    let (code, _, err) = outcome(&tamis(&["held", "release", "--config", &cfg, "FILE1"]));
    assert_eq!(code, 2);
    assert!(
        err.contains("no next hop") && err.contains("--to FILE"),
        "{err}"
    );
    let target = fx.dir.path().join("released.eml");
    let out = tamis(&[
        "held",
        "release",
        "--config",
        &cfg,
        "FILE1",
        "--to",
        &target.display().to_string(),
    ]);
    assert_eq!(
        out.status.code(),
        Some(0),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    assert!(std::fs::read(&target).expect("written") == bytes);
    use std::os::unix::fs::PermissionsExt;
    let mode = std::fs::metadata(&target)
        .expect("stat")
        .permissions()
        .mode()
        & 0o777;
    assert_eq!(mode & 0o077, 0, "held mail readable by others: {mode:o}");
    // To standard output (a pipe here): the bytes, and the account on stderr.
    let out = tamis(&["held", "release", "--config", &cfg, "FILE2", "--to", "-"]);
    assert_eq!(out.status.code(), Some(0));
    assert!(out.stdout == tricky_message("FILE2"));
    assert!(String::from_utf8_lossy(&out.stderr).contains("FILE2: written to standard output"));
    assert_eq!(
        store
            .get_held("FILE2")
            .expect("read")
            .map(|h| h.summary.state),
        Some(HeldState::Released)
    );
}
