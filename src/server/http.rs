//! A minimal HTTP/1.1 responder for the status listener: `GET /metrics`, `/healthz`,
//! `/readyz`, and the status page (`GET /`, `GET /domain?d=NAME`, `POST /act`, see
//! [`crate::status`]). Requests are read with a size cap and a timeout, so a slow or
//! hostile client costs one small task; the page itself is rendered on a blocking thread.
//!
//! At most [`MAX_STATUS_CONNECTIONS`] connections are served at once; one over the cap is
//! closed as soon as it is accepted. A flood of connections to this port therefore holds a
//! bounded number of descriptors and cannot starve the relay listeners, which share the
//! process's descriptor limit. At most [`MAX_PAGE_RENDERS`] pages are made at once; a
//! request beyond that is answered 503 at once rather than queued.
//!
//! Invariants: a request head is at most [`MAX_REQUEST`] bytes and a body at most
//! [`crate::status::MAX_ACTION_BODY`], declared by `Content-Length` and refused before it
//! is read when larger (chunked bodies are refused); only `POST /act` reads a body; every
//! page response carries the page's Content-Security-Policy and asks not to be cached.

use std::sync::Arc;
use std::time::Duration;

use tokio::io::{AsyncReadExt, AsyncWriteExt};
use tokio::net::TcpListener;
use tokio::sync::Semaphore;
use tokio_util::sync::CancellationToken;

use crate::status::{MAX_ACTION_BODY, StatusPage};

/// Largest request head read.
pub const MAX_REQUEST: usize = 8 * 1024;
/// Time allowed for a request (head and body) to arrive.
const REQUEST_TIMEOUT: Duration = Duration::from_secs(5);
/// Time allowed to write a response.
const WRITE_TIMEOUT: Duration = Duration::from_secs(10);
/// Most status connections served at once. A scraper uses one at a time; the rest is room
/// for health checks and people with curl.
pub const MAX_STATUS_CONNECTIONS: usize = 64;
/// Most status pages made at once: each reads the store.
pub const MAX_PAGE_RENDERS: usize = 2;
/// Most header fields read from a request.
const MAX_HEADERS: usize = 64;

/// What the endpoints report.
pub trait Status: Send + Sync + 'static {
    /// The metrics in the Prometheus text exposition format.
    fn metrics(&self) -> String;
    /// Whether a model is loaded and the daemon takes messages.
    fn ready(&self) -> bool;
    /// The status page, when this listener serves one.
    fn page(&self) -> Option<Arc<StatusPage>> {
        None
    }
}

/// One HTTP request as the status listener reads it.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Request {
    /// `GET`, `POST`, ...
    pub method: String,
    /// The path, without the query.
    pub path: String,
    /// The query string (after `?`), undecoded.
    pub query: String,
    headers: Vec<(String, String)>,
    /// The body (only read for `POST`).
    pub body: Vec<u8>,
}

impl Request {
    /// The first value of header field `name` (case-insensitive).
    pub fn header(&self, name: &str) -> Option<&str> {
        self.headers
            .iter()
            .find(|(n, _)| n.eq_ignore_ascii_case(name))
            .map(|(_, v)| v.as_str())
    }

    /// The decoded value of query parameter `name`.
    pub fn query_value(&self, name: &str) -> Option<String> {
        crate::status::html::form_pairs(&self.query, 32)
            .into_iter()
            .find(|(n, _)| n == name)
            .map(|(_, v)| v)
    }

    /// A request built in memory (tests).
    pub fn for_test(method: &str, target: &str, headers: &[(&str, &str)], body: &[u8]) -> Request {
        let (path, query) = target.split_once('?').unwrap_or((target, ""));
        Request {
            method: method.to_string(),
            path: path.to_string(),
            query: query.to_string(),
            headers: headers
                .iter()
                .map(|(n, v)| (n.to_string(), v.to_string()))
                .collect(),
            body: body.to_vec(),
        }
    }
}

/// A response to write.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Response {
    /// Status code.
    pub code: u16,
    /// `Content-Type`.
    pub content_type: &'static str,
    /// The body.
    pub body: String,
    /// Whether this is a page (gets the page's security headers).
    page: bool,
}

impl Response {
    /// A plain-text response.
    pub fn text(code: u16, body: &str) -> Response {
        Response {
            code,
            content_type: "text/plain; charset=utf-8",
            body: body.to_string(),
            page: true,
        }
    }

    /// An HTML page.
    pub fn html(code: u16, body: String) -> Response {
        Response {
            code,
            content_type: "text/html; charset=utf-8",
            body,
            page: true,
        }
    }

    fn plain(code: u16, content_type: &'static str, body: String) -> Response {
        Response {
            code,
            content_type,
            body,
            page: false,
        }
    }

