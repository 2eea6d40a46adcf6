//! A minimal HTTP/1.1 responder for the metrics listener: `GET /metrics`, `/healthz`,
//! `/readyz`. Nothing else is served; requests are read with a size cap and a timeout, so a
//! slow or hostile scraper costs one small task.
//!
//! At most [`MAX_STATUS_CONNECTIONS`] connections are served at once; one over the cap is
//! closed as soon as it is accepted. A flood of connections to this port therefore holds a
//! bounded number of descriptors and cannot starve the relay listeners, which share the
//! process's descriptor limit.

use std::sync::Arc;
use std::time::Duration;

use tokio::io::{AsyncReadExt, AsyncWriteExt};
use tokio::net::TcpListener;
use tokio::sync::Semaphore;
use tokio_util::sync::CancellationToken;

/// Largest request head read.
const MAX_REQUEST: usize = 8 * 1024;
/// Time allowed for a request head to arrive.
const REQUEST_TIMEOUT: Duration = Duration::from_secs(5);
/// Most status connections served at once. A scraper uses one at a time; the rest is room
/// for health checks and people with curl.
pub const MAX_STATUS_CONNECTIONS: usize = 64;

/// What the endpoints report.
pub trait Status: Send + Sync + 'static {
    /// The metrics in the Prometheus text exposition format.
    fn metrics(&self) -> String;
    /// Whether a model is loaded and the daemon takes messages.
    fn ready(&self) -> bool;
}

/// Serves the endpoints on `listener` until `shutdown` is cancelled.
pub async fn serve_status(
    listener: TcpListener,
    status: Arc<dyn Status>,
    shutdown: CancellationToken,
) {
    let permits = Arc::new(Semaphore::new(MAX_STATUS_CONNECTIONS));
    loop {
        let accepted = tokio::select! {
            _ = shutdown.cancelled() => return,
            accepted = listener.accept() => accepted,
        };
        let Ok((stream, _peer)) = accepted else {
            // Out of descriptors and the like: back off instead of spinning.
            tokio::time::sleep(Duration::from_millis(100)).await;
            continue;
        };
        let Ok(permit) = Arc::clone(&permits).try_acquire_owned() else {
            // Over the cap: closed at once, so the descriptor is free again.
            drop(stream);
            continue;
        };
        let status = Arc::clone(&status);
        tokio::spawn(async move {
            let _ = tokio::time::timeout(REQUEST_TIMEOUT, answer(stream, status)).await;
            drop(permit);
        });
    }
}

async fn answer(mut stream: tokio::net::TcpStream, status: Arc<dyn Status>) -> std::io::Result<()> {
    let mut head = Vec::with_capacity(512);
    let mut chunk = [0u8; 512];
    while !head.windows(4).any(|w| w == b"\r\n\r\n") && !head.windows(2).any(|w| w == b"\n\n") {
        let n = stream.read(&mut chunk).await?;
        if n == 0 || head.len() + n > MAX_REQUEST {
            return Ok(());
        }
        head.extend_from_slice(&chunk[..n]);
    }
    let line = head.split(|&b| b == b'\n').next().unwrap_or_default();
    let line = String::from_utf8_lossy(line);
    let mut words = line.split_whitespace();
    let (method, path) = (words.next().unwrap_or(""), words.next().unwrap_or(""));
    let (code, content_type, body) = match (method, path) {
        ("GET", "/metrics") => (
            200,
            "text/plain; version=0.0.4; charset=utf-8",
            status.metrics(),
        ),
        ("GET", "/healthz") => (200, "text/plain", "alive\n".to_string()),
        ("GET", "/readyz") if status.ready() => (200, "text/plain", "ready\n".to_string()),
        ("GET", "/readyz") => (503, "text/plain", "no model loaded\n".to_string()),
        ("GET", _) => (
            404,
            "text/plain",
            "not found: try /metrics, /healthz or /readyz\n".to_string(),
        ),
        _ => (405, "text/plain", "only GET is served\n".to_string()),
    };
    let reason = match code {
        200 => "OK",
        404 => "Not Found",
        405 => "Method Not Allowed",
        _ => "Service Unavailable",
    };
    let response = format!(
        "HTTP/1.1 {code} {reason}\r\nContent-Type: {content_type}\r\nContent-Length: {}\r\nConnection: close\r\n\r\n{body}",
        body.len()
    );
    stream.write_all(response.as_bytes()).await?;
    stream.shutdown().await
}
