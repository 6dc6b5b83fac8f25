//! JSON (and CSV) handlers of `/api/v1/…`, `/healthz` and `/readyz`. They
//! read the latest snapshot of a channel with one atomic load and its
//! counters with relaxed loads; nothing here can block a DSP worker.

use std::fmt::Write as _;
use std::sync::Arc;

use axum::extract::rejection::QueryRejection;
use axum::extract::{Path, Query};
use axum::response::{IntoResponse, Response};
use axum::Json;
use serde::Serialize;
use serde_json::Value;
use utoipa::{IntoParams, ToSchema};

use crate::clock::unix_now_ns;
use crate::config::{AlarmTarget, AveragingMode, BandEdges, ChannelSpec};
use crate::counters::SourceCounters;
use crate::counters::{ChannelCounters, GapReason};
use crate::dsp::bands::BandStatus;
use crate::http::error::{ApiError, ErrorBody};
use crate::http::export::{self, Amp, Format, Plot, Span};
use crate::http::scaling::{line_range, Conversion, Scaling};
use crate::http::Live;
use crate::pipeline::state::{AppState, ChannelShared, ChannelSnapshot, MachineShared};
use crate::pipeline::trend::OVERALL_MEASURES;
use crate::units::{convertible, Unit};

/// Shortest time after which a channel counts as stale, whatever its rate.
const MIN_STALE_SECONDS: f64 = 2.0;
/// A channel is stale after this many missed publications.
const STALE_INTERVALS: f64 = 3.0;

// ---------------------------------------------------------------------------
// Query strings
// ---------------------------------------------------------------------------

/// The query string as key/value pairs, checked against the keys a handler
/// knows: an unknown or repeated key is a 400 naming it, so a typo such as
/// `fmn=` is not silently ignored.
pub(crate) struct Params(Vec<(String, String)>);

impl Params {
    pub(crate) fn new(
        q: Result<Query<Vec<(String, String)>>, QueryRejection>,
        known: &[&str],
    ) -> Result<Params, ApiError> {
        let Query(pairs) =
            q.map_err(|_| ApiError::BadQuery("the query string is not valid URL encoding".into()))?;
        for (i, (k, _)) in pairs.iter().enumerate() {
            if !known.contains(&k.as_str()) {
                return Err(ApiError::BadQuery(format!(
                    "unknown query parameter {k:?} (known: {})",
                    known.join(", ")
                )));
            }
            if pairs[..i].iter().any(|(k2, _)| k2 == k) {
                return Err(ApiError::BadQuery(format!(
                    "query parameter {k:?} is given more than once"
                )));
            }
        }
        Ok(Params(pairs))
    }

    /// As [`Params::new`], with the keys of the query type `Q` (the type the
    /// OpenAPI document describes the query string with), in its order.
    pub(crate) fn of<Q: IntoParams>(
        q: Result<Query<Vec<(String, String)>>, QueryRejection>,
    ) -> Result<Params, ApiError> {
        let names = query_names::<Q>();
        let known: Vec<&str> = names.iter().map(String::as_str).collect();
        Params::new(q, &known)
    }

    pub(crate) fn get(&self, key: &str) -> Option<&str> {
        self.0
            .iter()
            .find(|(k, _)| k == key)
            .map(|(_, v)| v.as_str())
    }

    pub(crate) fn f64(&self, key: &str) -> Result<Option<f64>, ApiError> {
        self.get(key)
            .map(|v| {
                v.trim().parse::<f64>().map_err(|_| {
                    ApiError::BadQuery(format!("{key}={v:?} is not a number (frequency in Hz)"))
                })
            })
            .transpose()
    }

    /// `format=json` (default), `csv` or `svg`.
    pub(crate) fn format(&self) -> Result<Format, ApiError> {
        Format::parse(self.get("format"))
    }
}

/// The query keys a handler takes: the fields of its query type.
pub(crate) fn query_names<Q: IntoParams>() -> Vec<String> {
    Q::into_params(|| Some(utoipa::openapi::path::ParameterIn::Query))
        .into_iter()
        .map(|p| p.name)
        .collect()
}

/// A string schema with a fixed set of values (the query's vocabularies,
/// taken from the same lists the handlers parse with).
pub(crate) fn enum_schema<'a>(
    values: impl IntoIterator<Item = &'a str>,
) -> utoipa::openapi::Object {
    utoipa::openapi::ObjectBuilder::new()
        .schema_type(utoipa::openapi::schema::Type::String)
        .enum_values(Some(values.into_iter().map(str::to_string)))
        .build()
}

/// `format=`: the values [`Format::parse`] takes.
pub(crate) const FORMATS: [&str; 3] = ["json", "csv", "svg"];
/// `amp=`: the values [`Amp::parse`] takes.
pub(crate) const AMPS: [&str; 2] = ["linear", "log"];

fn format_schema() -> utoipa::openapi::Object {
    enum_schema(FORMATS)
}

fn amp_schema() -> utoipa::openapi::Object {
    enum_schema(AMPS)
}

fn scaling_schema() -> utoipa::openapi::Object {
    enum_schema(Scaling::ALL.map(Scaling::as_str))
}

fn unit_schema() -> utoipa::openapi::Object {
    enum_schema(Unit::all().map(|u| u.symbol))
}

/// A body as a JSON value, whose objects keep their keys in alphabetical
/// order: the order these endpoints have always written (they were built
/// as `serde_json::Value`s before they had types).
pub(crate) fn sorted<T: Serialize>(body: &T) -> Result<Value, ApiError> {
    serde_json::to_value(body).map_err(|e| {
        tracing::error!(error = %e, "cannot serialise a response body");
        ApiError::Internal
    })
}

// ---------------------------------------------------------------------------
// Shared pieces
// ---------------------------------------------------------------------------

/// RFC 3339 UTC time with nanoseconds, e.g. `2023-11-14T22:13:20.123456789Z`;
/// `None` for 0 (unknown) or a time `time` cannot represent.
pub(crate) fn rfc3339_ns(ns: u64) -> Option<String> {
    if ns == 0 {
        return None;
    }
    let t = time::OffsetDateTime::from_unix_timestamp_nanos(i128::from(ns)).ok()?;
    Some(format!(
        "{:04}-{:02}-{:02}T{:02}:{:02}:{:02}.{:09}Z",
        t.year(),
        u8::from(t.month()),
        t.day(),
        t.hour(),
        t.minute(),
        t.second(),
        t.nanosecond()
    ))
}

pub(crate) fn averaging_str(mode: AveragingMode) -> &'static str {
    mode.as_str()
}

/// Seconds between two publications of a channel: every `count` blocks for
/// linear and peak-hold averaging, every block for exponential and none.
pub(crate) fn expected_interval_seconds(spec: &ChannelSpec) -> f64 {
    let blocks = match spec.averaging {
        AveragingMode::Linear | AveragingMode::PeakHold => spec.average_count.max(1),
        AveragingMode::Exponential | AveragingMode::None => 1,
    };
    spec.hop as f64 * f64::from(blocks) / spec.sample_rate_hz
}

/// Age after which the spectrum counts as stale:
/// max(3 × expected interval, 2 s).
pub(crate) fn stale_after_seconds(spec: &ChannelSpec) -> f64 {
    (STALE_INTERVALS * expected_interval_seconds(spec)).max(MIN_STALE_SECONDS)
}

fn age_seconds(snap: &ChannelSnapshot, now_ns: u64) -> f64 {
    now_ns.saturating_sub(snap.published_unix_ns) as f64 * 1e-9
}

pub(crate) fn channel_of<'a>(
    app: &'a AppState,
    name: &str,
) -> Result<&'a Arc<ChannelShared>, ApiError> {
    app.channel(name)
        .ok_or_else(|| ApiError::UnknownChannel(name.to_string()))
}

