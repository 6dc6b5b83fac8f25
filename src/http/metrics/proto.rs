//! The reference encoder: a [`Sink`] of the same walk as the direct text
//! encoder, building `prometheus::proto` families that the prometheus
//! crate's `Registry::gather` (sorting) and `TextEncoder` write. Kept for
//! tests only, as the reference the direct encoder must match byte for
//! byte; since both read the state through one walk, that comparison
//! checks encoding alone.

use std::collections::HashMap;
use std::sync::Arc;

use prometheus::core::{Collector, Desc};
use prometheus::proto::{Counter as PCounter, Gauge as PGauge, LabelPair, Metric, MetricFamily};
use prometheus::{Encoder, Gauge, IntGaugeVec, Opts, Registry, TextEncoder};

use super::families::FIXED;
use super::walk::{walk, Fam, Labels, Layout, Sink, LEVELS, RECORD_KINDS};
use crate::alarm::state::AlarmState;
use crate::pipeline::state::AppState;

/// The exposition the prometheus crate writes for `app` (no HTTP request
/// counted yet): the static series and the old collector in one registry.
pub fn render(app: Arc<AppState>, clock: fn() -> u64) -> Vec<u8> {
    let registry = Registry::new();
    let build_info = IntGaugeVec::new(
        Opts::new(
            "bandwatch_build_info",
            "Always 1; the labels name the running bandwatch build.",
        ),
        &["version", "commit", "target"],
    )
    .expect("build info");
    build_info.with_label_values(&super::BUILD_LABELS).set(1);
    registry.register(Box::new(build_info)).expect("register");
    let start_time = Gauge::new(
        "bandwatch_start_time_seconds",
        "Time the process started, in seconds since the Unix epoch.",
    )
    .expect("start time");
    start_time.set(app.started_unix_ns as f64 * 1e-9);
    registry.register(Box::new(start_time)).expect("register");
    // The HTTP server's connection series are static ones too, encoded
    // by the crate on both sides.
    let _connections = super::ConnectionMetrics::register(&registry);
    if let Some(r) = super::ReloadMetrics::register(&registry) {
        r.sync(&app);
    }
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
    layout: Layout,
    descs: Vec<Desc>,
}

impl ProtoCollector {
    pub fn new(app: Arc<AppState>, clock: fn() -> u64) -> ProtoCollector {
        let layout = Layout::new(&app);
        let mut descs = Vec::new();
        for f in layout.families() {
            let (name, help, _, labels) = layout.family(f);
            match Desc::new(
                name.to_string(),
                help.to_string(),
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
            layout,
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

/// The walk's samples, as `prometheus::proto` metrics per family (in the
/// order of `Layout::families`).
struct ProtoSink<'a> {
    app: &'a AppState,
    layout: &'a Layout,
    metrics: Vec<Vec<Metric>>,
}

impl ProtoSink<'_> {
    fn slot(f: Fam) -> usize {
        match f {
            Fam::Fixed(f) => f as usize,
            Fam::Dyn(s) => FIXED.len() + s,
        }
    }

    /// The label pairs of a sample, built from the names in the state.
    fn pairs(&self, l: Labels<'_>) -> Vec<LabelPair> {
        let ch = |i: usize| self.app.channels[i].spec.name.as_str();
        let alarm = |i: usize, j: usize| {
            vec![
                label("channel", ch(i)),
                label("band", &self.app.channels[i].spec.alarms[j].name),
            ]
        };
        let src = |k: usize| label("source", &self.app.sources[k].name);
        match l {
            Labels::None => vec![],
            Labels::Channel(i) => vec![label("channel", ch(i))],
            Labels::Reason(i, k) => vec![
                label("channel", ch(i)),
                label("reason", self.layout.reasons[k].as_str()),
            ],
            Labels::Band(i, j) => vec![
                label("channel", ch(i)),
                label("band", &self.app.channels[i].spec.bands[j].name),
            ],
            Labels::Alarm(i, j) => alarm(i, j),
            Labels::To(i, j, k) => {
                let mut l = alarm(i, j);
                l.push(label("to", AlarmState::ALL[self.layout.states[k]].as_str()));
                l
            }
            Labels::Level(i, j, k) => {
                let mut l = alarm(i, j);
                l.push(label("level", LEVELS[k]));
                l
            }
            Labels::Source(k) => vec![src(k)],
            Labels::SourceKind(k) => vec![src(k), label("kind", self.app.sources[k].kind)],
            Labels::Rejected(k, reason) => vec![src(k), label("reason", reason)],
            Labels::Machine(k) => {
                let m = &self.app.machines[k].spec;
                vec![label("machine", &m.name), label("method", m.speed.as_str())]
            }
            Labels::Kind(k) => vec![label("kind", RECORD_KINDS[k])],
            Labels::Word(name, value) => vec![label(name, value)],
        }
    }
}

impl Sink for ProtoSink<'_> {
    fn gauge(&mut self, fam: Fam, labels: Labels<'_>, v: f64) {
        let m = gauge(self.pairs(labels), v);
        self.metrics[Self::slot(fam)].push(m);
    }

    fn counter(&mut self, fam: Fam, labels: Labels<'_>, v: u64) {
        let m = counter(self.pairs(labels), v);
        self.metrics[Self::slot(fam)].push(m);
    }
}

impl Collector for ProtoCollector {
    fn desc(&self) -> Vec<&Desc> {
        self.descs.iter().collect()
    }

    fn collect(&self) -> Vec<MetricFamily> {
        let mut sink = ProtoSink {
            app: &self.app,
            layout: &self.layout,
            metrics: vec![Vec::new(); FIXED.len() + self.layout.dynamic.len()],
        };
        let now_ns = (self.clock)();
        let reach: Vec<_> = self
            .app
            .channels
            .iter()
            .map(|c| {
                crate::http::projection::channel_reach_in(
                    self.app.history.as_deref(),
                    c,
                    now_ns as f64 * 1e-9,
                )
            })
            .collect();
        walk(&self.app, &self.layout, now_ns, &reach, &mut sink);
        let mut out = Vec::new();
        for (f, metrics) in self.layout.families().zip(sink.metrics) {
            if metrics.is_empty() {
                continue;
            }
            let (name, help, kind, _) = self.layout.family(f);
            let mut mf = MetricFamily::default();
            mf.set_name(name.to_string());
            mf.set_help(help.to_string());
            mf.set_field_type(kind);
            mf.set_metric(metrics);
            out.push(mf);
        }
        out
    }
}
