//! `tamis serve`: the daemon a relay talks to.
//!
//! The signal loop only ever does instant work: SIGTERM and SIGINT start the shutdown at
//! once, and SIGHUP only asks the [`Reloader`] for a reload. Reloads run on their own task,
//! one at a time; SIGHUPs that arrive while one runs are coalesced into a single reload after
//! it, so the newest files are always read and a stalled read never delays shutdown.

use std::future::Future;
use std::path::PathBuf;
use std::sync::Arc;
use std::sync::atomic::{AtomicBool, Ordering};
use std::time::Duration;

use tokio::signal::unix::{SignalKind, signal};
use tokio::sync::Notify;
use tokio::task::JoinHandle;

use super::input::BadInput;
use crate::config::{Config, LogFormat, default_store_path};
use crate::metrics::{Metrics, ReloadOutcome};
use crate::server::build::{build_engine, describe_model};
use crate::server::engine::SharedEngine;
use crate::server::keeping::{Keeping, KeepingSettings, open_store};
use crate::server::listen::start_with;

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

/// Raises the soft limit on open descriptors to the hard limit, so the configured connection
/// limits, not whatever limit the starting shell had, bound the daemon. A failure is logged
/// and start-up goes on with the limit it has.
fn raise_descriptor_limit() {
    use rustix::process::{Resource, Rlimit, getrlimit, setrlimit};
    let limit = getrlimit(Resource::Nofile);
    let (Some(soft), Some(hard)) = (limit.current, limit.maximum) else {
        // Unlimited (`None`) on either side leaves nothing to raise.
        return;
    };
    if soft >= hard {
        return;
    }
    let raised = Rlimit {
        current: Some(hard),
        maximum: Some(hard),
    };
    match setrlimit(Resource::Nofile, raised) {
        Ok(()) => tracing::debug!(from = soft, to = hard, "raised the open-file limit"),
        Err(e) => tracing::warn!(
            limit = soft,
            error = %e,
            "could not raise the open-file limit to the hard limit; connections may fail under load"
        ),
    }
}

/// Opens the store before anything is bound and says where it is; a store that cannot
/// be opened stops the start with an error naming its path.
fn open_keeping(config: &Config, metrics: &Arc<Metrics>) -> anyhow::Result<Option<Arc<Keeping>>> {
    if !config.store.enabled {
        eprintln!(
            "tamis: no store (store.enabled = false): verdicts are not journalled and nothing can be held"
        );
        return Ok(None);
    }
    let path = &config.store.path;
    let (default, origin) = default_store_path();
    let from = if *path == default {
        origin.describe()
    } else {
        "configured in [store] path"
    };
    let store = open_keeping_store(config)?;
    eprintln!(
        "tamis: store {} ({from}): held mail, verdict journal, reports",
        path.display()
    );
    let keeping = Keeping::start(
        Arc::new(store),
        Arc::clone(metrics),
        KeepingSettings::default(),
        config.store.record_subject,
    )?;
    Ok(Some(keeping))
}

fn open_keeping_store(config: &Config) -> anyhow::Result<crate::store::SqliteStore> {
    open_store(&config.store).map_err(|e| {
        let hint = if config.store.path == default_store_path().0 {
            " (no [store] path is configured: set one in a configuration file to put the store elsewhere)"
        } else {
            ""
        };
        anyhow::anyhow!("{e}{hint}")
    })
}

/// Runs `tamis serve` until SIGTERM or SIGINT.
pub fn run(args: &ServeArgs) -> anyhow::Result<u8> {
    let config = load_config(&args.config)?;
    init_logging(&config);
    raise_descriptor_limit();
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
    let keeping = open_keeping(&config, &metrics)?;
    let shared = SharedEngine::new(engine);
    let runtime = tokio::runtime::Builder::new_multi_thread()
        .enable_all()
        .build()?;
    let outcome = runtime.block_on(async move {
        let running = start_with(&config, shared.clone(), Arc::clone(&metrics), keeping).await?;
        if let Some(addr) = running.tcp {
            eprintln!("tamis: relay protocol on tcp {addr}");
        }
        if let Some(path) = &running.unix {
            eprintln!("tamis: relay protocol on unix {}", path.display());
        }
        if let Some(addr) = running.status {
            eprintln!(
                "tamis: status page on http://{addr}/, metrics on http://{addr}/metrics (health: /healthz, /readyz)"
            );
        }
        let mut terminate = signal(SignalKind::terminate())?;
        let mut interrupt = signal(SignalKind::interrupt())?;
        let mut hangup = signal(SignalKind::hangup())?;
        let reloader = {
            let (path, shared, metrics) =
                (args.config.clone(), shared.clone(), Arc::clone(&metrics));
            Reloader::spawn(move || reload(path.clone(), shared.clone(), Arc::clone(&metrics)))
        };
        loop {
            tokio::select! {
                _ = terminate.recv() => break,
                _ = interrupt.recv() => break,
                _ = hangup.recv() => {
                    if !reloader.request() {
                        tracing::info!("a reload is already running; one more will follow it");
                    }
                }
            }
        }
        // A reload still reading stays behind: the old engine keeps serving until the end.
        reloader.stop();
        tracing::info!("shutting down: finishing open messages");
        let clean = running.stop().await;
        if !clean {
            tracing::warn!("grace period over: remaining connections were closed");
        }
        anyhow::Ok(super::EXIT_OK)
    });
    // A reload's read that stalled (see `crate::fsio::with_deadline`) must not keep the
    // process alive: blocking tasks still running are left behind.
    runtime.shutdown_timeout(Duration::from_millis(500));
    outcome
}

