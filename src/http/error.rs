//! The one error type of the HTTP API. Every failure a client can see is an
//! `ApiError`, rendered as JSON `{"error": "..."}` with a status that says
//! whose fault it is. Messages name what the client sent (a channel, a query
//! key) and never carry internal details: those go to the log.

use axum::http::StatusCode;
use axum::response::{IntoResponse, Response};
use axum::Json;
use serde::Serialize;

#[derive(Debug, thiserror::Error)]
pub enum ApiError {
    /// No channel of that name in the config.
    #[error("unknown channel {0:?}")]
    UnknownChannel(String),
    /// A query parameter is missing its value, unknown, repeated or out of range.
    #[error("{0}")]
    BadQuery(String),
    /// The channel exists but has not published a spectrum yet.
    #[error("channel {0:?} has not published a spectrum yet; retry shortly")]
    NoSnapshot(String),
    /// `/readyz`: these channels have not published a spectrum yet.
    #[error("not ready: {} channel(s) still waiting for a first spectrum", .0.len())]
    Waiting(Vec<String>),
    /// The request is valid but cannot be answered now (e.g. a band that
    /// follows running speed while the speed is unknown).
    #[error("{0}")]
    NotReady(String),
    /// Missing or wrong bearer token.
    #[error("missing or wrong bearer token")]
    Unauthorized,
    /// The channel has no alarm of that name.
    #[error("channel {0:?} has no alarm {1:?}")]
    UnknownAlarm(String, String),
    /// No capture with that id.
    #[error("no capture {0:?}")]
    UnknownCapture(String),
    /// The capture has no spectrum at the trip (none was published yet).
    #[error("capture {0:?} holds no spectrum at the trip")]
    NoCaptureSpectrum(String),
    /// An event names this capture, but it is not on disk: still being
    /// collected ("pending"), never written ("lost", with the reason) or
    /// removed by retention ("pruned").
    #[error("capture {id:?} is {status}{}", reason.as_ref().map(|r| format!(": {r}")).unwrap_or_default())]
    CaptureUnavailable {
        id: String,
        status: &'static str,
        reason: Option<String>,
    },
    /// The action does not apply in the alarm's state (e.g. ack of an
    /// alarm that is not latched).
    #[error("{0}")]
    Conflict(String),
    /// The config has no `[history]`: nothing is stored.
    #[error("no history here: the config has no [history] table")]
    NoHistory,
    /// `[history]` is on but its file does not exist (yet).
    #[error("no history stored yet")]
    NoHistoryYet,
    /// Not in the history file: a series, a spectrum, a reference.
    #[error("{0}")]
    NotStored(String),
    /// No route for this path.
    #[error("no such endpoint")]
    NoRoute,
    /// A route exists but not for this method.
    #[error("method not allowed")]
    MethodNotAllowed,
    /// Every permit of request-time DSP stayed taken for the whole wait
    /// (the bound is the number of computations that may run at once).
    #[error("busy: {0} request-time DSP computation(s) already running; retry shortly")]
    Busy(usize),
    /// The request was not answered within `server.request_timeout_s`.
    #[error("not answered within the request timeout ({0} s); retry shortly")]
    Timeout(f64),
    /// Something on our side failed; the detail is logged, not sent.
    #[error("internal error")]
    Internal,
}

impl ApiError {
    pub fn status(&self) -> StatusCode {
        match self {
            ApiError::UnknownChannel(_)
            | ApiError::NoRoute
            | ApiError::UnknownAlarm(..)
            | ApiError::UnknownCapture(_)
            | ApiError::NoCaptureSpectrum(_)
            | ApiError::CaptureUnavailable { .. }
            | ApiError::NoHistory
            | ApiError::NoHistoryYet
            | ApiError::NotStored(_) => StatusCode::NOT_FOUND,
            ApiError::Unauthorized => StatusCode::UNAUTHORIZED,
            ApiError::Conflict(_) => StatusCode::CONFLICT,
            ApiError::BadQuery(_) => StatusCode::BAD_REQUEST,
            ApiError::NoSnapshot(_)
            | ApiError::Waiting(_)
            | ApiError::NotReady(_)
            | ApiError::Busy(_)
            | ApiError::Timeout(_) => StatusCode::SERVICE_UNAVAILABLE,
            ApiError::MethodNotAllowed => StatusCode::METHOD_NOT_ALLOWED,
            ApiError::Internal => StatusCode::INTERNAL_SERVER_ERROR,
        }
    }
}

/// The body of every error: `error` always; the other fields only for the
/// errors that carry them. Keys in alphabetical order, as the API has
/// always written them.
#[derive(Debug, Serialize, utoipa::ToSchema)]
pub struct ErrorBody {
    /// The capture asked for (404 of a capture that is not on disk).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub capture: Option<String>,
    /// Why the capture was never written (`capture_status` "lost"); null
    /// for the other statuses. Present only with `capture`.
    #[serde(skip_serializing_if = "Option::is_none")]
    #[schema(value_type = Option<String>)]
    pub capture_lost_reason: Option<Option<String>>,
    /// What became of the capture: "pending", "lost" or "pruned".
    #[serde(skip_serializing_if = "Option::is_none")]
    #[schema(value_type = String)]
    pub capture_status: Option<&'static str>,
    /// What went wrong, naming what the client sent.
    pub error: String,
    /// `/readyz`: the channels still waiting for a first spectrum.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub waiting: Option<Vec<String>>,
}

impl ApiError {
    /// The JSON body this error is answered with.
    pub fn body(&self) -> ErrorBody {
        let mut body = ErrorBody {
            capture: None,
            capture_lost_reason: None,
            capture_status: None,
            error: self.to_string(),
            waiting: None,
        };
        match self {
            ApiError::Waiting(names) => body.waiting = Some(names.clone()),
            ApiError::CaptureUnavailable { id, status, reason } => {
                body.capture = Some(id.clone());
                body.capture_status = Some(status);
                body.capture_lost_reason = Some(reason.clone());
            }
            _ => {}
        }
        body
    }
}

impl IntoResponse for ApiError {
    fn into_response(self) -> Response {
        (self.status(), Json(self.body())).into_response()
    }
}
