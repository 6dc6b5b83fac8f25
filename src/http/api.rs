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
use serde_json::{json, Map, Value};

use crate::clock::unix_now_ns;
use crate::config::{AlarmTarget, AveragingMode, BandEdges, ChannelSpec};
use crate::counters::SourceCounters;
use crate::counters::{ChannelCounters, GapReason};
use crate::dsp::bands::BandStatus;
use crate::http::error::ApiError;
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

    pub(crate) fn get(&self, key: &str) -> Option<&str> {
        self.0
            .iter()
            .find(|(k, _)| k == key)
            .map(|(_, v)| v.as_str())
    }

    fn f64(&self, key: &str) -> Result<Option<f64>, ApiError> {
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
    match mode {
        AveragingMode::None => "none",
        AveragingMode::Linear => "linear",
        AveragingMode::Exponential => "exponential",
        AveragingMode::PeakHold => "peak-hold",
    }
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

fn channel_of<'a>(app: &'a AppState, name: &str) -> Result<&'a Arc<ChannelShared>, ApiError> {
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

pub async fn healthz() -> Json<Value> {
    Json(json!({ "status": "ok" }))
}

pub async fn readyz(Live(st): Live) -> Result<Json<Value>, ApiError> {
    let waiting: Vec<String> = st
        .app
        .channels
        .iter()
        .filter(|c| c.snapshot.load().is_none())
        .map(|c| c.spec.name.clone())
        .collect();
    if waiting.is_empty() {
        Ok(Json(
            json!({ "status": "ready", "channels": st.app.channels.len() }),
        ))
    } else {
        Err(ApiError::Waiting(waiting))
    }
}

// ---------------------------------------------------------------------------
// Channels
// ---------------------------------------------------------------------------

#[derive(Serialize)]
struct SourceInfo<'a> {
    name: &'a str,
    kind: &'a str,
    /// `connected` or `disconnected`.
    state: &'static str,
    /// Seconds since the last good frame (null: none yet).
    last_frame_age_seconds: Option<f64>,
    /// The source's counters (as in `/metrics`).
    counters: Value,
}

#[derive(Serialize)]
struct Averaging {
    mode: &'static str,
    count: u32,
}

#[derive(Serialize)]
struct ChannelSummary<'a> {
    name: &'a str,
    /// Sensor health: true OK, false not OK (alarms inhibited), null before
    /// the first data.
    health_ok: Option<bool>,
    /// The most severe alarm state of the channel: "normal", "alert",
    /// "danger", "inhibited", or null without alarms.
    alarm_state: Option<&'static str>,
    unit: &'static str,
    quantity: &'static str,
    /// Every unit the spectrum endpoint's `unit=` takes for this channel
    /// (its own first), and every `scaling=`.
    spectrum_units: Vec<&'static str>,
    spectrum_scalings: Vec<&'static str>,
    sample_rate_hz: f64,
    block: usize,
    nfft: usize,
    hop: usize,
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
        counters: source.map_or(Value::Null, |s| {
            let g = SourceCounters::get;
            json!({
                "connections": g(&s.connections),
                "frames": g(&s.frames),
                "bytes": g(&s.bytes),
                "crc_errors": g(&s.crc_errors),
                "resyncs": g(&s.resyncs),
                "skipped_bytes": g(&s.bytes_skipped),
                "missing_samples": g(&s.samples_missing),
                "late_frames": g(&s.frames_late),
                "rejected": s.rejected().into_iter().collect::<std::collections::BTreeMap<_, _>>(),
            })
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

pub async fn list_channels(Live(st): Live) -> Json<Value> {
    let now = unix_now_ns();
    let list: Vec<Value> = st
        .app
        .channels
        .iter()
        .map(|ch| {
            let snap = ch.latest();
            serde_json::to_value(summary(&st.app, ch, snap.as_deref(), now)).unwrap_or(Value::Null)
        })
        .collect();
    Json(json!({ "channels": list }))
}

#[derive(Serialize)]
struct MachineInfo<'a> {
    name: &'a str,
    /// "fixed", "tach" or "peak".
    speed_source: &'static str,
    /// Null while the speed is unknown or stale.
    speed_hz: Option<f64>,
    speed_rpm: Option<f64>,
    /// Results (of any channel following this machine) whose order bands
    /// were evaluated before the speed was measured through their signal
    /// time (README "Orders": the wait ran out).
    speed_late_results: u64,
}

#[derive(Serialize)]
struct BandInfo<'a> {
    name: &'a str,
    /// Edges in Hz: fixed, or (order and bearing bands) at the speed of the
    /// latest spectrum; null while that speed is unknown.
    lo_hz: Option<f64>,
    hi_hz: Option<f64>,
    /// Order windows [lo, hi] for order and bearing bands.
    orders: Option<Vec<[f64; 2]>>,
    bearing: Option<&'a str>,
    defect: Option<&'static str>,
    /// "raw" or "envelope": which spectrum the band reads.
    spectrum: &'static str,
    /// "ok", or why there is no value: "no_speed", "above_nyquist", "no_line".
    status: Option<&'static str>,
    measure: &'static str,
    unit: &'static str,
    quantity: &'static str,
    /// Null before the first spectrum.
    value: Option<f64>,
    peak_hz: Option<f64>,
}

