//! A minimal HTTP/1.1 client over `tokio::net::TcpStream`, shared by `demefix demo` (its
//! loopback exchanges with the in-process service), the client commands (`demefix submit`,
//! `get`, `report`; [`crate::client`]) and the completion notifications ([`crate::notify`]).
//!
//! This module owns `http://` URLs as the service accepts them ([`HttpUrl`]: a host, an
//! optional port, a path; no TLS, no user info, no fragment), the bytes of a request (one
//! request per connection, `Connection: close`, an optional body with its `Content-Length`),
//! and the reading of a response whose body is delimited by `Content-Length`, chunked
//! transfer coding, or the close. Reading stops as soon as the body is complete, so a
//! server that keeps the connection open anyway does not stall an exchange. The normal
//! dependency tree has no HTTP client crate (reqwest is a dev-dependency); these exchanges
//! need nothing more. There is no TLS client: `https://` is refused with a reason.

use std::fmt;
use std::net::SocketAddr;
use std::time::Duration;
use tokio::io::{AsyncReadExt, AsyncWriteExt};
use tokio::net::TcpStream;

/// Default longest wait for one whole exchange.
pub const EXCHANGE_TIMEOUT: Duration = Duration::from_secs(30);
/// Longest wait for the connection itself (within the exchange's timeout).
pub const CONNECT_TIMEOUT: Duration = Duration::from_secs(10);
/// Default largest response accepted, bytes.
pub const MAX_RESPONSE: usize = 16 * 1024 * 1024;
/// Longest URL accepted by [`HttpUrl::parse`], bytes.
pub const MAX_URL_LEN: usize = 2_000;

/// Where to connect: a host (a name, an IPv4 address, or an IPv6 address without its
/// brackets) and a port.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Endpoint {
    host: String,
    port: u16,
}

impl Endpoint {
    /// The host, as written in the URL (IPv6 without brackets).
    pub fn host(&self) -> &str {
        &self.host
    }

    /// The port.
    pub fn port(&self) -> u16 {
        self.port
    }

    /// `host:port` as the `Host` header and URLs write it (`[v6]:port` for IPv6).
    pub fn authority(&self) -> String {
        if self.host.contains(':') {
            format!("[{}]:{}", self.host, self.port)
        } else {
            format!("{}:{}", self.host, self.port)
        }
    }
}

impl From<SocketAddr> for Endpoint {
    fn from(addr: SocketAddr) -> Self {
        Self {
            host: addr.ip().to_string(),
            port: addr.port(),
        }
    }
}

impl fmt::Display for Endpoint {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(&self.authority())
    }
}

/// Why a URL is not an `http://` URL this client can use.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
pub enum UrlError {
    /// `https://`: there is no TLS client.
    #[error(
        "https is not supported: the service has no TLS client; give an http:// URL (for \
         example a relay on the same network)"
    )]
    Https,
    /// Another scheme, or none.
    #[error("must be an http:// URL")]
    Scheme,
    /// Nothing between `http://` and the path.
    #[error("has no host")]
    NoHost,
    /// The host is not a name, an IPv4 address or a bracketed IPv6 address.
    #[error("the host `{0}` is not a host name or an IP address")]
    Host(String),
    /// The port is not a number from 1 to 65535.
    #[error("the port `{0}` is not a number from 1 to 65535")]
    Port(String),
    /// `user:password@host`.
    #[error("must not contain user information (name:password@)")]
    UserInfo,
    /// `#...`, which is never sent to a server.
    #[error("must not contain a fragment (#...)")]
    Fragment,
    /// Spaces, control characters or non-ASCII characters (percent-encode them).
    #[error("contains a space, a control character or a non-ASCII character (percent-encode it)")]
    Characters,
    /// Longer than [`MAX_URL_LEN`].
    #[error("is longer than {MAX_URL_LEN} bytes")]
    TooLong,
}

/// An `http://` URL: where to connect, and the request target (path and query).
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct HttpUrl {
    endpoint: Endpoint,
    target: String,
}

