//! `/api/v1/history/…`: queries over the history file (docs/history.md
//! "Queries"), and the two operator writes (store the live spectrum now,
//! mark a reference; bearer token).
//!
//! Every handler checks its query string first, then opens the file on a
//! blocking thread (`tokio::task::spawn_blocking`; read-only per request
//! with `schema::open_read`, so a query never blocks the writer thread in
//! WAL mode nor an async worker), and answers with `ApiError`s: no
//! `[history]` in the config and no file yet are 404s saying which.
//!
//! Times (`from`, `to`) are RFC 3339 (`2026-12-01T00:00:00Z`) or relative
//! to now: `now`, `-7d`, `-12h`, `-30m`, `-90s`.

use std::fmt::Write as _;
use std::path::Path as FsPath;
use std::sync::atomic::Ordering;
use std::sync::Arc;

use axum::extract::rejection::QueryRejection;
use axum::extract::{Path, Query};
use axum::http::{HeaderMap, StatusCode};
use axum::response::{IntoResponse, Response};
use axum::Json;
use serde::Serialize;
use utoipa::{IntoParams, ToSchema};

use crate::clock::unix_now_ns;
use crate::history::query::{self, QueryError, Side, StoredSpectrum, WaterfallAsk};
use crate::history::store::{self, StoredBand};
use crate::history::{schema, HistoryShared, SpectrumRecord, StoreReason};
use crate::http::alarms::authorize;
use crate::http::api::{
    channel_of, enum_schema, parse_kind, parse_range, parse_scaling, parse_unit, rfc3339_ns,
    Params, SpectrumAsk, SpectrumBody, SpectrumSource,
};
use crate::http::error::{ApiError, ErrorBody};
use crate::http::export::{self, Format};
use crate::http::scaling::{Conversion, Scaling};
use crate::http::{HttpState, Live};
use crate::pipeline::state::{ChannelShared, ChannelSnapshot};
use crate::units::Unit;

/// Points of a trend when `points=` is not given, and the most it may ask.
const DEFAULT_POINTS: usize = 1000;
const MAX_POINTS: usize = 100_000;
/// Spectra listed when `limit=` is not given, and the most it may ask.
const DEFAULT_LIMIT: usize = 100;
const MAX_LIMIT: usize = 10_000;
/// Waterfall columns and rows: defaults and bounds.
const DEFAULT_COLUMNS: usize = 512;
const MAX_COLUMNS: usize = 8192;
const DEFAULT_MAX_SPECTRA: usize = 200;
const MAX_MAX_SPECTRA: usize = 2000;

// ---------------------------------------------------------------------------
// Shared pieces
// ---------------------------------------------------------------------------

fn history_of(st: &HttpState) -> Result<Arc<HistoryShared>, ApiError> {
    st.app.history.clone().ok_or(ApiError::NoHistory)
}

/// Runs `f` on a blocking thread (the database work).
async fn blocking<T: Send + 'static>(
    f: impl FnOnce() -> Result<T, ApiError> + Send + 'static,
) -> Result<T, ApiError> {
    tokio::task::spawn_blocking(f).await.unwrap_or_else(|e| {
        tracing::error!(error = %e, "a history query task failed");
        Err(ApiError::Internal)
    })
}

/// Opens the file read-only: a missing file is "no history stored yet".
fn open_read(path: &FsPath) -> Result<rusqlite::Connection, ApiError> {
    if !path.exists() {
        return Err(ApiError::NoHistoryYet);
    }
    schema::open_read(path).map_err(|e| {
        tracing::error!(error = %e, "cannot open the history file");
        ApiError::Internal
    })
}

/// A query's error as the client sees it (the file's own errors are
/// logged, not sent).
fn api_error(e: QueryError) -> ApiError {
    match e {
        QueryError::UnknownSeries { .. } | QueryError::NoSpectrum(_) => {
            ApiError::NotStored(e.to_string())
        }
        QueryError::NoEnvelope { .. } => ApiError::BadQuery(e.to_string()),
        QueryError::Mismatch { .. } => ApiError::Conflict(e.to_string()),
        QueryError::Sqlite(_) | QueryError::Blob { .. } | QueryError::Bands { .. } => {
            tracing::error!(error = %e, "history query failed");
            ApiError::Internal
        }
    }
}

/// `from=` or `to=`: Unix seconds.
pub(crate) fn parse_time(key: &str, value: &str, now_s: i64) -> Result<i64, ApiError> {
    let v = value.trim();
    let bad = || {
        ApiError::BadQuery(format!(
            "{key}={value:?} is not a time: RFC 3339 (2026-12-01T00:00:00Z), now, or \
             relative to now (-7d, -12h, -30m, -90s)"
        ))
    };
    if v == "now" {
        return Ok(now_s);
    }
    if let Some(rel) = v.strip_prefix('-') {
        let (digits, unit) = rel.split_at(rel.len().saturating_sub(1));
        let per: i64 = match unit {
            "d" => 86_400,
            "h" => 3600,
            "m" => 60,
            "s" => 1,
            _ => return Err(bad()),
        };
        let n: i64 = digits.parse().map_err(|_| bad())?;
        return n
            .checked_mul(per)
            .and_then(|d| now_s.checked_sub(d))
            .ok_or_else(bad);
    }
    time::OffsetDateTime::parse(v, &time::format_description::well_known::Rfc3339)
        .map(|t| t.unix_timestamp())
        .map_err(|_| bad())
}

