//! The config file as serde reads it: `RawConfig` and every `Raw*` table
//! below it, with the defaults of optional keys. Unknown keys are rejected
//! (`deny_unknown_fields`) in every table. Nothing here checks values:
//! that is `check`'s job. The alarm and health tables live in `alarms` and
//! `health`.

use serde::Deserialize;

use super::alarms::{RawAlarm, RawAlarms};
use super::bearing;
use super::health::RawHealth;
use super::kinds::{
    AveragingMode, Detrend, FlowControl, Measure, Parity, SecondConnection, SpectrumKind,
    WindowKind,
};

#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawConfig {
    pub server: RawServer,
    #[serde(default)]
    pub dsp: RawDsp,
    #[serde(rename = "source", default)]
    pub sources: Vec<RawSource>,
    #[serde(rename = "machine", default)]
    pub machines: Vec<RawMachine>,
    #[serde(rename = "channel", default)]
    pub channels: Vec<RawChannel>,
    /// Where alarm records live; required when any alarm is configured.
    pub alarms: Option<RawAlarms>,
    /// What `/metrics` leaves out (default: nothing).
    #[serde(default)]
    pub metrics: super::exposition::RawMetrics,
    /// The history database (off when absent).
    pub history: Option<super::history::RawHistory>,
}

/// Alarms on a channel's time-domain overall levels.
#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawOverallAlarms {
    /// On the RMS of the newest block (channel unit).
    pub rms: Option<RawAlarm>,
    /// On the peak of the newest block (channel unit).
    pub peak: Option<RawAlarm>,
    /// On the crest factor (dimensionless).
    pub crest_factor: Option<RawAlarm>,
}

/// A machine train whose running speed order bands follow.
#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawMachine {
    pub name: String,
    pub speed: RawSpeed,
    #[serde(rename = "bearing", default)]
    pub bearings: Vec<RawBearing>,
}

/// Where a machine's running speed comes from.
#[derive(Debug, Clone, Deserialize)]
#[serde(tag = "kind", rename_all = "kebab-case", deny_unknown_fields)]
pub enum RawSpeed {
    /// A constant speed.
    Fixed { rpm: f64 },
    /// Measured from a tachometer channel's pulse train.
    Tach {
        channel: String,
        #[serde(default = "default_ppr")]
        pulses_per_rev: u32,
        /// Edge threshold, in the tach channel's unit.
        threshold: f64,
        /// Half-width of the Schmitt trigger around the threshold.
        #[serde(default)]
        hysteresis: f64,
        /// Revolutions the speed is averaged over.
        #[serde(default = "default_average_revs")]
        average_revs: u32,
        /// Speed is unknown when no pulse came for this long.
        #[serde(default = "default_stale")]
        stale_s: f64,
    },
    /// The largest line of a channel's spectrum within a search range.
    Peak {
        channel: String,
        min_hz: f64,
        max_hz: f64,
        /// Speed is unknown when no spectrum came for this long.
        #[serde(default = "default_stale")]
        stale_s: f64,
    },
}

fn default_ppr() -> u32 {
    1
}
fn default_average_revs() -> u32 {
    8
}
fn default_stale() -> f64 {
    2.0
}

#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawBearing {
    pub name: String,
    /// Number of rolling elements.
    pub elements: u32,
    pub element_diameter_mm: f64,
    pub pitch_diameter_mm: f64,
    #[serde(default)]
    pub contact_angle_deg: f64,
}

/// Band-pass of a channel's envelope analysis, around a resonance.
#[derive(Debug, Clone, Copy, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawEnvelope {
    pub lo_hz: f64,
    pub hi_hz: f64,
}

#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawServer {
    /// Address the HTTP server binds, e.g. "127.0.0.1:9750".
    pub listen: String,
    /// Most HTTP connections open at once; more are closed at accept.
    #[serde(default = "default_max_connections")]
    pub max_connections: usize,
    /// Longest a client may take to send a request's headers, from the
    /// moment the server waits for them (also between keep-alive requests).
    #[serde(default = "default_header_timeout_s")]
    pub header_timeout_s: f64,
    /// A connection on which nothing is read or written for this long is
    /// closed (a stalled reader of a response, a half-open socket).
    #[serde(default = "default_http_idle_timeout_s")]
    pub idle_timeout_s: f64,
    /// Longest one request may take to be answered (503 after).
    #[serde(default = "default_request_timeout_s")]
    pub request_timeout_s: f64,
    /// Web-config file (YAML, the Prometheus exporters' keys) turning on
    /// TLS and basic auth; a relative path is relative to the config
    /// file's directory (`config::load_with`).
    #[serde(default)]
    pub web_config: Option<std::path::PathBuf>,
    /// Seconds of band and overall values each channel keeps in memory
    /// for `/api/v1/channels/{name}/trend` (one point a second).
    #[serde(default = "default_trend_seconds")]
    pub trend_seconds: u32,
}

