//! The `path` phase: the whole path from BWF1 frames in memory, one
//! thread: stream decoder → sink (checks, scaling) → rings → DSP, bands,
//! alarms, publish. The rings, DSP and alarms are `pipeline::Builder`'s,
//! fed through the source's own outputs (`Inline::source_outputs`).

use std::sync::Arc;
use std::time::{Duration, Instant};

use crate::config::{Framing, StreamSpec};
use crate::counters::SourceCounters;
use crate::frame::bwf1::{self, encode_into, Header, DEFAULT_MAX_FRAME_BYTES};
use crate::frame::{SampleFormat, SampleSlice};
use crate::pipeline::worker::ChannelDsp;
use crate::pipeline::{self, RingSize};
use crate::source::framed::{FrameSink, StreamFraming};

use super::dsp::{inline_pipeline, lost};
use super::fft::{side_by_side, FftBench};
use super::input::{config_text, parse_config, signal_offset, UNUSED_SOURCE};
use super::{BenchError, FS, G_PER_COUNT};

/// Instants per BWF1 frame in the `path` phase (`send`'s default).
const FRAME_SAMPLES: usize = 256;
/// Bytes handed to the stream decoder at a time: a socket read's worth.
const READ_BYTES: usize = 64 * 1024;

/// The channels' `scale` for frames in `format`: float frames carry g,
/// integer frames the converter's counts (i16: its top 16 bits).
pub(crate) fn format_scale(format: SampleFormat) -> f64 {
    match format {
        SampleFormat::F32 | SampleFormat::F64 => 1.0,
        SampleFormat::I16 => G_PER_COUNT * 256.0,
        SampleFormat::I24 | SampleFormat::I32 => G_PER_COUNT,
    }
}

/// BWF1 bytes in memory → stream decoder → sink (checks, scaling) → rings →
/// DSP, one thread.
pub(crate) struct PathRig {
    source: Arc<SourceCounters>,
    dsps: Vec<ChannelDsp>,
    sink: FrameSink,
    framing: StreamFraming,
    /// One round of frames; restamped with new sequence numbers each round.
    bytes: Vec<u8>,
    frame_bytes: usize,
    next: u64,
    instants: usize,
    channels: usize,
    /// As the dsp rig's: rounds that wrap every ring once, untimed.
    warm_up: usize,
}

/// Encodes `instants` instants of `channels` channels as BWF1 frames of
/// `frame_samples` instants, in `format` (counts for integer formats, g
/// for f32), starting at stream index 0.
pub(crate) fn encode_frames(
    format: SampleFormat,
    channels: usize,
    instants: usize,
    frame_samples: usize,
    signal: &[f32],
    fs: f64,
) -> (Vec<u8>, usize) {
    let mut out = Vec::new();
    let mut frame_bytes = 0;
    let len = signal.len();
    let mut counts: Vec<i32> = Vec::new();
    let mut f32s: Vec<f32> = Vec::new();
    let mut i16s: Vec<i16> = Vec::new();
    for f in 0..instants / frame_samples {
        counts.clear();
        f32s.clear();
        i16s.clear();
        for i in 0..frame_samples {
            let t = (f * frame_samples + i) as u64;
            for c in 0..channels {
                let g = signal[(signal_offset(c, 0, len, 1) + t as usize) % len];
                match format {
                    SampleFormat::F32 | SampleFormat::F64 => f32s.push(g),
                    SampleFormat::I16 => {
                        i16s.push((((g as f64 / G_PER_COUNT).round() as i32) >> 8) as i16)
                    }
                    SampleFormat::I24 | SampleFormat::I32 => {
                        counts.push((g as f64 / G_PER_COUNT).round() as i32)
                    }
                }
            }
        }
        let h = Header::new(
            format,
            channels as u16,
            frame_samples as u32,
            (f * frame_samples) as u64,
            1,
            fs,
        );
        let slice = match format {
            SampleFormat::F32 | SampleFormat::F64 => SampleSlice::F32(&f32s),
            SampleFormat::I16 => SampleSlice::I16(&i16s),
            SampleFormat::I24 | SampleFormat::I32 => SampleSlice::I32(&counts),
        };
        let before = out.len();
        let r = encode_into(&h, slice, &mut out);
        debug_assert!(r.is_ok(), "bench frames are valid: {r:?}");
        frame_bytes = out.len() - before;
    }
    (out, frame_bytes)
}

/// Gives one encoded frame a new `first_sample`, the timestamp of that
/// sample (1 s after the epoch at index 0) and the rate `fs`, with its CRC.
pub(crate) fn patch_frame(frame: &mut [u8], first_sample: u64, fs: f64) -> Result<(), BenchError> {
    let ts = 1_000_000_000 + (first_sample as f64 * 1e9 / fs) as u64;
    bwf1::restamp(frame, first_sample, ts, fs)
        .map(|_| ())
        .map_err(|e| BenchError::Lost(format!("restamp a bench frame: {e}")))
}

