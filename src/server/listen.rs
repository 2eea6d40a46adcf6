//! Listeners: TCP (loopback by default) and a Unix socket, a task per connection, a limit on
//! connections, and graceful shutdown.
//!
//! A connection over the limit is still accepted, told `FAULT BUSY` and closed, so a relay
//! learns why instead of hanging in the backlog; a TCP peer outside the allow-list is told
//! `FAULT DENIED`. At most [`MAX_REFUSALS`] refusals are answered at once; further refused
//! connections are closed without a word, so refusals cannot pile up. Shutdown cancels one token that every
//! task watches, stops accepting, lets open messages finish and waits for all tasks up to
//! the grace period, then writes the journal entries still queued. The store is opened
//! before anything is bound, so a store that cannot be opened stops the start.

use std::net::SocketAddr;
use std::os::unix::fs::PermissionsExt;
use std::path::{Path, PathBuf};
use std::sync::Arc;
use std::time::Duration;

use tokio::net::{TcpListener, UnixListener};
use tokio::sync::Semaphore;
use tokio_util::sync::CancellationToken;
use tokio_util::task::TaskTracker;
use tracing::Instrument;

use super::access::{self, Cidr, PeerCounts, Secret};
use super::budget::Budget;
use super::engine::SharedEngine;
use super::http::{Status, serve_status};
use super::keeping::{Keeping, KeepingSettings, open_store};
use super::session::{Context, refuse_after_hello, serve_connection};
use super::throttle::Throttle;
use crate::config::Config;
use crate::metrics::Metrics;
use crate::proto::FaultCode;
use crate::status::StatusPage;
use crate::status::actions::StoreOperations;

/// A running daemon: its bound addresses and the means to stop it.
pub struct Running {
    /// The TCP address the relay protocol is served on.
    pub tcp: Option<SocketAddr>,
    /// The Unix socket the relay protocol is served on.
    pub unix: Option<PathBuf>,
    /// The metrics and health address.
    pub status: Option<SocketAddr>,
    shutdown: CancellationToken,
    tracker: TaskTracker,
    grace: Duration,
    budget: Arc<Budget>,
    keeping: Option<Arc<Keeping>>,
}

impl Running {
    /// The budget of bytes open messages hold, shared by every listener.
    pub fn buffer_budget(&self) -> &Arc<Budget> {
        &self.budget
    }

    /// The token whose cancellation starts a graceful shutdown.
    pub fn shutdown_token(&self) -> CancellationToken {
        self.shutdown.clone()
    }

    /// The store the daemon keeps, if any.
    pub fn keeping(&self) -> Option<&Arc<Keeping>> {
        self.keeping.as_ref()
    }

    /// Stops accepting, lets open messages finish, waits for every task, and writes the
    /// journal entries still queued, all within the grace period. Returns false when some
    /// connection had to be cut or the journal could not be written in time.
    pub async fn stop(self) -> bool {
        let begun = tokio::time::Instant::now();
        self.shutdown.cancel();
        self.tracker.close();
        let finished = tokio::time::timeout(self.grace, self.tracker.wait())
            .await
            .is_ok();
        if let Some(path) = &self.unix {
            let _ = std::fs::remove_file(path);
        }
        let journal = match &self.keeping {
            Some(keeping) => {
                keeping
                    .close(self.grace.saturating_sub(begun.elapsed()))
                    .await
            }
            None => true,
        };
        finished && journal
    }
}

struct StatusView {
    metrics: Arc<Metrics>,
    engine: SharedEngine,
    page: Arc<StatusPage>,
}

impl Status for StatusView {
    fn metrics(&self) -> String {
        self.metrics.render()
    }

    fn ready(&self) -> bool {
        // An engine always holds a loaded model; readiness is having one.
        !self.engine.current().origin().is_empty()
    }

    fn page(&self) -> Option<Arc<StatusPage>> {
        Some(Arc::clone(&self.page))
    }
}

/// Opens the configured store (unless `store.enabled` is off), binds every configured
/// listener and starts serving. A store that cannot be opened is an error naming its path.
pub async fn start(
    config: &Config,
    engine: SharedEngine,
    metrics: Arc<Metrics>,
) -> std::io::Result<Running> {
    let keeping = if config.store.enabled {
        let store_config = config.store.clone();
        let store = tokio::task::spawn_blocking(move || open_store(&store_config))
            .await
            .map_err(std::io::Error::other)?
            .map_err(|e| std::io::Error::other(e.to_string()))?;
        let keeping = Keeping::start(
            Arc::new(store),
            Arc::clone(&metrics),
            KeepingSettings::default(),
            config.store.record_subject,
        )
        .map_err(|e| std::io::Error::other(e.to_string()))?;
        Some(keeping)
    } else {
        None
    };
    start_with(config, engine, metrics, keeping).await
}