    fn encode(&self) -> Vec<u8> {
        let reason = match self.code {
            200 => "OK",
            400 => "Bad Request",
            403 => "Forbidden",
            404 => "Not Found",
            405 => "Method Not Allowed",
            409 => "Conflict",
            411 => "Length Required",
            413 => "Content Too Large",
            415 => "Unsupported Media Type",
            500 => "Internal Server Error",
            501 => "Not Implemented",
            _ => "Service Unavailable",
        };
        let mut head = format!(
            "HTTP/1.1 {} {reason}\r\nContent-Type: {}\r\nContent-Length: {}\r\nConnection: close\r\n",
            self.code,
            self.content_type,
            self.body.len()
        );
        if self.page {
            head.push_str("Cache-Control: no-store\r\nX-Content-Type-Options: nosniff\r\nReferrer-Policy: no-referrer\r\nX-Frame-Options: DENY\r\nContent-Security-Policy: ");
            head.push_str(crate::status::render::content_security_policy());
            head.push_str("\r\n");
        }
        head.push_str("\r\n");
        let mut out = head.into_bytes();
        out.extend_from_slice(self.body.as_bytes());
        out
    }
}

/// Serves the endpoints on `listener` until `shutdown` is cancelled.
pub async fn serve_status(
    listener: TcpListener,
    status: Arc<dyn Status>,
    shutdown: CancellationToken,
) {
    let permits = Arc::new(Semaphore::new(MAX_STATUS_CONNECTIONS));
    let renders = Arc::new(Semaphore::new(MAX_PAGE_RENDERS));
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
        let renders = Arc::clone(&renders);
        tokio::spawn(async move {
            let _ = answer(stream, status, renders).await;
            drop(permit);
        });
    }
}

/// What reading a request gave.
enum Read {
    /// A whole request.
    Request(Request),
    /// A request to refuse with this response.
    Refuse(Response),
    /// Nothing to answer (closed, timed out, garbage).
    Nothing,
}

async fn answer(
    mut stream: tokio::net::TcpStream,
    status: Arc<dyn Status>,
    renders: Arc<Semaphore>,
) -> std::io::Result<()> {
    let read = match tokio::time::timeout(REQUEST_TIMEOUT, read_request(&mut stream)).await {
        Ok(Ok(read)) => read,
        _ => return Ok(()),
    };
    let response = match read {
        Read::Nothing => return Ok(()),
        Read::Refuse(response) => response,
        Read::Request(request) => route(request, status, renders).await,
    };
    let write = async {
        stream.write_all(&response.encode()).await?;
        stream.shutdown().await
    };
    tokio::time::timeout(WRITE_TIMEOUT, write)
        .await
        .unwrap_or(Ok(()))
}

/// Where a request goes.
async fn route(request: Request, status: Arc<dyn Status>, renders: Arc<Semaphore>) -> Response {
    let page = status.page();
    match (request.method.as_str(), request.path.as_str()) {
        ("GET", "/metrics") => Response::plain(
            200,
            "text/plain; version=0.0.4; charset=utf-8",
            status.metrics(),
        ),
        ("GET", "/healthz") => Response::plain(200, "text/plain", "alive\n".to_string()),
        ("GET", "/readyz") if status.ready() => {
            Response::plain(200, "text/plain", "ready\n".to_string())
        }
        ("GET", "/readyz") => Response::plain(503, "text/plain", "no model loaded\n".to_string()),
        ("GET", "/" | "/domain") | ("POST", "/act") if page.is_some() => {
            let Some(page) = page else {
                return Response::text(404, "not found\n");
            };
            let Ok(permit) = renders.try_acquire_owned() else {
                return Response::text(503, "busy making other pages; retry in a moment\n");
            };
            let rendered = tokio::task::spawn_blocking(move || {
                let response = match (request.method.as_str(), request.path.as_str()) {
                    ("GET", "/") => page.overview(&request),
                    ("GET", _) => page.domain(&request),
                    _ => page.act(&request),
                };
                drop(permit);
                response
            })
            .await;
            rendered.unwrap_or_else(|_| Response::text(500, "the page failed; see the log\n"))
        }
        ("GET", "/act") if page.is_some() => Response::text(
            405,
            "actions are POST only: send act=VERB:VERDICT_ID with the token\n",
        ),
        ("GET", _) => Response::plain(
            404,
            "text/plain",
            if page.is_some() {
                "not found: try /, /metrics, /healthz or /readyz\n"
            } else {
                "not found: try /metrics, /healthz or /readyz\n"
            }
            .to_string(),
        ),
        ("POST", _) if page.is_some() => {
            Response::text(404, "not found: actions are posted to /act\n")
        }
        _ => Response::plain(
            405,
            "text/plain",
            "only GET is served, and POST to /act\n".to_string(),
        ),
    }
}

