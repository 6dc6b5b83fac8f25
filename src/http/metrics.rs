//! `/metrics`: Prometheus text exposition.
//!
//! Two kinds of series live in one `Registry`:
//!
//! - static ones the process updates itself (`bandwatch_build_info`,
//!   `bandwatch_start_time_seconds`, `bandwatch_http_requests_total`);
//! - everything derived from channels and sources, built by
//!   [`PipelineCollector`] at scrape time from the latest snapshots and
//!   counters. One scrape therefore reads each snapshot once (never half
//!   old, half new), a channel that is gone leaves no stale series, and the
//!   registry never grows or churns per series.
//!
//! Names follow the Prometheus naming guide: `bandwatch_` prefix, SI base
//! units in the name (values are converted with `Unit::to_si`), `_total` on
//! counters, help strings as sentences, bounded labels (channel, band,
//! source, kind, reason, path, status).

use std::collections::HashMap;
use std::sync::Arc;

use axum::http::StatusCode;
use prometheus::core::{Collector, Desc};
use prometheus::proto::{
    Counter as PCounter, Gauge as PGauge, LabelPair, Metric, MetricFamily, MetricType,
};
use prometheus::{Encoder, Gauge, IntCounterVec, IntGaugeVec, Opts, Registry, TextEncoder};

use crate::config::Measure;
use crate::counters::{ChannelCounters, GapReason};
use crate::snapshot::{unix_now_ns, AppState};
use crate::units::Quantity;

/// Content type of the text exposition format.
pub const CONTENT_TYPE: &str = prometheus::TEXT_FORMAT;

/// The registry behind `/metrics` and the static series the HTTP layer
/// updates.
pub struct Metrics {
    registry: Registry,
    /// `None` only if the prometheus crate refused its constant options.
    http_requests: Option<IntCounterVec>,
}

impl Metrics {
    /// Builds the registry for `app`. Registration can only fail on a
    /// programming error (two families of one name); that is logged and
    /// the remaining metrics are still served.
    pub fn new(app: Arc<AppState>) -> Metrics {
        Metrics::with_clock(app, unix_now_ns)
    }

    /// As [`Metrics::new`], with the wall clock used for ages replaced
    /// (tests pin it to get a reproducible exposition).
    pub fn with_clock(app: Arc<AppState>, clock: fn() -> u64) -> Metrics {
        let registry = Registry::new();
        let http_requests = IntCounterVec::new(
            Opts::new(
                "bandwatch_http_requests_total",
                "HTTP requests answered, by route template and status code.",
            ),
            &["path", "status"],
        );
        let build_info = IntGaugeVec::new(
            Opts::new(
                "bandwatch_build_info",
                "Always 1; the labels name the running bandwatch build.",
            ),
            &["version"],
        );
        let start_time = Gauge::new(
            "bandwatch_start_time_seconds",
            "Time the process started, in seconds since the Unix epoch.",
        );
        let http_requests = match http_requests {
            Ok(c) => {
                register(&registry, Box::new(c.clone()));
                Some(c)
            }
            Err(e) => {
                tracing::error!(error = %e, "cannot create the HTTP request counter");
                None
            }
        };
        if let Ok(g) = build_info {
            g.with_label_values(&[env!("CARGO_PKG_VERSION")]).set(1);
            register(&registry, Box::new(g));
        }
        if let Ok(g) = start_time {
            g.set(app.started_unix_ns as f64 * 1e-9);
            register(&registry, Box::new(g));
        }
        register(&registry, Box::new(PipelineCollector::new(app, clock)));
        Metrics {
            registry,
            http_requests,
        }
    }

    /// Counts one answered request under its route template.
    pub fn observe_request(&self, path: &str, status: StatusCode) {
        if let Some(c) = &self.http_requests {
            c.with_label_values(&[path, status.as_str()]).inc();
        }
    }

