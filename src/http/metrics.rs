//! `/metrics`: Prometheus text exposition.
//!
//! Two kinds of series:
//!
//! - static ones the process updates itself (`bandwatch_build_info`,
//!   `bandwatch_start_time_seconds`, `bandwatch_http_requests_total`), kept
//!   in a prometheus crate `Registry` and encoded by its `TextEncoder`;
//! - everything derived from channels and sources, written by
//!   [`PipelineCollector`] at scrape time from the latest snapshots and
//!   counters, straight into text. One scrape reads each snapshot once
//!   (never half old, half new), and a channel that is gone leaves no stale
//!   series.
//!
//! The direct encoder writes what `Registry::gather` + `TextEncoder` would
//! (families sorted by name, series by label values, values as Rust
//! prints an `f64`), without building a `prometheus::proto` object per
//! series: label sets are escaped once when the collector is built (names
//! are fixed by the config), the text goes into per-family buffers reused
//! from scrape to scrape, and integral values skip float formatting. The
//! one difference: non-finite values are written `+Inf`, `-Inf`, `NaN` as
//! the text format specifies (the crate wrote Rust's `inf`).
//!
//! A rendered body is shared by the scrapes that arrive within
//! [`RENDER_MAX_AGE`] of the start of its render; never longer.
//!
//! Names follow the Prometheus naming guide: `bandwatch_` prefix, SI base
//! units in the name (values are converted with `Unit::to_si`), `_total` on
//! counters, help strings as sentences, bounded labels (channel, band,
//! source, kind, reason, path, status).

use std::collections::HashMap;
use std::fmt::Write as _;
use std::sync::{Arc, Mutex, MutexGuard};
use std::time::{Duration, Instant};

use axum::body::Bytes;
use axum::http::StatusCode;
use prometheus::proto::MetricType;
use prometheus::{Encoder, Gauge, IntCounterVec, IntGaugeVec, Opts, Registry, TextEncoder};

use crate::clock::unix_now_ns;
use crate::config::Measure;
use crate::counters::{ChannelCounters, GapReason};
use crate::pipeline::state::AppState;
use crate::units::Quantity;

/// Content type of the text exposition format.
pub const CONTENT_TYPE: &str = prometheus::TEXT_FORMAT;

/// Longest time a rendered `/metrics` body is served again: scrapes within
/// this time of the start of a render share its body. Snapshots change
/// only when a channel publishes (every hop × averages / fs, 0.32 s at the
/// demo's settings), so a scrape sees values at most this much older than
/// an uncached render would show.
pub const RENDER_MAX_AGE: Duration = Duration::from_millis(200);

/// Monotonic time for the render cache (tests step it by hand).
pub type MonoClock = Arc<dyn Fn() -> Duration + Send + Sync>;

fn process_mono() -> Duration {
    static BASE: std::sync::OnceLock<Instant> = std::sync::OnceLock::new();
    BASE.get_or_init(Instant::now).elapsed()
}

/// The last rendered body and when its render started.
struct Cached {
    at: Duration,
    body: Bytes,
}

/// The registry behind `/metrics`, the static series the HTTP layer
/// updates, and the render cache.
pub struct Metrics {
    registry: Registry,
    /// `None` only if the prometheus crate refused its constant options.
    http_requests: Option<IntCounterVec>,
    collector: PipelineCollector,
    max_age: Duration,
    mono: MonoClock,
    cache: Mutex<Option<Cached>>,
    /// Held while rendering, so that concurrent scrapes wait for one
    /// render instead of each doing their own.
    rendering: Mutex<()>,
}

