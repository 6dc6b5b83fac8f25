//! DSP workers: dedicated OS threads, each owning a fixed set of channels.
//!
//! Per channel the worker drains the ring straight into the block buffer,
//! frames blocks with the configured overlap, computes a spectrum per block,
//! averages, evaluates bands and overall levels, and publishes one snapshot
//! per averaged result. A discontinuity mark drops the partly filled block.
//!
//! Steady state allocates nothing: the snapshot is recycled when no reader
//! still holds the previous one (`Arc::get_mut`), and a new one is allocated
//! only when a reader does.

use std::sync::atomic::{AtomicBool, AtomicU64, Ordering};
use std::sync::Arc;
use std::thread::{self, JoinHandle, Thread};
use std::time::{Duration, Instant};

use crate::alarm::engine::ChannelAlarms;
use crate::alarm::state::AlarmState;
use crate::clock::unix_now_ns;
use crate::config::AlarmTarget;
use crate::config::{SpectrumKind, SpeedSource};
use crate::counters::GapReason;
use crate::dsp::average::Averager;
use crate::dsp::bands::{shared_weights, BandPlan, BandValue};
use crate::dsp::envelope::EnvelopeEngine;
use crate::dsp::spectrum::SpectrumEngine;
use crate::dsp::speed::{track_peak, TachDetector};
use crate::dsp::stats;
use crate::history::schema::OVERALL_SERIES;
use crate::history::tap::Tap;
use crate::history::{state_code, SpectrumRecord, StoreReason};
use crate::pipeline::state::{ChannelShared, ChannelSnapshot, MachineShared, SignalTime};
use crate::ring::{Mark, ReadEvent, RingReader};

/// Envelope analysis state of a channel.
struct EnvelopeState {
    engine: EnvelopeEngine,
    spectrum: SpectrumEngine,
    averager: Averager,
    signal: Vec<f32>,
}

/// A channel whose data measures a machine's speed. The Vec holds the
/// measurements of the current run of samples, placed in signal time,
/// until they are reported to the machine (`MachineShared::record`).
enum SpeedRole {
    Tach(Arc<MachineShared>, TachDetector, Vec<(SignalTime, f64)>),
    Peak(Arc<MachineShared>, usize, usize, Vec<(SignalTime, f64)>),
}

/// Blocks one channel may compute before the worker moves to the next, so a
/// backlog on one channel does not starve the others.
const MAX_BLOCKS_PER_TURN: usize = 16;

/// How long an idle worker sleeps when no source wakes it.
const IDLE_PARK: Duration = Duration::from_millis(20);

/// The processing state of one channel.
pub struct ChannelDsp {
    shared: Arc<ChannelShared>,
    reader: RingReader,
    engine: SpectrumEngine,
    averager: Averager,
    bands: Vec<BandPlan>,
    /// Which spectrum each band reads.
    band_spectrum: Vec<SpectrumKind>,
    machine: Option<Arc<MachineShared>>,
    /// Whether this channel shares the stream index of the channel that
    /// measures its machine's speed (same source), or compares by the
    /// frames' time.
    machine_same_source: bool,
    /// Whether a result waits until its machine's speed is known through
    /// its end (a tach or peak machine this channel does not measure).
    waits_for_speed: bool,
    /// When the channel began to wait for its machine's speed.
    speed_wait: Option<Instant>,
    /// The wait for the current result's speed has run out: evaluate it
    /// with what is known.
    speed_late: bool,
    /// Times the stream index went backwards (see `SignalTime::epoch`).
    epoch: u32,
    envelope: Option<Box<EnvelopeState>>,
    speed_roles: Vec<SpeedRole>,
    frame: Vec<f32>,
    filled: usize,
    /// Sums (f64) of the frame's samples by hop-long segment, added as
    /// samples arrive (while they are in cache): the block mean for
    /// detrending and the overall levels without another pass.
    segment_sums: Vec<f64>,
    /// Stream index of `frame[0]`.
    frame_first_sample: u64,
    /// Stream index of the first sample of the oldest block in the average
    /// being accumulated.
    average_first_sample: u64,
    /// Stream index of the next sample read.
    next_sample: u64,
    /// Latest time anchor: (stream index, ns since epoch).
    anchor: (u64, u64),
    band_values: Vec<BandValue>,
    spare: Option<Arc<ChannelSnapshot>>,
    seq: u64,
    blocks_per_turn: usize,
    /// Whether to wait for all the samples of the next result (see
    /// [`ChannelDsp::set_gather`]).
    gather: bool,
    /// When the channel began to wait for a result's samples, and the
    /// longest it may wait.
    waiting: Option<(Instant, Duration)>,
    alarms: Option<Box<ChannelAlarms>>,
    /// The channel's tap into the history (`[history]`).
    history: Option<Box<Tap>>,
}

