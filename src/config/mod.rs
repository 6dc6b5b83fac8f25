//! Configuration: the TOML file as serde reads it (`RawConfig`, unknown keys
//! rejected), and `validate`, which checks every rule at once and turns the
//! file into the typed `Config` the pipeline runs on. Each problem found is a
//! `ConfigIssue` that names the field path and says why.

use std::collections::{HashMap, HashSet};
use std::fmt;
use std::net::SocketAddr;
use std::path::{Path, PathBuf};

use serde::Deserialize;

use crate::frame::SampleFormat;
use crate::units::{convertible, Unit};
use alarms::{AlarmSpec, AlarmsSpec, HealthSpec, RawAlarm, RawAlarms, RawHealth};

pub mod alarms;
pub mod bearing;
pub mod fixture;
pub mod zones;

/// Sample rate of the built-in pump scenario (README, "The demo").
pub const SIM_SAMPLE_RATE_HZ: f64 = 25_600.0;

/// Channels of the built-in pump scenario (README, "The demo").
pub const SIM_CHANNELS: usize = 4;

// ---------------------------------------------------------------------------
// The file as written
// ---------------------------------------------------------------------------

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
        /// First wait before reconnecting, doubled after each failure.
        #[serde(default = "default_backoff_min")]
        reconnect_min_ms: u64,
        /// Longest wait between reconnects.
        #[serde(default = "default_backoff_max")]
        reconnect_max_ms: u64,
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
        /// What a second connection does while one is active.
        #[serde(default)]
        on_second_connection: SecondConnection,
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
        /// Wait between attempts to reopen a vanished port.
        #[serde(default = "default_backoff_min")]
        reopen_ms: u64,
    },
}

#[derive(Debug, Clone, Copy, PartialEq, Eq, Deserialize, Default)]
#[serde(rename_all = "kebab-case")]
pub enum SecondConnection {
    /// Keep the active connection; close the newcomer.
    #[default]
    Refuse,
    /// Close the active connection; the newcomer takes over.
    Replace,
}

#[derive(Debug, Clone, Copy, PartialEq, Eq, Deserialize, Default)]
#[serde(rename_all = "kebab-case")]
pub enum Parity {
    #[default]
    None,
    Odd,
    Even,
}

#[derive(Debug, Clone, Copy, PartialEq, Eq, Deserialize, Default)]
#[serde(rename_all = "kebab-case")]
pub enum FlowControl {
    #[default]
    None,
    Software,
    Hardware,
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

/// Analysis window (formulas in `dsp::window`).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum WindowKind {
    Rectangular,
    Hann,
    /// Hamming with a0 = 0.54, a1 = 0.46.
    Hamming,
    /// 4-term Blackman-Harris, −92 dB sidelobes (Harris 1978).
    BlackmanHarris,
    /// 5-term flat top as in scipy.signal.windows.flattop (D'Antona & Ferrero 2006).
    FlatTop,
}

impl WindowKind {
    pub const ALL: [WindowKind; 5] = [
        WindowKind::Rectangular,
        WindowKind::Hann,
        WindowKind::Hamming,
        WindowKind::BlackmanHarris,
        WindowKind::FlatTop,
    ];

    pub fn as_str(self) -> &'static str {
        match self {
            WindowKind::Rectangular => "rectangular",
            WindowKind::Hann => "hann",
            WindowKind::Hamming => "hamming",
            WindowKind::BlackmanHarris => "blackman-harris",
            WindowKind::FlatTop => "flat-top",
        }
    }
}

/// What is removed from each block before the window.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Deserialize, Default)]
#[serde(rename_all = "kebab-case")]
pub enum Detrend {
    /// Nothing: the DC line shows the sensor's offset.
    None,
    /// The block's mean (as scipy.signal.welch does by default).
    #[default]
    Mean,
}

#[derive(Debug, Clone, Copy, PartialEq, Eq, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum AveragingMode {
    /// Every block is published as it is.
    None,
    /// Mean of `count` blocks, published once per `count` blocks.
    Linear,
    /// Running mean with weight 1/count on the newest block.
    Exponential,
    /// Largest value per line over `count` blocks.
    PeakHold,
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

#[derive(Debug, Clone, Copy, PartialEq, Eq, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum Measure {
    /// Root of the power in the band (energy), noise-bandwidth corrected.
    Rms,
    /// Largest single line in the band, as peak amplitude (√2 × line RMS).
    Peak,
}

impl Measure {
    pub fn as_str(self) -> &'static str {
        match self {
            Measure::Rms => "rms",
            Measure::Peak => "peak",
        }
    }
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

/// Which spectrum a band reads.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Deserialize, Default)]
#[serde(rename_all = "kebab-case")]
pub enum SpectrumKind {
    #[default]
    Raw,
    Envelope,
}

impl SpectrumKind {
    pub fn as_str(self) -> &'static str {
        match self {
            SpectrumKind::Raw => "raw",
            SpectrumKind::Envelope => "envelope",
        }
    }
}

// ---------------------------------------------------------------------------
// The validated config
// ---------------------------------------------------------------------------

#[derive(Debug, Clone)]
pub struct Config {
    /// `[alarms]`, when given.
    pub alarms: Option<AlarmsSpec>,
    pub listen: SocketAddr,
    pub workers: usize,
    pub ring_seconds: f64,
    pub sources: Vec<SourceSpec>,
    pub machines: Vec<MachineSpec>,
    pub channels: Vec<ChannelSpec>,
}

#[derive(Debug, Clone)]
pub struct MachineSpec {
    pub name: String,
    pub speed: SpeedSource,
    pub bearings: Vec<(String, bearing::BearingGeometry)>,
}

