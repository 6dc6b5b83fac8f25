//! From decoded frames to the rings, for every transport: checks a frame
//! against the source's config, follows its sequence, and counts and logs
//! everything that is not passed on.
//!
//! Sequence rules (README, "Sequence rules"; decided in
//! [`crate::source::sequence`]): the next frame's `first_sample` should be
//! the previous one's plus S. Ahead within a plausible bound: the instants
//! in between are lost (counted in the source's `samples_missing` and in
//! each channel's `samples_dropped{reason="sequence_gap"}`, and the ring
//! marks a gap so no block spans it). Behind within the reorder window: a
//! duplicate or a late frame, dropped and counted in `frames_late`. Any
//! other jump, and a frame that would run past the end of the index space,
//! is a restart: counted by reason, marked in every ring (the block
//! assembler and the averages start over), never a lockout. A new
//! connection restarts the sequence too.
//!
//! Counting, so that for each channel the instants the sender emitted
//! equal `samples_in` plus its `samples_dropped` over every reason (each
//! lost instant counted once): a gap's instants are `sequence_gap`; a
//! frame refused by the sequence rules for a restart (a wrap, or frames of
//! a restarted sequence first taken for late ones) is `restart`; a late
//! frame inside a gap is not counted again (its instants already are), nor
//! is a duplicate (they were taken).

use std::sync::atomic::Ordering;
use std::sync::Arc;
use std::time::{Duration, Instant};

use crate::clock::unix_now_ns;
use crate::config::{Framing, SequenceSpec, StreamSpec};
use crate::counters::SourceCounters;
use crate::counters::{GapReason, RestartReason};
use crate::frame::bwf1::{FrameError, Header, HeaderExpect, StreamDecoder};
use crate::frame::lines::{LineBatch, LineDecoder, LineEvent};
use crate::frame::raw::RawDecoder;
use crate::frame::wire::{WireF32, WireF64, WireI16, WireI24, WireI32};
use crate::frame::{SampleFormat, Samples};
use crate::source::sequence::{Sequencer, Verdict};
use crate::source::{note_frame, SourceOutputs};

/// Error logs of one kind are written at most this often per source.
const LOG_EVERY: Duration = Duration::from_secs(5);

/// Rate limiter for repeated error logs: counts stay exact, logs are sparse.
#[derive(Debug, Default)]
pub struct LogLimiter {
    last: Vec<(&'static str, Instant, u64)>,
}

impl LogLimiter {
    /// Returns `Some(suppressed)` when a line for `key` may be logged now,
    /// with the number of occurrences not logged since the last one.
    pub fn allow(&mut self, key: &'static str) -> Option<u64> {
        let now = Instant::now();
        match self.last.iter_mut().find(|(k, ..)| *k == key) {
            None => {
                self.last.push((key, now, 0));
                Some(0)
            }
            Some((_, t, n)) if now.duration_since(*t) >= LOG_EVERY => {
                let s = *n;
                *t = now;
                *n = 0;
                Some(s)
            }
            Some((.., n)) => {
                *n += 1;
                None
            }
        }
    }
}

/// Where decoded samples go, with the checks of this source.
pub struct FrameSink {
    pub out: SourceOutputs,
    pub state: Arc<SourceCounters>,
    channels: usize,
    sample_rate_hz: f64,
    seq: Sequencer,
    pub logs: LogLimiter,
    /// The first rejection of each reason, with its detail (what `replay`
    /// reports when it accepted nothing).
    first_rejections: Vec<(&'static str, String)>,
}

impl FrameSink {
    /// A sink with the default sequence rules.
    pub fn new(out: SourceOutputs, state: Arc<SourceCounters>, sample_rate_hz: f64) -> FrameSink {
        FrameSink {
            channels: out.width(),
            out,
            state,
            sample_rate_hz,
            seq: Sequencer::new(&SequenceSpec::DEFAULT, sample_rate_hz),
            logs: LogLimiter::default(),
            first_rejections: Vec::new(),
        }
    }

    /// The same sink following the configured source's sequence rules.
    #[must_use]
    pub fn with_sequence(mut self, spec: &SequenceSpec) -> FrameSink {
        self.seq = Sequencer::new(spec, self.sample_rate_hz);
        self
    }

    /// What every BWF1 header of this source must announce (the config's
    /// channel count and rate), for the decoders to check before a body is
    /// awaited.
    pub fn expect(&self) -> HeaderExpect {
        HeaderExpect {
            channels: u16::try_from(self.channels).unwrap_or(u16::MAX),
            sample_rate_hz: self.sample_rate_hz,
        }
    }

    /// A new connection or a reopened port: the sequence starts over and
    /// the rings mark a restart.
    pub fn restart(&mut self) {
        self.seq.reset();
        self.out.mark_discontinuity(GapReason::Restart);
    }

