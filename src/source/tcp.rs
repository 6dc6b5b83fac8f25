//! The TCP sources: `tcp-connect` (dial the DAQ, reconnect with backoff)
//! and `tcp-listen` (accept the DAQ's connection, one at a time, the second
//! one refused or replacing the first as configured). Each is one tokio
//! task that owns its [`FrameSink`]; it logs every change of link state
//! once, and counts what it rejects.

use std::net::SocketAddr;
use std::sync::atomic::Ordering;
use std::time::Duration;

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
}

/// Reads `io` into the framing until EOF, error or shutdown.
async fn read_stream<R: AsyncRead + Unpin>(
    io: &mut R,
    framing: &mut StreamFraming,
    sink: &mut FrameSink,
    buf: &mut [u8],
    shutdown: &mut Shutdown,
) -> Ended {
    loop {
        let n = tokio::select! {
            r = io.read(buf) => r,
            _ = shutdown.recv() => return Ended::Shutdown,
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
    } = spec.kind
    else {
        tracing::error!(source = %spec.name, kind = spec.kind.as_str(), "not a tcp-connect source");
        return;
    };
    let sink = FrameSink::new(outputs, counters, spec.sample_rate_hz).with_sequence(&spec.sequence);
    connect(&address, &stream, backoff, sink, shutdown).await;
}

async fn connect(
    address: &str,
    stream: &StreamSpec,
    backoff: Backoff,
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
                let peer = s
                    .peer_addr()
                    .map_or_else(|_| address.to_string(), |a| a.to_string());
                tracing::info!(source = %sink.state.name, %peer, "connected");
                failing = false;
                retry.reset();
                sink.state.connections.fetch_add(1, Ordering::Relaxed);
                sink.restart();
                sink.set_connected(true);
                let ended =
                    read_stream(&mut s, &mut framing, &mut sink, &mut buf, &mut shutdown).await;
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
    } = spec.kind
    else {
        tracing::error!(source = %spec.name, kind = spec.kind.as_str(), "not a tcp-listen source");
        return;
    };
    let sink = FrameSink::new(outputs, counters, spec.sample_rate_hz).with_sequence(&spec.sequence);
    accept(listen, &stream, on_second_connection, sink, shutdown).await;
}

async fn accept(
    listen: SocketAddr,
    stream: &StreamSpec,
    policy: SecondConnection,
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
    let mut active: Option<(TcpStream, SocketAddr)> = None;
    enum Event {
        Accepted(std::io::Result<(TcpStream, SocketAddr)>),
        Read(std::io::Result<usize>),
    }
    loop {
        let event = match active.as_mut() {
            None => tokio::select! {
                a = listener.accept() => Event::Accepted(a),
                _ = shutdown.recv() => return,
            },
            Some((s, _)) => tokio::select! {
                a = listener.accept() => Event::Accepted(a),
                r = s.read(&mut buf) => Event::Read(r),
                _ = shutdown.recv() => return,
            },
        };
        let accepted = match event {
            Event::Read(Ok(n)) if n > 0 => {
                sink.state.bytes.fetch_add(n as u64, Ordering::Relaxed);
                framing.feed(&buf[..n], &mut sink);
                sink.out.wake();
                continue;
            }
            Event::Read(r) => {
                let peer = active.take().map(|(_, p)| p);
                match r {
                    Err(e) => {
                        tracing::warn!(source = %sink.state.name, ?peer, error = %e, "connection lost")
                    }
                    Ok(_) => {
                        tracing::warn!(source = %sink.state.name, ?peer, "connection closed by the peer")
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
                if let Some((_, old)) = &active {
                    match policy {
                        SecondConnection::Refuse => {
                            let msg = format!(
                                "second connection from {peer} refused while {old} is active"
                            );
                            sink.reject("second_connection", &msg);
                            drop(s);
                            continue;
                        }
                        SecondConnection::Replace => {
                            tracing::warn!(source = %sink.state.name, %peer, old = %old, "second connection replaces the active one");
                            framing.reset(&mut sink);
                        }
                    }
                } else {
                    tracing::info!(source = %sink.state.name, %peer, "DAQ connected");
                }
                let _ = s.set_nodelay(true);
                sink.state.connections.fetch_add(1, Ordering::Relaxed);
                sink.restart();
                sink.set_connected(true);
                active = Some((s, peer));
            }
        }
    }
}
