//! Load benchmark of the daemon: K concurrent relay clients over loopback TCP and a Unix
//! socket stream demo messages of typical size (4–16 KB) through a real `tamis serve`
//! process, while a SIGHUP reload happens mid-run; reports messages/s and latency
//! percentiles beside in-process scoring throughput measured in the same run, so the
//! protocol's cost is a ratio.
//!
//! Usage: cargo run --release --example load_bench -- [CLIENTS] [MESSAGES_PER_CLIENT]
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

fn run_clients(
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
        let messages = Arc::clone(messages);
        handles.push(std::thread::spawn(move || {
            let mut latencies = Vec::with_capacity(per_client);
            let mut errors = 0;
            let Ok(mut client) = Client::connect(&addr, Duration::from_secs(30)) else {
                return (latencies, per_client);
            };
            let rcpts = vec!["staff@uni-lindqvist.test".to_string()];
            for i in 0..per_client {
                let raw = &messages[(c * 7919 + i) % messages.len()];
                let t = Instant::now();
                match client.scan("sender@example.net", &rcpts, raw) {
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

fn main() -> anyhow::Result<()> {
    let args: Vec<usize> = std::env::args()
        .skip(1)
        .filter_map(|a| a.parse().ok())
        .collect();
    let clients = args.first().copied().unwrap_or(16);
    let per_client = args.get(1).copied().unwrap_or(500);
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

    let dir = tempfile::tempdir()?;
    let (relay, status) = (free_port()?, free_port()?);
    let socket = dir.path().join("tamis.sock");
    let config = dir.path().join("bench.toml");
    std::fs::write(
        &config,
        format!(
            "metrics = \"127.0.0.1:{status}\"\n[listen]\ntcp = \"127.0.0.1:{relay}\"\n[listen.unix]\npath = \"{}\"\n[limits]\nmax_connections = 1024\n[logging]\nlevel = \"warn\"\n",
            socket.display()
        ),
    )?;
    let mut daemon = Command::new(&binary)
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
        bail!("daemon did not start");
    }
    println!(
        "{{\"what\":\"setup\",\"clients\":{clients},\"messages_per_client\":{per_client},\"mean_message_bytes\":{mean_size},\"in_process_msgs_per_s\":{in_process:.0},\"in_process_threads\":{threads}}}"
    );
    let unix_addr = format!("unix:{}", socket.display());
    for (name, addr) in [("tcp", relay_addr.as_str()), ("unix", unix_addr.as_str())] {
        let r = run_clients(addr, clients, per_client, &messages, Some(daemon.id()));
        let rate = r.messages as f64 / r.seconds;
        println!(
            "{{\"transport\":\"{name}\",\"messages\":{},\"errors\":{},\"expected\":{},\"msgs_per_s\":{rate:.0},\"p50_ms\":{:.3},\"p99_ms\":{:.3},\"p99_9_ms\":{:.3},\"ratio_to_in_process\":{:.3},\"sighup_during_run\":true}}",
            r.messages,
            r.errors,
            clients * per_client,
            percentile(&r.latencies_ms, 50.0),
            percentile(&r.latencies_ms, 99.0),
            percentile(&r.latencies_ms, 99.9),
            rate / in_process
        );
    }
    // Prove the reloads happened: read the daemon's own counters (a reload of the built-in
    // model retrains it, which takes a moment).
    std::thread::sleep(Duration::from_secs(3));
    let reloads = {
        use std::io::{Read, Write};
        let mut s = std::net::TcpStream::connect(("127.0.0.1", status))?;
        s.write_all(b"GET /metrics HTTP/1.1\r\nHost: x\r\n\r\n")?;
        let mut text = String::new();
        let _ = s.read_to_string(&mut text);
        text.lines()
            .filter(|l| l.starts_with("tamis_reloads_total"))
            .collect::<Vec<_>>()
            .join("; ")
    };
    println!(
        "{{\"what\":\"reloads\",\"counters\":\"{}\"}}",
        reloads.replace('"', "'")
    );
    let _ = Command::new("kill")
        .args(["-TERM", &daemon.id().to_string()])
        .status();
    let exit = daemon.wait()?;
    let metrics = std::net::TcpStream::connect(("127.0.0.1", status)).is_ok();
    println!(
        "{{\"what\":\"shutdown\",\"clean_exit\":{},\"metrics_still_up\":{metrics}}}",
        exit.success()
    );
    Ok(())
}