impl ChannelDsp {
    pub fn new(shared: Arc<ChannelShared>, reader: RingReader) -> ChannelDsp {
        Self::with_machines(shared, reader, &[])
    }

    /// A channel that may follow (or measure) the speed of `machines`.
    pub fn with_machines(
        shared: Arc<ChannelShared>,
        reader: RingReader,
        machines: &[Arc<MachineShared>],
    ) -> ChannelDsp {
        let spec = shared.spec.clone();
        let engine = SpectrumEngine::new(spec.window, spec.block, spec.nfft, spec.detrend);
        let nbw = engine.noise_bandwidth_lines();
        let bands: Vec<BandPlan> = spec
            .bands
            .iter()
            .map(|b| BandPlan::with_weights(&spec, b, nbw, shared_weights(&spec, b.unit)))
            .collect();
        let machine = spec
            .machine
            .as_ref()
            .and_then(|m| machines.iter().find(|x| &x.spec.name == m).cloned());
        let envelope = spec.envelope.map(|(lo, hi)| {
            Box::new(EnvelopeState {
                engine: EnvelopeEngine::new(spec.block, spec.sample_rate_hz, lo, hi),
                spectrum: SpectrumEngine::new(
                    spec.window,
                    spec.block,
                    spec.nfft,
                    crate::config::Detrend::Mean,
                ),
                averager: Averager::new(spec.averaging, spec.average_count, spec.bins()),
                signal: vec![0.0; spec.block],
            })
        });
        let df = spec.df_hz();
        let speed_roles: Vec<SpeedRole> = machines
            .iter()
            .filter_map(|m| match &m.spec.speed {
                SpeedSource::Tach {
                    channel,
                    pulses_per_rev,
                    threshold,
                    hysteresis,
                    average_revs,
                    ..
                } if *channel == spec.name => Some(SpeedRole::Tach(
                    m.clone(),
                    TachDetector::new(
                        spec.sample_rate_hz,
                        *pulses_per_rev,
                        *threshold,
                        *hysteresis,
                        *average_revs,
                    ),
                    Vec::new(),
                )),
                SpeedSource::Peak {
                    channel,
                    min_hz,
                    max_hz,
                    ..
                } if *channel == spec.name => Some(SpeedRole::Peak(
                    m.clone(),
                    (min_hz / df).ceil() as usize,
                    (max_hz / df).floor() as usize,
                    Vec::new(),
                )),
                _ => None,
            })
            .collect();
        let machine_same_source = machine
            .as_ref()
            .is_some_and(|m| m.same_source(&spec.source));
        let measures = |m: &Arc<MachineShared>| {
            speed_roles.iter().any(|r| match r {
                SpeedRole::Tach(x, ..) | SpeedRole::Peak(x, ..) => Arc::ptr_eq(x, m),
            })
        };
        let waits_for_speed = machine
            .as_ref()
            .is_some_and(|m| m.is_measured() && !measures(m));
        ChannelDsp {
            machine_same_source,
            waits_for_speed,
            speed_wait: None,
            speed_late: false,
            epoch: 0,
            band_spectrum: spec.bands.iter().map(|b| b.spectrum).collect(),
            machine,
            envelope,
            speed_roles,
            averager: Averager::new(spec.averaging, spec.average_count, spec.bins()),
            band_values: vec![BandValue::default(); bands.len()],
            frame: vec![0.0; spec.block],
            segment_sums: vec![0.0; spec.block.div_ceil(spec.hop.clamp(1, spec.block))],
            bands,
            engine,
            filled: 0,
            frame_first_sample: 0,
            average_first_sample: 0,
            next_sample: 0,
            anchor: (0, 0),
            spare: None,
            seq: 0,
            blocks_per_turn: MAX_BLOCKS_PER_TURN,
            gather: false,
            waiting: None,
            alarms: None,
            history: None,
            reader,
            shared,
        }
    }

    /// Limits how many blocks one [`poll`](Self::poll) computes (at least
    /// 1); `replay` sets 1 so that it sees every published spectrum.
    pub fn set_blocks_per_turn(&mut self, n: usize) {
        self.blocks_per_turn = n.max(1);
    }

