//! The `ingest` phase: BWF1 over real loopback TCP and UDP into the
//! daemon's running pipeline (`Pipeline::start`: sources, rings, two DSP
//! workers, alarms with their journal in a scratch directory): the highest
//! aggregate sample rate held with zero drops.

use std::sync::atomic::Ordering;
use std::time::Duration;

use serde::Serialize;

use crate::config::SourceKind;
use crate::counters::SourceCounters;
use crate::frame::SampleFormat;
use crate::pipeline::state::AppState;
use crate::pipeline::Pipeline;

use super::input::bench_config;
use super::path::{encode_frames, patch_frame};
use super::{io_err, BenchArgs, BenchError, Row, Summary, FS};

/// Channels of the `ingest` phase.
const LOAD_CHANNELS: usize = 64;

#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum Transport {
    Tcp,
    Udp,
}

/// Instants per frame in the ingest phase: 64 channels × 256 × 2 bytes
/// fits one datagram.
const INGEST_FRAME_SAMPLES: usize = 256;

/// What one ingest step saw.
#[derive(Debug, Clone, Serialize)]
pub(crate) struct IngestStep {
    pub(crate) transport: String,
    pub(crate) sample_rate_hz: f64,
    pub(crate) aggregate_samples_per_s: f64,
    pub(crate) sent_instants: u64,
    pub(crate) processed: u64,
    pub(crate) dropped: u64,
    pub(crate) missing: u64,
    pub(crate) rejected: u64,
    pub(crate) sender_behind: bool,
    /// Samples in the rings, not yet processed, when sending stopped, in
    /// seconds of input: the DSP's lag behind real time (the samples waiting
    /// for the rest of their averaged result included).
    pub(crate) lag_seconds: f64,
    pub(crate) held: bool,
}

/// Largest DSP lag (seconds of input waiting in the rings when sending
/// stops) for a rate to count as held in real time. Without this, a step
/// shorter than the ring (2 s) would pass at any rate by filling the ring.
const MAX_LAG_S: f64 = 0.1;

