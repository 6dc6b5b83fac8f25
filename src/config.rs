//! Configuration: the TOML file as serde reads it (`RawConfig`, unknown keys
//! rejected), and `validate`, which checks every rule at once and turns the
//! file into the typed `Config` the pipeline runs on. Each problem found is a
//! `ConfigIssue` that names the field path and says why.

use std::collections::{HashMap, HashSet};
use std::fmt;
use std::net::SocketAddr;
use std::path::{Path, PathBuf};

use serde::Deserialize;

use crate::dsp::window::WindowKind;
use crate::frame::SampleFormat;
use crate::units::{convertible, Unit};

/// Sample rate of the built-in pump scenario (DESIGN.md, demo scenario).
pub const SIM_SAMPLE_RATE_HZ: f64 = 25_600.0;

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
    #[serde(rename = "channel", default)]
    pub channels: Vec<RawChannel>,
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
    pub lo_hz: f64,
    pub hi_hz: f64,
    #[serde(default = "default_measure")]
    pub measure: Measure,
    /// Unit of the band's value; a velocity or displacement unit on an
    /// acceleration channel integrates. Default: the channel's unit.
    pub unit: Option<String>,
}

fn default_measure() -> Measure {
    Measure::Rms
}

// ---------------------------------------------------------------------------
// The validated config
// ---------------------------------------------------------------------------

#[derive(Debug, Clone)]
pub struct Config {
    pub listen: SocketAddr,
    pub workers: usize,
    pub ring_seconds: f64,
    pub sources: Vec<SourceSpec>,
    pub channels: Vec<ChannelSpec>,
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
    pub bands: Vec<BandSpec>,
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
    pub lo_hz: f64,
    pub hi_hz: f64,
    pub measure: Measure,
    pub unit: Unit,
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
                    channels: crate::source::sim::CHANNELS,
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
            let mut edges_ok = true;
            if !(b.lo_hz.is_finite() && b.lo_hz >= 0.0) {
                issues.add(
                    format!("{bpath}.lo_hz"),
                    format!("{} must be >= 0 Hz", b.lo_hz),
                );
                edges_ok = false;
            }
            if !b.hi_hz.is_finite() {
                issues.add(format!("{bpath}.hi_hz"), "must be finite");
                edges_ok = false;
            }
            if edges_ok && b.lo_hz >= b.hi_hz {
                issues.add(
                    format!("{bpath}.lo_hz"),
                    format!(
                        "{} Hz is not below hi_hz {} Hz (lo must be < hi)",
                        b.lo_hz, b.hi_hz
                    ),
                );
                edges_ok = false;
            }
            if edges_ok && fs.is_finite() && b.hi_hz > nyquist {
                issues.add(
                    format!("{bpath}.hi_hz"),
                    format!(
                        "{} Hz is above Nyquist {nyquist} Hz (a tone above Nyquist folds back; filter it out before the converter)",
                        b.hi_hz
                    ),
                );
                edges_ok = false;
            }
            if edges_ok && df.is_finite() {
                let first = (b.lo_hz / df).ceil();
                let last = (b.hi_hz / df).floor();
                if first > last {
                    issues.add(
                        bpath.clone(),
                        format!(
                            "{}–{} Hz holds no spectral line (lines are {df:.4} Hz apart); widen it or raise nfft",
                            b.lo_hz, b.hi_hz
                        ),
                    );
                }
            }
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
            if let Some(bu) = band_unit {
                bands.push(BandSpec {
                    name: b.name.clone(),
                    lo_hz: b.lo_hz,
                    hi_hz: b.hi_hz,
                    measure: b.measure,
                    unit: bu,
                });
            }
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
                bands,
            });
        }
    }

    match (issues.0.is_empty(), listen) {
        (true, Some(listen)) => Ok(Config {
            listen,
            workers,
            ring_seconds: raw.dsp.ring_seconds,
            sources,
            channels,
        }),
        _ => Err(issues.0),
    }
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