    /// Gathers every family and encodes the text exposition.
    ///
    /// # Errors
    /// If the encoder rejects a family (a programming error: an empty name).
    pub fn render(&self) -> Result<Vec<u8>, prometheus::Error> {
        let families = self.registry.gather();
        let mut out = Vec::with_capacity(64 * 1024);
        TextEncoder::new().encode(&families, &mut out)?;
        Ok(out)
    }
}

fn register(registry: &Registry, c: Box<dyn Collector>) {
    if let Err(e) = registry.register(c) {
        tracing::error!(error = %e, "cannot register a metrics collector");
    }
}

// ---------------------------------------------------------------------------
// The scrape-time collector
// ---------------------------------------------------------------------------

/// One metric family whose members are built at scrape time.
#[derive(Debug, Clone)]
struct FamilyDef {
    name: String,
    help: String,
    kind: MetricType,
}

/// Families with a fixed name.
#[derive(Debug, Clone, Copy)]
enum Fixed {
    BandPeakFrequency,
    CrestFactor,
    SamplesReceived,
    SamplesProcessed,
    SamplesDropped,
    Discontinuities,
    Blocks,
    Spectra,
    SpectrumAge,
    LastSpectrum,
    SourceUp,
    SourceFrames,
    SourceBytes,
    SourceLastFrame,
    SourceConnections,
    SourceCrcErrors,
    SourceResyncs,
    SourceSkippedBytes,
    SourceMissingSamples,
    SourceLateFrames,
    SourceRejected,
    BandInService,
    MachineSpeed,
    MachineSpeedKnown,
    AlarmState,
    AlarmLatched,
    AlarmAcknowledged,
    AlarmSince,
    AlarmTransitions,
    HealthOk,
    AlarmRecordsWritten,
    AlarmRecordsDropped,
    AlarmWriteErrors,
    AlarmCapturesPruned,
    AlarmLimitDimensionless,
}

