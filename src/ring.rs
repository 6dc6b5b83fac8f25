//! The per-channel ring between a source (producer) and a DSP worker
//! (consumer): a lock-free SPSC ring of samples in channel units, plus a
//! small SPSC ring of marks that say where in the sample stream a new
//! segment starts and why.
//!
//! A mark carries the stream position (`first_sample`, `timestamp_ns`) of
//! the sample at which it stands, so the worker can stamp blocks without the
//! source and the worker sharing a clock. A mark with a `gap` reason is a
//! discontinuity: the worker drops its partly filled block there, so no FFT
//! block ever spans a gap. A mark without one only re-anchors time.
//!
//! The writer never blocks: when the ring is full the samples are dropped,
//! counted (`ring_overflow`) and the next accepted sample starts a new
//! segment.

use std::sync::Arc;

use ringbuf::traits::{Consumer, Observer, Producer, Split};
use ringbuf::wrap::frozen::FrozenProd;
use ringbuf::{HeapCons, HeapProd, HeapRb};

use crate::counters::{ChannelCounters, GapReason};

/// Where a segment starts in the sample stream.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Mark {
    /// Count of samples pushed into this ring before the mark.
    pub ring_pos: u64,
    /// Stream index of the first sample after the mark.
    pub first_sample: u64,
    /// Wall-clock time of that sample, ns since the Unix epoch.
    pub timestamp_ns: u64,
    /// `Some` for a discontinuity, `None` for a plain time anchor.
    pub gap: Option<GapReason>,
}

/// How many marks fit in the mark ring; more than a ring of samples can
/// hold segments for in any sane setup (see `ANCHOR_EVERY`).
const MARK_CAPACITY: usize = 4096;

/// Samples between two time anchors when nothing else marks the stream.
const ANCHOR_EVERY: u64 = 1 << 16;

/// A ring whose memory could not be allocated.
#[derive(Debug, thiserror::Error)]
#[error("cannot allocate a ring of {samples} samples ({bytes} bytes): {source}")]
pub struct RingAllocError {
    pub samples: usize,
    pub bytes: u64,
    #[source]
    pub source: std::collections::TryReserveError,
}

/// Creates the two ends of a channel's ring.
///
/// # Panics
/// If the memory cannot be allocated; the pipeline uses
/// [`try_channel_ring`], which returns that as an error.
pub fn channel_ring(
    capacity: usize,
    sample_rate_hz: f64,
    counters: Arc<ChannelCounters>,
) -> (RingWriter, RingReader) {
    match try_channel_ring(capacity, sample_rate_hz, counters) {
        Ok(ends) => ends,
        Err(e) => panic!("{e}"),
    }
}

/// [`channel_ring`], with an allocation failure returned as an error
/// instead of aborting the process (the allocation is fallible:
/// `try_reserve_exact` underneath).
///
/// # Errors
/// [`RingAllocError`] naming the samples and bytes asked for.
pub fn try_channel_ring(
    capacity: usize,
    sample_rate_hz: f64,
    counters: Arc<ChannelCounters>,
) -> Result<(RingWriter, RingReader), RingAllocError> {
    let samples = capacity.max(1);
    let rb = HeapRb::<f32>::try_new(samples).map_err(|source| RingAllocError {
        samples,
        bytes: (samples as u64).saturating_mul(std::mem::size_of::<f32>() as u64),
        source,
    })?;
    let (prod, cons) = rb.split();
    let (mprod, mcons) = HeapRb::<Mark>::new(MARK_CAPACITY).split();
    Ok((
        RingWriter {
            prod: prod.freeze(),
            marks: mprod,
            pushed: 0,
            next_sample: None,
            pending: Some(GapReason::Restart),
            since_anchor: 0,
            sample_rate_hz,
            counters,
        },
        RingReader {
            cons,
            marks: mcons,
            popped: 0,
        },
    ))
}

