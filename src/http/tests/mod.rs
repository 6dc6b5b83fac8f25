//! Router tests through `tower::ServiceExt::oneshot`, no socket: `endpoints`
//! (health, channels, spectrum, waveform), `exposition` (/metrics
//! through the router, the golden file), `encoder` (the direct text
//! encoder against the prometheus crate, escaping, values, the render
//! cache). Shared here: the config, the hand-made snapshot, the helpers.
//!
//! The state comes from a literal config; a hand-made snapshot is stored
//! as *input*. Expected outputs follow from documented conversions (each
//! named beside its check), never from running the code under test.

use std::sync::atomic::Ordering;
use std::sync::Arc;

use axum::body::Body;
use axum::http::{header, Request, StatusCode};
use http_body_util::BodyExt;
use serde_json::Value;
use tower::ServiceExt;

use super::*;
use crate::clock::unix_now_ns;
use crate::config::fixture::{quoted, Channel, Fixture, Source};
use crate::config::parse_str;
use crate::counters::GapReason;
use crate::dsp::bands::BandValue;
use crate::dsp::stats::Overall;
use crate::pipeline::state::ChannelSnapshot;

/// fs = 25 600 Hz (the sim's rate), block = nfft = 256: lines every
/// 100 Hz, 129 lines, Nyquist 12 800 Hz. Hann: ENBW 1.5 lines (Harris 1978,
/// Table 1), so the noise bandwidth is 150 Hz.
fn config() -> String {
    Fixture::new()
        .source(Source::new("sim", "sim"))
        .channel(
            Channel::new("a", "sim", 0)
                .set("scale", "1.0")
                .block(256)
                .window("hann")
                .overlap(0.5)
                .set("averaging", r#"{ mode = "linear", count = 4 }"#)
                .set("integration_low_cut_hz", "5.0")
                .band_with("v", 50.0, 150.0, &[("unit", quoted("mm/s"))])
                .band_with("pk", 250.0, 350.0, &[("measure", quoted("peak"))]),
        )
        .channel(Channel::new("b", "sim", 1).set("scale", "1.0").block(256))
        .toml()
}

const DF: f64 = 100.0;
const BINS: usize = 129;
/// 2023-11-14T22:13:20.123456789Z (`date -u -d @1700000000` for the
/// seconds; the fraction is the nanoseconds).
const TS_NS: u64 = 1_700_000_000_123_456_789;

fn state() -> Arc<AppState> {
    let cfg = parse_str(&config()).expect("test config is valid");
    Arc::new(AppState::new(&cfg))
}

/// Power per line: P[1] = 1 g² (1 g RMS at 100 Hz), P[3] = 0.5 g² (a tone
/// of amplitude 1 g at 300 Hz), P[2] = 0.02 g², the rest 0.
fn snapshot(published_unix_ns: u64) -> ChannelSnapshot {
    let mut power = vec![0.0f32; BINS];
    power[1] = 1.0;
    power[2] = 0.02;
    power[3] = 0.5;
    ChannelSnapshot {
        seq: 7,
        published_unix_ns,
        first_sample: 4096,
        // Four blocks of 256 at hop 128 (overlap 0.5): 3712 .. 4352.
        oldest_first_sample: 3712,
        timestamp_ns: TS_NS,
        averages: 4,
        power,
        bands: vec![
            BandValue {
                value: 12.5,
                peak_hz: 100.0,
                lo_hz: 50.0,
                hi_hz: 150.0,
                ..BandValue::default()
            },
            BandValue {
                value: 0.5,
                peak_hz: 300.0,
                lo_hz: 250.0,
                hi_hz: 350.0,
                ..BandValue::default()
            },
        ],
        overall: Overall {
            mean: 0.25,
            rms: 2.0,
            peak: 3.0,
            peak_to_peak: 5.5,
            crest_factor: 1.5,
        },
        waveform: vec![0.0, 0.5, -0.25, 1.0],
        ..ChannelSnapshot::default()
    }
}

fn publish(st: &AppState, i: usize, snap: ChannelSnapshot) {
    st.channels[i].snapshot.store(Some(Arc::new(snap)));
}

fn ready_state() -> Arc<AppState> {
    let st = state();
    publish(&st, 0, snapshot(unix_now_ns()));
    publish(&st, 1, snapshot(unix_now_ns()));
    st
}

struct Reply {
    status: StatusCode,
    content_type: String,
    body: String,
}

impl Reply {
    fn json(&self) -> Value {
        serde_json::from_str(&self.body).unwrap_or_else(|e| panic!("{e}: {}", self.body))
    }
}

async fn call(app: Router, method: &str, uri: &str) -> Reply {
    let req = Request::builder()
        .method(method)
        .uri(uri)
        .body(Body::empty())
        .expect("request");
    let resp = app.oneshot(req).await.expect("infallible");
    let status = resp.status();
    let content_type = resp
        .headers()
        .get(header::CONTENT_TYPE)
        .and_then(|v| v.to_str().ok())
        .unwrap_or("")
        .to_string();
    let bytes = resp.into_body().collect().await.expect("body").to_bytes();
    Reply {
        status,
        content_type,
        body: String::from_utf8(bytes.to_vec()).expect("utf-8"),
    }
}

async fn get(st: &Arc<AppState>, uri: &str) -> Reply {
    call(router(st.clone()), "GET", uri).await
}

fn f(v: &Value) -> f64 {
    v.as_f64().unwrap_or_else(|| panic!("not a number: {v}"))
}

fn close(a: f64, b: f64, tol: f64) -> bool {
    (a - b).abs() <= tol
}

fn assert_json_error(r: &Reply, status: StatusCode, needle: &str) {
    assert_eq!(r.status, status, "{}", r.body);
    assert!(
        r.content_type.starts_with("application/json"),
        "{}",
        r.content_type
    );
    let msg = r.json()["error"]
        .as_str()
        .expect("error string")
        .to_string();
    assert!(msg.contains(needle), "{msg:?} lacks {needle:?}");
}

mod encoder;
mod endpoints;
mod export;
mod exposition;
mod history;
mod live;
mod openapi;
mod page;

/// The value of the series `name{labels}` in a text exposition.
fn sample(text: &str, series: &str) -> Option<f64> {
    text.lines()
        .find_map(|l| l.strip_prefix(series)?.strip_prefix(' '))
        .map(|v| v.trim().parse().expect("sample value"))
}

/// Fixed clock for the golden exposition: 100 s after `TS_NS`.
fn golden_clock() -> u64 {
    TS_NS + 100_000_000_000
}

/// The exposition of a fixed state compared with
/// `tests/golden/metrics.prom` (which `tests/external/prometheus_scrape.sh`
/// also runs through `promtool check metrics`). Set
/// `BANDWATCH_BLESS=1` to rewrite the file after a deliberate change.
/// The fixed state behind `tests/golden/metrics.prom`.
fn golden_state() -> Arc<AppState> {
    let cfg = parse_str(&config()).expect("valid");
    let mut app = AppState::new(&cfg);
    app.started_unix_ns = TS_NS - 3_600_000_000_000;
    let app = Arc::new(app);
    publish(&app, 0, snapshot(TS_NS + 99_500_000_000));
    app.channels[0]
        .counters
        .samples_in
        .store(20480, Ordering::Relaxed);
    app.sources[0].connected.store(true, Ordering::Relaxed);
    app.sources[0]
        .last_frame_unix_ns
        .store(TS_NS + 99_900_000_000, Ordering::Relaxed);
    app
}