#[derive(Debug, Clone, PartialEq)]
pub enum SpeedSource {
    Fixed {
        hz: f64,
    },
    Tach {
        channel: String,
        pulses_per_rev: u32,
        threshold: f64,
        hysteresis: f64,
        average_revs: u32,
        stale_s: f64,
    },
    Peak {
        channel: String,
        min_hz: f64,
        max_hz: f64,
        stale_s: f64,
    },
}

impl SpeedSource {
    pub fn as_str(&self) -> &'static str {
        match self {
            SpeedSource::Fixed { .. } => "fixed",
            SpeedSource::Tach { .. } => "tach",
            SpeedSource::Peak { .. } => "peak",
        }
    }
}

/// Where a band's edges come from.
#[derive(Debug, Clone, PartialEq)]
pub enum BandEdges {
    /// Fixed, in Hz.
    Hz { lo: f64, hi: f64 },
    /// Windows in orders of running speed, [lo, hi] each (several for
    /// bearing harmonics); lines of all windows count once.
    Orders { windows: Vec<(f64, f64)> },
}

#[derive(Debug, Clone)]
pub struct SourceSpec {
    pub name: String,
    pub sample_rate_hz: f64,
    /// Channels in one frame of this source.
    pub channels: usize,
    pub kind: SourceKind,
}

#[derive(Debug, Clone)]
pub enum SourceKind {
    Sim {
        seed: u64,
        speed: f64,
    },
    TcpConnect {
        address: String,
        stream: StreamSpec,
        backoff: Backoff,
    },
    TcpListen {
        listen: SocketAddr,
        stream: StreamSpec,
        on_second_connection: SecondConnection,
    },
    Udp {
        listen: SocketAddr,
        max_datagram_bytes: usize,
    },
    Serial {
        device: String,
        baud: u32,
        data_bits: u8,
        parity: Parity,
        stop_bits: u8,
        flow_control: FlowControl,
        stream: StreamSpec,
        reopen_ms: u64,
    },
}

impl SourceKind {
    pub fn as_str(&self) -> &'static str {
        match self {
            SourceKind::Sim { .. } => "sim",
            SourceKind::TcpConnect { .. } => "tcp-connect",
            SourceKind::TcpListen { .. } => "tcp-listen",
            SourceKind::Udp { .. } => "udp",
            SourceKind::Serial { .. } => "serial",
        }
    }
}

/// How bytes on a stream transport become samples.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Framing {
    Bwf1,
    Lines,
    Raw(SampleFormat),
}

#[derive(Debug, Clone)]
pub struct StreamSpec {
    pub framing: Framing,
    pub max_frame_bytes: usize,
}

/// Reconnect waits: doubling from `min_ms` to `max_ms`, with jitter.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Backoff {
    pub min_ms: u64,
    pub max_ms: u64,
}

#[derive(Debug, Clone)]
pub struct ChannelSpec {
    pub name: String,
    pub source: String,
    pub index: usize,
    pub unit: Unit,
    pub scale: f64,
    pub offset: f64,
    pub sample_rate_hz: f64,
    pub block: usize,
    pub nfft: usize,
    /// Samples between the starts of consecutive blocks.
    pub hop: usize,
    pub overlap: f64,
    pub window: WindowKind,
    pub detrend: Detrend,
    pub averaging: AveragingMode,
    pub average_count: u32,
    pub integration_low_cut_hz: f64,
    pub machine: Option<String>,
    pub envelope: Option<(f64, f64)>,
    pub bands: Vec<BandSpec>,
    pub health: HealthSpec,
    /// Alarms of this channel: on bands and on overall levels.
    pub alarms: Vec<ChannelAlarm>,
}

/// What an alarm watches.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum AlarmTarget {
    /// The band at this index of `ChannelSpec::bands`.
    Band(usize),
    OverallRms,
    OverallPeak,
    CrestFactor,
}

/// One configured alarm of a channel.
#[derive(Debug, Clone)]
pub struct ChannelAlarm {
    /// The band's name, or `overall-rms`, `overall-peak`, `overall-crest-factor`.
    pub name: String,
    pub target: AlarmTarget,
    /// Unit of the watched value (None: dimensionless).
    pub unit: Option<Unit>,
    pub spec: AlarmSpec,
}

impl ChannelSpec {
    pub fn nyquist_hz(&self) -> f64 {
        self.sample_rate_hz / 2.0
    }
    /// Spacing of the spectral lines, fs / nfft.
    pub fn df_hz(&self) -> f64 {
        self.sample_rate_hz / self.nfft as f64
    }
    /// Number of single-sided lines, DC to Nyquist.
    pub fn bins(&self) -> usize {
        self.nfft / 2 + 1
    }
}

#[derive(Debug, Clone)]
pub struct BandSpec {
    pub name: String,
    pub edges: BandEdges,
    pub measure: Measure,
    pub unit: Unit,
    pub spectrum: SpectrumKind,
    /// For bearing bands: (bearing, defect), for the API.
    pub bearing: Option<(String, bearing::Defect)>,
}

// ---------------------------------------------------------------------------
// Errors
// ---------------------------------------------------------------------------

/// One problem in a config, with the path of the field at fault.
#[derive(Debug, Clone, PartialEq)]
pub struct ConfigIssue {
    pub path: String,
    pub message: String,
}

impl fmt::Display for ConfigIssue {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(f, "{}: {}", self.path, self.message)
    }
}

#[derive(Debug, thiserror::Error)]
pub enum ConfigError {
    #[error("cannot read config {path}: {source}")]
    Io {
        path: PathBuf,
        #[source]
        source: std::io::Error,
    },
    #[error("config {path} is not valid TOML for bandwatch: {message}")]
    Parse { path: PathBuf, message: String },
    #[error("config {path} has {} problem(s):\n{}", issues.len(), issues.iter().map(|i| format!("  - {i}")).collect::<Vec<_>>().join("\n"))]
    Invalid {
        path: PathBuf,
        issues: Vec<ConfigIssue>,
    },
}

