//! Captures: the raw waveform around an alarm's rising edge, and the
//! spectrum at the trip, stored for the engineer who investigates later.
//!
//! Three parts, split by thread:
//!
//! - [`HistoryRing`] (DSP thread): the last `pre_s` seconds of one channel's
//!   raw samples. Fixed capacity, no allocation per push. A discontinuity
//!   empties it, so a capture never stitches across a gap.
//! - [`CaptureBuilder`] (DSP thread): started at a trip with a copy of the
//!   ring (one allocation per trip, which is rare), then fed the following
//!   samples until `post_s` seconds are collected, a gap ends it early, or
//!   the daemon stops. [`CaptureBuilder::finish`] gives a [`Capture`] to
//!   hand to the I/O thread.
//! - [`CaptureStore`] (I/O thread): writes the files atomically and keeps
//!   the retention bounds.
//!
//! ## Files
//!
//! In `<storage_dir>/captures/`, per capture id:
//! - `<id>.bwf1`: the waveform as BWF1 frames (README, "Wire format BWF1"):
//!   one channel, f32 samples in the channel's unit, at most
//!   [`FRAME_SAMPLES`] per frame; `first_sample` is the stream index of
//!   each frame's first sample and `timestamp_ns` its time, so the frames
//!   are contiguous and line up with the live stream.
//! - `<id>.json`: [`CaptureMeta`]: the trip (time, from/to, value, limits),
//!   where the trip lies in the waveform (`pre_samples`), the averaged
//!   power spectrum at the trip, the band values, and whether the capture is
//!   complete or why it ended early.
//!
//! Both are written under `.tmp` names, fsynced, then renamed: first the
//! waveform, then the metadata, then the directory is fsynced. A capture
//! exists (is listed) only when its `.json` does. On start, every `.tmp`
//! file and every waveform without its metadata is deleted (counted,
//! logged): a crash leaves no half capture under a final name.
//!
//! Retention: after each write, the oldest captures are removed while there
//! are more than `max_count` or they take more than `max_bytes` in all; the
//! newest capture is always kept.

use std::fs;
use std::io;
use std::path::{Path, PathBuf};

use serde::{Deserialize, Serialize};

use super::fsutil::{fsync_dir, write_synced, TEMP_SUFFIX};
use super::journal::{rfc3339, EventLimits};
pub use crate::config::alarms::Retention;
use crate::config::bearing::Defect;
use crate::config::health::HealthSpec;
use crate::config::{
    AveragingMode, BandEdges, BandSpec, ChannelSpec, Detrend, Measure, SpectrumKind, WindowKind,
};
use crate::frame::bwf1::{encode_into, Header};
use crate::frame::{SampleFormat, SampleSlice};
use crate::units::Unit;

/// Samples per BWF1 frame in a capture file.
pub const FRAME_SAMPLES: usize = 8192;

/// Version of the `<id>.json` this build writes.
pub const META_VERSION: u32 = 2;

/// Longest capture id accepted.
pub const MAX_ID_LEN: usize = 200;

/// Raw samples of one channel, the newest `capacity` of them.
#[derive(Debug, Clone)]
pub struct HistoryRing {
    buf: Vec<f32>,
    /// Next write position.
    head: usize,
    len: usize,
    /// Stream index after the newest sample.
    next_sample: u64,
    /// Time of the newest push's first sample: (stream index, ns).
    anchor: (u64, u64),
    rate: f64,
}

impl HistoryRing {
    /// A ring of `capacity` samples (at least 1) at `sample_rate_hz`.
    pub fn new(capacity: usize, sample_rate_hz: f64) -> HistoryRing {
        HistoryRing {
            buf: vec![0.0; capacity.max(1)],
            head: 0,
            len: 0,
            next_sample: 0,
            anchor: (0, 0),
            rate: sample_rate_hz,
        }
    }

    pub fn capacity(&self) -> usize {
        self.buf.len()
    }

    pub fn len(&self) -> usize {
        self.len
    }

    pub fn is_empty(&self) -> bool {
        self.len == 0
    }

    /// Stream index of the oldest sample held.
    pub fn oldest_sample(&self) -> u64 {
        self.next_sample - self.len as u64
    }

    /// Stream index after the newest sample.
    pub fn next_sample(&self) -> u64 {
        self.next_sample
    }

    /// Forgets everything (a discontinuity).
    pub fn clear(&mut self) {
        self.head = 0;
        self.len = 0;
    }