async fn ingest_step(
    transport: Transport,
    fs: f64,
    n: usize,
    seconds: f64,
    pool: &[u8],
    frame_bytes: usize,
) -> Result<IngestStep, BenchError> {
    let channels = LOAD_CHANNELS;
    let (source, tcp) = match transport {
        Transport::Tcp => {
            let l = tokio::net::TcpListener::bind("127.0.0.1:0")
                .await
                .map_err(io_err("bind loopback TCP"))?;
            let a = l.local_addr().map_err(io_err("local address"))?;
            (
                format!("kind = \"tcp-connect\"\naddress = \"{a}\"\nreconnect_min_ms = 10"),
                Some(l),
            )
        }
        Transport::Udp => {
            let s =
                std::net::UdpSocket::bind("127.0.0.1:0").map_err(io_err("bind loopback UDP"))?;
            let a = s.local_addr().map_err(io_err("local address"))?;
            drop(s);
            (format!("kind = \"udp\"\nlisten = \"{a}\""), None)
        }
    };
    let config = bench_config(channels, n, fs, &source)?;
    // Workers leave up to one averaged result's samples in the rings until
    // its last sample is in (`ChannelDsp::set_gather`): that wait is not lag.
    let gathered_s = config.channels.first().map_or(0.0, |c| {
        (c.block + c.average_count.saturating_sub(1) as usize * c.hop) as f64 / fs
    });
    let pipeline = Pipeline::start(&config).map_err(|e| BenchError::Lost(e.to_string()))?;
    let state = pipeline.state.clone();
    let udp_target = match transport {
        Transport::Udp => Some(
            config
                .sources
                .first()
                .and_then(|s| match &s.kind {
                    SourceKind::Udp { listen, .. } => Some(*listen),
                    _ => None,
                })
                .ok_or_else(|| BenchError::Config("udp source".into()))?,
        ),
        Transport::Tcp => None,
    };
    let mut frames: Vec<Vec<u8>> = pool.chunks_exact(frame_bytes).map(<[u8]>::to_vec).collect();
    let s = INGEST_FRAME_SAMPLES as u64;
    let total = (seconds * fs) as u64 / s * s;
    let mut sent = 0u64;
    let mut behind = false;
    let mut lag_seconds = f64::NAN;
    let result: Result<(), BenchError> = async {
        enum Link {
            Tcp(tokio::net::TcpStream),
            Udp(tokio::net::UdpSocket),
        }
        let mut link = match (tcp, udp_target) {
            (Some(l), _) => {
                let (sock, _) = tokio::time::timeout(Duration::from_secs(5), l.accept())
                    .await
                    .map_err(|_| BenchError::Lost("the pipeline did not connect in 5 s".into()))?
                    .map_err(io_err("accept"))?;
                let _ = sock.set_nodelay(true);
                Link::Tcp(sock)
            }
            (None, Some(a)) => {
                // Let the source bind its socket first.
                tokio::time::sleep(Duration::from_millis(200)).await;
                let u = tokio::net::UdpSocket::bind("127.0.0.1:0")
                    .await
                    .map_err(io_err("bind UDP sender"))?;
                u.connect(a).await.map_err(io_err("connect UDP"))?;
                Link::Udp(u)
            }
            _ => return Err(BenchError::Usage("transport".into())),
        };
        let start = tokio::time::Instant::now();
        let mut tick = tokio::time::interval(Duration::from_millis(2));
        let mut k = 0usize;
        while sent < total {
            tick.tick().await;
            let due = ((start.elapsed().as_secs_f64() * fs) as u64).min(total);
            if due > sent + fs as u64 {
                behind = true;
            }
            while sent + s <= due {
                let nf = frames.len();
                let f = &mut frames[k % nf];
                k += 1;
                patch_frame(f, sent, fs)?;
                match &mut link {
                    Link::Tcp(t) => {
                        use tokio::io::AsyncWriteExt;
                        t.write_all(f).await.map_err(io_err("TCP send"))?;
                    }
                    Link::Udp(u) => {
                        u.send(f).await.map_err(io_err("UDP send"))?;
                    }
                }
                sent += s;
            }
        }
        // How far the DSP is behind now; then let it drain what is in flight.
        let backlog: u64 = state
            .channels
            .iter()
            .map(|c| {
                c.counters
                    .samples_in
                    .load(Ordering::Relaxed)
                    .saturating_sub(c.counters.samples_processed.load(Ordering::Relaxed))
            })
            .sum();
        lag_seconds = backlog as f64 / (channels as f64 * fs);
        let want = sent * channels as u64;
        let deadline = tokio::time::Instant::now() + Duration::from_secs(5);
        loop {
            let (processed, dropped, missing) = totals(&state);
            if processed + dropped + missing * channels as u64 >= want
                || tokio::time::Instant::now() > deadline
            {
                break;
            }
            tokio::time::sleep(Duration::from_millis(20)).await;
        }
        Ok(())
    }
    .await;
    let (processed, dropped, missing) = totals(&state);
    let rejected: u64 = state.sources[0]
        .rejected()
        .iter()
        .map(|(_, n)| n)
        .sum::<u64>()
        + SourceCounters::get(&state.sources[0].frames_late);
    pipeline.stop().await;
    result?;
    let want = sent * channels as u64;
    let held = !behind
        && dropped == 0
        && missing == 0
        && rejected == 0
        && processed == want
        && sent > 0
        && lag_seconds <= MAX_LAG_S + gathered_s;
    Ok(IngestStep {
        transport: match transport {
            Transport::Tcp => "tcp".into(),
            Transport::Udp => "udp".into(),
        },
        sample_rate_hz: fs,
        aggregate_samples_per_s: fs * channels as f64,
        sent_instants: sent,
        processed,
        dropped,
        missing,
        rejected,
        sender_behind: behind,
        lag_seconds,
        held,
    })
}

