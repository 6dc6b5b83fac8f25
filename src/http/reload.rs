//! `POST /api/v1/reload`: asks the daemon to re-read its config file
//! (README "Reloading the config"). Same bearer token as the alarm
//! actions. 200 with what changed; 422 with every problem (field path and
//! message) when the new config was kept out and the old one runs on.

use std::time::Duration;

use axum::http::{HeaderMap, StatusCode};
use axum::response::{IntoResponse, Response};
use axum::Json;
use serde_json::json;

use crate::http::alarms::authorize;
use crate::http::error::ApiError;
use crate::http::Live;
use crate::pipeline::reload::ReloadRequest;

/// Longest wait for the daemon's answer (a reload that restarts sources
/// waits for them to stop).
const RELOAD_TIMEOUT: Duration = Duration::from_secs(20);

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
            Json(json!({ "status": "reloaded", "summary": summary })),
        )
            .into_response()),
        Ok(Ok(Err(e))) => Ok((
            StatusCode::UNPROCESSABLE_ENTITY,
            Json(json!({
                "error": "config reload refused; the old config runs on",
                "problems": e.problems(),
            })),
        )
            .into_response()),
        _ => Err(ApiError::NotReady(
            "the daemon did not answer the reload in time".into(),
        )),
    }
}
