//! The alarms of one channel, evaluated on its DSP thread.
//!
//! Per read of samples: health detection, the history ring (pre-trigger
//! waveform) and the captures being filled. Per published spectrum: every
//! alarm of the channel (bands and overall levels) with the channel's health
//! as inhibit, baseline learning, and a capture on each rising edge to alert
//! or danger. Operator actions (acknowledge, re-learn) arrive as commands on
//! a queue that the worker drains between turns. Nothing here does I/O:
//! journal events, captures and baselines go to the alarm I/O thread
//! through the [`Outbox`], which never blocks (a full queue is counted).
//!
//! Clock: alarms and health run on *signal time*, the timestamps of the
//! samples (seconds since the Unix epoch), kept monotonic, and carried on
//! by the wall clock while no samples come (so that "stale" can happen).
//! Live, signal time is wall time; in a replay or a sped-up simulation the
//! delays are counted in seconds of signal, so the same bytes trip the same
//! alarms at the same samples.

use std::sync::mpsc::Receiver;
use std::time::Instant;

use crate::alarm::baseline::{Baseline, Learner};
use crate::alarm::capture::{
    capture_id, history_blocks, span_samples, trip_time, BandAtTrip, CaptureBuilder,
    CaptureSettings, EndReason, HistoryRing, SpectrumAtTrip, TripInfo,
};
use crate::alarm::health::{HealthDetector, Reasons};
use crate::alarm::io::{Message, Outbox};
use crate::alarm::journal::{Event, EventLimits};
use crate::alarm::state::{AckError, AlarmMachine, AlarmMemory, AlarmState, Cause, Input};
use crate::clock::unix_now_ns;
use crate::config::{AlarmTarget, AveragingMode, ChannelAlarm, ChannelSpec};
use crate::dsp::bands::{BandStatus, BandValue};
use crate::dsp::stats::Overall;

/// What an operator asks of an alarm, with where to send the answer.
#[derive(Debug)]
pub enum AlarmCommand {
    Ack {
        alarm: usize,
        reply: tokio::sync::oneshot::Sender<Result<CommandReply, CommandError>>,
    },
    Relearn {
        alarm: usize,
        reply: tokio::sync::oneshot::Sender<Result<CommandReply, CommandError>>,
    },
}

/// The answer to a command: what happened and the alarm after it.
#[derive(Debug, Clone)]
pub struct CommandReply {
    pub outcome: &'static str,
    pub view: AlarmView,
}

#[derive(Debug, Clone, thiserror::Error)]
pub enum CommandError {
    #[error("{0}")]
    Ack(#[from] AckError),
    #[error("this alarm has no baseline to re-learn")]
    NoBaseline,
    #[error("no such alarm")]
    NoAlarm,
}

/// One alarm as the API and metrics show it.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct AlarmView {
    pub state: AlarmState,
    pub latched: bool,
    pub acknowledged: bool,
    /// When `state` last changed, ns since the Unix epoch (0: not yet).
    pub since_unix_ns: u64,
    /// Last value evaluated.
    pub value: Option<f64>,
    pub alert_limit: Option<f64>,
    pub danger_limit: Option<f64>,
    /// Transitions into normal, alert, danger, inhibited.
    pub transitions: [u64; 4],
    /// Learning its baseline: fraction done.
    pub learning: Option<f64>,
}

/// Channel health as the API and metrics show it.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct HealthView {
    pub ok: bool,
    pub reasons: Reasons,
    pub since_unix_ns: u64,
}

/// Everything a channel's alarms show, replaced as a whole on each change.
#[derive(Debug, Clone, PartialEq)]
pub struct AlarmBoard {
    pub health: HealthView,
    /// One per `ChannelSpec::alarms`, same order.
    pub alarms: Vec<AlarmView>,
}

/// Signal-time clock (see the module docs).
#[derive(Debug)]
struct Clock {
    /// Latest signal time seen, s since the epoch.
    last_s: f64,
    wall_at_last: Instant,
    now_s: f64,
}

