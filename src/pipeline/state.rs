//! What the DSP workers publish and the HTTP side reads.
//!
//! Each channel has one `ChannelShared`: its validated spec, its counters,
//! and the latest `ChannelSnapshot` behind an `ArcSwapOption`. A worker
//! replaces the snapshot with one atomic swap; readers take a cheap `load`
//! and never block the worker. A snapshot is immutable once published.

use std::collections::HashMap;
use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::mpsc::{Receiver, Sender};
use std::sync::{Arc, Mutex, OnceLock};

use crate::alarm::engine::{AlarmBoard, AlarmCommand};
use crate::alarm::io::IoShared;
use crate::alarm::token::Token;

use arc_swap::ArcSwapOption;

use crate::clock::unix_now_ns;
use crate::config::{ChannelSpec, Config, MachineSpec, SpeedSource};
use crate::counters::{ChannelCounters, SourceCounters};
use crate::dsp::bands::BandValue;
use crate::dsp::stats::Overall;
use crate::dsp::window::Window;

/// The latest results of one channel.
#[derive(Debug, Clone, Default)]
pub struct ChannelSnapshot {
    /// Counts publications of this channel, from 1.
    pub seq: u64,
    /// When the worker published it, ns since the Unix epoch.
    pub published_unix_ns: u64,
    /// Stream index of the first sample of the newest block in the average.
    pub first_sample: u64,
    /// Stream index of the first sample of the oldest block in the average
    /// (exponential averaging: the first block since the last reset). The
    /// spectrum covers `oldest_first_sample .. first_sample + block`, all
    /// of it one unbroken segment of the stream.
    pub oldest_first_sample: u64,
    /// Time of that sample, ns since the Unix epoch.
    pub timestamp_ns: u64,
    /// Blocks in this average.
    pub averages: u32,
    /// Averaged single-sided power spectrum, units² per line, amplitude
    /// corrected (see `dsp::spectrum`); nfft/2 + 1 lines.
    pub power: Vec<f32>,
    /// Averaged power spectrum of the envelope (empty without envelope
    /// analysis), same scaling and lines as `power`.
    pub envelope_power: Vec<f32>,
    /// Running speed the order bands used, Hz (None: unknown or no machine).
    pub speed_hz: Option<f64>,
    /// One per band of the spec, same order.
    pub bands: Vec<BandValue>,
    /// Time-domain levels of the newest block.
    pub overall: Overall,
    /// The newest block, in channel units.
    pub waveform: Vec<f32>,
}

/// Everything the rest of the process knows about one channel.
pub struct ChannelShared {
    pub spec: Arc<ChannelSpec>,
    /// Health and alarm states, replaced whenever one changes.
    pub alarm_board: ArcSwapOption<AlarmBoard>,
    /// Operator commands to the channel's worker (acknowledge, re-learn).
    pub alarm_commands: Mutex<Sender<AlarmCommand>>,
    /// The worker thread, to wake it for a command.
    pub worker: OnceLock<std::thread::Thread>,
    /// Window figures, for converting the power spectrum to other scalings.
    pub window_enbw_bins: f64,
    pub window_coherent_gain: f64,
    pub counters: Arc<ChannelCounters>,
    pub snapshot: ArcSwapOption<ChannelSnapshot>,
}

impl ChannelShared {
    /// A channel without alarms: a command to it is refused (`command`
    /// returns false).
    pub fn new(spec: ChannelSpec) -> ChannelShared {
        ChannelShared::with_alarm_commands(spec).0
    }

    /// A channel and the receiving end of its operator commands, for the
    /// alarm engine the pipeline builds.
    pub fn with_alarm_commands(spec: ChannelSpec) -> (ChannelShared, Receiver<AlarmCommand>) {
        let w = Window::new(spec.window, spec.block);
        let (tx, rx) = std::sync::mpsc::channel();
        let ch = ChannelShared {
            alarm_board: ArcSwapOption::empty(),
            alarm_commands: Mutex::new(tx),
            worker: OnceLock::new(),
            window_enbw_bins: w.enbw_bins(),
            window_coherent_gain: w.coherent_gain(),
            spec: Arc::new(spec),
            counters: Arc::new(ChannelCounters::default()),
            snapshot: ArcSwapOption::empty(),
        };
        (ch, rx)
    }

    /// Noise bandwidth in Hz: ENBW·fs/block. Density = power / this.
    pub fn noise_bandwidth_hz(&self) -> f64 {
        self.window_enbw_bins * self.spec.sample_rate_hz / self.spec.block as f64
    }

    pub fn latest(&self) -> Option<Arc<ChannelSnapshot>> {
        self.snapshot.load_full()
    }