    /// Appends contiguous samples whose first has stream index
    /// `first_sample` and time `timestamp_ns` (0 = unknown). If they do not
    /// follow the newest sample held, the ring starts over with them.
    pub fn push(&mut self, first_sample: u64, timestamp_ns: u64, samples: &[f32]) {
        if samples.is_empty() {
            return;
        }
        if self.len > 0 && first_sample != self.next_sample {
            self.clear();
        }
        self.anchor = (first_sample, timestamp_ns);
        self.next_sample = first_sample + samples.len() as u64;
        let cap = self.buf.len();
        let src = if samples.len() > cap {
            &samples[samples.len() - cap..]
        } else {
            samples
        };
        let first = src.len().min(cap - self.head);
        self.buf[self.head..self.head + first].copy_from_slice(&src[..first]);
        let rest = src.len() - first;
        self.buf[..rest].copy_from_slice(&src[first..]);
        self.head = (self.head + src.len()) % cap;
        self.len = (self.len + src.len()).min(cap);
    }

    /// Time of a stream index, from the latest anchor (0 if unknown).
    pub fn timestamp_of(&self, sample: u64) -> u64 {
        let (s0, t0) = self.anchor;
        if t0 == 0 {
            return 0;
        }
        let dt = (sample as f64 - s0 as f64) * 1e9 / self.rate;
        (t0 as f64 + dt).max(0.0) as u64
    }

    /// Appends the newest `n` samples held (or all), oldest first.
    pub fn copy_newest_into(&self, n: usize, out: &mut Vec<f32>) {
        let n = n.min(self.len);
        let cap = self.buf.len();
        let start = (self.head + cap - n) % cap;
        if start + n <= cap {
            out.extend_from_slice(&self.buf[start..start + n]);
        } else {
            out.extend_from_slice(&self.buf[start..]);
            out.extend_from_slice(&self.buf[..n - (cap - start)]);
        }
    }
}

/// The averaged spectrum at the trip.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, utoipa::ToSchema)]
pub struct SpectrumAtTrip {
    /// How `values` are scaled, e.g. "power" (units² per line, amplitude
    /// corrected, single-sided).
    pub scaling: String,
    /// Unit of the values' root (the channel's unit).
    pub unit: String,
    pub f0_hz: f64,
    pub df_hz: f64,
    pub window: String,
    pub nfft: usize,
    pub averages: u32,
    /// Stream index of the newest block in the average.
    pub first_sample: u64,
    /// Stream index of the oldest block's first sample: the average covers
    /// samples `oldest_first_sample .. end_sample`. Absent in captures
    /// written before it was recorded.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub oldest_first_sample: Option<u64>,
    /// One past the newest block's last sample.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub end_sample: Option<u64>,
    pub values: Vec<f32>,
}

/// The channel settings a capture was taken with: everything `bandwatch
/// replay` needs to recompute the spectrum and band values stored with it
/// without the config (README, "Captures"). Values are those the channel
/// ran with (validated config), in the config's vocabulary.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, utoipa::ToSchema)]
pub struct CaptureSettings {
    pub block: usize,
    pub nfft: usize,
    /// Samples between the starts of consecutive blocks.
    pub hop: usize,
    pub overlap: f64,
    #[schema(value_type = String)]
    pub window: WindowKind,
    #[schema(value_type = String)]
    pub detrend: Detrend,
    #[schema(value_type = String)]
    pub averaging: AveragingMode,
    pub average_count: u32,
    pub integration_low_cut_hz: f64,
    /// Envelope band-pass `[lo_hz, hi_hz]`, if the channel has one.
    pub envelope: Option<[f64; 2]>,
    /// The machine whose speed the order bands follow.
    pub machine: Option<String>,
    /// Running speed used for the order bands at the trip, Hz (None: no
    /// machine, or its speed was unknown).
    pub speed_hz: Option<f64>,
    pub bands: Vec<BandSettings>,
}

/// One band of [`CaptureSettings`].
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, utoipa::ToSchema)]
pub struct BandSettings {
    pub name: String,
    /// Fixed edges `[lo_hz, hi_hz]`, or
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub hz: Option<[f64; 2]>,
    /// windows in orders of running speed (several for bearing harmonics).
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub orders: Vec<[f64; 2]>,
    #[schema(value_type = String)]
    pub measure: Measure,
    /// Unit of the band's value.
    pub unit: String,
    #[schema(value_type = String)]
    pub spectrum: SpectrumKind,
    /// Bearing bands: which bearing and defect (shown, not computed).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub bearing: Option<String>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    #[schema(value_type = String)]
    pub defect: Option<Defect>,
}

/// Why stored [`CaptureSettings`] cannot describe a channel.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
#[error("capture settings field {field}: {message}")]
pub struct SettingsError {
    /// e.g. `settings.block`, `settings.bands[2].unit`.
    pub field: String,
    pub message: String,
}

/// Blocks whose samples a capture keeps before the trip so that the
/// averaged spectrum at the trip can be recomputed from them (README,
/// "Captures"): `none` 1, `linear` and `peak-hold` `count`; exponential
/// averaging never forgets, so the history covers the K newest blocks
/// with (1 − 1/count)^K < 2⁻²⁴ (f32 rounding): whatever came before weighs
/// less than the last bit of an f32 in the average.
pub fn history_blocks(mode: AveragingMode, count: u32) -> usize {
    let count = count.max(1);
    match mode {
        AveragingMode::None => 1,
        AveragingMode::Linear | AveragingMode::PeakHold => count as usize,
        AveragingMode::Exponential if count == 1 => 1,
        AveragingMode::Exponential => {
            let k = (24.0 * std::f64::consts::LN_2) / -(1.0 - 1.0 / f64::from(count)).ln();
            // The smallest K with w^K < 2⁻²⁴ strictly.
            (k.floor() as usize + 1).max(count as usize)
        }
    }
}

