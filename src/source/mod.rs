//! Sources: tokio tasks that produce samples and push them, scaled to
//! engineering units, into the per-channel rings.
//!
//! This module owns the start of every source ([`spawn`]: one arm per
//! source kind, each handed one [`SourceContext`]) and the last step of
//! every source: a [`SourceOutputs`] de-interleaves a frame, applies each
//! channel's `scale`/`offset` and writes the runs into the rings. So
//! whatever the transport, the DSP sees the same samples. Reading samples
//! out of wire bytes is the frame layer's (`frame::wire`).
//!
//! - `sim`: the built-in P2 pump scenario, paced in real time
//! - `tcp`: `tcp-connect` and `tcp-listen` readers (BWF1, lines, raw)
//! - `udp`: the `udp` reader (one BWF1 frame per datagram)
//! - `serial`: serial lines via tokio-serial
//! - `framed`: frame checks, sequence tracking and counting for all the
//!   readers
//! - `sequence`: the sequence rules (gap, late, restart, wrap)

pub mod framed;
pub mod sequence;
pub mod serial;
pub mod sim;
pub mod tcp;
pub mod udp;

use std::sync::atomic::Ordering;
use std::sync::Arc;
use std::thread::Thread;

use tokio::task::JoinHandle;

use crate::clock::unix_now_ns;
use crate::config::{Config, SourceKind, SourceSpec};
use crate::counters::GapReason;
use crate::counters::SourceCounters;
use crate::frame::wire::{Interleaved, RawSample};
use crate::ring::RingWriter;
use crate::shutdown::{Shutdown, ShutdownSignal};

/// Channels de-interleaved together: one tile reads `TILE_CHANNELS`
/// neighbouring samples of each instant (a cache line or less of wire
/// bytes) instead of one sample per line per channel pass.
const TILE_CHANNELS: usize = 16;
/// Instants per tile: the tile's wire rows (this many cache lines or
/// fewer) stay in L1 while its channels are read one after the other.
const TILE_INSTANTS: usize = 256;

/// True when `x * scale + offset`, computed in f64 and rounded to f32, is
/// finite for every `|x| <= max_abs`.
///
/// Proof: rounding to nearest is monotone and symmetric, so for
/// `|x| <= m` (m exact in f64), `|fl(x*s)| = fl(|x|*|s|) <= fl(m*|s|)`, and
/// `|fl(a + o)| <= fl(|a| + |o|) <= fl(fl(m*|s|) + |o|) = B`, which is what
/// this computes (no fused multiply-add: Rust does not contract). With
/// finite `s` and `o` and `B <= f32::MAX`, no step overflows, none is
/// `inf - inf` or `0 * inf`, so the f64 value is finite with magnitude at
/// most `f32::MAX`, and rounding it to f32 stays within `f32::MAX`: finite.
fn scaled_is_finite(max_abs: f64, scale: f64, offset: f64) -> bool {
    let bound = max_abs * scale.abs() + offset.abs();
    scale.is_finite() && offset.is_finite() && bound <= f64::from(f32::MAX)
}
/// One configured channel fed by a source.
pub struct ChannelInput {
    pub writer: RingWriter,
    pub scale: f64,
    pub offset: f64,
    pub waker: Thread,
}

/// The rings a source writes into, by the source's channel index.
pub struct SourceOutputs {
    inputs: Vec<Option<ChannelInput>>,
    scratch: Vec<f32>,
    /// Fan-out changes from a config reload, and where the inputs go back
    /// when the source stops (None: a fixed fan-out, as in tests).
    port: Option<Arc<OutputPort>>,
}

/// A running source's fan-out, changed from outside while it runs (a
/// config reload adds or removes channels of the source without
/// restarting it). The source applies queued changes before its next
/// frame, so the other channels miss no sample; when its task ends, its
/// inputs (ring writers) are handed back here, so a restarted source
/// writes on into the same rings.
#[derive(Default)]
pub struct OutputPort {
    pending: std::sync::atomic::AtomicBool,
    changes: std::sync::Mutex<Vec<(usize, Option<ChannelInput>)>>,
    returned: std::sync::Mutex<Option<Vec<Option<ChannelInput>>>>,
}

