//! Files, reads and daemon operation under a careless operator or a hostile local user:
//! writes that must not follow planted links or land on devices, reads of model, config and
//! labels files that must stay bounded in size and time, a reload that must not block
//! shutdown, a metrics port that must not starve the relay port, and the errors of `tamis
//! check` and `tamis train`.
//!
//! Every subprocess runs under a deadline, so a regression shows as a failed test rather than
//! a hung suite; reads that used to grow without bound run under an address-space limit, so
//! a regression shows as a failed test rather than a machine out of memory.

use std::io::{Read, Write};
use std::net::{SocketAddr, TcpListener, TcpStream};
use std::os::unix::fs::FileTypeExt;
use std::path::{Path, PathBuf};
use std::process::{Child, Command, Output, Stdio};
use std::sync::{Arc, OnceLock};
use std::time::{Duration, Instant};

use bytes::BytesMut;
use tamis::config::Config;
use tamis::metrics::Metrics;
use tamis::model::LinearModel;
use tamis::proto::client::Client;
use tamis::proto::{Frame, encode_frame, parse_frame};
use tamis::server::engine::{Decisions, Engine, SharedEngine};

fn tamis() -> Command {
    Command::new(env!("CARGO_BIN_EXE_tamis"))
}

fn s(p: &Path) -> &str {
    p.to_str().expect("UTF-8 temp path")
}

/// Runs `cmd` to completion within `limit`, or kills it and fails the test.
fn run_within(mut cmd: Command, limit: Duration) -> Output {
    let child = cmd
        .stdin(Stdio::null())
        .stdout(Stdio::piped())
        .stderr(Stdio::piped())
        .spawn()
        .expect("start tamis");
    let pid = child.id();
    let (tx, rx) = std::sync::mpsc::channel();
    std::thread::spawn(move || {
        let _ = tx.send(child.wait_with_output());
    });
    match rx.recv_timeout(limit) {
        Ok(output) => output.expect("wait for tamis"),
        Err(_) => {
            let _ = Command::new("kill")
                .args(["-KILL", &pid.to_string()])
                .status();
            panic!("tamis {cmd:?} did not finish within {limit:?}");
        }
    }
}

/// `tamis ARGS` with a deadline.
fn run(args: &[&str]) -> Output {
    let mut cmd = tamis();
    cmd.args(args);
    run_within(cmd, Duration::from_secs(60))
}

/// `tamis ARGS` with at most 1 GiB of address space: an unbounded read of a huge or endless
/// file then fails to allocate instead of taking the machine's memory.
fn run_small(args: &[&str]) -> Output {
    let mut cmd = Command::new("sh");
    cmd.arg("-c")
        .arg("ulimit -v 1048576 && exec \"$0\" \"$@\"")
        .arg(env!("CARGO_BIN_EXE_tamis"))
        .args(args);
    run_within(cmd, Duration::from_secs(30))
}

/// The standard error of `out`, cut to a readable length for assertion messages.
fn stderr(out: &Output) -> String {
    let text = String::from_utf8_lossy(&out.stderr);
    let cut: String = text.chars().take(4000).collect();
    cut
}

fn assert_untouched(victim: &Path) {
    let bytes = std::fs::read(victim).expect("victim");
    assert!(
        bytes == b"precious",
        "the link's target was overwritten ({} bytes)",
        bytes.len()
    );
}

fn mkfifo(path: &Path) {
    let ok = Command::new("mkfifo")
        .arg(path)
        .status()
        .expect("mkfifo")
        .success();
    assert!(ok, "mkfifo {}", path.display());
}

fn is_fifo(path: &Path) -> bool {
    std::fs::symlink_metadata(path).is_ok_and(|m| m.file_type().is_fifo())
}

fn is_symlink(path: &Path) -> bool {
    std::fs::symlink_metadata(path).is_ok_and(|m| m.file_type().is_symlink())
}

