//! `GET /metrics` over HTTP/1.1: the scrape endpoint of one server.
//!
//! Each endpoint runs on its own thread with its own single-threaded tokio runtime, so neither
//! the compute threads nor a gRPC runtime saturated with requests can delay a scrape (the
//! "separate admin runtime" habit of STYLE.md). It answers one request per connection and
//! closes it: a scraper asks once per interval, so keep-alive buys nothing here, and the
//! server stays small enough to read whole (RFC 9112 gives the message syntax used below).
//!
//! Bounded: at most [`MAX_CONNECTIONS`] connections at once (more wait in the kernel's accept
//! queue), a request head of at most [`MAX_HEAD_BYTES`], [`HEAD_TIMEOUT`] to send it, and a
//! second at most spent draining a connection after its response.

use std::net::SocketAddr;
use std::sync::Arc;
use std::time::Duration;

use metrics_exporter_prometheus::PrometheusHandle;
use tokio::io::{AsyncReadExt, AsyncWriteExt};
use tokio::net::{TcpListener, TcpStream};
use tokio::sync::{Semaphore, oneshot};

use super::TelemetryError;

/// The content type of the Prometheus text format, version 0.0.4 (Prometheus "Exposition
/// formats", "Basic info"); `charset=utf-8` states the encoding that table prescribes.
pub const CONTENT_TYPE: &str = "text/plain; version=0.0.4; charset=utf-8";

/// The one path served.
pub const PATH: &str = "/metrics";

/// Connections handled at once. A handful of scrapers is the normal load; 8 leaves room for an
/// operator's curl without letting a flood of connections pile up tasks.
pub const MAX_CONNECTIONS: usize = 8;

/// Longest request head accepted. A scraper's head is a few hundred bytes; 8 KiB is the
/// smallest limit common HTTP servers use (common practice).
pub const MAX_HEAD_BYTES: usize = 8 << 10;

/// Time a client has to send its request head before the connection is closed.
pub const HEAD_TIMEOUT: Duration = Duration::from_secs(5);

/// A running endpoint. Dropping it closes the listener and ends the thread (a scrape in
/// progress is cut off; the scraper retries at its next interval).
#[derive(Debug)]
pub(crate) struct Endpoint {
    local_addr: SocketAddr,
    _stop: oneshot::Sender<()>,
}

impl Endpoint {
    /// Binds `addr` (port 0 picks a free port) and starts serving `handle`'s metrics.
    ///
    /// # Errors
    /// The address cannot be bound, or the thread or its runtime cannot start.
    pub(crate) fn start(
        addr: SocketAddr,
        handle: PrometheusHandle,
    ) -> Result<Endpoint, TelemetryError> {
        // Bound here, on the caller's thread, so a busy port is reported to the caller and
        // the real port is known before this returns.
        let bind_error = |source| TelemetryError::Bind { addr, source };
        let listener = std::net::TcpListener::bind(addr).map_err(bind_error)?;
        let local_addr = listener.local_addr().map_err(bind_error)?;
        listener.set_nonblocking(true).map_err(bind_error)?;
        let runtime = tokio::runtime::Builder::new_current_thread()
            .enable_io()
            .enable_time()
            .build()
            .map_err(|source| TelemetryError::Thread { source })?;
        let (stop, stopped) = oneshot::channel();
        std::thread::Builder::new()
            .name("convoy-metrics".into())
            .spawn(move || {
                runtime.block_on(async move {
                    match TcpListener::from_std(listener) {
                        Ok(listener) => serve(listener, handle, stopped).await,
                        Err(e) => tracing::error!(error = %e, "metrics endpoint cannot listen"),
                    }
                });
            })
            .map_err(|source| TelemetryError::Thread { source })?;
        tracing::info!(%local_addr, path = PATH, "serving metrics");
        Ok(Endpoint {
            local_addr,
            _stop: stop,
        })
    }

    pub(crate) fn local_addr(&self) -> SocketAddr {
        self.local_addr
    }
}

async fn serve(
    listener: TcpListener,
    handle: PrometheusHandle,
    mut stopped: oneshot::Receiver<()>,
) {
    let permits = Arc::new(Semaphore::new(MAX_CONNECTIONS));
    loop {
        let permit = tokio::select! {
            _ = &mut stopped => return,
            p = Arc::clone(&permits).acquire_owned() => match p {
                Ok(p) => p,
                // The semaphore is never closed; if it were, no connection could be served.
                Err(_) => return,
            },
        };
        let stream = tokio::select! {
            _ = &mut stopped => return,
            accepted = listener.accept() => match accepted {
                Ok((stream, _)) => stream,
                Err(e) => {
                    // Out of file descriptors and the like: wait a moment instead of spinning.
                    tracing::warn!(error = %e, "metrics endpoint: accept failed");
                    tokio::time::sleep(Duration::from_millis(100)).await;
                    continue;
                }
            },
        };
        let handle = handle.clone();
        tokio::spawn(async move {
            if let Err(e) = answer(stream, &handle).await {
                tracing::debug!(error = %e, "metrics endpoint: connection failed");
            }
            drop(permit);
        });
    }
}

