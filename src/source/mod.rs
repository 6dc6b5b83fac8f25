//! Sources: tokio tasks that produce samples and push them, scaled to
//! engineering units, into the per-channel rings.
//!
//! Every source kind hands its decoded data to a [`SourceOutputs`], which
//! de-interleaves a frame, applies each channel's `scale`/`offset` and
//! writes the runs into the rings. So whatever the transport, the DSP sees
//! the same samples.
//!
//! - `sim`: the built-in P2 pump scenario, paced in real time
//! - `net`: `tcp-connect`, `tcp-listen`, `udp` readers (BWF1, lines, raw)
//! - `serial`: serial lines via tokio-serial
//! - `framed`: frame checks, sequence tracking and counting for all of them

pub mod framed;
pub mod net;
pub mod serial;
pub mod sim;

use std::sync::atomic::Ordering;
use std::sync::Arc;
use std::thread::Thread;

use tokio::sync::watch;
use tokio::task::JoinHandle;

use crate::config::{Config, SourceKind, SourceSpec};
use crate::counters::GapReason;
use crate::ring::RingWriter;
use crate::snapshot::{unix_now_ns, SourceShared};

/// A raw sample as it arrives: integer counts or floating-point values.
pub trait RawSample: Copy {
    fn to_f64(self) -> f64;
}

impl RawSample for i16 {
    fn to_f64(self) -> f64 {
        self as f64
    }
}
impl RawSample for i32 {
    fn to_f64(self) -> f64 {
        self as f64
    }
}
impl RawSample for f32 {
    fn to_f64(self) -> f64 {
        self as f64
    }
}
impl RawSample for f64 {
    fn to_f64(self) -> f64 {
        self
    }
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
}

impl SourceOutputs {
    pub fn new(width: usize) -> SourceOutputs {
        SourceOutputs {
            inputs: (0..width).map(|_| None).collect(),
            scratch: Vec::new(),
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
        let width = self.inputs.len();
        if width == 0 {
            return;
        }
        let instants = raw.len() / width;
        self.scratch.resize(instants, 0.0);
        for (c, slot) in self.inputs.iter_mut().enumerate() {
            let Some(input) = slot else { continue };
            let (scale, offset) = (input.scale, input.offset);
            for (dst, src) in self.scratch.iter_mut().zip(raw[c..].iter().step_by(width)) {
                *dst = (src.to_f64() * scale + offset) as f32;
            }
            input
                .writer
                .write(first_sample, timestamp_ns, &self.scratch);
        }
    }

    /// Marks a break in every channel of this source.
    pub fn mark_discontinuity(&mut self, reason: GapReason) {
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

/// Starts one task per source. Each runs until `shutdown` turns true.
pub fn spawn_all(
    config: &Config,
    mut outputs: Vec<SourceOutputs>,
    shared: &[Arc<SourceShared>],
    shutdown: watch::Receiver<bool>,
) -> Vec<JoinHandle<()>> {
    let mut tasks = Vec::new();
    for (i, spec) in config.sources.iter().enumerate().rev() {
        let out = outputs.pop().unwrap_or_else(|| SourceOutputs::new(0));
        let state = shared[i].clone();
        let stop = shutdown.clone();
        let spec: SourceSpec = spec.clone();
        tasks.push(match spec.kind {
            SourceKind::Sim { seed, speed } => {
                tokio::spawn(sim::run(spec.sample_rate_hz, seed, speed, out, state, stop))
            }
            _ => tokio::spawn(net::run(spec, out, state, stop)),
        });
    }
    tasks
}

/// Records that a source delivered a good frame or batch now. (Bytes are
/// counted where they are read, good or bad.)
pub(crate) fn note_frame(state: &SourceShared) {
    state.frames.fetch_add(1, Ordering::Relaxed);
    state
        .last_frame_unix_ns
        .store(unix_now_ns(), Ordering::Relaxed);
}