/// A small separable svmlight file: trains in a blink with `--ngram 1 --folds 2`.
fn tiny_svmlight(dir: &Path) -> PathBuf {
    let path = dir.join("tiny.svm");
    let mut text = String::new();
    for i in 0..8 {
        text.push_str(&format!("+1 {}:1 {}:0.5\n", 1 + i % 3, 10 + i));
        text.push_str(&format!("-1 {}:1 {}:0.5\n", 100 + i % 3, 200 + i));
    }
    std::fs::write(&path, text).expect("write svmlight");
    path
}

fn train_args<'a>(svm: &'a Path, out: &'a Path) -> Vec<&'a str> {
    vec![
        "train",
        "--svmlight",
        s(svm),
        "--ngram",
        "1",
        "--hash-bits",
        "10",
        "--c",
        "1",
        "--folds",
        "2",
        "--out",
        s(out),
    ]
}

/// A model trained on the tiny svmlight file, and a small invented corpus to run it on.
struct Kit {
    _dir: tempfile::TempDir,
    model: PathBuf,
    labels: PathBuf,
}

fn kit() -> &'static Kit {
    static KIT: OnceLock<Kit> = OnceLock::new();
    KIT.get_or_init(|| {
        let dir = tempfile::tempdir().expect("temp dir");
        let svm = tiny_svmlight(dir.path());
        let model = dir.path().join("tiny.tamis");
        let out = run(&train_args(&svm, &model));
        assert!(out.status.success(), "{}", stderr(&out));
        let corpus = dir.path().join("corpus");
        let out = run(&["corpus", "--out", s(&corpus), "--count", "40"]);
        assert!(out.status.success(), "{}", stderr(&out));
        Kit {
            labels: corpus.join("labels.tsv"),
            model,
            _dir: dir,
        }
    })
}

/// Item 4: every file the tool writes goes through one writer that neither follows a planted
/// link nor lands on a device, FIFO or folder.
mod safe_writes {
    use super::*;

    #[test]
    fn train_out_ignores_a_symlink_planted_at_the_old_temporary_name() {
        let dir = tempfile::tempdir().expect("temp dir");
        let svm = tiny_svmlight(dir.path());
        let victim = dir.path().join("victim");
        std::fs::write(&victim, b"precious").expect("victim");
        let out_path = dir.path().join("model.tamis");
        std::os::unix::fs::symlink(&victim, dir.path().join("model.tamis.tmp")).expect("link");
        let out = run(&train_args(&svm, &out_path));
        assert!(out.status.success(), "{}", stderr(&out));
        assert_untouched(&victim);
        assert!(tamis::model::file::load_model(&out_path).is_ok());
        // No temporary file is left beside the model.
        let names: Vec<String> = std::fs::read_dir(dir.path())
            .expect("list")
            .map(|e| e.expect("entry").file_name().to_string_lossy().into_owned())
            .collect();
        assert!(
            !names
                .iter()
                .any(|n| n.ends_with(".tmp") && n != "model.tamis.tmp"),
            "{names:?}"
        );
    }

    #[test]
    fn train_out_refuses_a_symlink_fifo_or_folder_at_the_target() {
        let dir = tempfile::tempdir().expect("temp dir");
        let svm = tiny_svmlight(dir.path());
        let victim = dir.path().join("victim");
        std::fs::write(&victim, b"precious").expect("victim");
        let link = dir.path().join("link.tamis");
        std::os::unix::fs::symlink(&victim, &link).expect("link");
        let fifo = dir.path().join("fifo.tamis");
        mkfifo(&fifo);
        let folder = dir.path().join("folder.tamis");
        std::fs::create_dir(&folder).expect("folder");
        for (target, kind) in [
            (&link, "symbolic link"),
            (&fifo, "FIFO"),
            (&folder, "folder"),
        ] {
            let out = run(&train_args(&svm, target));
            let err = stderr(&out);
            assert_eq!(out.status.code(), Some(2), "{err}");
            assert!(err.contains(s(target)) && err.contains(kind), "{err}");
        }
        assert!(is_symlink(&link) && is_fifo(&fifo) && folder.is_dir());
        assert_untouched(&victim);
    }

