//! The pipeline: the one place that builds rings, DSP workers and alarm
//! engines from a validated config, starts them and stops them.
//!
//! Everything downstream of the sources is assembled by [`Builder`], so the
//! daemon, `replay`, `selftest`, the bench rigs and the tests all run the
//! same pipeline: same ring sizing, same alarm wiring, same speed sharing.
//!
//! ```text
//! Builder::new(&config)            daemon defaults: rings of [dsp] ring_seconds,
//!     .ring(..) .alarms(..)        alarms as configured, gathering on
//!     .assemble()? ── Assembly ──┬─ .start()   worker threads + source tasks (the daemon)
//!                                └─ .inline()  channels driven by the caller (replay, bench)
//! ```
//!
//! - [`state`]: what the workers publish and HTTP reads (`AppState`).
//! - [`worker`]: one channel's DSP (`ChannelDsp`) and the worker threads
//!   (with the commands a reload sends them).
//! - [`reload`]: a new config applied to the running pipeline
//!   (`Pipeline::reload`).

pub mod reload;
pub mod state;
pub mod trend;
pub mod worker;

use std::collections::BTreeMap;
use std::sync::mpsc::Receiver;
use std::sync::Arc;

use crate::alarm::engine::{AlarmCommand, AlarmContext, CaptureSetup, ChannelAlarms};
use crate::alarm::{self, state::AlarmMemory};
use crate::config::alarms::AlarmsSpec;
use crate::config::{self as config_spec, ChannelSpec, Config};
use crate::history::History;
use crate::ring::{try_channel_ring, RingAllocError, RingWriter};
use crate::shutdown::ShutdownSignal;
use crate::source::{self, ChannelInput, SourceOutputs};
use state::{AppState, ChannelShared, LiveState};
pub use worker::Heartbeat;
use worker::{ChannelDsp, Workers};

#[derive(Debug, thiserror::Error)]
pub enum RunError {
    #[error("cannot start DSP worker threads: {0}")]
    Workers(#[source] std::io::Error),
    #[error("alarm storage: {0}")]
    Alarms(String),
    #[error("HTTP server failed: {0}")]
    Http(#[source] std::io::Error),
    #[error("no source named {0:?} in the config")]
    UnknownSource(String),
    #[error("cannot start the history writer thread: {0}")]
    History(#[source] std::io::Error),
    #[error("channel {channel:?}: {source}")]
    Ring {
        channel: String,
        #[source]
        source: RingAllocError,
    },
}

/// How many samples each channel's ring holds.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum RingSize {
    /// `[dsp] ring_seconds` of the channel's samples, at least two blocks
    /// (the daemon).
    FromConfig,
    /// Two blocks plus this many samples: for a caller that drains the
    /// rings after every write of at most that many samples (replay, a
    /// whole record written at once).
    Headroom(usize),
}

impl RingSize {
    /// The capacity of `spec`'s ring.
    pub fn capacity(self, config: &Config, spec: &ChannelSpec) -> usize {
        match self {
            RingSize::FromConfig => {
                let n = (config.ring_seconds * spec.sample_rate_hz).ceil() as usize;
                n.max(2 * spec.block)
            }
            RingSize::Headroom(n) => 2 * spec.block + n,
        }
    }
}

/// Which alarms the channels run.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum AlarmMode {
    /// As configured: with `[alarms]`, the journal (replayed for latches),
    /// captures, stored baselines and the operator token; without it,
    /// health and limits in memory (the daemon).
    FromConfig,
    /// Health checks and limits evaluated and published, nothing read or
    /// written on disk (bench rigs, tests).
    InMemory,
    /// No alarm engine at all (replay: spectra and bands only).
    Off,
}

/// Assembles a pipeline from a validated config. See the module docs.
pub struct Builder<'a> {
    config: &'a Config,
    ring: RingSize,
    alarms: AlarmMode,
    gather: bool,
    blocks_per_turn: Option<usize>,
    only_source: Option<String>,
    history: bool,
}

