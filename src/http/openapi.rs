//! The OpenAPI 3.1 document of the HTTP API, served at
//! `GET /api/v1/openapi.json`.
//!
//! It is generated (utoipa) from the handlers themselves: each handler
//! carries a `#[utoipa::path]` attribute (method, path, parameters, every
//! status it can answer), its response body is a typed struct deriving
//! `ToSchema` (the very struct it serializes), and its query string is an
//! `IntoParams` struct whose field names are also the keys the handler
//! accepts (`api::Params::of`). `src/http/tests/openapi.rs` keeps the
//! document and the router in step: the set of (method, path) in the
//! document equals the set of routes `router_with` registers, every
//! documented operation reaches its handler, and every `$ref` resolves.

use std::sync::OnceLock;

use axum::http::header;
use axum::response::{IntoResponse, Response};
use utoipa::openapi::security::{HttpAuthScheme, HttpBuilder, SecurityScheme};
use utoipa::OpenApi;

use crate::http::error::{ApiError, ErrorBody};
use crate::http::{alarms, api, history, page, projection, reload};

/// The document: every route of the router.
#[derive(OpenApi)]
#[openapi(
    info(
        title = "bandwatch HTTP API",
        description = "Rolling spectra, band and overall levels, alarms and \
captures of bandwatch's channels (README, \"HTTP API\"). Every error is JSON \
`{\"error\": \"...\"}` (ErrorBody). With `[server] web_config` users, every \
route also answers 401 without basic auth; any route answers 503 when the \
request timeout (`[server] request_timeout_s`) runs out. Monitoring only, not \
a machinery protection or safety system."
    ),
    paths(
        page::index,
        page::asset,
        api::healthz,
        api::readyz,
        metrics_doc,
        api::overview,
        api::list_channels,
        api::channel_detail,
        api::spectrum,
        api::waveform,
        api::trend,
        projection::projection,
        alarms::list,
        alarms::ack,
        alarms::relearn,
        reload::reload,
        alarms::events,
        alarms::event,
        alarms::event_waveform,
        history::trend,
        history::list_spectra,
        history::store_spectrum,
        history::stored_spectrum,
        history::waterfall,
        history::compare,
        history::mark_reference,
        openapi_json,
    ),
    components(schemas(ErrorBody)),
    modifiers(&BearerToken),
    tags(
        (name = "channels", description = "Channels: settings, levels, spectra, waveforms, trends"),
        (name = "alarms", description = "Alarm states and the operator actions (bearer token)"),
        (name = "events", description = "The alarm journal and waveform captures"),
        (name = "history", description = "The history file: stored trends and spectra, \
waterfall, comparison with a reference (`[history]`)"),
        (name = "config", description = "Config reload (bearer token)"),
        (name = "health", description = "Liveness and readiness"),
        (name = "metrics", description = "Prometheus exposition"),
        (name = "page", description = "The operator page and its files"),
        (name = "meta", description = "This document"),
    )
)]
pub struct ApiDoc;

/// The bearer token of the alarm actions and the reload
/// (`[alarms] token_file` / `token_env`).
struct BearerToken;

impl utoipa::Modify for BearerToken {
    fn modify(&self, doc: &mut utoipa::openapi::OpenApi) {
        let components = doc.components.get_or_insert_with(Default::default);
        components.add_security_scheme(
            "bearer",
            SecurityScheme::Http(
                HttpBuilder::new()
                    .scheme(HttpAuthScheme::Bearer)
                    .description(Some(
                        "The operator token (`[alarms] token_file` or `token_env`): \
                         `Authorization: Bearer <token>`",
                    ))
                    .build(),
            ),
        );
    }
}

/// `/metrics` is served by `http::metrics_handler`; this describes it.
#[utoipa::path(get, path = "/metrics", tag = "metrics", responses(
    (status = 200, description = "Prometheus text exposition format 0.0.4 \
(`text/plain; version=0.0.4`; gzip when asked); README \"Metrics\"",
        content_type = "text/plain", body = String),
    (status = 500, description = "The exposition could not be rendered (logged)", body = ErrorBody),
))]
#[allow(dead_code)] // only its #[utoipa::path] is used
fn metrics_doc() {}

/// The document as JSON, made once.
pub fn document() -> Result<&'static str, ApiError> {
    static DOC: OnceLock<Result<String, String>> = OnceLock::new();
    DOC.get_or_init(|| ApiDoc::openapi().to_json().map_err(|e| e.to_string()))
        .as_deref()
        .map_err(|e| {
            tracing::error!(error = %e, "cannot serialise the OpenAPI document");
            ApiError::Internal
        })
}

/// This document.
#[utoipa::path(get, path = "/api/v1/openapi.json", tag = "meta", responses(
    (status = 200, description = "This OpenAPI 3.1 document", content_type = "application/json",
        body = Object),
    (status = 500, description = "The document could not be serialised (logged)", body = ErrorBody),
))]
pub async fn openapi_json() -> Response {
    match document() {
        Ok(doc) => ([(header::CONTENT_TYPE, "application/json")], doc).into_response(),
        Err(e) => e.into_response(),
    }
}
