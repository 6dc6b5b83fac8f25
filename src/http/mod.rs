//! HTTP: the JSON API, `/metrics`, health endpoints. Handlers only read
//! snapshots and counters; they never block a DSP worker.
//!
//! - `api`: `/healthz`, `/readyz`, `/api/v1/channels…` (JSON, CSV)
//! - `alarms`: `/api/v1/alarms…` (states, ack, re-learn) and `/api/v1/events…`
//! - `scaling`: pure spectrum conversions (scaling, unit, frequency crop)
//! - `export`: CSV and SVG downloads (`?format=csv|svg`): the image writer
//! - `metrics`: the Prometheus registry and the scrape-time collector
//! - `error`: `ApiError`, the JSON error every failure is answered with
//! - `history`: `/api/v1/history/…` (stored trends, spectra, waterfall,
//!   compare; storing the live spectrum, marking a reference)
//! - `gate`: the bound on request-time DSP (blocking threads, N at once)
//! - `reload`: `POST /api/v1/reload` (config reload, bearer token)
//! - `auth`: basic auth for every route (`[server] web_config` users)
//! - `page`: the operator page at `/` and its embedded `/assets/{name}`
//! - `server`: the accept loop with its limits, and TLS
//!
//! Every response is gzipped when the request asks for it (`Accept-Encoding:
//! gzip`), see [`router_with`].

pub mod alarms;
pub mod api;
pub mod auth;
pub mod error;
pub mod export;
pub mod gate;
pub mod history;
pub mod metrics;
pub mod openapi;
pub mod page;
pub mod projection;
pub mod reload;
pub mod scaling;
pub mod server;

use std::sync::Arc;

use axum::extract::{MatchedPath, Request, State};
use axum::http::{header, StatusCode};
use axum::middleware::{self, Next};
use axum::response::{IntoResponse, Response};
use axum::routing::{get, post};
use axum::Router;

pub use crate::http::error::ApiError;
use crate::http::gate::DspGate;
use crate::http::metrics::Metrics;
use crate::pipeline::reload::ReloadRequest;
use crate::pipeline::state::{AppState, LiveState};

/// Route label for requests that matched no route (keeps the
/// `path` label of `bandwatch_http_requests_total` bounded).
const UNMATCHED: &str = "unmatched";

/// What every handler gets: the pipeline's read side, the registry and
/// the bound on request-time DSP.
#[derive(Clone)]
pub struct HttpState {
    /// The published state; handlers extract [`Live`], which holds the
    /// one in force when the request came (a reload replaces it).
    pub app: Arc<AppState>,
    pub live: LiveState,
    pub metrics: Arc<Metrics>,
    pub dsp: Arc<DspGate>,
    /// Where `POST /api/v1/reload` asks the daemon for a reload (None: no
    /// reload here, answered 404).
    pub reload: Option<tokio::sync::mpsc::Sender<ReloadRequest>>,
}

impl HttpState {
    /// A state over `app` that no reload replaces (tests).
    pub fn fixed(app: Arc<AppState>, metrics: Arc<Metrics>, dsp: Arc<DspGate>) -> HttpState {
        HttpState {
            live: Arc::new(arc_swap::ArcSwap::new(app.clone())),
            app,
            metrics,
            dsp,
            reload: None,
        }
    }
}

/// The handlers' view: [`HttpState`] with `app` loaded from the live
/// state once, at the start of the request (one request never sees two
/// configs).
pub struct Live(pub HttpState);

impl axum::extract::FromRequestParts<HttpState> for Live {
    type Rejection = std::convert::Infallible;

    async fn from_request_parts(
        _parts: &mut axum::http::request::Parts,
        st: &HttpState,
    ) -> Result<Live, Self::Rejection> {
        let mut st = st.clone();
        st.app = st.live.load_full();
        Ok(Live(st))
    }
}

/// Builds the router; kept apart from `serve` so tests can call it with
/// `tower::ServiceExt::oneshot` and no socket.
pub fn router(state: Arc<AppState>) -> Router {
    app(state).0
}

/// The router, and the connection series of its `/metrics` for the accept
/// loop ([`server::serve`]) to update.
pub fn app(state: Arc<AppState>) -> (Router, metrics::ConnectionMetrics) {
    app_live(Arc::new(arc_swap::ArcSwap::new(state)), None)
}

/// As [`app`], over a state a reload replaces, with the daemon's reload
/// queue (`POST /api/v1/reload`).
pub fn app_live(
    live: LiveState,
    reload: Option<tokio::sync::mpsc::Sender<ReloadRequest>>,
) -> (Router, metrics::ConnectionMetrics) {
    let metrics = Arc::new(Metrics::live(live.clone()));
    let connections = metrics.connections();
    let router = router_with(HttpState {
        app: live.load_full(),
        live,
        metrics,
        dsp: Arc::new(DspGate::per_core()),
        reload,
    });
    (router, connections)
}

