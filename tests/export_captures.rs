//! Capture exports (README "Export"): a trip in the sped-up demo (the
//! built-in `p2-pump` scenario, pump-de's BPFO alert limit lowered so it
//! trips within seconds) stores a capture; its spectrum at the trip and its
//! waveform download as CSV equal to what is stored (the JSON metadata and
//! the BWF1 file, decoded here with the project's decoder), and as SVG
//! images that parse as XML and name the event. The raw BWF1 download is
//! the stored file with a file name; an unknown id is 404, a bad format 400.

#![allow(clippy::unwrap_used)] // tests may unwrap: a panic is a failed test

mod alarm_common;

use std::path::Path;
use std::sync::Arc;
use std::time::{Duration, Instant};

use alarm_common::TempDir;
use axum::body::Body;
use axum::http::{header, HeaderMap, Request, StatusCode};
use bandwatch::alarm::capture;
use bandwatch::frame::bwf1::StreamDecoder;
use bandwatch::frame::Samples;
use http_body_util::BodyExt;
use serde_json::Value;
use tower::ServiceExt;

/// The demo config, sped up 10×, storing into `dir`, with pump-de's BPFO
/// alert limit lowered so that it trips at once.
fn demo_config(dir: &Path) -> bandwatch::config::Config {
    match bandwatch::config::parse_str(&alarm_common::demo_text(dir, 10.0)) {
        Ok(c) => c,
        Err(e) => panic!("{e:?}"),
    }
}

struct Reply {
    status: StatusCode,
    headers: HeaderMap,
    body: Vec<u8>,
}

impl Reply {
    fn header(&self, name: header::HeaderName) -> &str {
        self.headers
            .get(&name)
            .and_then(|v| v.to_str().ok())
            .unwrap_or("")
    }
    fn text(&self) -> String {
        String::from_utf8(self.body.clone()).unwrap()
    }
}

async fn get(app: &axum::Router, uri: &str) -> Reply {
    let req = Request::builder().uri(uri).body(Body::empty()).unwrap();
    let resp = app.clone().oneshot(req).await.unwrap();
    let status = resp.status();
    let headers = resp.headers().clone();
    let body = resp
        .into_body()
        .collect()
        .await
        .unwrap()
        .to_bytes()
        .to_vec();
    Reply {
        status,
        headers,
        body,
    }
}

fn csv_values(text: &str, header_line: &str) -> Vec<(f64, f32)> {
    let mut lines = text.lines();
    assert_eq!(lines.next(), Some(header_line));
    lines
        .map(|l| {
            let (x, v) = l.split_once(',').unwrap();
            (x.parse().unwrap(), v.parse().unwrap())
        })
        .collect()
}

