//! A very small HTTP/1.1 server for the metrics endpoint: `GET` (and `HEAD`) of a few fixed paths, one request per
//! connection, nothing else.
//!
//! Written on tokio's `TcpListener` rather than with an HTTP framework because the endpoint needs none of one:
//! no bodies, no keep-alive, no routing beyond a path compare. What it must have it has: a request head bounded
//! in size ([`MAX_HEAD_BYTES`]), a deadline for reading it and for writing the answer ([`IO_TIMEOUT`]), and a bound on
//! connections served at once ([`MAX_CONNECTIONS`]), so a slow or hostile client cannot hold the daemon's memory or
//! tasks. It answers Prometheus' scraper, `curl` and a load balancer's health check alike.
//!
//! [`parse_request`] is pure and unit-tested; [`serve`] is the accept loop.

use std::future::Future;
use std::sync::Arc;
use std::time::Duration;
use tokio::io::{AsyncReadExt, AsyncWriteExt};
use tokio::net::{TcpListener, TcpStream};
use tokio::sync::Semaphore;
use tracing::{debug, warn};

/// Largest request head (request line and headers) read; a longer one gets 431.
pub const MAX_HEAD_BYTES: usize = 8192;
/// Deadline for reading the request head, and again for writing the response.
pub const IO_TIMEOUT: Duration = Duration::from_secs(5);
/// Connections served at once; further ones wait in the listen backlog.
pub const MAX_CONNECTIONS: usize = 16;

/// What the handler answers.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Response {
    pub status: u16,
    pub content_type: &'static str,
    pub body: String,
}

impl Response {
    pub fn text(status: u16, body: impl Into<String>) -> Response {
        Response {
            status,
            content_type: "text/plain; charset=utf-8",
            body: body.into(),
        }
    }
}

/// A request the server can answer.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Request {
    /// HEAD: the same headers as GET, no body.
    pub head_only: bool,
    /// The path, without the query string.
    pub path: String,
}

/// Why a request head was not accepted, as the status to answer with.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Refused {
    /// 400: not an HTTP/1.x request line.
    BadRequest,
    /// 405: a method other than GET or HEAD.
    Method,
    /// 431: the head is larger than [`MAX_HEAD_BYTES`].
    TooLarge,
}

impl Refused {
    fn response(self) -> Response {
        match self {
            Refused::BadRequest => Response::text(400, "bad request\n"),
            Refused::Method => Response::text(405, "only GET and HEAD\n"),
            Refused::TooLarge => Response::text(431, "request head too large\n"),
        }
    }
}

/// Reads the request line of a complete head (`head` ends with the blank line). Headers are not needed.
pub fn parse_request(head: &[u8]) -> Result<Request, Refused> {
    let line_end = head
        .windows(2)
        .position(|w| w == b"\r\n")
        .ok_or(Refused::BadRequest)?;
    let line = std::str::from_utf8(&head[..line_end]).map_err(|_| Refused::BadRequest)?;
    let mut parts = line.split(' ');
    let (Some(method), Some(target), Some(version), None) =
        (parts.next(), parts.next(), parts.next(), parts.next())
    else {
        return Err(Refused::BadRequest);
    };
    if !version.starts_with("HTTP/1.") || !target.starts_with('/') {
        return Err(Refused::BadRequest);
    }
    let head_only = match method {
        "GET" => false,
        "HEAD" => true,
        m if !m.is_empty() && m.bytes().all(|b| b.is_ascii_uppercase()) => {
            return Err(Refused::Method)
        }
        _ => return Err(Refused::BadRequest),
    };
    let path = target.split(['?', '#']).next().unwrap_or(target);
    Ok(Request {
        head_only,
        path: path.to_string(),
    })
}

fn reason_phrase(status: u16) -> &'static str {
    match status {
        200 => "OK",
        400 => "Bad Request",
        404 => "Not Found",
        405 => "Method Not Allowed",
        408 => "Request Timeout",
        431 => "Request Header Fields Too Large",
        503 => "Service Unavailable",
        _ => "",
    }
}

/// The bytes of a response: status line, headers, and the body unless `head_only`.
pub fn write_response(r: &Response, head_only: bool) -> Vec<u8> {
    let mut out = format!(
        "HTTP/1.1 {} {}\r\nContent-Type: {}\r\nContent-Length: {}\r\nCache-Control: no-store\r\nConnection: close\r\n",
        r.status,
        reason_phrase(r.status),
        r.content_type,
        r.body.len()
    );
    if r.status == 405 {
        out.push_str("Allow: GET, HEAD\r\n");
    }
    out.push_str("\r\n");
    let mut bytes = out.into_bytes();
    if !head_only {
        bytes.extend_from_slice(r.body.as_bytes());
    }
    bytes
}