/// Reads one request: a head of at most [`MAX_REQUEST`] bytes, and for `POST` a body of
/// the declared length, at most [`MAX_ACTION_BODY`].
async fn read_request(stream: &mut tokio::net::TcpStream) -> std::io::Result<Read> {
    let mut buf = Vec::with_capacity(1024);
    let mut chunk = [0u8; 1024];
    let head_end = loop {
        if let Some(end) = find_head_end(&buf) {
            break end;
        }
        if buf.len() >= MAX_REQUEST {
            return Ok(Read::Refuse(Response::text(
                400,
                "the request head is larger than 8 KiB\n",
            )));
        }
        let n = stream.read(&mut chunk).await?;
        if n == 0 {
            return Ok(Read::Nothing);
        }
        buf.extend_from_slice(chunk.get(..n).unwrap_or_default());
    };
    let (head, rest) = buf.split_at(head_end.0.min(buf.len()));
    let rest = rest.get(head_end.1 - head_end.0..).unwrap_or_default();
    let Some(mut request) = parse_head(head) else {
        return Ok(Read::Refuse(Response::text(
            400,
            "the request line or a header field is malformed\n",
        )));
    };
    if request.method != "POST" {
        return Ok(Read::Request(request));
    }
    if request.header("transfer-encoding").is_some() {
        return Ok(Read::Refuse(Response::text(
            411,
            "send the body with a Content-Length, not chunked\n",
        )));
    }
    let Some(length) = request
        .header("content-length")
        .and_then(|v| v.trim().parse::<usize>().ok())
    else {
        return Ok(Read::Refuse(Response::text(
            411,
            "a POST needs a Content-Length\n",
        )));
    };
    if length > MAX_ACTION_BODY {
        return Ok(Read::Refuse(Response::text(
            413,
            &format!("the body is {length} bytes; an action takes at most {MAX_ACTION_BODY}\n"),
        )));
    }
    let mut body = rest
        .get(..length.min(rest.len()))
        .unwrap_or_default()
        .to_vec();
    while body.len() < length {
        let n = stream.read(&mut chunk).await?;
        if n == 0 {
            return Ok(Read::Nothing);
        }
        let take = (length - body.len()).min(n);
        body.extend_from_slice(chunk.get(..take).unwrap_or_default());
    }
    request.body = body;
    Ok(Read::Request(request))
}

/// Where the head ends: (end of the head's last line, start of the body).
fn find_head_end(buf: &[u8]) -> Option<(usize, usize)> {
    let crlf = buf
        .windows(4)
        .position(|w| w == b"\r\n\r\n")
        .map(|p| (p, p + 4));
    let lf = buf
        .windows(2)
        .position(|w| w == b"\n\n")
        .map(|p| (p, p + 2));
    match (crlf, lf) {
        (Some(a), Some(b)) => Some(if a.0 <= b.0 { a } else { b }),
        (a, b) => a.or(b),
    }
}

fn parse_head(head: &[u8]) -> Option<Request> {
    let text = std::str::from_utf8(head).ok()?;
    let mut lines = text.split('\n').map(|l| l.strip_suffix('\r').unwrap_or(l));
    let mut words = lines.next()?.split(' ');
    let method = words.next()?.to_string();
    let target = words.next()?;
    if method.is_empty() || !target.starts_with('/') {
        return None;
    }
    let (path, query) = target.split_once('?').unwrap_or((target, ""));
    let mut headers = Vec::new();
    for line in lines.take(MAX_HEADERS) {
        if line.is_empty() {
            continue;
        }
        let (name, value) = line.split_once(':')?;
        headers.push((name.trim().to_string(), value.trim().to_string()));
    }
    Some(Request {
        method,
        path: path.to_string(),
        query: query.to_string(),
        headers,
        body: Vec::new(),
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn heads_parse_into_path_query_and_fields() {
        let r =
            parse_head(b"GET /domain?d=a.test&w=1d HTTP/1.1\r\nHost: x:1\r\nOrigin:  http://x:1 ")
                .expect("parses");
        assert_eq!(
            (r.path.as_str(), r.query.as_str()),
            ("/domain", "d=a.test&w=1d")
        );
        assert_eq!(r.header("HOST"), Some("x:1"));
        assert_eq!(r.header("origin"), Some("http://x:1"));
        assert_eq!(r.query_value("w").as_deref(), Some("1d"));
        assert_eq!(parse_head(b"GET nope HTTP/1.1"), None);
        assert_eq!(parse_head(b"GET / HTTP/1.1\r\nno colon here"), None);
        assert_eq!(find_head_end(b"GET / HTTP/1.1\r\n\r\nbody"), Some((14, 18)));
        assert_eq!(find_head_end(b"GET / HTTP/1.1\n\nbody"), Some((14, 16)));
    }
}