const FIXED: [(Fixed, &str, &str, MetricType, &[&str]); 35] = [
    (
        Fixed::BandPeakFrequency,
        "bandwatch_band_peak_frequency_hertz",
        "Frequency of the largest line in the band of the latest spectrum.",
        MetricType::GAUGE,
        &["channel", "band"],
    ),
    (
        Fixed::CrestFactor,
        "bandwatch_channel_crest_factor",
        "Peak over RMS of the newest block, dimensionless.",
        MetricType::GAUGE,
        &["channel"],
    ),
    (
        Fixed::SamplesReceived,
        "bandwatch_channel_samples_received_total",
        "Samples accepted into the channel's ring.",
        MetricType::COUNTER,
        &["channel"],
    ),
    (
        Fixed::SamplesProcessed,
        "bandwatch_channel_samples_processed_total",
        "Samples the DSP worker consumed from the channel's ring.",
        MetricType::COUNTER,
        &["channel"],
    ),
    (
        Fixed::SamplesDropped,
        "bandwatch_channel_samples_dropped_total",
        "Samples that never reached the DSP, by reason.",
        MetricType::COUNTER,
        &["channel", "reason"],
    ),
    (
        Fixed::Discontinuities,
        "bandwatch_channel_discontinuities_total",
        "Breaks in the sample stream that reset block assembly, by reason.",
        MetricType::COUNTER,
        &["channel", "reason"],
    ),
    (
        Fixed::Blocks,
        "bandwatch_channel_blocks_total",
        "FFT blocks computed for the channel.",
        MetricType::COUNTER,
        &["channel"],
    ),
    (
        Fixed::Spectra,
        "bandwatch_channel_spectra_total",
        "Averaged spectra published for the channel.",
        MetricType::COUNTER,
        &["channel"],
    ),
    (
        Fixed::SpectrumAge,
        "bandwatch_channel_spectrum_age_seconds",
        "Seconds since the channel's latest spectrum was published.",
        MetricType::GAUGE,
        &["channel"],
    ),
    (
        Fixed::LastSpectrum,
        "bandwatch_channel_last_spectrum_timestamp_seconds",
        "Time the channel's latest spectrum was published, in seconds since the Unix epoch.",
        MetricType::GAUGE,
        &["channel"],
    ),
    (
        Fixed::SourceUp,
        "bandwatch_source_up",
        "Whether the source is connected and delivering (1) or not (0).",
        MetricType::GAUGE,
        &["source", "kind"],
    ),
    (
        Fixed::SourceFrames,
        "bandwatch_source_frames_total",
        "Frames or sample batches the source has received.",
        MetricType::COUNTER,
        &["source"],
    ),
    (
        Fixed::SourceBytes,
        "bandwatch_source_bytes_total",
        "Bytes the source has received.",
        MetricType::COUNTER,
        &["source"],
    ),
    (
        Fixed::SourceLastFrame,
        "bandwatch_source_last_frame_timestamp_seconds",
        "Time the source received its latest frame, in seconds since the Unix epoch.",
        MetricType::GAUGE,
        &["source"],
    ),
    (
        Fixed::SourceConnections,
        "bandwatch_source_connections_total",
        "Connections made or accepted, or ports opened, by the source.",
        MetricType::COUNTER,
        &["source"],
    ),
    (
        Fixed::SourceCrcErrors,
        "bandwatch_source_crc_errors_total",
        "Frames whose CRC did not match.",
        MetricType::COUNTER,
        &["source"],
    ),
    (
        Fixed::SourceResyncs,
        "bandwatch_source_resyncs_total",
        "Times the stream decoder scanned past bad bytes to the next frame.",
        MetricType::COUNTER,
        &["source"],
    ),
    (
        Fixed::SourceSkippedBytes,
        "bandwatch_source_skipped_bytes_total",
        "Bytes the decoder threw away (bad frames, junk, partial frames).",
        MetricType::COUNTER,
        &["source"],
    ),
    (
        Fixed::SourceMissingSamples,
        "bandwatch_source_missing_samples_total",
        "Sample instants lost in gaps of the frame sequence.",
        MetricType::COUNTER,
        &["source"],
    ),
    (
        Fixed::SourceLateFrames,
        "bandwatch_source_late_frames_total",
        "Frames dropped as duplicates or late arrivals.",
        MetricType::COUNTER,
        &["source"],
    ),
    (
        Fixed::SourceRejected,
        "bandwatch_source_rejected_total",
        "Frames or connections the source rejected, by reason.",
        MetricType::COUNTER,
        &["source", "reason"],
    ),
    (
        Fixed::BandInService,
        "bandwatch_band_in_service",
        "1 when the band has a value; 0 when it cannot have one now (running speed unknown, or its edges pass Nyquist at the current speed).",
        MetricType::GAUGE,
        &["channel", "band"],
    ),
    (
        Fixed::MachineSpeed,
        "bandwatch_machine_speed_hertz",
        "Running speed of the machine (revolutions per second), while it is known.",
        MetricType::GAUGE,
        &["machine", "source"],
    ),
    (
        Fixed::MachineSpeedKnown,
        "bandwatch_machine_speed_known",
        "1 while the machine's running speed is known and fresh, else 0.",
        MetricType::GAUGE,
        &["machine", "source"],
    ),
    (
        Fixed::AlarmState,
        "bandwatch_alarm_state",
        "Alarm state: 0 normal, 1 alert, 2 danger, -1 inhibited (channel not OK).",
        MetricType::GAUGE,
        &["channel", "band"],
    ),
    (
        Fixed::AlarmLatched,
        "bandwatch_alarm_latched",
        "1 while a latching alarm holds a state until it is acknowledged, else 0.",
        MetricType::GAUGE,
        &["channel", "band"],
    ),
    (
        Fixed::AlarmAcknowledged,
        "bandwatch_alarm_acknowledged",
        "1 when the latched state has been acknowledged by an operator, else 0.",
        MetricType::GAUGE,
        &["channel", "band"],
    ),
    (
        Fixed::AlarmSince,
        "bandwatch_alarm_state_since_timestamp_seconds",
        "When the alarm entered its current state, in seconds since the Unix epoch.",
        MetricType::GAUGE,
        &["channel", "band"],
    ),
    (
        Fixed::AlarmTransitions,
        "bandwatch_alarm_transitions_total",
        "Alarm transitions, by the state entered.",
        MetricType::COUNTER,
        &["channel", "band", "to"],
    ),
    (
        Fixed::HealthOk,
        "bandwatch_channel_health_ok",
        "1 when the channel's sensor looks healthy (its alarms are armed), 0 when not OK.",
        MetricType::GAUGE,
        &["channel"],
    ),
    (
        Fixed::AlarmRecordsWritten,
        "bandwatch_alarm_records_written_total",
        "Journal events, captures and baselines written to the storage directory.",
        MetricType::COUNTER,
        &["kind"],
    ),
    (
        Fixed::AlarmRecordsDropped,
        "bandwatch_alarm_records_dropped_total",
        "Journal events, captures and baselines dropped because the alarm I/O queue was full.",
        MetricType::COUNTER,
        &["kind"],
    ),
    (
        Fixed::AlarmWriteErrors,
        "bandwatch_alarm_write_errors_total",
        "Failed writes of the journal, captures or baselines (see the log).",
        MetricType::COUNTER,
        &[],
    ),
    (
        Fixed::AlarmCapturesPruned,
        "bandwatch_alarm_captures_pruned_total",
        "Old captures removed to keep within the retention limits.",
        MetricType::COUNTER,
        &[],
    ),
    (
        Fixed::AlarmLimitDimensionless,
        "bandwatch_alarm_limit",
        "Limit of an alarm on a dimensionless value (crest factor), by level.",
        MetricType::GAUGE,
        &["channel", "band", "level"],
    ),
];

