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

use super::trend::{Trend, DEFAULT_TREND_SECONDS};

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
    /// The last `trend_seconds` of band values and overall levels, one
    /// point a second (the worker pushes at publish; HTTP reads).
    pub trend: Arc<Trend>,
}

impl ChannelShared {
    /// A channel without alarms: a command to it is refused (`command`
    /// returns false).
    pub fn new(spec: ChannelSpec) -> ChannelShared {
        ChannelShared::with_alarm_commands(spec, DEFAULT_TREND_SECONDS).0
    }

    /// A channel and the receiving end of its operator commands, for the
    /// alarm engine the pipeline builds; its trend keeps `trend_seconds`.
    pub fn with_alarm_commands(
        spec: ChannelSpec,
        trend_seconds: usize,
    ) -> (ChannelShared, Receiver<AlarmCommand>) {
        let w = Window::new(spec.window, spec.block);
        let trend = Arc::new(Trend::new(trend_seconds, spec.bands.len()));
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
            trend,
        };
        (ch, rx)
    }

    /// The same channel under a new spec whose signal settings are
    /// unchanged (a reload that changed only limits): shares the counters
    /// the operator command queue and the trend, starts from the current
    /// snapshot and alarm board.
    pub fn carried_over(&self, spec: ChannelSpec) -> ChannelShared {
        let tx = self
            .alarm_commands
            .lock()
            .map(|tx| tx.clone())
            .unwrap_or_else(|e| e.into_inner().clone());
        let worker = OnceLock::new();
        if let Some(t) = self.worker.get() {
            let _ = worker.set(t.clone());
        }
        ChannelShared {
            spec: Arc::new(spec),
            alarm_board: ArcSwapOption::new(self.alarm_board.load_full()),
            alarm_commands: Mutex::new(tx),
            worker,
            window_enbw_bins: self.window_enbw_bins,
            window_coherent_gain: self.window_coherent_gain,
            counters: self.counters.clone(),
            snapshot: ArcSwapOption::new(self.snapshot.load_full()),
            trend: self.trend.clone(),
        }
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

/// An instant on a stream's own clock: where a measurement was taken or
/// which samples a result covers (README "Orders: the speed at a block's
/// signal time").
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub struct SignalTime {
    /// How many times the channel's stream index has gone backwards (a
    /// sender that restarted its count): indexes compare only within one.
    pub epoch: u32,
    /// Stream index just after the instant: a measurement taken from the
    /// samples before index `sample`, or a result whose newest block ends
    /// there (exclusive).
    pub sample: u64,
    /// The time of sample `sample` on the source's clock (the frames'
    /// timestamps), ns since the Unix epoch.
    pub ns: u64,
}

impl SignalTime {
    /// `self` ≤ `other` on the clock the two share: the stream index (same
    /// epoch first) for channels of one source, the frames' time otherwise.
    fn not_after(&self, other: &SignalTime, same_source: bool) -> bool {
        if same_source {
            (self.epoch, self.sample) <= (other.epoch, other.sample)
        } else {
            self.ns <= other.ns
        }
    }
}

/// Most measurements a machine keeps (a bound on memory whatever the
/// pulse rate); the horizon (`MachineShared::set_horizon_s`) usually
/// drops them first.
const TIMELINE_MAX: usize = 1 << 16;

/// The measurements of a machine in signal time, and how far its
/// measuring channel has looked.
struct Timeline {
    /// (where, hz) in signal-time order; hz NaN: unknown from there on (a
    /// break in the measuring channel's stream).
    entries: std::collections::VecDeque<(SignalTime, f64)>,
    /// The measuring channel has read every sample before this instant:
    /// no later measurement will be placed at or before it.
    through: SignalTime,
    /// No more measurements will come (end of a replay, or the measuring
    /// channel is not part of this pipeline): nobody waits.
    closed: bool,
    /// Worker threads waiting for `through` to pass a result's end.
    waiters: Vec<std::thread::Thread>,
}

/// A machine's running speed, written by whichever worker measures it.
///
/// Two views: the *timeline* (measurements placed at their signal time,
/// read by [`MachineShared::speed_at`] for a result's order bands, so the
/// bands do not depend on which worker ran first), and the *published*
/// speed (the latest measurement and the wall-clock time it was taken, for
/// `/machines` and the metrics; unknown once no measurement has come for
/// `stale_s` of wall-clock time).
pub struct MachineShared {
    pub spec: MachineSpec,
    speed_bits: AtomicU64,
    updated_unix_ns: AtomicU64,
    /// Source of the channel that measures the speed, and its sample rate
    /// (None for a fixed speed).
    measured_on: Option<(String, f64)>,
    /// Seconds of signal time kept behind the measuring channel's position.
    horizon_s: AtomicU64,
    timeline: Mutex<Timeline>,
    /// Results whose order bands were evaluated before the measuring
    /// channel had caught up with them (waited for the wall-clock limit).
    late_results: AtomicU64,
}

impl MachineShared {
    /// A machine alone (its measuring channel's source unknown: followers
    /// compare by the frames' time).
    pub fn new(spec: MachineSpec) -> MachineShared {
        MachineShared::measured_on(spec, None)
    }

    /// A machine of `config`: knows the source and rate of the channel
    /// that measures its speed.
    pub fn of_config(spec: MachineSpec, config: &Config) -> MachineShared {
        let channel = match &spec.speed {
            SpeedSource::Fixed { .. } => None,
            SpeedSource::Tach { channel, .. } | SpeedSource::Peak { channel, .. } => {
                config.channels.iter().find(|c| &c.name == channel)
            }
        };
        let on = channel.map(|c| (c.source.clone(), c.sample_rate_hz));
        MachineShared::measured_on(spec, on)
    }

    fn measured_on(spec: MachineSpec, on: Option<(String, f64)>) -> MachineShared {
        MachineShared {
            spec,
            speed_bits: AtomicU64::new(f64::NAN.to_bits()),
            updated_unix_ns: AtomicU64::new(0),
            measured_on: on,
            horizon_s: AtomicU64::new(600f64.to_bits()),
            timeline: Mutex::new(Timeline {
                entries: std::collections::VecDeque::new(),
                through: SignalTime::default(),
                closed: false,
                waiters: Vec::new(),
            }),
            late_results: AtomicU64::new(0),
        }
    }

    fn timeline(&self) -> std::sync::MutexGuard<'_, Timeline> {
        // A panic while holding the lock leaves a consistent timeline
        // (every change is one push or one store): keep using it.
        self.timeline.lock().unwrap_or_else(|e| e.into_inner())
    }

    /// The measuring channel's staleness limit, seconds (None: fixed speed).
    pub fn stale_s(&self) -> Option<f64> {
        match &self.spec.speed {
            SpeedSource::Fixed { .. } => None,
            SpeedSource::Tach { stale_s, .. } | SpeedSource::Peak { stale_s, .. } => Some(*stale_s),
        }
    }

    /// Whether a channel of source `source` shares the measuring channel's
    /// stream index (same source) or must compare by the frames' time.
    pub fn same_source(&self, source: &str) -> bool {
        self.measured_on.as_ref().is_some_and(|(s, _)| s == source)
    }

    /// Whether order bands need the timeline (tach or peak speed).
    pub fn is_measured(&self) -> bool {
        !matches!(self.spec.speed, SpeedSource::Fixed { .. })
    }

    /// Keeps at least `s` seconds of measurements behind the measuring
    /// channel's position (the pipeline sets the longest ring's time plus
    /// `stale_s`, so that a follower at the far end of its ring still
    /// finds its speed).
    pub fn set_horizon_s(&self, s: f64) {
        self.horizon_s.store(s.to_bits(), Ordering::Relaxed);
    }

    /// Records a measured speed now (wall clock) without a place in signal
    /// time: the published speed only.
    pub fn set_speed_hz(&self, hz: f64) {
        self.speed_bits.store(hz.to_bits(), Ordering::Relaxed);
        self.updated_unix_ns.store(unix_now_ns(), Ordering::Relaxed);
    }

    /// The measuring channel's report for one run of samples: the
    /// measurements in it (signal-time order; NaN: unknown from there),
    /// then how far it has read. Wakes the channels waiting for it.
    pub fn record(&self, measured: &[(SignalTime, f64)], through: SignalTime) {
        if let Some(&(_, hz)) = measured.iter().rev().find(|(_, hz)| hz.is_finite()) {
            self.set_speed_hz(hz);
        }
        let waiters = {
            let mut t = self.timeline();
            t.entries.extend(measured.iter().copied());
            t.through = through;
            self.prune(&mut t);
            std::mem::take(&mut t.waiters)
        };
        for w in waiters {
            w.unpark();
        }
    }

    /// Drops what no follower can still need: entries older than the
    /// horizon behind `through` (keeping the newest of them, which may
    /// still be the speed of a block at the horizon) and any beyond
    /// `TIMELINE_MAX`.
    fn prune(&self, t: &mut Timeline) {
        let horizon = f64::from_bits(self.horizon_s.load(Ordering::Relaxed));
        let fs = self.measured_on.as_ref().map_or(0.0, |(_, fs)| *fs);
        let keep_samples = (horizon * fs) as u64;
        let keep_ns = (horizon * 1e9) as u64;
        let through = t.through;
        while t.entries.len() > 1 {
            let next = t.entries[1].0;
            let old = if next.epoch != through.epoch {
                next.ns.saturating_add(keep_ns) < through.ns
            } else {
                next.sample.saturating_add(keep_samples) < through.sample
                    && next.ns.saturating_add(keep_ns) < through.ns
            };
            if old || t.entries.len() > TIMELINE_MAX {
                t.entries.pop_front();
            } else {
                break;
            }
        }
    }

    /// No more measurements will come: waiting followers go on (end of a
    /// replay, or a pipeline that does not hold the measuring channel).
    pub fn close(&self) {
        let waiters = {
            let mut t = self.timeline();
            t.closed = true;
            std::mem::take(&mut t.waiters)
        };
        for w in waiters {
            w.unpark();
        }
    }

    /// Whether every measurement at or before `at` is known (the measuring
    /// channel has read past it, or no more will come). A fixed speed is
    /// always known.
    pub fn known_through(&self, at: &SignalTime, same_source: bool) -> bool {
        if !self.is_measured() {
            return true;
        }
        let t = self.timeline();
        t.closed || at.not_after(&t.through, same_source)
    }

    /// As [`MachineShared::known_through`]; when not yet known, the current
    /// thread is woken when the measuring channel next reports.
    pub fn known_through_or_wake(&self, at: &SignalTime, same_source: bool) -> bool {
        if !self.is_measured() {
            return true;
        }
        let mut t = self.timeline();
        if t.closed || at.not_after(&t.through, same_source) {
            return true;
        }
        let me = std::thread::current();
        if !t.waiters.iter().any(|w| w.id() == me.id()) {
            t.waiters.push(me);
        }
        false
    }

    /// Counts a result evaluated before its speed was known.
    pub fn note_late_result(&self) -> u64 {
        self.late_results.fetch_add(1, Ordering::Relaxed) + 1
    }

    /// Results whose order bands were evaluated before the measuring
    /// channel had caught up with them.
    pub fn late_results(&self) -> u64 {
        self.late_results.load(Ordering::Relaxed)
    }

    /// The speed at signal time `at`: the latest measurement placed at or
    /// before it, unless it is older than `stale_s` of signal time (or
    /// marks a break). None when unknown. A fixed speed is always known.
    pub fn speed_at(&self, at: &SignalTime, same_source: bool) -> Option<f64> {
        let stale_s = match &self.spec.speed {
            SpeedSource::Fixed { hz } => return Some(*hz),
            SpeedSource::Tach { stale_s, .. } | SpeedSource::Peak { stale_s, .. } => *stale_s,
        };
        let t = self.timeline();
        let n = t
            .entries
            .partition_point(|(when, _)| when.not_after(at, same_source));
        let (when, hz) = *t.entries.get(n.checked_sub(1)?)?;
        if !hz.is_finite() {
            return None;
        }
        let age_s = if same_source {
            if when.epoch != at.epoch {
                return None;
            }
            let fs = self.measured_on.as_ref().map_or(0.0, |(_, fs)| *fs);
            if fs <= 0.0 {
                return None;
            }
            (at.sample - when.sample) as f64 / fs
        } else {
            at.ns.saturating_sub(when.ns) as f64 * 1e-9
        };
        (age_s <= stale_s).then_some(hz)
    }

    /// The published speed: the latest measurement, or None when it is
    /// unknown or no measurement came for `stale_s` of wall-clock time.
    pub fn speed_hz(&self) -> Option<f64> {
        let Some(stale_s) = self.stale_s() else {
            if let SpeedSource::Fixed { hz } = &self.spec.speed {
                return Some(*hz);
            }
            return None;
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

/// The published state as a reload replaces it: HTTP and the metrics
/// `load` it per request.
pub type LiveState = Arc<arc_swap::ArcSwap<AppState>>;

/// Config reloads, as `/metrics` shows them (the names Prometheus uses
/// for its own config reloads).
#[derive(Debug)]
pub struct ReloadStats {
    pub successes: AtomicU64,
    pub failures: AtomicU64,
    /// 1: the last reload (or the start) succeeded.
    pub last_successful: std::sync::atomic::AtomicBool,
    /// When a reload last succeeded, ns since the Unix epoch (0: none
    /// yet; the start counts, see [`AppState::last_config_success_unix_ns`]).
    pub last_success_unix_ns: AtomicU64,
}

impl ReloadStats {
    fn started_now() -> ReloadStats {
        ReloadStats {
            successes: AtomicU64::new(0),
            failures: AtomicU64::new(0),
            last_successful: std::sync::atomic::AtomicBool::new(true),
            last_success_unix_ns: AtomicU64::new(0),
        }
    }

    /// Counts one reload.
    pub fn record(&self, ok: bool) {
        if ok {
            self.successes.fetch_add(1, Ordering::Relaxed);
            self.last_success_unix_ns
                .store(unix_now_ns(), Ordering::Relaxed);
        } else {
            self.failures.fetch_add(1, Ordering::Relaxed);
        }
        self.last_successful.store(ok, Ordering::Relaxed);
    }
}

/// The read side of the whole pipeline, handed to HTTP.
pub struct AppState {
    /// Config reloads (shared by every state a reload publishes).
    pub reloads: Arc<ReloadStats>,
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
    /// What `/metrics` leaves out (`[metrics]`; a reload applies it).
    pub exposition: crate::config::exposition::ExpositionSpec,
    /// The history's settings and counters (None without `[history]`).
    pub history: Option<Arc<crate::history::HistoryShared>>,
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
            reloads: Arc::new(ReloadStats::started_now()),
            alarm_io: None,
            captures_dir: config.alarms.as_ref().map(|a| a.captures_dir()),
            token: None,
            machines: config
                .machines
                .iter()
                .map(|m| Arc::new(MachineShared::of_config(m.clone(), config)))
                .collect(),
            channels,
            by_name,
            sources,
            started_unix_ns: unix_now_ns(),
            exposition: config.exposition.clone(),
            history: None,
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

    /// When the config last loaded successfully: the last successful
    /// reload, else the start.
    pub fn last_config_success_unix_ns(&self) -> u64 {
        match self.reloads.last_success_unix_ns.load(Ordering::Relaxed) {
            0 => self.started_unix_ns,
            t => t,
        }
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