impl Clock {
    fn new() -> Clock {
        let now = unix_now_ns() as f64 * 1e-9;
        Clock {
            last_s: now,
            wall_at_last: Instant::now(),
            now_s: now,
        }
    }
    /// Samples up to time `t_s` were seen.
    fn saw(&mut self, t_s: f64) -> f64 {
        if t_s > self.now_s {
            self.now_s = t_s;
        }
        self.last_s = self.now_s;
        self.wall_at_last = Instant::now();
        self.now_s
    }
    /// Now, carrying on from the last samples by the wall clock.
    fn now(&mut self) -> f64 {
        let t = self.last_s + self.wall_at_last.elapsed().as_secs_f64();
        if t > self.now_s {
            self.now_s = t;
        }
        self.now_s
    }
}

fn ns(t_s: f64) -> u64 {
    (t_s * 1e9).max(0.0) as u64
}

/// How much signal a capture keeps around its trip.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct CaptureSetup {
    pub pre_s: f64,
    pub post_s: f64,
}

/// What a channel's alarms start from and report to.
pub struct AlarmContext<'a> {
    /// Latches and acknowledgements the journal remembers, by alarm name.
    pub memory: &'a dyn Fn(&str) -> Option<AlarmMemory>,
    /// Stored baselines, by alarm name.
    pub baseline: &'a dyn Fn(&str) -> Option<Baseline>,
    /// Where events, captures and learned baselines go (None: nowhere).
    pub outbox: Option<Outbox>,
    /// Capture lengths (None: no captures).
    pub captures: Option<CaptureSetup>,
    /// Operator commands for this channel (acknowledge, re-learn).
    pub commands: Receiver<AlarmCommand>,
}

impl AlarmContext<'static> {
    /// Alarms that remember nothing and write nothing: health, limits and
    /// the published board only.
    pub fn in_memory(commands: Receiver<AlarmCommand>) -> AlarmContext<'static> {
        AlarmContext {
            memory: &nothing::<AlarmMemory>,
            baseline: &nothing::<Baseline>,
            outbox: None,
            captures: None,
            commands,
        }
    }
}

fn nothing<T>(_: &str) -> Option<T> {
    None
}

pub struct ChannelAlarms {
    channel: String,
    unit: &'static str,
    specs: Vec<ChannelAlarm>,
    machines: Vec<AlarmMachine>,
    learners: Vec<Option<Learner>>,
    /// Each alarm's baseline (stored or learned), to set its limits again
    /// when they change (a config reload).
    baselines: Vec<Option<Baseline>>,
    health: HealthDetector,
    history: Option<HistoryRing>,
    pre_samples: usize,
    post_samples: usize,
    /// Samples before the trip a capture must hold so that the averaged
    /// spectrum at the trip can be recomputed from it (see
    /// [`history_blocks`]); the history ring holds at least this many.
    average_span: usize,
    /// The channel's settings, stored with each capture.
    settings: Box<CaptureSettings>,
    /// Stream index of the first sample after the latest discontinuity,
    /// and of the sample after the newest one seen.
    run_start: Option<u64>,
    run_next: u64,
    builders: Vec<CaptureBuilder>,
    outbox: Option<Outbox>,
    commands: Receiver<AlarmCommand>,
    clock: Clock,
    since_ns: Vec<u64>,
    health_since_ns: u64,
    /// Set when something the board shows changed.
    dirty: bool,
    /// Transitions since the worker last took them: (alarm, from, to).
    transitions: Vec<(usize, AlarmState, AlarmState)>,
}

