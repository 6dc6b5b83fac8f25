//! `/api/v1/alarms…` and `/api/v1/events…`: alarm states, operator actions
//! (acknowledge, re-learn; bearer token), the event record and captures.
//!
//! States come from each channel's alarm board (replaced by its worker on
//! every change); values from the latest snapshot. Actions are sent to the
//! channel's worker, which owns the alarm machines, and answered with the
//! alarm as the worker left it.

use std::time::Duration;

use axum::extract::rejection::QueryRejection;
use axum::extract::{Path, Query};
use axum::http::{header, HeaderMap};
use axum::response::{IntoResponse, Response};
use axum::Json;
use serde::Serialize;
use serde_json::Value;
use utoipa::{IntoParams, ToSchema};

use crate::alarm::capture;
use crate::alarm::engine::{AlarmBoard, AlarmCommand, AlarmView, CommandError};
use crate::alarm::journal::{rfc3339, Event};
use crate::config::zones::GUIDANCE;
use crate::config::AlarmTarget;
use crate::config::SpectrumKind;
use crate::frame::bwf1::StreamDecoder;
use crate::frame::Samples;
use crate::http::api::{enum_schema, num, sorted, Params};
use crate::http::error::{ApiError, ErrorBody};
use crate::http::export::{self, Amp, Format, Plot, Span};
use crate::http::scaling::Scaling;
use crate::http::{HttpState, Live};
use crate::pipeline::state::ChannelShared;
use crate::units::Unit;

/// How long an action waits for the worker.
const COMMAND_TIMEOUT: Duration = Duration::from_secs(5);

fn time(ns: u64) -> Option<String> {
    (ns != 0).then(|| rfc3339(ns))
}

/// An alarm of a channel (a band or an overall level), as the channel
/// detail, the alarm list and the operator actions show it. Keys are
/// written in alphabetical order, as always.
#[derive(Serialize, ToSchema)]
pub struct AlarmBody {
    acknowledged: Option<bool>,
    /// Limits now, in `unit` (null: none, or a baseline still learning).
    alert_limit: Option<f64>,
    /// The band or overall measure the alarm watches.
    band: String,
    channel: String,
    danger_limit: Option<f64>,
    latched: Option<bool>,
    latching: bool,
    /// Baseline learning: fraction done (null: not learning).
    learning: Option<f64>,
    /// What the action did (acknowledge, re-learn replies only).
    #[serde(skip_serializing_if = "Option::is_none")]
    #[schema(value_type = String)]
    outcome: Option<&'static str>,
    /// When `state` last changed (null: not yet).
    since: Option<String>,
    /// "normal", "alert", "danger", "inhibited", or "unknown" before the
    /// worker first evaluated it.
    #[schema(value_type = String)]
    state: &'static str,
    /// Transitions into each state (null before the first evaluation).
    transitions: Option<Transitions>,
    #[schema(value_type = Option<String>)]
    unit: Option<&'static str>,
    /// The value now (null: none yet, or no ok value).
    value: Option<f64>,
    /// The zone preset the limits come from, if any.
    zone: Option<ZoneBody>,
}

/// Transitions into each state since start.
#[derive(Serialize, ToSchema)]
pub struct Transitions {
    alert: u64,
    danger: u64,
    inhibited: u64,
    normal: u64,
}

/// A vibration severity zone preset (ISO 20816-3 groups, guidance only).
#[derive(Serialize, ToSchema)]
pub struct ZoneBody {
    boundaries_mm_s: ZoneBoundaries,
    #[schema(value_type = String)]
    guidance: &'static str,
    /// Machine group "1" or "2".
    #[schema(value_type = String, pattern = "^[12]$")]
    group: crate::config::zones::MachineGroup,
    /// "rigid" or "flexible".
    #[schema(value_type = String, pattern = "^(rigid|flexible)$")]
    support: crate::config::zones::Support,
}

/// Zone boundaries A/B, B/C, C/D in mm/s RMS.
#[derive(Serialize, ToSchema)]
pub struct ZoneBoundaries {
    ab: f64,
    bc: f64,
    cd: f64,
}