fn latest_of(ch: &ChannelShared) -> Result<Arc<ChannelSnapshot>, ApiError> {
    ch.latest()
        .ok_or_else(|| ApiError::NoSnapshot(ch.spec.name.clone()))
}

// ---------------------------------------------------------------------------
// Health
// ---------------------------------------------------------------------------

/// `GET /healthz`.
#[derive(Serialize, ToSchema)]
pub struct Health {
    /// Always "ok": the process answers.
    #[schema(value_type = String, example = "ok")]
    status: &'static str,
}

/// `GET /readyz` when every channel has published.
#[derive(Serialize, ToSchema)]
pub struct Ready {
    /// How many channels there are.
    channels: usize,
    /// Always "ready".
    #[schema(value_type = String, example = "ready")]
    status: &'static str,
}

/// Liveness: the process answers.
#[utoipa::path(get, path = "/healthz", tag = "health",
    responses((status = 200, description = "The process answers", body = Health)))]
pub async fn healthz() -> Json<Health> {
    Json(Health { status: "ok" })
}

/// Readiness: every channel has published a first spectrum.
#[utoipa::path(get, path = "/readyz", tag = "health", responses(
    (status = 200, description = "Every channel has published a spectrum", body = Ready),
    (status = 503, description = "Some channels have not published yet (`waiting` names them)", body = ErrorBody),
))]
pub async fn readyz(Live(st): Live) -> Result<Json<Ready>, ApiError> {
    let waiting: Vec<String> = st
        .app
        .channels
        .iter()
        .filter(|c| c.snapshot.load().is_none())
        .map(|c| c.spec.name.clone())
        .collect();
    if waiting.is_empty() {
        Ok(Json(Ready {
            channels: st.app.channels.len(),
            status: "ready",
        }))
    } else {
        Err(ApiError::Waiting(waiting))
    }
}

// ---------------------------------------------------------------------------
// Channels
// ---------------------------------------------------------------------------

/// A DAQ source.
#[derive(Serialize, ToSchema)]
pub struct SourceInfo<'a> {
    name: &'a str,
    /// The source kind (e.g. "sim", "tcp-connect"); "unknown" when the
    /// state holds no such source.
    kind: &'a str,
    /// `connected` or `disconnected`.
    #[schema(value_type = String, pattern = "^(connected|disconnected)$")]
    state: &'static str,
    /// Seconds since the last good frame (null: none yet).
    last_frame_age_seconds: Option<f64>,
    /// The source's counters (as in `/metrics`); null when the state
    /// holds no such source.
    counters: Option<SourceCountersBody>,
}

/// A source's counters (fields in alphabetical order, as always written).
#[derive(Serialize, ToSchema)]
pub struct SourceCountersBody {
    bytes: u64,
    connections: u64,
    crc_errors: u64,
    frames: u64,
    late_frames: u64,
    missing_samples: u64,
    /// Rejected frames by reason.
    rejected: std::collections::BTreeMap<String, u64>,
    resyncs: u64,
    skipped_bytes: u64,
}

#[derive(Serialize, ToSchema)]
pub struct Averaging {
    /// "none", "linear", "exponential" or "peak-hold".
    #[schema(value_type = String)]
    mode: &'static str,
    count: u32,
}

/// One channel as `GET /api/v1/channels` lists it.
#[derive(Serialize, ToSchema)]
pub struct ChannelSummary<'a> {
    name: &'a str,
    /// Sensor health: true OK, false not OK (alarms inhibited), null before
    /// the first data.
    health_ok: Option<bool>,
    /// The most severe alarm state of the channel: "normal", "alert",
    /// "danger", "inhibited", or null without alarms.
    #[schema(value_type = Option<String>)]
    alarm_state: Option<&'static str>,
    #[schema(value_type = String)]
    unit: &'static str,
    #[schema(value_type = String)]
    quantity: &'static str,
    /// Every unit the spectrum endpoint's `unit=` takes for this channel
    /// (its own first), and every `scaling=`.
    #[schema(value_type = Vec<String>)]
    spectrum_units: Vec<&'static str>,
    #[schema(value_type = Vec<String>)]
    spectrum_scalings: Vec<&'static str>,
    sample_rate_hz: f64,
    block: usize,
    nfft: usize,
    hop: usize,
    #[schema(value_type = String)]
    window: &'static str,
    overlap: f64,
    averaging: Averaging,
    source: SourceInfo<'a>,
    /// Seconds between publications the config implies.
    /// The machine whose speed the order bands follow, with that speed now.
    machine: Option<MachineInfo<'a>>,
    /// Envelope analysis band-pass [lo, hi] Hz, if configured.
    envelope_hz: Option<[f64; 2]>,
    expected_update_interval_seconds: f64,
    /// Seconds since the latest spectrum was published; null before the first.
    spectrum_age_seconds: Option<f64>,
    /// No spectrum yet, or the latest is older than
    /// max(3 × expected interval, 2 s).
    stale: bool,
}

fn summary<'a>(
    app: &'a AppState,
    ch: &'a ChannelShared,
    snap: Option<&ChannelSnapshot>,
    now_ns: u64,
) -> ChannelSummary<'a> {
    let spec = &ch.spec;
    let source = app.source(&spec.source);
    let age = snap.map(|s| age_seconds(s, now_ns));
    let board = ch.alarm_board.load();
    let worst = board.as_ref().and_then(|b| {
        b.alarms
            .iter()
            .map(|a| a.state)
            .max_by_key(|s| match s {
                crate::alarm::state::AlarmState::Normal => 0,
                crate::alarm::state::AlarmState::Inhibited => 1,
                crate::alarm::state::AlarmState::Alert => 2,
                crate::alarm::state::AlarmState::Danger => 3,
            })
            .map(|s| s.as_str())
    });
    ChannelSummary {
        health_ok: board.as_ref().map(|b| b.health.ok),
        alarm_state: worst,
        name: &spec.name,
        unit: spec.unit.symbol,
        quantity: spec.unit.quantity.as_str(),
        spectrum_units: std::iter::once(spec.unit.symbol)
            .chain(
                Unit::all()
                    .filter(|&u| u.symbol != spec.unit.symbol && convertible(spec.unit, u))
                    .map(|u| u.symbol),
            )
            .collect(),
        spectrum_scalings: Scaling::ALL.map(Scaling::as_str).to_vec(),
        sample_rate_hz: spec.sample_rate_hz,
        block: spec.block,
        nfft: spec.nfft,
        hop: spec.hop,
        window: spec.window.as_str(),
        overlap: spec.overlap,
        averaging: Averaging {
            mode: averaging_str(spec.averaging),
            count: spec.average_count,
        },
        source: source_info(&spec.source, source.map(|s| &**s), now_ns),
        machine: spec
            .machine
            .as_deref()
            .map(|m| machine_info(m, app.machine(m).map(|x| &**x))),
        envelope_hz: spec.envelope.map(|(a, b)| [a, b]),
        expected_update_interval_seconds: expected_interval_seconds(spec),
        spectrum_age_seconds: age,
        stale: age.is_none_or(|a| a > stale_after_seconds(spec)),
    }
}

