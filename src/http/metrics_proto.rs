//! The scrape-time collector as it was before the direct text encoder:
//! it builds `prometheus::proto` families and lets the prometheus crate's
//! `Registry::gather` (sorting) and `TextEncoder` write them. Kept for tests
//! only, as the reference the direct encoder must match byte for byte.

use std::collections::HashMap;
use std::sync::Arc;

use prometheus::core::{Collector, Desc};
use prometheus::proto::{
    Counter as PCounter, Gauge as PGauge, LabelPair, Metric, MetricFamily, MetricType,
};
use prometheus::{Encoder, Gauge, IntGaugeVec, Opts, Registry, TextEncoder};

use super::metrics::{band_family, band_help, si_words, Fixed, FIXED, OVERALL};
use crate::counters::{ChannelCounters, GapReason};
use crate::pipeline::state::AppState;

/// One metric family whose members are built at scrape time.
#[derive(Debug, Clone)]
struct FamilyDef {
    name: String,
    help: String,
    kind: MetricType,
}

/// The exposition the prometheus crate writes for `app` (no HTTP request
/// counted yet): the static series and the old collector in one registry.
pub fn render(app: Arc<AppState>, clock: fn() -> u64) -> Vec<u8> {
    let registry = Registry::new();
    let build_info = IntGaugeVec::new(
        Opts::new(
            "bandwatch_build_info",
            "Always 1; the labels name the running bandwatch build.",
        ),
        &["version"],
    )
    .expect("build info");
    build_info
        .with_label_values(&[env!("CARGO_PKG_VERSION")])
        .set(1);
    registry.register(Box::new(build_info)).expect("register");
    let start_time = Gauge::new(
        "bandwatch_start_time_seconds",
        "Time the process started, in seconds since the Unix epoch.",
    )
    .expect("start time");
    start_time.set(app.started_unix_ns as f64 * 1e-9);
    registry.register(Box::new(start_time)).expect("register");
    registry
        .register(Box::new(ProtoCollector::new(app, clock)))
        .expect("register");
    let mut out = Vec::new();
    TextEncoder::new()
        .encode(&registry.gather(), &mut out)
        .expect("encode");
    out
}

/// Builds every channel- and source-derived family at scrape time.
pub struct ProtoCollector {
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

impl ProtoCollector {
    pub fn new(app: Arc<AppState>, clock: fn() -> u64) -> ProtoCollector {
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
                    let help = band_help(b.measure, q);
                    slot(band_family(b.measure, q), help, &["channel", "band"])
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
        ProtoCollector {
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

impl Collector for ProtoCollector {
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
