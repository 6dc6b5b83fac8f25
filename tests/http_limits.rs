//! The HTTP server's limits against hostile and broken clients, over real
//! sockets on 127.0.0.1 with the real daemon (`bandwatch::serve`): a
//! slowloris request line, an idle keep-alive connection, a silent
//! connection, and more connections than `server.max_connections`. Each
//! closing is counted by reason in /metrics; /healthz keeps answering.
//! Every wait is bounded; the daemon is shut down at the end.

mod common;

use std::net::SocketAddr;
use std::time::{Duration, Instant};

use bandwatch::config::fixture::{quoted, Channel, Fixture, Source};
use tokio::io::{AsyncReadExt, AsyncWriteExt};
use tokio::net::TcpStream;
use tokio::sync::oneshot;

use common::get;

/// Starts the daemon with `[server]` extras; returns its address and the
/// handle that stops it.
async fn daemon(server: &str) -> (SocketAddr, oneshot::Sender<()>, tokio::task::JoinHandle<()>) {
    let config = common::config(
        &Fixture::new()
            .raw(server)
            .source(
                Source::new("daq", "tcp-listen")
                    .set("listen", quoted("127.0.0.1:0"))
                    .stream(1, 25_600),
            )
            .channel(Channel::new("c", "daq", 0).block(1024)),
    );
    let listener = tokio::net::TcpListener::bind("127.0.0.1:0")
        .await
        .expect("bind");
    let addr = listener.local_addr().expect("addr");
    let (stop_tx, stop_rx) = oneshot::channel::<()>();
    let task = tokio::spawn(async move {
        let r = bandwatch::serve(config, listener, async move {
            let _ = stop_rx.await;
        })
        .await;
        assert!(r.is_ok(), "daemon: {r:?}");
    });
    (addr, stop_tx, task)
}

/// Waits until the server closes `s` (EOF or reset); returns how long it
/// took, or None if it stayed open for `within`.
async fn closed_within(s: &mut TcpStream, within: Duration) -> Option<Duration> {
    let start = Instant::now();
    let mut buf = [0u8; 4096];
    loop {
        match tokio::time::timeout_at((start + within).into(), s.read(&mut buf)).await {
            Err(_) => return None,
            Ok(Ok(0)) | Ok(Err(_)) => return Some(start.elapsed()),
            Ok(Ok(_)) => {} // a response (e.g. 408): keep reading to the close
        }
    }
}

/// The value of one series in a /metrics body (0 if absent).
fn series(body: &str, name_and_labels: &str) -> f64 {
    body.lines()
        .find_map(|l| l.strip_prefix(name_and_labels)?.trim().parse().ok())
        .unwrap_or(0.0)
}

async fn stop(tx: oneshot::Sender<()>, task: tokio::task::JoinHandle<()>) {
    let _ = tx.send(());
    tokio::time::timeout(Duration::from_secs(10), task)
        .await
        .expect("daemon stops within 10 s")
        .expect("daemon task");
}

#[tokio::test]
async fn a_trickled_request_line_is_cut_at_the_header_timeout() {
    let (addr, tx, task) = daemon("header_timeout_s = 0.5").await;
    let mut s = TcpStream::connect(addr).await.expect("connect");
    // One byte every 100 ms: the request line never completes in 0.5 s.
    let start = Instant::now();
    let mut cut = false;
    for b in b"GET /healthz HTTP/1.1\r\nHost: x\r\n" {
        if s.write_all(&[*b]).await.is_err() {
            cut = true;
            break;
        }
        tokio::time::sleep(Duration::from_millis(100)).await;
        if start.elapsed() > Duration::from_secs(3) {
            break;
        }
    }
    if !cut {
        let t = closed_within(&mut s, Duration::from_secs(3)).await;
        assert!(t.is_some(), "slow request line still open after 3 s");
    }
    assert!(
        start.elapsed() < Duration::from_secs(3),
        "cut after {:?}, want about 0.5 s",
        start.elapsed()
    );
    let m = get(addr, "/metrics").await.text();
    assert!(
        series(
            &m,
            "bandwatch_http_connections_closed_total{reason=\"header_timeout\"}"
        ) >= 1.0,
        "{m}"
    );
    stop(tx, task).await;
}