    /// Applies the sequence rules to a frame of `instants` instants from
    /// `first`, counting what they decide. True: pass the frame on.
    fn sequence(&mut self, first: u64, instants: u64) -> bool {
        let expected = self.seq.next();
        match self.seq.admit(first, instants, Instant::now()) {
            Verdict::Take { missing: 0 } => true,
            Verdict::Take { missing } => {
                self.state
                    .samples_missing
                    .fetch_add(missing, Ordering::Relaxed);
                self.out.add_dropped(GapReason::SequenceGap, missing);
                if let Some(suppressed) = self.logs.allow("gap") {
                    tracing::warn!(source = %self.state.name, expected, got = first, missing, suppressed, "gap in the sample sequence");
                }
                true
            }
            Verdict::Late => {
                self.state.frames_late.fetch_add(1, Ordering::Relaxed);
                if let Some(suppressed) = self.logs.allow("late") {
                    tracing::debug!(source = %self.state.name, first_sample = first, expected, suppressed, "duplicate or late frame dropped");
                }
                false
            }
            Verdict::Restart { reason, refused } => {
                self.state.add_restart(reason);
                self.out.add_dropped(GapReason::Restart, refused);
                self.out.mark_discontinuity(GapReason::Restart);
                if let Some(suppressed) = self.logs.allow(reason.as_str()) {
                    tracing::warn!(source = %self.state.name, reason = reason.as_str(), expected, got = first, refused, suppressed, "the sample sequence starts over");
                }
                true
            }
            Verdict::Wrap => {
                self.state.add_restart(RestartReason::IndexWrap);
                self.out.add_dropped(GapReason::Restart, instants);
                self.out.mark_discontinuity(GapReason::Restart);
                if let Some(suppressed) = self.logs.allow("index_wrap") {
                    tracing::warn!(source = %self.state.name, first_sample = first, instants, suppressed, "frame runs past the end of the index space: dropped, the sequence starts over");
                }
                false
            }
        }
    }

    /// Shows the link as up (a peer connected, the port open, datagrams
    /// arriving) or down.
    pub fn set_connected(&self, up: bool) {
        self.state.connected.store(up, Ordering::Relaxed);
    }

    /// Counts and logs a rejected frame or connection.
    pub fn reject(&mut self, reason: &'static str, detail: &dyn std::fmt::Display) {
        self.state.add_rejected(reason, 1);
        if !self.first_rejections.iter().any(|(r, _)| *r == reason) {
            self.first_rejections.push((reason, detail.to_string()));
        }
        if let Some(suppressed) = self.logs.allow(reason) {
            tracing::warn!(source = %self.state.name, reason, suppressed, "rejected: {detail}");
        }
    }