/// Time-domain levels exported per channel, in the order of the four
/// consecutive families a quantity gets.
const OVERALL: [(&str, &str); 4] = [
    ("mean", "Mean of the newest block"),
    ("rms", "RMS about the mean of the newest block"),
    (
        "peak",
        "Largest excursion from the mean in the newest block",
    ),
    ("peak_to_peak", "Maximum minus minimum of the newest block"),
];

fn si_words(q: Quantity) -> &'static str {
    match q {
        Quantity::Displacement => "metres",
        Quantity::Velocity => "metres per second",
        Quantity::Acceleration => "metres per second squared",
        Quantity::Voltage => "volts",
        Quantity::Current => "amperes",
        Quantity::Pressure => "pascals",
    }
}

/// Builds every channel- and source-derived family at scrape time.
pub struct PipelineCollector {
    app: Arc<AppState>,
    clock: fn() -> u64,
    /// Families whose names depend on the config (band measure × quantity,
    /// overall levels × quantity).
    dynamic: Vec<FamilyDef>,
    /// Per channel, per band: index into `dynamic`.
    band_slot: Vec<Vec<usize>>,
    /// Per channel: index of the first of its 4 overall families.
    overall_slot: Vec<usize>,
    /// Per channel, per alarm: index into `dynamic` of its limit family
    /// (None: dimensionless, exported in `bandwatch_alarm_limit`).
    limit_slot: Vec<Vec<Option<usize>>>,
    descs: Vec<Desc>,
}