impl OutputPort {
    fn lock<T>(m: &std::sync::Mutex<T>) -> std::sync::MutexGuard<'_, T> {
        m.lock().unwrap_or_else(std::sync::PoisonError::into_inner)
    }

    /// Queues a change of the source's channel `index`: `Some` attaches an
    /// input (replacing any), `None` detaches it. Applied before the next
    /// frame the source writes.
    pub fn change(&self, index: usize, input: Option<ChannelInput>) {
        Self::lock(&self.changes).push((index, input));
        self.pending.store(true, Ordering::Release);
    }

    /// Whether changes wait for the source's next frame.
    pub fn has_pending(&self) -> bool {
        self.pending.load(Ordering::Acquire)
    }

    /// The inputs the stopped source handed back (once), with the changes
    /// it had not applied yet applied.
    pub fn take_returned(&self) -> Option<Vec<Option<ChannelInput>>> {
        let mut inputs = Self::lock(&self.returned).take()?;
        for (i, input) in Self::lock(&self.changes).drain(..) {
            if let Some(slot) = inputs.get_mut(i) {
                *slot = input;
            }
        }
        Some(inputs)
    }
}

impl SourceOutputs {
    pub fn new(width: usize) -> SourceOutputs {
        SourceOutputs {
            inputs: (0..width).map(|_| None).collect(),
            scratch: Vec::new(),
            port: None,
        }
    }

    /// Outputs whose fan-out can change while the source runs, over
    /// `inputs` (by channel index); the port to change them through.
    pub fn with_port(inputs: Vec<Option<ChannelInput>>) -> (SourceOutputs, Arc<OutputPort>) {
        let port = Arc::new(OutputPort::default());
        let out = SourceOutputs {
            inputs,
            scratch: Vec::new(),
            port: Some(port.clone()),
        };
        (out, port)
    }

    /// Applies the fan-out changes queued on the port (one atomic load
    /// when there are none).
    #[inline]
    fn apply_changes(&mut self) {
        let Some(port) = &self.port else { return };
        if !port.pending.load(Ordering::Acquire) {
            return;
        }
        let mut q = OutputPort::lock(&port.changes);
        port.pending.store(false, Ordering::Release);
        for (i, input) in q.drain(..) {
            if let Some(slot) = self.inputs.get_mut(i) {
                *slot = input;
            }
        }
    }

    pub fn attach(&mut self, index: usize, input: ChannelInput) {
        if let Some(slot) = self.inputs.get_mut(index) {
            *slot = Some(input);
        }
    }

    /// Channels in one instant of this source's frames.
    pub fn width(&self) -> usize {
        self.inputs.len()
    }

    /// Writes one frame of `raw.len() / width` instants, interleaved by
    /// instant, whose first instant has stream index `first_sample`.
    pub fn write_interleaved<T: RawSample>(
        &mut self,
        first_sample: u64,
        timestamp_ns: u64,
        raw: &[T],
    ) {
        self.write_frame(first_sample, timestamp_ns, raw);
    }

    /// Writes one frame of interleaved samples (a typed slice or wire
    /// bytes) into the rings: de-interleaved in tiles of
    /// `TILE_CHANNELS` channels x `TILE_INSTANTS` instants, each sample
    /// scaled as `(x as f64 * scale + offset) as f32` whatever the source,
    /// so live, replayed and datagram frames give the same bits. A frame of
    /// more than `TILE_INSTANTS` instants reaches each ring as consecutive
    /// runs (no gap between them), the later ones stamped as the ring
    /// stamps the parts of a split run.
    pub fn write_frame<S: Interleaved + ?Sized>(
        &mut self,
        first_sample: u64,
        timestamp_ns: u64,
        src: &S,
    ) {
        self.apply_changes();
        let width = self.inputs.len();
        if width == 0 {
            return;
        }
        let instants = src.count() / width;
        if instants == 0 {
            return;
        }
        // Allocated once; a steady stream never resizes it again.
        if self.scratch.len() < TILE_INSTANTS {
            self.scratch.resize(TILE_INSTANTS, 0.0);
        }
        for c0 in (0..width).step_by(TILE_CHANNELS) {
            let k = TILE_CHANNELS.min(width - c0);
            for t0 in (0..instants).step_by(TILE_INSTANTS) {
                let n = TILE_INSTANTS.min(instants - t0);
                // No overflow: the sequence rules pass on no frame whose
                // instants run past u64::MAX.
                let first = first_sample + t0 as u64;
                // The tile's rows (n instants x k samples) are read from
                // memory by its first channel and from L1 by the others.
                for (j, slot) in self.inputs[c0..c0 + k].iter_mut().enumerate() {
                    let Some(input) = slot else { continue };
                    let run = &mut self.scratch[..n];
                    let start = (t0 * width) + c0 + j;
                    src.scale_strided(start, width, input.scale, input.offset, run);
                    let ts = input.writer.stamp(timestamp_ns, t0 as u64);
                    if S::MAX_ABS.is_some_and(|m| scaled_is_finite(m, input.scale, input.offset)) {
                        input.writer.write_finite(first, ts, run);
                    } else {
                        input.writer.write(first, ts, run);
                    }
                }
            }
        }
    }