fn svg_texts(text: &str) -> String {
    let doc = roxmltree::Document::parse(text).expect("the SVG is XML");
    doc.descendants()
        .filter(|n| n.has_tag_name("text"))
        .filter_map(|n| n.text())
        .collect::<Vec<_>>()
        .join("\n")
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_capture_exports_as_csv_and_svg() {
    let dir = TempDir::new("export-captures");
    let cfg = demo_config(dir.path());
    let p = bandwatch::Pipeline::start(&cfg).unwrap();
    let caps = dir.path().join("data/captures");
    let deadline = Instant::now() + Duration::from_secs(120);
    let id = loop {
        let l = capture::list(&caps).unwrap();
        if let Some(c) = l
            .iter()
            .find(|c| c.channel == "pump-de" && c.band == "bpfo")
        {
            break c.id.clone();
        }
        assert!(Instant::now() < deadline, "no BPFO capture: {l:?}");
        tokio::time::sleep(Duration::from_millis(50)).await;
    };
    let app = bandwatch::http::router(Arc::clone(&p.state));
    let meta = capture::read_meta(&caps, &id).unwrap();
    let sp = meta.spectrum.as_ref().expect("a spectrum at the trip");

    // The spectrum at the trip: CSV equal to the JSON's values as f32,
    // at f0 + k·df.
    let json: Value =
        serde_json::from_slice(&get(&app, &format!("/api/v1/events/{id}")).await.body).unwrap();
    let r = get(&app, &format!("/api/v1/events/{id}?format=csv")).await;
    assert_eq!(r.status, StatusCode::OK, "{}", r.text());
    assert_eq!(r.header(header::CONTENT_TYPE), "text/csv; charset=utf-8");
    assert_eq!(
        r.header(header::CONTENT_DISPOSITION),
        format!("attachment; filename=\"{id}-spectrum.csv\"")
    );
    // The stored scaling is power, in the channel's unit squared (g).
    let rows = csv_values(&r.text(), "frequency_hz,power_g^2");
    let want = json["spectrum"]["values"].as_array().unwrap();
    assert_eq!(rows.len(), want.len());
    assert_eq!(rows.len(), sp.values.len());
    for (k, ((f, v), w)) in rows.iter().zip(want).enumerate() {
        assert_eq!(
            v.to_bits(),
            (w.as_f64().unwrap() as f32).to_bits(),
            "line {k}"
        );
        assert_eq!(v.to_bits(), sp.values[k].to_bits());
        assert_eq!(*f, sp.f0_hz + k as f64 * sp.df_hz);
    }

    // Its image names the event and the analysis.
    let r = get(&app, &format!("/api/v1/events/{id}?format=svg&amp=log")).await;
    assert_eq!(r.status, StatusCode::OK, "{}", r.text());
    assert_eq!(r.header(header::CONTENT_TYPE), "image/svg+xml");
    assert_eq!(
        r.header(header::CONTENT_DISPOSITION),
        format!("attachment; filename=\"{id}-spectrum.svg\"")
    );
    let t = svg_texts(&r.text());
    let title = format!(
        "pump-de band bpfo {} → {} at {}",
        meta.trip.from, meta.trip.to, meta.trip.time
    );
    for needle in [
        title.as_str(),
        "Channel pump-de",
        // demo: block 8192 at 25 600 Hz: fs/block = 3.125 Hz.
        "Resolution 3.125 Hz",
        "df 3.125 Hz",
        "window hann",
        "4 averages (linear)",
        "power (dB re 1 g^2)",
        "Trip: band bpfo went",
    ] {
        assert!(t.contains(needle), "{needle:?} not in:\n{t}");
    }

    // The waveform: CSV equal to the BWF1 file's samples.
    let raw = get(&app, &format!("/api/v1/events/{id}/waveform")).await;
    assert_eq!(raw.status, StatusCode::OK);
    assert_eq!(raw.header(header::CONTENT_TYPE), "application/octet-stream");
    assert_eq!(
        raw.header(header::CONTENT_DISPOSITION),
        format!("attachment; filename=\"{id}.bwf1\"")
    );
    assert_eq!(raw.body, capture::read_waveform(&caps, &id).unwrap());
    let mut d = StreamDecoder::new();
    d.push(&raw.body);
    let mut samples = Vec::new();
    let mut s = Samples::default();
    while let Some(_h) = d.next_frame_into(&mut s).unwrap() {
        let Samples::F32(v) = &s else {
            panic!("f32 expected")
        };
        samples.extend_from_slice(v);
    }
    assert_eq!(samples.len() as u64, meta.waveform.samples);
    let r = get(&app, &format!("/api/v1/events/{id}/waveform?format=csv")).await;
    assert_eq!(r.status, StatusCode::OK, "{}", r.text());
    assert_eq!(
        r.header(header::CONTENT_DISPOSITION),
        format!("attachment; filename=\"{id}-waveform.csv\"")
    );
    let rows = csv_values(&r.text(), "time_s,value");
    assert_eq!(rows.len(), samples.len());
    for (i, ((t, v), w)) in rows.iter().zip(&samples).enumerate() {
        assert_eq!(v.to_bits(), w.to_bits(), "sample {i}");
        assert_eq!(*t, i as f64 / meta.waveform.sample_rate_hz);
    }
    let r = get(&app, &format!("/api/v1/events/{id}/waveform?format=svg")).await;
    assert_eq!(r.status, StatusCode::OK, "{}", r.text());
    assert_eq!(r.header(header::CONTENT_TYPE), "image/svg+xml");
    let t = svg_texts(&r.text());
    assert!(
        t.contains(&format!(
            "pump-de band bpfo {} → {}",
            meta.trip.from, meta.trip.to
        )),
        "{t}"
    );
    assert!(t.contains("Sample rate 25600 Hz"), "{t}");
    assert!(t.contains("trip"), "{t}");
    // The trip is marked where the pre-trigger samples end.
    let text = r.text();
    let doc = roxmltree::Document::parse(&text).unwrap();
    let area = doc
        .descendants()
        .find(|n| n.attribute("id") == Some("plot-area"))
        .unwrap();
    let a = |k: &str| -> f64 { area.attribute(k).unwrap().parse().unwrap() };
    let mark = doc
        .descendants()
        .find(|n| n.attribute("class") == Some("mark"))
        .expect("a trip mark");
    let x: f64 = mark.attribute("x1").unwrap().parse().unwrap();
    let trip_s = meta.waveform.pre_samples as f64 / meta.waveform.sample_rate_hz;
    let want =
        a("x") + (trip_s - a("data-x-min")) / (a("data-x-max") - a("data-x-min")) * a("width");
    assert!((x - want).abs() < 0.01, "trip mark at {x}, expected {want}");

    // Unknown ids and bad formats.
    for uri in [
        "/api/v1/events/00000000000000000001-no-such-capture?format=csv".to_string(),
        "/api/v1/events/00000000000000000001-no-such-capture/waveform?format=svg".to_string(),
    ] {
        let r = get(&app, &uri).await;
        assert_eq!(r.status, StatusCode::NOT_FOUND, "{uri}: {}", r.text());
    }
    let r = get(&app, &format!("/api/v1/events/{id}?format=png")).await;
    assert_eq!(r.status, StatusCode::BAD_REQUEST);
    assert!(
        r.text()
            .contains("format=\\\"png\\\" is not known (known: json, csv, svg)"),
        "{}",
        r.text()
    );
    let r = get(&app, &format!("/api/v1/events/{id}/waveform?format=png")).await;
    assert_eq!(r.status, StatusCode::BAD_REQUEST);
    assert!(r.text().contains("known: bwf1, csv, svg"), "{}", r.text());
    p.stop().await;
}