fn default_trend_seconds() -> u32 {
    600
}

fn default_max_connections() -> usize {
    256
}

fn default_header_timeout_s() -> f64 {
    10.0
}

fn default_http_idle_timeout_s() -> f64 {
    60.0
}

fn default_request_timeout_s() -> f64 {
    30.0
}

#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawDsp {
    /// Number of DSP worker threads; default: the number of CPU cores.
    pub workers: Option<usize>,
    /// Capacity of each channel's ring, in seconds of samples. A source that
    /// outruns the DSP by more than this loses samples (counted).
    #[serde(default = "default_ring_seconds")]
    pub ring_seconds: f64,
}

impl Default for RawDsp {
    fn default() -> Self {
        RawDsp {
            workers: None,
            ring_seconds: default_ring_seconds(),
        }
    }
}

fn default_ring_seconds() -> f64 {
    2.0
}

/// A source of samples; `kind` picks the variant.
///
/// The stream keys (`framing`, `channels`, `sample_rate_hz`,
/// `sample_format`, `max_frame_bytes`) are repeated in each stream variant
/// on purpose: serde cannot combine `flatten` with `deny_unknown_fields`,
/// and rejecting unknown keys matters more. `stream_spec` checks them once.
#[derive(Debug, Clone, Deserialize)]
#[serde(tag = "kind", rename_all = "kebab-case", deny_unknown_fields)]
pub enum RawSource {
    /// The built-in simulated pump train of the demo.
    Sim {
        name: String,
        /// Scenario to play; only "p2-pump" exists.
        #[serde(default = "default_scenario")]
        scenario: String,
        /// Seed of the noise generator; the same seed gives the same samples.
        #[serde(default = "default_seed")]
        seed: u64,
        /// Play faster (> 1) or slower (< 1) than real time.
        #[serde(default = "default_speed")]
        speed: f64,
    },
    /// bandwatch dials the DAQ box and reconnects when the link drops.
    TcpConnect {
        name: String,
        /// "host:port" of the DAQ box.
        address: String,
        /// "bwf1" (default), "lines" or "raw".
        #[serde(default = "default_framing")]
        framing: String,
        /// Channels in one instant (checked against BWF1 headers).
        channels: usize,
        /// Samples per second per channel (checked against BWF1 headers).
        sample_rate_hz: f64,
        /// Sample format of `raw` framing: "i16", "i24", "i32", "f32", "f64".
        sample_format: Option<String>,
        /// Largest BWF1 frame accepted, bytes.
        #[serde(default = "default_max_frame")]
        max_frame_bytes: usize,
        /// A frame at most this far behind the stream (seconds of samples)
        /// is late; further behind, the stream restarted.
        #[serde(default = "default_reorder_window")]
        reorder_window_s: f64,
        /// A forward jump of at most this (seconds of samples, plus the
        /// time since the last frame) is a gap; further, a restart.
        #[serde(default = "default_max_gap")]
        max_gap_s: f64,
        /// First wait before reconnecting, doubled after each failure.
        #[serde(default = "default_backoff_min")]
        reconnect_min_ms: u64,
        /// Longest wait between reconnects.
        #[serde(default = "default_backoff_max")]
        reconnect_max_ms: u64,
        /// A connection that delivers no byte for this long is closed and
        /// dialled again.
        #[serde(default = "default_idle_timeout_s")]
        idle_timeout_s: f64,
    },
    /// The DAQ box dials bandwatch.
    TcpListen {
        name: String,
        /// Address to listen on, e.g. "0.0.0.0:7700".
        listen: String,
        /// "bwf1" (default), "lines" or "raw".
        #[serde(default = "default_framing")]
        framing: String,
        /// Channels in one instant (checked against BWF1 headers).
        channels: usize,
        /// Samples per second per channel (checked against BWF1 headers).
        sample_rate_hz: f64,
        /// Sample format of `raw` framing: "i16", "i24", "i32", "f32", "f64".
        sample_format: Option<String>,
        /// Largest BWF1 frame accepted, bytes.
        #[serde(default = "default_max_frame")]
        max_frame_bytes: usize,
        /// A frame at most this far behind the stream (seconds of samples)
        /// is late; further behind, the stream restarted.
        #[serde(default = "default_reorder_window")]
        reorder_window_s: f64,
        /// A forward jump of at most this (seconds of samples, plus the
        /// time since the last frame) is a gap; further, a restart.
        #[serde(default = "default_max_gap")]
        max_gap_s: f64,
        /// What a second connection does while one is active.
        #[serde(default)]
        on_second_connection: SecondConnection,
        /// `replace-silent`: how long the active connection must have been
        /// silent for a newcomer to replace it.
        #[serde(default = "default_replace_after_silent_s")]
        replace_after_silent_s: f64,
        /// A connection that delivers no byte for this long is closed.
        #[serde(default = "default_idle_timeout_s")]
        idle_timeout_s: f64,
    },
    /// One BWF1 frame per datagram.
    Udp {
        name: String,
        listen: String,
        channels: usize,
        sample_rate_hz: f64,
        /// Largest datagram accepted; bigger ones are counted as truncated.
        #[serde(default = "default_max_datagram")]
        max_datagram_bytes: usize,
        /// A frame at most this far behind the stream (seconds of samples)
        /// is late; further behind, the stream restarted.
        #[serde(default = "default_reorder_window")]
        reorder_window_s: f64,
        /// A forward jump of at most this (seconds of samples, plus the
        /// time since the last frame) is a gap; further, a restart.
        #[serde(default = "default_max_gap")]
        max_gap_s: f64,
    },
    /// A serial line (RS-232/485, USB adapter).
    Serial {
        name: String,
        /// e.g. "/dev/ttyUSB0".
        device: String,
        baud: u32,
        #[serde(default = "default_data_bits")]
        data_bits: u8,
        #[serde(default)]
        parity: Parity,
        #[serde(default = "default_stop_bits")]
        stop_bits: u8,
        #[serde(default)]
        flow_control: FlowControl,
        /// "bwf1" (default), "lines" or "raw".
        #[serde(default = "default_framing")]
        framing: String,
        /// Channels in one instant (checked against BWF1 headers).
        channels: usize,
        /// Samples per second per channel (checked against BWF1 headers).
        sample_rate_hz: f64,
        /// Sample format of `raw` framing: "i16", "i24", "i32", "f32", "f64".
        sample_format: Option<String>,
        /// Largest BWF1 frame accepted, bytes.
        #[serde(default = "default_max_frame")]
        max_frame_bytes: usize,
        /// A frame at most this far behind the stream (seconds of samples)
        /// is late; further behind, the stream restarted.
        #[serde(default = "default_reorder_window")]
        reorder_window_s: f64,
        /// A forward jump of at most this (seconds of samples, plus the
        /// time since the last frame) is a gap; further, a restart.
        #[serde(default = "default_max_gap")]
        max_gap_s: f64,
        /// Wait between attempts to reopen a vanished port.
        #[serde(default = "default_backoff_min")]
        reopen_ms: u64,
    },
}

