//! The real daemon in-process (`bandwatch::serve` on 127.0.0.1:0) playing
//! the demo config, queried over a real TCP socket, then shut down.
//!
//! Expected frequencies come from the demo scenario of the design (a 4-pole
//! motor at 1485 rpm: 1× = 24.75 Hz; 7 impeller vanes: 173.25 Hz), not from
//! this code.

mod common;

use std::net::SocketAddr;
use std::time::{Duration, Instant};

use serde_json::Value;
use tokio::sync::oneshot;

use common::{get, get_with, try_get};

const DEMO: &str = include_str!("../config/demo.toml");
/// Bound on waiting for every channel's first spectrum.
const READY_TIMEOUT: Duration = Duration::from_secs(20);
const SHAFT_HZ: f64 = 1485.0 / 60.0;
const VANE_PASS_HZ: f64 = 7.0 * SHAFT_HZ;

/// The demo config with the simulator playing 4× real time.
fn demo_config() -> bandwatch::config::Config {
    let text = DEMO.replacen("seed = 2\n", "seed = 2\nspeed = 4.0\n", 1);
    assert_ne!(text, DEMO, "config/demo.toml no longer has `seed = 2`");
    // As the file in config/ would resolve its paths.
    match bandwatch::config::parse_str_in(&text, std::path::Path::new("config"), None) {
        Ok(c) => c,
        Err(e) => panic!("demo config: {e:?}"),
    }
}

fn num(v: &Value) -> f64 {
    v.as_f64().unwrap_or_else(|| panic!("not a number: {v}"))
}

/// Frequency of the largest value of a spectrum body.
fn peak_frequency(spectrum: &Value, skip_dc: bool) -> f64 {
    let values = spectrum["values"].as_array().expect("values");
    let start = usize::from(skip_dc);
    let (k, _) = values
        .iter()
        .enumerate()
        .skip(start)
        .map(|(k, v)| (k, num(v)))
        .fold(
            (0, f64::NEG_INFINITY),
            |best, x| if x.1 > best.1 { x } else { best },
        );
    num(&spectrum["f0_hz"]) + k as f64 * num(&spectrum["df_hz"])
}

