//! Health, channel, spectrum and waveform endpoints.

use super::*;

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
    assert_eq!(v["spectrum"]["oldest_first_sample"], 3712);
    assert_eq!(v["spectrum"]["end_sample"], 4096 + 256);
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
    // The samples covered: the oldest block's start to the newest's end.
    assert_eq!(v["oldest_first_sample"], 3712);
    assert_eq!(v["end_sample"], 4096 + 256);
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

/// The channel JSON offers exactly the units and scalings the spectrum
/// endpoint takes (the operator page fills its menus from them): each one
/// offered is answered 200 in that unit, and a unit left out is refused.
#[tokio::test]
async fn offered_units_and_scalings_are_the_accepted_ones() {
    let st = ready_state();
    let v = get(&st, "/api/v1/channels/a").await.json();
    let units: Vec<String> = v["spectrum_units"]
        .as_array()
        .expect("spectrum_units")
        .iter()
        .map(|u| u.as_str().expect("unit").to_string())
        .collect();
    assert_eq!(units[0], "g", "the channel's own unit first");
    // Acceleration converts to every kinematic unit (common practice:
    // integrate once for velocity, twice for displacement), nothing else.
    for u in ["m/s^2", "mm/s", "in/s", "um", "mil"] {
        assert!(units.iter().any(|x| x == u), "{u} not offered: {units:?}");
    }
    for u in ["V", "mA", "bar"] {
        assert!(!units.iter().any(|x| x == u), "{u} offered: {units:?}");
        let r = get(&st, &format!("/api/v1/channels/a/spectrum?unit={u}")).await;
        assert_eq!(r.status, StatusCode::BAD_REQUEST, "{u}");
    }
    for u in &units {
        let q = u.replace('^', "%5E").replace('/', "%2F");
        let r = get(&st, &format!("/api/v1/channels/a/spectrum?unit={q}")).await;
        assert_eq!(r.status, StatusCode::OK, "{u}: {}", r.body);
        assert_eq!(r.json()["unit"], u.as_str());
    }
    let scalings = v["spectrum_scalings"]
        .as_array()
        .expect("spectrum_scalings");
    assert_eq!(scalings.len(), 5);
    for s in scalings {
        let s = s.as_str().expect("scaling");
        let r = get(&st, &format!("/api/v1/channels/a/spectrum?scaling={s}")).await;
        assert_eq!(r.status, StatusCode::OK, "{s}: {}", r.body);
        assert_eq!(r.json()["scaling"], s);
    }
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
    let app = router_with(HttpState::fixed(
        st.clone(),
        Arc::new(metrics::Metrics::new(st.clone())),
        gate.clone(),
    ));
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