/// Reads, parses and validates a config file.
pub fn load(path: &Path) -> Result<Config, ConfigError> {
    let text = std::fs::read_to_string(path).map_err(|source| ConfigError::Io {
        path: path.to_path_buf(),
        source,
    })?;
    parse_str(&text).map_err(|e| match e {
        ParseError::Toml(message) => ConfigError::Parse {
            path: path.to_path_buf(),
            message,
        },
        ParseError::Invalid(issues) => ConfigError::Invalid {
            path: path.to_path_buf(),
            issues,
        },
    })
}

/// Failure of [`parse_str`].
#[derive(Debug)]
pub enum ParseError {
    Toml(String),
    Invalid(Vec<ConfigIssue>),
}

/// Parses and validates config text.
pub fn parse_str(text: &str) -> Result<Config, ParseError> {
    let raw: RawConfig = toml::from_str(text).map_err(|e| ParseError::Toml(e.to_string()))?;
    validate(&raw).map_err(ParseError::Invalid)
}

// ---------------------------------------------------------------------------
// Validation
// ---------------------------------------------------------------------------

struct Issues(Vec<ConfigIssue>);

impl Issues {
    fn add(&mut self, path: impl Into<String>, message: impl Into<String>) {
        self.0.push(ConfigIssue {
            path: path.into(),
            message: message.into(),
        });
    }
}

const MAX_BLOCK: usize = 1 << 20;
const MIN_BLOCK: usize = 16;

