//! The `udp` source: one BWF1 frame per datagram, bound on `listen`. The
//! source counts as connected while datagrams keep arriving (a datagram
//! socket has no connection to lose); a datagram longer than
//! `max_datagram_bytes` is rejected, not truncated into a frame. A datagram
//! not taken as a frame (too long, a bad header or CRC, a header that
//! disagrees with the config) counts its bytes in `bytes_skipped`, as a
//! stream's decoder counts the bytes it skips; a good frame dropped by the
//! sequence rules is counted there instead (`frames_late`, restarts).

use std::sync::atomic::Ordering;
use std::time::Duration;

use tokio::net::UdpSocket;
use tokio::time::sleep;

use crate::config::SourceKind;
use crate::frame::bwf1::DatagramDecoder;
use crate::source::framed::FrameSink;
use crate::source::SourceContext;

/// Receive buffer asked of the kernel for a UDP source (it may grant less,
/// capped by net.core.rmem_max).
const UDP_RECV_BUFFER: usize = 8 << 20;

/// A UDP source counts as connected while datagrams arrive at least this often.
const UDP_STALE: Duration = Duration::from_secs(5);

/// Receives datagrams until shutdown.
pub async fn run(ctx: SourceContext) {
    let SourceContext {
        spec,
        outputs,
        counters,
        mut shutdown,
    } = ctx;
    let SourceKind::Udp {
        listen,
        max_datagram_bytes: max_datagram,
    } = spec.kind
    else {
        tracing::error!(source = %spec.name, kind = spec.kind.as_str(), "not a udp source");
        return;
    };
    let mut sink =
        FrameSink::new(outputs, counters, spec.sample_rate_hz).with_sequence(&spec.sequence);
    let socket = loop {
        match UdpSocket::bind(listen).await {
            Ok(s) => break s,
            Err(e) => {
                tracing::error!(source = %sink.state.name, %listen, error = %e, "cannot bind UDP; retrying in 5 s");
                tokio::select! {
                    biased;
                    _ = shutdown.recv() => return,
                    _ = sleep(Duration::from_secs(5)) => {}
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
    let mut decoder = DatagramDecoder::expecting(sink.expect());
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
                        sink.set_connected(true);
                    }
                    if n > max_datagram {
                        let msg = format!("datagram from {peer} longer than max_datagram_bytes {max_datagram}");
                        sink.reject("oversize_datagram", &msg);
                        sink.state.bytes_skipped.fetch_add(n as u64, Ordering::Relaxed);
                        continue;
                    }
                    match decoder.decode_body(&buf[..n]) {
                        Ok((h, body)) => sink.bwf1(&h, body),
                        Err(e) => {
                            sink.frame_error(&e);
                            sink.state.bytes_skipped.fetch_add(n as u64, Ordering::Relaxed);
                        }
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
                    sink.set_connected(false);
                }
            }
            _ = shutdown.recv() => return,
        }
    }
}