fn lock<T>(m: &Mutex<T>) -> MutexGuard<'_, T> {
    m.lock().unwrap_or_else(std::sync::PoisonError::into_inner)
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
        Metrics::with_cache(app, clock, RENDER_MAX_AGE, Arc::new(process_mono))
    }

    /// As [`Metrics::with_clock`], with the cache's max-age and monotonic
    /// clock given (tests step the clock; `Duration::ZERO` disables the
    /// cache).
    pub fn with_cache(
        app: Arc<AppState>,
        clock: fn() -> u64,
        max_age: Duration,
        mono: MonoClock,
    ) -> Metrics {
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
        Metrics {
            registry,
            http_requests,
            collector: PipelineCollector::new(app, clock),
            max_age,
            mono,
            cache: Mutex::new(None),
            rendering: Mutex::new(()),
        }
    }

    /// Counts one answered request under its route template.
    pub fn observe_request(&self, path: &str, status: StatusCode) {
        if let Some(c) = &self.http_requests {
            c.with_label_values(&[path, status.as_str()]).inc();
        }
    }

    /// The body cached less than the max-age ago, if any.
    pub fn cached(&self) -> Option<Bytes> {
        let now = (self.mono)();
        let c = lock(&self.cache);
        c.as_ref()
            .filter(|c| now.saturating_sub(c.at) < self.max_age)
            .map(|c| c.body.clone())
    }

    /// The text exposition: the cached body if it is younger than the
    /// max-age, else a new render (one at a time: a scrape that arrives
    /// during a render waits for it and shares its body).
    ///
    /// # Errors
    /// If the encoder rejects a static family (a programming error).
    pub fn render(&self) -> Result<Bytes, prometheus::Error> {
        if let Some(b) = self.cached() {
            return Ok(b);
        }
        let _one = lock(&self.rendering);
        if let Some(b) = self.cached() {
            return Ok(b);
        }
        let at = (self.mono)();
        let body = Bytes::from(self.render_fresh()?);
        if !self.max_age.is_zero() {
            *lock(&self.cache) = Some(Cached {
                at,
                body: body.clone(),
            });
        }
        Ok(body)
    }

    /// Renders the exposition now, bypassing the cache.
    ///
    /// # Errors
    /// If the encoder rejects a static family (a programming error).
    pub fn render_fresh(&self) -> Result<Vec<u8>, prometheus::Error> {
        let mut statics = Vec::new();
        for f in self.registry.gather() {
            let mut text = Vec::new();
            TextEncoder::new().encode(std::slice::from_ref(&f), &mut text)?;
            statics.push((f.name().to_string(), text));
        }
        Ok(self.collector.encode(&statics))
    }
}

fn register(registry: &Registry, c: Box<dyn prometheus::core::Collector>) {
    if let Err(e) = registry.register(c) {
        tracing::error!(error = %e, "cannot register a metrics collector");
    }
}

// ---------------------------------------------------------------------------
// The scrape-time collector
// ---------------------------------------------------------------------------

