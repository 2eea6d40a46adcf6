//! Listeners: TCP (loopback by default) and a Unix socket, a task per connection, a limit on
//! connections, and graceful shutdown.
//!
//! A connection over the limit is still accepted, told `FAULT BUSY` and closed, so a relay
//! learns why instead of hanging in the backlog. Shutdown cancels one token that every
//! task watches, stops accepting, lets open messages finish and waits for all tasks up to
//! the grace period.

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

use super::engine::SharedEngine;
use super::http::{Status, serve_status};
use super::session::{Context, refuse_busy, serve_connection};
use crate::config::Config;
use crate::metrics::Metrics;

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
}

impl Running {
    /// The token whose cancellation starts a graceful shutdown.
    pub fn shutdown_token(&self) -> CancellationToken {
        self.shutdown.clone()
    }

    /// Stops accepting, lets open messages finish, and waits for every task up to the
    /// grace period. Returns false when some connection had to be cut.
    pub async fn stop(self) -> bool {
        self.shutdown.cancel();
        self.tracker.close();
        let finished = tokio::time::timeout(self.grace, self.tracker.wait())
            .await
            .is_ok();
        if let Some(path) = &self.unix {
            let _ = std::fs::remove_file(path);
        }
        finished
    }
}

struct StatusView {
    metrics: Arc<Metrics>,
    engine: SharedEngine,
}

impl Status for StatusView {
    fn metrics(&self) -> String {
        self.metrics.render()
    }

    fn ready(&self) -> bool {
        // An engine always holds a loaded model; readiness is having one.
        !self.engine.current().origin().is_empty()
    }
}

/// Binds every configured listener and starts serving.
pub async fn start(
    config: &Config,
    engine: SharedEngine,
    metrics: Arc<Metrics>,
) -> std::io::Result<Running> {
    let shutdown = CancellationToken::new();
    let tracker = TaskTracker::new();
    let limits = config.limits.clone();
    let ctx = Arc::new(Context {
        engine: engine.clone(),
        metrics: Arc::clone(&metrics),
        limits: limits.clone(),
        server_name: format!("tamis {}", env!("CARGO_PKG_VERSION")),
        shutdown: shutdown.clone(),
    });
    let permits = Arc::new(Semaphore::new(limits.max_connections as usize));

    let mut running = Running {
        tcp: None,
        unix: None,
        status: None,
        shutdown: shutdown.clone(),
        tracker: tracker.clone(),
        grace: limits.grace_period,
    };
    if let Some(addr) = config.listen.tcp {
        let listener = TcpListener::bind(addr).await?;
        running.tcp = Some(listener.local_addr()?);
        let (ctx, permits, tracker2) = (Arc::clone(&ctx), Arc::clone(&permits), tracker.clone());
        tracker.spawn(accept_loop(listener, ctx, permits, tracker2));
    }
    if let Some(unix) = &config.listen.unix {
        let listener = bind_unix(&unix.path, unix.mode)?;
        running.unix = Some(unix.path.clone());
        let (ctx, permits, tracker2) = (Arc::clone(&ctx), Arc::clone(&permits), tracker.clone());
        tracker.spawn(accept_loop(listener, ctx, permits, tracker2));
    }
    if let Some(addr) = config.metrics {
        let listener = TcpListener::bind(addr).await?;
        running.status = Some(listener.local_addr()?);
        let view = Arc::new(StatusView { metrics, engine });
        tracker.spawn(serve_status(listener, view, shutdown.clone()));
    }
    Ok(running)
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

/// A listener the accept loop can take connections from.
trait Acceptor: Send + 'static {
    type Stream: tokio::io::AsyncRead + tokio::io::AsyncWrite + Unpin + Send + 'static;

    /// The next connection and a description of its peer.
    fn next(
        &self,
    ) -> impl std::future::Future<Output = std::io::Result<(Self::Stream, String)>> + Send;
}

impl Acceptor for TcpListener {
    type Stream = tokio::net::TcpStream;

    async fn next(&self) -> std::io::Result<(Self::Stream, String)> {
        let (stream, peer) = self.accept().await?;
        // Verdict frames are small and latency matters more than packet count.
        let _ = stream.set_nodelay(true);
        Ok((stream, peer.to_string()))
    }
}

impl Acceptor for UnixListener {
    type Stream = tokio::net::UnixStream;

    async fn next(&self) -> std::io::Result<(Self::Stream, String)> {
        let (stream, _) = self.accept().await?;
        Ok((stream, "unix".to_string()))
    }
}

async fn accept_loop<L: Acceptor>(
    listener: L,
    ctx: Arc<Context>,
    permits: Arc<Semaphore>,
    tracker: TaskTracker,
) {
    loop {
        let accepted = tokio::select! {
            _ = ctx.shutdown.cancelled() => return,
            accepted = listener.next() => accepted,
        };
        match accepted {
            Ok((stream, peer)) => dispatch(stream, peer, &ctx, &permits, &tracker),
            Err(e) => {
                tracing::warn!(error = %e, "accept failed");
                tokio::time::sleep(ACCEPT_BACKOFF).await;
            }
        }
    }
}

fn dispatch<S>(
    stream: S,
    peer: String,
    ctx: &Arc<Context>,
    permits: &Arc<Semaphore>,
    tracker: &TaskTracker,
) where
    S: tokio::io::AsyncRead + tokio::io::AsyncWrite + Unpin + Send + 'static,
{
    match Arc::clone(permits).try_acquire_owned() {
        Ok(permit) => {
            let ctx = Arc::clone(ctx);
            let span = tracing::info_span!("connection", peer = %crate::logsafe::safe(&peer));
            tracker.spawn(
                async move {
                    serve_connection(stream, peer, ctx).await;
                    drop(permit);
                }
                .instrument(span),
            );
        }
        Err(_) => {
            tracker.spawn(refuse_busy(stream, Arc::clone(&ctx.metrics)));
        }
    }
}