/// As [`router`], with a prepared state (tests pin the metrics clock).
pub fn router_with(st: HttpState) -> Router {
    Router::new()
        .route("/", get(page::index))
        .route("/assets/{name}", get(page::asset))
        .route("/healthz", get(api::healthz))
        .route("/readyz", get(api::readyz))
        .route("/metrics", get(metrics_handler))
        .route("/api/v1/overview", get(api::overview))
        .route("/api/v1/channels", get(api::list_channels))
        .route("/api/v1/channels/{name}", get(api::channel_detail))
        .route("/api/v1/channels/{name}/spectrum", get(api::spectrum))
        .route("/api/v1/channels/{name}/waveform", get(api::waveform))
        .route("/api/v1/channels/{name}/trend", get(api::trend))
        .route(
            "/api/v1/channels/{name}/projection",
            get(projection::projection),
        )
        .route("/api/v1/alarms", get(alarms::list))
        .route("/api/v1/alarms/{channel}/{band}/ack", post(alarms::ack))
        .route(
            "/api/v1/alarms/{channel}/{band}/relearn",
            post(alarms::relearn),
        )
        .route("/api/v1/reload", post(reload::reload))
        .route("/api/v1/events", get(alarms::events))
        .route("/api/v1/events/{id}", get(alarms::event))
        .route("/api/v1/events/{id}/waveform", get(alarms::event_waveform))
        .route("/api/v1/history/channels/{name}/trend", get(history::trend))
        .route(
            "/api/v1/history/channels/{name}/spectra",
            get(history::list_spectra).post(history::store_spectrum),
        )
        .route(
            "/api/v1/history/channels/{name}/waterfall",
            get(history::waterfall),
        )
        .route(
            "/api/v1/history/channels/{name}/compare",
            get(history::compare),
        )
        .route(
            "/api/v1/history/spectra/{id}",
            get(history::stored_spectrum),
        )
        .route(
            "/api/v1/history/spectra/{id}/reference",
            post(history::mark_reference),
        )
        .route("/api/v1/openapi.json", get(openapi::openapi_json))
        .route_layer(middleware::from_fn_with_state(st.clone(), count_matched))
        .fallback(count_unmatched)
        .method_not_allowed_fallback(api::method_not_allowed)
        .with_state(st)
        .layer(compression())
}

/// gzip for a client that sends `Accept-Encoding: gzip`, on every route;
/// none without it. `/metrics` is the reason (its text shrinks about
/// tenfold, and at thousands of channels the body is the cost of a
/// scrape); the JSON spectra, waveforms and CSV/SVG downloads are large
/// repetitive text too, and a browser on the plant network asks for it.
/// tower-http's default predicate leaves bodies under 32 bytes, images
/// and event streams alone.
fn compression() -> tower_http::compression::CompressionLayer {
    tower_http::compression::CompressionLayer::new()
}

/// Counts a request that matched a route, under its template
/// (`/api/v1/channels/{name}`), never the raw path.
async fn count_matched(State(st): State<HttpState>, req: Request, next: Next) -> Response {
    let path = req.extensions().get::<MatchedPath>().cloned();
    let resp = next.run(req).await;
    let label = path.as_ref().map_or(UNMATCHED, MatchedPath::as_str);
    st.metrics.observe_request(label, resp.status());
    resp
}

async fn count_unmatched(State(st): State<HttpState>) -> ApiError {
    let e = ApiError::NoRoute;
    st.metrics.observe_request(UNMATCHED, e.status());
    e
}

/// Serves the cached body when it is fresh; otherwise renders on a
/// blocking thread (a render of thousands of channels takes milliseconds
/// and must not hold up the async workers serving other routes).
async fn metrics_handler(State(st): State<HttpState>) -> Response {
    let body = match st.metrics.cached() {
        Some(b) => Ok(b),
        None => {
            let m = st.metrics.clone();
            match tokio::task::spawn_blocking(move || m.render()).await {
                Ok(r) => r,
                Err(e) => {
                    tracing::error!(error = %e, "the /metrics render task failed");
                    return ApiError::Internal.into_response();
                }
            }
        }
    };
    match body {
        Ok(body) => (
            StatusCode::OK,
            [(header::CONTENT_TYPE, metrics::CONTENT_TYPE)],
            body,
        )
            .into_response(),
        Err(e) => {
            tracing::error!(error = %e, "cannot encode /metrics");
            ApiError::Internal.into_response()
        }
    }
}

#[cfg(test)]
mod tests;