    /// With `gather` on, the channel leaves samples in its ring until the
    /// ring holds every sample the next averaged result needs, then
    /// computes that result's blocks back to back (with linear averaging
    /// of 4, four blocks in one turn instead of one per wake-up). The
    /// result is the same and is published at the same moment (when its
    /// last sample has arrived), but the channel's block and average stay
    /// in cache from one block to the next instead of being fetched from
    /// memory for every block: with many channels that is most of the cost
    /// outside the FFT. The daemon's workers and the benchmark run with it
    /// on; a channel that measures speed (tach, peak) never waits, so the
    /// speed the other channels use is as fresh as before. A channel never
    /// waits longer than twice the time its samples take to arrive at the
    /// nominal rate, plus 0.1 s: when a stream stops (or slows), what it
    /// sent is still read, checked and counted as processed within about a
    /// second. Off by default (the replay tool feeds samples one by one and
    /// reads at once).
    pub fn set_gather(&mut self, gather: bool) {
        self.gather = gather && self.speed_roles.is_empty();
    }

    /// Samples the ring must hold before the next result can be computed
    /// in one go (bounded by the blocks one turn may compute and by half
    /// the ring, so that waiting never fills it).
    fn samples_for_next_result(&self) -> usize {
        let blocks = (self.averager.blocks_to_result() as usize).min(self.blocks_per_turn);
        let need = (self.frame.len() - self.filled) + (blocks - 1) * self.hop();
        need.min(self.reader.capacity() / 2)
    }

    /// Samples waiting in the channel's ring, not yet read.
    pub fn backlog(&self) -> usize {
        self.reader.occupied()
    }

    /// Whether to leave the ring alone this turn (gather mode).
    fn should_wait(&mut self) -> bool {
        let need = self.samples_for_next_result();
        let have = self.reader.occupied();
        if have >= need || have == 0 {
            self.waiting = None;
            return false;
        }
        let now = Instant::now();
        match self.waiting {
            None => {
                let fs = self.shared.spec.sample_rate_hz.max(1.0);
                let most = Duration::from_secs_f64(2.0 * (need - have) as f64 / fs + 0.1);
                self.waiting = Some((now, most));
                true
            }
            Some((since, most)) if now.duration_since(since) < most => true,
            Some(_) => {
                self.waiting = None;
                false
            }
        }
    }

    /// Whether this channel measures `machine`'s speed (tach or peak).
    pub fn measures(&self, machine: &Arc<MachineShared>) -> bool {
        self.speed_roles.iter().any(|r| match r {
            SpeedRole::Tach(x, ..) | SpeedRole::Peak(x, ..) => Arc::ptr_eq(x, machine),
        })
    }

    /// Capacity of the channel's ring, seconds at its sample rate.
    pub fn ring_seconds(&self) -> f64 {
        self.reader.capacity() as f64 / self.shared.spec.sample_rate_hz.max(1.0)
    }

    pub fn shared(&self) -> &Arc<ChannelShared> {
        &self.shared
    }

    /// Gives the channel its alarms (health, limits, captures).
    pub fn set_alarms(&mut self, alarms: ChannelAlarms) {
        self.alarms = Some(Box::new(alarms));
    }

    /// Gives the channel its tap into the history.
    pub fn set_history(&mut self, tap: Tap) {
        self.history = Some(Box::new(tap));
    }

    /// Publishes into `new` from now on (a reload that changed only this
    /// channel's limits): the latest snapshot and alarm board are carried
    /// over, the alarms take `new.spec`'s limits and keep their state.
    fn retarget(&mut self, new: Arc<ChannelShared>) {
        new.snapshot.store(self.shared.snapshot.load_full());
        let _ = new.worker.set(thread::current());
        if let Some(a) = &mut self.alarms {
            a.set_limits(&new.spec);
            if let Some(b) = a.take_board(false) {
                new.alarm_board.store(Some(Arc::new(b)));
            }
        }
        if new.alarm_board.load().is_none() {
            new.alarm_board.store(self.shared.alarm_board.load_full());
        }
        if let Some(h) = &mut self.history {
            h.set_spec(new.spec.clone());
        }
        self.shared = new;
    }

    /// Shutdown: finishes what the alarms hold (captures in progress) and
    /// hands the history its running interval.
    pub fn finish(&mut self) {
        if let Some(h) = &mut self.history {
            h.flush();
        }
        if let Some(a) = &mut self.alarms {
            a.finish();
            a.tick();
            if let Some(b) = a.take_board(false) {
                self.shared.alarm_board.store(Some(Arc::new(b)));
            }
        }
    }