    /// The first rejection of each reason so far, with its detail.
    pub fn first_rejections(&self) -> &[(&'static str, String)] {
        &self.first_rejections
    }

    /// Counts a decoder error.
    pub fn frame_error(&mut self, e: &FrameError) {
        if matches!(e, FrameError::CrcMismatch { .. }) {
            self.state.crc_errors.fetch_add(1, Ordering::Relaxed);
        }
        self.reject(e.reason().as_str(), e);
    }

    /// Passes one BWF1 frame on, if it fits this source (the decoders
    /// already refuse a header that disagrees with [`FrameSink::expect`];
    /// the check here keeps a frame from elsewhere out too). `body` is its
    /// sample section as wire bytes, as the decoders return it: it is
    /// scaled into the rings straight from them.
    pub fn bwf1(&mut self, h: &Header, body: &[u8]) {
        if h.channels as usize != self.channels {
            let msg = format!(
                "frame at sample {} has {} channels, the config says {}",
                h.first_sample, h.channels, self.channels
            );
            self.reject("channel_count_mismatch", &msg);
            return;
        }
        if (h.sample_rate_hz - self.sample_rate_hz).abs() > 1e-6 * self.sample_rate_hz {
            let msg = format!(
                "frame at sample {} says {} Hz, the config says {} Hz",
                h.first_sample, h.sample_rate_hz, self.sample_rate_hz
            );
            self.reject("sample_rate_mismatch", &msg);
            return;
        }
        if !self.sequence(h.first_sample, u64::from(h.samples_per_channel)) {
            return;
        }
        let ts = if h.timestamp_ns == 0 {
            unix_now_ns()
        } else {
            h.timestamp_ns
        };
        debug_assert_eq!(body.len() as u64, h.body_bytes(), "a decoder's frame body");
        let at = h.first_sample;
        match h.format {
            SampleFormat::I16 => self.out.write_frame(at, ts, &WireI16(body)),
            SampleFormat::I24 => self.out.write_frame(at, ts, &WireI24(body)),
            SampleFormat::I32 => self.out.write_frame(at, ts, &WireI32(body)),
            SampleFormat::F32 => self.out.write_frame(at, ts, &WireF32(body)),
            SampleFormat::F64 => self.out.write_frame(at, ts, &WireF64(body)),
        }
        note_frame(&self.state);
    }

    /// Passes a run of instants from `lines` or `raw` framing on. These
    /// framings carry no time: the run is stamped on arrival.
    pub fn instants(&mut self, first_sample: u64, samples: &Samples) {
        let instants = (samples.len() / self.channels.max(1)) as u64;
        if instants == 0 || !self.sequence(first_sample, instants) {
            return;
        }
        let ts = unix_now_ns();
        match samples {
            Samples::I16(v) => self.out.write_interleaved(first_sample, ts, v),
            Samples::I32(v) => self.out.write_interleaved(first_sample, ts, v),
            Samples::F32(v) => self.out.write_interleaved(first_sample, ts, v),
            Samples::F64(v) => self.out.write_interleaved(first_sample, ts, v),
        }
        note_frame(&self.state);
    }
}

/// The decoder of a stream transport, whatever its framing.
pub enum StreamFraming {
    Bwf1 {
        decoder: StreamDecoder,
    },
    Lines {
        decoder: LineDecoder,
        batch: LineBatch,
        samples: Samples,
    },
    Raw {
        decoder: RawDecoder,
        samples: Samples,
    },
}

impl StreamFraming {
    /// # Errors
    /// When the channel count is outside what the framing supports (the
    /// config validation already rules that out).
    pub fn new(spec: &StreamSpec, channels: usize) -> Result<StreamFraming, String> {
        Ok(match spec.framing {
            Framing::Bwf1 => StreamFraming::Bwf1 {
                decoder: StreamDecoder::with_max_frame_bytes(spec.max_frame_bytes),
            },
            Framing::Lines => StreamFraming::Lines {
                decoder: LineDecoder::new(channels),
                batch: LineBatch::default(),
                samples: Samples::F64(Vec::new()),
            },
            Framing::Raw(format) => StreamFraming::Raw {
                decoder: RawDecoder::new(format, channels).map_err(|e| e.to_string())?,
                samples: Samples::default(),
            },
        })
    }

    /// Decodes `bytes` and passes everything complete to `sink`.
    pub fn feed(&mut self, bytes: &[u8], sink: &mut FrameSink) {
        match self {
            StreamFraming::Bwf1 { decoder } => {
                // Headers are checked against the config of the source this
                // framing feeds, before any body is awaited.
                decoder.set_expect(Some(sink.expect()));
                let before = decoder.stats().clone();
                decoder.push(bytes);
                loop {
                    match decoder.next_frame_body() {
                        Ok(Some((h, body))) => sink.bwf1(&h, body),
                        Ok(None) => break,
                        Err(e) => sink.frame_error(&e),
                    }
                }
                let after = decoder.stats();
                sink.state
                    .resyncs
                    .fetch_add(after.resyncs - before.resyncs, Ordering::Relaxed);
                sink.state.bytes_skipped.fetch_add(
                    after.bytes_skipped - before.bytes_skipped,
                    Ordering::Relaxed,
                );
            }
            StreamFraming::Lines {
                decoder,
                batch,
                samples,
            } => {
                decoder.feed(bytes, batch);
                for ev in &batch.events {
                    match ev {
                        LineEvent::Run {
                            first_sample,
                            values,
                        } => {
                            if let Samples::F64(v) = samples {
                                v.clear();
                                v.extend_from_slice(&batch.values[values.clone()]);
                            }
                            sink.instants(*first_sample, samples);
                        }
                        LineEvent::Rejected(e) => {
                            let reason = e.reason().as_str();
                            sink.reject(reason, e);
                        }
                    }
                }
            }
            StreamFraming::Raw { decoder, samples } => {
                let b = decoder.feed(bytes, samples);
                if b.instants > 0 {
                    sink.instants(b.first_sample, samples);
                }
            }
        }
    }

    /// The transport broke: drop partial frames/lines/instants (counted).
    pub fn reset(&mut self, sink: &mut FrameSink) {
        let dropped = match self {
            StreamFraming::Bwf1 { decoder, .. } => {
                let before = decoder.stats().bytes_skipped;
                if let Err(e) = decoder.finish() {
                    sink.frame_error(&e);
                }
                (decoder.stats().bytes_skipped - before) as usize
            }
            StreamFraming::Lines { decoder, .. } => decoder.reset(),
            StreamFraming::Raw { decoder, .. } => decoder.reset(),
        };
        sink.state
            .bytes_skipped
            .fetch_add(dropped as u64, Ordering::Relaxed);
    }
}