    #[test]
    fn features_and_tune_refuse_a_fifo_target() {
        let kit = kit();
        let dir = tempfile::tempdir().expect("temp dir");
        let fifo = dir.path().join("out");
        mkfifo(&fifo);
        let features = run(&[
            "features",
            "--labels",
            s(&kit.labels),
            "--hash-bits",
            "10",
            "--out",
            s(&fifo),
        ]);
        let tune = run(&[
            "tune",
            "--model",
            s(&kit.model),
            "--labels",
            s(&kit.labels),
            "--out",
            s(&fifo),
        ]);
        for out in [features, tune] {
            let err = stderr(&out);
            assert_eq!(out.status.code(), Some(2), "{err}");
            assert!(err.contains(s(&fifo)) && err.contains("FIFO"), "{err}");
        }
        assert!(is_fifo(&fifo));
    }

    #[test]
    fn reports_plots_and_corpus_files_do_not_follow_planted_links() {
        let kit = kit();
        let dir = tempfile::tempdir().expect("temp dir");
        let victim = dir.path().join("victim");
        std::fs::write(&victim, b"precious").expect("victim");
        // eval --plot DIR with DIR/roc.svg planted.
        let plots = dir.path().join("plots");
        std::fs::create_dir(&plots).expect("plots");
        std::os::unix::fs::symlink(&victim, plots.join("roc.svg")).expect("link");
        let out = run(&[
            "eval",
            "--model",
            s(&kit.model),
            "--labels",
            s(&kit.labels),
            "--plot",
            s(&plots),
        ]);
        assert_ne!(out.status.code(), Some(0));
        assert!(stderr(&out).contains("roc.svg"), "{}", stderr(&out));
        // train --report DIR with DIR/report.json planted.
        let report = dir.path().join("report");
        std::fs::create_dir(&report).expect("report");
        std::os::unix::fs::symlink(&victim, report.join("report.json")).expect("link");
        let svm = tiny_svmlight(dir.path());
        let model = dir.path().join("m.tamis");
        let mut args = train_args(&svm, &model);
        args.extend(["--report", s(&report)]);
        let out = run(&args);
        assert_ne!(out.status.code(), Some(0));
        assert!(stderr(&out).contains("report.json"), "{}", stderr(&out));
        // corpus --out DIR with DIR/labels.tsv planted.
        let corpus = dir.path().join("corpus");
        std::fs::create_dir(&corpus).expect("corpus");
        std::os::unix::fs::symlink(&victim, corpus.join("labels.tsv")).expect("link");
        let out = run(&["corpus", "--out", s(&corpus), "--count", "5"]);
        assert_ne!(out.status.code(), Some(0));
        assert!(stderr(&out).contains("labels.tsv"), "{}", stderr(&out));
        assert_untouched(&victim);
    }
}

/// Item 6: reads of model, labels, config and svmlight files are bounded before anything
/// big is allocated.
mod bounded_reads {
    use super::*;

    /// A valid model followed by a hole: 4 GiB on paper, a few blocks on disk.
    fn swollen_model(dir: &Path) -> PathBuf {
        let path = dir.join("swollen.tamis");
        std::fs::copy(&kit().model, &path).expect("copy model");
        let file = std::fs::OpenOptions::new()
            .write(true)
            .open(&path)
            .expect("open");
        file.set_len(4 << 30).expect("sparse extend");
        path
    }

    #[test]
    fn a_model_larger_than_its_header_declares_is_refused_unread() {
        let dir = tempfile::tempdir().expect("temp dir");
        let swollen = swollen_model(dir.path());
        let started = Instant::now();
        let out = run_small(&["score", "--model", s(&swollen), s(&kit().labels)]);
        let err = stderr(&out);
        assert_eq!(out.status.code(), Some(2), "{err}");
        assert!(
            err.contains(s(&swollen)) && err.contains("larger than its header declares"),
            "{err}"
        );
        assert!(started.elapsed() < Duration::from_secs(10));
    }