/// A source as the channel JSON and the overview show it.
fn source_info<'a>(name: &'a str, source: Option<&SourceCounters>, now_ns: u64) -> SourceInfo<'a> {
    SourceInfo {
        name,
        kind: source.map_or("unknown", |s| s.kind),
        state: if source.is_some_and(|s| s.is_connected()) {
            "connected"
        } else {
            "disconnected"
        },
        last_frame_age_seconds: source
            .map(|s| SourceCounters::get(&s.last_frame_unix_ns))
            .filter(|&t| t != 0)
            .map(|t| now_ns.saturating_sub(t) as f64 * 1e-9),
        counters: source.map(|s| {
            let g = SourceCounters::get;
            SourceCountersBody {
                bytes: g(&s.bytes),
                connections: g(&s.connections),
                crc_errors: g(&s.crc_errors),
                frames: g(&s.frames),
                late_frames: g(&s.frames_late),
                missing_samples: g(&s.samples_missing),
                rejected: s
                    .rejected()
                    .into_iter()
                    .map(|(k, v)| (k.to_string(), v))
                    .collect(),
                resyncs: g(&s.resyncs),
                skipped_bytes: g(&s.bytes_skipped),
            }
        }),
    }
}

/// A machine as the channel JSON and the overview show it (`machine`:
/// None when the config names one the state does not hold).
fn machine_info<'a>(name: &'a str, machine: Option<&MachineShared>) -> MachineInfo<'a> {
    let speed_hz = machine.and_then(|x| x.speed_hz());
    MachineInfo {
        name,
        speed_source: machine.map_or("unknown", |x| x.spec.speed.as_str()),
        speed_hz,
        speed_rpm: speed_hz.map(|hz| hz * 60.0),
        speed_late_results: machine.map_or(0, |x| x.late_results()),
    }
}

/// `GET /api/v1/channels`.
#[derive(Serialize, ToSchema)]
pub struct ChannelList<'a> {
    /// Config order.
    channels: Vec<ChannelSummary<'a>>,
}

/// Every channel, summarised.
#[utoipa::path(get, path = "/api/v1/channels", tag = "channels", responses(
    (status = 200, description = "Every channel, config order", body = ChannelList),
    (status = 500, description = "A body could not be serialised (logged)", body = ErrorBody),
))]
pub async fn list_channels(Live(st): Live) -> Result<Json<Value>, ApiError> {
    let now = unix_now_ns();
    let snaps: Vec<_> = st.app.channels.iter().map(|ch| ch.latest()).collect();
    let channels = st
        .app
        .channels
        .iter()
        .zip(&snaps)
        .map(|(ch, snap)| summary(&st.app, ch, snap.as_deref(), now))
        .collect();
    Ok(Json(sorted(&ChannelList { channels })?))
}

/// A machine whose running speed order bands follow.
#[derive(Serialize, ToSchema)]
pub struct MachineInfo<'a> {
    name: &'a str,
    /// "fixed", "tach" or "peak" ("unknown" when the state holds no such
    /// machine).
    #[schema(value_type = String)]
    speed_source: &'static str,
    /// Null while the speed is unknown or stale.
    speed_hz: Option<f64>,
    speed_rpm: Option<f64>,
    /// Results (of any channel following this machine) whose order bands
    /// were evaluated before the speed was measured through their signal
    /// time (README "Orders": the wait ran out).
    speed_late_results: u64,
}

/// A machine in the overview: [`MachineInfo`] and when its speed was
/// last measured.
#[derive(Serialize, ToSchema)]
pub struct MachineState<'a> {
    #[serde(flatten)]
    machine: MachineInfo<'a>,
    /// When the speed was last measured (null: fixed speed, or never).
    speed_updated: Option<String>,
}

/// A band of a channel, with its latest value.
#[derive(Serialize, ToSchema)]
pub struct BandInfo<'a> {
    name: &'a str,
    /// Edges in Hz: fixed, or (order and bearing bands) at the speed of the
    /// latest spectrum; null while that speed is unknown.
    lo_hz: Option<f64>,
    hi_hz: Option<f64>,
    /// Order windows [lo, hi] for order and bearing bands.
    orders: Option<Vec<[f64; 2]>>,
    bearing: Option<&'a str>,
    #[schema(value_type = Option<String>)]
    defect: Option<&'static str>,
    /// "raw" or "envelope": which spectrum the band reads.
    #[schema(value_type = String)]
    spectrum: &'static str,
    /// "ok", or why there is no value: "no_speed", "above_nyquist", "no_line".
    /// Null before the first spectrum.
    #[schema(value_type = Option<String>)]
    status: Option<&'static str>,
    #[schema(value_type = String)]
    measure: &'static str,
    #[schema(value_type = String)]
    unit: &'static str,
    #[schema(value_type = String)]
    quantity: &'static str,
    /// Null before the first spectrum.
    value: Option<f64>,
    peak_hz: Option<f64>,
}

/// Overall levels of the latest block, in the channel's unit.
#[derive(Serialize, ToSchema)]
pub struct OverallInfo {
    mean: f64,
    rms: f64,
    peak: f64,
    peak_to_peak: f64,
    /// peak / RMS (0 when the RMS is 0).
    crest_factor: f64,
    #[schema(value_type = String)]
    unit: &'static str,
}

/// A channel's sample counters (as in `/metrics`).
#[derive(Serialize, ToSchema)]
pub struct ChannelCountersBody {
    blocks: u64,
    /// Discontinuities by reason.
    discontinuities: std::collections::BTreeMap<String, u64>,
    samples_dropped: std::collections::BTreeMap<String, u64>,
    samples_dropped_total: u64,
    samples_in: u64,
    samples_processed: u64,
    spectra: u64,
}

/// Where the latest spectrum sits in the sample stream.
#[derive(Serialize, ToSchema)]
pub struct SpectrumPlace {
    averages: u32,
    end_sample: u64,
    first_sample: u64,
    oldest_first_sample: u64,
    /// When the worker published it.
    published: Option<String>,
    seq: u64,
    /// Time of `first_sample`, from the frames.
    timestamp: Option<String>,
}

fn reasons(f: impl Fn(GapReason) -> u64) -> std::collections::BTreeMap<String, u64> {
    GapReason::ALL
        .iter()
        .map(|&r| (r.as_str().to_string(), f(r)))
        .collect()
}

fn counters_body(c: &ChannelCounters) -> ChannelCountersBody {
    ChannelCountersBody {
        blocks: ChannelCounters::get(&c.blocks),
        discontinuities: reasons(|r| c.discontinuities(r)),
        samples_dropped: reasons(|r| c.dropped(r)),
        samples_dropped_total: c.dropped_total(),
        samples_in: ChannelCounters::get(&c.samples_in),
        samples_processed: ChannelCounters::get(&c.samples_processed),
        spectra: ChannelCounters::get(&c.spectra),
    }
}

/// The body of `GET /api/v1/channels/{name}`: the summary of the list,
/// then bands, health, alarms, overall levels, counters and the latest
/// spectrum's place. The overview holds one per channel.
#[derive(Serialize, ToSchema)]
pub struct ChannelDetail<'a> {
    #[serde(flatten)]
    summary: ChannelSummary<'a>,
    integration_low_cut_hz: f64,
    bands: Vec<BandInfo<'a>>,
    health: crate::http::alarms::HealthBody,
    alarms: Vec<crate::http::alarms::AlarmBody>,
    /// Null before the first spectrum.
    overall: Option<OverallInfo>,
    counters: ChannelCountersBody,
    /// The latest spectrum's place; null before the first.
    spectrum: Option<SpectrumPlace>,
}

/// One channel: settings, bands, health, alarms, levels and counters.
#[utoipa::path(get, path = "/api/v1/channels/{name}", tag = "channels",
    params(("name" = String, Path, description = "Channel name")),
    responses(
        (status = 200, description = "The channel", body = ChannelDetail),
        (status = 404, description = "No such channel", body = ErrorBody),
        (status = 500, description = "A body could not be serialised (logged)", body = ErrorBody),
    ))]
