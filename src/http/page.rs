//! The operator page: static assets under `assets/web/`, embedded in the
//! binary (`include_str!`), served at `/` (the page) and `/assets/{name}`.
//!
//! Every answer carries a strict `Content-Security-Policy` (the page's
//! scripts and styles come from files of this daemon only; no inline code,
//! no other host), `X-Content-Type-Options: nosniff`, a strong `ETag` (the
//! SHA-256 of the bytes, computed once on first use) and `Cache-Control`:
//! `no-cache` (the browser keeps the copy but asks again; a matching
//! `If-None-Match` is answered 304 with no body), so a new binary's assets
//! are picked up on the next load. The page reads only the public JSON
//! API; nothing here is private to it.

use std::sync::OnceLock;

use axum::extract::Path;
use axum::http::{header, HeaderMap, HeaderValue, StatusCode};
use axum::response::{IntoResponse, Response};

use crate::http::error::ApiError;

/// The policy every page answer carries (README "The operator page").
pub const CSP: &str = "default-src 'self'; script-src 'self'; style-src 'self'; \
img-src 'self' data:; connect-src 'self'; font-src 'self'; object-src 'none'; \
base-uri 'none'; form-action 'self'; frame-ancestors 'none'";

/// Browsers keep the copy and revalidate it by its ETag on every use.
pub const CACHE_CONTROL: &str = "no-cache";

/// One embedded file.
pub struct Asset {
    pub name: &'static str,
    pub content_type: &'static str,
    pub body: &'static str,
}

/// The page's files; `index.html` is served at `/`, all at `/assets/{name}`.
pub const ASSETS: &[Asset] = &[
    Asset {
        name: "index.html",
        content_type: "text/html; charset=utf-8",
        body: include_str!("../../assets/web/index.html"),
    },
    Asset {
        name: "app.css",
        content_type: "text/css; charset=utf-8",
        body: include_str!("../../assets/web/app.css"),
    },
    Asset {
        name: "app.js",
        content_type: "text/javascript; charset=utf-8",
        body: include_str!("../../assets/web/app.js"),
    },
    Asset {
        name: "api.js",
        content_type: "text/javascript; charset=utf-8",
        body: include_str!("../../assets/web/api.js"),
    },
    Asset {
        name: "plot.js",
        content_type: "text/javascript; charset=utf-8",
        body: include_str!("../../assets/web/plot.js"),
    },
    Asset {
        name: "ui.js",
        content_type: "text/javascript; charset=utf-8",
        body: include_str!("../../assets/web/ui.js"),
    },
    Asset {
        name: "overview.js",
        content_type: "text/javascript; charset=utf-8",
        body: include_str!("../../assets/web/overview.js"),
    },
    Asset {
        name: "channel.js",
        content_type: "text/javascript; charset=utf-8",
        body: include_str!("../../assets/web/channel.js"),
    },
    Asset {
        name: "history.js",
        content_type: "text/javascript; charset=utf-8",
        body: include_str!("../../assets/web/history.js"),
    },
    Asset {
        name: "histplot.js",
        content_type: "text/javascript; charset=utf-8",
        body: include_str!("../../assets/web/histplot.js"),
    },
    Asset {
        name: "trend.js",
        content_type: "text/javascript; charset=utf-8",
        body: include_str!("../../assets/web/trend.js"),
    },
    Asset {
        name: "alarms.js",
        content_type: "text/javascript; charset=utf-8",
        body: include_str!("../../assets/web/alarms.js"),
    },
    Asset {
        name: "capture.js",
        content_type: "text/javascript; charset=utf-8",
        body: include_str!("../../assets/web/capture.js"),
    },
];

/// The strong ETag of each asset (quoted hex SHA-256 of its bytes, in the
/// order of [`ASSETS`]), computed on first use.
fn etags() -> &'static [String] {
    static TAGS: OnceLock<Vec<String>> = OnceLock::new();
    TAGS.get_or_init(|| {
        ASSETS
            .iter()
            .map(|a| {
                let d = ring::digest::digest(&ring::digest::SHA256, a.body.as_bytes());
                let hex: String = d.as_ref().iter().map(|b| format!("{b:02x}")).collect();
                format!("\"{hex}\"")
            })
            .collect()
    })
}

/// Whether an `If-None-Match` value names `etag` (RFC 9110 §13.1.2: a
/// list of entity tags, or `*`; weak comparison, so `W/` is ignored).
fn none_match(headers: &HeaderMap, etag: &str) -> bool {
    headers
        .get_all(header::IF_NONE_MATCH)
        .iter()
        .filter_map(|v| v.to_str().ok())
        .flat_map(|v| v.split(','))
        .map(str::trim)
        .any(|t| t == "*" || t.trim_start_matches("W/") == etag)
}

fn serve(i: usize, headers: &HeaderMap) -> Response {
    let asset = &ASSETS[i];
    let etag = &etags()[i];
    let common = [
        (header::CONTENT_SECURITY_POLICY, CSP),
        (header::CACHE_CONTROL, CACHE_CONTROL),
        (header::X_CONTENT_TYPE_OPTIONS, "nosniff"),
        (header::REFERRER_POLICY, "no-referrer"),
    ];
    let tag = HeaderValue::from_str(etag).unwrap_or(HeaderValue::from_static("\"\""));
    if none_match(headers, etag) {
        return (StatusCode::NOT_MODIFIED, common, [(header::ETAG, tag)]).into_response();
    }
    (
        StatusCode::OK,
        common,
        [
            (header::ETAG, tag),
            (
                header::CONTENT_TYPE,
                HeaderValue::from_static(asset.content_type),
            ),
        ],
        asset.body,
    )
        .into_response()
}

/// `GET /`: the page.
#[utoipa::path(get, path = "/", tag = "page", responses(
    (status = 200, description = "The operator page", content_type = "text/html", body = String),
    (status = 304, description = "Not modified (`If-None-Match` carried its ETag)"),
))]
pub async fn index(headers: HeaderMap) -> Response {
    serve(0, &headers)
}

/// `GET /assets/{name}`: one of [`ASSETS`]; any other name is a 404.
#[utoipa::path(get, path = "/assets/{name}", tag = "page",
    params(("name" = String, Path, description = "File name of one of the page's files (e.g. app.js)")),
    responses(
        (status = 200, description = "The file",
            content(
                (String = "text/css"),
                (String = "text/javascript"),
                (String = "text/html"),
            )),
        (status = 304, description = "Not modified (`If-None-Match` carried its ETag)"),
        (status = 404, description = "No such file", body = crate::http::error::ErrorBody),
    ))]
pub async fn asset(Path(name): Path<String>, headers: HeaderMap) -> Response {
    match ASSETS.iter().position(|a| a.name == name) {
        Some(i) => serve(i, &headers),
        None => ApiError::NoRoute.into_response(),
    }
}
