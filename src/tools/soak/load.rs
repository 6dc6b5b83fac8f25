//! HTTP against the daemon: a blocking GET, the `/healthz` prober, the
//! crowd of concurrent clients and the slowloris connections.
//!
//! The GET is written here on `std::net` (about forty lines): the crate has
//! no HTTP client dependency, and the soak needs one request per fresh
//! connection with its latency measured from connect to last byte, which a
//! client library's pooling would hide.

use std::io::{Read, Write};
use std::net::{SocketAddr, TcpStream};
use std::sync::atomic::{AtomicBool, AtomicU64, Ordering};
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

/// A reply: status and body.
#[derive(Debug)]
pub struct Reply {
    pub status: u16,
    pub body: Vec<u8>,
}

/// `GET path` with `Connection: close` on a new connection, bounded by
/// `timeout` per socket operation.
///
/// # Errors
/// A socket error or a reply that is not HTTP/1.x, as text.
pub fn get(addr: SocketAddr, path: &str, timeout: Duration) -> Result<Reply, String> {
    let mut s = TcpStream::connect_timeout(&addr, timeout).map_err(|e| format!("connect: {e}"))?;
    s.set_read_timeout(Some(timeout))
        .and_then(|()| s.set_write_timeout(Some(timeout)))
        .map_err(|e| format!("timeouts: {e}"))?;
    let req = format!("GET {path} HTTP/1.1\r\nHost: {addr}\r\nConnection: close\r\n\r\n");
    s.write_all(req.as_bytes())
        .map_err(|e| format!("write: {e}"))?;
    let mut raw = Vec::new();
    s.read_to_end(&mut raw).map_err(|e| format!("read: {e}"))?;
    parse_reply(&raw)
}

fn parse_reply(raw: &[u8]) -> Result<Reply, String> {
    let end = raw
        .windows(4)
        .position(|w| w == b"\r\n\r\n")
        .ok_or("no end of headers")?;
    let head = String::from_utf8_lossy(&raw[..end]);
    let mut lines = head.split("\r\n");
    let status_line = lines.next().unwrap_or_default();
    let status = status_line
        .split_whitespace()
        .nth(1)
        .and_then(|s| s.parse().ok())
        .filter(|_| status_line.starts_with("HTTP/1."))
        .ok_or_else(|| format!("bad status line {status_line:?}"))?;
    let chunked = lines.any(|l| {
        let l = l.to_ascii_lowercase();
        l.starts_with("transfer-encoding:") && l.contains("chunked")
    });
    let body = &raw[end + 4..];
    let body = if chunked {
        dechunk(body)?
    } else {
        body.to_vec()
    };
    Ok(Reply { status, body })
}

/// Decodes a chunked body (RFC 9112, section 7.1).
fn dechunk(mut b: &[u8]) -> Result<Vec<u8>, String> {
    let mut out = Vec::new();
    loop {
        let eol = b
            .windows(2)
            .position(|w| w == b"\r\n")
            .ok_or("chunk size line not ended")?;
        let size_text = String::from_utf8_lossy(&b[..eol]);
        let size_text = size_text.split(';').next().unwrap_or_default().trim();
        let size = usize::from_str_radix(size_text, 16)
            .map_err(|_| format!("bad chunk size {size_text:?}"))?;
        b = &b[eol + 2..];
        if size == 0 {
            return Ok(out);
        }
        let chunk = b.get(..size).ok_or("chunk shorter than its size")?;
        out.extend_from_slice(chunk);
        b = b.get(size + 2..).ok_or("chunk not ended")?;
    }
}

/// `/healthz` latencies, ms, with when each was taken (s since start).
#[derive(Debug, Default)]
pub struct Probe {
    pub samples: Vec<(f64, f64)>,
    pub failures: Vec<String>,
}

/// Asks `/healthz` every 100 ms on a fresh connection until `stop`.
pub fn probe_healthz(addr: SocketAddr, stop: Arc<AtomicBool>, out: Arc<Mutex<Probe>>) {
    let t0 = Instant::now();
    while !stop.load(Ordering::Relaxed) {
        let start = Instant::now();
        let r = get(addr, "/healthz", Duration::from_secs(5));
        let ms = start.elapsed().as_secs_f64() * 1e3;
        if let Ok(mut p) = out.lock() {
            match r {
                Ok(r) if r.status == 200 => p.samples.push((t0.elapsed().as_secs_f64(), ms)),
                Ok(r) => p.failures.push(format!("status {}", r.status)),
                Err(e) => p.failures.push(e),
            }
        }
        std::thread::sleep(Duration::from_millis(100));
    }
}

/// What the concurrent clients saw.
#[derive(Debug, Default, serde::Serialize)]
pub struct Crowd {
    pub requests: AtomicU64,
    pub ok: AtomicU64,
    /// Answered, not 2xx (e.g. `/readyz` 503 while a channel is stale).
    pub not_ok: AtomicU64,
    /// No answer (connect, read or write failed or timed out).
    pub errors: AtomicU64,
    pub first_error: Mutex<Option<String>>,
}