/// The source's end of the ring.
pub struct RingWriter {
    /// The sample producer, frozen: it works on its own copies of the two
    /// indices, publishes its write index after every run
    /// (`commit`) and reads the reader's index (`fetch`, a cache line the
    /// reader's core owns) only when its stale copy says the run does not
    /// fit. The stale copy can only under-state the free space (the reader
    /// only moves forward), so the fetch makes the same accept/drop
    /// decision a fresh read would.
    prod: FrozenProd<Arc<HeapRb<f32>>>,
    marks: HeapProd<Mark>,
    pushed: u64,
    /// Stream index the next contiguous sample would have.
    next_sample: Option<u64>,
    /// A discontinuity to record before the next accepted sample.
    pending: Option<GapReason>,
    since_anchor: u64,
    sample_rate_hz: f64,
    counters: Arc<ChannelCounters>,
}

impl RingWriter {
    /// Counts `n` samples of this channel lost for `reason` before they
    /// reached the ring (the source saw them missing or refused them); the
    /// ring's own drops (overflow, non-finite) it counts itself.
    pub fn add_dropped(&self, reason: GapReason, n: u64) {
        self.counters.add_dropped(reason, n);
    }

    /// Records that the stream breaks before the next sample written.
    pub fn mark_discontinuity(&mut self, reason: GapReason) {
        if self.pending.is_none() {
            self.pending = Some(reason);
        }
    }

    /// Writes a run of consecutive samples (channel units) whose first one
    /// has stream index `first_sample`, taken at `timestamp_ns`. A run that
    /// does not follow on from the previous one starts a new segment as a
    /// sequence gap. NaN and infinite samples are dropped, counted and cut
    /// the segment. Returns the number of samples accepted.
    pub fn write(&mut self, first_sample: u64, timestamp_ns: u64, samples: &[f32]) -> usize {
        // The common case, every sample finite, is found by one pass that
        // vectorises (no early exit); only a run that holds a NaN or an
        // infinity takes the splitting loop below.
        if samples.is_empty() {
            return 0;
        }
        if all_finite(samples) {
            return self.write_run(first_sample, timestamp_ns, samples);
        }
        let mut accepted = 0;
        let mut start = 0;
        while start < samples.len() {
            // Split at the first non-finite sample.
            let run_end = samples[start..]
                .iter()
                .position(|x| !x.is_finite())
                .map_or(samples.len(), |p| start + p);
            if run_end > start {
                let offset = start as u64;
                let ts = timestamp_ns.saturating_add(self.offset_ns(offset));
                accepted += self.write_run(first_sample + offset, ts, &samples[start..run_end]);
            }
            if run_end < samples.len() {
                self.counters.add_dropped(GapReason::NonFinite, 1);
                self.mark_discontinuity(GapReason::NonFinite);
                self.next_sample = Some(first_sample + run_end as u64 + 1);
            }
            start = run_end + 1;
        }
        accepted
    }

    /// As [`RingWriter::write`] for a run the caller knows to be finite
    /// (e.g. integer counts scaled by a finite factor whose bound is
    /// checked, see `SourceOutputs`): no scan. A non-finite sample here is
    /// a bug in the caller; debug builds check it.
    pub fn write_finite(&mut self, first_sample: u64, timestamp_ns: u64, samples: &[f32]) -> usize {
        debug_assert!(
            all_finite(samples),
            "write_finite given a non-finite sample"
        );
        if samples.is_empty() {
            return 0;
        }
        self.write_run(first_sample, timestamp_ns, samples)
    }

    /// The time of the sample `samples` after one taken at `timestamp_ns`,
    /// as [`RingWriter::write`] stamps the parts of a run it splits.
    pub fn stamp(&self, timestamp_ns: u64, samples: u64) -> u64 {
        timestamp_ns.saturating_add(self.offset_ns(samples))
    }

    fn offset_ns(&self, samples: u64) -> u64 {
        if self.sample_rate_hz > 0.0 {
            (samples as f64 * 1e9 / self.sample_rate_hz) as u64
        } else {
            0
        }
    }