/// Reads one request head, writes the response, closes.
async fn answer(mut stream: TcpStream, handle: &PrometheusHandle) -> std::io::Result<()> {
    let head = match tokio::time::timeout(HEAD_TIMEOUT, read_head(&mut stream)).await {
        Ok(head) => head?,
        Err(_) => return Ok(()),
    };
    let response = match head {
        Head::Complete(bytes) => respond(&bytes, || {
            super::drift::refresh();
            handle.render()
        }),
        Head::TooLarge => plain(
            431,
            "Request Header Fields Too Large",
            "request head too large\n",
        ),
        Head::Closed => return Ok(()),
    };
    stream.write_all(&response).await?;
    stream.shutdown().await?;
    linger(&mut stream).await;
    Ok(())
}

/// Most bytes and time spent discarding input after a response.
const LINGER_BYTES: usize = 64 << 10;
const LINGER_TIME: Duration = Duration::from_secs(1);

/// Closing a socket with unread input makes the kernel reset the connection, which can
/// destroy the response before the client reads it (an oversized head leaves input unread).
/// So close in stages: the response is sent and the write side shut; now read and discard
/// until the client closes, within bounds (RFC 9112 §9.6, "Tear-down").
async fn linger(stream: &mut TcpStream) {
    let mut sink = [0u8; 4096];
    let mut left = LINGER_BYTES;
    let drain = async {
        while left > 0 {
            match stream.read(&mut sink).await {
                Ok(0) | Err(_) => break,
                Ok(n) => left = left.saturating_sub(n),
            }
        }
    };
    let _ = tokio::time::timeout(LINGER_TIME, drain).await;
}

enum Head {
    /// Everything up to and including the blank line that ends the head.
    Complete(Vec<u8>),
    TooLarge,
    /// The client closed before finishing its head.
    Closed,
}

async fn read_head(stream: &mut TcpStream) -> std::io::Result<Head> {
    let mut buf = Vec::with_capacity(1024);
    let mut chunk = [0u8; 1024];
    loop {
        let n = stream.read(&mut chunk).await?;
        if n == 0 {
            return Ok(Head::Closed);
        }
        // Search only where the new bytes could complete the terminator.
        let from = buf.len().saturating_sub(3);
        buf.extend_from_slice(&chunk[..n]);
        if let Some(end) = find(&buf[from..], b"\r\n\r\n") {
            buf.truncate(from + end + 4);
            return Ok(Head::Complete(buf));
        }
        if buf.len() > MAX_HEAD_BYTES {
            return Ok(Head::TooLarge);
        }
    }
}

fn find(haystack: &[u8], needle: &[u8]) -> Option<usize> {
    haystack.windows(needle.len()).position(|w| w == needle)
}

/// The response to a request head: the metrics for `GET`/`HEAD /metrics` (any query string
/// ignored), an error status otherwise. `render` runs only when the metrics are sent.
pub(crate) fn respond(head: &[u8], render: impl FnOnce() -> String) -> Vec<u8> {
    let line = head.split(|&b| b == b'\n').next().unwrap_or_default();
    let line = line.strip_suffix(b"\r").unwrap_or(line);
    let Ok(line) = std::str::from_utf8(line) else {
        return plain(400, "Bad Request", "request line is not UTF-8\n");
    };
    // request-line = method SP request-target SP HTTP-version (RFC 9112 §3)
    let mut parts = line.split(' ');
    let (Some(method), Some(target), Some(version), None) =
        (parts.next(), parts.next(), parts.next(), parts.next())
    else {
        return plain(400, "Bad Request", "malformed request line\n");
    };
    if !version.starts_with("HTTP/1.") {
        return plain(505, "HTTP Version Not Supported", "HTTP/1.x only\n");
    }
    let path = target.split('?').next().unwrap_or_default();
    if path != PATH {
        return plain(404, "Not Found", "metrics are at /metrics\n");
    }
    let with_body = match method {
        "GET" => true,
        "HEAD" => false,
        _ => {
            let mut r = plain(405, "Method Not Allowed", "GET or HEAD only\n");
            // Allow is required with 405 (RFC 9110 §15.5.6); inserted before the blank line.
            let at = find(&r, b"\r\n\r\n").map_or(r.len(), |i| i + 2);
            r.splice(at..at, b"Allow: GET, HEAD\r\n".iter().copied());
            return r;
        }
    };
    let body = render();
    let mut r = format!(
        "HTTP/1.1 200 OK\r\nContent-Type: {CONTENT_TYPE}\r\nContent-Length: {}\r\n\
         Cache-Control: no-store\r\nConnection: close\r\n\r\n",
        body.len()
    )
    .into_bytes();
    if with_body {
        r.extend_from_slice(body.as_bytes());
    }
    r
}

