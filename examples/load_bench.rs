//! Load benchmark of the daemon: K concurrent relay clients over loopback TCP and a Unix
//! socket stream demo messages of typical size (4–16 KB) through a real `tamis serve`
//! process, while a SIGHUP reload happens mid-run; reports messages/s and latency
//! percentiles beside in-process scoring throughput measured in the same run, so the
//! protocol's cost is a ratio.
//!
//! The daemon runs three times on the same mail: without a store (`store.enabled =
//! false`), with the store (every verdict journalled, tag-only), and with the store and
//! quarantine on for one of the two recipient domains (half the mail; its junk is held,
//! each hold flushed to disk before its verdict). Each run prints its figures and the
//! ratio of its throughput to the run without a store; after each run with a store the
//! journal is counted against the messages sent.
//!
//! The machine may be shared, so the three runs take turns, three rounds by default, and
//! the summary lines compare medians.
//!
//! Usage: cargo run --release --example load_bench -- [CLIENTS] [MESSAGES_PER_CLIENT] [ROUNDS]
//! (builds on `target/release/tamis`; run `cargo build --release` first).

use std::path::PathBuf;
use std::process::{Command, Stdio};
use std::sync::Arc;
use std::time::{Duration, Instant};

use anyhow::{Context, bail};
use tamis::proto::client::Client;

fn percentile(sorted: &[f64], p: f64) -> f64 {
    if sorted.is_empty() {
        return f64::NAN;
    }
    let rank = ((p / 100.0) * (sorted.len() as f64 - 1.0)).round() as usize;
    sorted[rank.min(sorted.len() - 1)]
}

fn free_port() -> anyhow::Result<u16> {
    Ok(std::net::TcpListener::bind("127.0.0.1:0")?
        .local_addr()?
        .port())
}

struct RunResult {
    messages: usize,
    errors: usize,
    seconds: f64,
    latencies_ms: Vec<f64>,
}

/// Half the mail goes to each domain; the quarantine run lets the first one quarantine.
const DOMAINS: [&str; 2] = ["quarantine.test", "uni-lindqvist.test"];

fn run_clients(
    run: &str,
    addr: &str,
    clients: usize,
    per_client: usize,
    messages: &Arc<Vec<Vec<u8>>>,
    hup: Option<u32>,
) -> RunResult {
    let started = Instant::now();
    let mut handles = Vec::new();
    for c in 0..clients {
        let addr = addr.to_string();
        let run = run.to_string();
        let messages = Arc::clone(messages);
        handles.push(std::thread::spawn(move || {
            let mut latencies = Vec::with_capacity(per_client);
            let mut errors = 0;
            let Ok(mut client) = Client::connect(&addr, Duration::from_secs(30)) else {
                return (latencies, per_client);
            };
            let rcpts: Vec<Vec<String>> =
                DOMAINS.iter().map(|d| vec![format!("staff@{d}")]).collect();
            let mut raw = Vec::new();
            for i in 0..per_client {
                // Each message distinct, as real mail is: a held message sent again with
                // the same envelope would be found already held, not held anew.
                raw.clear();
                raw.extend_from_slice(format!("X-Bench: {run}-{c}-{i}\r\n").as_bytes());
                raw.extend_from_slice(&messages[(c * 7919 + i) % messages.len()]);
                let t = Instant::now();
                match client.scan("sender@example.net", &rcpts[i % 2], &raw) {
                    Ok(v) if v.recipients.len() == 1 => {
                        latencies.push(t.elapsed().as_secs_f64() * 1e3)
                    }
                    _ => errors += 1,
                }
            }
            let _ = client.bye();
            (latencies, errors)
        }));
    }
    if let Some(pid) = hup {
        // Reload in the middle of the run.
        std::thread::sleep(Duration::from_millis(300));
        let _ = Command::new("kill")
            .args(["-HUP", &pid.to_string()])
            .status();
    }
    let mut latencies_ms = Vec::new();
    let mut errors = 0;
    for h in handles {
        let (l, e) = h.join().unwrap_or_default();
        latencies_ms.extend(l);
        errors += e;
    }
    latencies_ms.sort_by(f64::total_cmp);
    RunResult {
        messages: latencies_ms.len(),
        errors,
        seconds: started.elapsed().as_secs_f64(),
        latencies_ms,
    }
}