/// Doubles the per-channel rate from 25 600 Hz until a step loses data,
/// then bisects twice. Returns the highest aggregate rate held and the
/// steps.
async fn ingest_ladder(
    transport: Transport,
    n: usize,
    seconds: f64,
    signal: &[f32],
) -> Result<(f64, Vec<IngestStep>), BenchError> {
    let (pool, frame_bytes) = encode_frames(
        SampleFormat::I16,
        LOAD_CHANNELS,
        16 * INGEST_FRAME_SAMPLES,
        INGEST_FRAME_SAMPLES,
        signal,
        FS,
    );
    let mut steps = Vec::new();
    let mut ok = 0.0;
    let mut bad = f64::INFINITY;
    let mut fs = FS;
    // Stop doubling at 2^7 × 25 600 Hz per channel (210 M samples/s for 64).
    for _ in 0..8 {
        let st = ingest_step(transport, fs, n, seconds, &pool, frame_bytes).await?;
        let held = st.held;
        steps.push(st);
        if held {
            ok = fs;
            fs *= 2.0;
        } else {
            bad = fs;
            break;
        }
    }
    if bad.is_finite() && ok > 0.0 {
        for _ in 0..2 {
            let mid = ((ok + bad) / 2.0 / FS).round() * FS;
            if mid <= ok || mid >= bad {
                break;
            }
            let st = ingest_step(transport, mid, n, seconds, &pool, frame_bytes).await?;
            if st.held {
                ok = mid;
            } else {
                bad = mid;
            }
            steps.push(st);
        }
    }
    Ok((ok * LOAD_CHANNELS as f64, steps))
}

/// The phase: per transport, the highest rate held, at most 3 repeats.
pub(crate) fn ingest_phase(
    rt: &tokio::runtime::Runtime,
    args: &BenchArgs,
    signal: &[f32],
    rows: &mut Vec<Row>,
    notes: &mut Vec<String>,
) -> Result<(), BenchError> {
    let repeats = args.repeats.max(1);
    for transport in [Transport::Tcp, Transport::Udp] {
        let name = if transport == Transport::Tcp {
            "tcp"
        } else {
            "udp"
        };
        let mut best = Vec::new();
        for r in 0..repeats.min(3) {
            eprintln!("bench: ingest {name} repeat {}/{}", r + 1, repeats.min(3));
            let (rate, steps) =
                rt.block_on(ingest_ladder(transport, args.n, args.seconds, signal))?;
            for st in &steps {
                eprintln!(
                    "bench:   {name} {} Hz x {LOAD_CHANNELS}: held {} (dropped {}, missing {}, rejected {}, sender behind {}, DSP lag {:.3} s)",
                    st.sample_rate_hz, st.held, st.dropped, st.missing, st.rejected, st.sender_behind, st.lag_seconds
                );
            }
            best.push(rate);
        }
        rows.push(Row {
            phase: "ingest".into(),
            case: format!("{name} {LOAD_CHANNELS} ch, {} s", args.seconds),
            unit: "samples/s held".into(),
            value: Summary::of(&best),
            ratio: None,
            target: None,
        });
    }
    notes.push(format!(
        "ingest: {LOAD_CHANNELS} channels of i16 BWF1 ({INGEST_FRAME_SAMPLES} instants a frame), per-channel rate doubled from 25.6 kHz until a step loses a sample or ends with the DSP more than {MAX_LAG_S} s behind (beyond the samples held back for the next result), then bisected; sender, source and 2 DSP workers share the cores"
    ));
    Ok(())
}

/// Samples processed and dropped over every channel, and instants missing
/// at the (only) source.
fn totals(state: &AppState) -> (u64, u64, u64) {
    let processed = state
        .channels
        .iter()
        .map(|c| c.counters.samples_processed.load(Ordering::Relaxed))
        .sum();
    let dropped = state
        .channels
        .iter()
        .map(|c| c.counters.dropped_total())
        .sum();
    let missing = SourceCounters::get(&state.sources[0].samples_missing);
    (processed, dropped, missing)
}