/// Families with a fixed name.
#[derive(Debug, Clone, Copy)]
pub(crate) enum Fixed {
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

pub(crate) const FIXED: [(Fixed, &str, &str, MetricType, &[&str]); 35] = [
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
pub(crate) const OVERALL: [(&str, &str); 4] = [
    ("mean", "Mean of the newest block"),
    ("rms", "RMS about the mean of the newest block"),
    (
        "peak",
        "Largest excursion from the mean in the newest block",
    ),
    ("peak_to_peak", "Maximum minus minimum of the newest block"),
];

/// Name of a band value's family: `bandwatch_band_<measure>_<si unit>`.
pub(crate) fn band_family(measure: Measure, q: Quantity) -> String {
    format!("bandwatch_band_{}_{}", measure.as_str(), q.metric_suffix())
}

/// Help text of a band value's family.
pub(crate) fn band_help(measure: Measure, q: Quantity) -> String {
    match measure {
        Measure::Rms => format!(
            "RMS level of the band in the latest averaged spectrum, in {}.",
            si_words(q)
        ),
        Measure::Peak => format!(
            "Peak amplitude of the largest line of the band in the latest averaged spectrum, in {}.",
            si_words(q)
        ),
    }
}

pub(crate) fn si_words(q: Quantity) -> &'static str {
    match q {
        Quantity::Displacement => "metres",
        Quantity::Velocity => "metres per second",
        Quantity::Acceleration => "metres per second squared",
        Quantity::Voltage => "volts",
        Quantity::Current => "amperes",
        Quantity::Pressure => "pascals",
    }
}

/// A family the collector writes: its name and its `# HELP` and `# TYPE`
/// lines.
#[derive(Debug, Clone)]
struct FamilyText {
    name: String,
    head: String,
}

impl FamilyText {
    fn new(name: String, help: &str, kind: MetricType) -> FamilyText {
        let mut head = String::new();
        if !help.is_empty() {
            head.push_str("# HELP ");
            head.push_str(&name);
            head.push(' ');
            push_escaped(&mut head, help, false);
            head.push('\n');
        }
        head.push_str("# TYPE ");
        head.push_str(&name);
        head.push_str(match kind {
            MetricType::COUNTER => " counter\n",
            MetricType::GAUGE => " gauge\n",
            MetricType::SUMMARY => " summary\n",
            MetricType::HISTOGRAM => " histogram\n",
            MetricType::UNTYPED => " untyped\n",
        });
        FamilyText { name, head }
    }
}

/// Appends `v` escaped as the text format says: a backslash as `\\`, a
/// line feed as `\n`, and, in label values (`quote`), a double quote as
/// `\"`. Everything else is written as it is (UTF-8).
pub fn push_escaped(out: &mut String, v: &str, quote: bool) {
    let mut rest = v;
    while let Some(p) = rest.find(|c| c == '\\' || c == '\n' || (quote && c == '"')) {
        out.push_str(&rest[..p]);
        out.push_str(match rest.as_bytes()[p] {
            b'\\' => "\\\\",
            b'\n' => "\\n",
            _ => "\\\"",
        });
        rest = &rest[p + 1..];
    }
    out.push_str(rest);
}

/// `{name="value",…}` with the values escaped; empty for no labels.
fn label_set(pairs: &[(&str, &str)]) -> String {
    if pairs.is_empty() {
        return String::new();
    }
    let mut s = String::from("{");
    for (k, (name, value)) in pairs.iter().enumerate() {
        if k > 0 {
            s.push(',');
        }
        s.push_str(name);
        s.push_str("=\"");
        push_escaped(&mut s, value, true);
        s.push('"');
    }
    s.push('}');
    s
}

/// Integers below 2^53 are exact in an f64 and print the same either way.
const EXACT: f64 = 9_007_199_254_740_992.0;

fn push_uint(out: &mut String, mut v: u64) {
    let mut buf = [0u8; 20];
    let mut i = buf.len();
    loop {
        i -= 1;
        buf[i] = b'0' + (v % 10) as u8;
        v /= 10;
        if v == 0 {
            break;
        }
    }
    out.push_str(std::str::from_utf8(&buf[i..]).unwrap_or("0"));
}

/// Appends a sample value as the text format wants it: `NaN`, `+Inf`,
/// `-Inf`; finite values as Rust's `Display` prints an `f64` (shortest
/// digits that read back exactly, never an exponent), which is what the
/// prometheus crate's encoder wrote. Integral values below 2^53 take a
/// short path with the same digits.
pub fn push_value(out: &mut String, v: f64) {
    if v.is_nan() {
        out.push_str("NaN");
    } else if v.is_infinite() {
        out.push_str(if v > 0.0 { "+Inf" } else { "-Inf" });
    } else if v.trunc() == v && v.abs() < EXACT && v != 0.0 {
        if v < 0.0 {
            out.push('-');
        }
        push_uint(out, v.abs() as u64);
    } else if v == 0.0 {
        out.push_str(if v.is_sign_negative() { "-0" } else { "0" });
    } else {
        let _ = write!(out, "{v}");
    }
}

/// A counter value: as the f64 it used to be converted to.
fn push_count(out: &mut String, v: u64) {
    if (v as f64) < EXACT {
        push_uint(out, v);
    } else {
        push_value(out, v as f64);
    }
}

fn put_f(out: &mut String, name: &str, labels: &str, v: f64) {
    out.push_str(name);
    out.push_str(labels);
    out.push(' ');
    push_value(out, v);
    out.push('\n');
}

fn put_u(out: &mut String, name: &str, labels: &str, v: u64) {
    out.push_str(name);
    out.push_str(labels);
    out.push(' ');
    push_count(out, v);
    out.push('\n');
}

fn bit(b: bool) -> f64 {
    if b {
        1.0
    } else {
        0.0
    }
}

/// One channel's label sets, escaped once, and the order of its bands
/// and alarms by name (the order the series sort in).
struct ChannelText {
    /// `{channel="…"}`
    ch: String,
    /// `{channel="…",reason="…"}`, sorted by reason.
    reasons: Vec<(GapReason, String)>,
    band_order: Vec<usize>,
    /// Per band: `{channel="…",band="…"}`.
    band: Vec<String>,
    alarm_order: Vec<usize>,
    /// Per alarm: `{channel="…",band="…"}`.
    alarm: Vec<String>,
    /// Per alarm: (index into `AlarmState::ALL`, `{…,to="…"}`), sorted by
    /// state name.
    to: Vec<Vec<(usize, String)>>,
    /// Per alarm: `{…,level="alert"}`, `{…,level="danger"}`.
    level: Vec<[String; 2]>,
}

/// Indices of `items` in the order of `key` (stable).
fn order_by<T, K: Ord>(items: &[T], key: impl Fn(&T) -> K) -> Vec<usize> {
    let mut o: Vec<usize> = (0..items.len()).collect();
    o.sort_by_key(|&i| key(&items[i]));
    o
}

/// Writes every channel- and source-derived family at scrape time.
pub struct PipelineCollector {
    app: Arc<AppState>,
    clock: fn() -> u64,
    fixed: Vec<FamilyText>,
    /// Families whose names depend on the config (band measure × quantity,
    /// overall levels × quantity, alarm limits × quantity).
    dynamic: Vec<FamilyText>,
    /// Per channel, per band: index into `dynamic`.
    band_slot: Vec<Vec<usize>>,
    /// Per channel: index of the first of its 4 overall families.
    overall_slot: Vec<usize>,
    /// Per channel, per alarm: index into `dynamic` of its limit family
    /// (None: dimensionless, exported in `bandwatch_alarm_limit`).
    limit_slot: Vec<Vec<Option<usize>>>,
    channels: Vec<ChannelText>,
    channel_order: Vec<usize>,
    /// Per source: `{source="…"}` and `{source="…",kind="…"}`.
    sources: Vec<(String, String)>,
    source_order: Vec<usize>,
    /// Per machine: `{machine="…",source="…"}`.
    machines: Vec<String>,
    machine_order: Vec<usize>,
    /// Fixed (0..FIXED.len()) and dynamic (FIXED.len()..) families by name.
    family_order: Vec<usize>,
    /// One text buffer per family, kept from scrape to scrape.
    bufs: Mutex<Vec<String>>,
}

impl PipelineCollector {
    pub fn new(app: Arc<AppState>, clock: fn() -> u64) -> PipelineCollector {
        let mut dynamic: Vec<FamilyText> = Vec::new();
        let mut index: HashMap<String, usize> = HashMap::new();
        let mut slot = |name: String, help: String| {
            *index.entry(name.clone()).or_insert_with(|| {
                dynamic.push(FamilyText::new(name, &help, MetricType::GAUGE));
                dynamic.len() - 1
            })
        };
        let mut band_slot = Vec::with_capacity(app.channels.len());
        let mut overall_slot = Vec::with_capacity(app.channels.len());
        let mut limit_slot = Vec::with_capacity(app.channels.len());
        let mut channels = Vec::with_capacity(app.channels.len());
        for ch in &app.channels {
            let spec = &ch.spec;
            let q = spec.unit.quantity;
            let first = slot(
                format!("bandwatch_channel_{}_{}", OVERALL[0].0, q.metric_suffix()),
                format!("{}, in {}.", OVERALL[0].1, si_words(q)),
            );
            for (what, help) in &OVERALL[1..] {
                slot(
                    format!("bandwatch_channel_{what}_{}", q.metric_suffix()),
                    format!("{help}, in {}.", si_words(q)),
                );
            }
            overall_slot.push(first);
            let bands = spec
                .bands
                .iter()
                .map(|b| {
                    let q = b.unit.quantity;
                    let help = band_help(b.measure, q);
                    slot(band_family(b.measure, q), help)
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
                        )
                    })
                })
                .collect();
            limit_slot.push(limits);

