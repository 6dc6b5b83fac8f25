//! Router tests through `tower::ServiceExt::oneshot`, no socket.
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
use crate::config::parse_str;
use crate::counters::GapReason;
use crate::dsp::bands::BandValue;
use crate::dsp::stats::Overall;
use crate::pipeline::state::ChannelSnapshot;

/// fs = 25 600 Hz (the sim's rate), block = nfft = 256: lines every
/// 100 Hz, 129 lines, Nyquist 12 800 Hz. Hann: ENBW 1.5 lines (Harris 1978,
/// Table 1), so the noise bandwidth is 150 Hz.
const CONFIG: &str = r#"
[server]
listen = "127.0.0.1:0"

[[source]]
name = "sim"
kind = "sim"

[[channel]]
name = "a"
source = "sim"
index = 0
unit = "g"
scale = 1.0
block = 256
window = "hann"
overlap = 0.5
averaging = { mode = "linear", count = 4 }
integration_low_cut_hz = 5.0

  [[channel.band]]
  name = "v"
  lo_hz = 50
  hi_hz = 150
  unit = "mm/s"

  [[channel.band]]
  name = "pk"
  lo_hz = 250
  hi_hz = 350
  measure = "peak"

[[channel]]
name = "b"
source = "sim"
index = 1
unit = "g"
scale = 1.0
block = 256
"#;

const DF: f64 = 100.0;
const BINS: usize = 129;
/// 2023-11-14T22:13:20.123456789Z (`date -u -d @1700000000` for the
/// seconds; the fraction is the nanoseconds).
const TS_NS: u64 = 1_700_000_000_123_456_789;

