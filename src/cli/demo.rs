//! `tamis demo`: the whole story on the invented scenario — corpus, training, a daemon on
//! loopback, mail streamed through the relay protocol, a verdict table per domain, and the
//! metrics URL.

use std::collections::BTreeMap;
use std::path::PathBuf;
use std::sync::Arc;
use std::time::Duration;

use crate::Label;
use crate::config::Config;
use crate::metrics::Metrics;
use crate::model::builtin::demonstration_model;
use crate::model::file::save_model;
use crate::policy::{Policy, Thresholds};
use crate::proto::Action;
use crate::proto::client::Client;
use crate::server::build::describe_model;
use crate::server::engine::{Decisions, Engine, SharedEngine};
use crate::server::listen::start;

/// Arguments of `tamis demo`.
#[derive(clap::Args, Debug)]
pub struct DemoArgs {
    /// Folder for the demo's corpus and model (default: a temporary folder, removed after).
    #[arg(long, value_name = "DIR")]
    dir: Option<PathBuf>,
    /// Held-out messages streamed through the daemon.
    #[arg(long, default_value_t = 1000)]
    messages: usize,
    /// Keep the daemon running after the table, until Ctrl-C, to look at its metrics.
    #[arg(long)]
    stay: bool,
}

#[derive(Default)]
struct Row {
    counts: BTreeMap<(&'static str, &'static str), usize>,
}

/// Runs `tamis demo`.
pub fn run(args: &DemoArgs) -> anyhow::Result<u8> {
    // Without --dir the demo works in a temporary folder, removed when `_temp` is dropped.
    let (_temp, dir) = match &args.dir {
        Some(dir) => {
            std::fs::create_dir_all(dir)?;
            (None, dir.clone())
        }
        None => {
            let temp = tempfile::tempdir()?;
            let path = temp.path().to_path_buf();
            (Some(temp), path)
        }
    };
    println!(
        "tamis demo — invented scenario (made-up organisations on reserved domains); nothing here measures accuracy on real mail.\n"
    );
    println!(
        "1. corpus: writing 3,000 labelled training messages to {}",
        dir.join("corpus").display()
    );
    crate::demo::write_corpus(&dir.join("corpus"), 7, 3000)?;
    println!(
        "2. training: linear SVM on word n-grams (n <= 2), Platt calibration on out-of-fold margins"
    );
    let model = demonstration_model()?;
    let model_path = dir.join("model.tamis");
    save_model(&model, &model_path)?;
    let thresholds = model.thresholds().unwrap_or(crate::model::Thresholds {
        tag: 0.0,
        quarantine: 1.0,
    });
    println!(
        "   model written to {} (tag at margin >= {:.3}, quarantine at margin >= {:.3})",
        model_path.display(),
        thresholds.tag,
        thresholds.quarantine
    );
    let policy = Policy::new(
        Thresholds::on_margin(thresholds.tag, thresholds.quarantine)?,
        Vec::new(),
        false,
    )?;
    let mut config = Config::default();
    config.listen.tcp = Some("127.0.0.1:0".parse()?);
    config.metrics = Some("127.0.0.1:0".parse()?);
    config.policy = policy.clone();
    // The demo's verdicts and held mail stay in its own folder, never in the operator's store.
    config.store.path = dir.join("store.sqlite");
    let decisions = Decisions {
        policy,
        headers: config.headers.clone(),
        on_failure: config.on_failure,
    };
    let engine = Engine::new(model, model_path.display().to_string(), decisions)?;
    let metrics = Arc::new(Metrics::new(Vec::<String>::new())?);
    describe_model(&metrics, engine.model());
    let runtime = tokio::runtime::Builder::new_multi_thread()
        .enable_all()
        .build()?;
    let running = runtime.block_on(start(
        &config,
        SharedEngine::new(engine),
        Arc::clone(&metrics),
    ))?;
    let addr = running.tcp.map(|a| a.to_string()).unwrap_or_default();
    let status = running.status.map(|a| a.to_string()).unwrap_or_default();
    println!("3. daemon: relay protocol on {addr}, metrics on http://{status}/metrics");
    println!(
        "4. streaming {} held-out messages through the relay protocol ...",
        args.messages
    );

    let mut client = Client::connect(&addr, Duration::from_secs(30))?;
    let mut rows: BTreeMap<String, Row> = BTreeMap::new();
    for message in crate::demo::generate(8, args.messages) {
        let rcpt = format!("someone@{}", message.domain);
        let verdict = client.scan("sender@example.net", &[rcpt], &message.bytes)?;
        let action = verdict
            .recipients
            .first()
            .map_or(Action::Defer, |r| r.action)
            .as_str();
        let label = if message.label == Label::Spam {
            "junk"
        } else {
            "legitimate"
        };
        *rows
            .entry(message.domain)
            .or_default()
            .counts
            .entry((label, action))
            .or_default() += 1;
    }
    let _ = client.bye();

    println!(
        "\n5. verdicts per recipient domain (labels are the scenario's user reports, with their noise):\n"
    );
    println!(
        "{:<26} {:>10} | {:>7} {:>5} {:>10} | {:>7} {:>5} {:>10}",
        "domain", "messages", "junk:", "", "", "legit:", "", ""
    );
    println!(
        "{:<26} {:>10} | {:>7} {:>5} {:>10} | {:>7} {:>5} {:>10}",
        "", "", "accept", "tag", "quarantine", "accept", "tag", "quarantine"
    );
    for (domain, row) in &rows {
        let c = |label, action| row.counts.get(&(label, action)).copied().unwrap_or(0);
        let total: usize = row.counts.values().sum();
        println!(
            "{domain:<26} {total:>10} | {:>7} {:>5} {:>10} | {:>7} {:>5} {:>10}",
            c("junk", "accept"),
            c("junk", "tag"),
            c("junk", "quarantine"),
            c("legitimate", "accept"),
            c("legitimate", "tag"),
            c("legitimate", "quarantine")
        );
    }
    println!(
        "\nLegitimate mail in the tag or quarantine columns is what a false positive costs. Start in"
    );
    println!("tag-only mode on real mail, and measure before letting anything be quarantined.");
    println!("\n6. metrics: http://{status}/metrics");
    if args.stay {
        println!("   daemon running; Ctrl-C to stop");
        runtime.block_on(async { tokio::signal::ctrl_c().await })?;
    }
    let clean = runtime.block_on(running.stop());
    if !clean {
        eprintln!("tamis: some connections were cut at shutdown");
    }
    Ok(super::EXIT_OK)
}
