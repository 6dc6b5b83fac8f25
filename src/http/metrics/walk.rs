//! The one walk of the pipeline's state behind `/metrics`: reading the
//! state is kept apart from writing it out. [`walk`] visits every sample of
//! every channel-, alarm-, machine- and source-derived family, in the
//! order the exposition sorts them (channels, bands, alarms, sources and
//! machines by name; label values by name), and hands each to a [`Sink`]:
//! the direct text encoder (`text`) serving `/metrics`, and the reference
//! encoder built on the prometheus crate (`proto`, tests only). So the
//! comparison of the two checks encoding alone.
//!
//! A sample names its family ([`Fam`]) and its label set ([`Labels`]) by
//! indices, never by text: the text encoder looks up label sets it
//! escaped once, the reference encoder builds label pairs. The walk itself
//! allocates nothing.

use std::collections::HashMap;
use std::sync::atomic::Ordering::Relaxed;

use prometheus::proto::MetricType;

use super::families::{band_family, band_help, si_words, Fixed, FIXED, OVERALL};
use crate::alarm::state::AlarmState;
use crate::config::exposition::BandExport;
use crate::config::{AlarmTarget, ChannelSpec};
use crate::counters::{ChannelCounters, GapReason};
use crate::http::projection::ChannelReach;
use crate::pipeline::state::AppState;

/// The values of the `kind` label of the alarm record families, in order.
pub(crate) const RECORD_KINDS: [&str; 3] = ["baselines", "captures", "events"];

/// The values of the `level` label of alarm limits.
pub(crate) const LEVELS: [&str; 2] = ["alert", "danger"];

/// A family of the walk: fixed, or a config-dependent one (index into
/// [`Layout::dynamic`]).
#[derive(Debug, Clone, Copy)]
pub(crate) enum Fam {
    Fixed(Fixed),
    Dyn(usize),
}

/// The label set of a sample, by index: channels, sources and machines
/// index `AppState`'s lists, bands and alarms the channel's spec.
#[derive(Debug, Clone, Copy)]
pub(crate) enum Labels<'a> {
    /// No labels.
    None,
    /// `channel`.
    Channel(usize),
    /// `channel`, `reason` = `Layout::reasons[k]`.
    Reason(usize, usize),
    /// `channel`, `band` = the band's name.
    Band(usize, usize),
    /// `channel`, `band` = the alarm's name.
    Alarm(usize, usize),
    /// `channel`, `band` = the alarm's name, `to` = the state
    /// `AlarmState::ALL[Layout::states[k]]`.
    To(usize, usize, usize),
    /// `channel`, `band` = the alarm's name, `level` = `LEVELS[k]`.
    Level(usize, usize, usize),
    /// `source`.
    Source(usize),
    /// `source`, `kind`.
    SourceKind(usize),
    /// `source`, `reason`.
    Rejected(usize, &'a str),
    /// `machine`, `source` (of the speed).
    Machine(usize),
    /// `kind` = `RECORD_KINDS[k]`.
    Kind(usize),
    /// One label whose name and value are fixed words (`reason`).
    Word(&'static str, &'static str),
}