/// The last second [`time_range`] reaches: 9999-12-31T23:59:59Z, the
/// last RFC 3339 can write.
const LAST_SECOND: i64 = 253_402_300_799;

/// `from` and `to` (defaults -1d and now), Unix seconds, from ≤ to. Times
/// before 1970 or after [`LAST_SECOND`] are taken as those ends (nothing
/// is stored outside them), so `-99999d` means "from the start".
fn time_range(params: &Params) -> Result<(i64, i64), ApiError> {
    let now_s = (unix_now_ns() / 1_000_000_000) as i64;
    let from = match params.get("from") {
        None => now_s - 86_400,
        Some(v) => parse_time("from", v, now_s)?,
    }
    .clamp(0, LAST_SECOND);
    let to = match params.get("to") {
        None => now_s,
        Some(v) => parse_time("to", v, now_s)?,
    }
    .clamp(0, LAST_SECOND);
    if from > to {
        return Err(ApiError::BadQuery(format!(
            "from ({}) is after to ({})",
            rfc3339_s(from),
            rfc3339_s(to)
        )));
    }
    Ok((from, to))
}

/// Unix second `s` as RFC 3339 (`1970-01-01T00:00:00Z` for 0); a second
/// outside what RFC 3339 can write as its number.
fn rfc3339_s(s: i64) -> String {
    time::OffsetDateTime::from_unix_timestamp(s)
        .ok()
        .filter(|_| (0..=LAST_SECOND).contains(&s))
        .and_then(|t| {
            t.format(&time::format_description::well_known::Rfc3339)
                .ok()
        })
        .unwrap_or_else(|| s.to_string())
}

fn ns_of(s: i64) -> i64 {
    s.saturating_mul(1_000_000_000)
}

/// The last nanosecond of second `s` (`to` is a whole second: the spectra
/// within it count).
fn end_ns(s: i64) -> i64 {
    ns_of(s).saturating_add(999_999_999)
}

/// A whole number in `1 ..= max` (default `default`).
fn count(params: &Params, key: &str, default: usize, max: usize) -> Result<usize, ApiError> {
    match params.get(key) {
        None => Ok(default),
        Some(v) => match v.trim().parse::<usize>() {
            Ok(n) if (1..=max).contains(&n) => Ok(n),
            _ => Err(ApiError::BadQuery(format!(
                "{key}={v:?} is not a whole number from 1 to {max}"
            ))),
        },
    }
}

/// `format=json` (default) or `csv`; anything else is a 400 naming the
/// two (these endpoints draw no image).
fn json_or_csv(params: &Params) -> Result<Format, ApiError> {
    match params.get("format") {
        None | Some("json") => Ok(Format::Json),
        Some("csv") => Ok(Format::Csv),
        Some(other) => Err(ApiError::BadQuery(format!(
            "format={other:?} is not offered here (known: json, csv)"
        ))),
    }
}

fn json_csv_schema() -> utoipa::openapi::Object {
    enum_schema(["json", "csv"])
}

fn kind_schema() -> utoipa::openapi::Object {
    enum_schema(["raw", "envelope"])
}

fn scaling_schema() -> utoipa::openapi::Object {
    enum_schema(Scaling::ALL.map(Scaling::as_str))
}

fn unit_schema() -> utoipa::openapi::Object {
    enum_schema(Unit::all().map(|u| u.symbol))
}

fn id_of(id: &str) -> Result<i64, ApiError> {
    id.trim()
        .parse::<i64>()
        .map_err(|_| ApiError::BadQuery(format!("spectrum id {id:?} is not a whole number")))
}

// ---------------------------------------------------------------------------
// Trend
// ---------------------------------------------------------------------------

/// The query of the stored trend.
#[derive(IntoParams)]
#[into_params(parameter_in = Query)]
#[allow(dead_code)] // describes the query string; `Params` reads it
pub struct HistoryTrendQuery {
    /// The series: a band's name, or overall-rms (default), overall-peak,
    /// overall-peak-to-peak, overall-crest-factor, overall-mean.
    series: Option<String>,
    /// Start: RFC 3339, or relative to now (`-7d`, `-12h`, `-30m`, `-90s`);
    /// default -1d.
    from: Option<String>,
    /// End: as `from`, or `now` (default).
    to: Option<String>,
    /// At most this many points (default 1000, at most 100000): more
    /// stored rows are merged as retention thins.
    #[param(minimum = 1, maximum = 100000)]
    points: Option<usize>,
    /// json (default) or csv (one row per point).
    #[param(schema_with = json_csv_schema)]
    format: Option<String>,
}

/// Records lost between two times (a hole in the history).
#[derive(Serialize, ToSchema)]
pub struct HoleBody {
    /// The channel, or null for every channel.
    channel: Option<String>,
    from: String,
    to: String,
    /// queue_full or write_error.
    reason: String,
    /// Records lost.
    lost: i64,
}

/// `GET /api/v1/history/channels/{name}/trend`: columnar, oldest first.
#[derive(Serialize, ToSchema)]
pub struct HistoryTrendBody {
    channel: String,
    series: String,
    /// "band" or "overall".
    kind: String,
    unit: String,
    from: String,
    to: String,
    /// Rows stored in the range (`points` is fewer when they were merged).
    stored_rows: usize,
    /// Unix seconds of each point's start.
    t: Vec<i64>,
    /// Seconds each point covers.
    span_s: Vec<i64>,
    /// Ok results in the point.
    n: Vec<i64>,
    /// Results without an ok value.
    n_bad: Vec<i64>,
    min: Vec<Option<f64>>,
    /// Weighted by n.
    mean: Vec<Option<f64>>,
    max: Vec<Option<f64>>,
    last: Vec<Option<f64>>,
    /// The worst alarm state: null without an alarm, -1 inhibited, 0
    /// normal, 1 alert, 2 danger.
    state: Vec<Option<i64>>,
    holes: Vec<HoleBody>,
}