    fn write_run(&mut self, first_sample: u64, timestamp_ns: u64, run: &[f32]) -> usize {
        let contiguous = self.next_sample == Some(first_sample);
        let gap = match self.pending {
            Some(r) => Some(r),
            None if !contiguous => Some(GapReason::SequenceGap),
            None => None,
        };
        if gap.is_some() || self.since_anchor >= ANCHOR_EVERY {
            let mark = Mark {
                ring_pos: self.pushed,
                first_sample,
                timestamp_ns,
                gap,
            };
            if self.marks.try_push(mark).is_err() {
                if gap.is_some() {
                    // Without its mark the worker could stitch across the
                    // gap: refuse the samples rather than invent continuity.
                    self.counters
                        .add_dropped(GapReason::RingOverflow, run.len() as u64);
                    self.next_sample = Some(first_sample + run.len() as u64);
                    return 0;
                }
            } else {
                self.since_anchor = 0;
                if let Some(r) = gap {
                    self.counters.add_discontinuity(r);
                }
                self.pending = None;
            }
        }
        if self.prod.vacant_len() < run.len() {
            self.prod.fetch();
        }
        let n = self.prod.push_slice(run);
        self.prod.commit();
        self.pushed += n as u64;
        self.since_anchor += n as u64;
        self.next_sample = Some(first_sample + run.len() as u64);
        // A plain load and store, not `fetch_add`: this writer is the only
        // one that changes its channel's `samples_in` (one ring, one writer
        // per channel), so the count stays exact, and the store does not
        // wait, as a locked add on x86 does, for the stores of the copy
        // above to reach the cache.
        let c = &self.counters.samples_in;
        c.store(
            c.load(std::sync::atomic::Ordering::Relaxed) + n as u64,
            std::sync::atomic::Ordering::Relaxed,
        );
        if n < run.len() {
            self.counters
                .add_dropped(GapReason::RingOverflow, (run.len() - n) as u64);
            self.pending = Some(GapReason::RingOverflow);
        }
        n
    }

    /// Free space in the ring, in samples.
    pub fn vacant(&self) -> usize {
        self.prod.fetch();
        self.prod.vacant_len()
    }
}

/// True when no sample is NaN or infinite. Branch-free over the slice (an
/// `&` fold, not `all`, which stops early and does not vectorise).
fn all_finite(samples: &[f32]) -> bool {
    samples.iter().fold(true, |ok, x| ok & x.is_finite())
}

/// What [`RingReader::read`] found.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum ReadEvent {
    /// `n` samples were copied into the buffer; they continue the segment.
    Samples(usize),
    /// A new segment starts here.
    Mark(Mark),
    /// Nothing to read now.
    Empty,
}

/// The DSP worker's end of the ring.
pub struct RingReader {
    cons: HeapCons<f32>,
    marks: HeapCons<Mark>,
    popped: u64,
}

impl RingReader {
    /// Reads the next event: a mark standing at the read position, or up to
    /// `out.len()` samples, never past the next mark.
    pub fn read(&mut self, out: &mut [f32]) -> ReadEvent {
        // Look at the samples first: marks are pushed before the samples
        // they stand in front of, so every mark for these samples is visible.
        let available = self.cons.occupied_len();
        if let Some(m) = self.marks.first() {
            if m.ring_pos <= self.popped {
                let m = *m;
                self.marks.skip(1);
                return ReadEvent::Mark(m);
            }
        }
        let limit = self
            .marks
            .first()
            .map_or(u64::MAX, |m| m.ring_pos - self.popped);
        let want = (out.len() as u64).min(limit).min(available as u64) as usize;
        if want == 0 {
            return ReadEvent::Empty;
        }
        let n = self.cons.pop_slice(&mut out[..want]);
        self.popped += n as u64;
        if n == 0 {
            ReadEvent::Empty
        } else {
            ReadEvent::Samples(n)
        }
    }