impl PathRig {
    /// `channels` channels of block `n` fed with BWF1 frames in `format`,
    /// their alarms on, as the daemon assembles them.
    pub(crate) fn new(
        channels: usize,
        n: usize,
        format: SampleFormat,
        signal: &[f32],
    ) -> Result<PathRig, BenchError> {
        let config = parse_config(&config_text(
            channels,
            n,
            FS,
            UNUSED_SOURCE,
            4,
            format_scale(format),
        ))?;
        let mut pipeline = inline_pipeline(&config, true)?;
        let source_name = &config.sources[0].name;
        let outputs = pipeline
            .source_outputs(source_name)
            .map_err(|e| BenchError::Config(e.to_string()))?;
        let source = pipeline
            .state
            .source(source_name)
            .cloned()
            .ok_or_else(|| BenchError::Config(format!("no source {source_name:?}")))?;
        let dsps = std::mem::take(&mut pipeline.channels);
        let spec = &config.channels[0];
        // About one hop per round, as in the dsp phase.
        let instants = spec.hop.div_ceil(FRAME_SAMPLES) * FRAME_SAMPLES;
        let (bytes, frame_bytes) =
            encode_frames(format, channels, instants, FRAME_SAMPLES, signal, FS);
        let stream = StreamSpec {
            framing: Framing::Bwf1,
            max_frame_bytes: DEFAULT_MAX_FRAME_BYTES,
        };
        let framing = StreamFraming::new(&stream, channels).map_err(BenchError::Config)?;
        let capacity = RingSize::FromConfig.capacity(&config, spec);
        Ok(PathRig {
            sink: FrameSink::new(outputs, source.clone(), FS),
            source,
            dsps,
            framing,
            bytes,
            frame_bytes,
            next: 0,
            warm_up: capacity.div_ceil(instants.max(1)) + 2,
            instants,
            channels,
        })
    }

    /// One round: restamp the frames (not timed), then decode them, feed
    /// the sink and drain the DSPs (timed). Returns samples processed and
    /// the timed part.
    pub(crate) fn round(&mut self) -> Result<(u64, Duration), BenchError> {
        for (i, frame) in self.bytes.chunks_exact_mut(self.frame_bytes).enumerate() {
            patch_frame(frame, self.next + (i * FRAME_SAMPLES) as u64, FS)?;
        }
        self.next += self.instants as u64;
        let t = Instant::now();
        for chunk in self.bytes.chunks(READ_BYTES) {
            self.framing.feed(chunk, &mut self.sink);
        }
        pipeline::drain(&mut self.dsps);
        Ok(((self.instants * self.channels) as u64, t.elapsed()))
    }

    pub(crate) fn rate(
        &mut self,
        fft: &mut FftBench<f32>,
        min: Duration,
    ) -> Result<(f64, f64), BenchError> {
        for _ in 0..std::mem::take(&mut self.warm_up).max(4) {
            self.round()?;
        }
        let hop = self.dsps[0].shared().spec.hop;
        let r = side_by_side(fft, hop, min, || self.round())?;
        let dropped = lost(&self.dsps);
        let rejected: u64 = self.source.rejected().iter().map(|(_, n)| n).sum();
        let late = SourceCounters::get(&self.source.frames_late);
        let missing = SourceCounters::get(&self.source.samples_missing);
        if dropped + rejected + late + missing > 0 {
            return Err(BenchError::Lost(format!(
                "path rig lost data: dropped {dropped}, rejected {rejected}, late {late}, missing {missing}"
            )));
        }
        Ok(r)
    }
}

#[cfg(test)]
mod tests {
    use std::sync::atomic::Ordering;

    use super::super::input::test_signal;
    use super::*;

    #[test]
    fn patched_frames_still_decode_in_sequence() {
        // The bench rewrites sequence numbers in place; the real decoder
        // must accept the result (CRC recomputed) and see no gap.
        let signal = test_signal(4096, FS);
        let (mut bytes, fb) = encode_frames(SampleFormat::I24, 3, 512, 256, &signal, FS);
        for (i, f) in bytes.chunks_exact_mut(fb).enumerate() {
            patch_frame(f, 1000 + 256 * i as u64, FS).expect("restamp");
        }
        let mut d = crate::frame::bwf1::StreamDecoder::new();
        d.push(&bytes);
        let a = d.next_frame().expect("ok").expect("frame");
        let b = d.next_frame().expect("ok").expect("frame");
        assert_eq!(a.header.first_sample, 1000);
        assert_eq!(b.header.first_sample, 1256);
        assert_eq!(d.stats().rejected_total(), 0);
    }

    #[test]
    fn path_rig_loses_nothing_and_publishes() {
        let signal = test_signal(8192, FS);
        let mut rig = PathRig::new(2, 2048, SampleFormat::I16, &signal).expect("rig");
        // 12 rounds of one hop: 1 + (12·512 − 2048)/512 = 9 blocks, so
        // two averages of 4 are published.
        for _ in 0..12 {
            rig.round().expect("round");
        }
        assert_eq!(lost(&rig.dsps), 0);
        assert!(rig.dsps.iter().all(|d| d.shared().latest().is_some()));
        let processed: u64 = rig
            .dsps
            .iter()
            .map(|d| {
                d.shared()
                    .counters
                    .samples_processed
                    .load(Ordering::Relaxed)
            })
            .sum();
        // With gather on, what the next result still lacks waits in the
        // rings: processed + waiting is everything sent.
        let waiting: u64 = rig.dsps.iter().map(|d| d.backlog() as u64).sum();
        assert_eq!(processed + waiting, 12 * (rig.instants * 2) as u64);
        assert!(waiting < (rig.instants * 2 * 4) as u64, "waiting {waiting}");
        let spectra: u64 = rig
            .dsps
            .iter()
            .map(|d| d.shared().counters.spectra.load(Ordering::Relaxed))
            .sum();
        assert_eq!(spectra, 2 * 2);
    }
}