/// Binds every configured listener and starts serving, keeping held mail and the
/// journal in `keeping` (none: nothing is journalled, and a quarantine follows the
/// failure mode). `config.store` is not looked at.
pub async fn start_with(
    config: &Config,
    engine: SharedEngine,
    metrics: Arc<Metrics>,
    keeping: Option<Arc<Keeping>>,
) -> std::io::Result<Running> {
    let shutdown = CancellationToken::new();
    let tracker = TaskTracker::new();
    let limits = config.limits.clone();
    // Read before anything is bound, so a bad secret file stops the start cleanly.
    let secret = match &config.access.secret_file {
        Some(path) => Some(Arc::new(
            Secret::read(path).map_err(|e| std::io::Error::other(e.to_string()))?,
        )),
        None => None,
    };
    let page = StatusPage::new(
        &config.status,
        engine.clone(),
        keeping.as_ref().map(|k| Arc::clone(k.store())),
    )
    .map_err(|e| std::io::Error::other(e.to_string()))?;
    // Releases from the page go to `[release] next_hop`, as `tamis held release` does.
    let page = Arc::new(match &keeping {
        Some(k) if config.release.next_hop.is_some() => page.with_operations(Arc::new(
            StoreOperations::new(Arc::clone(k.store()))
                .with_release(&config.release, engine.clone()),
        )),
        _ => page,
    });
    let base = Context {
        shutdown: shutdown.clone(),
        keeping: keeping.clone(),
        ..Context::new(engine.clone(), Arc::clone(&metrics), limits.clone())
    };
    let permits = Arc::new(Semaphore::new(limits.max_connections as usize));
    let refusals = Arc::new(Semaphore::new(MAX_REFUSALS));

    let mut running = Running {
        tcp: None,
        unix: None,
        status: None,
        shutdown: shutdown.clone(),
        tracker: tracker.clone(),
        grace: limits.grace_period,
        budget: Arc::clone(&base.budget),
        keeping: keeping.clone(),
    };
    if let Some(addr) = config.listen.tcp {
        let listener = TcpListener::bind(addr).await?;
        running.tcp = Some(listener.local_addr()?);
        let ctx = Arc::new(Context {
            secret,
            ..base.clone()
        });
        let gate = Arc::new(Gate {
            permits: Arc::clone(&permits),
            refusals: Arc::clone(&refusals),
            allow: Some(config.access.tcp_allow.clone()),
            per_peer: limits.max_connections_per_peer.map(PeerCounts::new),
            refused_log: Throttle::new(LOG_INTERVAL),
            accept_log: Throttle::new(LOG_INTERVAL),
        });
        tracker.spawn(accept_loop(listener, ctx, gate, tracker.clone()));
    }
    if let Some(unix) = &config.listen.unix {
        let listener = bind_unix(&unix.path, unix.mode)?;
        running.unix = Some(unix.path.clone());
        // The socket's permissions decide who connects; no allow-list, no secret.
        let ctx = Arc::new(base.clone());
        let gate = Arc::new(Gate {
            permits: Arc::clone(&permits),
            refusals: Arc::clone(&refusals),
            allow: None,
            per_peer: None,
            refused_log: Throttle::new(LOG_INTERVAL),
            accept_log: Throttle::new(LOG_INTERVAL),
        });
        tracker.spawn(accept_loop(listener, ctx, gate, tracker.clone()));
    }
    if let Some(addr) = config.metrics {
        let listener = TcpListener::bind(addr).await?;
        running.status = Some(listener.local_addr()?);
        let view = Arc::new(StatusView {
            metrics,
            engine,
            page,
        });
        tracker.spawn(serve_status(listener, view, shutdown.clone()));
    }
    // Started last: a failed bind above leaves no task behind.
    if let Some(keeping) = &keeping {
        tracker.spawn(Arc::clone(keeping).maintain(shutdown.clone()));
    }
    Ok(running)
}

/// Refused connections answered at once (each waits up to
/// [`BUSY_HELLO_WAIT`](super::session::BUSY_HELLO_WAIT) for its
/// `HELLO`); beyond this, a refused connection is closed without a word, so a flood of
/// refused connections cannot hold more descriptors than this.
pub const MAX_REFUSALS: usize = 64;

/// Least time between two log lines about refused connections or accept errors.
const LOG_INTERVAL: Duration = Duration::from_secs(1);