/// Accepts connections on `listener` and answers each request with `handler(path)`, until `stop` completes.
pub async fn serve<H>(listener: TcpListener, handler: Arc<H>, stop: impl Future<Output = ()>)
where
    H: Fn(&str) -> Response + Send + Sync + 'static,
{
    let permits = Arc::new(Semaphore::new(MAX_CONNECTIONS));
    tokio::pin!(stop);
    loop {
        let permit = tokio::select! {
            _ = &mut stop => return,
            p = permits.clone().acquire_owned() => match p {
                Ok(p) => p,
                Err(_) => return,
            },
        };
        let accepted = tokio::select! {
            _ = &mut stop => return,
            a = listener.accept() => a,
        };
        match accepted {
            Ok((stream, peer)) => {
                let handler = handler.clone();
                tokio::spawn(async move {
                    if let Err(e) = answer(stream, handler.as_ref()).await {
                        debug!(%peer, "metrics request: {e}");
                    }
                    drop(permit);
                });
            }
            Err(e) => {
                // Out of file descriptors and the like: pause rather than spin on the error.
                warn!("metrics endpoint: cannot accept a connection: {e}");
                tokio::time::sleep(Duration::from_millis(100)).await;
            }
        }
    }
}

async fn answer<H>(mut stream: TcpStream, handler: &H) -> std::io::Result<()>
where
    H: Fn(&str) -> Response,
{
    let mut head = Vec::with_capacity(512);
    let read = tokio::time::timeout(IO_TIMEOUT, read_head(&mut stream, &mut head)).await;
    let (response, head_only) = match read {
        Err(_) => (Response::text(408, "request timeout\n"), false),
        Ok(Err(e)) => return Err(e),
        Ok(Ok(Err(refused))) => (refused.response(), false),
        Ok(Ok(Ok(()))) => match parse_request(&head) {
            Ok(req) => (handler(&req.path), req.head_only),
            Err(refused) => (refused.response(), false),
        },
    };
    let bytes = write_response(&response, head_only);
    tokio::time::timeout(IO_TIMEOUT, async {
        stream.write_all(&bytes).await?;
        stream.shutdown().await
    })
    .await
    .map_err(|_| std::io::Error::new(std::io::ErrorKind::TimedOut, "writing the response"))?
}

/// Reads until the blank line that ends the head; `Ok(Err(TooLarge))` past [`MAX_HEAD_BYTES`].
async fn read_head(
    stream: &mut TcpStream,
    head: &mut Vec<u8>,
) -> std::io::Result<Result<(), Refused>> {
    let mut buf = [0u8; 1024];
    loop {
        let n = stream.read(&mut buf).await?;
        if n == 0 {
            return Ok(Err(Refused::BadRequest));
        }
        let from = head.len().saturating_sub(3);
        head.extend_from_slice(&buf[..n]);
        if head[from..].windows(4).any(|w| w == b"\r\n\r\n") {
            return Ok(Ok(()));
        }
        if head.len() > MAX_HEAD_BYTES {
            return Ok(Err(Refused::TooLarge));
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn request_lines() {
        let ok = |text: &str| parse_request(text.as_bytes());
        assert_eq!(
            ok("GET /metrics HTTP/1.1\r\nHost: x\r\n\r\n"),
            Ok(Request {
                head_only: false,
                path: "/metrics".into()
            })
        );
        assert_eq!(
            ok("HEAD /health?verbose=1 HTTP/1.0\r\n\r\n"),
            Ok(Request {
                head_only: true,
                path: "/health".into()
            })
        );
        assert_eq!(ok("POST /metrics HTTP/1.1\r\n\r\n"), Err(Refused::Method));
        for bad in [
            "GET /metrics\r\n\r\n",
            "GET metrics HTTP/1.1\r\n\r\n",
            "GET /metrics HTTP/2\r\n\r\n",
            "GET  /metrics HTTP/1.1\r\n\r\n",
            "get /metrics HTTP/1.1\r\n\r\n",
            "\u{1}\u{2}\r\n\r\n",
            "",
        ] {
            assert_eq!(ok(bad), Err(Refused::BadRequest), "{bad:?}");
        }
        assert_eq!(
            parse_request(b"GET /\xff HTTP/1.1\r\n\r\n"),
            Err(Refused::BadRequest)
        );
    }

    #[test]
    fn responses() {
        let r = Response::text(200, "ok\n");
        let full = String::from_utf8(write_response(&r, false)).unwrap();
        assert!(full.starts_with("HTTP/1.1 200 OK\r\n"), "{full}");
        assert!(full.contains("Content-Length: 3\r\n"), "{full}");
        assert!(full.ends_with("\r\n\r\nok\n"), "{full}");
        let head = String::from_utf8(write_response(&r, true)).unwrap();
        assert!(head.ends_with("\r\n\r\n") && head.contains("Content-Length: 3"));
        let m = String::from_utf8(write_response(&Refused::Method.response(), false)).unwrap();
        assert!(m.starts_with("HTTP/1.1 405 Method Not Allowed") && m.contains("Allow: GET, HEAD"));
    }
}
