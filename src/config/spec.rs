//! The validated config the pipeline runs on: `Config` and the typed specs
//! below it (sources, streams, machines, channels, bands, channel alarms),
//! plus the fixed shape of the built-in pump scenario. Built only by
//! `check::validate`; every value here has passed its checks.

use std::net::SocketAddr;
use std::time::Duration;

use crate::frame::SampleFormat;
use crate::units::Unit;

use super::alarms::{AlarmSpec, AlarmsSpec};
use super::bearing;
use super::health::HealthSpec;
use super::kinds::{
    AveragingMode, Detrend, FlowControl, Measure, Parity, SecondConnection, SpectrumKind,
    WindowKind,
};

/// Sample rate of the built-in pump scenario (README, "What the demo shows").
pub const SIM_SAMPLE_RATE_HZ: f64 = 25_600.0;

/// Channels of the built-in pump scenario (README, "What the demo shows").
pub const SIM_CHANNELS: usize = 4;

#[derive(Debug, Clone)]
pub struct Config {
    /// `[alarms]`, when given.
    pub alarms: Option<AlarmsSpec>,
    pub listen: SocketAddr,
    /// Limits of the HTTP server (`[server]`).
    pub http: HttpLimits,
    /// TLS and basic auth (`[server] web_config`), checked; `None`: plain
    /// HTTP for everyone.
    pub web: Option<super::web::WebConfig>,
    /// Seconds of trend each channel keeps in memory (`[server]
    /// trend_seconds`, README "Config reference").
    pub trend_seconds: usize,
    /// What `/metrics` leaves out (`[metrics]`).
    pub exposition: super::exposition::ExpositionSpec,
    /// The history database (`[history]`), when given.
    pub history: Option<super::history::HistorySpec>,
    pub workers: usize,
    pub ring_seconds: f64,
    pub sources: Vec<SourceSpec>,
    pub machines: Vec<MachineSpec>,
    pub channels: Vec<ChannelSpec>,
}

/// How much the HTTP server gives one client (`[server]`, README "Config
/// reference"): bounded connections, and bounded time for each.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct HttpLimits {
    pub max_connections: usize,
    pub header_timeout: Duration,
    pub idle_timeout: Duration,
    pub request_timeout: Duration,
}

impl Default for HttpLimits {
    fn default() -> HttpLimits {
        HttpLimits {
            max_connections: 256,
            header_timeout: Duration::from_secs(10),
            idle_timeout: Duration::from_secs(60),
            request_timeout: Duration::from_secs(30),
        }
    }
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
    /// How frame indices are followed (framed sources; the simulator's
    /// indices are its own and never jump).
    pub sequence: SequenceSpec,
}

/// The sequence rules of a framed source (README, "Sequence rules").
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct SequenceSpec {
    /// A frame at most this far behind the stream, seconds of samples, is
    /// late or a duplicate; further behind, the stream restarted.
    pub reorder_window_s: f64,
    /// A forward jump of at most this, seconds of samples, plus the wall
    /// time since the last frame taken, is a gap; further, a restart.
    pub max_gap_s: f64,
}

impl SequenceSpec {
    pub const DEFAULT: SequenceSpec = SequenceSpec {
        reorder_window_s: 1.0,
        max_gap_s: 10.0,
    };
}

impl Default for SequenceSpec {
    fn default() -> Self {
        SequenceSpec::DEFAULT
    }
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
        /// A connection silent this long is closed and dialled again.
        idle_timeout: Duration,
    },
    TcpListen {
        listen: SocketAddr,
        stream: StreamSpec,
        on_second_connection: SecondConnection,
        /// `replace-silent`: the active connection's silence that lets a
        /// newcomer in.
        replace_after_silent: Duration,
        /// A connection silent this long is closed.
        idle_timeout: Duration,
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