fn strip_prefix_ignore_case<'a>(text: &'a str, prefix: &str) -> Option<&'a str> {
    let head = text.get(..prefix.len())?;
    head.eq_ignore_ascii_case(prefix)
        .then(|| &text[prefix.len()..])
}

fn is_host_name(host: &str) -> bool {
    !host.is_empty()
        && host.len() <= 253
        && host
            .bytes()
            .all(|b| b.is_ascii_alphanumeric() || matches!(b, b'-' | b'.' | b'_'))
        && !host.starts_with(['-', '.'])
}

impl HttpUrl {
    /// Parses `text` as `http://host[:port][/path][?query]` (port 80 when absent). The scheme
    /// is case-insensitive; `https://` is refused with its own reason ([`UrlError::Https`]).
    pub fn parse(text: &str) -> Result<Self, UrlError> {
        if text.len() > MAX_URL_LEN {
            return Err(UrlError::TooLong);
        }
        if !text.bytes().all(|b| b.is_ascii_graphic()) {
            return Err(UrlError::Characters);
        }
        let rest = match strip_prefix_ignore_case(text, "http://") {
            Some(rest) => rest,
            None if strip_prefix_ignore_case(text, "https://").is_some() => {
                return Err(UrlError::Https)
            }
            None => return Err(UrlError::Scheme),
        };
        if rest.contains('#') {
            return Err(UrlError::Fragment);
        }
        let split = rest.find(['/', '?']).unwrap_or(rest.len());
        let (authority, target) = rest.split_at(split);
        if authority.contains('@') {
            return Err(UrlError::UserInfo);
        }
        if authority.is_empty() {
            return Err(UrlError::NoHost);
        }
        let (host, port) = if let Some(v6) = authority.strip_prefix('[') {
            let (host, after) = v6
                .split_once(']')
                .ok_or_else(|| UrlError::Host(authority.to_owned()))?;
            if host.parse::<std::net::Ipv6Addr>().is_err() {
                return Err(UrlError::Host(authority.to_owned()));
            }
            let port = match after {
                "" => None,
                p => Some(
                    p.strip_prefix(':')
                        .ok_or_else(|| UrlError::Host(authority.to_owned()))?,
                ),
            };
            (host, port)
        } else {
            match authority.split_once(':') {
                Some((host, port)) => (host, Some(port)),
                None => (authority, None),
            }
        };
        if host.is_empty() {
            return Err(UrlError::NoHost);
        }
        if !host.contains(':') && !is_host_name(host) {
            return Err(UrlError::Host(host.to_owned()));
        }
        let port = match port {
            None | Some("") => 80,
            Some(p) => p
                .parse::<u16>()
                .ok()
                .filter(|&n| n > 0 && p.bytes().all(|b| b.is_ascii_digit()))
                .ok_or_else(|| UrlError::Port(p.to_owned()))?,
        };
        let target = if target.starts_with('?') {
            format!("/{target}")
        } else if target.is_empty() {
            "/".to_owned()
        } else {
            target.to_owned()
        };
        Ok(Self {
            endpoint: Endpoint {
                host: host.to_ascii_lowercase(),
                port,
            },
            target,
        })
    }

    /// Where to connect.
    pub fn endpoint(&self) -> &Endpoint {
        &self.endpoint
    }

    /// The request target: the path (`/` when the URL has none) and the query.
    pub fn target(&self) -> &str {
        &self.target
    }

    /// The target of `path` (which starts with `/`) under this URL's path, for a base URL
    /// such as `http://host:8080/demefix/`: `/demefix/v1/runs`. A query of the base is
    /// dropped.
    pub fn join(&self, path: &str) -> String {
        let base = self.target.split('?').next().unwrap_or_default();
        format!("{}{path}", base.trim_end_matches('/'))
    }
}

impl fmt::Display for HttpUrl {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(f, "http://{}{}", self.endpoint.authority(), self.target)
    }
}

/// One request: method, target, headers, an optional body, and the limits of its exchange.
#[derive(Debug, Clone)]
pub struct Request<'a> {
    method: &'a str,
    target: &'a str,
    accept: &'a str,
    headers: Vec<(&'a str, &'a str)>,
    body: Option<(&'a str, &'a [u8])>,
    timeout: Duration,
    max_response: usize,
}

