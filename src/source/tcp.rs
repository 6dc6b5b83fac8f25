//! The TCP sources: `tcp-connect` (dial the DAQ, reconnect with backoff)
//! and `tcp-listen` (accept the DAQ's connection, one at a time, the second
//! one refused or replacing the first as configured). Each is one tokio
//! task that owns its [`FrameSink`]; it logs every change of link state
//! once, and counts what it rejects.
//!
//! A connection that delivers no byte for the source's `idle_timeout_s` is
//! closed and counted (`rejected{reason="idle_timeout"}`): a DAQ box streams
//! continuously, so silence means a dead or half-open peer, and with
//! `tcp-listen` the slot is free again for the box's next connection. TCP
//! keepalive probes (after 5 s idle, every 2 s, 3 tries) detect a vanished
//! peer at the socket level as well.

use std::net::SocketAddr;
use std::sync::atomic::Ordering;
use std::time::{Duration, Instant};

use tokio::io::{AsyncRead, AsyncReadExt};
use tokio::net::{TcpListener, TcpStream};
use tokio::time::sleep;

use crate::clock::unix_now_ns;
use crate::config::{Backoff, SecondConnection, SourceKind, StreamSpec};
use crate::shutdown::Shutdown;
use crate::source::framed::{FrameSink, StreamFraming};
use crate::source::SourceContext;

const READ_BUF: usize = 64 * 1024;

/// Exponential backoff with jitter: each wait is drawn in [d/2, d] where d
/// doubles from `min_ms` up to `max_ms`.
pub struct Retry {
    cfg: Backoff,
    current_ms: u64,
    rng: u64,
}

impl Retry {
    pub fn new(cfg: Backoff) -> Retry {
        Retry {
            cfg,
            current_ms: cfg.min_ms,
            rng: unix_now_ns() | 1,
        }
    }
    pub fn reset(&mut self) {
        self.current_ms = self.cfg.min_ms;
    }
    pub fn next_delay(&mut self) -> Duration {
        // xorshift64
        self.rng ^= self.rng << 13;
        self.rng ^= self.rng >> 7;
        self.rng ^= self.rng << 17;
        let d = self.current_ms;
        let jitter = self.rng % (d / 2 + 1);
        self.current_ms = (self.current_ms.saturating_mul(2)).min(self.cfg.max_ms);
        Duration::from_millis(d - jitter)
    }
}

/// Why a read loop ended.
enum Ended {
    Shutdown,
    Closed,
    Error(std::io::Error),
    /// No byte for the idle timeout.
    Idle,
}

/// Keepalive probes on a DAQ connection, so that a peer that vanished
/// without a FIN (power loss, cable pulled) is found by the kernel too.
fn keepalive(s: &TcpStream) {
    let ka = socket2::TcpKeepalive::new()
        .with_time(Duration::from_secs(5))
        .with_interval(Duration::from_secs(2));
    #[cfg(any(target_os = "linux", target_os = "macos", target_os = "freebsd"))]
    let ka = ka.with_retries(3);
    if let Err(e) = socket2::SockRef::from(s).set_tcp_keepalive(&ka) {
        tracing::debug!(error = %e, "cannot set TCP keepalive");
    }
}

/// Reads `io` into the framing until EOF, error, `idle` without a byte,
/// or shutdown.
async fn read_stream<R: AsyncRead + Unpin>(
    io: &mut R,
    framing: &mut StreamFraming,
    sink: &mut FrameSink,
    buf: &mut [u8],
    shutdown: &mut Shutdown,
    idle: Duration,
) -> Ended {
    loop {
        let n = tokio::select! {
            r = io.read(buf) => r,
            _ = shutdown.recv() => return Ended::Shutdown,
            _ = sleep(idle) => return Ended::Idle,
        };
        match n {
            Ok(0) => return Ended::Closed,
            Ok(n) => {
                sink.state.bytes.fetch_add(n as u64, Ordering::Relaxed);
                framing.feed(&buf[..n], sink);
                sink.out.wake();
            }
            Err(e) => return Ended::Error(e),
        }
    }
}