/// A series' stored aggregates between two times.
#[utoipa::path(get, path = "/api/v1/history/channels/{name}/trend", tag = "history",
    params(("name" = String, Path, description = "Channel name"), HistoryTrendQuery),
    responses(
        (status = 200, description = "The series' aggregates (JSON), or a CSV download",
            content((HistoryTrendBody = "application/json"), (String = "text/csv"))),
        (status = 400, description = "A query parameter is unknown, repeated or out of range", body = ErrorBody),
        (status = 404, description = "No [history], no file yet, or no such stored series", body = ErrorBody),
        (status = 500, description = "The file could not be read (logged)", body = ErrorBody),
    ))]
pub async fn trend(
    Live(st): Live,
    Path(name): Path<String>,
    q: Result<Query<Vec<(String, String)>>, QueryRejection>,
) -> Result<Response, ApiError> {
    let params = Params::of::<HistoryTrendQuery>(q)?;
    let series = params.get("series").unwrap_or("overall-rms").to_string();
    let (from, to) = time_range(&params)?;
    let points = count(&params, "points", DEFAULT_POINTS, MAX_POINTS)?;
    let format = json_or_csv(&params)?;
    let h = history_of(&st)?;
    let path = h.spec.file.clone();
    let (channel, series2) = (name.clone(), series.clone());
    let rows = blocking(move || {
        let conn = open_read(&path)?;
        query::series_points(&conn, &channel, &series2, from, to, points).map_err(api_error)
    })
    .await?;
    if format == Format::Csv {
        let mut out = String::from("time,t,span_s,n,n_bad,min,mean,max,last,state\n");
        let o = |x: Option<f64>| x.map(|v| v.to_string()).unwrap_or_default();
        for p in &rows.points {
            let _ = writeln!(
                out,
                "{},{},{},{},{},{},{},{},{},{}",
                rfc3339_s(p.t),
                p.t,
                p.span,
                p.n,
                p.n_bad,
                o(p.min),
                o(p.mean),
                o(p.max),
                o(p.last),
                p.state.map(|s| s.to_string()).unwrap_or_default()
            );
        }
        let file = export::filename(
            &[&name, &series, "history"],
            u64::try_from(ns_of(from)).unwrap_or(0),
            "csv",
        );
        return Ok(export::attachment(export::CSV, &file, out));
    }
    let p = &rows.points;
    Ok(Json(HistoryTrendBody {
        channel: name,
        series,
        kind: rows.kind.clone(),
        unit: rows.unit.clone(),
        from: rfc3339_s(from),
        to: rfc3339_s(to),
        stored_rows: rows.stored,
        t: p.iter().map(|r| r.t).collect(),
        span_s: p.iter().map(|r| r.span).collect(),
        n: p.iter().map(|r| r.n).collect(),
        n_bad: p.iter().map(|r| r.n_bad).collect(),
        min: p.iter().map(|r| r.min).collect(),
        mean: p.iter().map(|r| r.mean).collect(),
        max: p.iter().map(|r| r.max).collect(),
        last: p.iter().map(|r| r.last).collect(),
        state: p.iter().map(|r| r.state).collect(),
        holes: rows
            .holes
            .iter()
            .map(|h| HoleBody {
                channel: h.channel.clone(),
                from: rfc3339_s(h.t_from),
                to: rfc3339_s(h.t_to),
                reason: h.reason.clone(),
                lost: h.lost,
            })
            .collect(),
    })
    .into_response())
}

// ---------------------------------------------------------------------------
// The list of stored spectra
// ---------------------------------------------------------------------------

/// The query of the list of stored spectra.
#[derive(IntoParams)]
#[into_params(parameter_in = Query)]
#[allow(dead_code)] // describes the query string; `Params` reads it
pub struct SpectraQuery {
    /// Start: RFC 3339, or relative to now; default -1d.
    from: Option<String>,
    /// End: as `from`, or `now` (default).
    to: Option<String>,
    /// At most this many, newest first (default 100, at most 10000).
    #[param(minimum = 1, maximum = 10000)]
    limit: Option<usize>,
}

/// Where a stored spectrum came from.
#[derive(Serialize, ToSchema)]
pub struct StoredInfo {
    id: i64,
    /// The newest block's start, RFC 3339.
    time: Option<String>,
    /// interval, alarm or request.
    reason: String,
    /// For an alarm: "<alarm> <from>-><to>".
    event: Option<String>,
    /// The channel's marked reference.
    reference: bool,
}

/// One stored spectrum as listed.
#[derive(Serialize, ToSchema)]
pub struct ListedSpectrum {
    #[serde(flatten)]
    stored: StoredInfo,
    averages: i64,
    lines: i64,
    /// Bytes of its stored lines (compressed).
    bytes: i64,
}

/// `GET /api/v1/history/channels/{name}/spectra`.
#[derive(Serialize, ToSchema)]
pub struct SpectraList {
    channel: String,
    from: String,
    to: String,
    limit: usize,
    /// Newest first.
    spectra: Vec<ListedSpectrum>,
}