/// What one listener lets in.
struct Gate {
    /// Connection slots shared by every listener.
    permits: Arc<Semaphore>,
    /// Refusals being answered, shared by every listener.
    refusals: Arc<Semaphore>,
    /// TCP: the ranges peers must come from. `None` for the Unix socket.
    allow: Option<Vec<Cidr>>,
    /// TCP: connections per peer address, when capped.
    per_peer: Option<Arc<PeerCounts>>,
    /// Refusals are logged at most once a second.
    refused_log: Throttle,
    /// Accept errors are logged at most once a second.
    accept_log: Throttle,
}

/// Binds a Unix socket, replacing a stale socket file (never any other kind of file), and
/// sets its permission bits.
fn bind_unix(path: &Path, mode: u32) -> std::io::Result<UnixListener> {
    use std::os::unix::fs::FileTypeExt;
    if let Ok(meta) = std::fs::symlink_metadata(path) {
        if meta.file_type().is_socket() {
            std::fs::remove_file(path)?;
        } else {
            return Err(std::io::Error::new(
                std::io::ErrorKind::AlreadyExists,
                format!(
                    "{} exists and is not a socket; refusing to replace it",
                    path.display()
                ),
            ));
        }
    }
    let listener = UnixListener::bind(path)?;
    std::fs::set_permissions(path, std::fs::Permissions::from_mode(mode))?;
    Ok(listener)
}

/// Back-off after an accept error (out of descriptors, for instance), as mini-redis does.
const ACCEPT_BACKOFF: Duration = Duration::from_millis(50);

/// Who is on the other end of a relay connection.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Peer {
    /// A TCP peer.
    Tcp(SocketAddr),
    /// A client of the Unix socket.
    Unix,
}

impl std::fmt::Display for Peer {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match self {
            Peer::Tcp(addr) => write!(f, "{addr}"),
            Peer::Unix => f.write_str("unix"),
        }
    }
}

/// A listener the accept loop can take connections from.
trait Acceptor: Send + 'static {
    type Stream: tokio::io::AsyncRead + tokio::io::AsyncWrite + Unpin + Send + 'static;

    /// The next connection and its peer.
    fn next(
        &self,
    ) -> impl std::future::Future<Output = std::io::Result<(Self::Stream, Peer)>> + Send;
}

impl Acceptor for TcpListener {
    type Stream = tokio::net::TcpStream;

    async fn next(&self) -> std::io::Result<(Self::Stream, Peer)> {
        let (stream, peer) = self.accept().await?;
        // Verdict frames are small and latency matters more than packet count.
        let _ = stream.set_nodelay(true);
        Ok((stream, Peer::Tcp(peer)))
    }
}

impl Acceptor for UnixListener {
    type Stream = tokio::net::UnixStream;

    async fn next(&self) -> std::io::Result<(Self::Stream, Peer)> {
        let (stream, _) = self.accept().await?;
        Ok((stream, Peer::Unix))
    }
}

async fn accept_loop<L: Acceptor>(
    listener: L,
    ctx: Arc<Context>,
    gate: Arc<Gate>,
    tracker: TaskTracker,
) {
    loop {
        let accepted = tokio::select! {
            _ = ctx.shutdown.cancelled() => return,
            accepted = listener.next() => accepted,
        };
        match accepted {
            Ok((stream, peer)) => dispatch(stream, peer, &ctx, &gate, &tracker),
            Err(e) => {
                accept_failed(&gate, &ctx.metrics, &e);
                tokio::time::sleep(ACCEPT_BACKOFF).await;
            }
        }
    }
}

/// Counts a failed accept (out of descriptors, say) and logs it, at most once a second
/// with the number held back since the last line: under a flood the loop fails every
/// [`ACCEPT_BACKOFF`] and would otherwise write twenty lines a second.
fn accept_failed(gate: &Gate, metrics: &Metrics, error: &std::io::Error) {
    metrics.accept_error();
    if let Some(held_back) = gate.accept_log.admit(tokio::time::Instant::now()) {
        tracing::warn!(error = %error, held_back, "accept failed");
    }
}

/// Serves a connection, or refuses it: a TCP peer outside the allow-list with `DENIED`,
/// one over its per-peer cap or any over the connection limit with `BUSY`.
fn dispatch<S>(stream: S, peer: Peer, ctx: &Arc<Context>, gate: &Gate, tracker: &TaskTracker)
where
    S: tokio::io::AsyncRead + tokio::io::AsyncWrite + Unpin + Send + 'static,
{
    let mut slot = None;
    if let Peer::Tcp(addr) = peer {
        if let Some(allow) = &gate.allow
            && !access::allowed(allow, addr.ip())
        {
            let text = "your address is not allowed to connect";
            return refuse(stream, peer, FaultCode::Denied, text, ctx, gate, tracker);
        }
        if let Some(counts) = &gate.per_peer {
            match counts.enter(addr.ip()) {
                Some(s) => slot = Some(s),
                None => {
                    let text = "too many connections from your address; retry later";
                    return refuse(stream, peer, FaultCode::Busy, text, ctx, gate, tracker);
                }
            }
        }
    }
    match Arc::clone(&gate.permits).try_acquire_owned() {
        Ok(permit) => {
            let ctx = Arc::clone(ctx);
            let span = tracing::info_span!("connection", peer = %peer);
            tracker.spawn(
                async move {
                    serve_connection(stream, peer.to_string(), ctx).await;
                    drop(permit);
                    drop(slot);
                }
                .instrument(span),
            );
        }
        Err(_) => {
            let text = "connection limit reached; retry later";
            refuse(stream, peer, FaultCode::Busy, text, ctx, gate, tracker);
        }
    }
}

