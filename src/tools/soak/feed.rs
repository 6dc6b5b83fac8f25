//! The soak's DAQ boxes: one UDP and one TCP sender thread, each playing a
//! cycle of faults and counting exactly what it put on the wire.
//!
//! Every frame of a source's sequence is made here (four f32 channels of
//! tones plus a little noise, 256 instants) and goes through `send`'s own
//! [`FaultPlan`] (drop, corrupt, duplicate, reorder: `tools::send`). Around
//! each break of the sequence (a DAQ restart, a forward jump, an index
//! wrap, a new connection, the end) [`MARGIN`] frames are sent clean: a
//! frame lost just before a break can be seen by no counter (the next frame
//! starts a new sequence, so no gap shows), which would make the accounting
//! guess; this is the one fault placement the daemon cannot balance, and
//! the soak leaves it out on purpose (DEVELOPERS.md, "Soak test").
//!
//! Besides the sequence, each cycle injects frames that carry no samples of
//! it: headers that disagree with the config (63 channels, 1 kHz), a frame
//! too large (TCP: a header announcing 1 MiB; UDP: a datagram over
//! `max_datagram_bytes`), bursts at 10x the rate, ±3e38 and non-finite
//! samples on channel 3, and on TCP an intruder while the box is talking,
//! an idle peer replaced by the returning box and one left to time out.

use std::io::{Read, Write};
use std::net::{Shutdown, SocketAddr, TcpStream, UdpSocket};
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::Arc;
use std::time::{Duration, Instant};

use crate::clock::unix_now_ns;
use crate::frame::bwf1::{decode_datagram_body, encode_into, Header, RejectReason};
use crate::frame::{SampleFormat, SampleSlice};
use crate::noise::SplitMix64;
use crate::tools::send::{FaultPlan, Faults};
use crate::tools::soak::config::{
    tone_hz, CHANNELS, IDLE_TIMEOUT_S, MAX_DATAGRAM, RATE_HZ, REPLACE_AFTER_SILENT_S,
};

/// Instants per frame.
pub const FRAME: u64 = 256;
/// Clean frames on each side of a break in the sequence.
const MARGIN: u64 = 4;
/// `send`'s faults, every Nth frame: primes, so two rarely meet.
pub const FAULTS: Faults = Faults {
    drop_every: 97,
    corrupt_every: 89,
    duplicate_every: 83,
    reorder_every: 79,
};
/// Every this many frames (of those no fault touches) channel 3 carries
/// NaN, +Inf, −Inf, +3e38 and −3e38.
const SPECIAL_EVERY: u64 = 50;
const NON_FINITE_PER_FRAME: u64 = 3;
const HUGE_PER_FRAME: u64 = 2;
/// Tone amplitudes of channels 0 and 1 (g), alternating every
/// [`HALF_PERIOD_S`] of wall time: RMS 0.14 g (normal) and 1.27 g (danger).
const LOW_AMP: f64 = 0.2;
const HIGH_AMP: f64 = 1.8;
const HALF_PERIOD_S: f64 = 8.0;
/// A socket operation that takes longer than this is a failure.
const IO_TIMEOUT: Duration = Duration::from_secs(10);