fn time_ns(t_ns: i64) -> Option<String> {
    rfc3339_ns(u64::try_from(t_ns).unwrap_or(0))
}

/// The stored spectra of a channel between two times, newest first.
#[utoipa::path(get, path = "/api/v1/history/channels/{name}/spectra", tag = "history",
    params(("name" = String, Path, description = "Channel name"), SpectraQuery),
    responses(
        (status = 200, description = "The stored spectra, newest first", body = SpectraList),
        (status = 400, description = "A query parameter is unknown, repeated or out of range", body = ErrorBody),
        (status = 404, description = "No [history], or no file yet", body = ErrorBody),
        (status = 500, description = "The file could not be read (logged)", body = ErrorBody),
    ))]
pub async fn list_spectra(
    Live(st): Live,
    Path(name): Path<String>,
    q: Result<Query<Vec<(String, String)>>, QueryRejection>,
) -> Result<Json<SpectraList>, ApiError> {
    let params = Params::of::<SpectraQuery>(q)?;
    let (from, to) = time_range(&params)?;
    let limit = count(&params, "limit", DEFAULT_LIMIT, MAX_LIMIT)?;
    let h = history_of(&st)?;
    let path = h.spec.file.clone();
    let channel = name.clone();
    let listed = blocking(move || {
        let conn = open_read(&path)?;
        query::list_spectra(&conn, &channel, ns_of(from), end_ns(to), limit).map_err(api_error)
    })
    .await?;
    Ok(Json(SpectraList {
        channel: name,
        from: rfc3339_s(from),
        to: rfc3339_s(to),
        limit,
        spectra: listed
            .into_iter()
            .map(|l| ListedSpectrum {
                stored: StoredInfo {
                    id: l.id,
                    time: time_ns(l.t_ns),
                    reason: l.reason,
                    event: l.event,
                    reference: l.reference,
                },
                averages: l.averages,
                lines: l.lines,
                bytes: l.bytes,
            })
            .collect(),
    }))
}

// ---------------------------------------------------------------------------
// One stored spectrum
// ---------------------------------------------------------------------------

/// The query of one stored spectrum: the live spectrum's, without images.
#[derive(IntoParams)]
#[into_params(parameter_in = Query)]
#[allow(dead_code)] // describes the query string; `Params` reads it
pub struct StoredSpectrumQuery {
    /// Amplitude scaling (default rms).
    #[param(schema_with = scaling_schema)]
    scaling: Option<String>,
    /// Unit of the values: the stored spectrum's (default) or one derived
    /// from it.
    #[param(schema_with = unit_schema)]
    unit: Option<String>,
    /// Lowest frequency, Hz (default 0).
    #[param(minimum = 0.0)]
    fmin: Option<f64>,
    /// Highest frequency, Hz (default Nyquist).
    #[param(minimum = 0.0)]
    fmax: Option<f64>,
    /// json (default) or a csv download.
    #[param(schema_with = json_csv_schema)]
    format: Option<String>,
    /// The raw spectrum (default) or the envelope spectrum.
    #[param(schema_with = kind_schema)]
    spectrum: Option<String>,
}

/// `GET /api/v1/history/spectra/{id}`: the live spectrum's JSON, with
/// where it was stored.
#[derive(Serialize, ToSchema)]
pub struct StoredSpectrumBody<'a> {
    #[serde(flatten)]
    spectrum: SpectrumBody<'a>,
    stored: StoredInfo,
}

/// The source of a stored spectrum's JSON: its own settings, never the
/// channel's current ones.
fn source_of(s: &StoredSpectrum) -> Result<SpectrumSource<'_>, ApiError> {
    let unit = Unit::parse(&s.unit).ok_or_else(|| {
        tracing::error!(unit = %s.unit, id = s.id, "a stored spectrum's unit is not known");
        ApiError::Internal
    })?;
    let block = usize::try_from(s.block).unwrap_or(1).max(1);
    Ok(SpectrumSource {
        channel: &s.channel,
        unit,
        sample_rate_hz: s.sample_rate_hz,
        block,
        nfft: usize::try_from(s.nfft).unwrap_or(1).max(1),
        window: &s.window,
        enbw_hz: s.enbw_bins * s.sample_rate_hz / block as f64,
        averaging: &s.averaging,
        averages: u32::try_from(s.averages).unwrap_or(0),
        first_sample: u64::try_from(s.first_sample).unwrap_or(0),
        oldest_first_sample: u64::try_from(s.oldest_first_sample).unwrap_or(0),
        timestamp_ns: u64::try_from(s.t_ns).unwrap_or(0),
        speed_hz: s.speed_hz,
        integration_low_cut_hz: s.integration_low_cut_hz,
        power: &s.power,
        envelope: &s.envelope,
    })
}

fn stored_info(s: &StoredSpectrum) -> StoredInfo {
    StoredInfo {
        id: s.id,
        time: time_ns(s.t_ns),
        reason: s.reason.clone(),
        event: s.event.clone(),
        reference: s.reference,
    }
}

/// One stored spectrum, scaled and cropped as the live one
/// (`/api/v1/channels/{name}/spectrum`), with `stored`.
#[utoipa::path(get, path = "/api/v1/history/spectra/{id}", tag = "history",
    params(("id" = i64, Path, description = "The stored spectrum's id"), StoredSpectrumQuery),
    responses(
        (status = 200, description = "The spectrum (JSON), or a CSV download",
            content((StoredSpectrumBody = "application/json"), (String = "text/csv"))),
        (status = 400, description = "A query parameter is unknown, repeated, out of range or does not apply to the spectrum; or the id is not a number", body = ErrorBody),
        (status = 404, description = "No [history], no file yet, or no such spectrum", body = ErrorBody),
        (status = 500, description = "The file could not be read (logged)", body = ErrorBody),
    ))]