/// Answers a refused connection with a fatal `code` after its `HELLO`, or, when too many
/// refusals are being answered already, closes it at once. Counted either way.
fn refuse<S>(
    stream: S,
    peer: Peer,
    code: FaultCode,
    text: &'static str,
    ctx: &Context,
    gate: &Gate,
    tracker: &TaskTracker,
) where
    S: tokio::io::AsyncRead + tokio::io::AsyncWrite + Unpin + Send + 'static,
{
    ctx.metrics.protocol_error(code.name());
    if let Some(held_back) = gate.refused_log.admit(tokio::time::Instant::now()) {
        tracing::warn!(
            peer = %peer,
            code = code.name(),
            reason = text,
            held_back,
            "connection refused"
        );
    }
    match Arc::clone(&gate.refusals).try_acquire_owned() {
        Ok(permit) => {
            tracker.spawn(async move {
                refuse_after_hello(stream, code, text).await;
                drop(permit);
            });
        }
        // Dropping the stream closes it.
        Err(_) => drop(stream),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Every log event's text, as one buffer.
    #[derive(Clone, Default)]
    struct Captured(Arc<std::sync::Mutex<Vec<u8>>>);

    impl std::io::Write for Captured {
        fn write(&mut self, buf: &[u8]) -> std::io::Result<usize> {
            if let Ok(mut all) = self.0.lock() {
                all.extend_from_slice(buf);
            }
            Ok(buf.len())
        }

        fn flush(&mut self) -> std::io::Result<()> {
            Ok(())
        }
    }

    impl<'a> tracing_subscriber::fmt::MakeWriter<'a> for Captured {
        type Writer = Captured;

        fn make_writer(&'a self) -> Captured {
            self.clone()
        }
    }

    fn gate() -> Gate {
        Gate {
            permits: Arc::new(Semaphore::new(1)),
            refusals: Arc::new(Semaphore::new(1)),
            allow: None,
            per_peer: None,
            refused_log: Throttle::new(LOG_INTERVAL),
            accept_log: Throttle::new(LOG_INTERVAL),
        }
    }

    /// Issue 7, item 7: under a flood, 250 "accept failed" lines were written in 12 s.
    /// Every failure is still counted in `tamis_accept_errors_total`.
    #[tokio::test(start_paused = true)]
    async fn accept_errors_are_logged_at_most_once_a_second_and_all_counted() {
        let log = Captured::default();
        let subscriber = tracing_subscriber::fmt()
            .with_ansi(false)
            .with_writer(log.clone())
            .finish();
        // With a single dispatcher registered, tracing-core decides whether a callsite is
        // enabled from whichever thread reaches it first; a second one makes it ask all.
        let _second = tracing::Dispatch::new(tracing_subscriber::registry());
        let _guard = tracing::subscriber::set_default(subscriber);
        let metrics = Metrics::new(Vec::<String>::new()).expect("metrics");
        let gate = gate();
        let error = std::io::Error::from_raw_os_error(24); // EMFILE, too many open files
        for _ in 0..250 {
            accept_failed(&gate, &metrics, &error);
            tokio::time::sleep(Duration::from_millis(48)).await;
        }
        let text = String::from_utf8_lossy(&log.0.lock().map(|b| b.clone()).unwrap_or_default())
            .into_owned();
        let lines: Vec<&str> = text
            .lines()
            .filter(|l| l.contains("accept failed"))
            .collect();
        assert!(!lines.is_empty(), "{text}");
        assert!(lines.len() <= 13, "{} lines in 12 s:\n{text}", lines.len());
        let held_back: u64 = lines
            .iter()
            .filter_map(|l| l.split("held_back=").nth(1))
            .filter_map(|v| v.split_whitespace().next())
            .filter_map(|v| v.parse::<u64>().ok())
            .sum();
        assert!(
            held_back + lines.len() as u64 <= 250 && held_back >= 200,
            "{held_back}"
        );
        assert!(
            metrics.render().contains("tamis_accept_errors_total 250"),
            "{}",
            metrics.render()
        );
    }
}