/// A channel's sensor health.
#[derive(Serialize, ToSchema)]
pub struct HealthBody {
    /// True OK, false not OK (alarms inhibited), null before the first data.
    ok: Option<bool>,
    /// Why not OK.
    #[schema(value_type = Vec<String>)]
    reasons: Vec<&'static str>,
    /// Since when (null: not yet known).
    since: Option<String>,
}

fn alarm_body(ch: &ChannelShared, i: usize, v: Option<&AlarmView>) -> AlarmBody {
    let a = &ch.spec.alarms[i];
    let snap = ch.latest();
    let value = match a.target {
        AlarmTarget::Band(b) => snap
            .as_ref()
            .and_then(|s| s.bands.get(b).copied())
            .filter(|v| v.is_ok())
            .map(|v| v.value),
        AlarmTarget::OverallRms => snap.as_ref().map(|s| s.overall.rms),
        AlarmTarget::OverallPeak => snap.as_ref().map(|s| s.overall.peak),
        AlarmTarget::CrestFactor => snap.as_ref().map(|s| s.overall.crest_factor),
    };
    let zone = a.spec.zone.map(|z| {
        let l = z.limits(a.unit.map_or(1.0, |u| u.to_si));
        ZoneBody {
            boundaries_mm_s: ZoneBoundaries {
                ab: l.boundaries_mm_s.ab,
                bc: l.boundaries_mm_s.bc,
                cd: l.boundaries_mm_s.cd,
            },
            guidance: GUIDANCE,
            group: z.group,
            support: z.support,
        }
    });
    AlarmBody {
        acknowledged: v.map(|v| v.acknowledged),
        alert_limit: v.and_then(|v| v.alert_limit),
        band: a.name.clone(),
        channel: ch.spec.name.clone(),
        danger_limit: v.and_then(|v| v.danger_limit),
        latched: v.map(|v| v.latched),
        latching: a.spec.latching,
        learning: v.and_then(|v| v.learning),
        outcome: None,
        since: v.and_then(|v| time(v.since_unix_ns)),
        state: v.map_or("unknown", |v| v.state.as_str()),
        transitions: v.map(|v| Transitions {
            alert: v.transitions[1],
            danger: v.transitions[2],
            inhibited: v.transitions[3],
            normal: v.transitions[0],
        }),
        unit: a.unit.map(|u| u.symbol),
        value,
        zone,
    }
}

/// The channel's health and alarms, for the channel detail and the list.
pub fn board_body(ch: &ChannelShared) -> (HealthBody, Vec<AlarmBody>) {
    let board: Option<std::sync::Arc<AlarmBoard>> = ch.alarm_board.load_full();
    let health = match &board {
        Some(b) => HealthBody {
            ok: Some(b.health.ok),
            reasons: b.health.reasons.names(),
            since: time(b.health.since_unix_ns),
        },
        None => HealthBody {
            ok: None,
            reasons: Vec::new(),
            since: None,
        },
    };
    let alarms = (0..ch.spec.alarms.len())
        .map(|i| alarm_body(ch, i, board.as_ref().and_then(|b| b.alarms.get(i))))
        .collect();
    (health, alarms)
}

/// `GET /api/v1/alarms`.
#[derive(Serialize, ToSchema)]
pub struct AlarmList {
    alarms: Vec<AlarmBody>,
    /// What the alarms are and are not.
    #[schema(value_type = String)]
    caution: &'static str,
}

/// Every alarm of every channel.
#[utoipa::path(get, path = "/api/v1/alarms", tag = "alarms", responses(
    (status = 200, description = "Every alarm, channel by channel", body = AlarmList),
    (status = 500, description = "A body could not be serialised (logged)", body = ErrorBody),
))]
pub async fn list(Live(st): Live) -> Result<Json<Value>, ApiError> {
    let mut alarms = Vec::new();
    for ch in &st.app.channels {
        let (_, a) = board_body(ch);
        alarms.extend(a);
    }
    Ok(Json(sorted(&AlarmList {
        alarms,
        caution: CAUTION,
    })?))
}

/// Said wherever alarm states are shown.
pub const CAUTION: &str = "monitoring only, not a machinery protection or safety system; \
limits are guidance: the machine maker's limits, local codes and qualified people prevail";