/// What one feeder put on the wire, exactly.
#[derive(Debug, Clone, Default, serde::Serialize)]
pub struct Tally {
    /// Instants of every frame of the sequence made (per channel),
    /// including the ones the fault plan dropped; a duplicate counts once.
    pub made_instants: u64,
    /// Frames of the sequence written (a duplicate twice, none dropped).
    pub wire_frames: u64,
    /// Of those, frames whose CRC no longer matches (corrupted).
    pub wire_corrupt: u64,
    pub wire_corrupt_bytes: u64,
    /// Bytes written (TCP) or datagram bytes the daemon can read (UDP: a
    /// datagram over the limit is read as `max_datagram_bytes + 1`).
    pub bytes: u64,
    /// The fault plan's own counts (`send`'s report).
    pub dropped: u64,
    pub corrupted: u64,
    pub duplicated: u64,
    pub reordered: u64,
    pub special_frames: u64,
    pub non_finite_samples: u64,
    pub huge_samples: u64,
    pub bursts: u64,
    pub daq_restarts: u64,
    /// Forward jumps, including the jump to the top of the index space
    /// before a wrap.
    pub forward_jumps: u64,
    pub wraps: u64,
    pub bad_channel_headers: u64,
    pub bad_rate_headers: u64,
    pub too_large: u64,
    /// Bytes of the injected bad headers or datagrams, as the daemon
    /// reads them.
    pub bad_bytes: u64,
    pub sessions: u64,
    pub intruders: u64,
    pub intruders_closed: u64,
    /// Peers that connected and sent nothing (each accepted: the slot was
    /// free); the last may be closed by the box itself when the soak ends.
    pub idle_peers: u64,
    pub idle_replaced: u64,
    pub idle_timed_out: u64,
    /// Seconds the idle peers left to time out were held, longest.
    pub idle_held_max_s: f64,
    pub cycles: u64,
    /// Anything that went wrong on the sender's side.
    pub errors: Vec<String>,
}

enum Link {
    Udp(UdpSocket),
    Tcp(TcpStream),
}

impl Link {
    fn send(&mut self, bytes: &[u8]) -> std::io::Result<()> {
        match self {
            Link::Udp(s) => s.send(bytes).map(|_| ()),
            Link::Tcp(s) => s.write_all(bytes),
        }
    }
}

/// One DAQ box: its link, its sequence and what it sent.
struct Feeder {
    link: Option<Link>,
    index: u64,
    plan: FaultPlan,
    tally: Tally,
    rng: SplitMix64,
    /// Samples of signal made, for the tones' phase (never jumps).
    phase: u64,
    t0: Instant,
    values: Vec<f32>,
    stop: Arc<AtomicBool>,
}

type Io<T> = Result<T, String>;

impl Feeder {
    fn new(seed: u64, stop: Arc<AtomicBool>) -> Feeder {
        Feeder {
            link: None,
            index: 0,
            plan: FaultPlan::new(FAULTS),
            tally: Tally::default(),
            rng: SplitMix64(seed),
            phase: 0,
            t0: Instant::now(),
            values: Vec::new(),
            stop,
        }
    }

    fn stopping(&self) -> bool {
        self.stop.load(Ordering::Relaxed)
    }

    fn write(&mut self, bytes: &[u8], what: &str) -> Io<()> {
        let link = self
            .link
            .as_mut()
            .ok_or_else(|| format!("{what}: no link"))?;
        link.send(bytes).map_err(|e| format!("{what}: {e}"))?;
        self.tally.bytes += match link {
            Link::Udp(_) => bytes.len().min(MAX_DATAGRAM + 1) as u64,
            Link::Tcp(_) => bytes.len() as u64,
        };
        Ok(())
    }

    /// The next frame of the sequence at `first`, with channel 3's special
    /// values if `special`.
    fn make(&mut self, first: u64, special: bool) -> Io<Vec<u8>> {
        let s = FRAME as usize;
        let high = ((self.t0.elapsed().as_secs_f64() / HALF_PERIOD_S) as u64) % 2 == 1;
        self.values.clear();
        for i in 0..s {
            let n = (self.phase + i as u64) as f64;
            for c in 0..CHANNELS {
                let amp = match c {
                    0 | 1 if high => HIGH_AMP,
                    0 | 1 => LOW_AMP,
                    _ => 0.3,
                };
                let w = 2.0 * std::f64::consts::PI * tone_hz(c) / RATE_HZ;
                let v = amp * (w * n).sin() + 0.01 * self.rng.normal();
                self.values.push(v as f32);
            }
        }
        self.phase += FRAME;
        if special {
            let at = |i: usize| i * CHANNELS + 3;
            self.values[at(10)] = f32::NAN;
            self.values[at(20)] = f32::INFINITY;
            self.values[at(30)] = f32::NEG_INFINITY;
            self.values[at(40)] = 3e38;
            self.values[at(50)] = -3e38;
        }
        let h = Header::new(
            SampleFormat::F32,
            CHANNELS as u16,
            FRAME as u32,
            first,
            unix_now_ns(),
            RATE_HZ,
        );
        let mut out = Vec::new();
        encode_into(&h, SampleSlice::F32(&self.values), &mut out)
            .map_err(|e| format!("encode frame at {first}: {e}"))?;
        Ok(out)
    }

