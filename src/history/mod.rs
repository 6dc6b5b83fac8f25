//! The history on this PC (README "History", docs/history.md): band and
//! overall aggregates per interval, stored spectra, in one SQLite file.
//!
//! ```text
//!  DSP worker ──publish──> Tap (per channel: the interval's count, min,
//!                          │    sum, max, last per series; spectrum timer)
//!                          │ try_send (never waits; a full queue is counted)
//!                          v
//!                    bounded queue ──> writer thread (one transaction per
//!                                      batch; holes for what was lost;
//!                                      retention and thinning)
//!  HTTP queries ──> read-only connections (WAL: never block the writer)
//! ```
//!
//! A DSP thread never touches the file: it hands records to the queue
//! with `try_send`, and what the queue cannot take is counted
//! (`records_dropped{reason="queue_full"}`) and written as a hole when the
//! next record of that channel gets through. A write that fails (a full or
//! read-only disk) is counted (`reason="write_error"`), logged once per
//! outage, and written as a hole once writes succeed again.
//!
//! The stage imports only the foundation and the DSP's value types; the
//! pipeline builds the taps and the writer, HTTP reads the file.

pub mod codec;
pub mod query;
pub mod schema;
pub mod sizing;
pub mod store;
pub mod tap;
pub mod writer;

use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::Arc;

use crate::config::{ChannelSpec, HistorySpec};
use crate::dsp::bands::BandValue;

/// Why a record did not reach the file.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum DropReason {
    /// The writer's queue was full (the disk or the writer too slow).
    QueueFull,
    /// The write failed (disk full, read-only, file damaged or missing).
    WriteError,
}

impl DropReason {
    pub const ALL: [DropReason; 2] = [DropReason::QueueFull, DropReason::WriteError];
    pub fn as_str(self) -> &'static str {
        match self {
            DropReason::QueueFull => "queue_full",
            DropReason::WriteError => "write_error",
        }
    }
}

/// Why a spectrum was stored (the `reason` column).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum StoreReason {
    /// Every `spectrum_every_s`.
    Interval,
    /// At an alarm transition (kept by retention, like references).
    Alarm,
    /// An operator asked (`POST`, token).
    Request,
}

impl StoreReason {
    pub const ALL: [StoreReason; 3] = [
        StoreReason::Interval,
        StoreReason::Alarm,
        StoreReason::Request,
    ];
    pub fn as_str(self) -> &'static str {
        match self {
            StoreReason::Interval => "interval",
            StoreReason::Alarm => "alarm",
            StoreReason::Request => "request",
        }
    }
}

/// The history's counters (all only ever increase) and its file size.
#[derive(Debug, Default)]
pub struct HistoryCounters {
    /// Records lost, by [`DropReason`] (in `ALL`'s order).
    pub dropped: [AtomicU64; 2],
    /// Aggregate rows written (one per series per interval).
    pub points_written: AtomicU64,
    /// Spectra stored, by [`StoreReason`] (in `ALL`'s order).
    pub spectra_stored: [AtomicU64; 3],
    /// Spectra deleted by retention (age or the file's bound).
    pub spectra_deleted: AtomicU64,
    /// Transactions that failed.
    pub write_errors: AtomicU64,
    /// Records waiting in the queue (a gauge).
    pub queued: AtomicU64,
    /// The file's size after the last maintenance, bytes (a gauge).
    pub file_bytes: AtomicU64,
}

impl HistoryCounters {
    pub fn dropped(&self, r: DropReason) -> u64 {
        self.dropped[r as usize].load(Ordering::Relaxed)
    }
    pub(crate) fn add_dropped(&self, r: DropReason, n: u64) {
        self.dropped[r as usize].fetch_add(n, Ordering::Relaxed);
    }
    pub fn stored(&self, r: StoreReason) -> u64 {
        self.spectra_stored[r as usize].load(Ordering::Relaxed)
    }
}

/// What the rest of the process shares about the history: its settings
/// and counters. Queries open the file read-only at `spec.file`.
#[derive(Debug)]
pub struct HistoryShared {
    pub spec: HistorySpec,
    pub counters: HistoryCounters,
    /// Set when the `History` handle goes: the writer writes what is
    /// queued and ends, even if a tap is still alive.
    stopping: std::sync::atomic::AtomicBool,
}

impl HistoryShared {
    /// Settings and zeroed counters (the writer's; tests and HTTP rigs).
    pub fn new(spec: HistorySpec) -> HistoryShared {
        HistoryShared {
            spec,
            counters: HistoryCounters::default(),
            stopping: std::sync::atomic::AtomicBool::new(false),
        }
    }
}

/// One channel's aggregate of one series over one interval.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Aggregate {
    /// Results with an ok value.
    pub n: u32,
    /// Results whose value was not ok (an order band without speed, …).
    pub n_bad: u32,
    pub min: f64,
    pub sum: f64,
    pub max: f64,
    /// The last ok value (NaN when there was none).
    pub last: f64,
    /// The worst alarm state on the series: None without an alarm; -1
    /// inhibited throughout; 0 normal; 1 alert; 2 danger.
    pub state: Option<i8>,
}