impl PipelineCollector {
    pub fn new(app: Arc<AppState>, clock: fn() -> u64) -> PipelineCollector {
        let mut dynamic: Vec<FamilyDef> = Vec::new();
        let mut index: HashMap<String, usize> = HashMap::new();
        let mut labels_of: Vec<&[&str]> = Vec::new();
        let mut slot = |name: String, help: String, labels: &'static [&'static str]| {
            *index.entry(name.clone()).or_insert_with(|| {
                dynamic.push(FamilyDef {
                    name,
                    help,
                    kind: MetricType::GAUGE,
                });
                labels_of.push(labels);
                dynamic.len() - 1
            })
        };
        let mut band_slot = Vec::with_capacity(app.channels.len());
        let mut overall_slot = Vec::with_capacity(app.channels.len());
        let mut limit_slot = Vec::with_capacity(app.channels.len());
        for ch in &app.channels {
            let q = ch.spec.unit.quantity;
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
            let bands = ch
                .spec
                .bands
                .iter()
                .map(|b| {
                    let q = b.unit.quantity;
                    let help = match b.measure {
                        Measure::Rms => format!(
                            "RMS level of the band in the latest averaged spectrum, in {}.",
                            si_words(q)
                        ),
                        Measure::Peak => format!(
                            "Peak amplitude of the largest line of the band in the latest averaged spectrum, in {}.",
                            si_words(q)
                        ),
                    };
                    slot(
                        format!(
                            "bandwatch_band_{}_{}",
                            b.measure.as_str(),
                            q.metric_suffix()
                        ),
                        help,
                        &["channel", "band"],
                    )
                })
                .collect();
            band_slot.push(bands);
            let limits = ch
                .spec
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
        // The four overall families of a quantity are created together, so
        // `first..first + 4` holds them even when a later channel reuses them.
        let mut descs = Vec::new();
        let fixed = FIXED
            .iter()
            .map(|(_, name, help, _, labels)| (name.to_string(), help.to_string(), *labels));
        let dyns = dynamic
            .iter()
            .zip(&labels_of)
            .map(|(d, l)| (d.name.clone(), d.help.clone(), *l));
        for (name, help, labels) in fixed.chain(dyns) {
            match Desc::new(
                name,
                help,
                labels.iter().map(|s| s.to_string()).collect(),
                HashMap::new(),
            ) {
                Ok(d) => descs.push(d),
                Err(e) => tracing::error!(error = %e, "invalid metric descriptor"),
            }
        }
        PipelineCollector {
            app,
            clock,
            dynamic,
            band_slot,
            overall_slot,
            limit_slot,
            descs,
        }
    }
}

fn label(name: &str, value: &str) -> LabelPair {
    let mut l = LabelPair::default();
    l.set_name(name.to_string());
    l.set_value(value.to_string());
    l
}

fn gauge(labels: Vec<LabelPair>, v: f64) -> Metric {
    let mut g = PGauge::default();
    g.set_value(v);
    let mut m = Metric::default();
    m.set_label(labels);
    m.set_gauge(g);
    m
}

fn counter(labels: Vec<LabelPair>, v: u64) -> Metric {
    let mut c = PCounter::default();
    c.set_value(v as f64);
    let mut m = Metric::default();
    m.set_label(labels);
    m.set_counter(c);
    m
}

fn family(name: &str, help: &str, kind: MetricType, metrics: Vec<Metric>) -> MetricFamily {
    let mut f = MetricFamily::default();
    f.set_name(name.to_string());
    f.set_help(help.to_string());
    f.set_field_type(kind);
    f.set_metric(metrics);
    f
}

impl Collector for PipelineCollector {
    fn desc(&self) -> Vec<&Desc> {
        self.descs.iter().collect()
    }