    /// Writes one chunk of the sequence, noting whether it is corrupt.
    fn write_seq(&mut self, chunk: &[u8]) -> Io<()> {
        self.tally.wire_frames += 1;
        if matches!(decode_datagram_body(chunk), Err(e) if e.reason() == RejectReason::CrcMismatch)
        {
            self.tally.wire_corrupt += 1;
            self.tally.wire_corrupt_bytes += chunk.len() as u64;
        }
        self.write(chunk, "frame")
    }

    /// The next frame of the sequence, through the fault plan if `faulty`.
    fn frame(&mut self, faulty: bool) -> Io<()> {
        let first = self.index;
        let n = self.plan.report.frames + 1;
        let f = FAULTS;
        let untouched = [
            f.drop_every,
            f.corrupt_every,
            f.duplicate_every,
            f.reorder_every,
        ]
        .iter()
        .all(|&e| e == 0 || !n.is_multiple_of(e));
        let special = faulty && untouched && n.is_multiple_of(SPECIAL_EVERY);
        let bytes = self.make(first, special)?;
        self.index = self.index.wrapping_add(FRAME);
        self.tally.made_instants += FRAME;
        if special {
            self.tally.special_frames += 1;
            self.tally.non_finite_samples += NON_FINITE_PER_FRAME;
            self.tally.huge_samples += HUGE_PER_FRAME;
        }
        let chunks = if faulty {
            self.plan.apply(bytes, FRAME)
        } else {
            // A frame held back for reordering goes after this one.
            let mut v = vec![bytes];
            v.extend(self.plan.flush());
            v
        };
        for c in chunks {
            self.write_seq(&c)?;
        }
        Ok(())
    }

    /// `frames` frames at `rate_x` times real time, clean at both ends.
    fn run(&mut self, frames: u64, rate_x: f64) -> Io<()> {
        let start = Instant::now();
        let per_frame = FRAME as f64 / (RATE_HZ * rate_x);
        for k in 0..frames {
            let due = start + Duration::from_secs_f64(k as f64 * per_frame);
            if let Some(wait) = due.checked_duration_since(Instant::now()) {
                std::thread::sleep(wait);
            }
            let faulty = k >= MARGIN && k + MARGIN < frames;
            self.frame(faulty)?;
        }
        Ok(())
    }

    /// `seconds` of wall time at `rate_x`.
    fn run_for(&mut self, seconds: f64, rate_x: f64) -> Io<()> {
        let frames = (seconds * RATE_HZ * rate_x / FRAME as f64).round() as u64;
        self.run(frames.max(2 * MARGIN + 1), rate_x)
    }

    /// The part of a cycle both transports share: a burst, a DAQ restart,
    /// a forward jump, an index wrap, each followed by normal running.
    fn breaks(&mut self) -> Io<()> {
        self.tally.bursts += 1;
        self.run_for(2.0, 10.0)?;
        self.tally.daq_restarts += 1;
        self.index = 0;
        self.run_for(2.5, 1.0)?;
        self.tally.forward_jumps += 1;
        self.index = self.index.wrapping_add(1_000_000_000_000);
        self.run_for(2.0, 1.0)?;
        // To the top of the index space: the third frame would end past
        // u64::MAX, so it is a wrap and the box counts on from 0.
        self.tally.forward_jumps += 1;
        self.tally.wraps += 1;
        self.index = 0u64.wrapping_sub(3 * FRAME);
        self.run(3, 1.0)?;
        self.run_for(2.0, 1.0)
    }