/// Checks every rule and returns the typed config, or every problem found.
pub fn validate(raw: &RawConfig) -> Result<Config, Vec<ConfigIssue>> {
    let mut issues = Issues(Vec::new());

    let listen = match raw.server.listen.parse::<SocketAddr>() {
        Ok(a) => Some(a),
        Err(_) => {
            issues.add(
                "server.listen",
                format!(
                    "{:?} is not an IP address with a port (e.g. \"127.0.0.1:9750\")",
                    raw.server.listen
                ),
            );
            None
        }
    };

    let workers = match raw.dsp.workers {
        None => std::thread::available_parallelism().map_or(1, |n| n.get()),
        Some(n) if (1..=256).contains(&n) => n,
        Some(n) => {
            issues.add("dsp.workers", format!("{n} is out of range 1 to 256"));
            1
        }
    };
    if !(raw.dsp.ring_seconds.is_finite() && (0.05..=600.0).contains(&raw.dsp.ring_seconds)) {
        issues.add(
            "dsp.ring_seconds",
            format!("{} is out of range 0.05 to 600", raw.dsp.ring_seconds),
        );
    }

    // Sources.
    let mut sources = Vec::new();
    let mut source_names = HashSet::new();
    for (i, s) in raw.sources.iter().enumerate() {
        let path = format!("source[{i}] {:?}", s.name());
        if s.name().is_empty() {
            issues.add(format!("source[{i}].name"), "must not be empty");
        }
        if !source_names.insert(s.name().to_string()) {
            issues.add(
                format!("{path}.name"),
                "duplicate source name (names must be unique)",
            );
        }
        match s {
            RawSource::Sim {
                name,
                scenario,
                seed,
                speed,
            } => {
                if scenario != "p2-pump" {
                    issues.add(
                        format!("{path}.scenario"),
                        format!("unknown scenario {scenario:?} (known: \"p2-pump\")"),
                    );
                }
                if !(speed.is_finite() && *speed > 0.0 && *speed <= 1000.0) {
                    issues.add(
                        format!("{path}.speed"),
                        format!("{speed} is out of range (0, 1000]"),
                    );
                }
                sources.push(SourceSpec {
                    name: name.clone(),
                    sample_rate_hz: SIM_SAMPLE_RATE_HZ,
                    channels: SIM_CHANNELS,
                    kind: SourceKind::Sim {
                        seed: *seed,
                        speed: *speed,
                    },
                });
            }
            RawSource::TcpConnect {
                name,
                address,
                framing,
                channels,
                sample_rate_hz,
                sample_format,
                max_frame_bytes,
                reconnect_min_ms,
                reconnect_max_ms,
            } => {
                if !address.contains(':') {
                    issues.add(
                        format!("{path}.address"),
                        format!("{address:?} is not \"host:port\""),
                    );
                }
                if *reconnect_min_ms == 0 || reconnect_min_ms > reconnect_max_ms {
                    issues.add(
                        format!("{path}.reconnect_min_ms"),
                        format!(
                            "{reconnect_min_ms} must be > 0 and <= reconnect_max_ms {reconnect_max_ms}"
                        ),
                    );
                }
                let stream = stream_spec(
                    &mut issues,
                    &path,
                    framing,
                    sample_format.as_deref(),
                    *max_frame_bytes,
                );
                check_shape(&mut issues, &path, *channels, *sample_rate_hz);
                sources.push(SourceSpec {
                    name: name.clone(),
                    sample_rate_hz: *sample_rate_hz,
                    channels: *channels,
                    kind: SourceKind::TcpConnect {
                        address: address.clone(),
                        stream,
                        backoff: Backoff {
                            min_ms: *reconnect_min_ms,
                            max_ms: *reconnect_max_ms,
                        },
                    },
                });
            }
            RawSource::TcpListen {
                name,
                listen,
                framing,
                channels,
                sample_rate_hz,
                sample_format,
                max_frame_bytes,
                on_second_connection,
            } => {
                let addr = socket_addr(&mut issues, &format!("{path}.listen"), listen);
                let stream = stream_spec(
                    &mut issues,
                    &path,
                    framing,
                    sample_format.as_deref(),
                    *max_frame_bytes,
                );
                check_shape(&mut issues, &path, *channels, *sample_rate_hz);
                sources.push(SourceSpec {
                    name: name.clone(),
                    sample_rate_hz: *sample_rate_hz,
                    channels: *channels,
                    kind: SourceKind::TcpListen {
                        listen: addr,
                        stream,
                        on_second_connection: *on_second_connection,
                    },
                });
            }
            RawSource::Udp {
                name,
                listen,
                channels,
                sample_rate_hz,
                max_datagram_bytes,
            } => {
                let addr = socket_addr(&mut issues, &format!("{path}.listen"), listen);
                check_shape(&mut issues, &path, *channels, *sample_rate_hz);
                if !(64..=65_507).contains(max_datagram_bytes) {
                    issues.add(
                        format!("{path}.max_datagram_bytes"),
                        format!("{max_datagram_bytes} is out of range 64 to 65507"),
                    );
                }
                sources.push(SourceSpec {
                    name: name.clone(),
                    sample_rate_hz: *sample_rate_hz,
                    channels: *channels,
                    kind: SourceKind::Udp {
                        listen: addr,
                        max_datagram_bytes: *max_datagram_bytes,
                    },
                });
            }
            RawSource::Serial {
                name,
                device,
                baud,
                data_bits,
                parity,
                stop_bits,
                flow_control,
                framing,
                channels,
                sample_rate_hz,
                sample_format,
                max_frame_bytes,
                reopen_ms,
            } => {
                if device.is_empty() {
                    issues.add(format!("{path}.device"), "must not be empty");
                }
                if *baud == 0 {
                    issues.add(format!("{path}.baud"), "must be > 0");
                }
                if !(5..=8).contains(data_bits) {
                    issues.add(
                        format!("{path}.data_bits"),
                        format!("{data_bits} is not 5, 6, 7 or 8"),
                    );
                }
                if !(1..=2).contains(stop_bits) {
                    issues.add(
                        format!("{path}.stop_bits"),
                        format!("{stop_bits} is not 1 or 2"),
                    );
                }
                if *reopen_ms == 0 {
                    issues.add(format!("{path}.reopen_ms"), "must be > 0");
                }
                let stream = stream_spec(
                    &mut issues,
                    &path,
                    framing,
                    sample_format.as_deref(),
                    *max_frame_bytes,
                );
                check_shape(&mut issues, &path, *channels, *sample_rate_hz);
                sources.push(SourceSpec {
                    name: name.clone(),
                    sample_rate_hz: *sample_rate_hz,
                    channels: *channels,
                    kind: SourceKind::Serial {
                        device: device.clone(),
                        baud: *baud,
                        data_bits: *data_bits,
                        parity: *parity,
                        stop_bits: *stop_bits,
                        flow_control: *flow_control,
                        stream,
                        reopen_ms: *reopen_ms,
                    },
                });
            }
        }
    }
    if raw.sources.is_empty() {
        issues.add("source", "at least one [[source]] is required");
    }
    let by_name: HashMap<&str, &SourceSpec> =
        sources.iter().map(|s| (s.name.as_str(), s)).collect();

    // Channels.
    let mut channels = Vec::new();
    let mut channel_names = HashSet::new();
    let mut used_inputs: HashMap<(String, usize), String> = HashMap::new();
    if raw.channels.is_empty() {
        issues.add("channel", "at least one [[channel]] is required");
    }
    for (i, c) in raw.channels.iter().enumerate() {
        let path = format!("channel {:?}", c.name);
        if c.name.is_empty() {
            issues.add(format!("channel[{i}].name"), "must not be empty");
        }
        if !channel_names.insert(c.name.clone()) {
            issues.add(
                format!("{path}.name"),
                "duplicate channel name (names must be unique)",
            );
        }
        let source = by_name.get(c.source.as_str());
        match source {
            None => issues.add(
                format!("{path}.source"),
                format!("unknown source {:?}", c.source),
            ),
            Some(s) => {
                if c.index >= s.channels {
                    issues.add(
                        format!("{path}.index"),
                        format!(
                            "{} is past the last channel of source {:?} (it has {}, numbered from 0)",
                            c.index, s.name, s.channels
                        ),
                    );
                }
                if let Some(other) = used_inputs.insert((c.source.clone(), c.index), c.name.clone())
                {
                    issues.add(
                        format!("{path}.index"),
                        format!(
                            "input {} of source {:?} is already taken by channel {other:?}",
                            c.index, c.source
                        ),
                    );
                }
            }
        }
        let fs = source.map_or(f64::NAN, |s| s.sample_rate_hz);

        let unit = match Unit::parse(&c.unit) {
            Some(u) => Some(u),
            None => {
                issues.add(
                    format!("{path}.unit"),
                    format!("unknown unit {:?} (known: {})", c.unit, Unit::known()),
                );
                None
            }
        };

        let scale = match (c.scale, c.volts_per_count, c.sensitivity_v_per_unit) {
            (Some(_), Some(_), _) | (Some(_), _, Some(_)) => {
                issues.add(
                    format!("{path}.scale"),
                    "give either scale, or volts_per_count with sensitivity_v_per_unit, not both",
                );
                1.0
            }
            (Some(s), None, None) => s,
            (None, Some(v), Some(s)) => {
                if !(s.is_finite() && s != 0.0) {
                    issues.add(
                        format!("{path}.sensitivity_v_per_unit"),
                        format!("{s} must be finite and not zero"),
                    );
                    1.0
                } else {
                    v / s
                }
            }
            (None, Some(_), None) => {
                issues.add(
                    format!("{path}.sensitivity_v_per_unit"),
                    "is required with volts_per_count",
                );
                1.0
            }
            (None, None, Some(_)) => {
                issues.add(
                    format!("{path}.volts_per_count"),
                    "is required with sensitivity_v_per_unit",
                );
                1.0
            }
            (None, None, None) => 1.0,
        };
        if !(scale.is_finite() && scale != 0.0) {
            issues.add(
                format!("{path}.scale"),
                format!("{scale} must be finite and not zero"),
            );
        }
        if !c.offset.is_finite() {
            issues.add(format!("{path}.offset"), "must be finite");
        }

        if !(MIN_BLOCK..=MAX_BLOCK).contains(&c.block) {
            issues.add(
                format!("{path}.block"),
                format!("{} is out of range {MIN_BLOCK} to {MAX_BLOCK}", c.block),
            );
        }
        let nfft = c.nfft.unwrap_or(c.block);
        if nfft < c.block {
            issues.add(
                format!("{path}.nfft"),
                format!(
                    "{nfft} is shorter than block {} (nfft must be >= block; the rest is zero-padded)",
                    c.block
                ),
            );
        } else if nfft > 4 * MAX_BLOCK {
            issues.add(
                format!("{path}.nfft"),
                format!("{nfft} is larger than {}", 4 * MAX_BLOCK),
            );
        }
        if nfft % 2 != 0 {
            issues.add(format!("{path}.nfft"), format!("{nfft} must be even"));
        }
        if !(c.overlap.is_finite() && (0.0..=0.95).contains(&c.overlap)) {
            issues.add(
                format!("{path}.overlap"),
                format!("{} is out of range 0 to 0.95", c.overlap),
            );
        }
        let hop = ((c.block as f64) * (1.0 - c.overlap.clamp(0.0, 0.95))).round() as usize;
        let hop = hop.clamp(1, c.block.max(1));
        if !(1..=100_000).contains(&c.averaging.count) {
            issues.add(
                format!("{path}.averaging.count"),
                format!("{} is out of range 1 to 100000", c.averaging.count),
            );
        }
        let nyquist = fs / 2.0;
        if !(c.integration_low_cut_hz.is_finite() && c.integration_low_cut_hz > 0.0) {
            issues.add(
                format!("{path}.integration_low_cut_hz"),
                format!("{} must be above 0 Hz", c.integration_low_cut_hz),
            );
        } else if c.integration_low_cut_hz >= nyquist {
            issues.add(
                format!("{path}.integration_low_cut_hz"),
                format!(
                    "{} Hz is not below Nyquist {nyquist} Hz",
                    c.integration_low_cut_hz
                ),
            );
        }

        let machine = match &c.machine {
            None => None,
            Some(m) => {
                let found = raw.machines.iter().find(|x| &x.name == m);
                if found.is_none() {
                    issues.add(format!("{path}.machine"), format!("unknown machine {m:?}"));
                }
                found
            }
        };
        let envelope = match c.envelope {
            None => None,
            Some(e) => {
                if !(e.lo_hz.is_finite()
                    && e.hi_hz.is_finite()
                    && e.lo_hz > 0.0
                    && e.lo_hz < e.hi_hz)
                {
                    issues.add(
                        format!("{path}.envelope"),
                        format!("{}–{} Hz: need 0 < lo_hz < hi_hz", e.lo_hz, e.hi_hz),
                    );
                } else if fs.is_finite() && e.hi_hz > nyquist {
                    issues.add(
                        format!("{path}.envelope.hi_hz"),
                        format!("{} Hz is above Nyquist {nyquist} Hz", e.hi_hz),
                    );
                }
                Some((e.lo_hz, e.hi_hz))
            }
        };

        // Bands.
        let df = fs / nfft as f64;
        let mut bands = Vec::new();
        let mut band_names = HashSet::new();
        for (j, b) in c.bands.iter().enumerate() {
            let bpath = format!("{path} band {:?}", b.name);
            if b.name.is_empty() {
                issues.add(format!("{path} band[{j}].name"), "must not be empty");
            }
            if !band_names.insert(b.name.clone()) {
                issues.add(
                    format!("{bpath}.name"),
                    "duplicate band name in this channel",
                );
            }
            let edges = band_edges(&mut issues, &bpath, b, fs, df, machine);
            let band_unit = match &b.unit {
                None => unit,
                Some(s) => match Unit::parse(s) {
                    Some(u) => Some(u),
                    None => {
                        issues.add(
                            format!("{bpath}.unit"),
                            format!("unknown unit {s:?} (known: {})", Unit::known()),
                        );
                        None
                    }
                },
            };
            if let (Some(cu), Some(bu)) = (unit, band_unit) {
                if !convertible(cu, bu) {
                    issues.add(
                        format!("{bpath}.unit"),
                        format!(
                            "{} ({}) cannot be derived from the channel's {} ({})",
                            bu,
                            bu.quantity.as_str(),
                            cu,
                            cu.quantity.as_str()
                        ),
                    );
                }
            }
            if b.spectrum == SpectrumKind::Envelope {
                if c.envelope.is_none() {
                    issues.add(
                        format!("{bpath}.spectrum"),
                        "reads the envelope spectrum, but the channel has no [channel.envelope]",
                    );
                }
                if let (Some(cu), Some(bu)) = (unit, band_unit) {
                    if cu.quantity != bu.quantity {
                        issues.add(
                            format!("{bpath}.unit"),
                            format!(
                                "an envelope band is in the channel's quantity ({}), not {bu}",
                                cu.quantity.as_str()
                            ),
                        );
                    }
                }
            }
            if let (Some(bu), Some(edges)) = (band_unit, edges) {
                bands.push(BandSpec {
                    name: b.name.clone(),
                    edges,
                    measure: b.measure,
                    unit: bu,
                    spectrum: b.spectrum,
                    bearing: b.bearing.clone().zip(b.defect),
                });
            }
        }

        let health = match &c.health {
            None => HealthSpec::default(),
            Some(h) => match h.build(&format!("{path}.health")) {
                Ok(h) => h,
                Err(v) => {
                    for (p, m) in v {
                        issues.add(p, m);
                    }
                    HealthSpec::default()
                }
            },
        };
        let mut alarms = Vec::new();
        let mut add_alarm = |issues: &mut Issues,
                             apath: String,
                             name: String,
                             target: AlarmTarget,
                             unit: Option<Unit>,
                             raw: &RawAlarm,
                             is_rms: bool| {
            match raw.build(&apath) {
                Ok(spec) => {
                    if let Some(u) = unit {
                        for (p, m) in spec.check_band(&apath, u, is_rms) {
                            issues.add(p, m);
                        }
                    } else if spec.zone.is_some() {
                        issues.add(
                            format!("{apath}.zone"),
                            "zone presets are for velocity RMS bands",
                        );
                    }
                    alarms.push(ChannelAlarm {
                        name,
                        target,
                        unit,
                        spec,
                    });
                }
                Err(v) => {
                    for (p, m) in v {
                        issues.add(p, m);
                    }
                }
            }
        };
        for (j, b) in c.bands.iter().enumerate() {
            if let Some(raw) = &b.alarm {
                let bu = bands.iter().find(|x| x.name == b.name).map(|x| x.unit);
                add_alarm(
                    &mut issues,
                    format!("{path} band {:?}.alarm", b.name),
                    b.name.clone(),
                    AlarmTarget::Band(j),
                    bu,
                    raw,
                    b.measure == Measure::Rms,
                );
            }
        }
        if let Some(o) = &c.overall_alarm {
            for (key, name, target, raw, u) in [
                ("rms", "overall-rms", AlarmTarget::OverallRms, &o.rms, unit),
                (
                    "peak",
                    "overall-peak",
                    AlarmTarget::OverallPeak,
                    &o.peak,
                    unit,
                ),
                (
                    "crest_factor",
                    "overall-crest-factor",
                    AlarmTarget::CrestFactor,
                    &o.crest_factor,
                    None,
                ),
            ] {
                if let Some(raw) = raw {
                    if c.bands.iter().any(|b| b.name == name) {
                        issues.add(
                            format!("{path}.overall_alarm.{key}"),
                            format!("a band is already named {name:?}; rename it"),
                        );
                    }
                    add_alarm(
                        &mut issues,
                        format!("{path}.overall_alarm.{key}"),
                        name.to_string(),
                        target,
                        u,
                        raw,
                        key == "rms",
                    );
                }
            }
        }
        if bands.len() != c.bands.len() {
            // Some band failed validation: alarm targets may not line up,
            // but the config is rejected anyway.
            alarms.clear();
        }

        if let (Some(unit), Some(s)) = (unit, source) {
            channels.push(ChannelSpec {
                name: c.name.clone(),
                source: c.source.clone(),
                index: c.index,
                unit,
                scale,
                offset: c.offset,
                sample_rate_hz: s.sample_rate_hz,
                block: c.block,
                nfft,
                hop,
                overlap: c.overlap,
                window: c.window,
                detrend: c.detrend,
                averaging: c.averaging.mode,
                average_count: c.averaging.count,
                integration_low_cut_hz: c.integration_low_cut_hz,
                machine: c.machine.clone(),
                envelope,
                bands,
                health,
                alarms,
            });
        }
    }

    let machines = validate_machines(&mut issues, raw);
    let alarms = match &raw.alarms {
        None => {
            if channels.iter().any(|c| !c.alarms.is_empty()) {
                issues.add(
                    "alarms",
                    "alarms are configured but [alarms] (storage_dir for the journal and captures) is missing",
                );
            }
            None
        }
        Some(a) => match a.build("alarms") {
            Ok(a) => Some(a),
            Err(v) => {
                for (p, m) in v {
                    issues.add(p, m);
                }
                None
            }
        },
    };

    match (issues.0.is_empty(), listen) {
        (true, Some(listen)) => Ok(Config {
            alarms,
            listen,
            workers,
            ring_seconds: raw.dsp.ring_seconds,
            sources,
            machines,
            channels,
        }),
        _ => Err(issues.0),
    }
}

