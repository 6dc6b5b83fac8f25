//! The overview (`/api/v1/overview`) and the trend
//! (`/api/v1/channels/{name}/trend`) on a state no pipeline changes, so
//! every field can be compared exactly.

use super::*;
use crate::dsp::bands::BandStatus;

/// The demo config (`config/demo.toml`), read as the daemon would read it.
fn demo_state() -> Arc<AppState> {
    let text = include_str!("../../../config/demo.toml");
    let cfg = crate::config::parse_str_in(text, std::path::Path::new("config"), None)
        .expect("demo config is valid");
    Arc::new(AppState::new(&cfg))
}

/// A snapshot of channel `i` of `st` with as many band values as its spec
/// has bands (the first not ok, as an order band without speed).
fn demo_snapshot(st: &AppState, i: usize) -> ChannelSnapshot {
    let bands = st.channels[i].spec.bands.len();
    let mut snap = snapshot(unix_now_ns() - 100_000_000);
    snap.bands = (0..bands)
        .map(|k| BandValue {
            value: 0.25 + k as f64,
            peak_hz: 100.0,
            lo_hz: 50.0,
            hi_hz: 150.0,
            status: if k == 0 {
                BandStatus::NoSpeed
            } else {
                BandStatus::Ok
            },
        })
        .collect();
    snap
}

/// Removes what depends on the moment of the request (ages of the
/// spectrum and of the last frame).
fn without_ages(mut v: Value) -> Value {
    if let Value::Object(m) = &mut v {
        m.remove("spectrum_age_seconds");
        if let Some(Value::Object(s)) = m.get_mut("source") {
            s.remove("last_frame_age_seconds");
        }
    }
    v
}

#[tokio::test]
async fn overview_holds_every_channel_as_its_own_endpoint_does() {
    let st = demo_state();
    // The last channel has not published yet: its detail says so too.
    for i in 0..st.channels.len() - 1 {
        publish(&st, i, demo_snapshot(&st, i));
    }
    let r = get(&st, "/api/v1/overview").await;
    assert_eq!(r.status, StatusCode::OK, "{}", r.body);
    let v = r.json();
    assert!(v["time"].as_str().is_some_and(|t| t.ends_with('Z')), "{v}");
    let channels = v["channels"].as_array().expect("channels");
    let names: Vec<&str> = channels.iter().filter_map(|c| c["name"].as_str()).collect();
    // config/demo.toml's four channels, in its order.
    assert_eq!(names, ["motor-de", "pump-de", "pump-nde", "tach"]);
    for c in channels {
        let name = c["name"].as_str().expect("name");
        let one = get(&st, &format!("/api/v1/channels/{name}")).await;
        assert_eq!(one.status, StatusCode::OK);
        assert_eq!(without_ages(c.clone()), without_ages(one.json()), "{name}");
    }
    assert!(channels[3]["spectrum"].is_null());
    assert!(channels[0]["spectrum"]["seq"].is_u64());

    // Both machines of the demo, also p2-tach, which no channel follows.
    let machines = v["machines"].as_array().expect("machines");
    let names: Vec<&str> = machines.iter().filter_map(|m| m["name"].as_str()).collect();
    assert_eq!(names, ["p2", "p2-tach"]);
    // p2: fixed at 1485 rpm (config/demo.toml), as the channel JSON says.
    assert_eq!(machines[0]["speed_source"], "fixed");
    assert_eq!(f(&machines[0]["speed_rpm"]), 1485.0);
    assert_eq!(f(&machines[0]["speed_hz"]), 1485.0 / 60.0);
    assert_eq!(machines[0]["speed_late_results"], 0);
    assert!(machines[0]["speed_updated"].is_null());
    let m = &channels[0]["machine"];
    for key in [
        "name",
        "speed_source",
        "speed_hz",
        "speed_rpm",
        "speed_late_results",
    ] {
        assert_eq!(m[key], machines[0][key], "{key}");
    }
    // p2-tach: measured, nothing measured yet.
    assert_eq!(machines[1]["speed_source"], "tach");
    assert!(machines[1]["speed_hz"].is_null());
    assert!(machines[1]["speed_rpm"].is_null());
    assert!(machines[1]["speed_updated"].is_null());

    let sources = v["sources"].as_array().expect("sources");
    assert_eq!(sources.len(), 1);
    assert_eq!(sources[0]["name"], "sim");
    assert_eq!(sources[0]["kind"], "sim");
    assert_eq!(sources[0]["state"], "disconnected");
    assert_eq!(
        without_ages(json_source(&sources[0])),
        without_ages(json_source(&channels[0]["source"]))
    );
    assert_eq!(sources[0]["counters"]["frames"], 0);
}

fn json_source(s: &Value) -> Value {
    serde_json::json!({ "source": s })
}