/// Samples spanned by `blocks` consecutive blocks.
pub fn span_samples(block: usize, hop: usize, blocks: usize) -> usize {
    block + blocks.saturating_sub(1) * hop
}

impl CaptureSettings {
    /// The settings of `spec` (the speed is filled in at the trip).
    pub fn of(spec: &ChannelSpec) -> CaptureSettings {
        CaptureSettings {
            block: spec.block,
            nfft: spec.nfft,
            hop: spec.hop,
            overlap: spec.overlap,
            window: spec.window,
            detrend: spec.detrend,
            averaging: spec.averaging,
            average_count: spec.average_count,
            integration_low_cut_hz: spec.integration_low_cut_hz,
            envelope: spec.envelope.map(|(lo, hi)| [lo, hi]),
            machine: spec.machine.clone(),
            speed_hz: None,
            bands: spec
                .bands
                .iter()
                .map(|b| {
                    let (hz, orders) = match &b.edges {
                        BandEdges::Hz { lo, hi } => (Some([*lo, *hi]), Vec::new()),
                        BandEdges::Orders { windows } => {
                            (None, windows.iter().map(|(l, h)| [*l, *h]).collect())
                        }
                    };
                    BandSettings {
                        name: b.name.clone(),
                        hz,
                        orders,
                        measure: b.measure,
                        unit: b.unit.symbol.to_string(),
                        spectrum: b.spectrum,
                        bearing: b.bearing.as_ref().map(|(n, _)| n.clone()),
                        defect: b.bearing.as_ref().map(|(_, d)| *d),
                    }
                })
                .collect(),
        }
    }

    /// A channel spec with these settings: channel `name` at index 0 of
    /// source `source`, samples already in `unit` (scale 1, offset 0), no
    /// alarms, default health. Checks what the config checks would have
    /// checked for these values, so a damaged file cannot make the DSP
    /// misbehave.
    ///
    /// # Errors
    /// [`SettingsError`] naming the first field at fault.
    pub fn channel_spec(
        &self,
        name: &str,
        source: &str,
        unit: &str,
        sample_rate_hz: f64,
    ) -> Result<ChannelSpec, SettingsError> {
        let bad = |field: &str, message: String| SettingsError {
            field: field.to_string(),
            message,
        };
        let unit = Unit::parse(unit)
            .ok_or_else(|| bad("waveform.unit", format!("unknown unit {unit:?}")))?;
        if !(sample_rate_hz.is_finite() && sample_rate_hz > 0.0) {
            return Err(bad(
                "waveform.sample_rate_hz",
                format!("{sample_rate_hz} is not a positive rate"),
            ));
        }
        if !(16..=1 << 20).contains(&self.block) {
            return Err(bad(
                "settings.block",
                format!("{} is out of range 16 to 1048576", self.block),
            ));
        }
        if self.nfft < self.block || self.nfft > 4 << 20 || !self.nfft.is_multiple_of(2) {
            return Err(bad(
                "settings.nfft",
                format!(
                    "{} must be even, >= block {} and <= {}",
                    self.nfft,
                    self.block,
                    4 << 20
                ),
            ));
        }
        if !(1..=self.block).contains(&self.hop) {
            return Err(bad(
                "settings.hop",
                format!("{} is out of range 1 to block {}", self.hop, self.block),
            ));
        }
        if !(1..=100_000).contains(&self.average_count) {
            return Err(bad(
                "settings.average_count",
                format!("{} is out of range 1 to 100000", self.average_count),
            ));
        }
        let nyquist = sample_rate_hz / 2.0;
        let in_range = |lo: f64, hi: f64| lo.is_finite() && hi.is_finite() && 0.0 <= lo && lo < hi;
        if let Some([lo, hi]) = self.envelope {
            if !(in_range(lo, hi) && hi <= nyquist) {
                return Err(bad(
                    "settings.envelope",
                    format!("[{lo}, {hi}] is not a band below Nyquist {nyquist} Hz"),
                ));
            }
        }
        if !(self.integration_low_cut_hz.is_finite() && self.integration_low_cut_hz >= 0.0) {
            return Err(bad(
                "settings.integration_low_cut_hz",
                format!("{} is not a frequency", self.integration_low_cut_hz),
            ));
        }
        let mut bands = Vec::with_capacity(self.bands.len());
        for (i, b) in self.bands.iter().enumerate() {
            let field = |k: &str| format!("settings.bands[{i}].{k}");
            let band_unit = Unit::parse(&b.unit)
                .ok_or_else(|| bad(&field("unit"), format!("unknown unit {:?}", b.unit)))?;
            if !crate::units::convertible(unit, band_unit) {
                return Err(bad(
                    &field("unit"),
                    format!("{} cannot be computed from {}", b.unit, unit.symbol),
                ));
            }
            let edges = match (b.hz, b.orders.is_empty()) {
                (Some([lo, hi]), true) if in_range(lo, hi) => BandEdges::Hz { lo, hi },
                (None, false) if b.orders.iter().all(|[l, h]| in_range(*l, *h)) => {
                    BandEdges::Orders {
                        windows: b.orders.iter().map(|[l, h]| (*l, *h)).collect(),
                    }
                }
                _ => {
                    return Err(bad(
                        &field("hz"),
                        "give either hz [lo, hi] or orders [[lo, hi], ...], with 0 <= lo < hi"
                            .to_string(),
                    ))
                }
            };
            if b.spectrum == SpectrumKind::Envelope && self.envelope.is_none() {
                return Err(bad(
                    &field("spectrum"),
                    "reads the envelope spectrum, but settings.envelope is missing".to_string(),
                ));
            }
            bands.push(BandSpec {
                name: b.name.clone(),
                edges,
                measure: b.measure,
                unit: band_unit,
                spectrum: b.spectrum,
                bearing: b.bearing.clone().zip(b.defect),
            });
        }
        Ok(ChannelSpec {
            name: name.to_string(),
            source: source.to_string(),
            index: 0,
            unit,
            scale: 1.0,
            offset: 0.0,
            sample_rate_hz,
            block: self.block,
            nfft: self.nfft,
            hop: self.hop,
            overlap: self.overlap,
            window: self.window,
            detrend: self.detrend,
            averaging: self.averaging,
            average_count: self.average_count,
            integration_low_cut_hz: self.integration_low_cut_hz,
            machine: self.machine.clone(),
            envelope: self.envelope.map(|[lo, hi]| (lo, hi)),
            bands,
            health: HealthSpec::default(),
            alarms: Vec::new(),
        })
    }