    /// Samples waiting in the ring.
    pub fn occupied(&self) -> usize {
        self.cons.occupied_len()
    }

    /// Samples the ring can hold.
    pub fn capacity(&self) -> usize {
        self.cons.capacity().get()
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn ring(cap: usize) -> (RingWriter, RingReader, Arc<ChannelCounters>) {
        let c = Arc::new(ChannelCounters::default());
        let (w, r) = channel_ring(cap, 1000.0, c.clone());
        (w, r, c)
    }

    fn drain(r: &mut RingReader) -> Vec<ReadEvent> {
        let mut out = vec![0.0; 64];
        let mut ev = Vec::new();
        loop {
            match r.read(&mut out) {
                ReadEvent::Empty => return ev,
                e => ev.push(e),
            }
        }
    }

    #[test]
    fn first_write_starts_a_segment() {
        let (mut w, mut r, c) = ring(16);
        assert_eq!(w.write(100, 5, &[1.0, 2.0, 3.0]), 3);
        let ev = drain(&mut r);
        assert!(matches!(
            ev[0],
            ReadEvent::Mark(Mark {
                first_sample: 100,
                gap: Some(GapReason::Restart),
                ..
            })
        ));
        assert_eq!(ev[1], ReadEvent::Samples(3));
        assert_eq!(c.discontinuities(GapReason::Restart), 1);
    }

    #[test]
    fn contiguous_writes_need_no_mark_but_a_jump_is_a_gap() {
        let (mut w, mut r, c) = ring(64);
        w.write(0, 0, &[0.0; 4]);
        w.write(4, 0, &[0.0; 4]);
        w.write(20, 0, &[0.0; 4]);
        let ev = drain(&mut r);
        let marks: Vec<_> = ev
            .iter()
            .filter_map(|e| match e {
                ReadEvent::Mark(m) => Some(*m),
                _ => None,
            })
            .collect();
        assert_eq!(marks.len(), 2);
        assert_eq!(marks[1].ring_pos, 8);
        assert_eq!(marks[1].gap, Some(GapReason::SequenceGap));
        assert_eq!(c.discontinuities(GapReason::SequenceGap), 1);
    }

    #[test]
    fn overflow_is_counted_and_cuts_the_segment() {
        let (mut w, mut r, c) = ring(8);
        assert_eq!(w.write(0, 0, &[1.0; 12]), 8);
        assert_eq!(c.dropped(GapReason::RingOverflow), 4);
        drain(&mut r);
        w.write(12, 0, &[1.0; 2]);
        let ev = drain(&mut r);
        assert!(matches!(
            ev[0],
            ReadEvent::Mark(Mark {
                gap: Some(GapReason::RingOverflow),
                ring_pos: 8,
                ..
            })
        ));
    }

    #[test]
    fn non_finite_samples_are_dropped_and_split() {
        let (mut w, mut r, c) = ring(16);
        assert_eq!(w.write(0, 0, &[1.0, f32::NAN, 2.0, f32::INFINITY]), 2);
        assert_eq!(c.dropped(GapReason::NonFinite), 2);
        let ev = drain(&mut r);
        // Restart mark, 1 sample, non-finite mark at sample 2, 1 sample.
        assert_eq!(ev.len(), 4);
        assert!(matches!(
            ev[2],
            ReadEvent::Mark(Mark {
                first_sample: 2,
                gap: Some(GapReason::NonFinite),
                ..
            })
        ));
    }

    #[test]
    fn reader_never_reads_past_a_mark() {
        let (mut w, mut r, _) = ring(64);
        w.write(0, 0, &[0.0; 10]);
        w.mark_discontinuity(GapReason::Restart);
        w.write(10, 0, &[0.0; 10]);
        let ev = drain(&mut r);
        assert_eq!(
            ev.iter()
                .filter(|e| matches!(e, ReadEvent::Samples(_)))
                .count(),
            2
        );
        assert_eq!(ev[1], ReadEvent::Samples(10));
    }
}