impl ChannelAlarms {
    /// Builds the alarms of `spec`, restoring latches from `memories` (by
    /// alarm name) and limits from the stored `baselines` (by alarm index).
    pub fn new(spec: &ChannelSpec, ctx: AlarmContext<'_>) -> ChannelAlarms {
        let AlarmContext {
            memory: memories,
            baseline: baselines,
            outbox,
            captures,
            commands,
        } = ctx;
        let mut clock = Clock::new();
        let now = clock.now();
        let fs = spec.sample_rate_hz;
        let mut machines = Vec::new();
        let mut learners = Vec::new();
        let mut kept = Vec::new();
        for a in &spec.alarms {
            let to_si = a.unit.map_or(1.0, |u| u.to_si);
            let baseline = if a.spec.uses_baseline() {
                baselines(&a.name)
            } else {
                None
            };
            let mut m = AlarmMachine::new(&a.spec.levels(baseline.as_ref(), to_si), now);
            if let Some(mem) = memories(&a.name) {
                m.restore(mem, now);
            }
            machines.push(m);
            learners.push(match (a.spec.baseline_learn_s, &baseline) {
                (Some(s), None) => Some(Learner::new(s)),
                _ => None,
            });
            kept.push(baseline);
        }
        let (pre, post) = captures.as_ref().map_or((0, 0), |c| {
            (
                (c.pre_s * fs).ceil() as usize,
                (c.post_s * fs).ceil() as usize,
            )
        });
        let n = spec.alarms.len();
        let average_span = span_samples(
            spec.block,
            spec.hop,
            history_blocks(spec.averaging, spec.average_count),
        );
        ChannelAlarms {
            channel: spec.name.clone(),
            unit: spec.unit.symbol,
            specs: spec.alarms.clone(),
            machines,
            learners,
            baselines: kept,
            health: HealthDetector::new(spec.health, fs, now),
            history: captures.map(|_| HistoryRing::new(pre.max(average_span).max(1), fs)),
            pre_samples: pre,
            post_samples: post,
            average_span,
            settings: Box::new(CaptureSettings::of(spec)),
            run_start: None,
            run_next: 0,
            builders: Vec::new(),
            outbox,
            commands,
            clock,
            since_ns: vec![ns(now); n],
            health_since_ns: ns(now),
            dirty: true,
            transitions: Vec::new(),
        }
    }

    /// Takes the limits of `spec` (a config reload that changed only
    /// limits: same alarms, in the same order). Each alarm keeps its
    /// state, latch, acknowledge and baseline; the new limits judge the
    /// next value. An alarm not in `spec` keeps its limits.
    pub fn set_limits(&mut self, spec: &ChannelSpec) {
        for (i, a) in spec.alarms.iter().enumerate() {
            let (Some(m), Some(old)) = (self.machines.get_mut(i), self.specs.get_mut(i)) else {
                continue;
            };
            if old.name != a.name {
                continue;
            }
            let to_si = a.unit.map_or(1.0, |u| u.to_si);
            let baseline = self.baselines.get(i).and_then(Option::as_ref);
            let levels = a.spec.levels(baseline, to_si);
            m.set_limits(
                levels.alert.and_then(|l| l.limit),
                levels.danger.and_then(|l| l.limit),
            );
            *old = a.clone();
        }
        self.dirty = true;
    }

    fn send(&self, m: Message) {
        if let Some(o) = &self.outbox {
            o.send(m);
        }
    }

    fn journal(&self, e: Event) {
        self.send(Message::Event(Box::new(e)));
    }

    /// Consecutive samples arrived (`first_sample` stream index, taken at
    /// `timestamp_ns`).
    pub fn on_samples(&mut self, first_sample: u64, timestamp_ns: u64, samples: &[f32], fs: f64) {
        let end_s = timestamp_ns as f64 * 1e-9 + samples.len() as f64 / fs;
        let now = self.clock.saw(end_s);
        if !samples.is_empty() {
            if self.run_start.is_none() || first_sample != self.run_next {
                self.run_start = Some(first_sample);
            }
            self.run_next = first_sample + samples.len() as u64;
        }
        if let Some(c) = self.health.feed(now, samples) {
            self.health_changed(&c);
        }
        if let Some(h) = &mut self.history {
            h.push(first_sample, timestamp_ns, samples);
        }
        let mut i = 0;
        while i < self.builders.len() {
            if self.builders[i].push(first_sample, timestamp_ns, samples) {
                let b = self.builders.swap_remove(i);
                self.send(Message::Capture(Box::new(b.finish(EndReason::Complete))));
            } else {
                i += 1;
            }
        }
    }

    /// The stream broke.
    pub fn on_gap(&mut self) {
        let now = self.clock.now();
        if let Some(c) = self.health.gap(now) {
            self.health_changed(&c);
        }
        if let Some(h) = &mut self.history {
            h.clear();
        }
        self.run_start = None;
        for b in &mut self.builders {
            b.gap();
        }
        for b in std::mem::take(&mut self.builders) {
            self.send(Message::Capture(Box::new(b.finish(EndReason::Gap))));
        }
    }

    fn health_changed(&mut self, c: &crate::alarm::health::HealthChange) {
        self.health_since_ns = unix_now_ns();
        self.dirty = true;
        if c.ok {
            tracing::info!(channel = %self.channel, "channel health OK again");
        } else {
            tracing::warn!(channel = %self.channel, reasons = %serde_json::to_string(&c.reasons.names()).unwrap_or_default(), "channel not OK: its alarms are inhibited");
        }
        self.journal(Event::health(&self.channel, c, unix_now_ns()));
    }