pub(crate) fn authorize(st: &HttpState, headers: &HeaderMap) -> Result<(), ApiError> {
    let given = headers
        .get(header::AUTHORIZATION)
        .and_then(|v| v.to_str().ok());
    match &st.app.token {
        Some(t) if t.authorizes(given) => Ok(()),
        _ => Err(ApiError::Unauthorized),
    }
}

fn alarm_of<'a>(
    st: &'a HttpState,
    channel: &str,
    band: &str,
) -> Result<(&'a std::sync::Arc<ChannelShared>, usize), ApiError> {
    let ch = st
        .app
        .channel(channel)
        .ok_or_else(|| ApiError::UnknownChannel(channel.to_string()))?;
    let i = ch
        .spec
        .alarms
        .iter()
        .position(|a| a.name == band)
        .ok_or_else(|| ApiError::UnknownAlarm(channel.to_string(), band.to_string()))?;
    Ok((ch, i))
}

async fn run_command(
    ch: &ChannelShared,
    make: impl FnOnce(
        tokio::sync::oneshot::Sender<Result<crate::alarm::engine::CommandReply, CommandError>>,
    ) -> AlarmCommand,
    i: usize,
) -> Result<Json<Value>, ApiError> {
    let (tx, rx) = tokio::sync::oneshot::channel();
    if !ch.command(make(tx)) {
        return Err(ApiError::Internal);
    }
    match tokio::time::timeout(COMMAND_TIMEOUT, rx).await {
        Ok(Ok(Ok(reply))) => {
            let mut body = alarm_body(ch, i, Some(&reply.view));
            body.outcome = Some(reply.outcome);
            Ok(Json(sorted(&body)?))
        }
        Ok(Ok(Err(e))) => Err(ApiError::Conflict(e.to_string())),
        _ => Err(ApiError::NotReady(
            "the channel's worker did not answer in time".into(),
        )),
    }
}

/// Acknowledges a latched alarm (bearer token).
#[utoipa::path(post, path = "/api/v1/alarms/{channel}/{band}/ack", tag = "alarms",
    params(
        ("channel" = String, Path, description = "Channel name"),
        ("band" = String, Path, description = "The alarm's band or overall measure"),
    ),
    security(("bearer" = [])),
    responses(
        (status = 200, description = "The alarm after the acknowledge, with `outcome`", body = AlarmBody),
        (status = 401, description = "Missing or wrong bearer token (or no token configured)", body = ErrorBody),
        (status = 404, description = "No such channel, or no such alarm on it", body = ErrorBody),
        (status = 409, description = "Nothing to acknowledge in the alarm's state", body = ErrorBody),
        (status = 500, description = "The channel's worker is gone (logged)", body = ErrorBody),
        (status = 503, description = "The channel's worker did not answer in time", body = ErrorBody),
    ))]
pub async fn ack(
    Live(st): Live,
    Path((channel, band)): Path<(String, String)>,
    headers: HeaderMap,
) -> Result<Json<Value>, ApiError> {
    authorize(&st, &headers)?;
    let (ch, i) = alarm_of(&st, &channel, &band)?;
    run_command(ch, |reply| AlarmCommand::Ack { alarm: i, reply }, i).await
}

/// Starts learning an alarm's baseline again (bearer token).
#[utoipa::path(post, path = "/api/v1/alarms/{channel}/{band}/relearn", tag = "alarms",
    params(
        ("channel" = String, Path, description = "Channel name"),
        ("band" = String, Path, description = "The alarm's band or overall measure"),
    ),
    security(("bearer" = [])),
    responses(
        (status = 200, description = "The alarm after the request, with `outcome`", body = AlarmBody),
        (status = 401, description = "Missing or wrong bearer token (or no token configured)", body = ErrorBody),
        (status = 404, description = "No such channel, or no such alarm on it", body = ErrorBody),
        (status = 409, description = "The alarm has no baseline to re-learn", body = ErrorBody),
        (status = 500, description = "The channel's worker is gone (logged)", body = ErrorBody),
        (status = 503, description = "The channel's worker did not answer in time", body = ErrorBody),
    ))]