fn default_idle_timeout_s() -> f64 {
    10.0
}

fn default_replace_after_silent_s() -> f64 {
    2.0
}

fn default_backoff_min() -> u64 {
    200
}
fn default_backoff_max() -> u64 {
    10_000
}
fn default_max_datagram() -> usize {
    65_507
}
fn default_reorder_window() -> f64 {
    crate::config::spec::SequenceSpec::DEFAULT.reorder_window_s
}
fn default_max_gap() -> f64 {
    crate::config::spec::SequenceSpec::DEFAULT.max_gap_s
}
fn default_data_bits() -> u8 {
    8
}
fn default_stop_bits() -> u8 {
    1
}
fn default_framing() -> String {
    "bwf1".to_string()
}
fn default_max_frame() -> usize {
    16 << 20
}

fn default_scenario() -> String {
    "p2-pump".to_string()
}
fn default_seed() -> u64 {
    2
}
fn default_speed() -> f64 {
    1.0
}

impl RawSource {
    pub fn name(&self) -> &str {
        match self {
            RawSource::Sim { name, .. }
            | RawSource::TcpConnect { name, .. }
            | RawSource::TcpListen { name, .. }
            | RawSource::Udp { name, .. }
            | RawSource::Serial { name, .. } => name,
        }
    }
}