impl<'a> Builder<'a> {
    /// The daemon's pipeline: rings of `[dsp] ring_seconds`, alarms as
    /// configured, gathering on (`ChannelDsp::set_gather`).
    pub fn new(config: &'a Config) -> Builder<'a> {
        Builder {
            config,
            ring: RingSize::FromConfig,
            alarms: AlarmMode::FromConfig,
            gather: true,
            blocks_per_turn: None,
            only_source: None,
            history: true,
        }
    }

    pub fn ring(mut self, ring: RingSize) -> Self {
        self.ring = ring;
        self
    }

    pub fn alarms(mut self, alarms: AlarmMode) -> Self {
        self.alarms = alarms;
        self
    }

    /// Whether channels wait for all of a result's samples before
    /// computing it (see `ChannelDsp::set_gather`).
    pub fn gather(mut self, gather: bool) -> Self {
        self.gather = gather;
        self
    }

    /// Blocks one channel computes per turn (`replay` takes 1, so that it
    /// sees every published result).
    pub fn blocks_per_turn(mut self, n: usize) -> Self {
        self.blocks_per_turn = Some(n);
        self
    }

    /// Whether a `[history]` of the config is written (the daemon: yes;
    /// `replay` and the bench rigs leave the file alone).
    pub fn history(mut self, on: bool) -> Self {
        self.history = on;
        self
    }

    /// Builds only the channels of one source (`replay`).
    pub fn only_source(mut self, name: &str) -> Self {
        self.only_source = Some(name.to_string());
        self
    }

    /// Builds the shared state, the rings, each channel's DSP and alarms,
    /// and (with `AlarmMode::FromConfig` and `[alarms]`) opens the journal
    /// and capture store and starts the alarm I/O thread. Nothing else
    /// runs yet.
    pub fn assemble(self) -> Result<Assembly, RunError> {
        let config = self.config;
        if let Some(name) = &self.only_source {
            if !config.sources.iter().any(|s| &s.name == name) {
                return Err(RunError::UnknownSource(name.clone()));
            }
        }
        let store = match (self.alarms, &config.alarms) {
            (AlarmMode::FromConfig, Some(a)) => Some(AlarmStore::open(a, config.channels.len())?),
            _ => None,
        };
        let mut shared = Vec::new();
        let mut inboxes = Vec::new();
        for spec in &config.channels {
            if self.only_source.as_ref().is_some_and(|s| &spec.source != s) {
                continue;
            }
            let (ch, inbox) =
                ChannelShared::with_alarm_commands(spec.clone(), config.trend_seconds);
            shared.push(Arc::new(ch));
            inboxes.push(inbox);
        }
        let history = match (&config.history, self.history) {
            (Some(h), true) => Some(History::start(h.clone()).map_err(RunError::History)?),
            _ => None,
        };
        let mut app = AppState::with_channels(config, shared);
        app.history = history.as_ref().map(|h| h.shared.clone());
        if self.alarms == AlarmMode::FromConfig {
            app = app.with_token(load_token(config));
        }
        if let Some(io) = store.as_ref().and_then(|s| s.io.as_ref()) {
            app = app.with_alarm_io(io.shared().clone());
        }
        let state = Arc::new(app);
        let mut dsps = Vec::new();
        let mut writers = Vec::new();
        for (ch, inbox) in state.channels.iter().zip(inboxes) {
            let spec = &ch.spec;
            let capacity = self.ring.capacity(config, spec);
            let (w, r) = try_channel_ring(capacity, spec.sample_rate_hz, ch.counters.clone())
                .map_err(|source| RunError::Ring {
                    channel: spec.name.clone(),
                    source,
                })?;
            let mut dsp = ChannelDsp::with_machines(ch.clone(), r, &state.machines);
            dsp.set_gather(self.gather);
            if let Some(n) = self.blocks_per_turn {
                dsp.set_blocks_per_turn(n);
            }
            if let Some(tap) = history
                .as_ref()
                .and_then(|h| h.tap(ch.spec.clone(), ch.window_enbw_bins))
            {
                dsp.set_history(tap);
            }
            match (self.alarms, &store) {
                (AlarmMode::Off, _) => {}
                (AlarmMode::FromConfig, Some(store)) => {
                    dsp.set_alarms(store.channel_alarms(spec, inbox));
                }
                (AlarmMode::FromConfig | AlarmMode::InMemory, _) => {
                    dsp.set_alarms(ChannelAlarms::new(spec, AlarmContext::in_memory(inbox)));
                }
            }
            dsps.push(dsp);
            writers.push(w);
        }
        // Signal-time speeds (README "Orders"): a machine keeps its
        // measurements for as long as a follower can lag behind it (the
        // longest ring, plus `stale_s`); a machine whose measuring channel
        // is not built here (replay of another source) gets no
        // measurements, and nobody waits for it.
        let longest_ring = dsps
            .iter()
            .map(ChannelDsp::ring_seconds)
            .fold(0.0, f64::max);
        for m in &state.machines {
            m.set_horizon_s(longest_ring + m.stale_s().unwrap_or(0.0) + 1.0);
            if m.is_measured() && !dsps.iter().any(|d| d.measures(m)) {
                m.close();
            }
        }
        Ok(Assembly {
            config: config.clone(),
            state,
            dsps,
            writers,
            store,
            mode: self.alarms,
            gather: self.gather,
            history,
        })
    }

    /// `assemble`, then `Assembly::start`. Must be called inside a tokio
    /// runtime.
    pub fn start(self) -> Result<Pipeline, RunError> {
        self.assemble()?.start()
    }
}

/// The operator token of `[alarms]`, or None with a warning (acknowledge
/// and re-learn are then refused).
fn load_token(config: &Config) -> Option<alarm::token::Token> {
    let a = config.alarms.as_ref()?;
    let Some(src) = &a.token else {
        tracing::warn!(
            "no token_file or token_env in [alarms]: acknowledge and re-learn will be refused"
        );
        return None;
    };
    match alarm::token::Token::load(src) {
        Ok(t) => Some(t),
        Err(e) => {
            tracing::warn!(error = %e, "no operator token: acknowledge and re-learn will be refused");
            None
        }
    }
}

/// Everything built, nothing running: start it as the daemon does, or
/// drive it by hand.
pub struct Assembly {
    config: Config,
    /// The read side, as HTTP gets it.
    pub state: Arc<AppState>,
    dsps: Vec<ChannelDsp>,
    writers: Vec<RingWriter>,
    store: Option<AlarmStore>,
    mode: AlarmMode,
    gather: bool,
    /// The history's writer (after `dsps`: the taps go first on drop).
    history: Option<History>,
}

impl Assembly {
    /// Starts the DSP worker threads (`[dsp] workers`) and one task per
    /// source. Must be called inside a tokio runtime.
    pub fn start(self) -> Result<Pipeline, RunError> {
        let Assembly {
            config,
            state,
            dsps,
            writers,
            mut store,
            mode,
            gather,
            history,
        } = self;
        let alarm_io = store.as_mut().and_then(|s| s.io.take());
        let (workers, wakers) = match Workers::start(config.workers, dsps) {
            Ok(w) => w,
            Err(e) => {
                if let Some(io) = alarm_io {
                    io.stop();
                }
                return Err(RunError::Workers(e));
            }
        };
        let mut inputs: Vec<Option<ChannelInput>> = state
            .channels
            .iter()
            .zip(writers)
            .zip(wakers)
            .map(|((ch, writer), waker)| Some(input_of(&ch.spec, writer, waker)))
            .collect();
        let mut sources = Vec::new();
        for (k, spec) in config.sources.iter().enumerate() {
            let slots = slots_of(&state, &mut inputs, &spec.name, spec.channels);
            sources.push(RunningSource::spawn(spec, slots, state.sources[k].clone()));
        }
        let live: LiveState = Arc::new(arc_swap::ArcSwap::new(state.clone()));
        Ok(Pipeline {
            state,
            live,
            config,
            workers: Some(workers),
            alarm_io,
            store,
            mode,
            gather,
            sources,
            history,
        })
    }