    /// Periodic: stale detection and operator commands.
    pub fn tick(&mut self) {
        let now = self.clock.now();
        if let Some(c) = self.health.tick(now) {
            self.health_changed(&c);
        }
        if !self.health.is_ok() {
            // Inhibit at once, not only at the next spectrum (which may
            // never come on a dead channel).
            for i in 0..self.machines.len() {
                if let Some(t) = self.machines[i].evaluate(now, Input::Inhibited) {
                    self.transitioned(i, &t, None, &[], None);
                }
            }
        }
        while let Ok(cmd) = self.commands.try_recv() {
            self.command(cmd);
        }
    }

    fn command(&mut self, cmd: AlarmCommand) {
        let now = self.clock.now();
        match cmd {
            AlarmCommand::Ack { alarm, reply } => {
                let r = match self.machines.get_mut(alarm) {
                    None => Err(CommandError::NoAlarm),
                    Some(m) => match m.acknowledge(now) {
                        Ok(outcome) => {
                            let memory = m.memory();
                            let t = outcome.transition();
                            if t.is_some() {
                                self.since_ns[alarm] = unix_now_ns();
                            }
                            let name = &self.specs[alarm].name;
                            tracing::info!(channel = %self.channel, alarm = %name, outcome = outcome.as_str(), "alarm acknowledged");
                            self.journal(Event::ack(
                                &self.channel,
                                name,
                                outcome.as_str(),
                                t.as_ref(),
                                memory,
                                unix_now_ns(),
                            ));
                            self.dirty = true;
                            Ok(CommandReply {
                                outcome: outcome.as_str(),
                                view: self.view(alarm),
                            })
                        }
                        Err(e) => Err(CommandError::Ack(e)),
                    },
                };
                let _ = reply.send(r);
            }
            AlarmCommand::Relearn { alarm, reply } => {
                let r = match self.specs.get(alarm) {
                    None => Err(CommandError::NoAlarm),
                    Some(a) => match a.spec.baseline_learn_s {
                        None => Err(CommandError::NoBaseline),
                        Some(learn_s) => {
                            let to_si = a.unit.map_or(1.0, |u| u.to_si);
                            let ms = a.spec.levels(None, to_si);
                            self.machines[alarm].set_limits(
                                ms.alert.and_then(|l| l.limit),
                                ms.danger.and_then(|l| l.limit),
                            );
                            self.learners[alarm] = Some(Learner::new(learn_s));
                            let name = a.name.clone();
                            self.send(Message::ForgetBaseline {
                                channel: self.channel.clone(),
                                band: name.clone(),
                            });
                            self.journal(Event::baseline(
                                &self.channel,
                                &name,
                                format!("re-learn requested by an operator ({learn_s} s)"),
                                unix_now_ns(),
                            ));
                            tracing::info!(channel = %self.channel, alarm = %name, "baseline re-learn started");
                            self.dirty = true;
                            Ok(CommandReply {
                                outcome: "relearning",
                                view: self.view(alarm),
                            })
                        }
                    },
                };
                let _ = reply.send(r);
            }
        }
    }