pub async fn relearn(
    Live(st): Live,
    Path((channel, band)): Path<(String, String)>,
    headers: HeaderMap,
) -> Result<Json<Value>, ApiError> {
    authorize(&st, &headers)?;
    let (ch, i) = alarm_of(&st, &channel, &band)?;
    run_command(ch, |reply| AlarmCommand::Relearn { alarm: i, reply }, i).await
}

/// An event of the journal as listed, with what became of its capture.
#[derive(Serialize, ToSchema)]
pub struct ListedEvent<'a> {
    #[serde(flatten)]
    event: &'a Event,
    /// Events with a capture: "stored", "pending", "lost" or "pruned".
    #[serde(skip_serializing_if = "Option::is_none")]
    #[schema(value_type = String)]
    capture_status: Option<&'static str>,
    /// Why the capture was never written ("lost" only).
    #[serde(skip_serializing_if = "Option::is_none")]
    capture_lost_reason: Option<String>,
}

/// A capture an event named that was never written.
#[derive(Serialize, ToSchema)]
pub struct LostCapture {
    id: String,
    reason: String,
}

/// `GET /api/v1/events`.
#[derive(Serialize, ToSchema)]
pub struct EventList<'a> {
    /// The captures on disk.
    captures: Vec<capture::CaptureInfo>,
    /// The most recent events of the journal, oldest first.
    events: Vec<ListedEvent<'a>>,
    lost_captures: Vec<LostCapture>,
}

/// The recent alarm events and the stored captures.
#[utoipa::path(get, path = "/api/v1/events", tag = "events", responses(
    (status = 200, description = "Recent events and the captures on disk", body = EventList),
    (status = 500, description = "The capture directory could not be listed (logged)", body = ErrorBody),
))]
pub async fn events(Live(st): Live) -> Result<Json<Value>, ApiError> {
    let events = st
        .app
        .alarm_io
        .as_ref()
        .map(|io| io.recent_events())
        .unwrap_or_default();
    let captures = match &st.app.captures_dir {
        None => Vec::new(),
        Some(dir) => match capture::list(dir) {
            Ok(l) => l,
            Err(e) => {
                tracing::error!(error = %e, "cannot list captures");
                return Err(ApiError::Internal);
            }
        },
    };
    let io = st.app.alarm_io.as_ref();
    let mut lost = Vec::new();
    let mut listed = Vec::with_capacity(events.len());
    for e in &events {
        let mut item = ListedEvent {
            event: e,
            capture_status: None,
            capture_lost_reason: None,
        };
        if let (Some(id), Some(io), Some(dir)) = (&e.capture, io, &st.app.captures_dir) {
            let fate = io.capture_fate(dir, id);
            item.capture_status = Some(fate.as_str());
            item.capture_lost_reason = fate.reason().map(str::to_string);
        }
        listed.push(item);
    }
    if let Some(io) = io {
        for (id, reason) in io.lost_captures() {
            lost.push(LostCapture { id, reason });
        }
    }
    Ok(Json(sorted(&EventList {
        captures,
        events: listed,
        lost_captures: lost,
    })?))
}

/// A capture that cannot be read: one an event names but that is not on
/// disk says what became of it ([`crate::alarm::io::CaptureFate`]).
fn capture_error(st: &HttpState, e: capture::CaptureError) -> ApiError {
    match e {
        capture::CaptureError::NotFound(id) => match (&st.app.alarm_io, &st.app.captures_dir) {
            (Some(io), Some(dir)) => {
                let known = io
                    .recent_events()
                    .iter()
                    .any(|e| e.capture.as_deref() == Some(id.as_str()));
                let fate = io.capture_fate(dir, &id);
                let recorded = !matches!(fate, crate::alarm::io::CaptureFate::Stored)
                    && (known || io.lost_captures().contains_key(&id));
                if recorded {
                    ApiError::CaptureUnavailable {
                        status: fate.as_str(),
                        reason: fate.reason().map(str::to_string),
                        id,
                    }
                } else {
                    ApiError::UnknownCapture(id)
                }
            }
            _ => ApiError::UnknownCapture(id),
        },
        capture::CaptureError::BadId(id) => ApiError::UnknownCapture(id),
        other => {
            tracing::error!(error = %other, "capture read failed");
            ApiError::Internal
        }
    }
}