    /// No threads: the caller feeds the rings and polls the channels on
    /// its own thread (replay, bench rigs, tests).
    pub fn inline(self) -> Inline {
        let me = std::thread::current();
        let inputs = self
            .state
            .channels
            .iter()
            .zip(self.writers)
            .map(|(ch, w)| Some(input_of(&ch.spec, w, me.clone())))
            .collect();
        Inline {
            config: self.config,
            state: self.state,
            channels: self.dsps,
            inputs,
            alarm_io: self.store.and_then(|mut s| s.io.take()),
            _history: self.history,
        }
    }
}

/// One running source task, with its own stop signal and the port its
/// fan-out changes through (a reload restarts or rewires it alone).
struct RunningSource {
    spec: config_spec::SourceSpec,
    counters: Arc<crate::counters::SourceCounters>,
    signal: ShutdownSignal,
    port: Arc<source::OutputPort>,
    task: tokio::task::JoinHandle<()>,
}

impl RunningSource {
    /// Starts `spec`'s task over `slots` (its channels' inputs by index).
    fn spawn(
        spec: &config_spec::SourceSpec,
        slots: Vec<Option<ChannelInput>>,
        counters: Arc<crate::counters::SourceCounters>,
    ) -> RunningSource {
        let (outputs, port) = SourceOutputs::with_port(slots);
        let signal = ShutdownSignal::new();
        let task = source::spawn(source::SourceContext {
            spec: spec.clone(),
            outputs,
            counters: counters.clone(),
            shutdown: signal.subscribe(),
        });
        RunningSource {
            spec: spec.clone(),
            counters,
            signal,
            port,
            task,
        }
    }