    /// Whether a band follows the running speed.
    pub fn has_order_bands(&self) -> bool {
        self.bands.iter().any(|b| !b.orders.is_empty())
    }
}

/// One band's value at the trip.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, utoipa::ToSchema)]
pub struct BandAtTrip {
    pub band: String,
    pub value: f64,
    pub unit: String,
}

/// What started a capture; filled in by the worker at the trip.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, utoipa::ToSchema)]
pub struct TripInfo {
    pub unix_ns: u64,
    pub time: String,
    pub channel: String,
    pub band: String,
    /// Unit of `value` and `limits`.
    pub unit: String,
    pub from: String,
    pub to: String,
    pub value: Option<f64>,
    pub limits: EventLimits,
    /// Stream index of the newest sample when the trip was evaluated.
    pub at_sample: u64,
}

/// Where the waveform is and what it holds.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, utoipa::ToSchema)]
pub struct WaveformInfo {
    /// File name next to the metadata.
    pub file: String,
    /// "BWF1".
    pub format: String,
    /// "f32".
    pub sample_format: String,
    /// Unit of the samples (the channel's).
    pub unit: String,
    pub sample_rate_hz: f64,
    /// Stream index of the first sample.
    pub first_sample: u64,
    /// Time of the first sample, ns since the Unix epoch (0 = unknown).
    pub timestamp_ns: u64,
    pub samples: u64,
    /// Samples before the trip (`at_sample`): the pre-trigger part.
    pub pre_samples: u64,
    pub frames: u32,
    pub bytes: u64,
}

/// `<id>.json`.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, utoipa::ToSchema)]
pub struct CaptureMeta {
    /// Format version of this file: [`META_VERSION`] (2: with `settings`
    /// and the spectrum's sample range); 1 before.
    pub version: u32,
    pub id: String,
    pub trip: TripInfo,
    pub waveform: WaveformInfo,
    #[serde(default)]
    pub spectrum: Option<SpectrumAtTrip>,
    #[serde(default)]
    pub bands: Vec<BandAtTrip>,
    /// The channel settings at the trip (version 2 on; absent in older
    /// captures).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub settings: Option<CaptureSettings>,
    /// All post-trigger samples were collected.
    pub complete: bool,
    /// "complete", "gap" (a discontinuity ended it) or "shutdown".
    pub end_reason: String,
}

/// Why a capture ended.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum EndReason {
    Complete,
    Gap,
    Shutdown,
}

impl EndReason {
    pub fn as_str(self) -> &'static str {
        match self {
            EndReason::Complete => "complete",
            EndReason::Gap => "gap",
            EndReason::Shutdown => "shutdown",
        }
    }
}