#[derive(Serialize)]
struct OverallInfo {
    mean: f64,
    rms: f64,
    peak: f64,
    peak_to_peak: f64,
    crest_factor: f64,
    unit: &'static str,
}

fn reasons(f: impl Fn(GapReason) -> u64) -> Map<String, Value> {
    GapReason::ALL
        .iter()
        .map(|&r| (r.as_str().to_string(), Value::from(f(r))))
        .collect()
}

fn counters_json(c: &ChannelCounters) -> Value {
    json!({
        "samples_in": ChannelCounters::get(&c.samples_in),
        "samples_processed": ChannelCounters::get(&c.samples_processed),
        "samples_dropped": reasons(|r| c.dropped(r)),
        "samples_dropped_total": c.dropped_total(),
        "discontinuities": reasons(|r| c.discontinuities(r)),
        "blocks": ChannelCounters::get(&c.blocks),
        "spectra": ChannelCounters::get(&c.spectra),
    })
}

pub async fn channel_detail(
    Live(st): Live,
    Path(name): Path<String>,
) -> Result<Json<Value>, ApiError> {
    let ch = channel_of(&st.app, &name)?;
    Ok(Json(detail(&st.app, ch, unix_now_ns())?))
}

/// The body of `GET /api/v1/channels/{name}`: the summary of the list,
/// then bands, health, alarms, overall levels, counters and the latest
/// spectrum's place. The overview holds one per channel.
fn detail(app: &AppState, ch: &ChannelShared, now_ns: u64) -> Result<Value, ApiError> {
    let snap = ch.latest();
    let spec = &ch.spec;
    let mut body =
        serde_json::to_value(summary(app, ch, snap.as_deref(), now_ns)).map_err(|e| {
            tracing::error!(error = %e, channel = %spec.name, "cannot serialise a channel summary");
            ApiError::Internal
        })?;
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
    if let Value::Object(m) = &mut body {
        m.insert(
            "integration_low_cut_hz".into(),
            spec.integration_low_cut_hz.into(),
        );
        m.insert("bands".into(), json!(bands));
        let (health, alarms) = crate::http::alarms::board_json(ch);
        m.insert("health".into(), health);
        m.insert("alarms".into(), Value::Array(alarms));
        m.insert("overall".into(), json!(overall));
        m.insert("counters".into(), counters_json(&ch.counters));
        m.insert(
            "spectrum".into(),
            match &snap {
                Some(s) => json!({
                    "seq": s.seq,
                    "averages": s.averages,
                    "first_sample": s.first_sample,
                    "oldest_first_sample": s.oldest_first_sample,
                    "end_sample": s.first_sample + spec.block as u64,
                    "timestamp": rfc3339_ns(s.timestamp_ns),
                    "published": rfc3339_ns(s.published_unix_ns),
                }),
                None => Value::Null,
            },
        );
    }
    Ok(body)
}

// ---------------------------------------------------------------------------
// Overview
// ---------------------------------------------------------------------------