pub async fn channel_detail(
    Live(st): Live,
    Path(name): Path<String>,
) -> Result<Json<Value>, ApiError> {
    let ch = channel_of(&st.app, &name)?;
    Ok(Json(detail(&st.app, ch, unix_now_ns())?))
}

/// [`ChannelDetail`] of a channel as a JSON value (keys sorted).
fn detail(app: &AppState, ch: &ChannelShared, now_ns: u64) -> Result<Value, ApiError> {
    let snap = ch.latest();
    let spec = &ch.spec;
    let bands: Vec<BandInfo> = spec
        .bands
        .iter()
        .enumerate()
        .map(|(i, b)| {
            let v = snap.as_ref().and_then(|s| s.bands.get(i));
            let (lo_hz, hi_hz, orders) = match &b.edges {
                BandEdges::Hz { lo, hi } => (Some(*lo), Some(*hi), None),
                BandEdges::Orders { windows } => (
                    v.map(|v| v.lo_hz).filter(|x| {
                        x.is_finite() && v.is_some_and(|v| v.status != BandStatus::NoSpeed)
                    }),
                    v.map(|v| v.hi_hz).filter(|x| {
                        x.is_finite() && v.is_some_and(|v| v.status != BandStatus::NoSpeed)
                    }),
                    Some(windows.iter().map(|w| [w.0, w.1]).collect()),
                ),
            };
            BandInfo {
                name: &b.name,
                lo_hz,
                hi_hz,
                orders,
                bearing: b.bearing.as_ref().map(|(n, _)| n.as_str()),
                defect: b.bearing.as_ref().map(|(_, d)| d.as_str()),
                spectrum: b.spectrum.as_str(),
                status: v.map(|v| v.status.as_str()),
                measure: b.measure.as_str(),
                unit: b.unit.symbol,
                quantity: b.unit.quantity.as_str(),
                value: v.filter(|v| v.is_ok()).map(|v| v.value),
                peak_hz: v.filter(|v| v.is_ok()).map(|v| v.peak_hz),
            }
        })
        .collect();
    let overall = snap.as_ref().map(|s| OverallInfo {
        mean: s.overall.mean,
        rms: s.overall.rms,
        peak: s.overall.peak,
        peak_to_peak: s.overall.peak_to_peak,
        crest_factor: s.overall.crest_factor,
        unit: spec.unit.symbol,
    });
    let (health, alarms) = crate::http::alarms::board_body(ch);
    sorted(&ChannelDetail {
        summary: summary(app, ch, snap.as_deref(), now_ns),
        integration_low_cut_hz: spec.integration_low_cut_hz,
        bands,
        health,
        alarms,
        overall,
        counters: counters_body(&ch.counters),
        spectrum: snap.as_ref().map(|s| SpectrumPlace {
            averages: s.averages,
            end_sample: s.first_sample + spec.block as u64,
            first_sample: s.first_sample,
            oldest_first_sample: s.oldest_first_sample,
            published: rfc3339_ns(s.published_unix_ns),
            seq: s.seq,
            timestamp: rfc3339_ns(s.timestamp_ns),
        }),
    })
}

// ---------------------------------------------------------------------------
// Overview
// ---------------------------------------------------------------------------

/// `GET /api/v1/overview`. Channels and machines keep their keys sorted
/// (as the channel endpoint writes them), the top level and the sources
/// in field order, as always.
#[derive(Serialize, ToSchema)]
pub struct Overview<'a> {
    /// When the body was made.
    time: Option<String>,
    /// Each one a [`ChannelDetail`].
    #[schema(value_type = Vec<ChannelDetail>)]
    channels: Vec<Value>,
    /// Each one a [`MachineState`].
    #[schema(value_type = Vec<MachineState>)]
    machines: Vec<Value>,
    sources: Vec<SourceInfo<'a>>,
}

/// `GET /api/v1/overview`: what the overview page shows in one request:
/// every channel's detail (the body of `/api/v1/channels/{name}`, config
/// order), every machine (also those no channel follows) and every source.
#[utoipa::path(get, path = "/api/v1/overview", tag = "channels", responses(
    (status = 200, description = "Every channel's detail, every machine and source", body = Overview),
    (status = 500, description = "A body could not be serialised (logged)", body = ErrorBody),
))]
pub async fn overview(Live(st): Live) -> Result<Response, ApiError> {
    let now = unix_now_ns();
    let app = &st.app;
    let channels = app
        .channels
        .iter()
        .map(|ch| detail(app, ch, now))
        .collect::<Result<Vec<Value>, ApiError>>()?;
    let machines = app
        .machines
        .iter()
        .map(|m| {
            sorted(&MachineState {
                machine: machine_info(&m.spec.name, Some(m)),
                speed_updated: m
                    .is_measured()
                    .then(|| rfc3339_ns(m.updated_unix_ns()))
                    .flatten(),
            })
        })
        .collect::<Result<Vec<Value>, ApiError>>()?;
    let sources: Vec<SourceInfo> = app
        .sources
        .iter()
        .map(|s| source_info(&s.name, Some(s), now))
        .collect();
    // A struct, not `json!`: the macro would copy every channel's value.
    Ok(Json(Overview {
        time: rfc3339_ns(now),
        channels,
        machines,
        sources,
    })
    .into_response())
}

// ---------------------------------------------------------------------------
// Trend
// ---------------------------------------------------------------------------

/// One series of a trend: per second, the min, max and last value (null
/// where there was no ok value).
#[derive(Serialize, ToSchema)]
pub struct TrendSeries<'a> {
    /// The band (bands only).
    #[serde(skip_serializing_if = "Option::is_none")]
    name: Option<&'a str>,
    #[schema(value_type = String)]
    unit: &'static str,
    /// The band's measure (bands only).
    #[serde(skip_serializing_if = "Option::is_none")]
    #[schema(value_type = String)]
    measure: Option<&'static str>,
    /// The alarm's limits now (null without an alarm on this value, or
    /// while a baseline is being learned).
    alert_limit: Option<f64>,
    danger_limit: Option<f64>,
    min: Vec<Option<f32>>,
    max: Vec<Option<f32>>,
    last: Vec<Option<f32>>,
}

/// `GET /api/v1/channels/{name}/trend`.
#[derive(Serialize, ToSchema)]
pub struct Trend<'a> {
    bands: Vec<TrendSeries<'a>>,
    capacity_seconds: usize,
    channel: &'a str,
    /// Seconds between points: 1.
    interval_s: u32,
    /// The overall levels by measure: rms, peak, peak_to_peak,
    /// crest_factor, mean.
    overall: std::collections::BTreeMap<&'static str, TrendSeries<'a>>,
    /// Unix seconds of the points, oldest first.
    t: Vec<u64>,
}

/// The query of the trend endpoint.
#[derive(IntoParams)]
#[into_params(parameter_in = Query)]
#[allow(dead_code)] // describes the query string; `Params` reads it
pub struct TrendQuery {
    /// Seconds of trend, newest last (default, and at most, what the
    /// channel keeps: `[server] trend_seconds`).
    #[param(minimum = 1)]
    seconds: Option<u64>,
}

/// `GET /api/v1/channels/{name}/trend?seconds=N`: the channel's trend
/// (`pipeline::trend`), columnar, oldest point first; `seconds` defaults
/// to (and is cut to) what the channel keeps.
#[utoipa::path(get, path = "/api/v1/channels/{name}/trend", tag = "channels",
    params(("name" = String, Path, description = "Channel name"), TrendQuery),
    responses(
        (status = 200, description = "The trend, columnar", body = Trend),
        (status = 400, description = "A query parameter is unknown, repeated or out of range", body = ErrorBody),
        (status = 404, description = "No such channel", body = ErrorBody),
        (status = 500, description = "A body could not be serialised (logged)", body = ErrorBody),
    ))]