/// A finished capture, ready to be written by the I/O thread.
#[derive(Debug, Clone)]
pub struct Capture {
    pub id: String,
    pub trip: TripInfo,
    pub sample_rate_hz: f64,
    pub first_sample: u64,
    pub timestamp_ns: u64,
    pub pre_samples: u64,
    pub samples: Vec<f32>,
    pub spectrum: Option<SpectrumAtTrip>,
    pub bands: Vec<BandAtTrip>,
    pub settings: Option<CaptureSettings>,
    pub end: EndReason,
}

/// A capture id for a trip: time (20-digit ns, so ids sort by time),
/// channel, band and the new state, each reduced to `[A-Za-z0-9_-]`.
pub fn capture_id(unix_ns: u64, channel: &str, band: &str, to: &str) -> String {
    let clean = |s: &str| -> String {
        s.chars()
            .map(|c| {
                if c.is_ascii_alphanumeric() || c == '-' || c == '_' {
                    c
                } else {
                    '_'
                }
            })
            .take(48)
            .collect()
    };
    format!(
        "{unix_ns:020}-{}-{}-{}",
        clean(channel),
        clean(band),
        clean(to)
    )
}

/// Collects the samples after a trip. See the module docs.
#[derive(Debug, Clone)]
pub struct CaptureBuilder {
    cap: Capture,
    next_sample: u64,
    post_target: usize,
    post_have: usize,
    ended: Option<EndReason>,
}

impl CaptureBuilder {
    /// Starts a capture: copies the newest `pre_samples` of `ring` and will
    /// collect `post_samples` more. `trip.at_sample` should be
    /// `ring.next_sample()`.
    pub fn start(
        id: String,
        trip: TripInfo,
        ring: &HistoryRing,
        pre_samples: usize,
        post_samples: usize,
        spectrum: Option<SpectrumAtTrip>,
        bands: Vec<BandAtTrip>,
    ) -> CaptureBuilder {
        let pre = pre_samples.min(ring.len());
        let mut samples = Vec::with_capacity(pre + post_samples);
        ring.copy_newest_into(pre, &mut samples);
        let first_sample = ring.next_sample() - pre as u64;
        let cap = Capture {
            id,
            trip,
            sample_rate_hz: ring.rate,
            first_sample,
            timestamp_ns: ring.timestamp_of(first_sample),
            pre_samples: pre as u64,
            samples,
            spectrum,
            bands,
            settings: None,
            end: EndReason::Complete,
        };
        CaptureBuilder {
            cap,
            next_sample: ring.next_sample(),
            post_target: post_samples,
            post_have: 0,
            ended: if post_samples == 0 {
                Some(EndReason::Complete)
            } else {
                None
            },
        }
    }

    /// Records the channel settings the capture was taken with.
    pub fn with_settings(mut self, settings: CaptureSettings) -> CaptureBuilder {
        self.cap.settings = Some(settings);
        self
    }

    pub fn id(&self) -> &str {
        &self.cap.id
    }

    /// Feeds samples that follow the trip (stream index and time of the
    /// first, as for [`HistoryRing::push`]). Samples that do not continue
    /// the capture end it (as a gap). Returns true once the capture is done.
    pub fn push(&mut self, first_sample: u64, timestamp_ns: u64, samples: &[f32]) -> bool {
        if self.ended.is_some() {
            return true;
        }
        if samples.is_empty() {
            return false;
        }
        if self.cap.samples.is_empty() {
            // Nothing held yet (an empty ring at the trip): start here.
            self.cap.first_sample = first_sample;
            self.cap.timestamp_ns = timestamp_ns;
        } else if first_sample != self.next_sample {
            self.ended = Some(EndReason::Gap);
            return true;
        }
        let take = samples.len().min(self.post_target - self.post_have);
        self.cap.samples.extend_from_slice(&samples[..take]);
        self.post_have += take;
        self.next_sample = first_sample + samples.len() as u64;
        if self.post_have == self.post_target {
            self.ended = Some(EndReason::Complete);
        }
        self.ended.is_some()
    }

    /// A discontinuity: the capture ends with what it has.
    pub fn gap(&mut self) {
        if self.ended.is_none() {
            self.ended = Some(EndReason::Gap);
        }
    }

    pub fn is_done(&self) -> bool {
        self.ended.is_some()
    }

    /// The capture; one that is not done yet ends as `unfinished` (e.g.
    /// [`EndReason::Shutdown`]).
    pub fn finish(mut self, unfinished: EndReason) -> Capture {
        self.cap.end = self.ended.unwrap_or(unfinished);
        self.cap
    }
}

#[derive(Debug, thiserror::Error)]
pub enum CaptureError {
    #[error(
        "capture id {0:?} is not valid (letters, digits, '-' and '_' only, 1 to 200 characters)"
    )]
    BadId(String),
    #[error("no capture {0:?}")]
    NotFound(String),
    #[error("capture file {path}: {source}")]
    Io {
        path: PathBuf,
        #[source]
        source: io::Error,
    },
    #[error("capture file {path} is not valid: {message}")]
    Invalid { path: PathBuf, message: String },
}