    /// Processes what the ring holds (up to a bounded number of blocks).
    /// Returns true if it did any work.
    pub fn poll(&mut self) -> bool {
        let mut worked = false;
        let mut blocks = 0;
        if self.gather && self.should_wait() {
            // Not all there yet; marks wait in the ring with their samples.
            blocks = self.blocks_per_turn;
        }
        while blocks < self.blocks_per_turn {
            if self.waits_for_speed && self.must_wait_for_speed() {
                // The samples that complete the next result stay in the
                // ring until its speed is known; the measuring channel's
                // report wakes this thread.
                break;
            }
            match self.reader.read(&mut self.frame[self.filled..]) {
                ReadEvent::Empty => break,
                ReadEvent::Mark(m) => {
                    worked = true;
                    self.on_mark(m);
                }
                ReadEvent::Samples(n) => {
                    worked = true;
                    if self.filled == 0 {
                        self.frame_first_sample = self.next_sample;
                    }
                    self.sum_arrived(self.filled, self.filled + n);
                    let ts = self.timestamp_of(self.next_sample);
                    if let Some(a) = &mut self.alarms {
                        let fs = self.shared.spec.sample_rate_hz;
                        a.on_samples(
                            self.next_sample,
                            ts,
                            &self.frame[self.filled..self.filled + n],
                            fs,
                        );
                    }
                    if !self.speed_roles.is_empty() {
                        self.measure_tach(n);
                    }
                    self.filled += n;
                    self.next_sample += n as u64;
                    // Tach measurements are reported before this run's
                    // block is computed (a tach channel may follow its own
                    // machine); a peak reading comes with the block.
                    self.report_speed(true);
                    self.shared
                        .counters
                        .samples_processed
                        .fetch_add(n as u64, Ordering::Relaxed);
                    if self.filled == self.frame.len() {
                        self.block_ready();
                        blocks += 1;
                    }
                    self.report_speed(false);
                }
            }
        }
        if let Some(a) = &mut self.alarms {
            a.tick();
            if let Some(b) = a.take_board(false) {
                self.shared.alarm_board.store(Some(Arc::new(b)));
            }
        }
        worked
    }

    /// A discontinuity of any reason (sequence gap, ring overflow, a
    /// non-finite sample, a reconnect or restart of the source) starts
    /// everything that spans samples over: the partly filled block, the raw
    /// and envelope averages (linear, exponential and peak hold alike), the
    /// tach detector, and the health checks' sample history (see
    /// `ChannelAlarms::on_gap`). No published number then mixes samples
    /// from both sides of a gap; the last spectrum published before it
    /// stays published until the first one after it (README, "Gaps").
    fn on_mark(&mut self, m: Mark) {
        if let Some(reason) = m.gap {
            self.filled = 0;
            self.segment_sums.fill(0.0);
            self.averager.reset();
            if let Some(e) = &mut self.envelope {
                e.averager.reset();
            }
            if let Some(a) = &mut self.alarms {
                // The stream's first mark is a restart too: nothing to
                // forget yet, and not a gap in the health statistics.
                let seen = self
                    .shared
                    .counters
                    .samples_processed
                    .load(Ordering::Relaxed)
                    > 0;
                if reason != GapReason::Restart || seen {
                    a.on_gap();
                }
            }
            // A break in a tach channel: the speed is unknown from the
            // first sample it did not see until two edges are found again.
            let unknown_from = SignalTime {
                epoch: self.epoch,
                sample: self.next_sample + 1,
                ns: self.timestamp_of(self.next_sample).saturating_add(1),
            };
            for role in &mut self.speed_roles {
                if let SpeedRole::Tach(_, t, found) = role {
                    t.reset();
                    found.push((unknown_from, f64::NAN));
                }
            }
        }
        if m.first_sample < self.next_sample {
            // The stream's count went back (a restarted sender): a new
            // epoch of signal time.
            self.epoch += 1;
        }
        self.next_sample = m.first_sample;
        self.anchor = (m.first_sample, m.timestamp_ns);
        if !self.speed_roles.is_empty() {
            self.report_speed(true);
            self.report_speed(false);
        }
    }

    /// Stream position `sample` as signal time.
    fn signal_time(&self, sample: u64) -> SignalTime {
        SignalTime {
            epoch: self.epoch,
            sample,
            ns: self.timestamp_of(sample),
        }
    }