pub async fn trend(
    Live(st): Live,
    Path(name): Path<String>,
    q: Result<Query<Vec<(String, String)>>, QueryRejection>,
) -> Result<Json<Value>, ApiError> {
    let params = Params::of::<TrendQuery>(q)?;
    let ch = channel_of(&st.app, &name)?;
    let spec = &ch.spec;
    let capacity = ch.trend.capacity_seconds();
    let seconds = match params.get("seconds") {
        None => capacity,
        Some(v) => match v.trim().parse::<usize>() {
            Ok(n) if n >= 1 => n.min(capacity),
            _ => {
                return Err(ApiError::BadQuery(format!(
                    "seconds={v:?} is not a whole number of seconds, 1 or more"
                )))
            }
        },
    };
    let cols = ch.trend.read(seconds, unix_now_ns() / 1_000_000_000);
    let board = ch.alarm_board.load();
    let limits = |target: AlarmTarget| -> (Option<f64>, Option<f64>) {
        let Some(k) = spec.alarms.iter().position(|a| a.target == target) else {
            return (None, None);
        };
        board
            .as_ref()
            .and_then(|b| b.alarms.get(k))
            .map_or((None, None), |a| (a.alert_limit, a.danger_limit))
    };
    let mut series = cols.series.into_iter();
    let mut overall = std::collections::BTreeMap::new();
    for measure in OVERALL_MEASURES {
        let s = series.next().unwrap_or_default();
        let target = match measure {
            "rms" => Some(AlarmTarget::OverallRms),
            "peak" => Some(AlarmTarget::OverallPeak),
            "crest_factor" => Some(AlarmTarget::CrestFactor),
            _ => None,
        };
        let (alert_limit, danger_limit) = target.map_or((None, None), limits);
        overall.insert(
            measure,
            TrendSeries {
                name: None,
                unit: if measure == "crest_factor" {
                    "1"
                } else {
                    spec.unit.symbol
                },
                measure: None,
                alert_limit,
                danger_limit,
                min: s.min,
                max: s.max,
                last: s.last,
            },
        );
    }
    let bands: Vec<TrendSeries> = spec
        .bands
        .iter()
        .enumerate()
        .map(|(i, b)| {
            let s = series.next().unwrap_or_default();
            let (alert_limit, danger_limit) = limits(AlarmTarget::Band(i));
            TrendSeries {
                name: Some(&b.name),
                unit: b.unit.symbol,
                measure: Some(b.measure.as_str()),
                alert_limit,
                danger_limit,
                min: s.min,
                max: s.max,
                last: s.last,
            }
        })
        .collect();
    Ok(Json(sorted(&Trend {
        bands,
        capacity_seconds: capacity,
        channel: &spec.name,
        interval_s: 1,
        overall,
        t: cols.t,
    })?))
}

// ---------------------------------------------------------------------------
// Spectrum
// ---------------------------------------------------------------------------

/// `GET /api/v1/channels/{name}/spectrum` (JSON).
#[derive(Serialize, ToSchema)]
pub struct SpectrumBody<'a> {
    /// "raw", or "envelope" for the envelope spectrum (`?spectrum=envelope`).
    #[schema(value_type = String)]
    spectrum: &'static str,
    /// Running speed of the channel's machine when the spectrum was made, Hz.
    speed_hz: Option<f64>,
    channel: &'a str,
    /// Unit of `values` (e.g. `mm/s`, `g^2/Hz`).
    unit: String,
    /// Quantity of the unit asked for (acceleration, velocity…).
    #[schema(value_type = String)]
    quantity: &'static str,
    #[schema(value_type = String)]
    scaling: &'static str,
    #[schema(value_type = String)]
    window: &'a str,
    block: usize,
    nfft: usize,
    sample_rate_hz: f64,
    /// Resolution of the analysis, fs/block.
    resolution_hz: f64,
    /// Line spacing, fs/nfft.
    df_hz: f64,
    /// Equivalent noise bandwidth of the window in Hz.
    enbw_hz: f64,
    averages: u32,
    #[schema(value_type = String)]
    averaging: &'a str,
    /// Stream index of the first sample of the newest block.
    first_sample: u64,
    /// Stream index of the first sample of the oldest block averaged.
    oldest_first_sample: u64,
    /// One past the newest block's last sample: the spectrum covers
    /// `oldest_first_sample .. end_sample`, with no gap inside.
    end_sample: u64,
    /// Time of `first_sample` (the newest block's start), from the frames.
    timestamp: Option<String>,
    /// Frequency of `values[0]`.
    f0_hz: f64,
    /// Lines below this are zero when the unit integrates the channel's.
    integration_low_cut_hz: Option<f64>,
    /// One value per line from `f0_hz`, `df_hz` apart; null where the
    /// value does not fit an f32 (a power beyond f32's range).
    #[schema(value_type = Vec<Option<f32>>)]
    values: Vec<f32>,
}

/// The query of the spectrum endpoint.
#[derive(IntoParams)]
#[into_params(parameter_in = Query)]
#[allow(dead_code)] // describes the query string; `Params` reads it
pub struct SpectrumQuery {
    /// Amplitude scaling (default rms).
    #[param(schema_with = scaling_schema)]
    scaling: Option<String>,
    /// Unit of the values: the channel's (default) or one derived from it
    /// (the channel's `spectrum_units`; others are a 400).
    #[param(schema_with = unit_schema)]
    unit: Option<String>,
    /// Lowest frequency, Hz (0 to Nyquist; default 0).
    #[param(minimum = 0.0)]
    fmin: Option<f64>,
    /// Highest frequency, Hz (fmin to Nyquist; default Nyquist).
    #[param(minimum = 0.0)]
    fmax: Option<f64>,
    /// json (default), or a csv or svg download.
    #[param(schema_with = format_schema)]
    format: Option<String>,
    /// The raw spectrum (default) or the envelope spectrum (channels with
    /// envelope analysis).
    #[param(schema_with = spectrum_kind_schema)]
    spectrum: Option<String>,
    /// The image's amplitude axis (format=svg only): linear (default) or log (dB).
    #[param(schema_with = amp_schema)]
    amp: Option<String>,
}

fn spectrum_kind_schema() -> utoipa::openapi::Object {
    enum_schema(["raw", "envelope"])
}

/// A channel's latest averaged spectrum, scaled and cropped; or a CSV or
/// SVG download of it.
#[utoipa::path(get, path = "/api/v1/channels/{name}/spectrum", tag = "channels",
    params(("name" = String, Path, description = "Channel name"), SpectrumQuery),
    responses(
        (status = 200, description = "The spectrum (JSON), or a download (`format=csv|svg`)",
            content(
                (SpectrumBody = "application/json"),
                (String = "text/csv"),
                (String = "image/svg+xml"),
            )),
        (status = 400, description = "A query parameter is unknown, repeated, out of range or does not apply to the channel", body = ErrorBody),
        (status = 404, description = "No such channel", body = ErrorBody),
        (status = 503, description = "No spectrum published yet", body = ErrorBody),
    ))]