    /// Sends an operator command to the worker and wakes it.
    pub fn command(&self, cmd: AlarmCommand) -> bool {
        let sent = self
            .alarm_commands
            .lock()
            .map(|tx| tx.send(cmd).is_ok())
            .unwrap_or(false);
        if let Some(t) = self.worker.get() {
            t.unpark();
        }
        sent
    }
}

/// A machine's running speed, written by whichever worker measures it.
pub struct MachineShared {
    pub spec: MachineSpec,
    speed_bits: AtomicU64,
    updated_unix_ns: AtomicU64,
}

impl MachineShared {
    pub fn new(spec: MachineSpec) -> MachineShared {
        MachineShared {
            spec,
            speed_bits: AtomicU64::new(f64::NAN.to_bits()),
            updated_unix_ns: AtomicU64::new(0),
        }
    }

    /// Records a measured speed.
    pub fn set_speed_hz(&self, hz: f64) {
        self.speed_bits.store(hz.to_bits(), Ordering::Relaxed);
        self.updated_unix_ns.store(unix_now_ns(), Ordering::Relaxed);
    }

    /// The current speed, or None when it is unknown or stale.
    pub fn speed_hz(&self) -> Option<f64> {
        let stale_s = match &self.spec.speed {
            SpeedSource::Fixed { hz } => return Some(*hz),
            SpeedSource::Tach { stale_s, .. } | SpeedSource::Peak { stale_s, .. } => *stale_s,
        };
        let v = f64::from_bits(self.speed_bits.load(Ordering::Relaxed));
        let age_s = unix_now_ns().saturating_sub(self.updated_unix_ns.load(Ordering::Relaxed))
            as f64
            * 1e-9;
        (v.is_finite() && age_s <= stale_s).then_some(v)
    }

    /// When the speed was last measured, ns since the Unix epoch (0: never).
    pub fn updated_unix_ns(&self) -> u64 {
        self.updated_unix_ns.load(Ordering::Relaxed)
    }
}

/// The read side of the whole pipeline, handed to HTTP.
pub struct AppState {
    /// The alarm I/O thread's counters and recent events (None without `[alarms]`).
    pub alarm_io: Option<Arc<IoShared>>,
    /// Where captures are stored (None without `[alarms]`).
    pub captures_dir: Option<std::path::PathBuf>,
    /// Bearer token for operator actions (None: such actions are refused).
    pub token: Option<Token>,
    pub machines: Vec<Arc<MachineShared>>,
    pub channels: Vec<Arc<ChannelShared>>,
    pub by_name: HashMap<String, usize>,
    pub sources: Vec<Arc<SourceCounters>>,
    pub started_unix_ns: u64,
}

impl AppState {
    /// The read side of `config`, every channel without alarms (HTTP
    /// tests); the pipeline builds it with [`AppState::with_channels`].
    pub fn new(config: &Config) -> AppState {
        let channels = config
            .channels
            .iter()
            .map(|c| Arc::new(ChannelShared::new(c.clone())))
            .collect();
        AppState::with_channels(config, channels)
    }

    /// The read side of `config` over the given channels (all of them, or
    /// one source's for `replay`).
    pub fn with_channels(config: &Config, channels: Vec<Arc<ChannelShared>>) -> AppState {
        let by_name = channels
            .iter()
            .enumerate()
            .map(|(i, c)| (c.spec.name.clone(), i))
            .collect();
        let sources = config
            .sources
            .iter()
            .map(|s| Arc::new(SourceCounters::new(&s.name, s.kind.as_str())))
            .collect();
        AppState {
            alarm_io: None,
            captures_dir: config.alarms.as_ref().map(|a| a.captures_dir()),
            token: None,
            machines: config
                .machines
                .iter()
                .map(|m| Arc::new(MachineShared::new(m.clone())))
                .collect(),
            channels,
            by_name,
            sources,
            started_unix_ns: unix_now_ns(),
        }
    }

    /// With the operator token (None: operator actions are refused).
    pub fn with_token(mut self, token: Option<Token>) -> AppState {
        self.token = token;
        self
    }

    /// With the alarm I/O thread's counters and recent events.
    pub fn with_alarm_io(mut self, io: Arc<IoShared>) -> AppState {
        self.alarm_io = Some(io);
        self
    }

    pub fn channel(&self, name: &str) -> Option<&Arc<ChannelShared>> {
        self.by_name.get(name).map(|&i| &self.channels[i])
    }

    pub fn machine(&self, name: &str) -> Option<&Arc<MachineShared>> {
        self.machines.iter().find(|m| m.spec.name == name)
    }

    pub fn source(&self, name: &str) -> Option<&Arc<SourceCounters>> {
        self.sources.iter().find(|s| s.name == name)
    }
}