impl Default for Aggregate {
    fn default() -> Aggregate {
        Aggregate {
            n: 0,
            n_bad: 0,
            min: f64::INFINITY,
            sum: 0.0,
            max: f64::NEG_INFINITY,
            last: f64::NAN,
            state: None,
        }
    }
}

impl Aggregate {
    /// Adds one result (`value` NaN when not ok) and the series' alarm
    /// state at that result.
    pub fn add(&mut self, value: f64, state: Option<i8>) {
        if value.is_finite() {
            self.n += 1;
            self.min = self.min.min(value);
            self.max = self.max.max(value);
            self.sum += value;
            self.last = value;
        } else {
            self.n_bad += 1;
        }
        self.state = match (self.state, state) {
            (None, s) | (s, None) => s,
            (Some(a), Some(b)) => Some(a.max(b)),
        };
    }
}

/// Records a tap could not queue, told to the writer with the channel's
/// next record: the hole in the history.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Lost {
    /// Unix seconds of the first and past the last interval lost.
    pub from_s: u64,
    pub to_s: u64,
    pub records: u64,
}

/// One channel's aggregates over one interval.
#[derive(Debug, Clone)]
pub struct IntervalRecord {
    pub spec: Arc<ChannelSpec>,
    /// Start of the interval, Unix seconds (a multiple of `span_s`).
    pub t_s: u64,
    pub span_s: u32,
    /// The overall levels (`schema::OVERALL_SERIES`' order), then the bands.
    pub series: Vec<Aggregate>,
    pub lost: Option<Lost>,
}

/// One spectrum to store, with what its JSON needs (the settings of the
/// channel when it was made, which a later config may change).
#[derive(Debug, Clone)]
pub struct SpectrumRecord {
    pub spec: Arc<ChannelSpec>,
    pub enbw_bins: f64,
    pub reason: StoreReason,
    /// For an alarm transition: "<alarm> <from>-><to>".
    pub event: Option<String>,
    /// Time of the newest block's first sample, ns since the Unix epoch.
    pub t_ns: u64,
    pub published_ns: u64,
    pub averages: u32,
    pub first_sample: u64,
    pub oldest_first_sample: u64,
    pub speed_hz: Option<f64>,
    pub power: Vec<f32>,
    /// Empty without envelope analysis.
    pub envelope: Vec<f32>,
    pub bands: Vec<BandValue>,
    pub lost: Option<Lost>,
}

/// What the queue carries to the writer.
#[derive(Debug)]
pub enum Record {
    Interval(Box<IntervalRecord>),
    Spectrum(Box<SpectrumRecord>),
}

impl Record {
    fn channel(&self) -> &str {
        match self {
            Record::Interval(r) => &r.spec.name,
            Record::Spectrum(r) => &r.spec.name,
        }
    }
    fn time_s(&self) -> u64 {
        match self {
            Record::Interval(r) => r.t_s,
            Record::Spectrum(r) => r.published_ns / 1_000_000_000,
        }
    }
    fn lost(&self) -> Option<Lost> {
        match self {
            Record::Interval(r) => r.lost,
            Record::Spectrum(r) => r.lost,
        }
    }
}

/// The alarm-state code of the `points.state` column (see [`Aggregate`]).
pub fn state_code(alert: bool, danger: bool, inhibited: bool) -> i8 {
    if danger {
        2
    } else if alert {
        1
    } else if inhibited {
        -1
    } else {
        0
    }
}

/// The handle the pipeline keeps: the queue's sending end (cloned into
/// each channel's tap) and the writer thread, stopped and joined on drop
/// after everything queued is written.
pub struct History {
    pub shared: Arc<HistoryShared>,
    tx: Option<std::sync::mpsc::SyncSender<Record>>,
    thread: Option<std::thread::JoinHandle<()>>,
}

impl History {
    /// Starts the writer thread on `spec.file` (opened by the thread; a
    /// file that cannot be opened is an outage the thread retries, never a
    /// failed start: the DSP and alarms run without history).
    ///
    /// # Errors
    /// The thread could not be spawned.
    pub fn start(spec: HistorySpec) -> std::io::Result<History> {
        let (tx, rx) = std::sync::mpsc::sync_channel(spec.queue);
        let shared = Arc::new(HistoryShared::new(spec));
        let thread = writer::spawn(shared.clone(), rx, writer::SystemClock)?;
        Ok(History {
            shared,
            tx: Some(tx),
            thread: Some(thread),
        })
    }

    /// A tap for one channel's worker.
    pub fn tap(&self, spec: Arc<ChannelSpec>, enbw_bins: f64) -> Option<tap::Tap> {
        let tx = self.tx.clone()?;
        Some(tap::Tap::new(spec, enbw_bins, self.shared.clone(), tx))
    }
}

impl Drop for History {
    fn drop(&mut self) {
        // The taps hold clones: the thread ends once they are gone too
        // (the pipeline stops its workers first), or, if one outlives the
        // handle, after writing what is queued now.
        self.tx = None;
        self.shared.stopping.store(true, Ordering::Relaxed);
        if let Some(t) = self.thread.take() {
            let _ = t.join();
        }
    }
}