    fn collect(&self) -> Vec<MetricFamily> {
        let now_ns = (self.clock)();
        let n = self.app.channels.len();
        let mut fixed: Vec<Vec<Metric>> = FIXED
            .iter()
            .map(|(f, ..)| match f {
                Fixed::SamplesDropped | Fixed::Discontinuities => {
                    Vec::with_capacity(n * GapReason::ALL.len())
                }
                Fixed::SourceUp
                | Fixed::SourceFrames
                | Fixed::SourceBytes
                | Fixed::SourceLastFrame
                | Fixed::SourceConnections
                | Fixed::SourceCrcErrors
                | Fixed::SourceResyncs
                | Fixed::SourceSkippedBytes
                | Fixed::SourceMissingSamples
                | Fixed::SourceLateFrames
                | Fixed::SourceRejected => Vec::with_capacity(self.app.sources.len()),
                _ => Vec::with_capacity(n),
            })
            .collect();
        let mut dynamic: Vec<Vec<Metric>> = vec![Vec::new(); self.dynamic.len()];
        let ch_label = |name: &str| vec![label("channel", name)];

        for (i, ch) in self.app.channels.iter().enumerate() {
            let spec = &ch.spec;
            let name = spec.name.as_str();
            let c = &ch.counters;
            let put = |fixed: &mut Vec<Vec<Metric>>, f: Fixed, m: Metric| fixed[f as usize].push(m);
            put(
                &mut fixed,
                Fixed::SamplesReceived,
                counter(ch_label(name), ChannelCounters::get(&c.samples_in)),
            );
            put(
                &mut fixed,
                Fixed::SamplesProcessed,
                counter(ch_label(name), ChannelCounters::get(&c.samples_processed)),
            );
            put(
                &mut fixed,
                Fixed::Blocks,
                counter(ch_label(name), ChannelCounters::get(&c.blocks)),
            );
            put(
                &mut fixed,
                Fixed::Spectra,
                counter(ch_label(name), ChannelCounters::get(&c.spectra)),
            );
            for r in GapReason::ALL {
                let labels = || vec![label("channel", name), label("reason", r.as_str())];
                put(
                    &mut fixed,
                    Fixed::SamplesDropped,
                    counter(labels(), c.dropped(r)),
                );
                put(
                    &mut fixed,
                    Fixed::Discontinuities,
                    counter(labels(), c.discontinuities(r)),
                );
            }

            if let Some(board) = ch.alarm_board.load_full() {
                put(
                    &mut fixed,
                    Fixed::HealthOk,
                    gauge(ch_label(name), if board.health.ok { 1.0 } else { 0.0 }),
                );
                for (j, (a, v)) in spec.alarms.iter().zip(&board.alarms).enumerate() {
                    let labels = || vec![label("channel", name), label("band", &a.name)];
                    put(
                        &mut fixed,
                        Fixed::AlarmState,
                        gauge(labels(), v.state.metric_value() as f64),
                    );
                    put(
                        &mut fixed,
                        Fixed::AlarmLatched,
                        gauge(labels(), if v.latched { 1.0 } else { 0.0 }),
                    );
                    put(
                        &mut fixed,
                        Fixed::AlarmAcknowledged,
                        gauge(labels(), if v.acknowledged { 1.0 } else { 0.0 }),
                    );
                    put(
                        &mut fixed,
                        Fixed::AlarmSince,
                        gauge(labels(), v.since_unix_ns as f64 * 1e-9),
                    );
                    for (k, st) in crate::alarm::state::AlarmState::ALL.iter().enumerate() {
                        let mut l = labels();
                        l.push(label("to", st.as_str()));
                        put(
                            &mut fixed,
                            Fixed::AlarmTransitions,
                            counter(l, v.transitions[k]),
                        );
                    }
                    for (level, lim) in [("alert", v.alert_limit), ("danger", v.danger_limit)] {
                        let Some(lim) = lim else { continue };
                        let mut l = labels();
                        l.push(label("level", level));
                        match (self.limit_slot[i].get(j).copied().flatten(), a.unit) {
                            (Some(slot), Some(u)) => dynamic[slot].push(gauge(l, lim * u.to_si)),
                            _ => put(&mut fixed, Fixed::AlarmLimitDimensionless, gauge(l, lim)),
                        }
                    }
                }
            }

            // One load per channel per scrape: every value below comes from
            // the same snapshot.
            let Some(snap) = ch.latest() else { continue };
            put(
                &mut fixed,
                Fixed::SpectrumAge,
                gauge(
                    ch_label(name),
                    now_ns.saturating_sub(snap.published_unix_ns) as f64 * 1e-9,
                ),
            );
            put(
                &mut fixed,
                Fixed::LastSpectrum,
                gauge(ch_label(name), snap.published_unix_ns as f64 * 1e-9),
            );
            let si = spec.unit.to_si;
            let o = &snap.overall;
            let first = self.overall_slot[i];
            for (k, v) in [o.mean, o.rms, o.peak, o.peak_to_peak]
                .into_iter()
                .enumerate()
            {
                dynamic[first + k].push(gauge(ch_label(name), v * si));
            }
            put(
                &mut fixed,
                Fixed::CrestFactor,
                gauge(ch_label(name), o.crest_factor),
            );
            for ((b, v), &slot) in spec.bands.iter().zip(&snap.bands).zip(&self.band_slot[i]) {
                let labels = || vec![label("channel", name), label("band", &b.name)];
                put(
                    &mut fixed,
                    Fixed::BandInService,
                    gauge(labels(), if v.is_ok() { 1.0 } else { 0.0 }),
                );
                // A band without a value has no series: no invented zero.
                if !v.is_ok() {
                    continue;
                }
                dynamic[slot].push(gauge(labels(), v.value * b.unit.to_si));
                put(
                    &mut fixed,
                    Fixed::BandPeakFrequency,
                    gauge(labels(), v.peak_hz),
                );
            }
        }

        for m in &self.app.machines {
            let labels = || {
                vec![
                    label("machine", &m.spec.name),
                    label("source", m.spec.speed.as_str()),
                ]
            };
            let speed = m.speed_hz();
            fixed[Fixed::MachineSpeedKnown as usize]
                .push(gauge(labels(), if speed.is_some() { 1.0 } else { 0.0 }));
            if let Some(hz) = speed {
                fixed[Fixed::MachineSpeed as usize].push(gauge(labels(), hz));
            }
        }

        if let Some(io) = &self.app.alarm_io {
            use std::sync::atomic::Ordering::Relaxed;
            for (kind, w, d) in [
                (
                    "events",
                    io.events_written.load(Relaxed),
                    io.dropped_events(),
                ),
                (
                    "captures",
                    io.captures_written.load(Relaxed),
                    io.dropped_captures(),
                ),
                (
                    "baselines",
                    io.baselines_written.load(Relaxed),
                    io.dropped_baselines(),
                ),
            ] {
                fixed[Fixed::AlarmRecordsWritten as usize]
                    .push(counter(vec![label("kind", kind)], w));
                fixed[Fixed::AlarmRecordsDropped as usize]
                    .push(counter(vec![label("kind", kind)], d));
            }
            fixed[Fixed::AlarmWriteErrors as usize]
                .push(counter(vec![], io.write_errors.load(Relaxed)));
            fixed[Fixed::AlarmCapturesPruned as usize]
                .push(counter(vec![], io.captures_pruned.load(Relaxed)));
        }

        for s in &self.app.sources {
            use std::sync::atomic::Ordering::Relaxed;
            let src = || vec![label("source", &s.name)];
            fixed[Fixed::SourceUp as usize].push(gauge(
                vec![label("source", &s.name), label("kind", s.kind)],
                if s.is_connected() { 1.0 } else { 0.0 },
            ));
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
                fixed[f as usize].push(counter(src(), c.load(Relaxed)));
            }
            for (reason, n) in s.rejected() {
                fixed[Fixed::SourceRejected as usize].push(counter(
                    vec![label("source", &s.name), label("reason", reason)],
                    n,
                ));
            }
            let last = s.last_frame_unix_ns.load(Relaxed);
            if last != 0 {
                fixed[Fixed::SourceLastFrame as usize].push(gauge(src(), last as f64 * 1e-9));
            }
        }

        let mut out = Vec::with_capacity(FIXED.len() + self.dynamic.len());
        for ((_, name, help, kind, _), metrics) in FIXED.iter().zip(fixed) {
            if !metrics.is_empty() {
                out.push(family(name, help, *kind, metrics));
            }
        }
        for (def, metrics) in self.dynamic.iter().zip(dynamic) {
            if !metrics.is_empty() {
                out.push(family(&def.name, &def.help, def.kind, metrics));
            }
        }
        out
    }
}

/// Discriminants of `FIXED` in table order (they must be 0, 1, 2…).
#[cfg(test)]
pub(crate) fn fixed_order() -> Vec<usize> {
    FIXED.iter().map(|(f, ..)| *f as usize).collect()
}