/// What the clients ask for, in turn.
const PATHS: &[&str] = &[
    "/api/v1/channels",
    "/metrics",
    "/api/v1/channels/udp-0/spectrum",
    "/api/v1/alarms",
    "/api/v1/events",
    "/readyz",
    "/api/v1/channels/tcp-1",
    "/api/v1/channels/tcp-3/waveform",
];

/// One client: a request every `think` (jittered) until `stop`.
pub fn client(addr: SocketAddr, id: usize, think: Duration, stop: Arc<AtomicBool>, c: Arc<Crowd>) {
    let mut k = id;
    // Spread the clients' first requests over one think time.
    std::thread::sleep(think.mul_f64((id % 100) as f64 / 100.0));
    while !stop.load(Ordering::Relaxed) {
        let path = PATHS[k % PATHS.len()];
        k += 1;
        c.requests.fetch_add(1, Ordering::Relaxed);
        match get(addr, path, Duration::from_secs(15)) {
            Ok(r) if (200..300).contains(&r.status) => {
                c.ok.fetch_add(1, Ordering::Relaxed);
            }
            Ok(_) => {
                c.not_ok.fetch_add(1, Ordering::Relaxed);
            }
            Err(e) => {
                c.errors.fetch_add(1, Ordering::Relaxed);
                if let Ok(mut f) = c.first_error.lock() {
                    f.get_or_insert(format!("{path}: {e}"));
                }
            }
        }
        std::thread::sleep(think);
    }
}

/// What the slowloris connections saw.
#[derive(Debug, Default, serde::Serialize)]
pub struct Slowloris {
    pub opened: u64,
    /// Closed by the server.
    pub closed_by_server: u64,
    /// Longest a connection was held open, s (until the server closed it).
    pub held_max_s: f64,
    pub errors: u64,
}

/// Keeps `n` connections trickling a request line, one byte a second,
/// reopening each the server closes, until `stop`.
pub fn slowloris(addr: SocketAddr, n: usize, stop: Arc<AtomicBool>) -> Slowloris {
    const LINE: &[u8] = b"GET /healthz HTTP/1.1\r\nHost: soak\r\nX-Slow: ";
    let mut out = Slowloris::default();
    let mut conns: Vec<Option<(TcpStream, Instant, usize)>> = (0..n).map(|_| None).collect();
    while !stop.load(Ordering::Relaxed) {
        for slot in &mut conns {
            if slot.is_none() {
                match TcpStream::connect_timeout(&addr, Duration::from_secs(5)) {
                    Ok(s) if s.set_nonblocking(true).is_ok() => {
                        out.opened += 1;
                        *slot = Some((s, Instant::now(), 0));
                    }
                    _ => out.errors += 1,
                }
                continue;
            }
            let Some((s, since, sent)) = slot.as_mut() else {
                continue;
            };
            let mut buf = [0u8; 512];
            let closed = match s.read(&mut buf) {
                // A 408 reply or a plain close: the server gave up on it.
                Ok(_) => true,
                Err(e) if e.kind() == std::io::ErrorKind::WouldBlock => {
                    let b = LINE.get(*sent).copied().unwrap_or(b'x');
                    match s.write(&[b]) {
                        Ok(0) => true,
                        Ok(_) => {
                            *sent += 1;
                            false
                        }
                        Err(e) => e.kind() != std::io::ErrorKind::WouldBlock,
                    }
                }
                Err(_) => true,
            };
            if closed {
                out.closed_by_server += 1;
                out.held_max_s = out.held_max_s.max(since.elapsed().as_secs_f64());
                *slot = None;
            }
        }
        std::thread::sleep(Duration::from_secs(1));
    }
    out
}

#[cfg(test)]
#[allow(clippy::unwrap_used)] // tests may unwrap: a panic is a failed test
mod tests {
    use super::*;

    /// Chunked coding as RFC 9112 section 7.1 describes it (from memory).
    #[test]
    fn replies_plain_and_chunked() {
        let r = parse_reply(b"HTTP/1.1 200 OK\r\ncontent-length: 2\r\n\r\nok").unwrap();
        assert_eq!((r.status, r.body.as_slice()), (200, b"ok".as_slice()));
        let r = parse_reply(
            b"HTTP/1.1 503 Service Unavailable\r\nTransfer-Encoding: chunked\r\n\r\n3\r\nabc\r\n2;x=1\r\nde\r\n0\r\n\r\n",
        )
        .unwrap();
        assert_eq!((r.status, r.body.as_slice()), (503, b"abcde".as_slice()));
        assert!(parse_reply(b"SSH-2.0\r\n\r\n").is_err());
        assert!(
            parse_reply(b"HTTP/1.1 200 OK\r\nTransfer-Encoding: chunked\r\n\r\nzz\r\n").is_err()
        );
    }
}