/// What an encoder does with each sample of the walk.
pub(crate) trait Sink {
    /// A gauge sample.
    fn gauge(&mut self, fam: Fam, labels: Labels<'_>, v: f64);
    /// A counter sample (written as the f64 it converts to).
    fn counter(&mut self, fam: Fam, labels: Labels<'_>, v: u64);
}

/// A family whose name depends on the config (always a gauge).
#[derive(Debug, Clone)]
pub(crate) struct DynFamily {
    pub name: String,
    pub help: String,
    pub labels: &'static [&'static str],
}

/// What the walk needs besides the state, fixed by the config: the
/// config-dependent families, which of them each channel writes, and the
/// orders the series sort in.
#[derive(Debug)]
pub(crate) struct Layout {
    pub dynamic: Vec<DynFamily>,
    /// Per family (fixed in table order, then dynamic): left out by
    /// `[metrics] exclude`.
    pub off: Vec<bool>,
    /// Per channel, per band: index into `dynamic`.
    pub band_slot: Vec<Vec<usize>>,
    /// Per channel: index of the first of its 4 overall families.
    pub overall_slot: Vec<usize>,
    /// Per channel, per alarm: index into `dynamic` of its limit family
    /// (None: dimensionless, exported in `bandwatch_alarm_limit`).
    pub limit_slot: Vec<Vec<Option<usize>>>,
    pub channel_order: Vec<usize>,
    /// Per channel: its bands (those `[metrics] bands` exports), alarms
    /// by name.
    pub band_order: Vec<Vec<usize>>,
    pub alarm_order: Vec<Vec<usize>>,
    pub source_order: Vec<usize>,
    pub machine_order: Vec<usize>,
    /// Gap reasons by name.
    pub reasons: Vec<GapReason>,
    /// Indices into `AlarmState::ALL`, by state name.
    pub states: Vec<usize>,
}

/// Indices of `items` in the order of `key` (stable).
fn order_by<T, K: Ord>(items: &[T], key: impl Fn(&T) -> K) -> Vec<usize> {
    let mut o: Vec<usize> = (0..items.len()).collect();
    o.sort_by_key(|&i| key(&items[i]));
    o
}

/// The config-dependent families of `channels`, and which of them each
/// channel writes (`Layout`'s `dynamic`, `band_slot`, `overall_slot`,
/// `limit_slot`).
pub(crate) struct DynLayout {
    pub dynamic: Vec<DynFamily>,
    pub band_slot: Vec<Vec<usize>>,
    pub overall_slot: Vec<usize>,
    pub limit_slot: Vec<Vec<Option<usize>>>,
}

impl DynLayout {
    pub fn new<'a>(channels: impl Iterator<Item = &'a ChannelSpec>) -> DynLayout {
        let mut dynamic: Vec<DynFamily> = Vec::new();
        let mut index: HashMap<String, usize> = HashMap::new();
        let mut slot = |name: String, help: String, labels: &'static [&'static str]| {
            *index.entry(name.clone()).or_insert_with(|| {
                dynamic.push(DynFamily { name, help, labels });
                dynamic.len() - 1
            })
        };
        let mut band_slot = Vec::new();
        let mut overall_slot = Vec::new();
        let mut limit_slot = Vec::new();
        for spec in channels {
            let q = spec.unit.quantity;
            // The four overall families of a quantity are created together,
            // so `first..first + 4` holds them even when a later channel
            // reuses them.
            let first = slot(
                format!("bandwatch_channel_{}_{}", OVERALL[0].0, q.metric_suffix()),
                format!("{}, in {}.", OVERALL[0].1, si_words(q)),
                &["channel"],
            );
            for (what, help) in &OVERALL[1..] {
                slot(
                    format!("bandwatch_channel_{what}_{}", q.metric_suffix()),
                    format!("{help}, in {}.", si_words(q)),
                    &["channel"],
                );
            }
            overall_slot.push(first);
            let bands = spec
                .bands
                .iter()
                .map(|b| {
                    let q = b.unit.quantity;
                    let help = band_help(b.measure, q);
                    slot(band_family(b.measure, q), help, &["channel", "band"])
                })
                .collect();
            band_slot.push(bands);
            let limits = spec
                .alarms
                .iter()
                .map(|a| {
                    a.unit.map(|u| {
                        let q = u.quantity;
                        slot(
                            format!("bandwatch_alarm_limit_{}", q.metric_suffix()),
                            format!("Limit of an alarm, by level, in {}.", si_words(q)),
                            &["channel", "band", "level"],
                        )
                    })
                })
                .collect();
            limit_slot.push(limits);
        }
        DynLayout {
            dynamic,
            band_slot,
            overall_slot,
            limit_slot,
        }
    }

    /// Names of every family the walk can write for these channels: the
    /// fixed ones, then the dynamic ones.
    pub fn names(&self) -> impl Iterator<Item = &str> {
        FIXED
            .iter()
            .map(|(_, name, ..)| *name)
            .chain(self.dynamic.iter().map(|d| d.name.as_str()))
    }
}

/// Whether a channel's band is exported under `[metrics] bands`.
fn band_exported(spec: &ChannelSpec, band: usize, mode: BandExport) -> bool {
    match mode {
        BandExport::All => true,
        BandExport::Alarmed => spec
            .alarms
            .iter()
            .any(|a| a.target == AlarmTarget::Band(band)),
    }
}