#[derive(Serialize)]
struct Overview<'a> {
    time: Option<String>,
    channels: Vec<Value>,
    machines: Vec<Value>,
    sources: Vec<SourceInfo<'a>>,
}

/// `GET /api/v1/overview`: what the overview page shows in one request:
/// every channel's detail (the body of `/api/v1/channels/{name}`, config
/// order), every machine (also those no channel follows) and every source.
pub async fn overview(Live(st): Live) -> Result<Response, ApiError> {
    let now = unix_now_ns();
    let app = &st.app;
    let channels = app
        .channels
        .iter()
        .map(|ch| detail(app, ch, now))
        .collect::<Result<Vec<Value>, ApiError>>()?;
    let machines: Vec<Value> = app
        .machines
        .iter()
        .map(|m| {
            let mut v = json!(machine_info(&m.spec.name, Some(m)));
            if let Value::Object(o) = &mut v {
                o.insert(
                    "speed_updated".into(),
                    json!(m
                        .is_measured()
                        .then(|| rfc3339_ns(m.updated_unix_ns()))
                        .flatten()),
                );
            }
            v
        })
        .collect();
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

#[derive(Serialize)]
struct TrendSeries<'a> {
    #[serde(skip_serializing_if = "Option::is_none")]
    name: Option<&'a str>,
    unit: &'static str,
    #[serde(skip_serializing_if = "Option::is_none")]
    measure: Option<&'static str>,
    /// The alarm's limits now (null without an alarm on this value, or
    /// while a baseline is being learned).
    alert_limit: Option<f64>,
    danger_limit: Option<f64>,
    min: Vec<Option<f32>>,
    max: Vec<Option<f32>>,
    last: Vec<Option<f32>>,
}

/// `GET /api/v1/channels/{name}/trend?seconds=N`: the channel's trend
/// (`pipeline::trend`), columnar, oldest point first; `seconds` defaults
/// to (and is cut to) what the channel keeps.
pub async fn trend(
    Live(st): Live,
    Path(name): Path<String>,
    q: Result<Query<Vec<(String, String)>>, QueryRejection>,
) -> Result<Json<Value>, ApiError> {
    let params = Params::new(q, &["seconds"])?;
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
    let mut overall = Map::new();
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
            measure.to_string(),
            json!(TrendSeries {
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
            }),
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
    Ok(Json(json!({
        "channel": spec.name,
        "interval_s": 1,
        "capacity_seconds": capacity,
        "t": cols.t,
        "overall": overall,
        "bands": bands,
    })))
}

// ---------------------------------------------------------------------------
// Spectrum
// ---------------------------------------------------------------------------

#[derive(Serialize)]
struct SpectrumBody<'a> {
    /// "raw", or "envelope" for the envelope spectrum (`?spectrum=envelope`).
    spectrum: &'static str,
    /// Running speed of the channel's machine when the spectrum was made, Hz.
    speed_hz: Option<f64>,
    channel: &'a str,
    /// Unit of `values` (e.g. `mm/s`, `g^2/Hz`).
    unit: String,
    /// Quantity of the unit asked for (acceleration, velocity…).
    quantity: &'static str,
    scaling: &'static str,
    window: &'static str,
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
    averaging: &'static str,
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
    values: Vec<f32>,
}