    /// Stops the task and returns its channels' inputs (the ring writers
    /// it held), waiting a bounded time for them to be handed back.
    async fn stop(self) -> Vec<Option<ChannelInput>> {
        self.signal.trigger();
        let _ = self.task.await;
        for _ in 0..100 {
            if let Some(inputs) = self.port.take_returned() {
                return inputs;
            }
            tokio::time::sleep(std::time::Duration::from_millis(20)).await;
        }
        tracing::warn!(source = %self.spec.name, "a stopped source did not hand back its channels");
        Vec::new()
    }
}

/// The running pipeline without its HTTP server: sources, rings, workers.
pub struct Pipeline {
    /// The state published at start (see [`Pipeline::live`] for the one
    /// in force after a reload).
    pub state: Arc<AppState>,
    /// The published state, replaced by each reload.
    pub live: LiveState,
    config: Config,
    workers: Option<Workers>,
    alarm_io: Option<alarm::io::AlarmIo>,
    store: Option<AlarmStore>,
    mode: AlarmMode,
    gather: bool,
    sources: Vec<RunningSource>,
    /// The history's writer; declared after `workers`, so a dropped
    /// pipeline stops the workers (and their taps) before joining it.
    history: Option<History>,
}

impl Pipeline {
    /// The daemon's pipeline for `config`, started (`Builder::new(config).start()`).
    /// Must be called inside a tokio runtime.
    pub fn start(config: &Config) -> Result<Pipeline, RunError> {
        Builder::new(config).start()
    }

    /// One heartbeat per DSP worker thread (see [`Heartbeat`]).
    pub fn heartbeats(&self) -> Vec<Heartbeat> {
        self.workers
            .as_ref()
            .map_or_else(Vec::new, Workers::heartbeats)
    }