    #[test]
    fn a_device_as_model_is_refused_as_not_a_regular_file() {
        let out = run_small(&["score", "--model", "/dev/zero", s(&kit().labels)]);
        let err = stderr(&out);
        assert_eq!(out.status.code(), Some(2), "{err}");
        assert!(
            err.contains("/dev/zero") && err.contains("not a regular file"),
            "{err}"
        );
    }

    #[test]
    fn an_endless_or_huge_labels_file_stops_at_the_line_cap() {
        let dir = tempfile::tempdir().expect("temp dir");
        let sparse = dir.path().join("labels.tsv");
        std::fs::File::create(&sparse)
            .expect("create")
            .set_len(4 << 30)
            .expect("sparse");
        for labels in [Path::new("/dev/zero"), sparse.as_path()] {
            let out = run_small(&["eval", "--model", s(&kit().model), "--labels", s(labels)]);
            let err = stderr(&out);
            assert_eq!(out.status.code(), Some(2), "{err}");
            assert!(
                err.contains(&format!("{}:1:", labels.display())) && err.contains("longer than"),
                "{err}"
            );
        }
    }

    #[test]
    fn a_long_labels_line_names_its_line_number() {
        let dir = tempfile::tempdir().expect("temp dir");
        let labels = dir.path().join("labels.tsv");
        let long = "x".repeat(100_000);
        std::fs::write(&labels, format!("# note\na.eml\tspam\n{long}\tham\n")).expect("write");
        let out = run_small(&["eval", "--model", s(&kit().model), "--labels", s(&labels)]);
        let err = stderr(&out);
        assert_eq!(out.status.code(), Some(2), "{err}");
        assert!(
            err.contains(&format!("{}:3:", labels.display())) && err.contains("longer than"),
            "{err}"
        );
    }

    #[test]
    fn a_huge_or_special_config_file_is_refused() {
        let dir = tempfile::tempdir().expect("temp dir");
        let sparse = dir.path().join("tamis.toml");
        std::fs::File::create(&sparse)
            .expect("create")
            .set_len(4 << 30)
            .expect("sparse");
        let fifo = dir.path().join("fifo.toml");
        mkfifo(&fifo);
        for (config, words) in [
            (sparse.as_path(), "larger than"),
            (fifo.as_path(), "not a regular file"),
            (Path::new("/dev/zero"), "not a regular file"),
        ] {
            let out = run_small(&["config", "check", s(config)]);
            let err = stderr(&out);
            assert_eq!(out.status.code(), Some(2), "{err}");
            assert!(err.contains(s(config)) && err.contains(words), "{err}");
        }
    }

    #[test]
    fn an_endless_svmlight_file_stops_at_the_line_cap() {
        let dir = tempfile::tempdir().expect("temp dir");
        let out = run_small(&[
            "train",
            "--svmlight",
            "/dev/zero",
            "--ngram",
            "1",
            "--out",
            s(&dir.path().join("m")),
        ]);
        let err = stderr(&out);
        assert_eq!(out.status.code(), Some(2), "{err}");
        assert!(
            err.contains("/dev/zero:1") && err.contains("longer than"),
            "{err}"
        );
    }
}

/// A configuration serving on free loopback ports, with `model` as its model file.
fn serve_config(dir: &Path, model: &Path) -> (PathBuf, SocketAddr, SocketAddr) {
    let (relay, status) = (free_port(), free_port());
    let config = dir.join("tamis.toml");
    std::fs::write(
        &config,
        format!(
            "metrics = \"127.0.0.1:{status}\"\n[listen]\ntcp = \"127.0.0.1:{relay}\"\n[limits]\ngrace_period = \"3s\"\n[model]\npath = \"{}\"\n[store]\npath = \"store.sqlite\"\n",
            model.display()
        ),
    )
    .expect("write config");
    let addr = |p: u16| SocketAddr::from(([127, 0, 0, 1], p));
    (config, addr(relay), addr(status))
}

fn free_port() -> u16 {
    TcpListener::bind("127.0.0.1:0")
        .expect("bind")
        .local_addr()
        .expect("addr")
        .port()
}

