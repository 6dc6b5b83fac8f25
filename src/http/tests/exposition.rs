//! `/metrics` through the router, and the golden exposition.

use super::*;

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
    st.sources[0].add_restart(crate::counters::RestartReason::IndexWrap);
    let r = get(&st, "/metrics").await;
    assert_eq!(r.status, StatusCode::OK);
    assert_eq!(r.content_type, "text/plain; version=0.0.4");
    let t = &r.body;
    assert_eq!(
        sample(
            t,
            r#"bandwatch_source_restarts_total{source="sim",reason="index_wrap"}"#
        ),
        Some(1.0)
    );
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