#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawChannel {
    pub name: String,
    pub source: String,
    /// Position of this channel in the source's interleaved frame (0-based).
    pub index: usize,
    /// Engineering unit of the scaled samples, e.g. "g", "mm/s", "V".
    pub unit: String,
    /// Units per count (or per volt for float samples): value = raw·scale + offset.
    pub scale: Option<f64>,
    /// Converter step in volts; with `sensitivity_v_per_unit` an alternative to `scale`.
    pub volts_per_count: Option<f64>,
    /// Sensor sensitivity in volts per unit (e.g. 0.1 for a 100 mV/g accelerometer).
    pub sensitivity_v_per_unit: Option<f64>,
    /// Added after scaling, in units.
    #[serde(default)]
    pub offset: f64,
    /// Samples per FFT block.
    #[serde(default = "default_block")]
    pub block: usize,
    /// FFT length; >= block, the rest zero-padded. Default: block.
    pub nfft: Option<usize>,
    #[serde(default = "default_window")]
    pub window: WindowKind,
    /// Fraction of a block shared with the next one, 0 to 0.95.
    #[serde(default = "default_overlap")]
    pub overlap: f64,
    #[serde(default)]
    pub detrend: Detrend,
    #[serde(default)]
    pub averaging: RawAveraging,
    /// Lines below this frequency are zeroed when integrating
    /// (acceleration -> velocity -> displacement).
    #[serde(default = "default_low_cut")]
    pub integration_low_cut_hz: f64,
    /// Machine whose speed this channel's order bands follow.
    pub machine: Option<String>,
    /// Envelope analysis band-pass; bands with `spectrum = "envelope"` read
    /// the envelope spectrum.
    pub envelope: Option<RawEnvelope>,
    /// Sensor health checks (flatline, clipping, bias, stale, gaps).
    pub health: Option<RawHealth>,
    /// Alarms on the time-domain overall levels.
    pub overall_alarm: Option<RawOverallAlarms>,
    #[serde(rename = "band", default)]
    pub bands: Vec<RawBand>,
}

fn default_block() -> usize {
    8192
}
fn default_window() -> WindowKind {
    WindowKind::Hann
}
fn default_overlap() -> f64 {
    0.5
}
fn default_low_cut() -> f64 {
    2.0
}

#[derive(Debug, Clone, Copy, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawAveraging {
    pub mode: AveragingMode,
    #[serde(default = "default_avg_count")]
    pub count: u32,
}

impl Default for RawAveraging {
    fn default() -> Self {
        RawAveraging {
            mode: AveragingMode::Linear,
            count: default_avg_count(),
        }
    }
}

fn default_avg_count() -> u32 {
    4
}

#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawBand {
    pub name: String,
    /// Fixed edges in Hz (give these, or `orders`, or `bearing`).
    pub lo_hz: Option<f64>,
    pub hi_hz: Option<f64>,
    /// Edges in orders of the channel's machine speed.
    pub orders: Option<[f64; 2]>,
    /// A bearing of the channel's machine, with `defect`.
    pub bearing: Option<String>,
    pub defect: Option<bearing::Defect>,
    /// Width of a bearing band in orders, centred on the defect frequency.
    pub width_orders: Option<f64>,
    /// Bearing bands: also the 2nd … k-th harmonic (energy summed).
    #[serde(default = "default_harmonics")]
    pub harmonics: u32,
    /// "raw" (default) or "envelope" (the channel's envelope spectrum).
    #[serde(default)]
    pub spectrum: SpectrumKind,
    #[serde(default = "default_measure")]
    pub measure: Measure,
    /// Unit of the band's value; a velocity or displacement unit on an
    /// acceleration channel integrates. Default: the channel's unit.
    pub unit: Option<String>,
    /// Alert/danger limits on this band.
    pub alarm: Option<RawAlarm>,
}

fn default_measure() -> Measure {
    Measure::Rms
}

fn default_harmonics() -> u32 {
    1
}