    /// Runs the tach detectors over the `n` samples just read into the
    /// frame (at `filled`), placing each speed at the sample that fired
    /// its edge.
    fn measure_tach(&mut self, n: usize) {
        let first = self.next_sample;
        let (anchor, fs, epoch) = (self.anchor, self.shared.spec.sample_rate_hz, self.epoch);
        let new = &self.frame[self.filled..self.filled + n];
        for role in &mut self.speed_roles {
            if let SpeedRole::Tach(_, t, found) = role {
                t.push_each(first, new, |idx, hz| {
                    if let Some(hz) = hz {
                        let sample = idx + 1;
                        found.push((
                            SignalTime {
                                epoch,
                                sample,
                                ns: stamp(anchor, fs, sample),
                            },
                            hz,
                        ));
                    }
                });
            }
        }
    }

    /// Reports the measurements held by the tach (`tach`) or peak roles
    /// and how far this channel has read.
    fn report_speed(&mut self, tach: bool) {
        if self.speed_roles.is_empty() {
            return;
        }
        let through = self.signal_time(self.next_sample);
        for role in &mut self.speed_roles {
            match role {
                SpeedRole::Tach(m, _, found) if tach => {
                    m.record(found, through);
                    found.clear();
                }
                SpeedRole::Peak(m, _, _, found) if !tach => {
                    m.record(found, through);
                    found.clear();
                }
                _ => {}
            }
        }
    }

    /// Whether the next read would complete a result whose speed is not
    /// known yet (the measuring channel has not read that far). Waits at
    /// most the machine's `stale_s` of wall-clock time and never past half
    /// the ring; then the result is evaluated with what is known, counted
    /// in the machine's `late_results` and logged.
    fn must_wait_for_speed(&mut self) -> bool {
        let need = self.frame.len() - self.filled;
        if self.speed_late || self.averager.blocks_to_result() != 1 || self.reader.occupied() < need
        {
            return false;
        }
        let Some(m) = self.machine.clone() else {
            return false;
        };
        let end = self.signal_time(self.next_sample + need as u64);
        if m.known_through_or_wake(&end, self.machine_same_source) {
            self.speed_wait = None;
            return false;
        }
        let now = Instant::now();
        let since = *self.speed_wait.get_or_insert(now);
        let limit = match &m.spec.speed {
            SpeedSource::Tach { stale_s, .. } | SpeedSource::Peak { stale_s, .. } => *stale_s,
            SpeedSource::Fixed { .. } => 0.0,
        };
        let ring_ok = self.reader.occupied() < self.reader.capacity() / 2;
        if ring_ok && now.duration_since(since).as_secs_f64() < limit {
            return true;
        }
        self.speed_wait = None;
        self.speed_late = true;
        let late = m.note_late_result();
        if late.is_power_of_two() {
            tracing::warn!(
                channel = %self.shared.spec.name,
                machine = %m.spec.name,
                late_results = late,
                first_sample = self.next_sample,
                ring_full = !ring_ok,
                "speed not measured through this result yet; order bands use what is known"
            );
        }
        false
    }

    fn timestamp_of(&self, sample: u64) -> u64 {
        stamp(self.anchor, self.shared.spec.sample_rate_hz, sample)
    }

    fn hop(&self) -> usize {
        self.shared.spec.hop.clamp(1, self.frame.len())
    }

    /// Adds `frame[from..to]` (just arrived) to the segment sums.
    fn sum_arrived(&mut self, from: usize, to: usize) {
        let hop = self.hop();
        let mut a = from;
        while a < to {
            let seg = a / hop;
            let b = ((seg + 1) * hop).min(to);
            self.segment_sums[seg] += stats::sum(&self.frame[a..b]);
            a = b;
        }
    }

    /// Mean of the full frame.
    fn frame_mean(&self) -> f64 {
        self.segment_sums.iter().sum::<f64>() / self.frame.len() as f64
    }

    fn block_ready(&mut self) {
        let mean = self.frame_mean();
        if self.averager.is_fresh() {
            self.average_first_sample = self.frame_first_sample;
        }
        let (averager, norm) = (&mut self.averager, self.engine.norm());
        let mut ready = false;
        self.engine.transform(&self.frame, Some(mean), |x| {
            ready = averager.push_lines(&x, norm);
        });
        self.shared.counters.blocks.fetch_add(1, Ordering::Relaxed);
        if let Some(e) = &mut self.envelope {
            e.engine.envelope(&self.frame, &mut e.signal);
            let (averager, norm) = (&mut e.averager, e.spectrum.norm());
            // Same mode and count as the raw averager: both are ready on
            // the same block.
            e.spectrum.transform(&e.signal, None, |x| {
                averager.push_lines(&x, norm);
            });
        }
        if ready {
            self.publish(mean);
        }
        // Slide by one hop; the overlap stays for the next block, and so
        // do the sums of its segments.
        let hop = self.hop();
        self.frame.copy_within(hop.., 0);
        self.segment_sums.copy_within(1.., 0);
        if let Some(last) = self.segment_sums.last_mut() {
            *last = 0.0;
        }
        self.filled = self.frame.len() - hop;
        self.frame_first_sample += hop as u64;
    }