/// Checks an id taken from a URL: `[A-Za-z0-9_-]{1,200}`, so it can never
/// name a file outside the capture directory.
///
/// # Errors
/// [`CaptureError::BadId`].
pub fn validate_id(id: &str) -> Result<(), CaptureError> {
    let ok = !id.is_empty()
        && id.len() <= MAX_ID_LEN
        && id
            .bytes()
            .all(|b| b.is_ascii_alphanumeric() || b == b'-' || b == b'_');
    if ok {
        Ok(())
    } else {
        Err(CaptureError::BadId(id.chars().take(MAX_ID_LEN).collect()))
    }
}

/// What start-up cleaning removed.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub struct Cleanup {
    /// `.tmp` files (writes a crash interrupted).
    pub temp_files: u32,
    /// Waveforms without metadata (a crash between the two renames).
    pub orphans: u32,
}

/// One stored capture, as listed.
#[derive(Debug, Clone, PartialEq, Serialize, utoipa::ToSchema)]
pub struct CaptureInfo {
    pub id: String,
    pub channel: String,
    pub band: String,
    pub from: String,
    pub to: String,
    pub time: String,
    pub unix_ns: u64,
    pub samples: u64,
    pub complete: bool,
    pub end_reason: String,
    /// Both files.
    pub bytes: u64,
}

/// Writes and prunes captures in one directory (the I/O thread's).
#[derive(Debug)]
pub struct CaptureStore {
    dir: PathBuf,
    retention: Retention,
    /// What [`CaptureStore::open`] found, by capture id.
    opened: OpenReport,
}

/// What opening the store did to particular captures, for the start-up
/// accounting of journal events whose capture is not on disk
/// ([`crate::alarm::io::reconcile_captures`]).
#[derive(Debug, Clone, Default, PartialEq)]
pub struct OpenReport {
    /// Ids whose unfinished files (`.tmp`, a waveform without metadata)
    /// were removed: a write the daemon's stop interrupted.
    pub unfinished: std::collections::BTreeSet<String>,
    /// Captures removed by retention at open.
    pub pruned: Vec<CaptureInfo>,
}

/// The capture id of a file name in the capture directory.
fn id_of_file(name: &str) -> &str {
    let base = name.strip_suffix(TEMP_SUFFIX).unwrap_or(name);
    base.strip_suffix(".bwf1")
        .or_else(|| base.strip_suffix(".json"))
        .unwrap_or(base)
}

fn io_err(path: &Path) -> impl FnOnce(io::Error) -> CaptureError + '_ {
    move |source| CaptureError::Io {
        path: path.to_path_buf(),
        source,
    }
}

impl CaptureStore {
    /// Creates the directory if needed, removes what a crash left, and
    /// applies the retention bounds.
    ///
    /// # Errors
    /// [`CaptureError::Io`] if the directory cannot be created or read.
    pub fn open(dir: &Path, retention: Retention) -> Result<(CaptureStore, Cleanup), CaptureError> {
        fs::create_dir_all(dir).map_err(io_err(dir))?;
        let mut clean = Cleanup::default();
        let mut names = Vec::new();
        for e in fs::read_dir(dir).map_err(io_err(dir))? {
            let e = e.map_err(io_err(dir))?;
            if let Some(n) = e.file_name().to_str() {
                names.push(n.to_string());
            }
        }
        let mut opened = OpenReport::default();
        for n in &names {
            let path = dir.join(n);
            if n.ends_with(TEMP_SUFFIX) {
                fs::remove_file(&path).map_err(io_err(&path))?;
                clean.temp_files += 1;
                opened.unfinished.insert(id_of_file(n).to_string());
            } else if let Some(id) = n.strip_suffix(".bwf1") {
                if !names.iter().any(|m| m == &format!("{id}.json")) {
                    fs::remove_file(&path).map_err(io_err(&path))?;
                    clean.orphans += 1;
                    opened.unfinished.insert(id.to_string());
                }
            }
        }
        if clean.temp_files + clean.orphans > 0 {
            fsync_dir(dir).map_err(io_err(dir))?;
            tracing::warn!(
                dir = %dir.display(),
                temp_files = clean.temp_files,
                orphans = clean.orphans,
                "removed unfinished capture files left by a crash"
            );
        }
        let mut store = CaptureStore {
            dir: dir.to_path_buf(),
            retention,
            opened: OpenReport::default(),
        };
        // A crash between a write and its pruning can leave one too many.
        opened.pruned = store.prune_infos()?;
        store.opened = opened;
        Ok((store, clean))
    }

    pub fn dir(&self) -> &Path {
        &self.dir
    }

    /// What [`CaptureStore::open`] removed, by capture id.
    pub fn open_report(&self) -> &OpenReport {
        &self.opened
    }

