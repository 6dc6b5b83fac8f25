//! The HTTP server's accept loop, with limits a plant network needs: a
//! client can hold neither a connection slot nor a file descriptor for
//! long without sending or reading anything.
//!
//! - **Connection cap** (`server.max_connections`): a connection accepted
//!   while the cap is reached is closed at once and counted
//!   (`bandwatch_http_connections_refused_total`); the ones being served
//!   are not disturbed.
//! - **Header timeout** (`server.header_timeout_s`): hyper's header read
//!   timeout, which runs whenever the server waits for a request's head —
//!   for a new connection's first request and between keep-alive requests —
//!   so a client that trickles a request line (slowloris) or holds an idle
//!   keep-alive connection is closed after it.
//! - **Idle timeout** (`server.idle_timeout_s`): a connection on which no
//!   byte moves either way for this long is dropped (a client that stopped
//!   reading a response, a half-open socket).
//! - **Request timeout** (`server.request_timeout_s`): a request not
//!   answered in time gets 503.
//!
//! - **TLS** (`server.web_config` with `tls_server_config`): the handshake
//!   runs in the connection's slot and must finish within the header
//!   timeout (a stalled one is closed as `header_timeout`); a failed one
//!   (plain HTTP to the TLS port, a refused client certificate) is counted
//!   in `bandwatch_http_tls_handshake_errors_total` and the connection
//!   closed. The idle timeout counts bytes on the socket, so it holds for
//!   TLS connections as for plain ones.
//!
//! Each closing for a limit is counted by reason in
//! `bandwatch_http_connections_closed_total`.

use std::future::Future;
use std::io;
use std::pin::Pin;
use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::Arc;
use std::task::{Context, Poll};
use std::time::{Duration, Instant};

use axum::extract::Request;
use axum::middleware::{self, Next};
use axum::response::{IntoResponse, Response};
use axum::Router;
use hyper::body::Incoming;
use hyper_util::rt::{TokioIo, TokioTimer};
use hyper_util::service::TowerToHyperService;
use tokio::io::{AsyncRead, AsyncWrite, ReadBuf};
use tokio::net::{TcpListener, TcpStream};
use tokio::sync::{watch, Semaphore};
use tokio_rustls::TlsAcceptor;
use tower::ServiceExt as _;

use crate::config::HttpLimits;
use crate::http::error::ApiError;
use crate::http::metrics::ConnectionMetrics;

/// Why the server closed a connection itself.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum CloseReason {
    /// The request head did not arrive within the header timeout.
    HeaderTimeout,
    /// Nothing moved on the connection for the idle timeout.
    IdleTimeout,
}

impl CloseReason {
    pub const ALL: [CloseReason; 2] = [CloseReason::HeaderTimeout, CloseReason::IdleTimeout];

    pub fn as_str(self) -> &'static str {
        match self {
            CloseReason::HeaderTimeout => "header_timeout",
            CloseReason::IdleTimeout => "idle_timeout",
        }
    }
}

/// Serves `app` on `listener` with `limits` until `shutdown` resolves;
/// then stops accepting, lets the requests in flight finish (each bounded
/// by the request timeout) and returns. With `tls`, every connection
/// starts with a TLS handshake (see the module docs).
///
/// # Errors
/// None today: accept errors (e.g. out of file descriptors) are logged and
/// retried after a pause, never fatal.
pub async fn serve<F>(
    listener: TcpListener,
    app: Router,
    limits: HttpLimits,
    stats: ConnectionMetrics,
    tls: Option<Arc<rustls::ServerConfig>>,
    shutdown: F,
) -> io::Result<()>
where
    F: Future<Output = ()> + Send + 'static,
{
    let request_timeout = limits.request_timeout;
    let app = app.layer(middleware::from_fn(move |req: Request, next: Next| {
        answer_within(request_timeout, req, next)
    }));
    let tls = tls.map(TlsAcceptor::from);
    let slots = Arc::new(Semaphore::new(limits.max_connections.max(1)));
    // Connection tasks hold a receiver; shutdown waits until all are gone.
    let (stop_tx, stop_rx) = watch::channel(false);
    let mut shutdown = std::pin::pin!(shutdown);
    loop {
        let (stream, peer) = tokio::select! {
            () = &mut shutdown => break,
            r = listener.accept() => match r {
                Ok(x) => x,
                Err(e) => {
                    // EMFILE and friends: pause instead of spinning; the
                    // fd reserve (README) keeps storage writable meanwhile.
                    tracing::warn!(error = %e, "HTTP accept failed; retrying in 100 ms");
                    stats.accept_errors.inc();
                    tokio::time::sleep(Duration::from_millis(100)).await;
                    continue;
                }
            },
        };
        let Ok(permit) = slots.clone().try_acquire_owned() else {
            stats.refused.inc();
            tracing::debug!(%peer, "HTTP connection refused: max_connections reached");
            drop(stream);
            continue;
        };
        let _ = stream.set_nodelay(true);
        let app = app.clone();
        let stats = stats.clone();
        let mut stop = stop_rx.clone();
        let tls = tls.clone();
        tokio::spawn(async move {
            stats.open.inc();
            let reason = serve_stream(stream, tls, app, limits, &stats, &mut stop).await;
            if let Some(r) = reason {
                stats.closed(r);
            }
            stats.open.dec();
            drop(permit);
        });
    }
    drop(listener);
    drop(stop_rx);
    let _ = stop_tx.send(true);
    stop_tx.closed().await;
    Ok(())
}