#[tokio::test]
async fn trend_is_columnar_with_nulls_for_bands_not_ok() {
    let st = state();
    let now_s = unix_now_ns() / 1_000_000_000;
    let snap = snapshot(unix_now_ns());
    let ch = &st.channels[0];
    // Twenty seconds ago: one result; a second ago: two (the band 'v' at 12.5
    // then 20, 'pk' ok then above Nyquist).
    ch.trend.push(now_s - 20, &snap.overall, &snap.bands);
    ch.trend.push(now_s - 1, &snap.overall, &snap.bands);
    let mut louder = snap.bands.clone();
    louder[0].value = 20.0;
    louder[1].status = BandStatus::AboveNyquist;
    ch.trend.push(now_s - 1, &snap.overall, &louder);

    let r = get(&st, "/api/v1/channels/a/trend").await;
    assert_eq!(r.status, StatusCode::OK, "{}", r.body);
    let v = r.json();
    assert_eq!(v["channel"], "a");
    assert_eq!(v["interval_s"], 1);
    // The default `[server] trend_seconds`.
    assert_eq!(v["capacity_seconds"], 600);
    assert_eq!(v["t"], serde_json::json!([now_s - 20, now_s - 1]));
    let rms = &v["overall"]["rms"];
    assert_eq!(rms["unit"], "g");
    assert_eq!(rms["last"], serde_json::json!([2.0, 2.0]));
    assert!(rms["alert_limit"].is_null());
    assert_eq!(v["overall"]["crest_factor"]["unit"], "1");
    assert_eq!(v["overall"]["mean"]["min"], serde_json::json!([0.25, 0.25]));
    let bands = v["bands"].as_array().expect("bands");
    assert_eq!(bands.len(), 2);
    assert_eq!(bands[0]["name"], "v");
    assert_eq!(bands[0]["unit"], "mm/s");
    assert_eq!(bands[0]["measure"], "rms");
    assert!(bands[0]["danger_limit"].is_null());
    assert_eq!(bands[0]["min"], serde_json::json!([12.5, 12.5]));
    assert_eq!(bands[0]["max"], serde_json::json!([12.5, 20.0]));
    assert_eq!(bands[0]["last"], serde_json::json!([12.5, 20.0]));
    assert_eq!(bands[1]["name"], "pk");
    assert_eq!(bands[1]["measure"], "peak");
    assert_eq!(bands[1]["min"], serde_json::json!([0.5, 0.5]));
    assert_eq!(bands[1]["last"], serde_json::json!([0.5, null]));

    // `seconds` narrows the window (a margin for a slow run); the other
    // channel has no points yet.
    let r = get(&st, "/api/v1/channels/a/trend?seconds=10").await;
    assert_eq!(r.json()["t"], serde_json::json!([now_s - 1]));
    let r = get(&st, "/api/v1/channels/b/trend").await;
    assert_eq!(r.json()["t"], serde_json::json!([]));
    assert_eq!(r.json()["bands"], serde_json::json!([]));
}

#[tokio::test]
async fn trend_refuses_bad_queries() {
    let st = state();
    for q in ["seconds=0", "seconds=x", "seconds=-5", "window=3"] {
        let r = get(&st, &format!("/api/v1/channels/a/trend?{q}")).await;
        assert_json_error(&r, StatusCode::BAD_REQUEST, "");
    }
    let r = get(&st, "/api/v1/channels/nope/trend").await;
    assert_eq!(r.status, StatusCode::NOT_FOUND);
    // Longer than kept: cut to the capacity, not refused.
    let r = get(&st, "/api/v1/channels/a/trend?seconds=100000").await;
    assert_eq!(r.status, StatusCode::OK);
}

/// The projection endpoint: its query is checked like the trend's, and a
/// channel without trend points answers per alarm why there is no fit
/// (no invented slope).
#[tokio::test]
async fn projection_refuses_bad_queries_and_says_why_there_is_no_fit() {
    let cfg = parse_str(
        "[server]\nlisten = \"127.0.0.1:0\"\n[alarms]\nstorage_dir = \"/nonexistent-never-opened\"\n\
         [[source]]\nname = \"s\"\nkind = \"sim\"\n\
         [[channel]]\nname = \"a\"\nsource = \"s\"\nindex = 0\nunit = \"g\"\nblock = 4096\n\
         integration_low_cut_hz = 5.0\n\
         overall_alarm = { rms = { alert = { limit = 1.0 } } }\n\
         [[channel.band]]\nname = \"v\"\nlo_hz = 10\nhi_hz = 1000\nunit = \"mm/s\"\n\
         [channel.band.alarm]\nalert = { limit = 2.0 }\ndanger = { limit = 4.0 }\n",
    )
    .expect("config");
    let st = Arc::new(AppState::new(&cfg));
    for q in ["seconds=9", "seconds=x", "growth=quadratic", "window=3"] {
        let r = get(&st, &format!("/api/v1/channels/a/projection?{q}")).await;
        assert_json_error(&r, StatusCode::BAD_REQUEST, "");
    }
    let r = get(&st, "/api/v1/channels/nope/projection").await;
    assert_eq!(r.status, StatusCode::NOT_FOUND);
    for q in ["", "?growth=linear&seconds=100000"] {
        let r = get(&st, &format!("/api/v1/channels/a/projection{q}")).await;
        assert_eq!(r.status, StatusCode::OK, "{}", r.body);
        let v = r.json();
        assert!(v["caution"]
            .as_str()
            .expect("caution")
            .contains("not a prediction"));
        let alarms = v["alarms"].as_array().expect("alarms");
        assert_eq!(alarms.len(), 2, "{v}");
        for a in alarms {
            assert_eq!(a["points"], 0, "{a}");
            assert!(
                a["no_fit"].as_str().expect("why").contains("at least 10"),
                "{a}"
            );
            assert!(a["test"].is_null() && a["slope"].is_null(), "{a}");
        }
    }
}