fn built_in() -> &'static LinearModel {
    static MODEL: OnceLock<LinearModel> = OnceLock::new();
    MODEL.get_or_init(|| tamis::model::builtin::demonstration_model().expect("builds"))
}

fn message() -> Vec<u8> {
    tamis::demo::generate(21, 1)
        .last()
        .expect("a message")
        .bytes
}

/// Starts `sh -c "SETUP; exec tamis serve --config CONFIG"`.
fn spawn_serve(setup: &str, config: &Path) -> Child {
    Command::new("sh")
        .arg("-c")
        .arg(format!("{setup} exec \"$0\" serve --config \"$1\""))
        .arg(env!("CARGO_BIN_EXE_tamis"))
        .arg(config)
        .stdin(Stdio::null())
        .stdout(Stdio::null())
        .stderr(Stdio::piped())
        .spawn()
        .expect("start the daemon")
}

fn wait_ready(daemon: &mut Child, relay: SocketAddr) {
    for _ in 0..200 {
        if let Some(exit) = daemon.try_wait().expect("poll") {
            let mut err = String::new();
            if let Some(mut e) = daemon.stderr.take() {
                let _ = e.read_to_string(&mut err);
            }
            panic!("the daemon exited early ({exit:?}): {err}");
        }
        if TcpStream::connect(relay).is_ok() {
            return;
        }
        std::thread::sleep(Duration::from_millis(50));
    }
    panic!("the daemon did not start listening");
}

fn signal(daemon: &Child, name: &str) {
    let ok = Command::new("kill")
        .args([&format!("-{name}"), &daemon.id().to_string()])
        .status()
        .expect("kill")
        .success();
    assert!(ok, "kill -{name}");
}

/// Waits up to `limit` for the daemon to exit; kills it and fails otherwise.
fn exits_within(daemon: &mut Child, limit: Duration) -> std::process::ExitStatus {
    let started = Instant::now();
    while started.elapsed() < limit {
        if let Some(exit) = daemon.try_wait().expect("poll") {
            return exit;
        }
        std::thread::sleep(Duration::from_millis(50));
    }
    let _ = daemon.kill();
    let _ = daemon.wait();
    panic!("the daemon did not exit within {limit:?}");
}

fn scan(relay: SocketAddr) -> Result<f64, String> {
    let mut client =
        Client::connect(&relay.to_string(), Duration::from_secs(10)).map_err(|e| e.to_string())?;
    client
        .scan("a@example.net", &["b@example.org".to_string()], &message())
        .map(|v| v.margin)
        .map_err(|e| e.to_string())
}

/// Item 5: model and config reads refuse FIFOs at start-up, and a reload in progress never
/// holds up shutdown.
mod daemon_files {
    use super::*;

    #[test]
    fn serve_with_the_model_on_a_fifo_fails_fast_naming_the_path() {
        let dir = tempfile::tempdir().expect("temp dir");
        let fifo = dir.path().join("model.fifo");
        mkfifo(&fifo);
        let (config, _, _) = serve_config(dir.path(), &fifo);
        let mut cmd = tamis();
        cmd.args(["serve", "--config", s(&config)]);
        let out = run_within(cmd, Duration::from_secs(15));
        let err = stderr(&out);
        assert_eq!(out.status.code(), Some(2), "{err}");
        assert!(
            err.contains(s(&fifo)) && err.contains("not a regular file"),
            "{err}"
        );
    }