    /// Creates the directory again if it has gone (removed under a
    /// running daemon): done before a retried write.
    ///
    /// # Errors
    /// [`CaptureError::Io`].
    pub fn ensure_dir(&self) -> Result<(), CaptureError> {
        fs::create_dir_all(&self.dir).map_err(io_err(&self.dir))
    }

    /// Writes a capture atomically (see the module docs), then prunes.
    /// Returns its metadata and how many old captures were removed.
    ///
    /// # Errors
    /// [`CaptureError::BadId`], [`CaptureError::Invalid`] (cannot encode),
    /// [`CaptureError::Io`]. A failed write leaves at most `.tmp` files,
    /// removed at the next start.
    pub fn write(&self, cap: &Capture) -> Result<(CaptureMeta, usize), CaptureError> {
        self.write_pruning(cap).map(|(m, p)| (m, p.len()))
    }

    /// [`CaptureStore::write`], returning the captures retention removed.
    ///
    /// # Errors
    /// As [`CaptureStore::write`]. A write that fails removes the `.tmp`
    /// files it made (best effort), so a retry starts clean.
    pub fn write_pruning(
        &self,
        cap: &Capture,
    ) -> Result<(CaptureMeta, Vec<CaptureInfo>), CaptureError> {
        validate_id(&cap.id)?;
        let wave_name = format!("{}.bwf1", cap.id);
        let meta_name = format!("{}.json", cap.id);
        let wave_path = self.dir.join(&wave_name);
        let invalid = |message: String| CaptureError::Invalid {
            path: wave_path.clone(),
            message,
        };
        let mut bytes = Vec::with_capacity(cap.samples.len() * 4 + 64);
        let mut frames = 0u32;
        for (k, chunk) in cap.samples.chunks(FRAME_SAMPLES).enumerate() {
            let offset = (k * FRAME_SAMPLES) as u64;
            let ts = if cap.timestamp_ns == 0 {
                0
            } else {
                cap.timestamp_ns + (offset as f64 * 1e9 / cap.sample_rate_hz) as u64
            };
            let header = Header::new(
                SampleFormat::F32,
                1,
                chunk.len() as u32,
                cap.first_sample + offset,
                ts,
                cap.sample_rate_hz,
            );
            encode_into(&header, SampleSlice::F32(chunk), &mut bytes)
                .map_err(|e| invalid(e.to_string()))?;
            frames += 1;
        }
        let meta = CaptureMeta {
            version: META_VERSION,
            id: cap.id.clone(),
            trip: cap.trip.clone(),
            waveform: WaveformInfo {
                file: wave_name.clone(),
                format: "BWF1".to_string(),
                sample_format: "f32".to_string(),
                unit: cap.trip.unit.clone(),
                sample_rate_hz: cap.sample_rate_hz,
                first_sample: cap.first_sample,
                timestamp_ns: cap.timestamp_ns,
                samples: cap.samples.len() as u64,
                pre_samples: cap.pre_samples,
                frames,
                bytes: bytes.len() as u64,
            },
            spectrum: cap.spectrum.clone(),
            bands: cap.bands.clone(),
            settings: cap.settings.clone(),
            complete: cap.end == EndReason::Complete,
            end_reason: cap.end.as_str().to_string(),
        };
        let mut json = serde_json::to_vec_pretty(&meta).map_err(|e| invalid(e.to_string()))?;
        json.push(b'\n');

        let wave_tmp = self.dir.join(format!("{wave_name}{TEMP_SUFFIX}"));
        let meta_tmp = self.dir.join(format!("{meta_name}{TEMP_SUFFIX}"));
        let meta_path = self.dir.join(&meta_name);
        let stored = (|| {
            write_synced(&wave_tmp, &bytes).map_err(io_err(&wave_tmp))?;
            write_synced(&meta_tmp, &json).map_err(io_err(&meta_tmp))?;
            fs::rename(&wave_tmp, &wave_path).map_err(io_err(&wave_tmp))?;
            fs::rename(&meta_tmp, &meta_path).map_err(io_err(&meta_tmp))?;
            fsync_dir(&self.dir).map_err(io_err(&self.dir))
        })();
        if let Err(e) = stored {
            for p in [&wave_tmp, &meta_tmp] {
                let _ = fs::remove_file(p);
            }
            return Err(e);
        }
        let removed = self.prune_infos()?;
        Ok((meta, removed))
    }

    /// Removes the oldest captures beyond the retention bounds; the newest
    /// stays whatever its size. Returns how many were removed.
    ///
    /// # Errors
    /// [`CaptureError::Io`].
    pub fn prune(&self) -> Result<usize, CaptureError> {
        self.prune_infos().map(|r| r.len())
    }