pub async fn spectrum(
    Live(st): Live,
    Path(name): Path<String>,
    q: Result<Query<Vec<(String, String)>>, QueryRejection>,
) -> Result<Response, ApiError> {
    let params = Params::of::<SpectrumQuery>(q)?;
    let ch = channel_of(&st.app, &name)?;
    let spec = &ch.spec;
    let scaling = parse_scaling(&params)?;
    let to = parse_unit(&params, &spec.name, spec.unit)?;
    let format = params.format()?;
    let amp = Amp::parse(params.get("amp"), format)?;
    let range = line_range(
        params.f64("fmin")?,
        params.f64("fmax")?,
        spec.df_hz(),
        spec.bins(),
    )
    .map_err(|e| ApiError::BadQuery(e.to_string()))?;
    let snap = latest_of(ch)?;
    let envelope = parse_kind(&params)?;
    let src = SpectrumSource {
        channel: &spec.name,
        unit: spec.unit,
        sample_rate_hz: spec.sample_rate_hz,
        block: spec.block,
        nfft: spec.nfft,
        window: spec.window.as_str(),
        enbw_hz: ch.noise_bandwidth_hz(),
        averaging: averaging_str(spec.averaging),
        averages: snap.averages,
        first_sample: snap.first_sample,
        oldest_first_sample: snap.oldest_first_sample,
        timestamp_ns: snap.timestamp_ns,
        speed_hz: snap.speed_hz,
        integration_low_cut_hz: spec.integration_low_cut_hz,
        power: &snap.power,
        envelope: &snap.envelope_power,
    };
    let ask = SpectrumAsk {
        scaling,
        to,
        range,
        envelope,
    };
    src.check(&ask)?;
    let values = src.values(&ask);
    let f0_hz = *ask.range.start() as f64 * spec.df_hz();
    let unit = scaling.unit_label(to);
    match format {
        Format::Json => {}
        Format::Csv => return Ok(src.csv(&ask, &values)),
        Format::Svg => {
            let (spans, notes) = band_table(ch, &snap, Some(envelope));
            let db = matches!(amp, Amp::Log);
            let mut info = vec![
                format!(
                    "Channel {} · {} · {} {} ({})",
                    spec.name,
                    rfc3339_ns(snap.timestamp_ns).unwrap_or_else(|| "time unknown".into()),
                    scaling.as_str(),
                    unit,
                    to.quantity.as_str()
                ),
                format!(
                    "Resolution {} Hz · df {} Hz · window {} · {} averages ({}) · sample rate {} Hz · block {} · nfft {}",
                    num(spec.sample_rate_hz / spec.block as f64),
                    num(spec.df_hz()),
                    spec.window.as_str(),
                    snap.averages,
                    averaging_str(spec.averaging),
                    num(spec.sample_rate_hz),
                    spec.block,
                    spec.nfft
                ),
            ];
            let mut third = Vec::new();
            if envelope {
                if let Some((lo, hi)) = spec.envelope {
                    third.push(format!("envelope band-pass {} to {} Hz", num(lo), num(hi)));
                }
            }
            if let Some(s) = snap.speed_hz {
                third.push(format!(
                    "running speed {} Hz ({} rpm)",
                    num(s),
                    num(s * 60.0)
                ));
            }
            if !third.is_empty() {
                info.push(third.join(" · "));
            }
            let plot = Plot {
                title: format!(
                    "{} {}",
                    spec.name,
                    if envelope {
                        "envelope spectrum"
                    } else {
                        "spectrum"
                    }
                ),
                info,
                x_label: "Frequency (Hz)".into(),
                y_label: if db {
                    format!("{} (dB re 1 {unit})", scaling.as_str())
                } else {
                    format!("{} ({unit})", scaling.as_str())
                },
                x0: f0_hz,
                dx: spec.df_hz(),
                values: &values,
                db_factor: db.then_some(match scaling {
                    Scaling::Power | Scaling::Psd => 10.0,
                    _ => 20.0,
                }),
                spans,
                notes,
            };
            let what = if envelope {
                "envelope-spectrum"
            } else {
                "spectrum"
            };
            let name = export::filename(&[&spec.name, what], snap.timestamp_ns, "svg");
            return Ok(export::attachment(export::SVG, &name, export::svg(&plot)));
        }
    }
    Ok(Json(src.body(&ask, values)).into_response())
}

/// `scaling=` (default rms).
pub(crate) fn parse_scaling(params: &Params) -> Result<Scaling, ApiError> {
    match params.get("scaling") {
        None => Ok(Scaling::Rms),
        Some(s) => Scaling::parse(s).ok_or_else(|| {
            ApiError::BadQuery(format!(
                "scaling={s:?} is not known (known: {})",
                Scaling::known()
            ))
        }),
    }
}

/// `unit=` (default the channel's `unit`): one derived from it.
pub(crate) fn parse_unit(params: &Params, channel: &str, unit: Unit) -> Result<Unit, ApiError> {
    let Some(s) = params.get("unit") else {
        return Ok(unit);
    };
    let u = Unit::parse(s).ok_or_else(|| {
        ApiError::BadQuery(format!(
            "unit={s:?} is not known (known: {})",
            Unit::known()
        ))
    })?;
    if !convertible(unit, u) {
        return Err(ApiError::BadQuery(format!(
            "unit={s:?} ({}) cannot be derived from channel {channel:?} in {unit} ({})",
            u.quantity.as_str(),
            unit.quantity.as_str()
        )));
    }
    Ok(u)
}

/// `spectrum=raw` (default) or `envelope`: whether the envelope is asked.
pub(crate) fn parse_kind(params: &Params) -> Result<bool, ApiError> {
    match params.get("spectrum") {
        None | Some("raw") => Ok(false),
        Some("envelope") => Ok(true),
        Some(other) => Err(ApiError::BadQuery(format!(
            "spectrum={other:?}: expected raw or envelope"
        ))),
    }
}

/// A frequency crop (`fmin=`, `fmax=`) of a spectrum of `bins` lines.
pub(crate) fn parse_range(
    params: &Params,
    df_hz: f64,
    bins: usize,
) -> Result<std::ops::RangeInclusive<usize>, ApiError> {
    line_range(params.f64("fmin")?, params.f64("fmax")?, df_hz, bins)
        .map_err(|e| ApiError::BadQuery(e.to_string()))
}

/// What a spectrum's JSON (or CSV) is made from: the analysis settings and
/// the lines, of the live snapshot or of a stored spectrum.
pub(crate) struct SpectrumSource<'a> {
    pub channel: &'a str,
    /// The channel's unit (that of the power).
    pub unit: Unit,
    pub sample_rate_hz: f64,
    pub block: usize,
    pub nfft: usize,
    pub window: &'a str,
    /// The window's noise bandwidth, Hz.
    pub enbw_hz: f64,
    pub averaging: &'a str,
    pub averages: u32,
    pub first_sample: u64,
    pub oldest_first_sample: u64,
    pub timestamp_ns: u64,
    pub speed_hz: Option<f64>,
    pub integration_low_cut_hz: f64,
    pub power: &'a [f32],
    /// Empty without envelope analysis.
    pub envelope: &'a [f32],
}

/// A spectrum request, parsed.
pub(crate) struct SpectrumAsk {
    pub scaling: Scaling,
    pub to: Unit,
    pub range: std::ops::RangeInclusive<usize>,
    pub envelope: bool,
}