/// Runs reloads on their own task, at most one at a time. Requests made while a reload runs
/// leave one pending reload (however many arrive), which starts when the running one ends.
struct Reloader {
    wake: Arc<Notify>,
    busy: Arc<AtomicBool>,
    task: JoinHandle<()>,
}

impl Reloader {
    /// Starts the task; each requested reload runs `reload()` to completion.
    fn spawn<F, Fut>(reload: F) -> Reloader
    where
        F: Fn() -> Fut + Send + 'static,
        Fut: Future<Output = ()> + Send + 'static,
    {
        let wake = Arc::new(Notify::new());
        let busy = Arc::new(AtomicBool::new(false));
        let task = tokio::spawn({
            let (wake, busy) = (Arc::clone(&wake), Arc::clone(&busy));
            async move {
                loop {
                    // `Notify` keeps at most one permit: requests made during a reload
                    // coalesce into one.
                    wake.notified().await;
                    busy.store(true, Ordering::SeqCst);
                    reload().await;
                    busy.store(false, Ordering::SeqCst);
                }
            }
        });
        Reloader { wake, busy, task }
    }

    /// Asks for a reload without waiting for it. Returns false when one is already running
    /// (this request then runs after it, merged with any others).
    fn request(&self) -> bool {
        let idle = !self.busy.load(Ordering::SeqCst);
        self.wake.notify_one();
        idle
    }

    /// Stops the task; a reload in progress is abandoned and nothing is swapped in.
    fn stop(self) {
        self.task.abort();
    }
}

/// Builds the new engine from the configuration file and swaps it in; anything invalid
/// leaves the old engine serving. Listener and limit changes need a restart.
async fn reload(path: Option<PathBuf>, shared: SharedEngine, metrics: Arc<Metrics>) {
    let built = tokio::task::spawn_blocking(move || -> anyhow::Result<_> {
        let config = load_config(&path)?;
        let engine = build_engine(&config)?;
        Ok((config, engine))
    })
    .await;
    match built {
        Ok(Ok((config, engine))) => {
            describe_model(&metrics, engine.model());
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

#[cfg(test)]
mod tests {
    use super::*;
    use std::sync::atomic::AtomicUsize;
    use tokio::sync::Semaphore;

    async fn until(what: impl Fn() -> bool) {
        for _ in 0..500 {
            if what() {
                return;
            }
            tokio::time::sleep(Duration::from_millis(10)).await;
        }
        panic!("condition not reached in 5 s");
    }

    #[tokio::test]
    async fn a_blocked_reload_does_not_block_requests_and_requests_made_meanwhile_coalesce() {
        let started = Arc::new(AtomicUsize::new(0));
        let running = Arc::new(AtomicUsize::new(0));
        let most_at_once = Arc::new(AtomicUsize::new(0));
        // Each reload blocks until the test hands it a permit, as a stalled read would.
        let gate = Arc::new(Semaphore::new(0));
        let reloader = {
            let (started, running, most_at_once, gate) = (
                Arc::clone(&started),
                Arc::clone(&running),
                Arc::clone(&most_at_once),
                Arc::clone(&gate),
            );
            Reloader::spawn(move || {
                let (started, running, most_at_once, gate) = (
                    Arc::clone(&started),
                    Arc::clone(&running),
                    Arc::clone(&most_at_once),
                    Arc::clone(&gate),
                );
                async move {
                    started.fetch_add(1, Ordering::SeqCst);
                    let now = running.fetch_add(1, Ordering::SeqCst) + 1;
                    most_at_once.fetch_max(now, Ordering::SeqCst);
                    if let Ok(permit) = gate.acquire().await {
                        permit.forget();
                    }
                    running.fetch_sub(1, Ordering::SeqCst);
                }
            })
        };
        assert!(reloader.request(), "idle: the reload starts");
        until(|| started.load(Ordering::SeqCst) == 1).await;
        // The first reload is stuck; further requests return at once and are merged.
        assert!(!reloader.request());
        assert!(!reloader.request());
        assert!(!reloader.request());
        gate.add_permits(1);
        until(|| started.load(Ordering::SeqCst) == 2).await;
        gate.add_permits(1);
        until(|| running.load(Ordering::SeqCst) == 0).await;
        tokio::time::sleep(Duration::from_millis(100)).await;
        assert_eq!(
            started.load(Ordering::SeqCst),
            2,
            "three requests, one reload"
        );
        assert_eq!(most_at_once.load(Ordering::SeqCst), 1, "never two at once");
        // Stopping does not wait for a reload that is stuck.
        assert!(reloader.request());
        until(|| started.load(Ordering::SeqCst) == 3).await;
        reloader.stop();
    }
}