pub async fn stored_spectrum(
    Live(st): Live,
    Path(id): Path<String>,
    q: Result<Query<Vec<(String, String)>>, QueryRejection>,
) -> Result<Response, ApiError> {
    let params = Params::of::<StoredSpectrumQuery>(q)?;
    let scaling = parse_scaling(&params)?;
    let format = json_or_csv(&params)?;
    let envelope = parse_kind(&params)?;
    let h = history_of(&st)?;
    let id = id_of(&id)?;
    let path = h.spec.file.clone();
    let s = blocking(move || {
        let conn = open_read(&path)?;
        query::spectrum(&conn, id).map_err(api_error)
    })
    .await?;
    let src = source_of(&s)?;
    let to = parse_unit(&params, &s.channel, src.unit)?;
    let range = parse_range(&params, src.df_hz(), src.nfft / 2 + 1)?;
    let ask = SpectrumAsk {
        scaling,
        to,
        range,
        envelope,
    };
    src.check(&ask)?;
    let values = src.values(&ask);
    if format == Format::Csv {
        return Ok(src.csv(&ask, &values));
    }
    Ok(Json(StoredSpectrumBody {
        spectrum: src.body(&ask, values),
        stored: stored_info(&s),
    })
    .into_response())
}

// ---------------------------------------------------------------------------
// Waterfall
// ---------------------------------------------------------------------------

/// The query of the waterfall.
#[derive(IntoParams)]
#[into_params(parameter_in = Query)]
#[allow(dead_code)] // describes the query string; `Params` reads it
pub struct WaterfallQuery {
    /// Start: RFC 3339, or relative to now; default -1d.
    from: Option<String>,
    /// End: as `from`, or `now` (default).
    to: Option<String>,
    /// Lowest frequency, Hz (default 0).
    #[param(minimum = 0.0)]
    fmin: Option<f64>,
    /// Highest frequency, Hz (default Nyquist).
    #[param(minimum = 0.0)]
    fmax: Option<f64>,
    /// Display columns (default 512, at most 8192): each the largest of its lines.
    #[param(minimum = 1, maximum = 8192)]
    columns: Option<usize>,
    /// Amplitude scaling (default rms).
    #[param(schema_with = scaling_schema)]
    scaling: Option<String>,
    /// The raw spectra (default) or the envelope spectra.
    #[param(schema_with = kind_schema)]
    spectrum: Option<String>,
    /// At most this many spectra, evenly picked (default 200, at most 2000).
    #[param(minimum = 1, maximum = 2000)]
    max_spectra: Option<usize>,
    /// json (default) or csv (one row per spectrum).
    #[param(schema_with = json_csv_schema)]
    format: Option<String>,
}

/// `GET /api/v1/history/channels/{name}/waterfall`.
#[derive(Serialize, ToSchema)]
pub struct WaterfallBody {
    channel: String,
    /// "raw" or "envelope".
    spectrum: &'static str,
    scaling: &'static str,
    unit: String,
    sample_rate_hz: f64,
    nfft: i64,
    df_hz: f64,
    /// Per column, the frequency of its first and of its last line.
    f_lo_hz: Vec<f64>,
    f_hi_hz: Vec<f64>,
    /// Per row (oldest first): the spectrum's id and time.
    ids: Vec<i64>,
    t: Vec<Option<String>>,
    /// Per row, per column: the largest of the column's lines, scaled.
    values: Vec<Vec<f32>>,
    /// Stored spectra in the range.
    in_range: usize,
    /// Of those, left out because their sample rate or line count differ
    /// from the newest's.
    other_analysis: usize,
}

/// A channel's stored spectra between two times, one row each, cropped
/// and shown in display columns (each the largest of its lines).
#[utoipa::path(get, path = "/api/v1/history/channels/{name}/waterfall", tag = "history",
    params(("name" = String, Path, description = "Channel name"), WaterfallQuery),
    responses(
        (status = 200, description = "The waterfall (JSON), or a CSV download",
            content((WaterfallBody = "application/json"), (String = "text/csv"))),
        (status = 400, description = "A query parameter is unknown, repeated or out of range", body = ErrorBody),
        (status = 404, description = "No [history], no file yet, or no stored spectrum in the range", body = ErrorBody),
        (status = 500, description = "The file could not be read (logged)", body = ErrorBody),
    ))]