impl<'a> Request<'a> {
    /// `method target`, accepting JSON, with the default limits ([`EXCHANGE_TIMEOUT`],
    /// [`MAX_RESPONSE`]).
    pub fn new(method: &'a str, target: &'a str) -> Self {
        Self {
            method,
            target,
            accept: "application/json",
            headers: Vec::new(),
            body: None,
            timeout: EXCHANGE_TIMEOUT,
            max_response: MAX_RESPONSE,
        }
    }

    /// The `Accept` header (default `application/json`).
    pub fn accept(mut self, media_types: &'a str) -> Self {
        self.accept = media_types;
        self
    }

    /// Adds a header (its name and value must not contain CR or LF).
    pub fn header(mut self, name: &'a str, value: &'a str) -> Self {
        self.headers.push((name, value));
        self
    }

    /// A JSON body.
    pub fn json(self, body: &'a [u8]) -> Self {
        self.body("application/json", body)
    }

    /// A body of media type `content_type`.
    pub fn body(mut self, content_type: &'a str, body: &'a [u8]) -> Self {
        self.body = Some((content_type, body));
        self
    }

    /// Longest wait for the whole exchange.
    pub fn timeout(mut self, timeout: Duration) -> Self {
        self.timeout = timeout;
        self
    }

    /// Largest response read, bytes.
    pub fn max_response(mut self, bytes: usize) -> Self {
        self.max_response = bytes;
        self
    }

    /// The bytes of this request for `host`.
    pub fn encode(&self, host: &Endpoint) -> Result<Vec<u8>, HttpError> {
        let clean = |s: &str| !s.bytes().any(|b| b == b'\r' || b == b'\n');
        let all_clean = [self.method, self.target, self.accept]
            .into_iter()
            .chain(self.headers.iter().flat_map(|(n, v)| [*n, *v]))
            .chain(self.body.iter().map(|(t, _)| *t))
            .all(clean);
        if !all_clean {
            return Err(HttpError::InvalidRequest(
                "a header name or value contains CR or LF",
            ));
        }
        let mut head = format!(
            "{} {} HTTP/1.1\r\nHost: {}\r\nConnection: close\r\nAccept: {}\r\n",
            self.method,
            self.target,
            host.authority(),
            self.accept
        );
        for (name, value) in &self.headers {
            head.push_str(&format!("{name}: {value}\r\n"));
        }
        if let Some((content_type, body)) = self.body {
            head.push_str(&format!(
                "Content-Type: {content_type}\r\nContent-Length: {}\r\n",
                body.len()
            ));
        }
        head.push_str("\r\n");
        let mut bytes = head.into_bytes();
        bytes.extend_from_slice(self.body.map_or(&[][..], |(_, b)| b));
        Ok(bytes)
    }
}

/// A response: status code, headers (names in lowercase) and body.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Reply {
    /// HTTP status code.
    pub status: u16,
    /// Header lines in order, names lowercased, values trimmed.
    pub headers: Vec<(String, String)>,
    /// The body, transfer coding removed.
    pub body: Vec<u8>,
}

impl Reply {
    /// The first value of header `name` (case-insensitive).
    pub fn header(&self, name: &str) -> Option<&str> {
        self.headers
            .iter()
            .find(|(n, _)| n.eq_ignore_ascii_case(name))
            .map(|(_, v)| v.as_str())
    }

    /// The media type of the body (`Content-Type` without parameters, lowercased).
    pub fn media_type(&self) -> Option<String> {
        self.header("content-type")
            .and_then(|v| v.split(';').next())
            .map(|t| t.trim().to_ascii_lowercase())
    }
}