    /// Counts `n` instants of every channel of this source as lost for
    /// `reason` before they reached the rings (a sequence gap, frames
    /// refused at a restart).
    pub fn add_dropped(&self, reason: GapReason, n: u64) {
        if n == 0 {
            return;
        }
        for input in self.inputs.iter().flatten() {
            input.writer.add_dropped(reason, n);
        }
    }

    /// Marks a break in every channel of this source.
    pub fn mark_discontinuity(&mut self, reason: GapReason) {
        self.apply_changes();
        for input in self.inputs.iter_mut().flatten() {
            input.writer.mark_discontinuity(reason);
        }
    }

    /// Wakes the DSP workers of this source's channels.
    pub fn wake(&self) {
        for input in self.inputs.iter().flatten() {
            input.waker.unpark();
        }
    }
}

impl Drop for SourceOutputs {
    /// Hands the inputs back to the port (a source stopped for a restart).
    fn drop(&mut self) {
        if let Some(port) = self.port.take() {
            *OutputPort::lock(&port.returned) = Some(std::mem::take(&mut self.inputs));
        }
    }
}

/// Everything one source task is given: its config, the rings it writes,
/// its counters, and when to stop.
pub struct SourceContext {
    pub spec: SourceSpec,
    pub outputs: SourceOutputs,
    pub counters: Arc<SourceCounters>,
    pub shutdown: Shutdown,
}

impl SourceContext {
    /// A context for a test: counters of its own (named after the spec),
    /// and the signal that stops the source.
    pub fn new_test(spec: SourceSpec, outputs: SourceOutputs) -> (SourceContext, ShutdownSignal) {
        let signal = ShutdownSignal::new();
        let counters = Arc::new(SourceCounters::new(&spec.name, spec.kind.as_str()));
        let ctx = SourceContext {
            spec,
            outputs,
            counters,
            shutdown: signal.subscribe(),
        };
        (ctx, signal)
    }
}

/// Starts one source's task: the one place where a source kind picks its
/// reader. It runs until `ctx.shutdown` says stop.
pub fn spawn(ctx: SourceContext) -> JoinHandle<()> {
    match ctx.spec.kind {
        SourceKind::Sim { .. } => tokio::spawn(sim::run(ctx)),
        SourceKind::TcpConnect { .. } => tokio::spawn(tcp::run_connect(ctx)),
        SourceKind::TcpListen { .. } => tokio::spawn(tcp::run_listen(ctx)),
        SourceKind::Udp { .. } => tokio::spawn(udp::run(ctx)),
        SourceKind::Serial { .. } => tokio::spawn(serial::run(ctx)),
    }
}

/// Starts one task per source of `config`, the `i`th writing `outputs[i]`
/// and counting in `shared[i]`. Each runs until `shutdown` says stop.
pub fn spawn_all(
    config: &Config,
    mut outputs: Vec<SourceOutputs>,
    shared: &[Arc<SourceCounters>],
    shutdown: Shutdown,
) -> Vec<JoinHandle<()>> {
    let mut tasks = Vec::new();
    for (i, spec) in config.sources.iter().enumerate().rev() {
        let outputs = outputs.pop().unwrap_or_else(|| SourceOutputs::new(0));
        tasks.push(spawn(SourceContext {
            spec: spec.clone(),
            outputs,
            counters: shared[i].clone(),
            shutdown: shutdown.clone(),
        }));
    }
    tasks
}

/// Records that a source delivered a good frame or batch now. (Bytes are
/// counted where they are read, good or bad.)
pub(crate) fn note_frame(state: &SourceCounters) {
    state.frames.fetch_add(1, Ordering::Relaxed);
    state
        .last_frame_unix_ns
        .store(unix_now_ns(), Ordering::Relaxed);
}