pub async fn spectrum(
    Live(st): Live,
    Path(name): Path<String>,
    q: Result<Query<Vec<(String, String)>>, QueryRejection>,
) -> Result<Response, ApiError> {
    let params = Params::new(
        q,
        &[
            "scaling", "unit", "fmin", "fmax", "format", "spectrum", "amp",
        ],
    )?;
    let ch = channel_of(&st.app, &name)?;
    let spec = &ch.spec;
    let scaling = match params.get("scaling") {
        None => Scaling::Rms,
        Some(s) => Scaling::parse(s).ok_or_else(|| {
            ApiError::BadQuery(format!(
                "scaling={s:?} is not known (known: {})",
                Scaling::known()
            ))
        })?,
    };
    let to = match params.get("unit") {
        None => spec.unit,
        Some(s) => {
            let u = Unit::parse(s).ok_or_else(|| {
                ApiError::BadQuery(format!(
                    "unit={s:?} is not known (known: {})",
                    Unit::known()
                ))
            })?;
            if !convertible(spec.unit, u) {
                return Err(ApiError::BadQuery(format!(
                    "unit={s:?} ({}) cannot be derived from channel {:?} in {} ({})",
                    u.quantity.as_str(),
                    spec.name,
                    spec.unit,
                    spec.unit.quantity.as_str()
                )));
            }
            u
        }
    };
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
    let envelope = match params.get("spectrum") {
        None | Some("raw") => false,
        Some("envelope") => true,
        Some(other) => {
            return Err(ApiError::BadQuery(format!(
                "spectrum={other:?}: expected raw or envelope"
            )))
        }
    };
    if envelope && snap.envelope_power.is_empty() {
        return Err(ApiError::BadQuery(format!(
            "channel {:?} has no envelope analysis configured",
            spec.name
        )));
    }
    if envelope && to.quantity != spec.unit.quantity {
        return Err(ApiError::BadQuery(
            "the envelope spectrum is in the channel's own quantity; drop unit= or use the channel's".into(),
        ));
    }
    let conv = Conversion {
        scaling,
        from: spec.unit,
        to,
        low_cut_hz: spec.integration_low_cut_hz,
        df_hz: spec.df_hz(),
        noise_bw_hz: ch.noise_bandwidth_hz(),
    };
    let first = *range.start();
    let values = conv.apply(
        if envelope {
            &snap.envelope_power
        } else {
            &snap.power
        },
        range,
    );
    let f0_hz = first as f64 * spec.df_hz();
    let unit = scaling.unit_label(to);
    let what = if envelope {
        "envelope-spectrum"
    } else {
        "spectrum"
    };
    match format {
        Format::Json => {}
        Format::Csv => {
            let mut out = String::with_capacity(16 * values.len() + 64);
            let _ = writeln!(out, "frequency_hz,{}_{}", scaling.as_str(), unit);
            for (i, v) in values.iter().enumerate() {
                let _ = writeln!(out, "{},{}", (first + i) as f64 * spec.df_hz(), v);
            }
            let name = export::filename(&[&spec.name, what], snap.timestamp_ns, "csv");
            return Ok(export::attachment(export::CSV, &name, out));
        }
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
            let name = export::filename(&[&spec.name, what], snap.timestamp_ns, "svg");
            return Ok(export::attachment(export::SVG, &name, export::svg(&plot)));
        }
    }
    let integrates = matches!(
        (to.quantity.kinematic_order(), spec.unit.quantity.kinematic_order()),
        (Some(a), Some(b)) if a < b
    );
    Ok(Json(SpectrumBody {
        spectrum: if envelope { "envelope" } else { "raw" },
        speed_hz: snap.speed_hz,
        channel: &spec.name,
        unit,
        quantity: to.quantity.as_str(),
        scaling: scaling.as_str(),
        window: spec.window.as_str(),
        block: spec.block,
        nfft: spec.nfft,
        sample_rate_hz: spec.sample_rate_hz,
        resolution_hz: spec.sample_rate_hz / spec.block as f64,
        df_hz: spec.df_hz(),
        enbw_hz: ch.noise_bandwidth_hz(),
        averages: snap.averages,
        averaging: averaging_str(spec.averaging),
        first_sample: snap.first_sample,
        oldest_first_sample: snap.oldest_first_sample,
        end_sample: snap.first_sample + spec.block as u64,
        timestamp: rfc3339_ns(snap.timestamp_ns),
        f0_hz,
        integration_low_cut_hz: integrates.then_some(spec.integration_low_cut_hz),
        values,
    })
    .into_response())
}

// ---------------------------------------------------------------------------
// Waveform
// ---------------------------------------------------------------------------

#[derive(Serialize)]
struct WaveformBody<'a> {
    channel: &'a str,
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
    filter: Option<&'static str>,
    values: &'a [f32],
}

pub async fn waveform(
    Live(st): Live,
    Path(name): Path<String>,
    q: Result<Query<Vec<(String, String)>>, QueryRejection>,
) -> Result<Response, ApiError> {
    let params = Params::new(q, &["format", "band", "envelope"])?;
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