impl Layout {
    pub fn new(app: &AppState) -> Layout {
        let DynLayout {
            dynamic,
            band_slot,
            overall_slot,
            limit_slot,
        } = DynLayout::new(app.channels.iter().map(|c| &*c.spec));
        let ex = &app.exposition;
        let off: Vec<bool> = FIXED
            .iter()
            .map(|(_, name, ..)| *name)
            .chain(dynamic.iter().map(|d| d.name.as_str()))
            .map(|name| ex.excludes(name))
            .collect();
        let mut reasons = GapReason::ALL.to_vec();
        reasons.sort_by_key(|r| r.as_str());
        let mut states: Vec<usize> = (0..AlarmState::ALL.len()).collect();
        states.sort_by_key(|&k| AlarmState::ALL[k].as_str());
        Layout {
            dynamic,
            off,
            band_slot,
            overall_slot,
            limit_slot,
            channel_order: order_by(&app.channels, |c| c.spec.name.clone()),
            band_order: app
                .channels
                .iter()
                .map(|c| {
                    let mut o = order_by(&c.spec.bands, |b| b.name.clone());
                    o.retain(|&j| band_exported(&c.spec, j, ex.bands));
                    o
                })
                .collect(),
            alarm_order: app
                .channels
                .iter()
                .map(|c| order_by(&c.spec.alarms, |a| a.name.clone()))
                .collect(),
            source_order: order_by(&app.sources, |s| s.name.clone()),
            machine_order: order_by(&app.machines, |m| {
                (m.spec.name.clone(), m.spec.speed.as_str())
            }),
            reasons,
            states,
        }
    }

    /// Name, help, type and label names of a family.
    pub fn family(&self, f: Fam) -> (&str, &str, MetricType, &'static [&'static str]) {
        match f {
            Fam::Fixed(f) => {
                let (_, name, help, kind, labels) = &FIXED[f as usize];
                (name, help, *kind, labels)
            }
            Fam::Dyn(s) => {
                let d = &self.dynamic[s];
                (&d.name, &d.help, MetricType::GAUGE, d.labels)
            }
        }
    }

    /// Every family: the fixed ones in table order, then the dynamic ones.
    pub fn families(&self) -> impl Iterator<Item = Fam> + '_ {
        FIXED
            .iter()
            .map(|(f, ..)| Fam::Fixed(*f))
            .chain((0..self.dynamic.len()).map(Fam::Dyn))
    }
}

fn bit(b: bool) -> f64 {
    if b {
        1.0
    } else {
        0.0
    }
}

impl Layout {
    /// Whether `[metrics] exclude` leaves `f` out.
    #[inline]
    fn is_off(&self, f: Fam) -> bool {
        let i = match f {
            Fam::Fixed(f) => f as usize,
            Fam::Dyn(s) => FIXED.len() + s,
        };
        self.off.get(i).copied().unwrap_or(false)
    }
}

/// Passes on the samples of the families `[metrics]` keeps.
struct Trimmed<'a, S> {
    layout: &'a Layout,
    inner: &'a mut S,
}

impl<S: Sink> Sink for Trimmed<'_, S> {
    #[inline]
    fn gauge(&mut self, fam: Fam, labels: Labels<'_>, v: f64) {
        if !self.layout.is_off(fam) {
            self.inner.gauge(fam, labels, v);
        }
    }

    #[inline]
    fn counter(&mut self, fam: Fam, labels: Labels<'_>, v: u64) {
        if !self.layout.is_off(fam) {
            self.inner.counter(fam, labels, v);
        }
    }
}

/// Visits every sample of `app` (ages against `now_ns`) into `sink`,
/// leaving out what `[metrics]` trims.
/// `reach`: per channel (by index), when its alarms reach their limits
/// (`http::projection::channel_reach_in`; shorter or empty: none known).
pub(crate) fn walk<S: Sink>(
    app: &AppState,
    layout: &Layout,
    now_ns: u64,
    reach: &[ChannelReach],
    sink: &mut S,
) {
    let mut trimmed = Trimmed {
        layout,
        inner: sink,
    };
    walk_all(app, layout, now_ns, reach, &mut trimmed);
}