    /// Evaluates every alarm against a published spectrum: `averages`
    /// blocks, the newest starting at stream index `first_sample`, order
    /// bands at running speed `speed_hz`.
    #[allow(clippy::too_many_arguments)] // one published result, field by field
    pub fn evaluate(
        &mut self,
        spec: &ChannelSpec,
        bands: &[BandValue],
        overall: &Overall,
        power: &[f32],
        averages: u32,
        first_sample: u64,
        speed_hz: Option<f64>,
    ) {
        let now = self.clock.now();
        let out_of_range = crate::dsp::stats::out_of_range(overall)
            || bands.iter().any(|b| b.status == BandStatus::OutOfRange);
        if let Some(c) = self.health.results(now, out_of_range) {
            self.health_changed(&c);
        }
        let healthy = self.health.is_ok();
        for i in 0..self.machines.len() {
            let a = &self.specs[i];
            let value = match a.target {
                AlarmTarget::Band(b) => bands.get(b).filter(|v| v.is_ok()).map(|v| v.value),
                AlarmTarget::OverallRms => Some(overall.rms),
                AlarmTarget::OverallPeak => Some(overall.peak),
                AlarmTarget::CrestFactor => (overall.rms > 0.0).then_some(overall.crest_factor),
            };
            let input = match (healthy, value) {
                (false, _) => Input::Inhibited,
                (true, Some(v)) if v.is_finite() => Input::Value(v),
                _ => Input::NoData,
            };
            if let Some(learner) = &mut self.learners[i] {
                if let Some(l) = learner.push(now, input) {
                    let b = Baseline {
                        version: 1,
                        channel: self.channel.clone(),
                        band: a.name.clone(),
                        unit: a.unit.map_or("", |u| u.symbol).to_string(),
                        mean: l.mean,
                        std: l.std,
                        count: l.count,
                        learned_s: l.learned_s,
                        finished_unix_ns: unix_now_ns(),
                    };
                    let to_si = a.unit.map_or(1.0, |u| u.to_si);
                    let ms = a.spec.levels(Some(&b), to_si);
                    self.machines[i].set_limits(
                        ms.alert.and_then(|l| l.limit),
                        ms.danger.and_then(|l| l.limit),
                    );
                    tracing::info!(channel = %self.channel, alarm = %a.name, mean = l.mean, std = l.std, "baseline learned");
                    self.journal(Event::baseline(
                        &self.channel,
                        &a.name,
                        format!(
                            "learned mean {} std {} from {} values over {} s",
                            l.mean, l.std, l.count, l.learned_s
                        ),
                        unix_now_ns(),
                    ));
                    self.baselines[i] = Some(b.clone());
                    self.send(Message::Baseline(Box::new(b)));
                    self.learners[i] = None;
                    self.dirty = true;
                }
            }
            if let Some(t) = self.machines[i].evaluate(now, input) {
                let end_sample = first_sample + spec.block as u64;
                let oldest_first_sample = match spec.averaging {
                    // Every block since the averages last started over.
                    AveragingMode::Exponential => self
                        .run_start
                        .filter(|s| *s <= first_sample)
                        .map_or(first_sample, |s| {
                            first_sample - (first_sample - s) / spec.hop as u64 * spec.hop as u64
                        }),
                    _ => first_sample
                        .saturating_sub(u64::from(averages.max(1) - 1) * spec.hop as u64),
                };
                let trip_spectrum = (t.cause == Cause::Trip).then(|| SpectrumAtTrip {
                    scaling: "power".to_string(),
                    unit: self.unit.to_string(),
                    f0_hz: 0.0,
                    df_hz: spec.df_hz(),
                    window: spec.window.as_str().to_string(),
                    nfft: spec.nfft,
                    averages,
                    first_sample,
                    oldest_first_sample: Some(oldest_first_sample),
                    end_sample: Some(end_sample),
                    values: power.to_vec(),
                });
                let settings = (t.cause == Cause::Trip).then(|| CaptureSettings {
                    speed_hz: self.settings.machine.as_ref().and(speed_hz),
                    ..(*self.settings).clone()
                });
                let band_vals: Vec<BandAtTrip> = if t.cause == Cause::Trip {
                    spec.bands
                        .iter()
                        .zip(bands)
                        .filter(|(_, v)| v.is_ok())
                        .map(|(b, v)| BandAtTrip {
                            band: b.name.clone(),
                            value: v.value,
                            unit: b.unit.symbol.to_string(),
                        })
                        .collect()
                } else {
                    Vec::new()
                };
                self.transitioned(i, &t, trip_spectrum, &band_vals, settings);
            }
        }
    }

