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
use serde_json::{json, Value};

use crate::alarm::capture;
use crate::alarm::engine::{AlarmBoard, AlarmCommand, AlarmView, CommandError};
use crate::alarm::journal::rfc3339;
use crate::config::zones::GUIDANCE;
use crate::config::AlarmTarget;
use crate::config::SpectrumKind;
use crate::frame::bwf1::StreamDecoder;
use crate::frame::Samples;
use crate::http::api::{num, Params};
use crate::http::error::ApiError;
use crate::http::export::{self, Amp, Format, Plot, Span};
use crate::http::scaling::Scaling;
use crate::http::{HttpState, Live};
use crate::pipeline::state::ChannelShared;
use crate::units::Unit;

/// How long an action waits for the worker.
const COMMAND_TIMEOUT: Duration = Duration::from_secs(5);

fn time(ns: u64) -> Value {
    if ns == 0 {
        Value::Null
    } else {
        Value::String(rfc3339(ns))
    }
}

fn view_json(ch: &ChannelShared, i: usize, v: Option<&AlarmView>) -> Value {
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
        json!({
            "group": z.group,
            "support": z.support,
            "boundaries_mm_s": l.boundaries_mm_s,
            "guidance": GUIDANCE,
        })
    });
    json!({
        "channel": ch.spec.name,
        "band": a.name,
        "unit": a.unit.map(|u| u.symbol),
        "state": v.map_or("unknown", |v| v.state.as_str()),
        "latched": v.map(|v| v.latched),
        "acknowledged": v.map(|v| v.acknowledged),
        "latching": a.spec.latching,
        "since": v.map_or(Value::Null, |v| time(v.since_unix_ns)),
        "value": value,
        "alert_limit": v.and_then(|v| v.alert_limit),
        "danger_limit": v.and_then(|v| v.danger_limit),
        "learning": v.and_then(|v| v.learning),
        "transitions": v.map(|v| json!({
            "normal": v.transitions[0],
            "alert": v.transitions[1],
            "danger": v.transitions[2],
            "inhibited": v.transitions[3],
        })),
        "zone": zone,
    })
}

/// The channel's health and alarms, for the channel detail and the list.
pub fn board_json(ch: &ChannelShared) -> (Value, Vec<Value>) {
    let board: Option<std::sync::Arc<AlarmBoard>> = ch.alarm_board.load_full();
    let health = match &board {
        Some(b) => json!({
            "ok": b.health.ok,
            "reasons": b.health.reasons.names(),
            "since": time(b.health.since_unix_ns),
        }),
        None => json!({ "ok": Value::Null, "reasons": [], "since": Value::Null }),
    };
    let alarms = (0..ch.spec.alarms.len())
        .map(|i| view_json(ch, i, board.as_ref().and_then(|b| b.alarms.get(i))))
        .collect();
    (health, alarms)
}

pub async fn list(Live(st): Live) -> Json<Value> {
    let mut all = Vec::new();
    for ch in &st.app.channels {
        let (_, alarms) = board_json(ch);
        all.extend(alarms);
    }
    Json(json!({ "alarms": all, "caution": CAUTION }))
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
            let mut body = view_json(ch, i, Some(&reply.view));
            if let Value::Object(m) = &mut body {
                m.insert("outcome".into(), reply.outcome.into());
            }
            Ok(Json(body))
        }
        Ok(Ok(Err(e))) => Err(ApiError::Conflict(e.to_string())),
        _ => Err(ApiError::NotReady(
            "the channel's worker did not answer in time".into(),
        )),
    }
}

pub async fn ack(
    Live(st): Live,
    Path((channel, band)): Path<(String, String)>,
    headers: HeaderMap,
) -> Result<Json<Value>, ApiError> {
    authorize(&st, &headers)?;
    let (ch, i) = alarm_of(&st, &channel, &band)?;
    run_command(ch, |reply| AlarmCommand::Ack { alarm: i, reply }, i).await
}

pub async fn relearn(
    Live(st): Live,
    Path((channel, band)): Path<(String, String)>,
    headers: HeaderMap,
) -> Result<Json<Value>, ApiError> {
    authorize(&st, &headers)?;
    let (ch, i) = alarm_of(&st, &channel, &band)?;
    run_command(ch, |reply| AlarmCommand::Relearn { alarm: i, reply }, i).await
}

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
        let mut v = serde_json::to_value(e).map_err(|_| ApiError::Internal)?;
        if let (Some(id), Some(io), Some(dir), Value::Object(m)) =
            (&e.capture, io, &st.app.captures_dir, &mut v)
        {
            let fate = io.capture_fate(dir, id);
            m.insert("capture_status".into(), fate.as_str().into());
            if let Some(r) = fate.reason() {
                m.insert("capture_lost_reason".into(), r.into());
            }
        }
        listed.push(v);
    }
    if let Some(io) = io {
        for (id, reason) in io.lost_captures() {
            lost.push(json!({ "id": id, "reason": reason }));
        }
    }
    Ok(Json(json!({
        "events": listed,
        "captures": captures,
        "lost_captures": lost,
    })))
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

/// One capture's metadata (trip, limits, spectrum at the trip); with
/// `?format=csv|svg` the spectrum at the trip as a download.
pub async fn event(
    Live(st): Live,
    Path(id): Path<String>,
    q: Result<Query<Vec<(String, String)>>, QueryRejection>,
) -> Result<Response, ApiError> {
    let params = Params::new(q, &["format", "amp"])?;
    let format = params.format()?;
    let amp = Amp::parse(params.get("amp"), format)?;
    let dir = st
        .app
        .captures_dir
        .as_ref()
        .ok_or_else(|| ApiError::UnknownCapture(id.clone()))?;
    let meta = capture::read_meta(dir, &id).map_err(|e| capture_error(&st, e))?;
    if format == Format::Json {
        let mut body = serde_json::to_value(&meta).map_err(|_| ApiError::Internal)?;
        if let Value::Object(m) = &mut body {
            m.insert(
                "waveform_url".into(),
                format!("/api/v1/events/{id}/waveform").into(),
            );
        }
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
pub async fn event_waveform(
    Live(st): Live,
    Path(id): Path<String>,
    q: Result<Query<Vec<(String, String)>>, QueryRejection>,
) -> Result<Response, ApiError> {
    let params = Params::new(q, &["format"])?;
    let format = match params.get("format") {
        None | Some("bwf1") => None,
        Some("csv") => Some(Format::Csv),
        Some("svg") => Some(Format::Svg),
        Some(other) => {
            return Err(ApiError::BadQuery(format!(
                "format={other:?} is not known (known: bwf1, csv, svg)"
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