pub async fn waterfall(
    Live(st): Live,
    Path(name): Path<String>,
    q: Result<Query<Vec<(String, String)>>, QueryRejection>,
) -> Result<Response, ApiError> {
    let params = Params::of::<WaterfallQuery>(q)?;
    let (from, to) = time_range(&params)?;
    let fmin_hz = params.f64("fmin")?;
    let fmax_hz = params.f64("fmax")?;
    for (k, v) in [("fmin", fmin_hz), ("fmax", fmax_hz)] {
        if let Some(v) = v.filter(|v| !(v.is_finite() && *v >= 0.0)) {
            return Err(ApiError::BadQuery(format!(
                "{k}={v} is not a frequency of 0 Hz or more"
            )));
        }
    }
    if let (Some(a), Some(b)) = (fmin_hz, fmax_hz) {
        if a > b {
            return Err(ApiError::BadQuery(format!(
                "fmin={a} Hz is above fmax={b} Hz"
            )));
        }
    }
    let columns = count(&params, "columns", DEFAULT_COLUMNS, MAX_COLUMNS)?;
    let max_spectra = count(&params, "max_spectra", DEFAULT_MAX_SPECTRA, MAX_MAX_SPECTRA)?;
    let scaling = parse_scaling(&params)?;
    let envelope = parse_kind(&params)?;
    let format = json_or_csv(&params)?;
    let h = history_of(&st)?;
    let path = h.spec.file.clone();
    let channel = name.clone();
    let ask = WaterfallAsk {
        from_ns: ns_of(from),
        to_ns: end_ns(to),
        fmin_hz,
        fmax_hz,
        columns,
        envelope,
        max_spectra,
    };
    let w = blocking(move || {
        let conn = open_read(&path)?;
        query::waterfall(&conn, &channel, &ask).map_err(api_error)
    })
    .await?
    .ok_or_else(|| {
        ApiError::NotStored(format!(
            "no stored spectrum of channel {name:?} from {} to {}",
            rfc3339_s(from),
            rfc3339_s(to)
        ))
    })?;
    if w.columns.is_empty() {
        return Err(ApiError::BadQuery(format!(
            "fmin to fmax holds no spectral line of the stored spectra (lines every {} Hz \
             up to {} Hz)",
            w.df_hz,
            w.df_hz * (w.nfft / 2) as f64
        )));
    }
    let unit = Unit::parse(&w.unit).ok_or_else(|| {
        tracing::error!(unit = %w.unit, "a stored spectrum's unit is not known");
        ApiError::Internal
    })?;
    // The same unit in and out: the scaling alone, line by line, so the
    // largest line of a column stays the largest after it.
    let block = usize::try_from(w.block).unwrap_or(1).max(1);
    let conv = Conversion {
        scaling,
        from: unit,
        to: unit,
        low_cut_hz: 0.0,
        df_hz: w.df_hz,
        noise_bw_hz: w.enbw_bins * w.sample_rate_hz / block as f64,
    };
    let values: Vec<Vec<f32>> = w
        .rows
        .iter()
        .map(|r| conv.apply(&r.values, 0..=r.values.len().saturating_sub(1)))
        .collect();
    let f_lo_hz: Vec<f64> = w.columns.iter().map(|c| c.0 as f64 * w.df_hz).collect();
    let f_hi_hz: Vec<f64> = w.columns.iter().map(|c| c.1 as f64 * w.df_hz).collect();
    let unit_label = scaling.unit_label(unit);
    if format == Format::Csv {
        let mut out = String::from("time,id");
        for (lo, hi) in f_lo_hz.iter().zip(&f_hi_hz) {
            if lo == hi {
                let _ = write!(out, ",{lo}");
            } else {
                let _ = write!(out, ",{lo}-{hi}");
            }
        }
        out.push('\n');
        for (r, v) in w.rows.iter().zip(&values) {
            let _ = write!(out, "{},{}", time_ns(r.t_ns).unwrap_or_default(), r.id);
            for x in v {
                let _ = write!(out, ",{x}");
            }
            out.push('\n');
        }
        let what = if envelope {
            "envelope-waterfall"
        } else {
            "waterfall"
        };
        let file = export::filename(
            &[&name, what],
            u64::try_from(ns_of(from)).unwrap_or(0),
            "csv",
        );
        return Ok(export::attachment(export::CSV, &file, out));
    }
    Ok(Json(WaterfallBody {
        channel: name,
        spectrum: if envelope { "envelope" } else { "raw" },
        scaling: scaling.as_str(),
        unit: unit_label,
        sample_rate_hz: w.sample_rate_hz,
        nfft: w.nfft,
        df_hz: w.df_hz,
        f_lo_hz,
        f_hi_hz,
        ids: w.rows.iter().map(|r| r.id).collect(),
        t: w.rows.iter().map(|r| time_ns(r.t_ns)).collect(),
        values,
        in_range: w.in_range,
        other_analysis: w.other_analysis,
    })
    .into_response())
}

// ---------------------------------------------------------------------------
// Compare
// ---------------------------------------------------------------------------

/// The query of a comparison.
#[derive(IntoParams)]
#[into_params(parameter_in = Query)]
#[allow(dead_code)] // describes the query string; `Params` reads it
pub struct CompareQuery {
    /// The reference: a stored spectrum's id (default the channel's marked
    /// reference).
    reference: Option<i64>,
    /// What is compared with it: `live` (default, the channel's latest
    /// spectrum) or a stored spectrum's id.
    of: Option<String>,
    /// The raw spectra (default) or the envelope spectra.
    #[param(schema_with = kind_schema)]
    spectrum: Option<String>,
}

/// One side of a comparison.
#[derive(Serialize, ToSchema)]
pub struct CompareSide {
    /// The stored spectrum's id; null for the live spectrum.
    id: Option<i64>,
    channel: String,
    /// The newest block's start, RFC 3339.
    time: Option<String>,
}

/// One band of a comparison.
#[derive(Serialize, ToSchema)]
pub struct BandCompareBody {
    name: String,
    unit: String,
    /// The band's value in `of` (null when not ok).
    value: Option<f64>,
    /// The same band's value in the reference (null when not ok or absent).
    reference: Option<f64>,
    /// 20·log10(value / reference): band values are amplitudes; null when
    /// either is null or not above zero.
    db: Option<f64>,
}