    fn publish(&mut self, mean: f64) {
        let avg = self.averager.result();
        let df = self.shared.spec.df_hz();
        // The result's signal time: the end of its newest block.
        let at = self.signal_time(self.frame_first_sample + self.frame.len() as u64);
        for role in &mut self.speed_roles {
            if let SpeedRole::Peak(m, lo, hi, _) = role {
                if let Some(k) = track_peak(avg, *lo, *hi) {
                    m.record(&[(at, k * df)], at);
                }
            }
        }
        let speed = self
            .machine
            .as_ref()
            .and_then(|m| m.speed_at(&at, self.machine_same_source));
        self.speed_late = false;
        self.speed_wait = None;
        let env = self.envelope.as_ref().map(|e| e.averager.result());
        for ((v, plan), kind) in self
            .band_values
            .iter_mut()
            .zip(&self.bands)
            .zip(&self.band_spectrum)
        {
            let p = match (kind, env) {
                (SpectrumKind::Envelope, Some(e)) => e,
                _ => avg,
            };
            *v = plan.evaluate_at(p, speed);
        }
        self.seq += 1;
        let mut arc = match self.spare.take() {
            // Recycle the previous snapshot unless a reader still holds it.
            Some(a) if Arc::strong_count(&a) == 1 && Arc::weak_count(&a) == 0 => a,
            _ => Arc::new(ChannelSnapshot::default()),
        };
        let Some(snap) = Arc::get_mut(&mut arc) else {
            return; // unreachable: either recycled unique or freshly made
        };
        snap.seq = self.seq;
        snap.published_unix_ns = unix_now_ns();
        snap.first_sample = self.frame_first_sample;
        snap.oldest_first_sample = self.average_first_sample;
        snap.timestamp_ns = self.timestamp_of(self.frame_first_sample);
        snap.averages = self.averager.result_averages();
        snap.overall = stats::overall_about(&self.frame, mean);
        snap.power.clear();
        snap.power.extend_from_slice(avg);
        snap.envelope_power.clear();
        if let Some(e) = env {
            snap.envelope_power.extend_from_slice(e);
        }
        snap.speed_hz = speed;
        snap.bands.clear();
        snap.bands.extend_from_slice(&self.band_values);
        snap.waveform.clear();
        snap.waveform.extend_from_slice(&self.frame);
        self.shared.trend.push(
            snap.published_unix_ns / 1_000_000_000,
            &snap.overall,
            &snap.bands,
        );
        if let (Some(a), Some(snap)) = (&mut self.alarms, Arc::get_mut(&mut arc)) {
            let spec = &self.shared.spec;
            a.evaluate(
                spec,
                &snap.bands,
                &snap.overall,
                &snap.power,
                snap.averages,
                snap.first_sample,
                snap.speed_hz,
            );
        }
        if let Some(h) = &mut self.history {
            record_history(h, self.alarms.as_deref_mut(), &self.shared, &arc);
        }
        self.spare = self.shared.snapshot.swap(Some(arc));
        self.shared.counters.spectra.fetch_add(1, Ordering::Relaxed);
    }
}

/// The history's share of a publish: the series' alarm states and values
/// into the running interval; the spectrum when the timer says so and at
/// each alarm transition.
fn record_history(
    tap: &mut Tap,
    alarms: Option<&mut ChannelAlarms>,
    ch: &ChannelShared,
    snap: &ChannelSnapshot,
) {
    let n_overall = OVERALL_SERIES.len();
    let mut events = Vec::new();
    {
        let states = tap.states_mut();
        states.iter_mut().for_each(|s| *s = None);
        if let Some(a) = alarms {
            for (target, state) in a.states() {
                let i = match target {
                    AlarmTarget::Band(b) => n_overall + b,
                    AlarmTarget::OverallRms => 0,
                    AlarmTarget::OverallPeak => 1,
                    AlarmTarget::CrestFactor => 3,
                };
                let code = state_code(
                    state == AlarmState::Alert,
                    state == AlarmState::Danger,
                    state == AlarmState::Inhibited,
                );
                if let Some(s) = states.get_mut(i) {
                    *s = Some(s.map_or(code, |c| c.max(code)));
                }
            }
            a.take_transitions(|_, e| events.push(e));
        }
    }
    let published_s = snap.published_unix_ns / 1_000_000_000;
    tap.push(published_s, &snap.overall, &snap.bands);
    let fill = |r: &mut SpectrumRecord| {
        r.t_ns = snap.timestamp_ns;
        r.averages = snap.averages;
        r.first_sample = snap.first_sample;
        r.oldest_first_sample = snap.oldest_first_sample;
        r.speed_hz = snap.speed_hz;
        r.power = snap.power.clone();
        r.envelope = snap.envelope_power.clone();
        r.bands = snap.bands.clone();
        r.enbw_bins = ch.window_enbw_bins;
    };
    for e in events {
        tap.store_spectrum(StoreReason::Alarm, Some(e), snap.published_unix_ns, fill);
    }
    if tap.spectrum_due(published_s) {
        tap.store_spectrum(StoreReason::Interval, None, snap.published_unix_ns, fill);
    }
}

