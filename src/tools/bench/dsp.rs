//! The `dsp` phase: rings and channel DSPs (window, FFT, power, averaging,
//! bands, overall levels, snapshot publish, and with alarms the sensor
//! checks and limits), assembled by `pipeline::Builder` exactly as the
//! daemon's are, but driven by hand on one thread as a worker drives them.
//! The memory and http phases run the same rig.

use std::sync::atomic::{AtomicBool, AtomicU64, Ordering};
use std::sync::Arc;
use std::time::{Duration, Instant};

use crate::config::Config;
use crate::pipeline::state::ChannelShared;
use crate::pipeline::worker::ChannelDsp;
use crate::pipeline::{self, AlarmMode, Builder, Inline, RingSize};
use crate::ring::RingWriter;

use super::fft::{side_by_side, FftBench};
use super::input::signal_offset;
use super::{BenchError, FS};

/// The alarms a rig's channels run: none (the spectrum step alone), or
/// health checks and limits in memory, as the daemon runs them without
/// touching the disk.
pub(crate) fn alarm_mode(alarms: bool) -> AlarmMode {
    if alarms {
        AlarmMode::InMemory
    } else {
        AlarmMode::Off
    }
}

/// The daemon's pipeline for `config` (rings of `[dsp] ring_seconds`,
/// gathering on), with or without alarms, not started.
pub(crate) fn inline_pipeline(config: &Config, alarms: bool) -> Result<Inline, BenchError> {
    Ok(Builder::new(config)
        .alarms(alarm_mode(alarms))
        .assemble()
        .map_err(|e| BenchError::Config(e.to_string()))?
        .inline())
}

/// Each channel's ring writer, in config order (the channels' DSPs stay in
/// `pipeline.channels`).
pub(crate) fn take_writers(pipeline: &mut Inline) -> Vec<RingWriter> {
    pipeline
        .take_inputs()
        .into_iter()
        .map(|input| input.writer)
        .collect()
}

/// Samples the channels dropped (a full ring): a rig that drops has
/// measured nothing.
pub(crate) fn lost(dsps: &[ChannelDsp]) -> u64 {
    dsps.iter()
        .map(|d| d.shared().counters.dropped_total())
        .sum()
}

/// Rings and channel DSPs driven by hand, as a worker drives them.
pub(crate) struct DspRig {
    pub(crate) dsps: Vec<ChannelDsp>,
    writers: Vec<RingWriter>,
    signal: Arc<Vec<f32>>,
    next: u64,
    /// Samples per channel per round.
    pub(crate) chunk: usize,
    /// Untimed rounds still to run before the first measurement: enough
    /// for every ring to wrap once, so that its pages are touched (as a
    /// daemon's are after its first seconds) and not counted as work.
    warm_up: usize,
    /// The rest of the pipeline the channels came from (its history writer
    /// among it), kept until the channels are gone.
    rest: Option<Inline>,
}

impl DspRig {
    /// Every channel of `config` as the daemon assembles it, with its
    /// alarms or without (the spectrum step alone: window, FFT, power,
    /// average, bands, overall levels, publish).
    pub(crate) fn build(
        config: &Config,
        signal: Arc<Vec<f32>>,
        alarms: bool,
    ) -> Result<DspRig, BenchError> {
        let mut pipeline = inline_pipeline(config, alarms)?;
        let writers = take_writers(&mut pipeline);
        let dsps = std::mem::take(&mut pipeline.channels);
        let mut rig = DspRig::from_parts(config, dsps, writers, signal)?;
        rig.rest = Some(pipeline);
        Ok(rig)
    }

    /// The history the channels write (a config with `[history]`).
    pub(crate) fn history(&self) -> Option<Arc<crate::history::HistoryShared>> {
        self.rest.as_ref().and_then(|p| p.state.history.clone())
    }

    /// A rig over some of a pipeline's channels and their ring writers (the
    /// http phase splits one pipeline over two threads).
    pub(crate) fn from_parts(
        config: &Config,
        dsps: Vec<ChannelDsp>,
        writers: Vec<RingWriter>,
        signal: Arc<Vec<f32>>,
    ) -> Result<DspRig, BenchError> {
        let Some(first) = dsps.first() else {
            return Err(BenchError::Config("a rig without channels".into()));
        };
        let spec = &first.shared().spec;
        let capacity = RingSize::FromConfig.capacity(config, spec);
        Ok(DspRig {
            // One hop per channel per round: every channel computes one
            // block per round, as a worker fed in real time does.
            chunk: spec.hop.min(capacity),
            warm_up: capacity.div_ceil(spec.hop.max(1)) + 2,
            dsps,
            writers,
            signal,
            next: 0,
            rest: None,
        })
    }

    /// The channels' published state.
    pub(crate) fn shared(&self) -> impl Iterator<Item = &Arc<ChannelShared>> {
        self.dsps.iter().map(ChannelDsp::shared)
    }

    pub(crate) fn write_round(&mut self) {
        let len = self.signal.len();
        let ts = 1_000_000_000 + (self.next as f64 * 1e9 / FS) as u64;
        for (c, w) in self.writers.iter_mut().enumerate() {
            let at = signal_offset(c, self.next, len, self.chunk);
            w.write(self.next, ts, &self.signal[at..at + self.chunk]);
        }
        self.next += self.chunk as u64;
    }

    /// One round: write a chunk into every ring (not timed), then drain the
    /// DSPs (timed). Returns samples processed and the timed part.
    pub(crate) fn round(&mut self) -> (u64, Duration) {
        self.write_round();
        let t = Instant::now();
        pipeline::drain(&mut self.dsps);
        ((self.chunk * self.dsps.len()) as u64, t.elapsed())
    }

    /// Input samples per second over at least `min` of timed work, after
    /// warm-up rounds, side by side with the FFT: (rate, FFT rate).
    pub(crate) fn rate(
        &mut self,
        fft: &mut FftBench<f32>,
        min: Duration,
    ) -> Result<(f64, f64), BenchError> {
        for _ in 0..std::mem::take(&mut self.warm_up).max(4) {
            self.round();
        }
        let hop = self.dsps[0].shared().spec.hop;
        let r = side_by_side(fft, hop, min, || Ok(self.round()))?;
        let dropped = lost(&self.dsps);
        if dropped > 0 {
            return Err(BenchError::Lost(format!(
                "dsp rig dropped {dropped} samples"
            )));
        }
        Ok(r)
    }

    /// Writes and drains rounds without timing until `stop`, counting
    /// samples into `done`.
    pub(crate) fn run_until(&mut self, stop: &AtomicBool, done: &AtomicU64) {
        while !stop.load(Ordering::Relaxed) {
            self.write_round();
            pipeline::drain(&mut self.dsps);
            done.fetch_add((self.chunk * self.dsps.len()) as u64, Ordering::Relaxed);
        }
    }
}
