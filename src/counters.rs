//! Counters shared between the stages of one channel. Sources and the ring
//! writer bump the ingest side, the DSP worker the processing side; the
//! metrics exporter and the API only read them. Plain relaxed atomics: each
//! counter is monotonic on its own, no two need to agree at an instant.

use std::sync::atomic::{AtomicU64, Ordering};

/// Why a run of samples did not reach the DSP, or why a block was cut short.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum GapReason {
    /// The ring was full: the DSP fell behind the source.
    RingOverflow,
    /// A sample was NaN or infinite.
    NonFinite,
    /// The stream skipped sample indices (lost frames, a sequence jump).
    SequenceGap,
    /// The transport reconnected or the source restarted.
    Restart,
}

impl GapReason {
    pub const ALL: [GapReason; 4] = [
        GapReason::RingOverflow,
        GapReason::NonFinite,
        GapReason::SequenceGap,
        GapReason::Restart,
    ];

    pub fn as_str(self) -> &'static str {
        match self {
            GapReason::RingOverflow => "ring_overflow",
            GapReason::NonFinite => "non_finite",
            GapReason::SequenceGap => "sequence_gap",
            GapReason::Restart => "restart",
        }
    }

    fn slot(self) -> usize {
        self as usize
    }
}

#[derive(Debug, Default)]
pub struct ChannelCounters {
    /// Samples accepted into the ring.
    pub samples_in: AtomicU64,
    /// Samples the DSP consumed from the ring.
    pub samples_processed: AtomicU64,
    /// FFT blocks computed.
    pub blocks: AtomicU64,
    /// Spectra published (after averaging).
    pub spectra: AtomicU64,
    dropped: [AtomicU64; 4],
    discontinuities: [AtomicU64; 4],
}

impl ChannelCounters {
    pub fn add_dropped(&self, reason: GapReason, n: u64) {
        self.dropped[reason.slot()].fetch_add(n, Ordering::Relaxed);
    }
    pub fn dropped(&self, reason: GapReason) -> u64 {
        self.dropped[reason.slot()].load(Ordering::Relaxed)
    }
    pub fn dropped_total(&self) -> u64 {
        GapReason::ALL.iter().map(|r| self.dropped(*r)).sum()
    }
    pub fn add_discontinuity(&self, reason: GapReason) {
        self.discontinuities[reason.slot()].fetch_add(1, Ordering::Relaxed);
    }
    pub fn discontinuities(&self, reason: GapReason) -> u64 {
        self.discontinuities[reason.slot()].load(Ordering::Relaxed)
    }
    pub fn get(counter: &AtomicU64) -> u64 {
        counter.load(Ordering::Relaxed)
    }
}
