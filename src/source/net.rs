//! Network and serial readers: `tcp-connect`, `tcp-listen`, `udp`,
//! `serial`. Each is one tokio task that owns its [`FrameSink`]; it logs
//! every change of link state once, and counts what it rejects.

use std::net::SocketAddr;
use std::sync::atomic::Ordering;
use std::sync::Arc;
use std::time::Duration;

use tokio::io::{AsyncRead, AsyncReadExt};
use tokio::net::{TcpListener, TcpStream, UdpSocket};
use tokio::sync::watch;

use crate::clock::unix_now_ns;
use crate::config::{Backoff, SecondConnection, SourceKind, SourceSpec, StreamSpec};
use crate::counters::SourceCounters;
use crate::frame::bwf1::DatagramDecoder;
use crate::source::framed::{FrameSink, StreamFraming};
use crate::source::SourceOutputs;

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

/// Waits for `d` or shutdown; true if shutdown came first.
async fn sleep_or_stop(d: Duration, stop: &mut watch::Receiver<bool>) -> bool {
    tokio::select! {
        _ = tokio::time::sleep(d) => *stop.borrow(),
        _ = stop.changed() => true,
    }
}

fn set_connected(sink: &FrameSink, up: bool) {
    sink.state.connected.store(up, Ordering::Relaxed);
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
    stop: &mut watch::Receiver<bool>,
) -> Ended {
    loop {
        let n = tokio::select! {
            r = io.read(buf) => r,
            _ = stop.changed() => return Ended::Shutdown,
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

/// Runs one network or serial source until shutdown.
pub async fn run(
    spec: SourceSpec,
    out: SourceOutputs,
    state: Arc<SourceCounters>,
    stop: watch::Receiver<bool>,
) {
    let sink = FrameSink::new(out, state, spec.sample_rate_hz);
    match spec.kind {
        SourceKind::TcpConnect {
            address,
            stream,
            backoff,
        } => tcp_connect(&address, &stream, backoff, sink, stop).await,
        SourceKind::TcpListen {
            listen,
            stream,
            on_second_connection,
        } => tcp_listen(listen, &stream, on_second_connection, sink, stop).await,
        SourceKind::Udp {
            listen,
            max_datagram_bytes,
        } => udp(listen, max_datagram_bytes, sink, stop).await,
        SourceKind::Serial { .. } => super::serial::run(&spec.kind, sink, stop).await,
        SourceKind::Sim { .. } => {}
    }
}

async fn tcp_connect(
    address: &str,
    stream: &StreamSpec,
    backoff: Backoff,
    mut sink: FrameSink,
    mut stop: watch::Receiver<bool>,
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
            _ = stop.changed() => return,
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
                set_connected(&sink, true);
                let ended = read_stream(&mut s, &mut framing, &mut sink, &mut buf, &mut stop).await;
                set_connected(&sink, false);
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
        if sleep_or_stop(retry.next_delay(), &mut stop).await {
            return;
        }
    }
}

async fn tcp_listen(
    listen: SocketAddr,
    stream: &StreamSpec,
    policy: SecondConnection,
    mut sink: FrameSink,
    mut stop: watch::Receiver<bool>,
) {
    let listener = loop {
        match TcpListener::bind(listen).await {
            Ok(l) => break l,
            Err(e) => {
                tracing::error!(source = %sink.state.name, %listen, error = %e, "cannot listen; retrying in 5 s");
                if sleep_or_stop(Duration::from_secs(5), &mut stop).await {
                    return;
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
                _ = stop.changed() => return,
            },
            Some((s, _)) => tokio::select! {
                a = listener.accept() => Event::Accepted(a),
                r = s.read(&mut buf) => Event::Read(r),
                _ = stop.changed() => return,
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
                set_connected(&sink, false);
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
                if sleep_or_stop(Duration::from_millis(100), &mut stop).await {
                    return;
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
                set_connected(&sink, true);
                active = Some((s, peer));
            }
        }
    }
}

/// Receive buffer asked of the kernel for a UDP source (it may grant less,
/// capped by net.core.rmem_max).
const UDP_RECV_BUFFER: usize = 8 << 20;

/// A UDP source counts as connected while datagrams arrive at least this often.
const UDP_STALE: Duration = Duration::from_secs(5);

async fn udp(
    listen: SocketAddr,
    max_datagram: usize,
    mut sink: FrameSink,
    mut stop: watch::Receiver<bool>,
) {
    let socket = loop {
        match UdpSocket::bind(listen).await {
            Ok(s) => break s,
            Err(e) => {
                tracing::error!(source = %sink.state.name, %listen, error = %e, "cannot bind UDP; retrying in 5 s");
                if sleep_or_stop(Duration::from_secs(5), &mut stop).await {
                    return;
                }
            }
        }
    };
    // A larger kernel buffer rides out bursts while the runtime is busy
    // (the default ~200 KiB holds only a few large datagrams); what the
    // kernel still drops shows as gaps in the sequence.
    let sock = socket2::SockRef::from(&socket);
    if let Err(e) = sock.set_recv_buffer_size(UDP_RECV_BUFFER) {
        tracing::warn!(source = %sink.state.name, error = %e, "cannot enlarge the UDP receive buffer");
    }
    let got = sock.recv_buffer_size().unwrap_or(0);
    tracing::info!(source = %sink.state.name, addr = %socket.local_addr().map_or(listen, |a| a), recv_buffer_bytes = got, "receiving BWF1 datagrams");
    // One byte more than the largest datagram accepted: a datagram that
    // fills it was longer than allowed, and the kernel truncated it.
    let mut buf = vec![0u8; max_datagram + 1];
    let mut decoder = DatagramDecoder::new();
    let mut tick = tokio::time::interval(Duration::from_secs(1));
    let mut last = tokio::time::Instant::now();
    sink.restart();
    loop {
        tokio::select! {
            r = socket.recv_from(&mut buf) => match r {
                Ok((n, peer)) => {
                    sink.state.bytes.fetch_add(n as u64, Ordering::Relaxed);
                    last = tokio::time::Instant::now();
                    if !sink.state.is_connected() {
                        tracing::info!(source = %sink.state.name, %peer, "datagrams arriving");
                        set_connected(&sink, true);
                    }
                    if n > max_datagram {
                        let msg = format!("datagram from {peer} longer than max_datagram_bytes {max_datagram}");
                        sink.reject("oversize_datagram", &msg);
                        continue;
                    }
                    match decoder.decode_body(&buf[..n]) {
                        Ok((h, body)) => sink.bwf1(&h, body),
                        Err(e) => sink.frame_error(&e),
                    }
                    sink.out.wake();
                }
                Err(e) => {
                    // e.g. ICMP port unreachable reported on Linux: not fatal.
                    if sink.logs.allow("udp_recv").is_some() {
                        tracing::warn!(source = %sink.state.name, error = %e, "UDP receive error");
                    }
                }
            },
            _ = tick.tick() => {
                if sink.state.is_connected() && last.elapsed() > UDP_STALE {
                    tracing::warn!(source = %sink.state.name, "no datagram for {} s", UDP_STALE.as_secs());
                    set_connected(&sink, false);
                }
            }
            _ = stop.changed() => return,
        }
    }
}