impl SpectrumSource<'_> {
    pub(crate) fn df_hz(&self) -> f64 {
        self.sample_rate_hz / self.nfft as f64
    }

    /// The envelope asked of a spectrum without one, or in another quantity.
    pub(crate) fn check(&self, ask: &SpectrumAsk) -> Result<(), ApiError> {
        if ask.envelope && self.envelope.is_empty() {
            return Err(ApiError::BadQuery(format!(
                "channel {:?} has no envelope analysis configured",
                self.channel
            )));
        }
        if ask.envelope && ask.to.quantity != self.unit.quantity {
            return Err(ApiError::BadQuery(
                "the envelope spectrum is in the channel's own quantity; drop unit= or use the channel's".into(),
            ));
        }
        Ok(())
    }

    fn conversion(&self, ask: &SpectrumAsk) -> Conversion {
        Conversion {
            scaling: ask.scaling,
            from: self.unit,
            to: ask.to,
            low_cut_hz: self.integration_low_cut_hz,
            df_hz: self.df_hz(),
            noise_bw_hz: self.enbw_hz,
        }
    }

    /// The lines asked for, scaled (`http::scaling`).
    pub(crate) fn values(&self, ask: &SpectrumAsk) -> Vec<f32> {
        self.conversion(ask).apply(
            if ask.envelope {
                self.envelope
            } else {
                self.power
            },
            ask.range.clone(),
        )
    }

    /// `values` scaled by `ask` already, as the spectrum's CSV download.
    pub(crate) fn csv(&self, ask: &SpectrumAsk, values: &[f32]) -> Response {
        let first = *ask.range.start();
        let mut out = String::with_capacity(16 * values.len() + 64);
        let _ = writeln!(
            out,
            "frequency_hz,{}_{}",
            ask.scaling.as_str(),
            ask.scaling.unit_label(ask.to)
        );
        for (i, v) in values.iter().enumerate() {
            let _ = writeln!(out, "{},{}", (first + i) as f64 * self.df_hz(), v);
        }
        let what = if ask.envelope {
            "envelope-spectrum"
        } else {
            "spectrum"
        };
        let name = export::filename(&[self.channel, what], self.timestamp_ns, "csv");
        export::attachment(export::CSV, &name, out)
    }

    /// The JSON body of `values` (scaled by `ask` already).
    pub(crate) fn body(&self, ask: &SpectrumAsk, values: Vec<f32>) -> SpectrumBody<'_> {
        let integrates = matches!(
            (ask.to.quantity.kinematic_order(), self.unit.quantity.kinematic_order()),
            (Some(a), Some(b)) if a < b
        );
        SpectrumBody {
            spectrum: if ask.envelope { "envelope" } else { "raw" },
            speed_hz: self.speed_hz,
            channel: self.channel,
            unit: ask.scaling.unit_label(ask.to),
            quantity: ask.to.quantity.as_str(),
            scaling: ask.scaling.as_str(),
            window: self.window,
            block: self.block,
            nfft: self.nfft,
            sample_rate_hz: self.sample_rate_hz,
            resolution_hz: self.sample_rate_hz / self.block as f64,
            df_hz: self.df_hz(),
            enbw_hz: self.enbw_hz,
            averages: self.averages,
            averaging: self.averaging,
            first_sample: self.first_sample,
            oldest_first_sample: self.oldest_first_sample,
            end_sample: self.first_sample + self.block as u64,
            timestamp: rfc3339_ns(self.timestamp_ns),
            f0_hz: *ask.range.start() as f64 * self.df_hz(),
            integration_low_cut_hz: integrates.then_some(self.integration_low_cut_hz),
            values,
        }
    }
}

// ---------------------------------------------------------------------------
// Waveform
// ---------------------------------------------------------------------------

/// `GET /api/v1/channels/{name}/waveform` (JSON).
#[derive(Serialize, ToSchema)]
pub struct WaveformBody<'a> {
    channel: &'a str,
    #[schema(value_type = String)]
    unit: &'static str,
    sample_rate_hz: f64,
    /// Stream index of `values[0]`.
    first_sample: u64,
    timestamp: Option<String>,
    /// The band whose signal this is (`?band=`), if any.
    band: Option<&'a str>,
    /// Whether this is the envelope signal (`?envelope=true`, or a band on
    /// the envelope spectrum).
    envelope: bool,
    /// Ranges kept by the band filter, Hz.
    pass_hz: Option<Vec<[f64; 2]>>,
    /// How the band signal is made.
    #[schema(value_type = Option<String>)]
    filter: Option<&'static str>,
    /// The block's samples, `1 / sample_rate_hz` apart.
    #[schema(value_type = Vec<f32>)]
    values: &'a [f32],
}

/// The query of the waveform endpoint.
#[derive(IntoParams)]
#[into_params(parameter_in = Query)]
#[allow(dead_code)] // describes the query string; `Params` reads it
pub struct WaveformQuery {
    /// json (default), or a csv or svg download.
    #[param(schema_with = format_schema)]
    format: Option<String>,
    /// One of the channel's bands: its signal (band-pass on the block).
    band: Option<String>,
    /// The envelope signal (channels with envelope analysis).
    envelope: Option<bool>,
}

/// The latest block of samples (or its envelope, or one band's signal); or
/// a CSV or SVG download of it.
#[utoipa::path(get, path = "/api/v1/channels/{name}/waveform", tag = "channels",
    params(("name" = String, Path, description = "Channel name"), WaveformQuery),
    responses(
        (status = 200, description = "The waveform (JSON), or a download (`format=csv|svg`)",
            content(
                (WaveformBody = "application/json"),
                (String = "text/csv"),
                (String = "image/svg+xml"),
            )),
        (status = 400, description = "A query parameter is unknown, repeated or does not apply to the channel", body = ErrorBody),
        (status = 404, description = "No such channel", body = ErrorBody),
        (status = 503, description = "No block yet; the band follows a speed that is unknown now; or request-time DSP is busy", body = ErrorBody),
    ))]