    /// Stops the sources, then the workers (which finish their alarms'
    /// captures), then the alarm I/O thread.
    pub async fn stop(mut self) {
        for s in &self.sources {
            s.signal.trigger();
        }
        for s in self.sources.drain(..) {
            let _ = s.task.await;
        }
        if let Some(w) = self.workers.take() {
            let _ = tokio::task::spawn_blocking(move || w.stop()).await;
        }
        // Workers have handed over their last events and captures.
        if let Some(io) = self.alarm_io.take() {
            let _ = tokio::task::spawn_blocking(move || io.stop()).await;
        }
        // And their last intervals: the writer writes them and ends.
        if let Some(h) = self.history.take() {
            let _ = tokio::task::spawn_blocking(move || drop(h)).await;
        }
    }
}

/// A pipeline without threads, driven by its caller: write samples into
/// the channels' inputs (or a source's outputs), then [`Inline::drain`].
pub struct Inline {
    config: Config,
    pub state: Arc<AppState>,
    /// Each built channel's DSP, in config order.
    pub channels: Vec<ChannelDsp>,
    inputs: Vec<Option<ChannelInput>>,
    alarm_io: Option<alarm::io::AlarmIo>,
    /// After `channels`: their taps are dropped first. Only held.
    _history: Option<History>,
}

impl Inline {
    /// The inputs of source `name`'s channels, as its task would get them
    /// (for a decoder fed by hand). Each input can be taken once.
    pub fn source_outputs(&mut self, name: &str) -> Result<SourceOutputs, RunError> {
        let source = self
            .config
            .sources
            .iter()
            .position(|s| s.name == name)
            .ok_or_else(|| RunError::UnknownSource(name.to_string()))?;
        let width = self.config.sources[source].channels;
        Ok(outputs_of(&self.state, &mut self.inputs, name, width))
    }

    /// Every channel's input not yet taken, in config order (to write
    /// channels directly, without a source's de-interleaving).
    pub fn take_inputs(&mut self) -> Vec<ChannelInput> {
        self.inputs.iter_mut().filter_map(Option::take).collect()
    }

    /// Polls every channel until none has work left.
    pub fn drain(&mut self) {
        drain(&mut self.channels);
    }

    /// End of input: no more speed measurements will come (each machine's
    /// timeline is closed), so channels waiting for a speed go on; then
    /// drains.
    pub fn end_of_input(&mut self) {
        for m in &self.state.machines {
            m.close();
        }
        drain(&mut self.channels);
    }

    /// Finishes the channels' alarms and stops the alarm I/O thread.
    pub fn finish(mut self) {
        for ch in &mut self.channels {
            ch.finish();
        }
        if let Some(io) = self.alarm_io.take() {
            io.stop();
        }
    }
}

/// Polls `channels` until none has work left.
pub fn drain(channels: &mut [ChannelDsp]) {
    loop {
        let mut worked = false;
        for d in channels.iter_mut() {
            worked |= d.poll();
        }
        if !worked {
            return;
        }
    }
}

/// The journal, capture store and baselines of `[alarms]`, with the I/O
/// thread that writes them.
struct AlarmStore {
    /// Taken by the pipeline that runs it.
    io: Option<alarm::io::AlarmIo>,
    outbox: alarm::io::Outbox,
    memories: BTreeMap<(String, String), AlarmMemory>,
    captures: CaptureSetup,
    baselines_dir: std::path::PathBuf,
}

impl AlarmStore {
    /// Opens the journal (replaying it), the capture store, and starts the
    /// alarm I/O thread.
    fn open(a: &AlarmsSpec, channels: usize) -> Result<AlarmStore, RunError> {
        let (journal, replay) = alarm::journal::Journal::open(&a.journal_dir(), a.journal)
            .map_err(|e| RunError::Alarms(e.to_string()))?;
        if replay.bad_lines > 0 || replay.torn_tail || replay.unreadable_files > 0 {
            tracing::warn!(
                bad_lines = replay.bad_lines,
                torn_tail = replay.torn_tail,
                unreadable_files = replay.unreadable_files,
                "journal had damaged lines (skipped)"
            );
        }
        tracing::info!(events = replay.events.len(), files = replay.files, dir = %a.journal_dir().display(), "journal replayed");
        let (store, cleanup) = alarm::capture::CaptureStore::open(&a.captures_dir(), a.retention)
            .map_err(|e| RunError::Alarms(e.to_string()))?;
        if cleanup.temp_files > 0 || cleanup.orphans > 0 {
            tracing::warn!(
                temp_files = cleanup.temp_files,
                orphans = cleanup.orphans,
                "removed unfinished capture files left by a crash"
            );
        }
        let memories = alarm::journal::alarm_memories(&replay.events);
        let (io, outbox) = alarm::io::AlarmIo::start(
            journal,
            store,
            a.baselines_dir(),
            &replay.events,
            alarm::io::queue_capacity(channels),
        )
        .map_err(|e| RunError::Alarms(e.to_string()))?;
        Ok(AlarmStore {
            io: Some(io),
            outbox,
            memories,
            captures: CaptureSetup {
                pre_s: a.capture_pre_s,
                post_s: a.capture_post_s,
            },
            baselines_dir: a.baselines_dir(),
        })
    }