/// `GET /api/v1/events/{id}`: the capture's metadata file and where its
/// waveform is.
#[derive(Serialize, ToSchema)]
pub struct EventBody<'a> {
    #[serde(flatten)]
    meta: &'a capture::CaptureMeta,
    /// `/api/v1/events/{id}/waveform`.
    waveform_url: String,
}

/// The query of one capture.
#[derive(IntoParams)]
#[into_params(parameter_in = Query)]
#[allow(dead_code)] // describes the query string; `Params` reads it
pub struct EventQuery {
    /// json (default: the metadata), or the spectrum at the trip as a csv
    /// or svg download.
    #[param(schema_with = format_schema)]
    format: Option<String>,
    /// The image's amplitude axis (format=svg only): linear (default) or log (dB).
    #[param(schema_with = amp_schema)]
    amp: Option<String>,
}

fn format_schema() -> utoipa::openapi::Object {
    enum_schema(crate::http::api::FORMATS)
}

fn amp_schema() -> utoipa::openapi::Object {
    enum_schema(crate::http::api::AMPS)
}

/// The values `format=` of a capture's waveform takes.
pub(crate) const WAVEFORM_FORMATS: [&str; 3] = ["bwf1", "csv", "svg"];

fn waveform_format_schema() -> utoipa::openapi::Object {
    enum_schema(WAVEFORM_FORMATS)
}

/// The query of a capture's waveform.
#[derive(IntoParams)]
#[into_params(parameter_in = Query)]
#[allow(dead_code)] // describes the query string; `Params` reads it
pub struct EventWaveformQuery {
    /// bwf1 (default: the file as stored), or a csv or svg download.
    #[param(schema_with = waveform_format_schema)]
    format: Option<String>,
}

/// One capture's metadata (trip, limits, spectrum at the trip); with
/// `?format=csv|svg` the spectrum at the trip as a download.
#[utoipa::path(get, path = "/api/v1/events/{id}", tag = "events",
    params(("id" = String, Path, description = "Capture id (as `/api/v1/events` lists them)"), EventQuery),
    responses(
        (status = 200, description = "The capture's metadata (JSON), or its spectrum at the trip as a download (`format=csv|svg`)",
            content(
                (EventBody = "application/json"),
                (String = "text/csv"),
                (String = "image/svg+xml"),
            )),
        (status = 400, description = "A query parameter is unknown, repeated or out of range", body = ErrorBody),
        (status = 404, description = "No such capture; one not on disk (pending, lost, pruned: `capture_status` says); or, for a download, no spectrum at the trip", body = ErrorBody),
        (status = 500, description = "The capture could not be read (logged)", body = ErrorBody),
    ))]