    fn finish(mut self) -> Tally {
        let r = &self.plan.report;
        self.tally.dropped = r.dropped;
        self.tally.corrupted = r.corrupted;
        self.tally.duplicated = r.duplicated;
        self.tally.reordered = r.reordered;
        self.tally
    }
}

/// A header (and for UDP a whole frame) that disagrees with the config:
/// `channels` and `rate`, `instants` per channel.
fn bad_frame(channels: u16, instants: u32, rate: f64, with_body: bool) -> Io<Vec<u8>> {
    let h = Header::new(SampleFormat::F32, channels, instants, 0, 0, rate);
    let mut out = Vec::new();
    if with_body {
        let zeros = vec![0.0f32; usize::from(channels) * instants as usize];
        encode_into(&h, SampleSlice::F32(&zeros), &mut out)
            .map_err(|e| format!("encode bad frame: {e}"))?;
    } else {
        h.write_to(&mut out);
    }
    Ok(out)
}

/// Runs the UDP box until `stop`, then returns its tally.
pub fn udp(to: SocketAddr, stop: Arc<AtomicBool>) -> Tally {
    let mut f = Feeder::new(11, stop);
    if let Err(e) = udp_cycles(&mut f, to) {
        f.tally.errors.push(e);
    }
    f.finish()
}

fn udp_cycles(f: &mut Feeder, to: SocketAddr) -> Io<()> {
    let s = UdpSocket::bind("127.0.0.1:0").map_err(|e| format!("udp bind: {e}"))?;
    s.connect(to)
        .map_err(|e| format!("udp connect {to}: {e}"))?;
    f.link = Some(Link::Udp(s));
    while !f.stopping() {
        f.tally.cycles += 1;
        f.run_for(3.0, 1.0)?;
        // Datagrams outside the sequence, between two of its frames.
        let bad = [
            (bad_frame(63, 8, RATE_HZ, true)?, 0),
            (bad_frame(CHANNELS as u16, 8, 1000.0, true)?, 1),
            (bad_frame(CHANNELS as u16, 1100, RATE_HZ, true)?, 2),
        ];
        for (bytes, kind) in bad {
            let before = f.tally.bytes;
            f.write(&bytes, "bad datagram")?;
            f.tally.bad_bytes += f.tally.bytes - before;
            match kind {
                0 => f.tally.bad_channel_headers += 1,
                1 => f.tally.bad_rate_headers += 1,
                _ => f.tally.too_large += 1,
            }
        }
        f.run_for(3.0, 1.0)?;
        f.breaks()?;
    }
    Ok(())
}

/// Connects to the daemon's TCP source, retrying while it starts.
fn connect(to: SocketAddr) -> Io<TcpStream> {
    let deadline = Instant::now() + IO_TIMEOUT;
    loop {
        match TcpStream::connect_timeout(&to, IO_TIMEOUT) {
            Ok(s) => {
                let _ = s.set_nodelay(true);
                s.set_read_timeout(Some(IO_TIMEOUT))
                    .and_then(|()| s.set_write_timeout(Some(IO_TIMEOUT)))
                    .map_err(|e| format!("tcp timeouts: {e}"))?;
                return Ok(s);
            }
            Err(e) if Instant::now() > deadline => return Err(format!("tcp connect {to}: {e}")),
            Err(_) => std::thread::sleep(Duration::from_millis(100)),
        }
    }
}

/// Waits up to `limit` for the daemon to close `s`; the time it took.
fn wait_closed(s: &mut TcpStream, limit: Duration) -> Option<Duration> {
    let start = Instant::now();
    let _ = s.set_read_timeout(Some(limit));
    let mut buf = [0u8; 256];
    loop {
        match s.read(&mut buf) {
            Ok(0) => return Some(start.elapsed()),
            Ok(_) => {}
            Err(e) if e.kind() == std::io::ErrorKind::ConnectionReset => {
                return Some(start.elapsed())
            }
            Err(_) => return None,
        }
        if start.elapsed() > limit {
            return None;
        }
    }
}