pub async fn waveform(
    Live(st): Live,
    Path(name): Path<String>,
    q: Result<Query<Vec<(String, String)>>, QueryRejection>,
) -> Result<Response, ApiError> {
    let params = Params::of::<WaveformQuery>(q)?;
    let ch = channel_of(&st.app, &name)?;
    let format = params.format()?;
    let envelope = match params.get("envelope") {
        None | Some("false") => false,
        Some("true") => true,
        Some(other) => {
            return Err(ApiError::BadQuery(format!(
                "envelope={other:?}: expected true or false"
            )))
        }
    };
    let snap = latest_of(ch)?;
    let spec = &ch.spec;
    let fs = spec.sample_rate_hz;
    // What to compute, every check made before any work starts.
    let mut pass: Option<Vec<(f64, f64)>> = None;
    let mut use_envelope = envelope;
    if let Some(band) = params.get("band") {
        let Some(b) = spec.bands.iter().find(|b| b.name == band) else {
            return Err(ApiError::BadQuery(format!(
                "channel {:?} has no band {band:?}",
                spec.name
            )));
        };
        let ranges: Vec<(f64, f64)> = match &b.edges {
            BandEdges::Hz { lo, hi } => vec![(*lo, *hi)],
            BandEdges::Orders { windows } => match snap.speed_hz {
                Some(s) => windows.iter().map(|w| (w.0 * s, w.1 * s)).collect(),
                None => {
                    return Err(ApiError::NotReady(format!(
                        "band {band:?} follows running speed, which is unknown now"
                    )))
                }
            },
        };
        use_envelope |= b.spectrum == crate::config::SpectrumKind::Envelope;
        pass = Some(ranges);
    }
    let envelope_band = if use_envelope {
        let Some(lohi) = spec.envelope else {
            return Err(ApiError::BadQuery(format!(
                "channel {:?} has no envelope analysis configured",
                spec.name
            )));
        };
        Some(lohi)
    } else {
        None
    };
    // The FFT work (envelope, band-pass) runs on a blocking thread, within
    // the gate's bound; the plain block is served as it is.
    let values: std::borrow::Cow<[f32]> = if envelope_band.is_none() && pass.is_none() {
        std::borrow::Cow::Borrowed(&snap.waveform[..])
    } else {
        let (snap, ranges) = (snap.clone(), pass.clone());
        st.dsp
            .run(move || waveform_dsp(&snap.waveform, fs, envelope_band, ranges.as_deref()))
            .await?
            .into()
    };
    let band = params.get("band");
    let mut parts: Vec<&str> = vec![&spec.name];
    if let Some(b) = band {
        parts.extend(["band", b]);
    }
    parts.push(if use_envelope && band.is_none() {
        "envelope-waveform"
    } else {
        "waveform"
    });
    match format {
        Format::Json => {}
        Format::Csv => {
            let out = export::csv("time_s,value", |i| i as f64 / fs, &values);
            let name = export::filename(&parts, snap.timestamp_ns, "csv");
            return Ok(export::attachment(export::CSV, &name, out));
        }
        Format::Svg => {
            let what = match band {
                Some(b) if use_envelope => format!("band {b} waveform (envelope)"),
                Some(b) => format!("band {b} waveform"),
                None if use_envelope => "envelope waveform".into(),
                None => "waveform".into(),
            };
            let mut notes = Vec::new();
            if let Some(r) = &pass {
                let list: Vec<String> = r
                    .iter()
                    .map(|&(a, b)| format!("{} to {} Hz", num(a), num(b)))
                    .collect();
                notes.push(format!(
                    "Pass band: {}; ideal band-pass on the block (FFT, lines outside zeroed, inverse FFT), circular at the block ends",
                    list.join(", ")
                ));
            }
            if let Some((lo, hi)) = envelope_band {
                notes.push(format!(
                    "Envelope: band-pass {} to {} Hz, then magnitude of the analytic signal",
                    num(lo),
                    num(hi)
                ));
            }
            let plot = Plot {
                title: format!("{} {what}", spec.name),
                info: vec![
                    format!(
                        "Channel {} · {} · unit {} ({})",
                        spec.name,
                        rfc3339_ns(snap.timestamp_ns).unwrap_or_else(|| "time unknown".into()),
                        spec.unit.symbol,
                        spec.unit.quantity.as_str()
                    ),
                    format!(
                        "Sample rate {} Hz · block {} samples ({} s) · first sample {}",
                        num(fs),
                        spec.block,
                        num(spec.block as f64 / fs),
                        snap.first_sample
                    ),
                ],
                x_label: "Time from the block's first sample (s)".into(),
                y_label: format!("{} ({})", spec.unit.quantity.as_str(), spec.unit.symbol),
                x0: 0.0,
                dx: 1.0 / fs,
                values: &values,
                db_factor: None,
                spans: Vec::new(),
                notes,
            };
            let name = export::filename(&parts, snap.timestamp_ns, "svg");
            return Ok(export::attachment(export::SVG, &name, export::svg(&plot)));
        }
    }
    Ok(Json(WaveformBody {
        channel: &spec.name,
        unit: spec.unit.symbol,
        sample_rate_hz: fs,
        first_sample: snap.first_sample,
        timestamp: rfc3339_ns(snap.timestamp_ns),
        band: params.get("band"),
        envelope,
        pass_hz: pass.map(|r| r.iter().map(|&(a, b)| [a, b]).collect()),
        filter: if params.get("band").is_some() {
            Some("ideal band-pass on the rectangular block (FFT, lines outside zeroed, inverse FFT); circular at the block ends")
        } else {
            None
        },
        values: &values,
    })
    .into_response())
}

/// A number as written on an image: up to 6 significant digits, no
/// trailing zeros.
pub(crate) fn num(x: f64) -> String {
    if !x.is_finite() {
        return x.to_string();
    }
    let s = format!(
        "{:.*}",
        (5 - x.abs().log10().floor().clamp(-10.0, 5.0) as i32).max(0) as usize,
        x
    );
    if s.contains('.') {
        s.trim_end_matches('0').trim_end_matches('.').to_string()
    } else {
        s
    }
}

/// The bands of a channel for an image: shaded spans (only those on the
/// spectrum drawn: `Some(envelope)`; none for `None`) and one line of text
/// per band with its value, status and its alarm's alert/danger limits.
pub(crate) fn band_table(
    ch: &ChannelShared,
    snap: &ChannelSnapshot,
    spectrum: Option<bool>,
) -> (Vec<Span>, Vec<String>) {
    let spec = &ch.spec;
    let board = ch.alarm_board.load();
    let mut spans = Vec::new();
    let mut notes = Vec::new();
    for (bi, b) in spec.bands.iter().enumerate() {
        let v = snap.bands.get(bi);
        let on_envelope = b.spectrum == crate::config::SpectrumKind::Envelope;
        let ranges: Vec<(f64, f64)> = match &b.edges {
            BandEdges::Hz { lo, hi } => vec![(*lo, *hi)],
            BandEdges::Orders { windows } => match snap.speed_hz {
                Some(s) => windows.iter().map(|w| (w.0 * s, w.1 * s)).collect(),
                None => Vec::new(),
            },
        };
        if spectrum == Some(on_envelope) {
            for &(lo, hi) in &ranges {
                spans.push(Span {
                    lo,
                    hi,
                    label: b.name.clone(),
                });
            }
        }
        let edges = match &b.edges {
            BandEdges::Hz { lo, hi } => format!("{} to {} Hz", num(*lo), num(*hi)),
            BandEdges::Orders { windows } => windows
                .iter()
                .map(|w| format!("{} to {} x", num(w.0), num(w.1)))
                .collect::<Vec<_>>()
                .join(", "),
        };
        let value = match v {
            Some(v) if v.is_ok() => format!("{} {}", num(v.value), b.unit.symbol),
            Some(v) => format!("no value ({})", v.status.as_str()),
            None => "no value".into(),
        };
        let mut line = format!(
            "Band {} ({edges}, {} spectrum, {}): {value}",
            b.name,
            b.spectrum.as_str(),
            b.measure.as_str()
        );
        for (j, a) in spec.alarms.iter().enumerate() {
            if !matches!(a.target, AlarmTarget::Band(x) if x == bi) {
                continue;
            }
            let view = board.as_ref().and_then(|bd| bd.alarms.get(j));
            let unit = a.unit.map_or("", |u| u.symbol);
            let lim =
                |x: Option<f64>| x.map_or("none".to_string(), |x| format!("{} {unit}", num(x)));
            // Before the worker publishes the board: the configured fixed
            // limits (baseline and zone limits are known only to it).
            let fixed = |l: Option<crate::config::alarms::LevelConfig>| {
                l.and_then(|l| match l.source {
                    crate::config::alarms::LimitSource::Fixed(x) => Some(x),
                    _ => None,
                })
            };
            let (alert, danger) = match view {
                Some(v) => (v.alert_limit, v.danger_limit),
                None => (fixed(a.spec.alert), fixed(a.spec.danger)),
            };
            let _ = write!(
                line,
                " · alarm state {}; limits alert {}, danger {}",
                view.map_or("not evaluated yet", |v| v.state.as_str()),
                lim(alert),
                lim(danger)
            );
        }
        notes.push(line);
    }
    (spans, notes)
}

/// The envelope of `block` (band `envelope` in Hz) if asked for, then the
/// band-pass to `ranges` if given.
fn waveform_dsp(
    block: &[f32],
    fs: f64,
    envelope: Option<(f64, f64)>,
    ranges: Option<&[(f64, f64)]>,
) -> Vec<f32> {
    let source: std::borrow::Cow<[f32]> = match envelope {
        Some((lo, hi)) => {
            let mut e = crate::dsp::envelope::EnvelopeEngine::new(block.len(), fs, lo, hi);
            let mut out = vec![0.0; block.len()];
            e.envelope(block, &mut out);
            out.into()
        }
        None => block.into(),
    };
    match ranges {
        Some(r) => crate::dsp::filter::band_pass_ranges(&source, fs, r),
        None => source.into_owned(),
    }
}

/// Fallback for unknown paths: JSON 404 like every other error.
pub async fn no_route() -> ApiError {
    ApiError::NoRoute
}

pub async fn method_not_allowed() -> ApiError {
    ApiError::MethodNotAllowed
}