/// `GET /api/v1/history/channels/{name}/compare`.
#[derive(Serialize, ToSchema)]
pub struct CompareBody {
    channel: String,
    /// "raw" or "envelope".
    spectrum: &'static str,
    of: CompareSide,
    reference: CompareSide,
    /// Frequency of `db[0]` (0 Hz) and the line spacing.
    f0_hz: f64,
    df_hz: f64,
    /// Per line, 10·log10(power / reference power); null where either
    /// line is zero (or negative, or not finite).
    db: Vec<Option<f64>>,
    bands: Vec<BandCompareBody>,
}

/// A live channel's bands as stored with a spectrum (`store::StoredBand`).
fn live_bands(ch: &ChannelShared, snap: &ChannelSnapshot) -> Vec<StoredBand> {
    ch.spec
        .bands
        .iter()
        .zip(&snap.bands)
        .map(|(b, v)| StoredBand {
            name: b.name.clone(),
            unit: b.unit.symbol.to_string(),
            value: (v.is_ok() && v.value.is_finite()).then_some(v.value),
            status: v.status.as_str().to_string(),
            peak_hz: (v.is_ok() && v.peak_hz.is_finite()).then_some(v.peak_hz),
        })
        .collect()
}

/// A spectrum (live or stored) against a stored reference, line by line
/// and band by band in dB.
#[utoipa::path(get, path = "/api/v1/history/channels/{name}/compare", tag = "history",
    params(("name" = String, Path, description = "Channel name"), CompareQuery),
    responses(
        (status = 200, description = "The comparison", body = CompareBody),
        (status = 400, description = "A query parameter is unknown, repeated or out of range; or an envelope asked of a spectrum without one", body = ErrorBody),
        (status = 404, description = "No [history], no file yet, no such channel or spectrum, or no marked reference", body = ErrorBody),
        (status = 409, description = "The two spectra differ in line count or sample rate", body = ErrorBody),
        (status = 500, description = "The file could not be read (logged)", body = ErrorBody),
        (status = 503, description = "`of=live` and the channel has published no spectrum yet", body = ErrorBody),
    ))]
pub async fn compare(
    Live(st): Live,
    Path(name): Path<String>,
    q: Result<Query<Vec<(String, String)>>, QueryRejection>,
) -> Result<Json<CompareBody>, ApiError> {
    let params = Params::of::<CompareQuery>(q)?;
    let reference = params.get("reference").map(id_of).transpose()?;
    let of = match params.get("of") {
        None | Some("live") => None,
        Some(v) => Some(id_of(v).map_err(|_| {
            ApiError::BadQuery(format!("of={v:?}: expected live or a stored spectrum's id"))
        })?),
    };
    let envelope = parse_kind(&params)?;
    let h = history_of(&st)?;
    // The live side first: its channel must exist and have published.
    let live = match of {
        None => {
            let ch = channel_of(&st.app, &name)?.clone();
            let snap = ch
                .latest()
                .ok_or_else(|| ApiError::NoSnapshot(name.clone()))?;
            Some((ch, snap))
        }
        Some(_) => None,
    };
    let path = h.spec.file.clone();
    let channel = name.clone();
    let (reference, of_stored) = blocking(move || {
        let conn = open_read(&path)?;
        let rid = match reference {
            Some(id) => id,
            None => query::reference_of(&conn, &channel)
                .map_err(api_error)?
                .ok_or_else(|| {
                    ApiError::NotStored(format!(
                        "channel {channel:?} has no marked reference spectrum (give reference=<id>)"
                    ))
                })?,
        };
        let r = query::spectrum(&conn, rid).map_err(api_error)?;
        let o = of
            .map(|id| query::spectrum(&conn, id).map_err(api_error))
            .transpose()?;
        Ok((r, o))
    })
    .await?;
    let ref_what = format!("stored spectrum {}", reference.id);
    let ref_side = Side {
        what: &ref_what,
        sample_rate_hz: reference.sample_rate_hz,
        lines: reference.lines_of(envelope).map_err(api_error)?,
        bands: &reference.bands,
    };
    let (comparison, of_body) = match (&live, &of_stored) {
        (Some((ch, snap)), _) => {
            if envelope && snap.envelope_power.is_empty() {
                return Err(ApiError::BadQuery(format!(
                    "channel {name:?} has no envelope analysis configured"
                )));
            }
            let bands = live_bands(ch, snap);
            let side = Side {
                what: "the live spectrum",
                sample_rate_hz: ch.spec.sample_rate_hz,
                lines: if envelope {
                    &snap.envelope_power
                } else {
                    &snap.power
                },
                bands: &bands,
            };
            (
                query::compare(&side, &ref_side).map_err(api_error)?,
                CompareSide {
                    id: None,
                    channel: name.clone(),
                    time: rfc3339_ns(snap.timestamp_ns),
                },
            )
        }
        (None, Some(o)) => {
            let what = format!("stored spectrum {}", o.id);
            let side = Side {
                what: &what,
                sample_rate_hz: o.sample_rate_hz,
                lines: o.lines_of(envelope).map_err(api_error)?,
                bands: &o.bands,
            };
            (
                query::compare(&side, &ref_side).map_err(api_error)?,
                CompareSide {
                    id: Some(o.id),
                    channel: o.channel.clone(),
                    time: time_ns(o.t_ns),
                },
            )
        }
        (None, None) => return Err(ApiError::Internal),
    };
    Ok(Json(CompareBody {
        channel: name,
        spectrum: if envelope { "envelope" } else { "raw" },
        of: of_body,
        reference: CompareSide {
            id: Some(reference.id),
            channel: reference.channel.clone(),
            time: time_ns(reference.t_ns),
        },
        f0_hz: 0.0,
        df_hz: reference.sample_rate_hz / reference.nfft.max(1) as f64,
        db: comparison.db,
        bands: comparison
            .bands
            .into_iter()
            .map(|b| BandCompareBody {
                name: b.name,
                unit: b.unit,
                value: b.value,
                reference: b.reference,
                db: b.db,
            })
            .collect(),
    }))
}