/// Runs a `tcp-connect` source until shutdown.
pub async fn run_connect(ctx: SourceContext) {
    let SourceContext {
        spec,
        outputs,
        counters,
        shutdown,
    } = ctx;
    let SourceKind::TcpConnect {
        address,
        stream,
        backoff,
        idle_timeout,
    } = spec.kind
    else {
        tracing::error!(source = %spec.name, kind = spec.kind.as_str(), "not a tcp-connect source");
        return;
    };
    let sink = FrameSink::new(outputs, counters, spec.sample_rate_hz).with_sequence(&spec.sequence);
    connect(&address, &stream, backoff, idle_timeout, sink, shutdown).await;
}

async fn connect(
    address: &str,
    stream: &StreamSpec,
    backoff: Backoff,
    idle: Duration,
    mut sink: FrameSink,
    mut shutdown: Shutdown,
) {
    let mut framing = match StreamFraming::new(stream, sink.out.width()) {
        Ok(f) => f,
        Err(e) => {
            tracing::error!(source = %sink.state.name, error = %e, "cannot set up the decoder");
            return;
        }
    };
    let mut retry = Retry::new(backoff);
    let mut buf = vec![0u8; READ_BUF];
    let mut failing = false;
    loop {
        let attempt = tokio::select! {
            r = TcpStream::connect(address) => r,
            _ = shutdown.recv() => return,
        };
        match attempt {
            Ok(mut s) => {
                let _ = s.set_nodelay(true);
                keepalive(&s);
                let peer = s
                    .peer_addr()
                    .map_or_else(|_| address.to_string(), |a| a.to_string());
                tracing::info!(source = %sink.state.name, %peer, "connected");
                failing = false;
                retry.reset();
                sink.state.connections.fetch_add(1, Ordering::Relaxed);
                sink.restart();
                sink.set_connected(true);
                let ended = read_stream(
                    &mut s,
                    &mut framing,
                    &mut sink,
                    &mut buf,
                    &mut shutdown,
                    idle,
                )
                .await;
                sink.set_connected(false);
                framing.reset(&mut sink);
                sink.out
                    .mark_discontinuity(crate::counters::GapReason::Restart);
                match ended {
                    Ended::Shutdown => return,
                    Ended::Closed => {
                        tracing::warn!(source = %sink.state.name, %peer, "connection closed by the peer; reconnecting")
                    }
                    Ended::Error(e) => {
                        tracing::warn!(source = %sink.state.name, %peer, error = %e, "connection lost; reconnecting")
                    }
                    Ended::Idle => {
                        let msg = format!("no byte from {peer} for {idle:?}; closed, reconnecting");
                        sink.reject("idle_timeout", &msg);
                    }
                }
            }
            Err(e) => {
                if !failing {
                    tracing::warn!(source = %sink.state.name, %address, error = %e, "cannot connect; retrying with backoff");
                    failing = true;
                }
            }
        }
        tokio::select! {
            biased;
            _ = shutdown.recv() => return,
            _ = sleep(retry.next_delay()) => {}
        }
    }
}

/// Runs a `tcp-listen` source until shutdown.
pub async fn run_listen(ctx: SourceContext) {
    let SourceContext {
        spec,
        outputs,
        counters,
        shutdown,
    } = ctx;
    let SourceKind::TcpListen {
        listen,
        stream,
        on_second_connection,
        replace_after_silent,
        idle_timeout,
    } = spec.kind
    else {
        tracing::error!(source = %spec.name, kind = spec.kind.as_str(), "not a tcp-listen source");
        return;
    };
    let sink = FrameSink::new(outputs, counters, spec.sample_rate_hz).with_sequence(&spec.sequence);
    let policy = ListenPolicy {
        second: on_second_connection,
        replace_after_silent,
        idle: idle_timeout,
    };
    accept(listen, &stream, policy, sink, shutdown).await;
}

/// How `tcp-listen` treats its connections.
struct ListenPolicy {
    second: SecondConnection,
    replace_after_silent: Duration,
    idle: Duration,
}

/// The connection being read, and when its last byte came.
struct Active {
    stream: TcpStream,
    peer: SocketAddr,
    last_byte: Instant,
}