fn validate_machines(issues: &mut Issues, raw: &RawConfig) -> Vec<MachineSpec> {
    use bearing::BearingGeometry;
    let mut out = Vec::new();
    let mut names = HashSet::new();
    let channel = |name: &str| raw.channels.iter().any(|c| c.name == name);
    for m in &raw.machines {
        let path = format!("machine {:?}", m.name);
        if m.name.is_empty() {
            issues.add("machine.name", "must not be empty");
        }
        if !names.insert(m.name.clone()) {
            issues.add(format!("{path}.name"), "duplicate machine name");
        }
        let speed = match &m.speed {
            RawSpeed::Fixed { rpm } => {
                if !(rpm.is_finite() && *rpm > 0.0) {
                    issues.add(
                        format!("{path}.speed.rpm"),
                        format!("{rpm} must be above 0"),
                    );
                }
                SpeedSource::Fixed { hz: rpm / 60.0 }
            }
            RawSpeed::Tach {
                channel: ch,
                pulses_per_rev,
                threshold,
                hysteresis,
                average_revs,
                stale_s,
            } => {
                if !channel(ch) {
                    issues.add(
                        format!("{path}.speed.channel"),
                        format!("unknown channel {ch:?}"),
                    );
                }
                if *pulses_per_rev == 0 {
                    issues.add(format!("{path}.speed.pulses_per_rev"), "must be at least 1");
                }
                if !threshold.is_finite() || !hysteresis.is_finite() || *hysteresis < 0.0 {
                    issues.add(
                        format!("{path}.speed.threshold"),
                        "threshold and hysteresis must be finite, hysteresis >= 0",
                    );
                }
                if *average_revs == 0 {
                    issues.add(format!("{path}.speed.average_revs"), "must be at least 1");
                }
                if !(stale_s.is_finite() && *stale_s > 0.0) {
                    issues.add(format!("{path}.speed.stale_s"), "must be above 0");
                }
                SpeedSource::Tach {
                    channel: ch.clone(),
                    pulses_per_rev: *pulses_per_rev,
                    threshold: *threshold,
                    hysteresis: *hysteresis,
                    average_revs: *average_revs,
                    stale_s: *stale_s,
                }
            }
            RawSpeed::Peak {
                channel: ch,
                min_hz,
                max_hz,
                stale_s,
            } => {
                if !channel(ch) {
                    issues.add(
                        format!("{path}.speed.channel"),
                        format!("unknown channel {ch:?}"),
                    );
                }
                if !(min_hz.is_finite() && max_hz.is_finite() && *min_hz > 0.0 && min_hz < max_hz) {
                    issues.add(
                        format!("{path}.speed.min_hz"),
                        format!("{min_hz}–{max_hz} Hz: need 0 < min_hz < max_hz"),
                    );
                }
                if !(stale_s.is_finite() && *stale_s > 0.0) {
                    issues.add(format!("{path}.speed.stale_s"), "must be above 0");
                }
                SpeedSource::Peak {
                    channel: ch.clone(),
                    min_hz: *min_hz,
                    max_hz: *max_hz,
                    stale_s: *stale_s,
                }
            }
        };
        let mut bearings = Vec::new();
        for b in &m.bearings {
            let bp = format!("{path} bearing {:?}", b.name);
            if b.elements < 3 {
                issues.add(
                    format!("{bp}.elements"),
                    format!("{} is fewer than 3", b.elements),
                );
            }
            let (d, dp) = (b.element_diameter_mm, b.pitch_diameter_mm);
            if !(d.is_finite() && dp.is_finite() && d > 0.0 && d < dp) {
                issues.add(
                    format!("{bp}.element_diameter_mm"),
                    format!("{d} mm must be above 0 and below pitch_diameter_mm {dp} mm"),
                );
            }
            if !(b.contact_angle_deg.is_finite() && (0.0..90.0).contains(&b.contact_angle_deg)) {
                issues.add(
                    format!("{bp}.contact_angle_deg"),
                    "must be in 0 to 90 degrees",
                );
            }
            bearings.push((
                b.name.clone(),
                BearingGeometry {
                    elements: b.elements,
                    element_diameter: d,
                    pitch_diameter: dp,
                    contact_angle_deg: b.contact_angle_deg,
                },
            ));
        }
        out.push(MachineSpec {
            name: m.name.clone(),
            speed,
            bearings,
        });
    }
    out
}