/// Runs the TCP box until `stop`, then returns its tally.
pub fn tcp(to: SocketAddr, stop: Arc<AtomicBool>) -> Tally {
    let mut f = Feeder::new(13, stop);
    let intruders_closed = Arc::new(std::sync::atomic::AtomicU64::new(0));
    if let Err(e) = tcp_cycles(&mut f, to, &intruders_closed) {
        f.tally.errors.push(e);
    }
    f.tally.intruders_closed = intruders_closed.load(Ordering::Relaxed);
    f.finish()
}

fn tcp_cycles(
    f: &mut Feeder,
    to: SocketAddr,
    intruders_closed: &Arc<std::sync::atomic::AtomicU64>,
) -> Io<()> {
    let mut idle: Option<TcpStream> = None;
    while !f.stopping() {
        f.tally.cycles += 1;
        // The box comes back: it replaces the idle peer holding the slot.
        let s = connect(to)?;
        f.link = Some(Link::Tcp(s));
        f.tally.sessions += 1;
        f.index = 0;
        f.run_for(3.0, 1.0)?;
        if let Some(mut old) = idle.take() {
            match wait_closed(&mut old, Duration::from_secs(5)) {
                Some(_) => f.tally.idle_replaced += 1,
                None => f.tally.errors.push("the idle peer was not replaced".into()),
            }
        }
        for (bytes, kind) in [
            (bad_frame(63, 8, RATE_HZ, false)?, 0),
            (bad_frame(CHANNELS as u16, 8, 1000.0, false)?, 1),
            (bad_frame(CHANNELS as u16, 65_536, RATE_HZ, false)?, 2),
        ] {
            f.write(&bytes, "bad header")?;
            f.tally.bad_bytes += bytes.len() as u64;
            match kind {
                0 => f.tally.bad_channel_headers += 1,
                1 => f.tally.bad_rate_headers += 1,
                _ => f.tally.too_large += 1,
            }
        }
        // An intruder while the box is talking: refused.
        f.tally.intruders += 1;
        let closed = intruders_closed.clone();
        let intruder = std::thread::spawn(move || {
            if let Ok(mut s) = TcpStream::connect_timeout(&to, IO_TIMEOUT) {
                if wait_closed(&mut s, Duration::from_secs(5)).is_some() {
                    closed.fetch_add(1, Ordering::Relaxed);
                }
            }
        });
        f.run_for(3.0, 1.0)?;
        let _ = intruder.join();
        f.breaks()?;
        // The box closes cleanly: everything it wrote is read before the
        // daemon closes its side.
        if let Some(Link::Tcp(mut s)) = f.link.take() {
            s.shutdown(Shutdown::Write)
                .map_err(|e| format!("tcp shutdown: {e}"))?;
            if wait_closed(&mut s, IO_TIMEOUT).is_none() {
                f.tally
                    .errors
                    .push("the daemon did not close a finished session".into());
            }
        }
        // A peer that connects and sends nothing: closed at the idle timeout.
        let mut quiet = connect(to)?;
        f.tally.idle_peers += 1;
        let limit = Duration::from_secs_f64(IDLE_TIMEOUT_S + 5.0);
        match wait_closed(&mut quiet, limit) {
            Some(held) => {
                f.tally.idle_timed_out += 1;
                f.tally.idle_held_max_s = f.tally.idle_held_max_s.max(held.as_secs_f64());
            }
            None => f
                .tally
                .errors
                .push(format!("an idle peer was still held after {limit:?}")),
        }
        if f.stopping() {
            break;
        }
        // Another one takes the free slot; the box comes back after
        // `replace_after_silent_s` (and well before the idle timeout).
        idle = Some(connect(to)?);
        f.tally.idle_peers += 1;
        std::thread::sleep(Duration::from_secs_f64(
            (REPLACE_AFTER_SILENT_S + IDLE_TIMEOUT_S) / 2.0,
        ));
    }
    Ok(())
}