    /// A channel's alarms with its remembered latches and stored baselines.
    fn channel_alarms(&self, spec: &ChannelSpec, inbox: Receiver<AlarmCommand>) -> ChannelAlarms {
        self.channel_alarms_with(spec, inbox, &|_| None)
    }

    /// As [`AlarmStore::channel_alarms`], latches taken from `carried` (a
    /// channel restarted by a reload: its board before) before the
    /// journal's.
    fn channel_alarms_with(
        &self,
        spec: &ChannelSpec,
        inbox: Receiver<AlarmCommand>,
        carried: &dyn Fn(&str) -> Option<AlarmMemory>,
    ) -> ChannelAlarms {
        let name = &spec.name;
        let memory = |band: &str| {
            carried(band).or_else(|| {
                self.memories
                    .get(&(name.clone(), band.to_string()))
                    .copied()
            })
        };
        let baseline = |band: &str| match alarm::baseline::load(&self.baselines_dir, name, band) {
            Ok(b) => b,
            Err(e) => {
                tracing::warn!(channel = %name, band, error = %e, "stored baseline unreadable; learning again");
                None
            }
        };
        ChannelAlarms::new(
            spec,
            AlarmContext {
                memory: &memory,
                baseline: &baseline,
                outbox: Some(self.outbox.clone()),
                captures: Some(self.captures),
                commands: inbox,
            },
        )
    }
}

/// A channel's input as its source writes it: ring, scaling, waker.
fn input_of(spec: &ChannelSpec, writer: RingWriter, waker: std::thread::Thread) -> ChannelInput {
    ChannelInput {
        writer,
        scale: spec.scale,
        offset: spec.offset,
        waker,
    }
}

/// The outputs of source `name` (`width` channels per instant): the inputs
/// of its channels, taken out of `inputs` (one per built channel).
fn outputs_of(
    state: &AppState,
    inputs: &mut [Option<ChannelInput>],
    name: &str,
    width: usize,
) -> SourceOutputs {
    let mut out = SourceOutputs::new(width);
    for (index, i) in slots_of(state, inputs, name, width).into_iter().enumerate() {
        if let Some(i) = i {
            out.attach(index, i);
        }
    }
    out
}

/// As [`outputs_of`], as slots by channel index.
fn slots_of(
    state: &AppState,
    inputs: &mut [Option<ChannelInput>],
    name: &str,
    width: usize,
) -> Vec<Option<ChannelInput>> {
    let mut slots: Vec<Option<ChannelInput>> = (0..width).map(|_| None).collect();
    for (ch, input) in state.channels.iter().zip(inputs.iter_mut()) {
        if ch.spec.source == name {
            if let (Some(slot), Some(i)) = (slots.get_mut(ch.spec.index), input.take()) {
                *slot = Some(i);
            }
        }
    }
    slots
}