/// Checks a band's edges: fixed Hz, orders, or a bearing defect.
fn band_edges(
    issues: &mut Issues,
    bpath: &str,
    b: &RawBand,
    fs: f64,
    df: f64,
    machine: Option<&RawMachine>,
) -> Option<BandEdges> {
    let nyquist = fs / 2.0;
    let given = [
        b.lo_hz.is_some() || b.hi_hz.is_some(),
        b.orders.is_some(),
        b.bearing.is_some(),
    ];
    if given.iter().filter(|g| **g).count() != 1 {
        issues.add(
            bpath.to_string(),
            "give exactly one of lo_hz/hi_hz, orders, or bearing (with defect)",
        );
        return None;
    }
    if b.harmonics != 1 && b.bearing.is_none() {
        issues.add(
            format!("{bpath}.harmonics"),
            "only applies to bearing bands",
        );
    }
    if b.width_orders.is_some() && b.bearing.is_none() {
        issues.add(
            format!("{bpath}.width_orders"),
            "only applies to bearing bands",
        );
    }
    if b.defect.is_some() && b.bearing.is_none() {
        issues.add(format!("{bpath}.defect"), "needs bearing");
    }
    if let (Some(lo), Some(hi)) = (b.lo_hz, b.hi_hz) {
        if !(lo.is_finite() && lo >= 0.0) {
            issues.add(format!("{bpath}.lo_hz"), format!("{lo} must be >= 0 Hz"));
            return None;
        }
        if !hi.is_finite() {
            issues.add(format!("{bpath}.hi_hz"), "must be finite");
            return None;
        }
        if lo >= hi {
            issues.add(
                format!("{bpath}.lo_hz"),
                format!("{lo} Hz is not below hi_hz {hi} Hz (lo must be < hi)"),
            );
            return None;
        }
        if fs.is_finite() && hi > nyquist {
            issues.add(
                format!("{bpath}.hi_hz"),
                format!("{hi} Hz is above Nyquist {nyquist} Hz (a tone above Nyquist folds back; filter it out before the converter)"),
            );
            return None;
        }
        if df.is_finite() && (lo / df).ceil() > (hi / df).floor() {
            issues.add(
                bpath.to_string(),
                format!("{lo}–{hi} Hz holds no spectral line (lines are {df:.4} Hz apart); widen it or raise nfft"),
            );
            return None;
        }
        return Some(BandEdges::Hz { lo, hi });
    }
    if b.lo_hz.is_some() != b.hi_hz.is_some() {
        issues.add(bpath.to_string(), "lo_hz and hi_hz go together");
        return None;
    }
    let Some(m) = machine else {
        issues.add(
            bpath.to_string(),
            "an order or bearing band needs the channel's `machine`",
        );
        return None;
    };
    if let Some([lo, hi]) = b.orders {
        if !(lo.is_finite() && hi.is_finite() && lo >= 0.0 && lo < hi) {
            issues.add(
                format!("{bpath}.orders"),
                format!("[{lo}, {hi}]: need 0 <= lo < hi"),
            );
            return None;
        }
        return Some(BandEdges::Orders {
            windows: vec![(lo, hi)],
        });
    }
    let name = b.bearing.as_deref().unwrap_or_default();
    let Some(bearing) = m.bearings.iter().find(|x| x.name == name) else {
        issues.add(
            format!("{bpath}.bearing"),
            format!("machine {:?} has no bearing {name:?}", m.name),
        );
        return None;
    };
    let Some(defect) = b.defect else {
        issues.add(
            format!("{bpath}.defect"),
            "is required with bearing (bpfo, bpfi, bsf, ftf)",
        );
        return None;
    };
    let width = b.width_orders.unwrap_or(0.1);
    if !(width.is_finite() && width > 0.0) {
        issues.add(
            format!("{bpath}.width_orders"),
            format!("{width} must be above 0"),
        );
        return None;
    }
    if !(1..=50).contains(&b.harmonics) {
        issues.add(
            format!("{bpath}.harmonics"),
            format!("{} is out of range 1 to 50", b.harmonics),
        );
        return None;
    }
    let g = bearing::BearingGeometry {
        elements: bearing.elements,
        element_diameter: bearing.element_diameter_mm,
        pitch_diameter: bearing.pitch_diameter_mm,
        contact_angle_deg: bearing.contact_angle_deg,
    };
    let centre = g.order_of(defect);
    let windows = (1..=b.harmonics)
        .map(|h| {
            let c = centre * h as f64;
            ((c - width / 2.0).max(0.0), c + width / 2.0)
        })
        .collect();
    Some(BandEdges::Orders { windows })
}

