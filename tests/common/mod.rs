//! Shared helpers for integration tests: a tiny HTTP/1.1 GET client over a
//! real TCP socket on loopback (no HTTP client crate), bounded in time, and
//! [`config`] for configs written with `bandwatch::config::fixture`.

#![allow(dead_code)]

use std::net::SocketAddr;
use std::time::Duration;

use tokio::io::{AsyncReadExt, AsyncWriteExt};
use tokio::net::TcpStream;

/// The config a fixture writes; panics (test failure) with the text if it
/// does not parse.
pub fn config(f: &bandwatch::config::fixture::Fixture) -> bandwatch::config::Config {
    let text = f.toml();
    match bandwatch::config::parse_str(&text) {
        Ok(c) => c,
        Err(e) => panic!("{e:?}\n{text}"),
    }
}

/// Longest a single request may take, connect to last byte.
pub const REQUEST_TIMEOUT: Duration = Duration::from_secs(10);

#[derive(Debug)]
pub struct Response {
    pub status: u16,
    /// Header names lower-cased.
    pub headers: Vec<(String, String)>,
    pub body: Vec<u8>,
}

impl Response {
    pub fn header(&self, name: &str) -> Option<&str> {
        let name = name.to_ascii_lowercase();
        self.headers
            .iter()
            .find(|(k, _)| *k == name)
            .map(|(_, v)| v.as_str())
    }

    pub fn text(&self) -> String {
        String::from_utf8(self.body.clone()).expect("body is UTF-8")
    }

    pub fn json(&self) -> serde_json::Value {
        serde_json::from_slice(&self.body)
            .unwrap_or_else(|e| panic!("body is not JSON ({e}): {}", self.text()))
    }
}

/// `GET path` on `addr` with `Connection: close`; panics (test failure) on
/// a socket error, a malformed reply or after [`REQUEST_TIMEOUT`].
pub async fn get(addr: SocketAddr, path: &str) -> Response {
    match tokio::time::timeout(REQUEST_TIMEOUT, try_get(addr, path)).await {
        Ok(Ok(r)) => r,
        Ok(Err(e)) => panic!("GET {path}: {e}"),
        Err(_) => panic!("GET {path}: no complete reply within {REQUEST_TIMEOUT:?}"),
    }
}

/// As [`get`], but a connection failure is returned, not a panic (for
/// polling a server that may not be up yet).
pub async fn try_get(addr: SocketAddr, path: &str) -> Result<Response, String> {
    try_get_with(addr, path, "").await
}

/// As [`get`], with extra request header lines (each ending `\r\n`).
pub async fn get_with(addr: SocketAddr, path: &str, headers: &str) -> Response {
    match tokio::time::timeout(REQUEST_TIMEOUT, try_get_with(addr, path, headers)).await {
        Ok(Ok(r)) => r,
        Ok(Err(e)) => panic!("GET {path}: {e}"),
        Err(_) => panic!("GET {path}: no complete reply within {REQUEST_TIMEOUT:?}"),
    }
}

async fn try_get_with(addr: SocketAddr, path: &str, headers: &str) -> Result<Response, String> {
    let mut s = TcpStream::connect(addr)
        .await
        .map_err(|e| format!("connect {addr}: {e}"))?;
    let req = format!("GET {path} HTTP/1.1\r\nHost: {addr}\r\nConnection: close\r\n{headers}\r\n");
    s.write_all(req.as_bytes())
        .await
        .map_err(|e| format!("write: {e}"))?;
    let mut raw = Vec::new();
    s.read_to_end(&mut raw)
        .await
        .map_err(|e| format!("read: {e}"))?;
    parse(&raw)
}