    /// [`CaptureStore::prune`], returning the captures removed.
    ///
    /// # Errors
    /// [`CaptureError::Io`].
    pub fn prune_infos(&self) -> Result<Vec<CaptureInfo>, CaptureError> {
        let mut all = list(&self.dir)?;
        let mut total: u64 = all.iter().map(|c| c.bytes).sum();
        let mut removed = Vec::new();
        // `list` is oldest first.
        while all.len() > 1
            && (all.len() > self.retention.max_count || total > self.retention.max_bytes)
        {
            let old = all.remove(0);
            // Metadata first: a crash in between leaves an orphan waveform,
            // which the next start removes.
            for name in [format!("{}.json", old.id), format!("{}.bwf1", old.id)] {
                let p = self.dir.join(name);
                match fs::remove_file(&p) {
                    Ok(()) => {}
                    Err(e) if e.kind() == io::ErrorKind::NotFound => {}
                    Err(e) => return Err(io_err(&p)(e)),
                }
            }
            total = total.saturating_sub(old.bytes);
            removed.push(old);
        }
        if !removed.is_empty() {
            fsync_dir(&self.dir).map_err(io_err(&self.dir))?;
        }
        Ok(removed)
    }
}

/// Every complete capture in `dir`, oldest first (missing dir: none).
/// A metadata file that cannot be parsed is skipped and logged.
///
/// # Errors
/// [`CaptureError::Io`] if the directory exists but cannot be read.
pub fn list(dir: &Path) -> Result<Vec<CaptureInfo>, CaptureError> {
    let entries = match fs::read_dir(dir) {
        Ok(e) => e,
        Err(e) if e.kind() == io::ErrorKind::NotFound => return Ok(Vec::new()),
        Err(e) => return Err(io_err(dir)(e)),
    };
    let mut out = Vec::new();
    for e in entries.flatten() {
        let name = e.file_name();
        let Some(id) = name.to_str().and_then(|n| n.strip_suffix(".json")) else {
            continue;
        };
        if validate_id(id).is_err() {
            continue;
        }
        match read_meta(dir, id) {
            Ok(m) => {
                let meta_bytes = e.metadata().map_or(0, |m| m.len());
                let wave_bytes = fs::metadata(dir.join(&m.waveform.file)).map_or(0, |m| m.len());
                out.push(CaptureInfo {
                    id: m.id,
                    channel: m.trip.channel,
                    band: m.trip.band,
                    from: m.trip.from,
                    to: m.trip.to,
                    time: m.trip.time,
                    unix_ns: m.trip.unix_ns,
                    samples: m.waveform.samples,
                    complete: m.complete,
                    end_reason: m.end_reason,
                    bytes: meta_bytes + wave_bytes,
                });
            }
            Err(error) => {
                tracing::warn!(%error, "capture metadata skipped");
            }
        }
    }
    out.sort_by(|a, b| a.id.cmp(&b.id));
    Ok(out)
}

/// Whether capture `id` is stored in `dir` (its metadata exists: a capture
/// exists only when its `.json` does).
pub fn exists(dir: &Path, id: &str) -> bool {
    validate_id(id).is_ok() && dir.join(format!("{id}.json")).is_file()
}

/// The metadata of capture `id`.
///
/// # Errors
/// [`CaptureError::BadId`], [`CaptureError::NotFound`],
/// [`CaptureError::Invalid`], [`CaptureError::Io`].
pub fn read_meta(dir: &Path, id: &str) -> Result<CaptureMeta, CaptureError> {
    validate_id(id)?;
    let path = dir.join(format!("{id}.json"));
    let bytes = match fs::read(&path) {
        Ok(b) => b,
        Err(e) if e.kind() == io::ErrorKind::NotFound => {
            return Err(CaptureError::NotFound(id.to_string()))
        }
        Err(e) => return Err(io_err(&path)(e)),
    };
    let meta: CaptureMeta = serde_json::from_slice(&bytes).map_err(|e| CaptureError::Invalid {
        path: path.clone(),
        message: e.to_string(),
    })?;
    if meta.id != id || meta.waveform.file != format!("{id}.bwf1") {
        return Err(CaptureError::Invalid {
            path,
            message: format!("names capture {:?}, file {:?}", meta.id, meta.waveform.file),
        });
    }
    Ok(meta)
}

/// Path of capture `id`'s waveform, if the capture exists (for streaming
/// the download).
///
/// # Errors
/// As [`read_meta`].
pub fn waveform_path(dir: &Path, id: &str) -> Result<PathBuf, CaptureError> {
    let meta = read_meta(dir, id)?;
    let p = dir.join(meta.waveform.file);
    if p.exists() {
        Ok(p)
    } else {
        Err(CaptureError::NotFound(id.to_string()))
    }
}

/// A capture's waveform bytes (BWF1).
///
/// # Errors
/// As [`read_meta`].
pub fn read_waveform(dir: &Path, id: &str) -> Result<Vec<u8>, CaptureError> {
    let p = waveform_path(dir, id)?;
    fs::read(&p).map_err(io_err(&p))
}

/// The time of a capture, RFC 3339 (helper for trip infos).
pub fn trip_time(unix_ns: u64) -> String {
    rfc3339(unix_ns)
}