/// Serves one accepted connection, after its TLS handshake if `tls`;
/// returns why the server closed it, if it did so for a limit.
async fn serve_stream(
    stream: TcpStream,
    tls: Option<TlsAcceptor>,
    app: Router,
    limits: HttpLimits,
    stats: &ConnectionMetrics,
    stop: &mut watch::Receiver<bool>,
) -> Option<CloseReason> {
    let started = Instant::now();
    let activity = Arc::new(AtomicU64::new(0));
    let watched = Watched {
        inner: stream,
        started,
        last: activity.clone(),
    };
    let Some(acceptor) = tls else {
        return serve_connection(watched, started, activity, app, limits, stop).await;
    };
    let handshake = tokio::time::timeout(limits.header_timeout, acceptor.accept(watched));
    tokio::select! {
        r = handshake => match r {
            Err(_) => Some(CloseReason::HeaderTimeout),
            Ok(Err(e)) => {
                stats.tls_handshake_errors.inc();
                tracing::debug!(error = %e, "TLS handshake failed");
                None
            }
            Ok(Ok(s)) => serve_connection(s, started, activity, app, limits, stop).await,
        },
        // Shutdown: a connection still in its handshake has no request
        // in flight; close it.
        _ = stop.changed() => None,
    }
}

/// Serves HTTP/1.1 on `io` (plain or TLS); `activity` is updated by the
/// socket under it (ms since `started`). Returns why the server closed the
/// connection, if it did so for a limit.
async fn serve_connection<I>(
    io: I,
    started: Instant,
    activity: Arc<AtomicU64>,
    app: Router,
    limits: HttpLimits,
    stop: &mut watch::Receiver<bool>,
) -> Option<CloseReason>
where
    I: AsyncRead + AsyncWrite + Unpin + Send + 'static,
{
    let io = TokioIo::new(io);
    let service = TowerToHyperService::new(
        app.map_request(|req: Request<Incoming>| req.map(axum::body::Body::new)),
    );
    let mut builder = hyper::server::conn::http1::Builder::new();
    builder
        .timer(TokioTimer::new())
        .header_read_timeout(limits.header_timeout)
        .keep_alive(true);
    let conn = builder.serve_connection(io, service);
    let mut conn = std::pin::pin!(conn);
    let idle = limits.idle_timeout;
    let mut draining = false;
    loop {
        let since = Duration::from_millis(activity.load(Ordering::Relaxed));
        let deadline = started + since + idle;
        tokio::select! {
            r = conn.as_mut() => {
                return match r {
                    Err(e) if e.is_timeout() => Some(CloseReason::HeaderTimeout),
                    _ => None,
                };
            }
            () = tokio::time::sleep_until(deadline.into()) => {
                let since = Duration::from_millis(activity.load(Ordering::Relaxed));
                if started.elapsed() >= since + idle {
                    return Some(CloseReason::IdleTimeout);
                }
            }
            r = stop.changed(), if !draining => {
                // Shutdown (or the server gone): finish the request in
                // flight, then close.
                let _ = r;
                draining = true;
                conn.as_mut().graceful_shutdown();
            }
        }
    }
}

/// Answers 503 if the handler takes longer than `limit`.
async fn answer_within(limit: Duration, req: Request, next: Next) -> Response {
    match tokio::time::timeout(limit, next.run(req)).await {
        Ok(r) => r,
        Err(_) => ApiError::Timeout(limit.as_secs_f64()).into_response(),
    }
}

/// A TCP stream that records when bytes last moved (ms since `started`).
struct Watched {
    inner: TcpStream,
    started: Instant,
    last: Arc<AtomicU64>,
}

impl Watched {
    fn touch(&self) {
        let ms = self.started.elapsed().as_millis() as u64;
        self.last.store(ms, Ordering::Relaxed);
    }
}

impl AsyncRead for Watched {
    fn poll_read(
        mut self: Pin<&mut Self>,
        cx: &mut Context<'_>,
        buf: &mut ReadBuf<'_>,
    ) -> Poll<io::Result<()>> {
        let before = buf.filled().len();
        let r = Pin::new(&mut self.inner).poll_read(cx, buf);
        if matches!(r, Poll::Ready(Ok(()))) && buf.filled().len() > before {
            self.touch();
        }
        r
    }
}

impl AsyncWrite for Watched {
    fn poll_write(
        mut self: Pin<&mut Self>,
        cx: &mut Context<'_>,
        buf: &[u8],
    ) -> Poll<io::Result<usize>> {
        let r = Pin::new(&mut self.inner).poll_write(cx, buf);
        if matches!(r, Poll::Ready(Ok(n)) if n > 0) {
            self.touch();
        }
        r
    }

    fn poll_write_vectored(
        mut self: Pin<&mut Self>,
        cx: &mut Context<'_>,
        bufs: &[io::IoSlice<'_>],
    ) -> Poll<io::Result<usize>> {
        let r = Pin::new(&mut self.inner).poll_write_vectored(cx, bufs);
        if matches!(r, Poll::Ready(Ok(n)) if n > 0) {
            self.touch();
        }
        r
    }

    fn is_write_vectored(&self) -> bool {
        self.inner.is_write_vectored()
    }

    fn poll_flush(mut self: Pin<&mut Self>, cx: &mut Context<'_>) -> Poll<io::Result<()>> {
        Pin::new(&mut self.inner).poll_flush(cx)
    }

    fn poll_shutdown(mut self: Pin<&mut Self>, cx: &mut Context<'_>) -> Poll<io::Result<()>> {
        Pin::new(&mut self.inner).poll_shutdown(cx)
    }
}
