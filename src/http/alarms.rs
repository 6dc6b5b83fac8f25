//! `/api/v1/alarms…` and `/api/v1/events…`: alarm states, operator actions
//! (acknowledge, re-learn; bearer token), the event record and captures.
//!
//! States come from each channel's alarm board (replaced by its worker on
//! every change); values from the latest snapshot. Actions are sent to the
//! channel's worker, which owns the alarm machines, and answered with the
//! alarm as the worker left it.

use std::time::Duration;

use axum::extract::Path;
use axum::http::{header, HeaderMap};
use axum::response::{IntoResponse, Response};
use axum::Json;
use serde_json::{json, Value};

use crate::alarm::capture;
use crate::alarm::engine::{AlarmBoard, AlarmCommand, AlarmView, CommandError};
use crate::alarm::journal::rfc3339;
use crate::config::zones::GUIDANCE;
use crate::config::AlarmTarget;
use crate::http::error::ApiError;
use crate::http::{HttpState, Live};
use crate::pipeline::state::ChannelShared;

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
/// `/waveform`, its BWF1 waveform file.
pub async fn event(Live(st): Live, Path(id): Path<String>) -> Result<Json<Value>, ApiError> {
    let dir = st
        .app
        .captures_dir
        .as_ref()
        .ok_or_else(|| ApiError::UnknownCapture(id.clone()))?;
    let meta = capture::read_meta(dir, &id).map_err(|e| capture_error(&st, e))?;
    let mut body = serde_json::to_value(&meta).map_err(|_| ApiError::Internal)?;
    if let Value::Object(m) = &mut body {
        m.insert(
            "waveform_url".into(),
            format!("/api/v1/events/{id}/waveform").into(),
        );
    }
    Ok(Json(body))
}

pub async fn event_waveform(Live(st): Live, Path(id): Path<String>) -> Result<Response, ApiError> {
    let dir = st
        .app
        .captures_dir
        .as_ref()
        .ok_or_else(|| ApiError::UnknownCapture(id.clone()))?;
    let bytes = capture::read_waveform(dir, &id).map_err(|e| capture_error(&st, e))?;
    Ok((
        [
            (header::CONTENT_TYPE, "application/octet-stream".to_string()),
            (
                header::CONTENT_DISPOSITION,
                format!("attachment; filename=\"{id}.bwf1\""),
            ),
        ],
        bytes,
    )
        .into_response())
}