pub async fn event(
    Live(st): Live,
    Path(id): Path<String>,
    q: Result<Query<Vec<(String, String)>>, QueryRejection>,
) -> Result<Response, ApiError> {
    let params = Params::of::<EventQuery>(q)?;
    let format = params.format()?;
    let amp = Amp::parse(params.get("amp"), format)?;
    let dir = st
        .app
        .captures_dir
        .as_ref()
        .ok_or_else(|| ApiError::UnknownCapture(id.clone()))?;
    let meta = capture::read_meta(dir, &id).map_err(|e| capture_error(&st, e))?;
    if format == Format::Json {
        let body = sorted(&EventBody {
            meta: &meta,
            waveform_url: format!("/api/v1/events/{id}/waveform"),
        })?;
        return Ok(Json(body).into_response());
    }
    let Some(sp) = &meta.spectrum else {
        return Err(ApiError::NoCaptureSpectrum(id));
    };
    let scaling = Scaling::parse(&sp.scaling);
    let label = match (scaling, Unit::parse(&sp.unit)) {
        (Some(s), Some(u)) => s.unit_label(u),
        _ => sp.unit.clone(),
    };
    if format == Format::Csv {
        let out = export::csv(
            &format!("frequency_hz,{}_{label}", sp.scaling),
            |i| sp.f0_hz + i as f64 * sp.df_hz,
            &sp.values,
        );
        let name = export::filename(&[&id, "spectrum"], 0, "csv");
        return Ok(export::attachment(export::CSV, &name, out));
    }
    let db = amp == Amp::Log;
    let settings = meta.settings.as_ref();
    let fs = meta.waveform.sample_rate_hz;
    let mut spans = Vec::new();
    for b in settings.map_or(&[][..], |s| &s.bands[..]) {
        if b.spectrum != SpectrumKind::Raw {
            continue;
        }
        let mut ranges: Vec<[f64; 2]> = b.hz.into_iter().collect();
        if let Some(speed) = settings.and_then(|s| s.speed_hz) {
            ranges.extend(b.orders.iter().map(|w| [w[0] * speed, w[1] * speed]));
        }
        for [lo, hi] in ranges {
            spans.push(Span {
                lo,
                hi,
                label: b.name.clone(),
            });
        }
    }
    let mut notes = vec![trip_line(&meta.trip)];
    notes.extend(
        meta.bands
            .iter()
            .map(|b| format!("Band {} at the trip: {} {}", b.band, num(b.value), b.unit)),
    );
    let resolution = settings.map_or("resolution unknown".to_string(), |s| {
        format!(
            "Resolution {} Hz · block {}",
            num(fs / s.block as f64),
            s.block
        )
    });
    let averaging = settings.map_or(String::new(), |s| {
        format!(" ({})", crate::http::api::averaging_str(s.averaging))
    });
    let plot = Plot {
        title: event_title(&meta.trip, "spectrum at the trip"),
        info: vec![
            format!(
                "Channel {} · {} · {} {label} · capture {}",
                meta.trip.channel, meta.trip.time, sp.scaling, meta.id
            ),
            format!(
                "{resolution} · df {} Hz · window {} · {} averages{averaging} · sample rate {} Hz · nfft {}",
                num(sp.df_hz),
                sp.window,
                sp.averages,
                num(fs),
                sp.nfft
            ),
        ],
        x_label: "Frequency (Hz)".into(),
        y_label: if db {
            format!("{} (dB re 1 {label})", sp.scaling)
        } else {
            format!("{} ({label})", sp.scaling)
        },
        x0: sp.f0_hz,
        dx: sp.df_hz,
        values: &sp.values,
        db_factor: db.then_some(match scaling {
            Some(Scaling::Power | Scaling::Psd) | None => 10.0,
            Some(_) => 20.0,
        }),
        spans,
        notes,
    };
    let name = export::filename(&[&id, "spectrum"], 0, "svg");
    Ok(export::attachment(export::SVG, &name, export::svg(&plot)))
}

/// "pump-de band bpfo alert → danger at 2026-…": names the event.
fn event_title(t: &capture::TripInfo, what: &str) -> String {
    format!(
        "{} band {} {} → {} at {}: {what}",
        t.channel, t.band, t.from, t.to, t.time
    )
}

fn trip_line(t: &capture::TripInfo) -> String {
    let lim = |x: Option<f64>| x.map_or("none".to_string(), |x| format!("{} {}", num(x), t.unit));
    format!(
        "Trip: band {} went {} → {} at {}, value {}; limits alert {}, danger {}",
        t.band,
        t.from,
        t.to,
        t.time,
        t.value
            .map_or("unknown".to_string(), |v| format!("{} {}", num(v), t.unit)),
        lim(t.limits.alert),
        lim(t.limits.danger)
    )
}

/// The samples of a capture's BWF1 file, in order (the file is written
/// by our own I/O thread; a frame that does not decode is an error).
fn capture_samples(id: &str, bytes: &[u8]) -> Result<Vec<f32>, ApiError> {
    let mut d = StreamDecoder::new();
    d.push(bytes);
    let mut out = Vec::new();
    let mut s = Samples::default();
    loop {
        match d.next_frame_into(&mut s) {
            Ok(Some(_)) => match &s {
                Samples::F32(v) => out.extend_from_slice(v),
                other => out.extend(
                    (0..other.len())
                        .filter_map(|i| other.get_f64(i))
                        .map(|x| x as f32),
                ),
            },
            Ok(None) => break,
            Err(e) => {
                tracing::error!(error = %e, capture = %id, "capture waveform does not decode");
                return Err(ApiError::Internal);
            }
        }
    }
    if d.buffered() != 0 || d.stats().rejected_total() != 0 {
        tracing::error!(capture = %id, trailing_bytes = d.buffered(), "capture waveform has bytes that are not frames");
        return Err(ApiError::Internal);
    }
    Ok(out)
}