/// One daemon with `extra` appended to its configuration: both transports, then a clean
/// stop; with a store, the journal is counted against the messages sent.
fn run_daemon(
    binary: &PathBuf,
    run: &str,
    extra: &str,
    clients: usize,
    per_client: usize,
    messages: &Arc<Vec<Vec<u8>>>,
) -> anyhow::Result<Vec<(&'static str, RunResult)>> {
    let dir = tempfile::tempdir()?;
    let (relay, status) = (free_port()?, free_port()?);
    let socket = dir.path().join("tamis.sock");
    let config = dir.path().join("bench.toml");
    std::fs::write(
        &config,
        format!(
            "metrics = \"127.0.0.1:{status}\"\n[listen]\ntcp = \"127.0.0.1:{relay}\"\n[listen.unix]\npath = \"{}\"\n[limits]\nmax_connections = 1024\n[logging]\nlevel = \"warn\"\n{extra}",
            socket.display()
        ),
    )?;
    let mut daemon = Command::new(binary)
        .arg("serve")
        .arg("--config")
        .arg(&config)
        .stdout(Stdio::null())
        .stderr(Stdio::null())
        .spawn()
        .context("start tamis serve")?;
    let relay_addr = format!("127.0.0.1:{relay}");
    let mut up = false;
    for _ in 0..200 {
        std::thread::sleep(Duration::from_millis(50));
        if Client::connect(&relay_addr, Duration::from_secs(5)).is_ok() {
            up = true;
            break;
        }
    }
    if !up {
        let _ = daemon.kill();
        bail!("daemon did not start ({run})");
    }
    let unix_addr = format!("unix:{}", socket.display());
    let mut results = Vec::new();
    for (name, addr) in [("tcp", relay_addr.as_str()), ("unix", unix_addr.as_str())] {
        let r = run_clients(
            &format!("{run}-{name}"),
            addr,
            clients,
            per_client,
            messages,
            Some(daemon.id()),
        );
        results.push((name, r));
    }
    // Prove the reloads happened: read the daemon's own counters (a reload of the built-in
    // model retrains it, which takes a moment).
    std::thread::sleep(Duration::from_secs(3));
    let counters = {
        use std::io::{Read, Write};
        let mut s = std::net::TcpStream::connect(("127.0.0.1", status))?;
        s.write_all(b"GET /metrics HTTP/1.1\r\nHost: x\r\n\r\n")?;
        let mut text = String::new();
        let _ = s.read_to_string(&mut text);
        text.lines()
            .filter(|l| {
                l.starts_with("tamis_reloads_total")
                    || l.starts_with("tamis_holds_total")
                    || l.starts_with("tamis_journal_entries_lost_total")
                    || l.starts_with("tamis_store_errors_total") && !l.ends_with(" 0")
            })
            .collect::<Vec<_>>()
            .join("; ")
    };
    let _ = Command::new("kill")
        .args(["-TERM", &daemon.id().to_string()])
        .status();
    let exit = daemon.wait()?;
    let journal = if extra.contains("path") {
        use tamis::store::Store;
        let store = tamis::store::SqliteStore::open(
            &dir.path().join("store.sqlite"),
            tamis::store::StoreOptions::default(),
        )?;
        let figures = store.figures(0, None)?;
        let journalled: u64 = figures
            .iter()
            .map(|f| {
                let a = &f.by_action;
                a.accept + a.tag + a.quarantine + a.defer
            })
            .sum();
        let held: u64 = figures.iter().map(|f| f.by_action.quarantine).sum();
        format!(",\"journalled\":{journalled},\"held\":{held}")
    } else {
        String::new()
    };
    let answered: usize = results.iter().map(|(_, r)| r.messages).sum();
    println!(
        "{{\"run\":\"{run}\",\"what\":\"after\",\"answered\":{answered}{journal},\"clean_exit\":{},\"counters\":\"{}\"}}",
        exit.success(),
        counters.replace('"', "'")
    );
    Ok(results)
}