/// Parses one HTTP/1.1 response (status line, headers, body by
/// Content-Length, chunked encoding or end of stream).
pub fn parse(raw: &[u8]) -> Result<Response, String> {
    let end = raw
        .windows(4)
        .position(|w| w == b"\r\n\r\n")
        .ok_or("no end of headers")?;
    let head = std::str::from_utf8(&raw[..end]).map_err(|_| "headers are not UTF-8")?;
    let mut lines = head.split("\r\n");
    let status_line = lines.next().ok_or("empty response")?;
    let mut parts = status_line.splitn(3, ' ');
    let version = parts.next().unwrap_or("");
    if !version.starts_with("HTTP/1.") {
        return Err(format!("bad status line {status_line:?}"));
    }
    let status: u16 = parts
        .next()
        .and_then(|s| s.parse().ok())
        .ok_or_else(|| format!("bad status line {status_line:?}"))?;
    let headers: Vec<(String, String)> = lines
        .filter_map(|l| l.split_once(':'))
        .map(|(k, v)| (k.trim().to_ascii_lowercase(), v.trim().to_string()))
        .collect();
    let rest = &raw[end + 4..];
    let find = |n: &str| {
        headers
            .iter()
            .find(|(k, _)| k == n)
            .map(|(_, v)| v.as_str())
    };
    let body = if find("transfer-encoding").is_some_and(|v| v.eq_ignore_ascii_case("chunked")) {
        dechunk(rest)?
    } else if let Some(len) = find("content-length") {
        let len: usize = len.parse().map_err(|_| "bad content-length")?;
        rest.get(..len)
            .ok_or("body shorter than content-length")?
            .to_vec()
    } else {
        rest.to_vec()
    };
    Ok(Response {
        status,
        headers,
        body,
    })
}

fn dechunk(mut b: &[u8]) -> Result<Vec<u8>, String> {
    let mut out = Vec::new();
    loop {
        let eol = b
            .windows(2)
            .position(|w| w == b"\r\n")
            .ok_or("chunk size line not terminated")?;
        let size_str = std::str::from_utf8(&b[..eol]).map_err(|_| "bad chunk size")?;
        let size_str = size_str.split(';').next().unwrap_or("").trim();
        let size = usize::from_str_radix(size_str, 16).map_err(|_| "bad chunk size")?;
        b = &b[eol + 2..];
        if size == 0 {
            return Ok(out);
        }
        let chunk = b.get(..size).ok_or("chunk shorter than its size")?;
        out.extend_from_slice(chunk);
        b = b.get(size + 2..).ok_or("chunk not terminated")?;
    }
}

#[test]
fn parses_length_and_chunked_replies() {
    // Framing examples after RFC 9112 (sections 6.3 and 7.1).
    let r = parse(b"HTTP/1.1 200 OK\r\nContent-Length: 5\r\nContent-Type: text/plain\r\n\r\nhello")
        .unwrap();
    assert_eq!(r.status, 200);
    assert_eq!(r.header("content-type"), Some("text/plain"));
    assert_eq!(r.body, b"hello");
    let r = parse(b"HTTP/1.1 404 Not Found\r\nTransfer-Encoding: chunked\r\n\r\n4\r\nWiki\r\n6\r\npedia \r\n0\r\n\r\n").unwrap();
    assert_eq!(r.status, 404);
    assert_eq!(r.body, b"Wikipedia ");
    assert!(parse(b"garbage").is_err());
}

/// A port on 127.0.0.1 free for UDP a moment ago (bound, then released).
pub fn free_udp_port() -> u16 {
    let s = std::net::UdpSocket::bind("127.0.0.1:0").expect("bind");
    s.local_addr().expect("addr").port()
}

/// A port on 127.0.0.1 free for TCP a moment ago (bound, then released).
pub fn free_tcp_port() -> u16 {
    let s = std::net::TcpListener::bind("127.0.0.1:0").expect("bind");
    s.local_addr().expect("addr").port()
}

/// Waits until `ok()` holds, polling every 20 ms; fails the test after
/// `secs` seconds.
pub async fn wait_for(what: &str, secs: u64, mut ok: impl FnMut() -> bool) {
    let deadline = std::time::Instant::now() + Duration::from_secs(secs);
    while !ok() {
        assert!(
            std::time::Instant::now() < deadline,
            "timed out waiting for {what}"
        );
        tokio::time::sleep(Duration::from_millis(20)).await;
    }
}

/// Spawns `cmd` (a real bandwatch process) with its stderr piped, and a
/// thread that forwards each stderr line to the returned receiver (the
/// channel closes when the process closes stderr).
pub fn spawn_with_stderr_lines(
    cmd: &mut std::process::Command,
) -> (std::process::Child, std::sync::mpsc::Receiver<String>) {
    use std::io::BufRead as _;
    let mut child = cmd
        .stderr(std::process::Stdio::piped())
        .spawn()
        .expect("spawn the daemon");
    let err = child.stderr.take().expect("stderr");
    let (tx, rx) = std::sync::mpsc::channel();
    std::thread::spawn(move || {
        for line in std::io::BufReader::new(err).lines().map_while(Result::ok) {
            let _ = tx.send(line);
        }
    });
    (child, rx)
}