async fn wait_ready(addr: SocketAddr) {
    let start = Instant::now();
    loop {
        if let Ok(r) = try_get(addr, "/readyz").await {
            if r.status == 200 {
                return;
            }
            assert_eq!(r.status, 503, "{}", r.text());
            assert!(r.json()["waiting"].is_array());
        }
        assert!(
            start.elapsed() < READY_TIMEOUT,
            "not ready within {READY_TIMEOUT:?}"
        );
        tokio::time::sleep(Duration::from_millis(100)).await;
    }
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn daemon_serves_the_demo_over_tcp() {
    let listener = tokio::net::TcpListener::bind("127.0.0.1:0")
        .await
        .expect("bind");
    let addr = listener.local_addr().expect("addr");
    let (stop_tx, stop_rx) = oneshot::channel::<()>();
    let server = tokio::spawn(bandwatch::serve(demo_config(), listener, async move {
        let _ = stop_rx.await;
    }));

    let r = get(addr, "/healthz").await;
    assert_eq!(r.status, 200);
    wait_ready(addr).await;
    let r = get(addr, "/readyz").await;
    assert_eq!(r.status, 200);
    assert_eq!(r.json()["status"], "ready");

    // Channel list.
    let r = get(addr, "/api/v1/channels").await;
    assert_eq!(r.status, 200);
    assert!(r
        .header("content-type")
        .unwrap_or("")
        .starts_with("application/json"));
    let list = r.json();
    let names: Vec<&str> = list["channels"]
        .as_array()
        .expect("channels")
        .iter()
        .map(|c| c["name"].as_str().expect("name"))
        .collect();
    assert_eq!(names, ["motor-de", "pump-de", "pump-nde", "tach"]);
    for c in list["channels"].as_array().expect("channels") {
        assert_eq!(c["source"]["state"], "connected", "{c}");
        assert_eq!(c["stale"], false, "{c}");
        assert_eq!(num(&c["sample_rate_hz"]), 25600.0);
        assert_eq!(c["block"], 8192);
    }

    // One channel.
    let r = get(addr, "/api/v1/channels/pump-de").await;
    assert_eq!(r.status, 200);
    let d = r.json();
    let bands = d["bands"].as_array().expect("bands");
    assert_eq!(bands.len(), 8);
    assert!(bands.iter().all(|b| b["value"].is_f64()), "{d}");
    assert!(num(&d["counters"]["spectra"]) >= 1.0);
    assert!(num(&d["overall"]["rms"]) > 0.0);

    // motor-de: dominated by 1× (unbalance), so the largest line is within
    // one line of 24.75 Hz.
    let r = get(addr, "/api/v1/channels/motor-de/spectrum").await;
    assert_eq!(r.status, 200);
    let s = r.json();
    assert_eq!(s["values"].as_array().map(Vec::len), Some(8192 / 2 + 1));
    let df = num(&s["df_hz"]);
    assert_eq!(df, 25600.0 / 8192.0);
    let f = peak_frequency(&s, true);
    assert!((f - SHAFT_HZ).abs() <= df, "motor-de peak at {f} Hz");

    // pump-de between 100 and 1000 Hz: vane pass at 173.25 Hz.
    let r = get(
        addr,
        "/api/v1/channels/pump-de/spectrum?fmin=100&fmax=1000&unit=mm/s",
    )
    .await;
    assert_eq!(r.status, 200, "{}", r.text());
    let s = r.json();
    assert_eq!(s["unit"], "mm/s");
    assert!(num(&s["f0_hz"]) >= 100.0);
    let f = peak_frequency(&s, false);
    assert!(
        (f - VANE_PASS_HZ).abs() <= df,
        "pump-de 100–1000 Hz peak at {f} Hz"
    );

    // CSV.
    let r = get(
        addr,
        "/api/v1/channels/motor-de/spectrum?format=csv&fmax=100",
    )
    .await;
    assert_eq!(r.status, 200);
    assert!(r
        .header("content-type")
        .unwrap_or("")
        .starts_with("text/csv"));
    let text = r.text();
    let mut lines = text.lines();
    assert_eq!(lines.next(), Some("frequency_hz,rms_g"));
    // Lines 0, 3.125, …, 100 Hz: 33 of them.
    assert_eq!(lines.count(), 33);

    // The SVG image of pump-de from 100 to 1000 Hz: a download whose highest
    // drawn point is the vane pass (the demo scenario: 7 × 24.75 Hz), and
    // the envelope spectrum with the BPFO band drawn as a shaded span.
    let r = get(
        addr,
        "/api/v1/channels/pump-de/spectrum?format=svg&fmin=100&fmax=1000&unit=mm/s",
    )
    .await;
    assert_eq!(r.status, 200, "{}", r.text());
    assert_eq!(r.header("content-type"), Some("image/svg+xml"));
    let cd = r.header("content-disposition").unwrap_or("").to_string();
    assert!(
        cd.starts_with("attachment; filename=\"pump-de-spectrum-") && cd.ends_with("Z.svg\""),
        "{cd}"
    );
    let text = r.text();
    let doc = roxmltree::Document::parse(&text).expect("the SVG is XML");
    let area = doc
        .descendants()
        .find(|n| n.attribute("id") == Some("plot-area"))
        .expect("plot area");
    let a = |k: &str| -> f64 { area.attribute(k).and_then(|v| v.parse().ok()).expect(k) };
    let points: Vec<(f64, f64)> = doc
        .descendants()
        .find(|n| n.attribute("id") == Some("trace"))
        .and_then(|n| n.attribute("points"))
        .expect("trace")
        .split_whitespace()
        .filter_map(|p| p.split_once(','))
        .map(|(x, y)| (x.parse().expect("x"), y.parse().expect("y")))
        .collect();
    let top = points
        .iter()
        .min_by(|p, q| p.1.total_cmp(&q.1))
        .expect("points");
    let f_top =
        a("data-x-min") + (top.0 - a("x")) / a("width") * (a("data-x-max") - a("data-x-min"));
    assert!(
        (f_top - VANE_PASS_HZ).abs() <= df,
        "highest drawn point at {f_top} Hz"
    );
    let r = get(
        addr,
        "/api/v1/channels/pump-de/spectrum?format=svg&spectrum=envelope&amp=log",
    )
    .await;
    assert_eq!(r.status, 200, "{}", r.text());
    let text = r.text();
    let doc = roxmltree::Document::parse(&text).expect("the SVG is XML");
    let labels: Vec<&str> = doc
        .descendants()
        .filter(|n| n.attribute("class") == Some("band-label"))
        .filter_map(|n| n.text())
        .collect();
    assert!(labels.contains(&"bpfo"), "{labels:?}");
    assert!(text.contains("pump-de envelope spectrum"));

    // Waveform: the newest block, in g.
    let r = get(addr, "/api/v1/channels/pump-nde/waveform").await;
    assert_eq!(r.status, 200);
    let w = r.json();
    assert_eq!(w["unit"], "g");
    assert_eq!(w["values"].as_array().map(Vec::len), Some(8192));

    // Errors are JSON.
    let r = get(addr, "/api/v1/channels/no-such/spectrum").await;
    assert_eq!(r.status, 404);
    assert!(r.json()["error"].as_str().is_some());
    let r = get(addr, "/api/v1/channels/motor-de/spectrum?fmin=50&fmax=10").await;
    assert_eq!(r.status, 400);

    // Metrics.
    let r = get(addr, "/metrics").await;
    assert_eq!(r.status, 200);
    assert_eq!(r.header("content-type"), Some("text/plain; version=0.0.4"));
    let text = r.text();
    let series =
        r#"bandwatch_band_rms_meters_per_second{channel="motor-de",band="overall-velocity"} "#;
    let v: f64 = text
        .lines()
        .find_map(|l| l.strip_prefix(series))
        .unwrap_or_else(|| panic!("{series} missing"))
        .trim()
        .parse()
        .expect("value");
    // The demo's motor runs at a few mm/s: a sanity range, not a check value.
    assert!((0.0005..0.02).contains(&v), "{v} m/s");
    assert!(text.contains(r#"bandwatch_source_up{source="sim",kind="sim"} 1"#));
    assert!(text.contains(
        r#"bandwatch_http_requests_total{path="/api/v1/channels/{name}/spectrum",status="200"}"#
    ));

    // gzip only when asked (RFC 9110 §12.5.3 Accept-Encoding, RFC 1952):
    // the gzipped body, unpacked by the system's `gzip -d` (not our code),
    // is the same exposition: the same series, in the same order.
    let gz = get_with(addr, "/metrics", "Accept-Encoding: gzip\r\n").await;
    let plain = get(addr, "/metrics").await;
    assert_eq!(gz.status, 200);
    assert_eq!(gz.header("content-encoding"), Some("gzip"));
    assert_eq!(gz.header("content-type"), Some("text/plain; version=0.0.4"));
    assert_eq!(&gz.body[..2], &[0x1f, 0x8b], "gzip magic (RFC 1952 §2.3.1)");
    assert_eq!(plain.header("content-encoding"), None);
    assert!(plain.text().starts_with("# HELP "));
    let unpacked = gunzip(&gz.body);
    let series = |t: &str| -> Vec<String> {
        t.lines()
            .map(|l| l.rsplit_once(' ').map_or(l, |(k, _)| k).to_string())
            .collect()
    };
    assert_eq!(series(&unpacked), series(&plain.text()));
    assert!(
        gz.body.len() * 4 < plain.body.len(),
        "{} gzipped vs {} plain bytes",
        gz.body.len(),
        plain.body.len()
    );
    // The JSON API too.
    let gz = get_with(addr, "/api/v1/channels", "Accept-Encoding: gzip\r\n").await;
    assert_eq!(gz.header("content-encoding"), Some("gzip"));
    let v: Value = serde_json::from_str(&gunzip(&gz.body)).expect("JSON");
    assert!(
        v.as_array().is_some_and(|a| !a.is_empty()) || v.is_object(),
        "{v}"
    );

    // Clean shutdown.
    let _ = stop_tx.send(());
    match tokio::time::timeout(Duration::from_secs(10), server).await {
        Ok(Ok(Ok(()))) => {}
        Ok(Ok(Err(e))) => panic!("serve failed: {e}"),
        Ok(Err(e)) => panic!("serve task panicked: {e}"),
        Err(_) => panic!("serve did not stop within 10 s"),
    }
    assert!(
        try_get(addr, "/healthz").await.is_err(),
        "still answering after shutdown"
    );
}

/// `gzip -dc` of `body`: the system's gzip, independent of the server's
/// compressor.
fn gunzip(body: &[u8]) -> String {
    use std::io::Write;
    let mut child = std::process::Command::new("gzip")
        .arg("-dc")
        .stdin(std::process::Stdio::piped())
        .stdout(std::process::Stdio::piped())
        .spawn()
        .expect("run gzip");
    child
        .stdin
        .take()
        .expect("stdin")
        .write_all(body)
        .expect("write to gzip");
    let out = child.wait_with_output().expect("gzip output");
    assert!(out.status.success(), "gzip -d failed: {out:?}");
    String::from_utf8(out.stdout).expect("UTF-8")
}

/// Whether `a` and `b` have the same shape: the same keys, array lengths
/// and JSON types throughout (null standing for any type: a value not
/// known at one of the two moments, e.g. a speed between two readings).
fn same_shape(a: &Value, b: &Value, at: &str) -> Result<(), String> {
    match (a, b) {
        (Value::Null, _) | (_, Value::Null) => Ok(()),
        (Value::Object(x), Value::Object(y)) => {
            let kx: Vec<&String> = x.keys().collect();
            let ky: Vec<&String> = y.keys().collect();
            if kx != ky {
                return Err(format!("{at}: keys {kx:?} vs {ky:?}"));
            }
            x.iter()
                .try_for_each(|(k, v)| same_shape(v, &y[k], &format!("{at}.{k}")))
        }
        (Value::Array(x), Value::Array(y)) => {
            if x.len() != y.len() {
                return Err(format!("{at}: {} vs {} items", x.len(), y.len()));
            }
            x.iter()
                .zip(y)
                .enumerate()
                .try_for_each(|(i, (v, w))| same_shape(v, w, &format!("{at}[{i}]")))
        }
        (Value::Number(_), Value::Number(_))
        | (Value::String(_), Value::String(_))
        | (Value::Bool(_), Value::Bool(_)) => Ok(()),
        _ => Err(format!("{at}: {a} vs {b}")),
    }
}

/// The parts of a channel object that only the config decides (equal at
/// any two moments).
fn config_part(c: &Value) -> Value {
    let pick = |v: &Value, keys: &[&str]| -> Value {
        keys.iter()
            .map(|k| (k.to_string(), v[*k].clone()))
            .collect::<serde_json::Map<_, _>>()
            .into()
    };
    let mut out = pick(
        c,
        &[
            "name",
            "unit",
            "quantity",
            "sample_rate_hz",
            "block",
            "nfft",
            "hop",
            "window",
            "overlap",
            "averaging",
            "envelope_hz",
            "expected_update_interval_seconds",
            "integration_low_cut_hz",
        ],
    );
    out["source"] = pick(&c["source"], &["name", "kind"]);
    out["machine"] = pick(&c["machine"], &["name", "speed_source"]);
    let band_keys = [
        "name", "orders", "bearing", "defect", "spectrum", "measure", "unit", "quantity",
    ];
    out["bands"] = c["bands"]
        .as_array()
        .map(|b| b.iter().map(|b| pick(b, &band_keys)).collect())
        .unwrap_or_default();
    out["alarms"] = c["alarms"]
        .as_array()
        .map(|a| {
            a.iter()
                .map(|a| pick(a, &["band", "unit", "latching", "zone"]))
                .collect()
        })
        .unwrap_or_default();
    out
}

async fn start_demo() -> (
    SocketAddr,
    oneshot::Sender<()>,
    tokio::task::JoinHandle<Result<(), bandwatch::RunError>>,
) {
    let listener = tokio::net::TcpListener::bind("127.0.0.1:0")
        .await
        .expect("bind");
    let addr = listener.local_addr().expect("addr");
    let (stop_tx, stop_rx) = oneshot::channel::<()>();
    let server = tokio::spawn(bandwatch::serve(demo_config(), listener, async move {
        let _ = stop_rx.await;
    }));
    wait_ready(addr).await;
    (addr, stop_tx, server)
}

/// `/api/v1/overview` on the running demo holds the four channels as their
/// own endpoints show them, both machines and the source; the trends grow
/// one point a second and their newest values are the published ones.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn overview_and_trend_on_the_running_demo() {
    let (addr, stop_tx, server) = start_demo().await;

    let r = get(addr, "/api/v1/overview").await;
    assert_eq!(r.status, 200, "{}", r.text());
    let o = r.json();
    let channels = o["channels"].as_array().expect("channels");
    let names: Vec<&str> = channels.iter().filter_map(|c| c["name"].as_str()).collect();
    assert_eq!(names, ["motor-de", "pump-de", "pump-nde", "tach"]);
    for c in channels {
        let name = c["name"].as_str().expect("name");
        let one = get(addr, &format!("/api/v1/channels/{name}")).await.json();
        // Every field the channel endpoint has, of the same type; what the
        // config decides, equal.
        if let Err(e) = same_shape(c, &one, name) {
            panic!("overview vs channel endpoint: {e}");
        }
        assert_eq!(config_part(c), config_part(&one), "{name}");
        assert_eq!(c["source"]["state"], "connected");
    }
    let machines = o["machines"].as_array().expect("machines");
    let names: Vec<&str> = machines.iter().filter_map(|m| m["name"].as_str()).collect();
    // config/demo.toml: p2 (fixed, 1485 rpm) and p2-tach, which no channel
    // follows.
    assert_eq!(names, ["p2", "p2-tach"]);
    assert_eq!(machines[0]["speed_source"], "fixed");
    assert_eq!(num(&machines[0]["speed_rpm"]), 1485.0);
    assert_eq!(machines[1]["speed_source"], "tach");
    assert!(machines[1]["speed_late_results"].is_u64());
    let sources = o["sources"].as_array().expect("sources");
    assert_eq!(sources.len(), 1);
    assert_eq!(sources[0]["name"], "sim");
    assert_eq!(sources[0]["state"], "connected");
    assert!(num(&sources[0]["counters"]["frames"]) > 0.0);

    // The trend grows, one point a second, oldest first.
    let points = |v: &Value| v["t"].as_array().map_or(0, Vec::len);
    let first = get(addr, "/api/v1/channels/pump-de/trend").await.json();
    assert_eq!(first["capacity_seconds"], 600);
    let start = Instant::now();
    let grown = loop {
        let v = get(addr, "/api/v1/channels/pump-de/trend").await.json();
        if points(&v) >= points(&first) + 2 {
            break v;
        }
        assert!(
            start.elapsed() < Duration::from_secs(15),
            "trend did not grow: {} points",
            points(&v)
        );
        tokio::time::sleep(Duration::from_millis(200)).await;
    };
    let t: Vec<u64> = grown["t"]
        .as_array()
        .expect("t")
        .iter()
        .map(|x| x.as_u64().expect("second"))
        .collect();
    assert!(t.windows(2).all(|w| w[0] < w[1]), "{t:?}");
    let bands = grown["bands"].as_array().expect("bands");
    assert_eq!(bands.len(), 8);
    for b in bands {
        for col in ["min", "max", "last"] {
            assert_eq!(b[col].as_array().map(Vec::len), Some(t.len()), "{b}");
        }
    }

    // The newest point's last value is what the channel endpoint shows
    // (stored as f32): read between two channel reads of the same result.
    let mut compared = false;
    for _ in 0..100 {
        let before = get(addr, "/api/v1/channels/pump-de").await.json();
        let tr = get(addr, "/api/v1/channels/pump-de/trend").await.json();
        let after = get(addr, "/api/v1/channels/pump-de").await.json();
        if before["spectrum"]["seq"] != after["spectrum"]["seq"] {
            continue;
        }
        let last = |s: &Value| s["last"].as_array().and_then(|a| a.last()).cloned();
        for (i, b) in before["bands"]
            .as_array()
            .expect("bands")
            .iter()
            .enumerate()
        {
            let got = last(&tr["bands"][i]).expect("a point");
            match b["value"].as_f64() {
                Some(v) => assert_eq!(got.as_f64().map(|g| g as f32), Some(v as f32), "{b}"),
                None => assert!(got.is_null(), "{b}: {got}"),
            }
            assert_eq!(tr["bands"][i]["name"], b["name"]);
        }
        let rms = last(&tr["overall"]["rms"]).and_then(|v| v.as_f64());
        assert_eq!(
            rms.map(|g| g as f32),
            Some(num(&before["overall"]["rms"]) as f32)
        );
        // pump-de's band alarm: the limits the channel endpoint shows.
        for a in before["alarms"].as_array().expect("alarms") {
            if let Some(tb) = tr["bands"]
                .as_array()
                .and_then(|bs| bs.iter().find(|b| b["name"] == a["band"]))
            {
                assert_eq!(tb["alert_limit"], a["alert_limit"], "{a}");
                assert_eq!(tb["danger_limit"], a["danger_limit"], "{a}");
            }
        }
        compared = true;
        break;
    }
    assert!(
        compared,
        "no two channel reads of the same result in 100 tries"
    );

    let _ = stop_tx.send(());
    match tokio::time::timeout(Duration::from_secs(10), server).await {
        Ok(Ok(Ok(()))) => {}
        other => panic!("serve did not stop cleanly: {other:?}"),
    }
}