/// A capture's waveform: the raw BWF1 file (default), or `?format=csv|svg`.
#[utoipa::path(get, path = "/api/v1/events/{id}/waveform", tag = "events",
    params(("id" = String, Path, description = "Capture id (as `/api/v1/events` lists them)"), EventWaveformQuery),
    responses(
        (status = 200, description = "The capture's samples: the BWF1 file as stored (default), or a csv or svg download",
            content(
                (Vec<u8> = "application/octet-stream"),
                (String = "text/csv"),
                (String = "image/svg+xml"),
            )),
        (status = 400, description = "A query parameter is unknown, repeated or out of range", body = ErrorBody),
        (status = 404, description = "No such capture, or one not on disk (pending, lost, pruned: `capture_status` says)", body = ErrorBody),
        (status = 500, description = "The capture could not be read or decoded (logged)", body = ErrorBody),
    ))]
pub async fn event_waveform(
    Live(st): Live,
    Path(id): Path<String>,
    q: Result<Query<Vec<(String, String)>>, QueryRejection>,
) -> Result<Response, ApiError> {
    let params = Params::of::<EventWaveformQuery>(q)?;
    let format = match params.get("format") {
        None | Some("bwf1") => None,
        Some("csv") => Some(Format::Csv),
        Some("svg") => Some(Format::Svg),
        Some(other) => {
            return Err(ApiError::BadQuery(format!(
                "format={other:?} is not known (known: {})",
                WAVEFORM_FORMATS.join(", ")
            )))
        }
    };
    let dir = st
        .app
        .captures_dir
        .as_ref()
        .ok_or_else(|| ApiError::UnknownCapture(id.clone()))?;
    let bytes = capture::read_waveform(dir, &id).map_err(|e| capture_error(&st, e))?;
    let Some(format) = format else {
        let name = export::filename(&[&id], 0, "bwf1");
        return Ok(export::attachment("application/octet-stream", &name, bytes));
    };
    let meta = capture::read_meta(dir, &id).map_err(|e| capture_error(&st, e))?;
    let samples = capture_samples(&id, &bytes)?;
    let fs = meta.waveform.sample_rate_hz;
    let dt = 1.0 / fs;
    if format == Format::Csv {
        let out = export::csv("time_s,value", |i| i as f64 / fs, &samples);
        let name = export::filename(&[&id, "waveform"], 0, "csv");
        return Ok(export::attachment(export::CSV, &name, out));
    }
    let w = &meta.waveform;
    let trip_s = w.pre_samples as f64 * dt;
    let plot = Plot {
        title: event_title(&meta.trip, "waveform"),
        info: vec![
            format!(
                "Channel {} · first sample at {} · unit {} · capture {}",
                meta.trip.channel,
                crate::http::api::rfc3339_ns(w.timestamp_ns)
                    .unwrap_or_else(|| "time unknown".into()),
                w.unit,
                meta.id
            ),
            format!(
                "Sample rate {} Hz · {} samples ({} s), {} before the trip · ended: {}",
                num(fs),
                samples.len(),
                num(samples.len() as f64 * dt),
                w.pre_samples,
                meta.end_reason
            ),
        ],
        x_label: "Time from the capture's first sample (s)".into(),
        y_label: format!("value ({})", w.unit),
        x0: 0.0,
        dx: dt,
        values: &samples,
        db_factor: None,
        spans: vec![Span {
            lo: trip_s,
            hi: trip_s,
            label: "trip".into(),
        }],
        notes: vec![trip_line(&meta.trip)],
    };
    let name = export::filename(&[&id, "waveform"], 0, "svg");
    Ok(export::attachment(export::SVG, &name, export::svg(&plot)))
}
