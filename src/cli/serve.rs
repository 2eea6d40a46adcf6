//! `tamis serve`: the daemon a relay talks to.

use std::path::PathBuf;
use std::sync::Arc;

use tokio::signal::unix::{SignalKind, signal};

use super::input::BadInput;
use crate::config::{Config, LogFormat};
use crate::metrics::{Metrics, ReloadOutcome};
use crate::server::build::{build_engine, describe_model};
use crate::server::engine::SharedEngine;
use crate::server::listen::start;

/// Arguments of `tamis serve`.
#[derive(clap::Args, Debug)]
pub struct ServeArgs {
    /// Configuration file (TOML; see config/tamis.example.toml). Without it tamis runs on
    /// built-in defaults: loopback listeners, tag-only policy and the built-in DEMONSTRATION
    /// model, which must be replaced by a model trained on your own mail.
    #[arg(long, value_name = "FILE")]
    config: Option<PathBuf>,
}

fn load_config(path: &Option<PathBuf>) -> anyhow::Result<Config> {
    match path {
        Some(p) => Ok(Config::load(p).map_err(|e| BadInput(e.to_string()))?),
        None => Ok(Config::default()),
    }
}

fn init_logging(config: &Config) {
    let filter = tracing_subscriber::EnvFilter::try_from_default_env()
        .unwrap_or_else(|_| tracing_subscriber::EnvFilter::new(config.logging.level.as_str()));
    let builder = tracing_subscriber::fmt()
        .with_env_filter(filter)
        .with_writer(std::io::stderr);
    // A second initialisation (tests, demo) keeps the first subscriber.
    let _ = match config.logging.format {
        LogFormat::Json => builder.json().try_init(),
        LogFormat::Human => builder.try_init(),
    };
}

/// Runs `tamis serve` until SIGTERM or SIGINT.
pub fn run(args: &ServeArgs) -> anyhow::Result<u8> {
    let config = load_config(&args.config)?;
    init_logging(&config);
    if args.config.is_none() {
        eprintln!(
            "tamis: no --config given: running on built-in defaults (loopback only, tag-only policy)"
        );
    }
    let engine = build_engine(&config).map_err(|e| BadInput(e.to_string()))?;
    if engine.origin().starts_with("built-in") {
        eprintln!("tamis: WARNING: {}", crate::model::builtin::WARNING);
    }
    let metrics = Arc::new(Metrics::new(config.policy.domains().keys())?);
    describe_model(&metrics, engine.model());
    let shared = SharedEngine::new(engine);
    let runtime = tokio::runtime::Builder::new_multi_thread()
        .enable_all()
        .build()?;
    runtime.block_on(async move {
        let running = start(&config, shared.clone(), Arc::clone(&metrics)).await?;
        if let Some(addr) = running.tcp {
            eprintln!("tamis: relay protocol on tcp {addr}");
        }
        if let Some(path) = &running.unix {
            eprintln!("tamis: relay protocol on unix {}", path.display());
        }
        if let Some(addr) = running.status {
            eprintln!("tamis: metrics on http://{addr}/metrics (health: /healthz, /readyz)");
        }
        let mut terminate = signal(SignalKind::terminate())?;
        let mut interrupt = signal(SignalKind::interrupt())?;
        let mut hangup = signal(SignalKind::hangup())?;
        loop {
            tokio::select! {
                _ = terminate.recv() => break,
                _ = interrupt.recv() => break,
                _ = hangup.recv() => reload(&args.config, &shared, &metrics).await,
            }
        }
        tracing::info!("shutting down: finishing open messages");
        let clean = running.stop().await;
        if !clean {
            tracing::warn!("grace period over: remaining connections were closed");
        }
        anyhow::Ok(super::EXIT_OK)
    })
}

/// Builds the new engine from the configuration file and swaps it in; anything invalid
/// leaves the old engine serving. Listener and limit changes need a restart.
async fn reload(path: &Option<PathBuf>, shared: &SharedEngine, metrics: &Arc<Metrics>) {
    let path = path.clone();
    let built = tokio::task::spawn_blocking(move || -> anyhow::Result<_> {
        let config = load_config(&path)?;
        let engine = build_engine(&config)?;
        Ok((config, engine))
    })
    .await;
    match built {
        Ok(Ok((config, engine))) => {
            describe_model(metrics, engine.model());
            metrics.set_domains(config.policy.domains().keys());
            let origin = engine.origin().to_string();
            shared.swap(engine);
            metrics.reload(ReloadOutcome::Success);
            tracing::info!(model = %origin, "reloaded configuration and model");
        }
        Ok(Err(e)) => {
            metrics.reload(ReloadOutcome::Failure);
            tracing::error!(error = %format!("{e:#}"), "reload failed; the previous model keeps serving");
        }
        Err(e) => {
            metrics.reload(ReloadOutcome::Failure);
            tracing::error!(error = %e, "reload task failed; the previous model keeps serving");
        }
    }
}