fn state() -> Arc<AppState> {
    let cfg = parse_str(CONFIG).expect("test config is valid");
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

// ---------------------------------------------------------------------------
// Health
// ---------------------------------------------------------------------------

#[tokio::test]
async fn healthz_is_ok() {
    let r = get(&state(), "/healthz").await;
    assert_eq!(r.status, StatusCode::OK);
    assert_eq!(r.json()["status"], "ok");
}

#[tokio::test]
async fn readyz_waits_for_every_channel() {
    let st = state();
    let r = get(&st, "/readyz").await;
    assert_json_error(&r, StatusCode::SERVICE_UNAVAILABLE, "2 channel(s)");
    assert_eq!(r.json()["waiting"], serde_json::json!(["a", "b"]));

    publish(&st, 0, snapshot(unix_now_ns()));
    let r = get(&st, "/readyz").await;
    assert_eq!(r.status, StatusCode::SERVICE_UNAVAILABLE);
    assert_eq!(r.json()["waiting"], serde_json::json!(["b"]));

    publish(&st, 1, snapshot(unix_now_ns()));
    let r = get(&st, "/readyz").await;
    assert_eq!(r.status, StatusCode::OK, "{}", r.body);
    assert_eq!(r.json()["status"], "ready");
}

// ---------------------------------------------------------------------------
// Channels
// ---------------------------------------------------------------------------

#[tokio::test]
async fn channel_list_has_config_and_freshness() {
    let st = state();
    // Channel a fresh, b published 10 s ago: its expected interval is
    // hop·count/fs = 128·4/25600 = 0.02 s, so the 2 s floor applies.
    publish(&st, 0, snapshot(unix_now_ns()));
    publish(&st, 1, snapshot(unix_now_ns() - 10_000_000_000));
    let r = get(&st, "/api/v1/channels").await;
    assert_eq!(r.status, StatusCode::OK);
    let v = r.json();
    let list = v["channels"].as_array().expect("array");
    assert_eq!(list.len(), 2);
    let a = &list[0];
    assert_eq!(a["name"], "a");
    assert_eq!(a["unit"], "g");
    assert_eq!(f(&a["sample_rate_hz"]), 25600.0);
    assert_eq!(a["block"], 256);
    assert_eq!(a["nfft"], 256);
    assert_eq!(a["hop"], 128);
    assert_eq!(a["window"], "hann");
    assert_eq!(f(&a["overlap"]), 0.5);
    assert_eq!(a["averaging"]["mode"], "linear");
    assert_eq!(a["averaging"]["count"], 4);
    assert_eq!(a["source"]["name"], "sim");
    assert_eq!(a["source"]["kind"], "sim");
    // No source task runs in this test: nothing has connected.
    assert_eq!(a["source"]["state"], "disconnected");
    assert!(close(
        f(&a["expected_update_interval_seconds"]),
        0.02,
        1e-12
    ));
    assert_eq!(a["stale"], false);
    assert!(f(&a["spectrum_age_seconds"]) < 2.0);
    let b = &list[1];
    assert_eq!(b["stale"], true);
    let age = f(&b["spectrum_age_seconds"]);
    assert!((10.0..20.0).contains(&age), "{age}");

    st.sources[0].connected.store(true, Ordering::Relaxed);
    let v = get(&st, "/api/v1/channels").await.json();
    assert_eq!(v["channels"][0]["source"]["state"], "connected");
}

#[tokio::test]
async fn channel_without_spectrum_is_listed_stale() {
    let v = get(&state(), "/api/v1/channels").await.json();
    assert_eq!(v["channels"][0]["stale"], true);
    assert!(v["channels"][0]["spectrum_age_seconds"].is_null());
}

#[tokio::test]
async fn channel_detail_has_bands_overall_counters() {
    let st = ready_state();
    let c = &st.channels[0].counters;
    c.samples_in.store(1000, Ordering::Relaxed);
    c.samples_processed.store(990, Ordering::Relaxed);
    c.blocks.store(6, Ordering::Relaxed);
    c.spectra.store(1, Ordering::Relaxed);
    c.add_dropped(GapReason::RingOverflow, 10);
    c.add_discontinuity(GapReason::RingOverflow);
    c.add_discontinuity(GapReason::Restart);

    let r = get(&st, "/api/v1/channels/a").await;
    assert_eq!(r.status, StatusCode::OK, "{}", r.body);
    let v = r.json();
    assert_eq!(v["name"], "a");
    assert_eq!(v["window"], "hann");
    let bands = v["bands"].as_array().expect("bands");
    assert_eq!(bands.len(), 2);
    assert_eq!(bands[0]["name"], "v");
    assert_eq!(f(&bands[0]["lo_hz"]), 50.0);
    assert_eq!(f(&bands[0]["hi_hz"]), 150.0);
    assert_eq!(bands[0]["measure"], "rms");
    assert_eq!(bands[0]["unit"], "mm/s");
    assert_eq!(f(&bands[0]["value"]), 12.5);
    assert_eq!(f(&bands[0]["peak_hz"]), 100.0);
    assert_eq!(bands[1]["measure"], "peak");
    assert_eq!(bands[1]["unit"], "g", "a band defaults to the channel unit");
    let o = &v["overall"];
    assert_eq!(f(&o["mean"]), 0.25);
    assert_eq!(f(&o["rms"]), 2.0);
    assert_eq!(f(&o["peak"]), 3.0);
    assert_eq!(f(&o["peak_to_peak"]), 5.5);
    assert_eq!(f(&o["crest_factor"]), 1.5);
    assert_eq!(o["unit"], "g");
    let k = &v["counters"];
    assert_eq!(k["samples_in"], 1000);
    assert_eq!(k["samples_processed"], 990);
    assert_eq!(k["samples_dropped"]["ring_overflow"], 10);
    for r in GapReason::ALL {
        assert!(k["samples_dropped"][r.as_str()].is_u64(), "{}", r.as_str());
    }
    assert_eq!(k["samples_dropped"]["sequence_gap"], 0);
    assert_eq!(k["discontinuities"]["ring_overflow"], 1);
    assert_eq!(k["discontinuities"]["restart"], 1);
    assert_eq!(k["blocks"], 6);
    assert_eq!(k["spectra"], 1);
    assert_eq!(v["spectrum"]["timestamp"], "2023-11-14T22:13:20.123456789Z");
}

#[tokio::test]
async fn channel_detail_before_spectrum_has_null_values() {
    let r = get(&state(), "/api/v1/channels/a").await;
    assert_eq!(r.status, StatusCode::OK);
    let v = r.json();
    assert!(v["bands"][0]["value"].is_null());
    assert!(v["overall"].is_null());
    assert_eq!(v["counters"]["samples_in"], 0);
}

#[tokio::test]
async fn unknown_channel_is_json_404_everywhere() {
    let st = ready_state();
    for uri in [
        "/api/v1/channels/zz",
        "/api/v1/channels/zz/spectrum",
        "/api/v1/channels/zz/waveform",
    ] {
        let r = get(&st, uri).await;
        assert_json_error(&r, StatusCode::NOT_FOUND, "unknown channel \"zz\"");
    }
    let r = get(&st, "/api/v2/nothing").await;
    assert_json_error(&r, StatusCode::NOT_FOUND, "no such endpoint");
    let r = call(router(st.clone()), "POST", "/api/v1/channels").await;
    assert_json_error(&r, StatusCode::METHOD_NOT_ALLOWED, "method");
}

// ---------------------------------------------------------------------------
// Spectrum
// ---------------------------------------------------------------------------

#[tokio::test]
async fn spectrum_before_first_snapshot_is_503() {
    let r = get(&state(), "/api/v1/channels/a/spectrum").await;
    assert_json_error(&r, StatusCode::SERVICE_UNAVAILABLE, "not published");
}

#[tokio::test]
async fn spectrum_default_is_rms_with_metadata() {
    let r = get(&ready_state(), "/api/v1/channels/a/spectrum").await;
    assert_eq!(r.status, StatusCode::OK, "{}", r.body);
    let v = r.json();
    assert_eq!(v["channel"], "a");
    assert_eq!(v["unit"], "g");
    assert_eq!(v["quantity"], "acceleration");
    assert_eq!(v["scaling"], "rms");
    assert_eq!(v["window"], "hann");
    assert_eq!(v["block"], 256);
    assert_eq!(v["nfft"], 256);
    assert_eq!(f(&v["sample_rate_hz"]), 25600.0);
    assert_eq!(f(&v["resolution_hz"]), DF);
    assert_eq!(f(&v["df_hz"]), DF);
    // Hann ENBW 1.5 lines (Harris 1978) × 100 Hz.
    assert!(close(f(&v["enbw_hz"]), 150.0, 1e-6), "{}", v["enbw_hz"]);
    assert_eq!(v["averages"], 4);
    assert_eq!(v["first_sample"], 4096);
    assert_eq!(v["timestamp"], "2023-11-14T22:13:20.123456789Z");
    assert_eq!(f(&v["f0_hz"]), 0.0);
    let values = v["values"].as_array().expect("values");
    assert_eq!(values.len(), BINS, "nfft/2 + 1 lines");
    // √P: 1 g² -> 1 g RMS; 0.5 g² -> 0.7071 g RMS (common practice).
    assert!(close(f(&values[1]), 1.0, 1e-6));
    assert!(close(f(&values[3]), std::f64::consts::FRAC_1_SQRT_2, 1e-6));
    assert_eq!(f(&values[0]), 0.0);
}

#[tokio::test]
async fn spectrum_scalings() {
    let st = ready_state();
    let line3 = |v: &Value| f(&v["values"][3]);
    // The A = 1 g tone (P = 0.5 g²): peak 1.0, peak-to-peak 2.0 (common
    // practice: peak = √2·RMS, peak-to-peak = 2√2·RMS).
    let v = get(&st, "/api/v1/channels/a/spectrum?scaling=peak")
        .await
        .json();
    assert_eq!(v["scaling"], "peak");
    assert_eq!(v["unit"], "g");
    assert!(close(line3(&v), 1.0, 1e-6));
    let v = get(&st, "/api/v1/channels/a/spectrum?scaling=peak-to-peak")
        .await
        .json();
    assert!(close(line3(&v), 2.0, 1e-6));
    let v = get(&st, "/api/v1/channels/a/spectrum?scaling=power")
        .await
        .json();
    assert_eq!(v["unit"], "g^2");
    assert!(close(line3(&v), 0.5, 1e-7));
    // Density = power / noise bandwidth (ratio ENBW·Δf between scipy's
    // 'spectrum' and 'density'): 0.5 / 150 Hz.
    let v = get(&st, "/api/v1/channels/a/spectrum?scaling=psd")
        .await
        .json();
    assert_eq!(v["scaling"], "psd");
    assert_eq!(v["unit"], "g^2/Hz");
    assert!(close(line3(&v), 0.5 / 150.0, 1e-8), "{}", line3(&v));
    let r = get(&st, "/api/v1/channels/a/spectrum?scaling=db").await;
    assert_json_error(&r, StatusCode::BAD_REQUEST, "scaling=\"db\"");
}

#[tokio::test]
async fn spectrum_in_velocity_from_acceleration() {
    let st = ready_state();
    // Common practice (REFERENCES.md): 1 g RMS at 100 Hz = 15.608 mm/s RMS.
    let r = get(&st, "/api/v1/channels/a/spectrum?unit=mm/s").await;
    assert_eq!(r.status, StatusCode::OK, "{}", r.body);
    let v = r.json();
    assert_eq!(v["unit"], "mm/s");
    assert_eq!(v["quantity"], "velocity");
    assert_eq!(f(&v["integration_low_cut_hz"]), 5.0);
    assert!(
        close(f(&v["values"][1]), 15.608, 5e-3),
        "{}",
        v["values"][1]
    );
    assert_eq!(f(&v["values"][0]), 0.0, "DC is zero once integrated");
    // Power in (mm/s)²: the factor squared.
    let v = get(&st, "/api/v1/channels/a/spectrum?unit=mm/s&scaling=power")
        .await
        .json();
    assert_eq!(v["unit"], "(mm/s)^2");
    assert!(close(f(&v["values"][1]), 15.608f64.powi(2), 0.2));
    // Same quantity, other unit: 1 g = 9.80665 m/s² (CGPM 1901).
    let v = get(&st, "/api/v1/channels/a/spectrum?unit=m/s%5E2")
        .await
        .json();
    assert_eq!(v["unit"], "m/s^2");
    assert!(close(f(&v["values"][1]), 9.80665, 1e-5));

    let r = get(&st, "/api/v1/channels/a/spectrum?unit=V").await;
    assert_json_error(&r, StatusCode::BAD_REQUEST, "cannot be derived");
    let r = get(&st, "/api/v1/channels/a/spectrum?unit=furlong").await;
    assert_json_error(&r, StatusCode::BAD_REQUEST, "not known");
}

#[tokio::test]
async fn spectrum_crop() {
    let st = ready_state();
    let v = get(&st, "/api/v1/channels/a/spectrum?fmin=200&fmax=300")
        .await
        .json();
    assert_eq!(f(&v["f0_hz"]), 200.0);
    let values = v["values"].as_array().expect("values");
    assert_eq!(values.len(), 2, "lines 200 and 300 Hz, edges inclusive");
    assert!(close(f(&values[0]), 0.02f64.sqrt(), 1e-6));
    // Edges between lines keep only the lines inside.
    let v = get(&st, "/api/v1/channels/a/spectrum?fmin=150&fmax=350")
        .await
        .json();
    assert_eq!(f(&v["f0_hz"]), 200.0);
    assert_eq!(v["values"].as_array().map(Vec::len), Some(2));
    // Up to Nyquist.
    let v = get(&st, "/api/v1/channels/a/spectrum?fmin=12800")
        .await
        .json();
    assert_eq!(f(&v["f0_hz"]), 12800.0);

    for (q, needle) in [
        ("fmin=300&fmax=200", "above fmax"),
        ("fmax=12900", "Nyquist"),
        ("fmin=-1", "outside"),
        ("fmin=NaN", "not a finite"),
        ("fmin=inf", "not a finite"),
        ("fmin=abc", "not a number"),
        ("fmin=250&fmax=260", "no spectral line"),
        ("fmn=3", "unknown query parameter"),
        ("fmin=1&fmin=2", "more than once"),
        ("format=xml", "format"),
    ] {
        let r = get(&st, &format!("/api/v1/channels/a/spectrum?{q}")).await;
        assert_json_error(&r, StatusCode::BAD_REQUEST, needle);
    }
}

#[tokio::test]
async fn spectrum_csv() {
    let st = ready_state();
    let r = get(&st, "/api/v1/channels/a/spectrum?format=csv").await;
    assert_eq!(r.status, StatusCode::OK);
    assert!(r.content_type.starts_with("text/csv"), "{}", r.content_type);
    let lines: Vec<&str> = r.body.lines().collect();
    assert_eq!(lines[0], "frequency_hz,rms_g");
    assert_eq!(lines.len(), 1 + BINS);
    assert_eq!(lines[2], "100,1");
    let r = get(
        &st,
        "/api/v1/channels/a/spectrum?format=csv&scaling=psd&fmin=300&fmax=300",
    )
    .await;
    let lines: Vec<&str> = r.body.lines().collect();
    assert_eq!(lines[0], "frequency_hz,psd_g^2/Hz");
    assert_eq!(lines.len(), 2);
    let (freq, val) = lines[1].split_once(',').expect("two columns");
    assert_eq!(freq, "300");
    let val: f64 = val.parse().expect("number");
    assert!(close(val, 0.5 / 150.0, 1e-8), "{val}");
}

// ---------------------------------------------------------------------------
// Waveform
// ---------------------------------------------------------------------------

#[tokio::test]
async fn waveform_json_and_csv() {
    let st = ready_state();
    let v = get(&st, "/api/v1/channels/a/waveform").await.json();
    assert_eq!(v["channel"], "a");
    assert_eq!(v["unit"], "g");
    assert_eq!(f(&v["sample_rate_hz"]), 25600.0);
    assert_eq!(v["first_sample"], 4096);
    assert_eq!(v["timestamp"], "2023-11-14T22:13:20.123456789Z");
    assert_eq!(v["values"], serde_json::json!([0.0, 0.5, -0.25, 1.0]));

    let r = get(&st, "/api/v1/channels/a/waveform?format=csv").await;
    assert!(r.content_type.starts_with("text/csv"));
    let lines: Vec<&str> = r.body.lines().collect();
    assert_eq!(lines[0], "time_s,value");
    assert_eq!(lines.len(), 5);
    // 1/25600 s = 39.0625 µs, exact in binary.
    assert_eq!(lines[2], "0.0000390625,0.5");

    let r = get(&state(), "/api/v1/channels/a/waveform").await;
    assert_eq!(r.status, StatusCode::SERVICE_UNAVAILABLE);
    let r = get(&st, "/api/v1/channels/a/waveform?fmin=1").await;
    assert_json_error(&r, StatusCode::BAD_REQUEST, "unknown query parameter");
}

/// A snapshot of channel `a` whose block is 256 samples of a 100 Hz tone
/// (amplitude 1) plus a 3 kHz tone (amplitude 0.5): both on exact lines
/// (df = 100 Hz).
fn two_tone_snapshot() -> ChannelSnapshot {
    let dt = 1.0 / 25_600.0;
    let waveform = (0..256)
        .map(|i| {
            let t = f64::from(i) * dt;
            ((std::f64::consts::TAU * 100.0 * t).sin()
                + 0.5 * (std::f64::consts::TAU * 3000.0 * t).sin()) as f32
        })
        .collect();
    ChannelSnapshot {
        waveform,
        ..snapshot(unix_now_ns())
    }
}

#[tokio::test]
async fn waveform_band_runs_off_the_runtime_with_the_same_result() {
    let st = state();
    let snap = two_tone_snapshot();
    let block = snap.waveform.clone();
    publish(&st, 0, snap);
    let v = get(&st, "/api/v1/channels/a/waveform?band=v").await.json();
    assert_eq!(v["band"], "v");
    assert_eq!(v["pass_hz"], serde_json::json!([[50.0, 150.0]]));
    let got: Vec<f32> = v["values"]
        .as_array()
        .expect("values")
        .iter()
        .map(|x| f(x) as f32)
        .collect();
    // Identical to the filter called directly, as the handler did on the
    // async runtime before.
    assert_eq!(
        got,
        crate::dsp::filter::band_pass_ranges(&block, 25_600.0, &[(50.0, 150.0)])
    );
    // And right: an ideal band-pass of tones on exact lines keeps the
    // 100 Hz tone alone (DFT orthogonality of whole-period tones; from
    // memory, any DSP text).
    for (i, y) in got.iter().enumerate() {
        let want = (std::f64::consts::TAU * 100.0 * i as f64 / 25_600.0).sin();
        assert!(
            close(f64::from(*y), want, 1e-5),
            "sample {i}: {y} vs {want}"
        );
    }
}

#[tokio::test]
async fn waveform_dsp_at_its_bound_answers_503_after_the_wait() {
    let st = state();
    publish(&st, 0, two_tone_snapshot());
    let gate = Arc::new(gate::DspGate::new(1, std::time::Duration::from_millis(50)));
    let app = router_with(HttpState {
        app: st.clone(),
        metrics: Arc::new(metrics::Metrics::new(st.clone())),
        dsp: gate.clone(),
    });
    let held = gate.hold_all();
    let r = call(app.clone(), "GET", "/api/v1/channels/a/waveform?band=v").await;
    assert_json_error(
        &r,
        StatusCode::SERVICE_UNAVAILABLE,
        "busy: 1 request-time DSP",
    );
    // The plain block needs no DSP and is served while the gate is full.
    let r = call(app.clone(), "GET", "/api/v1/channels/a/waveform").await;
    assert_eq!(r.status, StatusCode::OK, "{}", r.body);
    drop(held);
    let r = call(app, "GET", "/api/v1/channels/a/waveform?band=v").await;
    assert_eq!(r.status, StatusCode::OK, "{}", r.body);
}

// ---------------------------------------------------------------------------
// Metrics
// ---------------------------------------------------------------------------

/// The value of the series `name{labels}` in a text exposition.
fn sample(text: &str, series: &str) -> Option<f64> {
    text.lines()
        .find_map(|l| l.strip_prefix(series)?.strip_prefix(' '))
        .map(|v| v.trim().parse().expect("sample value"))
}

#[tokio::test]
async fn metrics_are_si_and_complete() {
    let st = ready_state();
    st.channels[0]
        .counters
        .samples_in
        .store(1234, Ordering::Relaxed);
    st.channels[0]
        .counters
        .add_dropped(GapReason::SequenceGap, 7);
    st.sources[0].frames.store(3, Ordering::Relaxed);
    st.sources[0].bytes.store(300, Ordering::Relaxed);
    st.sources[0].crc_errors.store(2, Ordering::Relaxed);
    st.sources[0].add_rejected("crc_mismatch", 2);
    let r = get(&st, "/metrics").await;
    assert_eq!(r.status, StatusCode::OK);
    assert_eq!(r.content_type, "text/plain; version=0.0.4");
    let t = &r.body;
    // 12.5 mm/s = 0.0125 m/s (SI prefix milli = 1e-3).
    let v = sample(
        t,
        r#"bandwatch_band_rms_meters_per_second{channel="a",band="v"}"#,
    )
    .expect("velocity band");
    assert!(close(v, 0.0125, 1e-12), "{v}");
    // 0.5 g = 4.903325 m/s² (g = 9.80665 m/s² exactly, CGPM 1901).
    let v = sample(
        t,
        r#"bandwatch_band_peak_meters_per_second_squared{channel="a",band="pk"}"#,
    )
    .expect("peak band");
    assert!(close(v, 4.903325, 1e-9), "{v}");
    assert_eq!(
        sample(
            t,
            r#"bandwatch_band_peak_frequency_hertz{channel="a",band="pk"}"#
        ),
        Some(300.0)
    );
    let rms = sample(
        t,
        r#"bandwatch_channel_rms_meters_per_second_squared{channel="a"}"#,
    )
    .expect("overall rms");
    assert!(close(rms, 2.0 * 9.80665, 1e-9));
    assert!(sample(
        t,
        r#"bandwatch_channel_mean_meters_per_second_squared{channel="a"}"#
    )
    .is_some());
    assert!(sample(
        t,
        r#"bandwatch_channel_peak_meters_per_second_squared{channel="a"}"#
    )
    .is_some());
    assert_eq!(
        sample(t, r#"bandwatch_channel_crest_factor{channel="a"}"#),
        Some(1.5)
    );
    assert_eq!(
        sample(
            t,
            r#"bandwatch_channel_samples_received_total{channel="a"}"#
        ),
        Some(1234.0)
    );
    for reason in GapReason::ALL {
        let s = format!(
            r#"bandwatch_channel_samples_dropped_total{{channel="b",reason="{}"}}"#,
            reason.as_str()
        );
        assert_eq!(sample(t, &s), Some(0.0), "{s}");
        let s = format!(
            r#"bandwatch_channel_discontinuities_total{{channel="b",reason="{}"}}"#,
            reason.as_str()
        );
        assert_eq!(sample(t, &s), Some(0.0), "{s}");
    }
    assert_eq!(
        sample(
            t,
            r#"bandwatch_channel_samples_dropped_total{channel="a",reason="sequence_gap"}"#
        ),
        Some(7.0)
    );
    for name in [
        "bandwatch_channel_samples_processed_total",
        "bandwatch_channel_blocks_total",
        "bandwatch_channel_spectra_total",
        "bandwatch_channel_spectrum_age_seconds",
        "bandwatch_channel_last_spectrum_timestamp_seconds",
    ] {
        assert!(
            sample(t, &format!(r#"{name}{{channel="a"}}"#)).is_some(),
            "{name}"
        );
    }
    assert_eq!(
        sample(t, r#"bandwatch_source_up{source="sim",kind="sim"}"#),
        Some(0.0)
    );
    assert_eq!(
        sample(t, r#"bandwatch_source_frames_total{source="sim"}"#),
        Some(3.0)
    );
    assert_eq!(
        sample(t, r#"bandwatch_source_bytes_total{source="sim"}"#),
        Some(300.0)
    );
    assert_eq!(
        sample(t, r#"bandwatch_source_crc_errors_total{source="sim"}"#),
        Some(2.0)
    );
    assert_eq!(
        sample(
            t,
            r#"bandwatch_source_rejected_total{source="sim",reason="crc_mismatch"}"#
        ),
        Some(2.0)
    );
    for name in [
        "bandwatch_source_connections_total",
        "bandwatch_source_resyncs_total",
        "bandwatch_source_skipped_bytes_total",
        "bandwatch_source_missing_samples_total",
        "bandwatch_source_late_frames_total",
    ] {
        assert_eq!(
            sample(t, &format!(r#"{name}{{source="sim"}}"#)),
            Some(0.0),
            "{name}"
        );
    }
    let build = format!(
        r#"bandwatch_build_info{{version="{}"}}"#,
        env!("CARGO_PKG_VERSION")
    );
    assert_eq!(sample(t, &build), Some(1.0));
    let start = sample(t, "bandwatch_start_time_seconds").expect("start time");
    assert!(close(start, st.started_unix_ns as f64 * 1e-9, 1e-3));
    // Help strings are sentences; every family has a type.
    for l in t.lines().filter(|l| l.starts_with("# HELP ")) {
        assert!(l.ends_with('.'), "{l}");
    }
    assert_eq!(
        t.lines().filter(|l| l.starts_with("# HELP ")).count(),
        t.lines().filter(|l| l.starts_with("# TYPE ")).count()
    );
    // No unit other than base units sneaks into a name.
    for bad in ["millimeters", "_g{", "_mm_", "milliseconds"] {
        assert!(!t.contains(bad), "{bad}");
    }
}

#[tokio::test]
async fn metrics_skip_snapshot_series_until_published() {
    let st = state();
    let t = get(&st, "/metrics").await.body;
    assert!(!t.contains("bandwatch_band_"), "{t}");
    assert!(!t.contains("bandwatch_channel_spectrum_age_seconds"));
    assert!(!t.contains("bandwatch_source_last_frame_timestamp_seconds"));
    // Counters are exported from the start, at 0.
    assert_eq!(
        sample(&t, r#"bandwatch_channel_spectra_total{channel="a"}"#),
        Some(0.0)
    );
}

#[tokio::test]
async fn http_requests_are_counted_by_route_template() {
    let st = ready_state();
    let app = router(st.clone());
    for uri in [
        "/api/v1/channels/a",
        "/api/v1/channels/b",
        "/api/v1/channels/zz",
        "/no/such/thing",
    ] {
        let _ = call(app.clone(), "GET", uri).await;
    }
    let t = call(app, "GET", "/metrics").await.body;
    assert_eq!(
        sample(
            &t,
            r#"bandwatch_http_requests_total{path="/api/v1/channels/{name}",status="200"}"#
        ),
        Some(2.0),
        "{t}"
    );
    assert_eq!(
        sample(
            &t,
            r#"bandwatch_http_requests_total{path="/api/v1/channels/{name}",status="404"}"#
        ),
        Some(1.0)
    );
    assert_eq!(
        sample(
            &t,
            r#"bandwatch_http_requests_total{path="unmatched",status="404"}"#
        ),
        Some(1.0)
    );
    assert!(!t.contains("path=\"/api/v1/channels/a\""));
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
    let cfg = parse_str(CONFIG).expect("valid");
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

#[test]
fn golden_exposition() {
    let app = golden_state();
    let m = metrics::Metrics::with_clock(app, golden_clock);
    let text = String::from_utf8(m.render_fresh().expect("render")).expect("utf-8");
    let text = text.replace(env!("CARGO_PKG_VERSION"), "VERSION");
    let path = concat!(env!("CARGO_MANIFEST_DIR"), "/tests/golden/metrics.prom");
    if std::env::var_os("BANDWATCH_BLESS").is_some() {
        std::fs::write(path, &text).expect("write golden");
    }
    let want = std::fs::read_to_string(path).expect("golden file");
    assert_eq!(
        text, want,
        "exposition changed; rerun with BANDWATCH_BLESS=1"
    );
}

#[test]
fn fixed_families_are_in_enum_order() {
    // `collect` indexes FIXED by the enum discriminant.
    for (i, f) in metrics::fixed_order().into_iter().enumerate() {
        assert_eq!(f, i);
    }
}

#[test]
fn timestamps_are_rfc3339_with_nanoseconds() {
    assert_eq!(
        api::rfc3339_ns(TS_NS).as_deref(),
        Some("2023-11-14T22:13:20.123456789Z")
    );
    // `date -u -d @1` = 1970-01-01T00:00:01.
    assert_eq!(
        api::rfc3339_ns(1_000_000_000).as_deref(),
        Some("1970-01-01T00:00:01.000000000Z")
    );
    assert_eq!(api::rfc3339_ns(0), None);
}

// ---------------------------------------------------------------------------
// The direct text encoder and the render cache
// ---------------------------------------------------------------------------

/// Channels out of name order (`z` before `b`, `B` before `a` in byte
/// order), band and alarm names out of order, two sources, a fixed-speed
/// machine, unit and dimensionless alarm limits.
const RICH: &str = r#"
[server]
listen = "127.0.0.1:0"
[alarms]
storage_dir = "/nonexistent-never-opened"

[[machine]]
name = "m1"
speed = { kind = "fixed", rpm = 1500 }

[[source]]
name = "tcp2"
kind = "tcp-listen"
listen = "127.0.0.1:0"
channels = 2
sample_rate_hz = 25600.0

[[source]]
name = "sim"
kind = "sim"

[[channel]]
name = "z-last"
source = "tcp2"
index = 0
unit = "g"
scale = 1.0
block = 256
integration_low_cut_hz = 5.0
overall_alarm = { crest_factor = { alert = { limit = 4.0 }, danger = { limit = 6.0 } } }

  [[channel.band]]
  name = "vel"
  lo_hz = 50
  hi_hz = 150
  unit = "mm/s"
  [channel.band.alarm]
  alert = { limit = 4.5 }
  danger = { limit = 11.2 }

  [[channel.band]]
  name = "acc"
  lo_hz = 250
  hi_hz = 350
  measure = "peak"
  [channel.band.alarm]
  alert = { limit = 1.0 }

[[channel]]
name = "B-upper"
source = "tcp2"
index = 1
unit = "m/s^2"
scale = 1.0
block = 256

  [[channel.band]]
  name = "x"
  lo_hz = 50
  hi_hz = 150

  [[channel.band]]
  name = "w"
  lo_hz = 250
  hi_hz = 350

[[channel]]
name = "a"
source = "sim"
index = 0
unit = "g"
scale = 1.0
block = 256
"#;

fn rich_state() -> Arc<AppState> {
    use crate::alarm::engine::{AlarmBoard, AlarmView, HealthView};
    use crate::alarm::state::AlarmState;
    let cfg = parse_str(RICH).expect("rich config is valid");
    let mut app = AppState::new(&cfg);
    app.started_unix_ns = TS_NS - 3_600_000_000_000;
    let app = Arc::new(app);
    // z-last: both bands valued; B-upper: one band out of service; a: none.
    publish(&app, 0, snapshot(TS_NS + 99_500_000_000));
    let mut s = snapshot(TS_NS + 99_000_000_000);
    s.bands[1].status = crate::dsp::bands::BandStatus::NoSpeed;
    s.bands[1].value = f64::NAN;
    s.overall.crest_factor = f64::INFINITY;
    s.overall.mean = -0.0;
    publish(&app, 1, s);
    let view = |state, alert, danger, since| AlarmView {
        state,
        latched: state == AlarmState::Danger,
        acknowledged: false,
        since_unix_ns: since,
        value: Some(1.0),
        alert_limit: alert,
        danger_limit: danger,
        transitions: [3, 2, 1, 0],
        learning: None,
    };
    let board = AlarmBoard {
        health: HealthView {
            ok: true,
            reasons: Default::default(),
            since_unix_ns: TS_NS,
        },
        alarms: vec![
            view(AlarmState::Alert, Some(4.5), Some(11.2), TS_NS + 1),
            view(AlarmState::Normal, Some(1.0), None, TS_NS + 2),
            view(AlarmState::Danger, Some(4.0), Some(6.0), TS_NS + 3),
        ],
    };
    assert_eq!(app.channels[0].spec.alarms.len(), 3, "alarms of z-last");
    app.channels[0].alarm_board.store(Some(Arc::new(board)));
    app.channels[2]
        .counters
        .add_dropped(GapReason::RingOverflow, u64::MAX - 5);
    app.channels[2]
        .counters
        .samples_in
        .store(1 << 60, Ordering::Relaxed);
    app.sources[0].add_rejected("too_large", 2);
    app.sources[0].add_rejected("crc_mismatch", 5);
    app.sources[1]
        .last_frame_unix_ns
        .store(TS_NS, Ordering::Relaxed);
    app
}

/// Reference: the prometheus crate (0.14) gathering `prometheus::proto`
/// families and its `TextEncoder`, as `/metrics` was written before the
/// direct encoder. Everything finite must come out byte for byte the same.
#[test]
fn direct_encoder_matches_the_prometheus_crate() {
    let app = golden_state();
    let ours = metrics::Metrics::with_clock(app.clone(), golden_clock)
        .render_fresh()
        .expect("render");
    let theirs = metrics::proto::render(app, golden_clock);
    assert_eq!(
        String::from_utf8(ours).expect("utf-8"),
        String::from_utf8(theirs).expect("utf-8")
    );

    // Unsorted names, alarms, two sources, a machine, large counters. The
    // crate writes infinities as Rust's `inf`; the text format wants
    // `+Inf` (checked below), so that one line is compared after mapping.
    let app = rich_state();
    let ours = metrics::Metrics::with_clock(app.clone(), golden_clock)
        .render_fresh()
        .expect("render");
    let ours = String::from_utf8(ours).expect("utf-8");
    let theirs = String::from_utf8(metrics::proto::render(app, golden_clock)).expect("utf-8");
    let inf = r#"bandwatch_channel_crest_factor{channel="B-upper"} "#;
    assert!(ours.contains(&format!("{inf}+Inf\n")), "{ours}");
    assert!(theirs.contains(&format!("{inf}inf\n")), "{theirs}");
    assert_eq!(
        ours,
        theirs.replace(&format!("{inf}inf\n"), &format!("{inf}+Inf\n"))
    );
    // The state exercised what it should (a check that cannot pass on an
    // empty exposition).
    for series in [
        r#"bandwatch_alarm_limit{channel="z-last",band="overall-crest-factor",level="danger"} 6"#,
        r#"bandwatch_alarm_limit_meters_per_second{channel="z-last",band="vel",level="alert"} 0.0045"#,
        r#"bandwatch_source_rejected_total{source="tcp2",reason="crc_mismatch"} 5"#,
        r#"bandwatch_machine_speed_hertz{machine="m1",source="fixed"} 25"#,
        r#"bandwatch_channel_mean_meters_per_second_squared{channel="B-upper"} -0"#,
        r#"bandwatch_channel_samples_received_total{channel="a"} 1152921504606847000"#,
    ] {
        assert!(ours.contains(series), "{series} missing:\n{ours}");
    }
}

/// Prometheus "Exposition formats", text format details: in label values
/// backslash, double quote and line feed are written `\\`, `\"`, `\n`; in
/// HELP text backslash and line feed only.
#[test]
fn escaping_follows_the_text_format() {
    let esc = |v: &str, quote: bool| {
        let mut s = String::new();
        metrics::push_escaped(&mut s, v, quote);
        s
    };
    assert_eq!(esc(r#"a\b"c"#, true), r#"a\\b\"c"#);
    assert_eq!(esc("line1\nline2", true), r"line1\nline2");
    assert_eq!(esc(r#"\"#, true), r"\\");
    assert_eq!(esc(r#"say "hi"\n"#, false), r#"say "hi"\\n"#);
    assert_eq!(esc("é µm/s² 5 %", true), "é µm/s² 5 %");
    assert_eq!(esc("", true), "");
    assert_eq!(esc("\n\n\"", true), r#"\n\n\""#);
}

/// Special values as the text format spells them (Prometheus "Exposition
/// formats": `NaN`, `+Inf`, `-Inf`); finite values as Rust's own `f64`
/// `Display` (std), which is what the prometheus crate's encoder wrote.
#[test]
fn values_are_written_as_the_text_format_and_std_say() {
    let val = |v: f64| {
        let mut s = String::new();
        metrics::push_value(&mut s, v);
        s
    };
    assert_eq!(val(f64::NAN), "NaN");
    assert_eq!(val(f64::INFINITY), "+Inf");
    assert_eq!(val(f64::NEG_INFINITY), "-Inf");
    let exact = 9_007_199_254_740_992.0;
    for v in [
        0.0,
        -0.0,
        1.0,
        -1.0,
        20480.0,
        1700000099.623457,
        0.0125,
        4.903325,
        0.1 + 0.2,
        1e-7,
        -3.5e-12,
        1e21,
        1.5e300,
        f64::MIN_POSITIVE,
        5e-324,
        f64::MAX,
        exact - 1.0,
        exact,
        exact + 2.0,
        -(exact - 1.0),
        123456789012345680.0,
    ] {
        assert_eq!(val(v), v.to_string(), "{v:e}");
    }
    // A fixed-seed sweep over bit patterns (finite ones).
    let mut x: u64 = 0x9E37_79B9_7F4A_7C15;
    for _ in 0..20_000 {
        x ^= x << 13;
        x ^= x >> 7;
        x ^= x << 17;
        let v = f64::from_bits(x);
        if v.is_finite() {
            assert_eq!(val(v), v.to_string(), "{v:e}");
        }
        let i = (x >> 11) as f64;
        assert_eq!(val(i), i.to_string());
    }
}

/// A monotonic clock the test moves by hand.
fn manual_clock() -> (Arc<std::sync::atomic::AtomicU64>, metrics::MonoClock) {
    let ns = Arc::new(std::sync::atomic::AtomicU64::new(1_000_000_000));
    let c = ns.clone();
    let clock: metrics::MonoClock =
        Arc::new(move || std::time::Duration::from_nanos(c.load(Ordering::SeqCst)));
    (ns, clock)
}

fn spectra_of(body: &[u8]) -> Option<f64> {
    sample(
        std::str::from_utf8(body).expect("utf-8"),
        r#"bandwatch_channel_spectra_total{channel="a"}"#,
    )
}

#[test]
fn cached_body_is_shared_until_max_age_and_never_after() {
    let st = ready_state();
    let (ns, clock) = manual_clock();
    let max_age = std::time::Duration::from_millis(200);
    let m = metrics::Metrics::with_cache(st.clone(), golden_clock, max_age, clock);
    let first = m.render().expect("render");
    assert_eq!(spectra_of(&first), Some(0.0));
    st.channels[0].counters.spectra.store(5, Ordering::Relaxed);
    // 1 ns short of the max-age: the same body (the same bytes in memory).
    ns.fetch_add(199_999_999, Ordering::SeqCst);
    let again = m.render().expect("render");
    assert_eq!(again.as_ptr(), first.as_ptr());
    assert_eq!(spectra_of(&again), Some(0.0));
    assert!(m.cached().is_some());
    // At the max-age: rendered anew, showing the new value.
    ns.fetch_add(1, Ordering::SeqCst);
    assert!(m.cached().is_none());
    let fresh = m.render().expect("render");
    assert_eq!(spectra_of(&fresh), Some(5.0));
    // Its age counts from its own render.
    st.channels[0].counters.spectra.store(6, Ordering::Relaxed);
    ns.fetch_add(150_000_000, Ordering::SeqCst);
    assert_eq!(spectra_of(&m.render().expect("render")), Some(5.0));
    ns.fetch_add(50_000_000, Ordering::SeqCst);
    assert_eq!(spectra_of(&m.render().expect("render")), Some(6.0));
}

#[test]
fn zero_max_age_renders_every_time() {
    let st = ready_state();
    let (_ns, clock) = manual_clock();
    let m =
        metrics::Metrics::with_cache(st.clone(), golden_clock, std::time::Duration::ZERO, clock);
    assert_eq!(spectra_of(&m.render().expect("render")), Some(0.0));
    st.channels[0].counters.spectra.store(9, Ordering::Relaxed);
    assert!(m.cached().is_none());
    assert_eq!(spectra_of(&m.render().expect("render")), Some(9.0));
}

#[test]
fn the_handler_serves_the_cache() {
    // Through the router: two scrapes back to back (well inside the real
    // max-age, whatever the machine's speed, because the clock is manual)
    // give the same body although a counter changed in between.
    let st = ready_state();
    let (ns, clock) = manual_clock();
    let m = Arc::new(metrics::Metrics::with_cache(
        st.clone(),
        golden_clock,
        metrics::RENDER_MAX_AGE,
        clock,
    ));
    let rt = tokio::runtime::Builder::new_current_thread()
        .enable_all()
        .build()
        .expect("runtime");
    let app = router_with(HttpState {
        app: st.clone(),
        metrics: m,
        dsp: Arc::new(gate::DspGate::per_core()),
    });
    let a = rt.block_on(call(app.clone(), "GET", "/metrics"));
    st.channels[0].counters.spectra.store(3, Ordering::Relaxed);
    let b = rt.block_on(call(app.clone(), "GET", "/metrics"));
    assert_eq!(a.status, StatusCode::OK);
    assert_eq!(a.body, b.body);
    ns.fetch_add(metrics::RENDER_MAX_AGE.as_nanos() as u64, Ordering::SeqCst);
    let c = rt.block_on(call(app, "GET", "/metrics"));
    assert_eq!(
        sample(&c.body, r#"bandwatch_channel_spectra_total{channel="a"}"#),
        Some(3.0)
    );
}