// ---------------------------------------------------------------------------
// Operator writes
// ---------------------------------------------------------------------------

/// A spectrum stored on request.
#[derive(Serialize, ToSchema)]
pub struct StoredCreated {
    id: i64,
    channel: String,
    /// The newest block's start, RFC 3339.
    time: Option<String>,
}

/// Stores the channel's live spectrum now (reason "request"; bearer token).
#[utoipa::path(post, path = "/api/v1/history/channels/{name}/spectra", tag = "history",
    params(("name" = String, Path, description = "Channel name")),
    security(("bearer" = [])),
    responses(
        (status = 201, description = "Stored; its id", body = StoredCreated),
        (status = 401, description = "Missing or wrong bearer token (or no token configured)", body = ErrorBody),
        (status = 404, description = "No [history], or no such channel", body = ErrorBody),
        (status = 500, description = "The file could not be written (logged)", body = ErrorBody),
        (status = 503, description = "The channel has published no spectrum yet", body = ErrorBody),
    ))]
pub async fn store_spectrum(
    Live(st): Live,
    Path(name): Path<String>,
    headers: HeaderMap,
) -> Result<Response, ApiError> {
    authorize(&st, &headers)?;
    let h = history_of(&st)?;
    let ch = channel_of(&st.app, &name)?.clone();
    let snap = ch
        .latest()
        .ok_or_else(|| ApiError::NoSnapshot(name.clone()))?;
    let record = SpectrumRecord {
        spec: ch.spec.clone(),
        enbw_bins: ch.window_enbw_bins,
        reason: StoreReason::Request,
        event: None,
        t_ns: if snap.timestamp_ns != 0 {
            snap.timestamp_ns
        } else {
            snap.published_unix_ns
        },
        published_ns: snap.published_unix_ns,
        averages: snap.averages,
        first_sample: snap.first_sample,
        oldest_first_sample: snap.oldest_first_sample,
        speed_hz: snap.speed_hz,
        power: snap.power.clone(),
        envelope: snap.envelope_power.clone(),
        bands: snap.bands.clone(),
        lost: None,
    };
    let time = rfc3339_ns(record.t_ns);
    let shared = h.clone();
    let id = blocking(move || {
        let conn = open_write(&shared.spec.file)?;
        let id = store::insert_spectrum(&conn, &record).map_err(|e| {
            tracing::error!(error = %e, "cannot store a spectrum on request");
            ApiError::Internal
        })?;
        shared.counters.spectra_stored[StoreReason::Request as usize]
            .fetch_add(1, Ordering::Relaxed);
        Ok(id)
    })
    .await?;
    Ok((
        StatusCode::CREATED,
        Json(StoredCreated {
            id,
            channel: name,
            time,
        }),
    )
        .into_response())
}

fn open_write(path: &FsPath) -> Result<rusqlite::Connection, ApiError> {
    schema::open_write(path).map_err(|e| {
        tracing::error!(error = %e, "cannot open the history file for writing");
        ApiError::Internal
    })
}

/// A reference marked.
#[derive(Serialize, ToSchema)]
pub struct ReferenceMarked {
    id: i64,
    channel: String,
    reference: bool,
}

/// Marks a stored spectrum as its channel's reference (the previous one
/// is unmarked; bearer token).
#[utoipa::path(post, path = "/api/v1/history/spectra/{id}/reference", tag = "history",
    params(("id" = i64, Path, description = "The stored spectrum's id")),
    security(("bearer" = [])),
    responses(
        (status = 200, description = "Marked", body = ReferenceMarked),
        (status = 400, description = "The id is not a number", body = ErrorBody),
        (status = 401, description = "Missing or wrong bearer token (or no token configured)", body = ErrorBody),
        (status = 404, description = "No [history], no file yet, or no such spectrum", body = ErrorBody),
        (status = 500, description = "The file could not be written (logged)", body = ErrorBody),
    ))]
pub async fn mark_reference(
    Live(st): Live,
    Path(id): Path<String>,
    headers: HeaderMap,
) -> Result<Json<ReferenceMarked>, ApiError> {
    authorize(&st, &headers)?;
    let h = history_of(&st)?;
    let id = id_of(&id)?;
    let path = h.spec.file.clone();
    let channel = blocking(move || {
        if !path.exists() {
            return Err(ApiError::NoHistoryYet);
        }
        let mut conn = open_write(&path)?;
        store::mark_reference(&mut conn, id).map_err(|e| {
            tracing::error!(error = %e, "cannot mark a reference spectrum");
            ApiError::Internal
        })
    })
    .await?
    .ok_or_else(|| ApiError::NotStored(format!("no stored spectrum {id}")))?;
    Ok(Json(ReferenceMarked {
        id,
        channel,
        reference: true,
    }))
}