    fn transitioned(
        &mut self,
        i: usize,
        t: &crate::alarm::state::Transition,
        spectrum: Option<SpectrumAtTrip>,
        bands: &[BandAtTrip],
        settings: Option<CaptureSettings>,
    ) {
        let unix = unix_now_ns();
        self.since_ns[i] = unix;
        self.dirty = true;
        // Into or out of alert or danger: the history keeps a spectrum of
        // each (not of a channel's health inhibiting or releasing).
        let level = |s: AlarmState| matches!(s, AlarmState::Alert | AlarmState::Danger);
        if self.transitions.len() < 64 && (level(t.from) || level(t.to)) {
            self.transitions.push((i, t.from, t.to));
        }
        let a = &self.specs[i];
        let st = self.machines[i].status();
        let limits = EventLimits {
            alert: st.alert_limit,
            danger: st.danger_limit,
        };
        let rising =
            t.cause == Cause::Trip && matches!(t.to, AlarmState::Alert | AlarmState::Danger);
        let mut capture = None;
        if rising {
            if let Some(ring) = &self.history {
                let id = capture_id(unix, &self.channel, &a.name, t.to.as_str());
                let trip = TripInfo {
                    unix_ns: unix,
                    time: trip_time(unix),
                    channel: self.channel.clone(),
                    band: a.name.clone(),
                    unit: a.unit.map_or("", |u| u.symbol).to_string(),
                    from: t.from.as_str().to_string(),
                    to: t.to.as_str().to_string(),
                    value: t.value,
                    limits,
                    at_sample: ring.next_sample(),
                };
                // The capture holds every sample of the blocks averaged
                // into the trip's spectrum, beyond `pre_s` if need be.
                let need = spectrum
                    .as_ref()
                    .and_then(|s| s.oldest_first_sample)
                    .map_or(0, |oldest| {
                        (ring.next_sample().saturating_sub(oldest) as usize).min(self.average_span)
                    });
                let mut b = CaptureBuilder::start(
                    id.clone(),
                    trip,
                    ring,
                    self.pre_samples.max(need),
                    self.post_samples,
                    spectrum,
                    bands.to_vec(),
                );
                if let Some(s) = settings {
                    b = b.with_settings(s);
                }
                if b.is_done() {
                    self.send(Message::Capture(Box::new(b.finish(EndReason::Complete))));
                } else {
                    self.builders.push(b);
                }
                capture = Some(id);
            }
        }
        if matches!(t.to, AlarmState::Alert | AlarmState::Danger) {
            tracing::warn!(channel = %self.channel, alarm = %a.name, from = t.from.as_str(), to = t.to.as_str(), value = t.value, "alarm transition");
        } else {
            tracing::info!(channel = %self.channel, alarm = %a.name, from = t.from.as_str(), to = t.to.as_str(), value = t.value, "alarm transition");
        }
        self.journal(Event::transition(
            &self.channel,
            &a.name,
            t,
            self.machines[i].memory(),
            limits,
            capture,
            unix,
        ));
    }

    fn view(&self, i: usize) -> AlarmView {
        let st = self.machines[i].status();
        AlarmView {
            state: st.state,
            latched: st.latched,
            acknowledged: st.acknowledged,
            since_unix_ns: self.since_ns[i],
            value: st.value,
            alert_limit: st.alert_limit,
            danger_limit: st.danger_limit,
            transitions: self.machines[i].transition_counts(),
            learning: self.learners[i].as_ref().map(|l| l.progress()),
        }
    }

    /// The transitions into or out of alert or danger since the last call,
    /// as "<alarm> <from>-><to>" with the alarm's target (the history
    /// stores a spectrum at each).
    pub fn take_transitions(&mut self, mut f: impl FnMut(&AlarmTarget, String)) {
        for (i, from, to) in self.transitions.drain(..) {
            if let Some(a) = self.specs.get(i) {
                f(
                    &a.target,
                    format!("{} {}->{}", a.name, from.as_str(), to.as_str()),
                );
            }
        }
    }

    /// Each alarm's target and current state.
    pub fn states(&self) -> impl Iterator<Item = (&AlarmTarget, AlarmState)> + '_ {
        self.specs
            .iter()
            .zip(&self.machines)
            .map(|(a, m)| (&a.target, m.status().state))
    }

    /// The board, if anything on it changed since the last call.
    pub fn take_board(&mut self, with_values: bool) -> Option<AlarmBoard> {
        if !self.dirty && !with_values {
            return None;
        }
        self.dirty = false;
        let h = self.health.state();
        Some(AlarmBoard {
            health: HealthView {
                ok: h.ok,
                reasons: h.reasons,
                since_unix_ns: self.health_since_ns,
            },
            alarms: (0..self.machines.len()).map(|i| self.view(i)).collect(),
        })
    }

    /// Shutdown: captures still being filled are written as they are.
    pub fn finish(&mut self) {
        for b in std::mem::take(&mut self.builders) {
            self.send(Message::Capture(Box::new(b.finish(EndReason::Shutdown))));
        }
    }
}
