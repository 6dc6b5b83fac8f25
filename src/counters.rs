//! Counters shared between the stages of one channel. Sources and the ring
//! writer bump the ingest side, the DSP worker the processing side; the
//! metrics exporter and the API only read them. Plain relaxed atomics: each
//! counter is monotonic on its own, no two need to agree at an instant.

use std::collections::BTreeMap;
use std::sync::atomic::{AtomicBool, AtomicU64, Ordering};
use std::sync::Mutex;

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

/// Why a source's sequence of frame indices started over without a new
/// connection (README, "Sequence rules").
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum RestartReason {
    /// The index went back by more than the reorder window, or a run of
    /// consecutive frames behind it began a new sequence (a DAQ box that
    /// restarted and counts from 0 again, a narrower counter that wrapped).
    BackwardJump,
    /// The index went forward by more than is plausible (`max_gap_s` of
    /// samples plus the time since the last frame taken).
    ForwardJump,
    /// The frame's samples would run past the end of the u64 index space:
    /// it is dropped and the sequence starts over at the next frame.
    IndexWrap,
}

impl RestartReason {
    pub const ALL: [RestartReason; 3] = [
        RestartReason::BackwardJump,
        RestartReason::ForwardJump,
        RestartReason::IndexWrap,
    ];

    pub fn as_str(self) -> &'static str {
        match self {
            RestartReason::BackwardJump => "backward_jump",
            RestartReason::ForwardJump => "forward_jump",
            RestartReason::IndexWrap => "index_wrap",
        }
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

/// Counters and live state of one source, written by its task; metrics and
/// the API read them. The source-side twin of [`ChannelCounters`].
pub struct SourceCounters {
    pub name: String,
    pub kind: &'static str,
    /// A peer is connected / the port is open / datagrams are arriving.
    pub connected: AtomicBool,
    /// Successful connects (TCP), accepted connections, opens (serial).
    pub connections: AtomicU64,
    /// Good frames (BWF1) or batches (lines, raw, sim).
    pub frames: AtomicU64,
    /// Bytes received.
    pub bytes: AtomicU64,
    /// Frames whose CRC did not match.
    pub crc_errors: AtomicU64,
    /// Times the stream decoder found the next magic after bad bytes.
    pub resyncs: AtomicU64,
    /// Bytes thrown away by the decoder (bad frames, junk, partial frames).
    pub bytes_skipped: AtomicU64,
    /// Instants lost in gaps of the sequence (first_sample jumps).
    pub samples_missing: AtomicU64,
    /// Frames dropped because they were duplicates or arrived late.
    pub frames_late: AtomicU64,
    /// Times the sequence of frame indices started over, by reason.
    restarts: [AtomicU64; 3],
    /// Time of the last good frame, ns since the Unix epoch (0: never).
    pub last_frame_unix_ns: AtomicU64,
    /// Frames or connections rejected, by reason (a metric label). Written
    /// only on the error path, so a mutex is fine here.
    rejected: Mutex<BTreeMap<&'static str, u64>>,
}

impl SourceCounters {
    pub fn new(name: &str, kind: &'static str) -> SourceCounters {
        SourceCounters {
            name: name.to_string(),
            kind,
            connected: AtomicBool::new(false),
            connections: AtomicU64::new(0),
            frames: AtomicU64::new(0),
            bytes: AtomicU64::new(0),
            crc_errors: AtomicU64::new(0),
            resyncs: AtomicU64::new(0),
            bytes_skipped: AtomicU64::new(0),
            samples_missing: AtomicU64::new(0),
            frames_late: AtomicU64::new(0),
            restarts: Default::default(),
            last_frame_unix_ns: AtomicU64::new(0),
            rejected: Mutex::new(BTreeMap::new()),
        }
    }

    pub fn is_connected(&self) -> bool {
        self.connected.load(Ordering::Relaxed)
    }

    pub fn add_restart(&self, reason: RestartReason) {
        self.restarts[reason as usize].fetch_add(1, Ordering::Relaxed);
    }

    /// Times the sequence started over for `reason`.
    pub fn restarts(&self, reason: RestartReason) -> u64 {
        self.restarts[reason as usize].load(Ordering::Relaxed)
    }

    pub fn add_rejected(&self, reason: &'static str, n: u64) {
        if let Ok(mut m) = self.rejected.lock() {
            *m.entry(reason).or_insert(0) += n;
        }
    }

    /// Rejections so far, by reason.
    pub fn rejected(&self) -> Vec<(&'static str, u64)> {
        self.rejected
            .lock()
            .map(|m| m.iter().map(|(k, v)| (*k, *v)).collect())
            .unwrap_or_default()
    }

    pub fn get(counter: &AtomicU64) -> u64 {
        counter.load(Ordering::Relaxed)
    }
}
