//! `POST /api/v1/reload`: asks the daemon to re-read its config file
//! (README "Reloading the config"). Same bearer token as the alarm
//! actions. 200 with what changed; 422 with every problem (field path and
//! message) when the new config was kept out and the old one runs on.

use std::time::Duration;

use axum::http::{HeaderMap, StatusCode};
use axum::response::{IntoResponse, Response};
use axum::Json;
use serde::Serialize;
use utoipa::ToSchema;

use crate::http::alarms::authorize;
use crate::http::api::sorted;
use crate::http::error::{ApiError, ErrorBody};
use crate::http::Live;
use crate::pipeline::reload::{Problem, ReloadRequest, ReloadSummary};

/// Longest wait for the daemon's answer (a reload that restarts sources
/// waits for them to stop).
const RELOAD_TIMEOUT: Duration = Duration::from_secs(20);

/// A reload that was applied.
#[derive(Serialize, ToSchema)]
pub struct Reloaded {
    /// Always "reloaded".
    #[schema(value_type = String)]
    status: &'static str,
    /// What changed, by name.
    summary: ReloadSummary,
}

/// A reload that was refused: the old config runs on.
#[derive(Serialize, ToSchema)]
pub struct ReloadRefused {
    #[schema(value_type = String)]
    error: &'static str,
    /// Every problem, with the config field at fault.
    problems: Vec<Problem>,
}

/// Re-reads the config file and applies what changed (bearer token).
#[utoipa::path(post, path = "/api/v1/reload", tag = "config",
    security(("bearer" = [])),
    responses(
        (status = 200, description = "Reloaded; what changed", body = Reloaded),
        (status = 401, description = "Missing or wrong bearer token (or no token configured)", body = ErrorBody),
        (status = 404, description = "No reload here (not the daemon)", body = ErrorBody),
        (status = 422, description = "The new config was refused; the old one runs on", body = ReloadRefused),
        (status = 503, description = "The daemon is stopping, or did not answer in time", body = ErrorBody),
    ))]
pub async fn reload(Live(st): Live, headers: HeaderMap) -> Result<Response, ApiError> {
    authorize(&st, &headers)?;
    let Some(queue) = &st.reload else {
        return Err(ApiError::NoRoute);
    };
    let (tx, rx) = tokio::sync::oneshot::channel();
    let req = ReloadRequest {
        origin: "http",
        reply: Some(tx),
    };
    if queue.send(req).await.is_err() {
        return Err(ApiError::NotReady("the daemon is stopping".into()));
    }
    match tokio::time::timeout(RELOAD_TIMEOUT, rx).await {
        Ok(Ok(Ok(summary))) => Ok((
            StatusCode::OK,
            Json(sorted(&Reloaded {
                status: "reloaded",
                summary,
            })?),
        )
            .into_response()),
        Ok(Ok(Err(e))) => Ok((
            StatusCode::UNPROCESSABLE_ENTITY,
            Json(sorted(&ReloadRefused {
                error: "config reload refused; the old config runs on",
                problems: e.problems().to_vec(),
            })?),
        )
            .into_response()),
        _ => Err(ApiError::NotReady(
            "the daemon did not answer the reload in time".into(),
        )),
    }
}