fn plain(status: u16, reason: &str, body: &str) -> Vec<u8> {
    format!(
        "HTTP/1.1 {status} {reason}\r\nContent-Type: text/plain; charset=utf-8\r\n\
         Content-Length: {}\r\nConnection: close\r\n\r\n{body}",
        body.len()
    )
    .into_bytes()
}

#[cfg(test)]
mod tests {
    use super::*;

    fn status_and_body(response: &[u8]) -> (String, String, String) {
        let text = String::from_utf8(response.to_vec()).unwrap();
        let (head, body) = text.split_once("\r\n\r\n").unwrap();
        let status = head.lines().next().unwrap().to_string();
        (status, head.to_string(), body.to_string())
    }

    // Requests and expected statuses follow RFC 9110/9112; the metrics text is a stand-in.
    #[test]
    fn get_metrics_answers_with_the_text_format() {
        let r = respond(b"GET /metrics HTTP/1.1\r\nHost: x\r\n\r\n", || {
            "a 1\n".into()
        });
        let (status, head, body) = status_and_body(&r);
        assert_eq!(status, "HTTP/1.1 200 OK");
        assert!(head.contains("Content-Type: text/plain; version=0.0.4"));
        assert!(head.contains("Content-Length: 4\r\n"));
        assert_eq!(body, "a 1\n");
    }

    #[test]
    fn head_has_no_body_and_queries_are_ignored() {
        let r = respond(b"HEAD /metrics?x=1 HTTP/1.0\r\n\r\n", || "a 1\n".into());
        let (status, head, body) = status_and_body(&r);
        assert_eq!(status, "HTTP/1.1 200 OK");
        assert!(head.contains("Content-Length: 4\r\n"));
        assert_eq!(body, "");
    }

    #[test]
    fn other_requests_get_error_statuses() {
        let never = || -> String { panic!("rendered for a refused request") };
        let cases: [(&[u8], &str); 6] = [
            (b"GET / HTTP/1.1\r\n\r\n", "HTTP/1.1 404 Not Found"),
            (
                b"POST /metrics HTTP/1.1\r\n\r\n",
                "HTTP/1.1 405 Method Not Allowed",
            ),
            (b"GET /metrics\r\n\r\n", "HTTP/1.1 400 Bad Request"),
            (
                b"GET  /metrics HTTP/1.1\r\n\r\n",
                "HTTP/1.1 400 Bad Request",
            ),
            (
                b"GET /metrics HTTP/2.0\r\n\r\n",
                "HTTP/1.1 505 HTTP Version Not Supported",
            ),
            (
                b"\xff\xfe /metrics HTTP/1.1\r\n\r\n",
                "HTTP/1.1 400 Bad Request",
            ),
        ];
        for (request, want) in cases {
            let (status, _, _) = status_and_body(&respond(request, never));
            assert_eq!(status, want, "{:?}", String::from_utf8_lossy(request));
        }
        let (_, head, _) = status_and_body(&respond(b"PUT /metrics HTTP/1.1\r\n\r\n", never));
        assert!(head.contains("\r\nAllow: GET, HEAD"), "{head}");
    }

    /// Over a real socket: a head split across writes is read whole, an oversized head is
    /// refused with 431 (RFC 6585 §5), and dropping the endpoint closes its port.
    #[tokio::test]
    async fn serves_over_tcp_within_its_limits() {
        // A recorder of its own, not installed globally: nothing else in the process sees it.
        let recorder = super::super::names::builder().build_recorder();
        let endpoint = Endpoint::start("127.0.0.1:0".parse().unwrap(), recorder.handle()).unwrap();
        let addr = endpoint.local_addr();
        assert_ne!(addr.port(), 0);

        async fn exchange(addr: SocketAddr, parts: &[&[u8]]) -> String {
            let mut s = TcpStream::connect(addr).await.unwrap();
            for p in parts {
                s.write_all(p).await.unwrap();
                tokio::time::sleep(Duration::from_millis(20)).await;
            }
            let mut out = Vec::new();
            s.read_to_end(&mut out).await.unwrap();
            String::from_utf8(out).unwrap()
        }
        let split = exchange(
            addr,
            &[b"GET /metr", b"ics HTTP/1.1\r\nHost: a\r", b"\n\r\n"],
        )
        .await;
        assert!(split.starts_with("HTTP/1.1 200 OK\r\n"), "{split}");
        let filler = format!("X-Filler: {}\r\n", "a".repeat(MAX_HEAD_BYTES));
        let big = exchange(
            addr,
            &[b"GET /metrics HTTP/1.1\r\n", filler.as_bytes(), b"\r\n"],
        )
        .await;
        assert!(big.starts_with("HTTP/1.1 431 "), "{big}");

        drop(endpoint);
        let mut closed = false;
        for _ in 0..100 {
            if TcpStream::connect(addr).await.is_err() {
                closed = true;
                break;
            }
            tokio::time::sleep(Duration::from_millis(20)).await;
        }
        assert!(
            closed,
            "{addr} still accepts after the endpoint was dropped"
        );
    }
}