/// Why an exchange failed.
#[derive(Debug, thiserror::Error)]
pub enum HttpError {
    /// No connection could be made (refused, unresolvable host, no answer to the connect).
    #[error("cannot connect to {endpoint}: {source}")]
    Connect {
        /// Where.
        endpoint: String,
        /// Cause.
        source: std::io::Error,
    },
    /// Writing or reading on the connection failed.
    #[error("{0}")]
    Io(#[from] std::io::Error),
    /// No complete answer within the exchange's timeout.
    #[error("no complete answer within {0:?}")]
    Timeout(Duration),
    /// The answer is not an HTTP/1.x response this client reads.
    #[error("malformed response: {0}")]
    Malformed(&'static str),
    /// The answer is larger than the request allows.
    #[error("the response is larger than the {0} bytes this client reads")]
    TooLarge(usize),
    /// The request cannot be written (a header with CR or LF).
    #[error("invalid request: {0}")]
    InvalidRequest(&'static str),
}

impl HttpError {
    /// Whether the server could not be reached or did not answer in time.
    pub fn is_unreachable(&self) -> bool {
        matches!(self, HttpError::Connect { .. } | HttpError::Timeout(_))
    }
}

/// Sends `request` to `endpoint` and reads the response, within the request's timeout.
pub async fn send(endpoint: &Endpoint, request: &Request<'_>) -> Result<Reply, HttpError> {
    let bytes = request.encode(endpoint)?;
    let limit = request.max_response;
    let exchange = async {
        let connect = TcpStream::connect((endpoint.host.as_str(), endpoint.port));
        let mut stream = match tokio::time::timeout(CONNECT_TIMEOUT, connect).await {
            Ok(Ok(stream)) => stream,
            Ok(Err(source)) => {
                return Err(HttpError::Connect {
                    endpoint: endpoint.authority(),
                    source,
                })
            }
            Err(_) => {
                return Err(HttpError::Connect {
                    endpoint: endpoint.authority(),
                    source: std::io::Error::new(
                        std::io::ErrorKind::TimedOut,
                        format!("no connection within {CONNECT_TIMEOUT:?}"),
                    ),
                })
            }
        };
        stream.write_all(&bytes).await?;
        read_response(&mut stream, limit).await
    };
    tokio::time::timeout(request.timeout, exchange)
        .await
        .map_err(|_| HttpError::Timeout(request.timeout))?
}

/// One request to `addr` with an optional JSON body, under the default limits (the demo's
/// exchange).
pub async fn exchange(
    addr: SocketAddr,
    method: &str,
    path: &str,
    body: Option<&[u8]>,
) -> Result<Reply, HttpError> {
    let mut request = Request::new(method, path);
    if let Some(b) = body {
        request = request.json(b);
    }
    send(&Endpoint::from(addr), &request).await
}

/// Reads until the response is complete (or the connection closes).
async fn read_response(stream: &mut TcpStream, limit: usize) -> Result<Reply, HttpError> {
    let mut raw = Vec::new();
    let mut buf = vec![0u8; 16 * 1024];
    loop {
        let n = stream.read(&mut buf).await?;
        if n == 0 {
            return parse_response(&raw);
        }
        raw.extend_from_slice(&buf[..n]);
        if raw.len() > limit.saturating_add(64 * 1024) {
            return Err(HttpError::TooLarge(limit));
        }
        if let Some(reply) = complete_response(&raw)? {
            if reply.body.len() > limit {
                return Err(HttpError::TooLarge(limit));
            }
            return Ok(reply);
        }
    }
}

fn find(haystack: &[u8], needle: &[u8]) -> Option<usize> {
    haystack.windows(needle.len()).position(|w| w == needle)
}

/// How a body is delimited.
enum Framing {
    /// No body (1xx, 204, 304).
    Empty,
    /// `Content-Length`.
    Length(usize),
    /// Chunked transfer coding.
    Chunked,
    /// Until the connection closes.
    Close,
}

struct Head {
    status: u16,
    headers: Vec<(String, String)>,
    framing: Framing,
    body_start: usize,
}

/// The status line and headers, once they are all in `raw`.
fn parse_head(raw: &[u8]) -> Result<Option<Head>, HttpError> {
    let Some(head_end) = find(raw, b"\r\n\r\n") else {
        return Ok(None);
    };
    let head = std::str::from_utf8(&raw[..head_end])
        .map_err(|_| HttpError::Malformed("headers are not UTF-8"))?;
    let mut lines = head.split("\r\n");
    let mut status_line = lines.next().unwrap_or_default().splitn(3, ' ');
    if !status_line
        .next()
        .is_some_and(|version| version.starts_with("HTTP/1."))
    {
        return Err(HttpError::Malformed("not an HTTP/1.x status line"));
    }
    let status = status_line
        .next()
        .and_then(|code| code.parse::<u16>().ok())
        .filter(|code| (100..=999).contains(code))
        .ok_or(HttpError::Malformed("no status code"))?;
    let mut headers = Vec::new();
    let mut length = None;
    let mut chunked = false;
    for line in lines {
        let (name, value) = line
            .split_once(':')
            .ok_or(HttpError::Malformed("a header line without a colon"))?;
        let name = name.trim().to_ascii_lowercase();
        let value = value.trim().to_owned();
        if name == "content-length" {
            let n = value
                .parse::<usize>()
                .map_err(|_| HttpError::Malformed("Content-Length is not a number"))?;
            length = Some(n);
        } else if name == "transfer-encoding" {
            chunked = value.to_ascii_lowercase().contains("chunked");
        }
        headers.push((name, value));
    }
    let framing = if (100..200).contains(&status) || status == 204 || status == 304 {
        Framing::Empty
    } else if chunked {
        Framing::Chunked
    } else if let Some(n) = length {
        Framing::Length(n)
    } else {
        Framing::Close
    };
    Ok(Some(Head {
        status,
        headers,
        framing,
        body_start: head_end + 4,
    }))
}

/// The response in `raw` if it is complete before the connection closes.
fn complete_response(raw: &[u8]) -> Result<Option<Reply>, HttpError> {
    let Some(head) = parse_head(raw)? else {
        return Ok(None);
    };
    let rest = &raw[head.body_start..];
    let body = match head.framing {
        Framing::Empty => Some(Vec::new()),
        Framing::Length(n) => rest.get(..n).map(<[u8]>::to_vec),
        Framing::Chunked => match decode_chunked(rest)? {
            Chunked::Complete(body) => Some(body),
            Chunked::Incomplete => None,
        },
        Framing::Close => None,
    };
    Ok(body.map(|body| Reply {
        status: head.status,
        headers: head.headers,
        body,
    }))
}

/// Reads a complete response (status line, headers, body) received up to the close.
pub fn parse_response(raw: &[u8]) -> Result<Reply, HttpError> {
    let head = parse_head(raw)?.ok_or(HttpError::Malformed("no end of headers"))?;
    let rest = &raw[head.body_start..];
    let body = match head.framing {
        Framing::Empty => Vec::new(),
        Framing::Length(n) => rest
            .get(..n)
            .ok_or(HttpError::Malformed("body shorter than its Content-Length"))?
            .to_vec(),
        Framing::Chunked => match decode_chunked(rest)? {
            Chunked::Complete(body) => body,
            Chunked::Incomplete => return Err(HttpError::Malformed("chunked body ends early")),
        },
        Framing::Close => rest.to_vec(),
    };
    Ok(Reply {
        status: head.status,
        headers: head.headers,
        body,
    })
}

/// A chunked body, as far as it has arrived.
enum Chunked {
    Complete(Vec<u8>),
    Incomplete,
}

/// Removes chunked transfer coding (RFC 9112 section 7.1); trailers are ignored.
fn decode_chunked(mut rest: &[u8]) -> Result<Chunked, HttpError> {
    let mut body = Vec::new();
    loop {
        let Some(line_end) = find(rest, b"\r\n") else {
            return Ok(Chunked::Incomplete);
        };
        let size = std::str::from_utf8(&rest[..line_end])
            .ok()
            .and_then(|l| l.split(';').next())
            .and_then(|s| usize::from_str_radix(s.trim(), 16).ok())
            .ok_or(HttpError::Malformed("a chunk size is not hexadecimal"))?;
        rest = &rest[line_end + 2..];
        if size == 0 {
            return Ok(Chunked::Complete(body));
        }
        let Some(chunk) = rest.get(..size) else {
            return Ok(Chunked::Incomplete);
        };
        body.extend_from_slice(chunk);
        match rest.get(size..size + 2) {
            None => return Ok(Chunked::Incomplete),
            Some(b"\r\n") => {}
            Some(_) => return Err(HttpError::Malformed("a chunk is not followed by CRLF")),
        }
        rest = &rest[size + 2..];
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_sized_response_is_cut_at_its_content_length() {
        let raw =
            b"HTTP/1.1 202 Accepted\r\ncontent-length: 7\r\nLocation: /v1/runs/x\r\n\r\n{\"a\":1}";
        let reply = parse_response(raw).unwrap();
        assert_eq!(reply.status, 202);
        assert_eq!(reply.body, b"{\"a\":1}");
        assert_eq!(reply.header("location"), Some("/v1/runs/x"));
        assert_eq!(reply.header("LOCATION"), Some("/v1/runs/x"));
        assert!(complete_response(raw).unwrap().is_some());
        assert!(complete_response(&raw[..raw.len() - 1]).unwrap().is_none());
    }

    #[test]
    fn a_chunked_response_is_decoded() {
        let raw = b"HTTP/1.1 200 OK\r\nTransfer-Encoding: chunked\r\n\r\n4\r\n{\"a\"\r\n3;ext=1\r\n:1}\r\n0\r\n\r\n";
        assert_eq!(parse_response(raw).unwrap().body, b"{\"a\":1}");
        assert!(complete_response(raw).unwrap().is_some());
        assert!(complete_response(&raw[..60]).unwrap().is_none());
    }

    #[test]
    fn a_body_without_length_runs_to_the_close() {
        let raw = b"HTTP/1.0 404 Not Found\r\n\r\nnothing here";
        let reply = parse_response(raw).unwrap();
        assert_eq!(
            (reply.status, reply.body.as_slice()),
            (404, &b"nothing here"[..])
        );
        assert!(complete_response(raw).unwrap().is_none());
        let no_content = b"HTTP/1.1 204 No Content\r\n\r\n";
        assert!(complete_response(no_content)
            .unwrap()
            .unwrap()
            .body
            .is_empty());
    }

    #[test]
    fn truncated_or_foreign_answers_are_errors() {
        for raw in [
            &b"HTTP/1.1 200 OK\r\ncontent-length: 10\r\n\r\nshort"[..],
            b"HTTP/1.1 200 OK\r\ntransfer-encoding: chunked\r\n\r\n9\r\nabc",
            b"HTTP/1.1 200 OK\r\ntransfer-encoding: chunked\r\n\r\nzz\r\n",
            b"SSH-2.0-OpenSSH\r\n\r\n",
            b"HTTP/1.1 OK\r\n\r\n",
            b"HTTP/1.1 200 OK\r\ncontent-length: 2",
        ] {
            assert!(
                parse_response(raw).is_err(),
                "{}",
                String::from_utf8_lossy(raw)
            );
        }
    }

    #[test]
    fn a_request_with_a_body_declares_its_length_and_closes() {
        let host = Endpoint::from("127.0.0.1:8080".parse::<SocketAddr>().unwrap());
        let bytes = Request::new("POST", "/v1/runs")
            .header("Idempotency-Key", "k-1")
            .json(b"{}")
            .encode(&host)
            .unwrap();
        let text = String::from_utf8(bytes).unwrap();
        assert!(text.starts_with("POST /v1/runs HTTP/1.1\r\nHost: 127.0.0.1:8080\r\n"));
        assert!(text.contains("Connection: close\r\n"));
        assert!(text.contains("Idempotency-Key: k-1\r\n"));
        assert!(text.ends_with("Content-Length: 2\r\n\r\n{}"));
        let get = Request::new("GET", "/healthz").encode(&host).unwrap();
        assert!(!String::from_utf8(get).unwrap().contains("Content-Length"));
        let injected = Request::new("GET", "/").header("X", "a\r\nEvil: 1");
        assert!(matches!(
            injected.encode(&host),
            Err(HttpError::InvalidRequest(_))
        ));
    }

    #[test]
    fn http_urls_are_parsed_with_host_port_and_target() {
        let u = HttpUrl::parse("http://127.0.0.1:8080").unwrap();
        assert_eq!(
            (u.endpoint().host(), u.endpoint().port(), u.target()),
            ("127.0.0.1", 8080, "/")
        );
        assert_eq!(u.join("/v1/runs"), "/v1/runs");
        let u = HttpUrl::parse("HTTP://Hooks.Example.org/demefix/?a=1").unwrap();
        assert_eq!(u.endpoint().authority(), "hooks.example.org:80");
        assert_eq!(u.target(), "/demefix/?a=1");
        assert_eq!(u.join("/v1/runs/x"), "/demefix/v1/runs/x");
        assert_eq!(u.to_string(), "http://hooks.example.org:80/demefix/?a=1");
        let u = HttpUrl::parse("http://[::1]:9000/done").unwrap();
        assert_eq!(u.endpoint().host(), "::1");
        assert_eq!(u.endpoint().authority(), "[::1]:9000");
        assert_eq!(
            HttpUrl::parse("http://h?x").unwrap().target(),
            "/?x",
            "a query without a path gets the root path"
        );
    }

    #[test]
    fn unusable_urls_say_why() {
        for (text, want) in [
            ("https://hooks.example.org/x", UrlError::Https),
            ("HTTPS://h/", UrlError::Https),
            ("ftp://h/", UrlError::Scheme),
            ("hooks.example.org", UrlError::Scheme),
            ("http://", UrlError::NoHost),
            ("http:///path", UrlError::NoHost),
            ("http://:80/", UrlError::NoHost),
            ("http://user:pw@h/", UrlError::UserInfo),
            ("http://h/#frag", UrlError::Fragment),
            ("http://h /", UrlError::Characters),
            ("http://h/\u{e9}", UrlError::Characters),
            ("http://h:0/", UrlError::Port("0".to_owned())),
            ("http://h:99999/", UrlError::Port("99999".to_owned())),
            ("http://h:+80/", UrlError::Port("+80".to_owned())),
            ("http://bad%host/", UrlError::Host("bad%host".to_owned())),
            ("http://[zz]/", UrlError::Host("[zz]".to_owned())),
        ] {
            assert_eq!(HttpUrl::parse(text), Err(want), "{text}");
        }
        let long = format!("http://h/{}", "a".repeat(MAX_URL_LEN));
        assert_eq!(HttpUrl::parse(&long), Err(UrlError::TooLong));
        assert!(UrlError::Https.to_string().contains("no TLS client"));
    }

    #[tokio::test]
    async fn an_exchange_reads_a_live_answer_without_waiting_for_the_close() {
        let listener = tokio::net::TcpListener::bind("127.0.0.1:0").await.unwrap();
        let addr = listener.local_addr().unwrap();
        let (release, hold) = tokio::sync::oneshot::channel::<()>();
        let server = tokio::spawn(async move {
            let (mut socket, _) = listener.accept().await.unwrap();
            let mut seen = Vec::new();
            let mut buf = [0u8; 1024];
            while find(&seen, b"\r\n\r\n{}").is_none() {
                let n = socket.read(&mut buf).await.unwrap();
                assert!(n > 0, "the request ends early");
                seen.extend_from_slice(&buf[..n]);
            }
            socket
                .write_all(b"HTTP/1.1 201 Created\r\ncontent-length: 2\r\n\r\nok")
                .await
                .unwrap();
            // Keep the connection open until the client has its answer.
            let _ = hold.await;
            seen
        });
        let reply = exchange(addr, "POST", "/x", Some(b"{}")).await.unwrap();
        assert_eq!((reply.status, reply.body.as_slice()), (201, &b"ok"[..]));
        let _ = release.send(());
        let seen = server.await.unwrap();
        assert!(seen.starts_with(b"POST /x HTTP/1.1\r\n"));
    }

    #[tokio::test]
    async fn a_closed_port_is_unreachable() {
        let addr = {
            let l = std::net::TcpListener::bind("127.0.0.1:0").unwrap();
            l.local_addr().unwrap()
        };
        let e = exchange(addr, "GET", "/", None).await.unwrap_err();
        assert!(e.is_unreachable(), "{e:?}");
    }
}