/// The time of stream index `sample` from a time anchor (stream index, ns
/// since the Unix epoch) at `fs` samples per second.
fn stamp(anchor: (u64, u64), fs: f64, sample: u64) -> u64 {
    let (s0, t0) = anchor;
    let dt = (sample as f64 - s0 as f64) * 1e9 / fs;
    (t0 as f64 + dt).max(0.0) as u64
}

/// A change a config reload asks of a worker thread (DEVELOPERS.md,
/// "Reloading"): the worker applies it between two turns, so its other
/// channels go on without a break.
pub enum WorkerCommand {
    /// Take on a channel built by the pipeline.
    Add(Box<ChannelDsp>),
    /// Stop a channel (by its shared state): its alarms finish (captures
    /// in progress are handed over), then it is dropped.
    Remove(Arc<ChannelShared>),
    /// New limits for a channel whose signal settings are unchanged: it
    /// publishes into `new` from now on (same counters, snapshot, board
    /// and command queue) and its alarms take `new.spec`'s limits; state,
    /// latches, acknowledges and baselines are kept.
    Retarget {
        old: Arc<ChannelShared>,
        new: Arc<ChannelShared>,
    },
}

/// A command and the answer the worker sends once it is applied (false:
/// no such channel on this worker).
type Order = (WorkerCommand, tokio::sync::oneshot::Sender<bool>);

/// One running worker thread and its command queue.
struct WorkerHandle {
    handle: JoinHandle<()>,
    orders: std::sync::mpsc::Sender<Order>,
    /// Channels it runs (for dealing out added channels).
    load: usize,
}

/// Running worker threads. Dropping them stops and joins them (as
/// [`Workers::stop`] does), so no thread outlives its pipeline.
pub struct Workers {
    stop: Arc<AtomicBool>,
    threads: Vec<WorkerHandle>,
    beats: Vec<Heartbeat>,
}

/// A worker's loop count, bumped once per turn of its loop (after each
/// bounded park too), so a count that moves means the thread runs. Read
/// only outside the worker (the watchdog of `daemon::notify`).
#[derive(Debug, Clone, Default)]
pub struct Heartbeat(Arc<AtomicU64>);

impl Heartbeat {
    /// Turns of the loop so far.
    pub fn get(&self) -> u64 {
        self.0.load(Ordering::Relaxed)
    }
}

impl Workers {
    /// Starts `n` workers and deals the channels out round-robin. Returns the
    /// workers and, per channel (in the given order), the thread to unpark
    /// when new samples arrive.
    ///
    /// # Errors
    /// The OS refused a thread. The workers already started are stopped and
    /// joined before the error is returned.
    pub fn start(n: usize, channels: Vec<ChannelDsp>) -> std::io::Result<(Workers, Vec<Thread>)> {
        let n = n.max(1).min(channels.len().max(1));
        let count = channels.len();
        let mut sets: Vec<Vec<(usize, ChannelDsp)>> = (0..n).map(|_| Vec::new()).collect();
        for (i, ch) in channels.into_iter().enumerate() {
            sets[i % n].push((i, ch));
        }
        // Built first, so that an early return drops (stops) what started.
        let mut workers = Workers {
            stop: Arc::new(AtomicBool::new(false)),
            threads: Vec::new(),
            beats: Vec::new(),
        };
        let mut wakers: Vec<Option<Thread>> = vec![None; count];
        for (w, set) in sets.into_iter().enumerate() {
            let stop = workers.stop.clone();
            let beat = Heartbeat::default();
            let counter = beat.0.clone();
            let ids: Vec<usize> = set.iter().map(|(i, _)| *i).collect();
            let (tx, rx) = std::sync::mpsc::channel::<Order>();
            let handle = thread::Builder::new()
                .name(format!("bandwatch-dsp-{w}"))
                .spawn(move || {
                    let mut chans: Vec<ChannelDsp> = set.into_iter().map(|(_, c)| c).collect();
                    worker_loop(&mut chans, &stop, &rx, &counter);
                })?;
            workers.beats.push(beat);
            for &i in &ids {
                wakers[i] = Some(handle.thread().clone());
            }
            workers.threads.push(WorkerHandle {
                handle,
                orders: tx,
                load: ids.len(),
            });
        }
        let wakers = wakers
            .into_iter()
            .map(|t| t.unwrap_or_else(thread::current))
            .collect();
        Ok((workers, wakers))
    }

