//! HTTP: the JSON API, `/metrics`, health endpoints. Handlers only read
//! snapshots and counters; they never block a DSP worker.

use std::sync::Arc;

use axum::routing::get;
use axum::Router;

use crate::snapshot::AppState;

/// Builds the router; kept apart from `serve` so tests can call it with
/// `tower::ServiceExt::oneshot` and no socket.
pub fn router(state: Arc<AppState>) -> Router {
    Router::new()
        .route("/healthz", get(|| async { "ok\n" }))
        .with_state(state)
}