fn walk_all<S: Sink>(
    app: &AppState,
    layout: &Layout,
    now_ns: u64,
    reach: &[ChannelReach],
    sink: &mut S,
) {
    use Fam::Fixed as F;
    for &i in &layout.channel_order {
        let ch = &app.channels[i];
        let spec = &ch.spec;
        let c = &ch.counters;
        for (f, v) in [
            (Fixed::SamplesReceived, &c.samples_in),
            (Fixed::SamplesProcessed, &c.samples_processed),
            (Fixed::Blocks, &c.blocks),
            (Fixed::Spectra, &c.spectra),
        ] {
            sink.counter(F(f), Labels::Channel(i), ChannelCounters::get(v));
        }
        for (k, &r) in layout.reasons.iter().enumerate() {
            sink.counter(F(Fixed::SamplesDropped), Labels::Reason(i, k), c.dropped(r));
            sink.counter(
                F(Fixed::Discontinuities),
                Labels::Reason(i, k),
                c.discontinuities(r),
            );
        }

        if let Some(board) = ch.alarm_board.load_full() {
            sink.gauge(F(Fixed::HealthOk), Labels::Channel(i), bit(board.health.ok));
            for &j in &layout.alarm_order[i] {
                let (Some(a), Some(v)) = (spec.alarms.get(j), board.alarms.get(j)) else {
                    continue;
                };
                let labels = Labels::Alarm(i, j);
                for (f, x) in [
                    (Fixed::AlarmState, v.state.metric_value() as f64),
                    (Fixed::AlarmLatched, bit(v.latched)),
                    (Fixed::AlarmAcknowledged, bit(v.acknowledged)),
                    (Fixed::AlarmSince, v.since_unix_ns as f64 * 1e-9),
                ] {
                    sink.gauge(F(f), labels, x);
                }
                for (k, &s) in layout.states.iter().enumerate() {
                    sink.counter(
                        F(Fixed::AlarmTransitions),
                        Labels::To(i, j, k),
                        v.transitions[s],
                    );
                }
                if let Some(r) = reach.get(i).and_then(|r| r.alarms.get(j)) {
                    let now_s = now_ns as f64 * 1e-9;
                    for (level, at) in r.iter().enumerate() {
                        if let Some(at) = at {
                            sink.gauge(
                                F(Fixed::AlarmTimeToLimit),
                                Labels::Level(i, j, level),
                                (at - now_s).max(0.0),
                            );
                        }
                    }
                }
                for (level, lim) in [v.alert_limit, v.danger_limit].into_iter().enumerate() {
                    let Some(lim) = lim else { continue };
                    let labels = Labels::Level(i, j, level);
                    match (layout.limit_slot[i].get(j).copied().flatten(), a.unit) {
                        (Some(slot), Some(u)) => sink.gauge(Fam::Dyn(slot), labels, lim * u.to_si),
                        _ => sink.gauge(F(Fixed::AlarmLimitDimensionless), labels, lim),
                    }
                }
            }
        }

        // One load per channel per scrape: every value below comes from
        // the same snapshot.
        let Some(snap) = ch.latest() else { continue };
        sink.gauge(
            F(Fixed::SpectrumAge),
            Labels::Channel(i),
            now_ns.saturating_sub(snap.published_unix_ns) as f64 * 1e-9,
        );
        sink.gauge(
            F(Fixed::LastSpectrum),
            Labels::Channel(i),
            snap.published_unix_ns as f64 * 1e-9,
        );
        let si = spec.unit.to_si;
        let o = &snap.overall;
        let first = layout.overall_slot[i];
        for (k, v) in [o.mean, o.rms, o.peak, o.peak_to_peak]
            .into_iter()
            .enumerate()
        {
            sink.gauge(Fam::Dyn(first + k), Labels::Channel(i), v * si);
        }
        sink.gauge(F(Fixed::CrestFactor), Labels::Channel(i), o.crest_factor);
        let n_bands = spec.bands.len().min(snap.bands.len());
        for &j in &layout.band_order[i] {
            if j >= n_bands {
                continue;
            }
            let (b, v) = (&spec.bands[j], &snap.bands[j]);
            let labels = Labels::Band(i, j);
            sink.gauge(F(Fixed::BandInService), labels, bit(v.is_ok()));
            // A band without a value has no series: no invented zero.
            if !v.is_ok() {
                continue;
            }
            sink.gauge(
                Fam::Dyn(layout.band_slot[i][j]),
                labels,
                v.value * b.unit.to_si,
            );
            sink.gauge(F(Fixed::BandPeakFrequency), labels, v.peak_hz);
        }
    }

    for &k in &layout.machine_order {
        let speed = app.machines[k].speed_hz();
        sink.gauge(
            F(Fixed::MachineSpeedKnown),
            Labels::Machine(k),
            bit(speed.is_some()),
        );
        if let Some(hz) = speed {
            sink.gauge(F(Fixed::MachineSpeed), Labels::Machine(k), hz);
        }
    }

    if let Some(io) = &app.alarm_io {
        // In the order of `RECORD_KINDS`.
        for (k, (w, d)) in [
            (io.baselines_written.load(Relaxed), io.dropped_baselines()),
            (io.captures_written.load(Relaxed), io.dropped_captures()),
            (io.events_written.load(Relaxed), io.dropped_events()),
        ]
        .into_iter()
        .enumerate()
        {
            sink.counter(F(Fixed::AlarmRecordsWritten), Labels::Kind(k), w);
            sink.counter(F(Fixed::AlarmRecordsDropped), Labels::Kind(k), d);
        }
        // `RECORD_KINDS` order; the I/O thread's index is `KINDS`'.
        for (k, name) in RECORD_KINDS.iter().enumerate() {
            let i = crate::alarm::io::KINDS
                .iter()
                .position(|n| n == name)
                .unwrap_or(k);
            sink.counter(
                F(Fixed::StorageWriteErrors),
                Labels::Kind(k),
                io.write_failures(i),
            );
            sink.counter(
                F(Fixed::StorageWriteRetries),
                Labels::Kind(k),
                io.write_retries(i),
            );
            sink.counter(
                F(Fixed::StorageRecordsLost),
                Labels::Kind(k),
                io.records_lost(i),
            );
        }
        sink.counter(
            F(Fixed::AlarmWriteErrors),
            Labels::None,
            io.write_errors.load(Relaxed),
        );
        sink.counter(
            F(Fixed::AlarmCapturesPruned),
            Labels::None,
            io.captures_pruned.load(Relaxed),
        );
    }

    if let Some(h) = &app.history {
        let c = &h.counters;
        for r in crate::history::DropReason::ALL {
            sink.counter(
                F(Fixed::HistoryRecordsDropped),
                Labels::Word("reason", r.as_str()),
                c.dropped(r),
            );
        }
        sink.counter(
            F(Fixed::HistoryPointsWritten),
            Labels::None,
            c.points_written.load(Relaxed),
        );
        // Label values in sorted order, as every family's samples are.
        use crate::history::StoreReason;
        for r in [
            StoreReason::Alarm,
            StoreReason::Interval,
            StoreReason::Request,
        ] {
            sink.counter(
                F(Fixed::HistorySpectraStored),
                Labels::Word("reason", r.as_str()),
                c.stored(r),
            );
        }
        sink.counter(
            F(Fixed::HistorySpectraDeleted),
            Labels::None,
            c.spectra_deleted.load(Relaxed),
        );
        sink.counter(
            F(Fixed::HistoryWriteErrors),
            Labels::None,
            c.write_errors.load(Relaxed),
        );
        sink.gauge(
            F(Fixed::HistoryQueued),
            Labels::None,
            c.queued.load(Relaxed) as f64,
        );
        sink.gauge(
            F(Fixed::HistoryFileBytes),
            Labels::None,
            c.file_bytes.load(Relaxed) as f64,
        );
    }

    for &k in &layout.source_order {
        let s = &app.sources[k];
        sink.gauge(
            F(Fixed::SourceUp),
            Labels::SourceKind(k),
            bit(s.is_connected()),
        );
        for (f, c) in [
            (Fixed::SourceFrames, &s.frames),
            (Fixed::SourceBytes, &s.bytes),
            (Fixed::SourceConnections, &s.connections),
            (Fixed::SourceCrcErrors, &s.crc_errors),
            (Fixed::SourceResyncs, &s.resyncs),
            (Fixed::SourceSkippedBytes, &s.bytes_skipped),
            (Fixed::SourceMissingSamples, &s.samples_missing),
            (Fixed::SourceLateFrames, &s.frames_late),
        ] {
            sink.counter(F(f), Labels::Source(k), c.load(Relaxed));
        }
        let mut rejected = s.rejected();
        rejected.sort_by_key(|&(r, _)| r);
        for (reason, n) in rejected {
            sink.counter(F(Fixed::SourceRejected), Labels::Rejected(k, reason), n);
        }
        for r in crate::counters::RestartReason::ALL {
            sink.counter(
                F(Fixed::SourceRestarts),
                Labels::Rejected(k, r.as_str()),
                s.restarts(r),
            );
        }
        let last = s.last_frame_unix_ns.load(Relaxed);
        if last != 0 {
            sink.gauge(
                F(Fixed::SourceLastFrame),
                Labels::Source(k),
                last as f64 * 1e-9,
            );
        }
    }
}