    /// One heartbeat per worker thread.
    pub fn heartbeats(&self) -> Vec<Heartbeat> {
        self.beats.clone()
    }

    /// The thread the next added channel goes to (the one with the fewest
    /// channels), to wake it for that channel's samples.
    pub fn next_thread(&self) -> Option<Thread> {
        self.threads
            .iter()
            .min_by_key(|w| w.load)
            .map(|w| w.handle.thread().clone())
    }

    /// Sends `cmd` to the worker whose thread is `to` and wakes it.
    /// Returns the answer to wait for (false: no such channel there); None
    /// if there is no such worker or it has stopped.
    pub fn send(
        &mut self,
        to: &Thread,
        cmd: WorkerCommand,
    ) -> Option<tokio::sync::oneshot::Receiver<bool>> {
        let w = self
            .threads
            .iter_mut()
            .find(|w| w.handle.thread().id() == to.id())?;
        match &cmd {
            WorkerCommand::Add(_) => w.load += 1,
            WorkerCommand::Remove(_) => w.load = w.load.saturating_sub(1),
            WorkerCommand::Retarget { .. } => {}
        }
        let (tx, rx) = tokio::sync::oneshot::channel();
        w.orders.send((cmd, tx)).ok()?;
        w.handle.thread().unpark();
        Some(rx)
    }

    /// Asks every worker to stop and waits for them (each finishes its
    /// channels' alarms first).
    pub fn stop(mut self) {
        self.stop_and_join();
    }

    fn stop_and_join(&mut self) {
        self.stop.store(true, Ordering::Relaxed);
        for w in &self.threads {
            w.handle.thread().unpark();
        }
        for w in self.threads.drain(..) {
            let _ = w.handle.join();
        }
    }
}

impl Drop for Workers {
    fn drop(&mut self) {
        self.stop_and_join();
    }
}

/// Applies one reload command on the worker's thread.
fn apply(chans: &mut Vec<ChannelDsp>, cmd: WorkerCommand) -> bool {
    match cmd {
        WorkerCommand::Add(ch) => {
            let _ = ch.shared.worker.set(thread::current());
            chans.push(*ch);
            true
        }
        WorkerCommand::Remove(shared) => {
            let Some(i) = chans.iter().position(|c| Arc::ptr_eq(&c.shared, &shared)) else {
                return false;
            };
            let mut ch = chans.swap_remove(i);
            // What its source wrote before it was detached is processed
            // (and counted) under the old settings, not left in the ring.
            ch.gather = false;
            ch.speed_late = true;
            for _ in 0..1_000_000 {
                if !ch.poll() {
                    break;
                }
            }
            ch.finish();
            true
        }
        WorkerCommand::Retarget { old, new } => {
            let Some(ch) = chans.iter_mut().find(|c| Arc::ptr_eq(&c.shared, &old)) else {
                return false;
            };
            ch.retarget(new);
            true
        }
    }
}

fn worker_loop(
    chans: &mut Vec<ChannelDsp>,
    stop: &AtomicBool,
    orders: &std::sync::mpsc::Receiver<Order>,
    beat: &AtomicU64,
) {
    for ch in chans.iter() {
        let _ = ch.shared.worker.set(thread::current());
    }
    while !stop.load(Ordering::Relaxed) {
        beat.fetch_add(1, Ordering::Relaxed);
        while let Ok((cmd, done)) = orders.try_recv() {
            let _ = done.send(apply(chans, cmd));
        }
        let mut worked = false;
        for ch in chans.iter_mut() {
            worked |= ch.poll();
        }
        if !worked {
            thread::park_timeout(IDLE_PARK);
        }
    }
    for ch in chans.iter_mut() {
        ch.finish();
    }
}