    #[test]
    fn sighup_with_the_model_on_a_fifo_then_sigterm_exits_within_the_grace_period() {
        let dir = tempfile::tempdir().expect("temp dir");
        let model = dir.path().join("model.tamis");
        tamis::model::file::save_model(built_in(), &model).expect("save");
        let (config, relay, _) = serve_config(dir.path(), &model);
        let mut daemon = spawn_serve("", &config);
        wait_ready(&mut daemon, relay);
        let before = scan(relay).expect("verdict before the reload");
        std::fs::remove_file(&model).expect("remove");
        mkfifo(&model);
        signal(&daemon, "HUP");
        std::thread::sleep(Duration::from_millis(300));
        // The old model still serves while (or after) the reload fails.
        assert_eq!(scan(relay), Ok(before));
        signal(&daemon, "TERM");
        // grace_period is 3 s; allow start-up slack on a loaded machine.
        let exit = exits_within(&mut daemon, Duration::from_secs(8));
        assert!(exit.success(), "{exit:?}");
        let mut err = String::new();
        daemon
            .stderr
            .take()
            .expect("stderr")
            .read_to_string(&mut err)
            .expect("read stderr");
        assert!(err.contains("not a regular file"), "{err}");
    }
}

/// The daemon of `tests/it/daemon.rs`, in process on loopback.
async fn in_process_daemon() -> tamis::server::listen::Running {
    let mut config = Config::default();
    config.listen.tcp = Some("127.0.0.1:0".parse().expect("addr"));
    config.metrics = Some("127.0.0.1:0".parse().expect("addr"));
    config.store.path = crate::daemon::fresh_store_path();
    let decisions = Decisions {
        policy: config.policy.clone(),
        headers: config.headers.clone(),
        on_failure: config.on_failure,
    };
    let engine = Engine::new(built_in().clone(), "test model", decisions).expect("engine");
    let metrics = Arc::new(Metrics::new(config.policy.domains().keys()).expect("metrics"));
    tamis::server::listen::start(&config, SharedEngine::new(engine), metrics)
        .await
        .expect("binds on loopback")
}

/// Item 7: the metrics listener cannot use up the descriptors the relay listener needs.
mod status_port {
    use super::*;

    #[tokio::test(flavor = "multi_thread", worker_threads = 2)]
    async fn connections_over_the_status_cap_are_closed_at_once_and_relay_answers() {
        let running = in_process_daemon().await;
        let status = running.status.expect("status address");
        let relay = running.tcp.expect("relay address");
        let cap = tamis::server::http::MAX_STATUS_CONNECTIONS;
        let extra = 40;
        let closed = tokio::task::spawn_blocking(move || {
            // Silent clients: each would hold a task for the request timeout (5 s).
            let held: Vec<TcpStream> = (0..cap + extra)
                .map(|_| TcpStream::connect(status).expect("connect"))
                .collect();
            std::thread::sleep(Duration::from_millis(1000));
            let started = Instant::now();
            let closed = held
                .iter()
                .filter(|s| {
                    s.set_nonblocking(true).expect("non-blocking");
                    matches!((&mut &**s).read(&mut [0u8; 1]), Ok(0))
                })
                .count();
            (closed, started.elapsed(), scan(relay), held.len())
        })
        .await
        .expect("task");
        let (closed, took, verdict, held) = closed;
        assert!(closed >= extra, "{closed} of {held} closed in {took:?}");
        assert!(verdict.is_ok(), "{verdict:?}");
        running.stop().await;
    }

    fn soft_and_hard_open_files(pid: u32) -> (String, String) {
        let limits = std::fs::read_to_string(format!("/proc/{pid}/limits")).expect("limits");
        let line = limits
            .lines()
            .find(|l| l.starts_with("Max open files"))
            .expect("open files line");
        let mut words = line.split_whitespace().skip(3);
        (
            words.next().expect("soft").to_string(),
            words.next().expect("hard").to_string(),
        )
    }

    #[test]
    fn serve_raises_its_descriptor_limit_and_a_status_flood_leaves_relay_answering() {
        let dir = tempfile::tempdir().expect("temp dir");
        let model = dir.path().join("model.tamis");
        tamis::model::file::save_model(built_in(), &model).expect("save");
        let (config, relay, status) = serve_config(dir.path(), &model);
        let mut daemon = spawn_serve("ulimit -S -n 128 &&", &config);
        wait_ready(&mut daemon, relay);
        let (soft, hard) = soft_and_hard_open_files(daemon.id());
        // More silent clients than the daemon's soft limit at start.
        let flood: Vec<TcpStream> = (0..300)
            .filter_map(|_| TcpStream::connect(status).ok())
            .collect();
        std::thread::sleep(Duration::from_millis(300));
        let verdict = scan(relay);
        drop(flood);
        signal(&daemon, "TERM");
        let _ = exits_within(&mut daemon, Duration::from_secs(10));
        assert_eq!(soft, hard, "soft limit raised to the hard limit");
        assert!(verdict.is_ok(), "{verdict:?}");
    }
}