fn socket_addr(issues: &mut Issues, path: &str, text: &str) -> SocketAddr {
    match text.parse::<SocketAddr>() {
        Ok(a) => a,
        Err(_) => {
            issues.add(
                path,
                format!("{text:?} is not an IP address with a port (e.g. \"127.0.0.1:7700\")"),
            );
            SocketAddr::from(([127, 0, 0, 1], 0))
        }
    }
}

fn check_shape(issues: &mut Issues, path: &str, channels: usize, rate: f64) {
    if !(1..=1024).contains(&channels) {
        issues.add(
            format!("{path}.channels"),
            format!("{channels} is out of range 1 to 1024"),
        );
    }
    if !(rate.is_finite() && rate > 0.0 && rate <= 10e6) {
        issues.add(
            format!("{path}.sample_rate_hz"),
            format!("{rate} must be a finite number above 0 and at most 10 MHz"),
        );
    }
}

fn parse_format(s: &str) -> Option<SampleFormat> {
    SampleFormat::ALL.into_iter().find(|f| f.as_str() == s)
}

fn stream_spec(
    issues: &mut Issues,
    path: &str,
    framing: &str,
    sample_format: Option<&str>,
    max_frame_bytes: usize,
) -> StreamSpec {
    let framing = match (framing, sample_format) {
        ("bwf1", None) => Framing::Bwf1,
        ("lines", None) => Framing::Lines,
        ("raw", Some(f)) => match parse_format(f) {
            Some(f) => Framing::Raw(f),
            None => {
                issues.add(
                    format!("{path}.sample_format"),
                    format!("unknown sample format {f:?} (known: i16, i24, i32, f32, f64)"),
                );
                Framing::Raw(SampleFormat::F32)
            }
        },
        ("raw", None) => {
            issues.add(
                format!("{path}.sample_format"),
                "is required with framing = \"raw\"",
            );
            Framing::Raw(SampleFormat::F32)
        }
        ("bwf1" | "lines", Some(_)) => {
            issues.add(
                format!("{path}.sample_format"),
                "only applies to framing = \"raw\" (BWF1 frames carry their format)",
            );
            Framing::Bwf1
        }
        (other, _) => {
            issues.add(
                format!("{path}.framing"),
                format!("unknown framing {other:?} (known: \"bwf1\", \"lines\", \"raw\")"),
            );
            Framing::Bwf1
        }
    };
    if !(64..=(256 << 20)).contains(&max_frame_bytes) {
        issues.add(
            format!("{path}.max_frame_bytes"),
            format!("{max_frame_bytes} is out of range 64 to 268435456"),
        );
    }
    StreamSpec {
        framing,
        max_frame_bytes,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    const GOOD: &str = r#"
[server]
listen = "127.0.0.1:0"

[[source]]
name = "sim"
kind = "sim"

[[channel]]
name = "a"
source = "sim"
index = 0
unit = "g"
block = 4096
nfft = 8192
window = "flat-top"
overlap = 0.75
averaging = { mode = "exponential", count = 8 }

[[channel.band]]
name = "v"
lo_hz = 10
hi_hz = 1000
unit = "mm/s"
"#;

    #[test]
    fn good_config_resolves() {
        let c = parse_str(GOOD).expect("valid");
        let ch = &c.channels[0];
        assert_eq!(ch.nfft, 8192);
        assert_eq!(ch.hop, 1024);
        assert_eq!(ch.bins(), 4097);
        assert_eq!(ch.bands[0].unit.symbol, "mm/s");
        assert_eq!(ch.window, WindowKind::FlatTop);
    }

    #[test]
    fn unknown_key_is_rejected() {
        let text = GOOD.replace("index = 0", "index = 0\ncolour = \"red\"");
        match parse_str(&text) {
            Err(ParseError::Toml(m)) => assert!(m.contains("colour"), "{m}"),
            other => panic!("expected a TOML error, got {other:?}"),
        }
    }
}