#[tokio::test]
async fn an_idle_keep_alive_connection_is_closed() {
    let (addr, tx, task) = daemon("header_timeout_s = 0.5").await;
    let mut s = TcpStream::connect(addr).await.expect("connect");
    s.write_all(b"GET /healthz HTTP/1.1\r\nHost: x\r\n\r\n")
        .await
        .expect("request");
    // The response arrives, then nothing more is asked: closed by the
    // header timeout, which also runs between keep-alive requests.
    let t = closed_within(&mut s, Duration::from_secs(5)).await;
    let t = t.expect("idle keep-alive connection still open after 5 s");
    assert!(t >= Duration::from_millis(400), "closed too early: {t:?}");
    stop(tx, task).await;
}

#[tokio::test]
async fn a_silent_connection_is_dropped_at_the_idle_timeout() {
    // The header timeout is long; the idle watchdog cuts first.
    let (addr, tx, task) = daemon("header_timeout_s = 30\nidle_timeout_s = 0.5").await;
    let mut s = TcpStream::connect(addr).await.expect("connect");
    let t = closed_within(&mut s, Duration::from_secs(5)).await;
    let t = t.expect("silent connection still open after 5 s");
    assert!(t >= Duration::from_millis(400), "closed too early: {t:?}");
    let m = get(addr, "/metrics").await.text();
    assert!(
        series(
            &m,
            "bandwatch_http_connections_closed_total{reason=\"idle_timeout\"}"
        ) >= 1.0,
        "{m}"
    );
    stop(tx, task).await;
}

#[tokio::test]
async fn connections_over_the_cap_are_closed_at_once_and_counted() {
    let (addr, tx, task) = daemon("max_connections = 4\nheader_timeout_s = 30").await;
    // Four silent connections take every slot.
    let mut held = Vec::new();
    for _ in 0..4 {
        held.push(TcpStream::connect(addr).await.expect("connect"));
    }
    // Let the server accept them all.
    tokio::time::sleep(Duration::from_millis(200)).await;
    let mut extra = TcpStream::connect(addr).await.expect("connect");
    let t = closed_within(&mut extra, Duration::from_secs(2)).await;
    assert!(t.is_some(), "a fifth connection was kept open");
    // Freeing the slots lets a client in again.
    drop(held);
    let start = Instant::now();
    let body = loop {
        if let Ok(r) = common::try_get(addr, "/metrics").await {
            if r.status == 200 {
                break r.text();
            }
        }
        assert!(start.elapsed() < Duration::from_secs(5), "no slot freed");
        tokio::time::sleep(Duration::from_millis(50)).await;
    };
    assert!(
        series(&body, "bandwatch_http_connections_refused_total") >= 1.0,
        "{body}"
    );
    stop(tx, task).await;
}

#[test]
fn limits_out_of_range_are_refused_by_check() {
    for (extra, path) in [
        ("max_connections = 0", "server.max_connections"),
        ("header_timeout_s = 0", "server.header_timeout_s"),
        ("idle_timeout_s = -1", "server.idle_timeout_s"),
        ("request_timeout_s = 1e9", "server.request_timeout_s"),
    ] {
        let text = Fixture::new()
            .raw(extra)
            .source(Source::new("s", "sim"))
            .channel(Channel::new("c", "s", 0))
            .toml();
        let issues = match bandwatch::config::parse_str(&text) {
            Err(bandwatch::config::ParseError::Invalid(v)) => v,
            other => panic!("{extra}: {other:?}"),
        };
        assert!(issues.iter().any(|i| i.path == path), "{extra}: {issues:?}");
    }
}