/// A stand-in daemon: shakes hands (or not), then hangs or drops the connection.
fn fake_daemon(handshake: bool) -> SocketAddr {
    let listener = TcpListener::bind("127.0.0.1:0").expect("bind");
    let addr = listener.local_addr().expect("addr");
    std::thread::spawn(move || {
        let Ok((mut stream, _)) = listener.accept() else {
            return;
        };
        if !handshake {
            std::thread::sleep(Duration::from_secs(10));
            return;
        }
        let mut buf = BytesMut::new();
        let mut chunk = [0u8; 4096];
        loop {
            if let Ok(Some(_)) = parse_frame(&buf, 1 << 20) {
                break;
            }
            match stream.read(&mut chunk) {
                Ok(0) | Err(_) => return,
                Ok(n) => buf.extend_from_slice(&chunk[..n]),
            }
        }
        let mut out = BytesMut::new();
        encode_frame(
            &Frame::Welcome {
                version: 1,
                max_frame: 1 << 20,
                max_message: 1 << 20,
                server: "stand-in".into(),
            },
            &mut out,
        )
        .expect("encode");
        let _ = stream.write_all(&out);
        // Dies on the first message.
        let _ = stream.read(&mut chunk);
    });
    addr
}

/// Item 11: `tamis check` and `tamis train` report each failure once, clearly.
mod cli_errors {
    use super::*;

    #[test]
    fn check_reports_a_silent_daemon_as_an_operational_failure() {
        let addr = fake_daemon(false).to_string();
        let out = run(&[
            "check",
            "--connect",
            &addr,
            "--timeout",
            "1",
            "--rcpt",
            "a@example.org",
            s(&kit().labels),
        ]);
        let err = stderr(&out);
        assert_eq!(out.status.code(), Some(1), "{err}");
        assert!(
            err.contains(&format!("the daemon at {addr} did not answer within 1 s")),
            "{err}"
        );
        assert!(!err.contains("os error"), "{err}");
    }

    #[test]
    fn check_when_the_daemon_dies_prints_the_error_once_and_a_line_per_file() {
        let addr = fake_daemon(true).to_string();
        let dir = tempfile::tempdir().expect("temp dir");
        let files: Vec<PathBuf> = (0..3)
            .map(|i| {
                let path = dir.path().join(format!("m{i}.eml"));
                std::fs::write(&path, message()).expect("write");
                path
            })
            .collect();
        let mut args = vec![
            "check",
            "--connect",
            &addr,
            "--timeout",
            "5",
            "--rcpt",
            "a@example.org",
        ];
        args.extend(files.iter().map(|f| s(f)));
        let out = run(&args);
        let err = stderr(&out);
        assert_eq!(out.status.code(), Some(1), "{err}");
        let lost = format!("lost the connection to the daemon at {addr}");
        assert_eq!(err.matches(&lost).count(), 1, "{err}");
        for file in &files {
            let line = format!("{}: not checked", file.display());
            assert_eq!(err.matches(&line).count(), 1, "{err}");
        }
    }

    #[test]
    fn train_out_a_folder_prints_its_error_once_before_training() {
        let dir = tempfile::tempdir().expect("temp dir");
        let svm = tiny_svmlight(dir.path());
        let out = run(&train_args(&svm, dir.path()));
        let err = stderr(&out);
        assert_eq!(out.status.code(), Some(2), "{err}");
        assert_eq!(err.lines().count(), 1, "{err}");
        assert_eq!(err.matches("folder").count(), 1, "{err}");
        assert!(out.stdout.is_empty(), "nothing was trained");
    }
}