#[cfg(test)]
#[allow(clippy::unwrap_used)] // tests may unwrap: a panic is a failed test
mod tests {
    use super::*;
    use crate::counters::ChannelCounters;
    use crate::frame::wire::WireI16;
    use crate::ring::{channel_ring, ReadEvent, RingReader};

    fn outputs(width: usize, attach: &[usize]) -> (SourceOutputs, Vec<(usize, RingReader)>) {
        let mut out = SourceOutputs::new(width);
        let mut readers = Vec::new();
        for &c in attach {
            let counters = Arc::new(ChannelCounters::default());
            let (w, r) = channel_ring(1 << 16, 1000.0, counters);
            out.attach(
                c,
                ChannelInput {
                    writer: w,
                    scale: 0.5 + c as f64 * 1e-3,
                    offset: c as f64 - 3.0,
                    waker: std::thread::current(),
                },
            );
            readers.push((c, r));
        }
        (out, readers)
    }

    fn samples_of(r: &mut RingReader) -> Vec<f32> {
        let mut buf = vec![0.0; 4096];
        let mut got = Vec::new();
        loop {
            match r.read(&mut buf) {
                ReadEvent::Samples(n) => got.extend_from_slice(&buf[..n]),
                ReadEvent::Mark(_) => {}
                ReadEvent::Empty => return got,
            }
        }
    }

    /// Tiles must not change what each channel receives: a width that is
    /// not a multiple of the tile, a frame longer than a tile, gaps in the
    /// attached channels, and wire bytes against the typed slice. The
    /// expected value is the per-sample formula the source applies.
    #[test]
    fn tiles_give_each_channel_its_own_samples() {
        let (width, instants) = (37, 3 * TILE_INSTANTS + 11);
        let attach = [0, 5, 16, 17, 36];
        let raw: Vec<i16> = (0..width * instants)
            .map(|i| ((i * 7919) % 65536) as i32 as i16)
            .collect();
        let bytes: Vec<u8> = raw.iter().flat_map(|x| x.to_le_bytes()).collect();
        for wire in [false, true] {
            let (mut out, mut readers) = outputs(width, &attach);
            if wire {
                out.write_frame(0, 0, &WireI16(&bytes));
            } else {
                out.write_interleaved(0, 0, &raw);
            }
            for (c, r) in &mut readers {
                let (s, o) = (0.5 + *c as f64 * 1e-3, *c as f64 - 3.0);
                let want: Vec<f32> = (0..instants)
                    .map(|t| (f64::from(raw[t * width + *c]) * s + o) as f32)
                    .collect();
                let got = samples_of(r);
                assert_eq!(got.len(), instants, "channel {c}");
                assert!(
                    got.iter()
                        .zip(&want)
                        .all(|(a, b)| a.to_bits() == b.to_bits()),
                    "channel {c} (wire {wire})"
                );
            }
        }
    }

    #[test]
    fn a_nan_in_a_float_tile_is_still_dropped_and_counted() {
        let counters = Arc::new(ChannelCounters::default());
        let (w, mut r) = channel_ring(4096, 1000.0, counters.clone());
        let mut out = SourceOutputs::new(2);
        out.attach(
            1,
            ChannelInput {
                writer: w,
                scale: 1.0,
                offset: 0.0,
                waker: std::thread::current(),
            },
        );
        let mut raw = vec![1.0f32; 2 * 300];
        raw[2 * 280 + 1] = f32::NAN;
        raw[2 * 10] = f32::NAN; // channel 0: not attached, not counted here
        out.write_interleaved(0, 0, &raw);
        assert_eq!(samples_of(&mut r).len(), 299);
        assert_eq!(counters.dropped(GapReason::NonFinite), 1);
    }

    #[test]
    fn finiteness_bound() {
        // i24 counts at 6e-6 g/count: finite. A scale that takes a count
        // past f32::MAX (about 3.4e38) must keep the check.
        assert!(scaled_is_finite(8_388_608.0, 6e-6, 0.0));
        assert!(!scaled_is_finite(8_388_608.0, 1e32, 0.0));
        assert!(!scaled_is_finite(32768.0, 1.0, f64::INFINITY));
    }
}