            let name = spec.name.as_str();
            let mut reasons: Vec<(GapReason, String)> = GapReason::ALL
                .iter()
                .map(|&r| (r, label_set(&[("channel", name), ("reason", r.as_str())])))
                .collect();
            reasons.sort_by_key(|(r, _)| r.as_str());
            let mut states: Vec<(usize, &str)> = crate::alarm::state::AlarmState::ALL
                .iter()
                .enumerate()
                .map(|(k, s)| (k, s.as_str()))
                .collect();
            states.sort_by_key(|&(_, s)| s);
            channels.push(ChannelText {
                ch: label_set(&[("channel", name)]),
                reasons,
                band_order: order_by(&spec.bands, |b| b.name.clone()),
                band: spec
                    .bands
                    .iter()
                    .map(|b| label_set(&[("channel", name), ("band", &b.name)]))
                    .collect(),
                alarm_order: order_by(&spec.alarms, |a| a.name.clone()),
                alarm: spec
                    .alarms
                    .iter()
                    .map(|a| label_set(&[("channel", name), ("band", &a.name)]))
                    .collect(),
                to: spec
                    .alarms
                    .iter()
                    .map(|a| {
                        states
                            .iter()
                            .map(|&(k, s)| {
                                (
                                    k,
                                    label_set(&[("channel", name), ("band", &a.name), ("to", s)]),
                                )
                            })
                            .collect()
                    })
                    .collect(),
                level: spec
                    .alarms
                    .iter()
                    .map(|a| {
                        ["alert", "danger"].map(|l| {
                            label_set(&[("channel", name), ("band", &a.name), ("level", l)])
                        })
                    })
                    .collect(),
            });
        }
        let fixed: Vec<FamilyText> = FIXED
            .iter()
            .map(|(_, name, help, kind, _)| FamilyText::new(name.to_string(), help, *kind))
            .collect();
        let mut family_order: Vec<usize> = (0..fixed.len() + dynamic.len()).collect();
        family_order.sort_by(|&a, &b| {
            let name = |i: usize| {
                if i < fixed.len() {
                    fixed[i].name.as_str()
                } else {
                    dynamic[i - fixed.len()].name.as_str()
                }
            };
            name(a).cmp(name(b))
        });
        let sources = app
            .sources
            .iter()
            .map(|s| {
                (
                    label_set(&[("source", &s.name)]),
                    label_set(&[("source", &s.name), ("kind", s.kind)]),
                )
            })
            .collect();
        let machines = app
            .machines
            .iter()
            .map(|m| label_set(&[("machine", &m.spec.name), ("source", m.spec.speed.as_str())]))
            .collect();
        let bufs = vec![String::new(); fixed.len() + dynamic.len()];
        PipelineCollector {
            channel_order: order_by(&app.channels, |c| c.spec.name.clone()),
            source_order: order_by(&app.sources, |s| s.name.clone()),
            machine_order: order_by(&app.machines, |m| {
                (m.spec.name.clone(), m.spec.speed.as_str())
            }),
            app,
            clock,
            fixed,
            dynamic,
            band_slot,
            overall_slot,
            limit_slot,
            channels,
            sources,
            machines,
            family_order,
            bufs: Mutex::new(bufs),
        }
    }

    /// Writes the whole exposition: this collector's families and
    /// `statics` (name and encoded text of each static family, in name
    /// order), all in name order.
    fn encode(&self, statics: &[(String, Vec<u8>)]) -> Vec<u8> {
        use std::sync::atomic::Ordering::Relaxed;
        let now_ns = (self.clock)();
        let mut guard = lock(&self.bufs);
        let bufs: &mut Vec<String> = &mut guard;
        for b in bufs.iter_mut() {
            b.clear();
        }
        let nf = FIXED.len();
        let fname = |f: Fixed| FIXED[f as usize].1;

        for &i in &self.channel_order {
            let ch = &self.app.channels[i];
            let t = &self.channels[i];
            let spec = &ch.spec;
            let c = &ch.counters;
            for (f, v) in [
                (Fixed::SamplesReceived, &c.samples_in),
                (Fixed::SamplesProcessed, &c.samples_processed),
                (Fixed::Blocks, &c.blocks),
                (Fixed::Spectra, &c.spectra),
            ] {
                put_u(
                    &mut bufs[f as usize],
                    fname(f),
                    &t.ch,
                    ChannelCounters::get(v),
                );
            }
            for (r, labels) in &t.reasons {
                let f = Fixed::SamplesDropped;
                put_u(&mut bufs[f as usize], fname(f), labels, c.dropped(*r));
                let f = Fixed::Discontinuities;
                put_u(
                    &mut bufs[f as usize],
                    fname(f),
                    labels,
                    c.discontinuities(*r),
                );
            }

            if let Some(board) = ch.alarm_board.load_full() {
                let f = Fixed::HealthOk;
                put_f(&mut bufs[f as usize], fname(f), &t.ch, bit(board.health.ok));
                for &j in &t.alarm_order {
                    let (Some(a), Some(v)) = (spec.alarms.get(j), board.alarms.get(j)) else {
                        continue;
                    };
                    let labels = &t.alarm[j];
                    for (f, x) in [
                        (Fixed::AlarmState, v.state.metric_value() as f64),
                        (Fixed::AlarmLatched, bit(v.latched)),
                        (Fixed::AlarmAcknowledged, bit(v.acknowledged)),
                        (Fixed::AlarmSince, v.since_unix_ns as f64 * 1e-9),
                    ] {
                        put_f(&mut bufs[f as usize], fname(f), labels, x);
                    }
                    for (k, labels) in &t.to[j] {
                        let f = Fixed::AlarmTransitions;
                        put_u(&mut bufs[f as usize], fname(f), labels, v.transitions[*k]);
                    }
                    for (level, lim) in [v.alert_limit, v.danger_limit].into_iter().enumerate() {
                        let Some(lim) = lim else { continue };
                        let labels = &t.level[j][level];
                        match (self.limit_slot[i].get(j).copied().flatten(), a.unit) {
                            (Some(slot), Some(u)) => put_f(
                                &mut bufs[nf + slot],
                                &self.dynamic[slot].name,
                                labels,
                                lim * u.to_si,
                            ),
                            _ => {
                                let f = Fixed::AlarmLimitDimensionless;
                                put_f(&mut bufs[f as usize], fname(f), labels, lim);
                            }
                        }
                    }
                }
            }

            // One load per channel per scrape: every value below comes from
            // the same snapshot.
            let Some(snap) = ch.latest() else { continue };
            let f = Fixed::SpectrumAge;
            put_f(
                &mut bufs[f as usize],
                fname(f),
                &t.ch,
                now_ns.saturating_sub(snap.published_unix_ns) as f64 * 1e-9,
            );
            let f = Fixed::LastSpectrum;
            put_f(
                &mut bufs[f as usize],
                fname(f),
                &t.ch,
                snap.published_unix_ns as f64 * 1e-9,
            );
            let si = spec.unit.to_si;
            let o = &snap.overall;
            let first = self.overall_slot[i];
            for (k, v) in [o.mean, o.rms, o.peak, o.peak_to_peak]
                .into_iter()
                .enumerate()
            {
                let slot = first + k;
                put_f(
                    &mut bufs[nf + slot],
                    &self.dynamic[slot].name,
                    &t.ch,
                    v * si,
                );
            }
            let f = Fixed::CrestFactor;
            put_f(&mut bufs[f as usize], fname(f), &t.ch, o.crest_factor);
            let n_bands = spec.bands.len().min(snap.bands.len());
            for &j in &t.band_order {
                if j >= n_bands {
                    continue;
                }
                let (b, v, slot) = (&spec.bands[j], &snap.bands[j], self.band_slot[i][j]);
                let labels = &t.band[j];
                let f = Fixed::BandInService;
                put_f(&mut bufs[f as usize], fname(f), labels, bit(v.is_ok()));
                // A band without a value has no series: no invented zero.
                if !v.is_ok() {
                    continue;
                }
                put_f(
                    &mut bufs[nf + slot],
                    &self.dynamic[slot].name,
                    labels,
                    v.value * b.unit.to_si,
                );
                let f = Fixed::BandPeakFrequency;
                put_f(&mut bufs[f as usize], fname(f), labels, v.peak_hz);
            }
        }

        for &k in &self.machine_order {
            let m = &self.app.machines[k];
            let labels = &self.machines[k];
            let speed = m.speed_hz();
            let f = Fixed::MachineSpeedKnown;
            put_f(
                &mut bufs[f as usize],
                fname(f),
                labels,
                bit(speed.is_some()),
            );
            if let Some(hz) = speed {
                let f = Fixed::MachineSpeed;
                put_f(&mut bufs[f as usize], fname(f), labels, hz);
            }
        }

        if let Some(io) = &self.app.alarm_io {
            // In the order of the `kind` label's values.
            for (kind, w, d) in [
                (
                    "{kind=\"baselines\"}",
                    io.baselines_written.load(Relaxed),
                    io.dropped_baselines(),
                ),
                (
                    "{kind=\"captures\"}",
                    io.captures_written.load(Relaxed),
                    io.dropped_captures(),
                ),
                (
                    "{kind=\"events\"}",
                    io.events_written.load(Relaxed),
                    io.dropped_events(),
                ),
            ] {
                let f = Fixed::AlarmRecordsWritten;
                put_u(&mut bufs[f as usize], fname(f), kind, w);
                let f = Fixed::AlarmRecordsDropped;
                put_u(&mut bufs[f as usize], fname(f), kind, d);
            }
            let f = Fixed::AlarmWriteErrors;
            put_u(
                &mut bufs[f as usize],
                fname(f),
                "",
                io.write_errors.load(Relaxed),
            );
            let f = Fixed::AlarmCapturesPruned;
            put_u(
                &mut bufs[f as usize],
                fname(f),
                "",
                io.captures_pruned.load(Relaxed),
            );
        }

        for &k in &self.source_order {
            let s = &self.app.sources[k];
            let (src, up) = &self.sources[k];
            let f = Fixed::SourceUp;
            put_f(&mut bufs[f as usize], fname(f), up, bit(s.is_connected()));
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
                put_u(&mut bufs[f as usize], fname(f), src, c.load(Relaxed));
            }
            let mut rejected = s.rejected();
            rejected.sort_by_key(|&(r, _)| r);
            for (reason, n) in rejected {
                let f = Fixed::SourceRejected;
                let labels = label_set(&[("source", &s.name), ("reason", reason)]);
                put_u(&mut bufs[f as usize], fname(f), &labels, n);
            }
            let last = s.last_frame_unix_ns.load(Relaxed);
            if last != 0 {
                let f = Fixed::SourceLastFrame;
                put_f(&mut bufs[f as usize], fname(f), src, last as f64 * 1e-9);
            }
        }

        // Families in name order, the static ones merged in.
        let head = |i: usize| {
            if i < nf {
                &self.fixed[i]
            } else {
                &self.dynamic[i - nf]
            }
        };
        let total: usize = self
            .family_order
            .iter()
            .filter(|&&i| !bufs[i].is_empty())
            .map(|&i| head(i).head.len() + bufs[i].len())
            .sum::<usize>()
            + statics.iter().map(|(_, t)| t.len()).sum::<usize>();
        let mut out = Vec::with_capacity(total);
        let mut st = statics.iter().peekable();
        for &i in &self.family_order {
            let h = head(i);
            while let Some((_, text)) = st.next_if(|(name, _)| name.as_str() < h.name.as_str()) {
                out.extend_from_slice(text);
            }
            if !bufs[i].is_empty() {
                out.extend_from_slice(h.head.as_bytes());
                out.extend_from_slice(bufs[i].as_bytes());
            }
        }
        for (_, text) in st {
            out.extend_from_slice(text);
        }
        out
    }
}

/// Discriminants of `FIXED` in table order (they must be 0, 1, 2…).
#[cfg(test)]
pub(crate) fn fixed_order() -> Vec<usize> {
    FIXED.iter().map(|(f, ..)| *f as usize).collect()
}