async fn accept(
    listen: SocketAddr,
    stream: &StreamSpec,
    policy: ListenPolicy,
    mut sink: FrameSink,
    mut shutdown: Shutdown,
) {
    let listener = loop {
        match TcpListener::bind(listen).await {
            Ok(l) => break l,
            Err(e) => {
                tracing::error!(source = %sink.state.name, %listen, error = %e, "cannot listen; retrying in 5 s");
                tokio::select! {
                    biased;
                    _ = shutdown.recv() => return,
                    _ = sleep(Duration::from_secs(5)) => {}
                }
            }
        }
    };
    tracing::info!(source = %sink.state.name, addr = %listener.local_addr().map_or(listen, |a| a), "listening for a DAQ connection");
    let mut framing = match StreamFraming::new(stream, sink.out.width()) {
        Ok(f) => f,
        Err(e) => {
            tracing::error!(source = %sink.state.name, error = %e, "cannot set up the decoder");
            return;
        }
    };
    let mut buf = vec![0u8; READ_BUF];
    let mut active: Option<Active> = None;
    enum Event {
        Accepted(std::io::Result<(TcpStream, SocketAddr)>),
        Read(std::io::Result<usize>),
        Idle,
    }
    loop {
        let event = match active.as_mut() {
            None => tokio::select! {
                a = listener.accept() => Event::Accepted(a),
                _ = shutdown.recv() => return,
            },
            Some(a) => {
                let deadline = a.last_byte + policy.idle;
                tokio::select! {
                    r = a.stream.read(&mut buf) => Event::Read(r),
                    c = listener.accept() => Event::Accepted(c),
                    _ = tokio::time::sleep_until(deadline.into()) => Event::Idle,
                    _ = shutdown.recv() => return,
                }
            }
        };
        let accepted = match event {
            Event::Read(Ok(n)) if n > 0 => {
                if let Some(a) = active.as_mut() {
                    a.last_byte = Instant::now();
                }
                sink.state.bytes.fetch_add(n as u64, Ordering::Relaxed);
                framing.feed(&buf[..n], &mut sink);
                sink.out.wake();
                continue;
            }
            Event::Read(_) | Event::Idle => {
                let peer = active.take().map(|a| a.peer);
                match event {
                    Event::Read(Err(e)) => {
                        tracing::warn!(source = %sink.state.name, peer = peer.map(tracing::field::display), error = %e, "connection lost")
                    }
                    Event::Idle => {
                        let msg = format!("no byte from {peer:?} for {:?}; closed", policy.idle);
                        sink.reject("idle_timeout", &msg);
                    }
                    _ => {
                        tracing::warn!(source = %sink.state.name, peer = peer.map(tracing::field::display), "connection closed by the peer")
                    }
                }
                sink.set_connected(false);
                framing.reset(&mut sink);
                sink.out
                    .mark_discontinuity(crate::counters::GapReason::Restart);
                continue;
            }
            Event::Accepted(a) => a,
        };
        match accepted {
            Err(e) => {
                tracing::warn!(source = %sink.state.name, error = %e, "accept failed");
                tokio::select! {
                    biased;
                    _ = shutdown.recv() => return,
                    _ = sleep(Duration::from_millis(100)) => {}
                }
            }
            Ok((s, peer)) => {
                if let Some(a) = &active {
                    let silent = a.last_byte.elapsed();
                    let replace = match policy.second {
                        SecondConnection::Refuse => false,
                        SecondConnection::Replace => true,
                        SecondConnection::ReplaceSilent => silent >= policy.replace_after_silent,
                    };
                    let old = a.peer;
                    if !replace {
                        let msg = format!(
                            "second connection from {peer} refused while {old} is active (last byte {silent:?} ago)"
                        );
                        sink.reject("second_connection", &msg);
                        drop(s);
                        continue;
                    }
                    tracing::warn!(source = %sink.state.name, %peer, old = %old, silent_ms = silent.as_millis() as u64, "second connection replaces the active one");
                    framing.reset(&mut sink);
                } else {
                    tracing::info!(source = %sink.state.name, %peer, "DAQ connected");
                }
                let _ = s.set_nodelay(true);
                keepalive(&s);
                sink.state.connections.fetch_add(1, Ordering::Relaxed);
                sink.restart();
                sink.set_connected(true);
                active = Some(Active {
                    stream: s,
                    peer,
                    last_byte: Instant::now(),
                });
            }
        }
    }
}