fn main() -> anyhow::Result<()> {
    let args: Vec<usize> = std::env::args()
        .skip(1)
        .filter_map(|a| a.parse().ok())
        .collect();
    let clients = args.first().copied().unwrap_or(16);
    let per_client = args.get(1).copied().unwrap_or(500);
    let rounds = args.get(2).copied().unwrap_or(3).max(1);
    let binary = PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("target/release/tamis");
    if !binary.exists() {
        bail!("build the daemon first: cargo build --release");
    }
    // Typical mail: demo messages between 4 and 16 KB.
    let messages: Vec<Vec<u8>> = tamis::demo::generate(77, 20_000)
        .map(|m| m.bytes)
        .filter(|b| (4 * 1024..=16 * 1024).contains(&b.len()))
        .take(2000)
        .collect();
    let messages = Arc::new(messages);
    let mean_size = messages.iter().map(Vec::len).sum::<usize>() / messages.len().max(1);

    // In-process baseline: the same messages through the same engine, no protocol.
    let model = tamis::model::builtin::demonstration_model()?;
    let decisions = tamis::server::engine::Decisions {
        policy: tamis::config::Config::default().policy,
        headers: Default::default(),
        on_failure: Default::default(),
    };
    let engine = Arc::new(tamis::server::engine::Engine::new(
        model, "bench", decisions,
    )?);
    let threads = 2;
    let per_thread = 4000;
    let t = Instant::now();
    let workers: Vec<_> = (0..threads)
        .map(|w| {
            let engine = Arc::clone(&engine);
            let messages = Arc::clone(&messages);
            std::thread::spawn(move || {
                for i in 0..per_thread {
                    let _ = engine.score(&messages[(w * 31 + i) % messages.len()]);
                }
            })
        })
        .collect();
    for w in workers {
        let _ = w.join();
    }
    let in_process = (threads * per_thread) as f64 / t.elapsed().as_secs_f64();

    println!(
        "{{\"what\":\"setup\",\"clients\":{clients},\"messages_per_client\":{per_client},\"mean_message_bytes\":{mean_size},\"in_process_msgs_per_s\":{in_process:.0},\"in_process_threads\":{threads}}}"
    );
    let runs = [
        ("no-store", "[store]\nenabled = false\n"),
        ("store", "[store]\npath = \"store.sqlite\"\n"),
        (
            "store+quarantine",
            "[store]\npath = \"store.sqlite\"\n[policy.domains.\"quarantine.test\"]\ntag_margin = 0.0\nquarantine_margin = 1.0\ntag_only = false\n",
        ),
    ];
    // The machine is shared: the three runs take turns, `rounds` times, and the summary
    // compares medians.
    let mut seen: Vec<(String, &str, f64, f64)> = Vec::new();
    for round in 0..rounds {
        for (run, extra) in runs {
            let results = run_daemon(&binary, run, extra, clients, per_client, &messages)?;
            for (name, r) in &results {
                let rate = r.messages as f64 / r.seconds;
                let p99 = percentile(&r.latencies_ms, 99.0);
                println!(
                    "{{\"round\":{round},\"run\":\"{run}\",\"transport\":\"{name}\",\"messages\":{},\"errors\":{},\"expected\":{},\"msgs_per_s\":{rate:.0},\"p50_ms\":{:.3},\"p99_ms\":{p99:.3},\"p99_9_ms\":{:.3},\"ratio_to_in_process\":{:.3},\"sighup_during_run\":true}}",
                    r.messages,
                    r.errors,
                    clients * per_client,
                    percentile(&r.latencies_ms, 50.0),
                    percentile(&r.latencies_ms, 99.9),
                    rate / in_process,
                );
                seen.push((run.to_string(), name, rate, p99));
            }
        }
    }
    let median = |run: &str, transport: &str, pick: fn(&(String, &str, f64, f64)) -> f64| {
        let mut v: Vec<f64> = seen
            .iter()
            .filter(|s| s.0 == run && s.1 == transport)
            .map(pick)
            .collect();
        v.sort_by(f64::total_cmp);
        v.get(v.len() / 2).copied().unwrap_or(f64::NAN)
    };
    for transport in ["tcp", "unix"] {
        let base_rate = median("no-store", transport, |s| s.2);
        let base_p99 = median("no-store", transport, |s| s.3);
        for (run, _) in runs {
            let rate = median(run, transport, |s| s.2);
            let p99 = median(run, transport, |s| s.3);
            println!(
                "{{\"what\":\"summary\",\"rounds\":{rounds},\"run\":\"{run}\",\"transport\":\"{transport}\",\"median_msgs_per_s\":{rate:.0},\"median_p99_ms\":{p99:.3},\"throughput_ratio_to_no_store\":{:.3},\"p99_ratio_to_no_store\":{:.3}}}",
                rate / base_rate,
                p99 / base_p99
            );
        }
    }
    Ok(())
}
