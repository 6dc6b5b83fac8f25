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
    let [version, commit, target] = metrics::BUILD_LABELS;
    assert_eq!(version, env!("CARGO_PKG_VERSION"));
    let build = format!(
        r#"bandwatch_build_info{{commit="{commit}",target="{target}",version="{version}"}}"#
    );
    assert_eq!(sample(t, &build), Some(1.0), "{t}");
    // The commit and target as git and rustc name them (read here, apart
    // from build.rs): the checkout's HEAD, or "unknown" outside git.
    let run = |cmd: &str, args: &[&str]| {
        std::process::Command::new(cmd)
            .args(args)
            .output()
            .ok()
            .filter(|o| o.status.success())
            .map(|o| String::from_utf8_lossy(&o.stdout).trim().to_string())
    };
    if std::env::var_os("BANDWATCH_GIT_COMMIT").is_none() {
        let head = run("git", &["rev-parse", "--short=12", "HEAD"]);
        assert_eq!(commit, head.as_deref().unwrap_or("unknown"));
    }
    if let Some(v) = run("rustc", &["-vV"]) {
        let host = v.lines().find_map(|l| l.strip_prefix("host: "));
        assert_eq!(Some(target), host, "tests run on the host");
    }
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

/// The `process_*` series against /proc and tools read here: ps(1) for
/// CPU time and elapsed time, /proc/self/status for memory (kB, proc(5)),
/// getrlimit(2) for the fd limit.
#[tokio::test]
async fn process_series_match_proc() {
    use metrics::process;
    let st = ready_state();
    let r = get(&st, "/metrics").await;
    let t = &r.body;
    let v = |name: &str| sample(t, name).unwrap_or_else(|| panic!("{name} missing:\n{t}"));
    for (name, kind) in [
        ("process_cpu_seconds_total", "counter"),
        ("process_resident_memory_bytes", "gauge"),
        ("process_virtual_memory_bytes", "gauge"),
        ("process_open_fds", "gauge"),
        ("process_max_fds", "gauge"),
        ("process_start_time_seconds", "gauge"),
    ] {
        assert!(t.contains(&format!("# TYPE {name} {kind}\n")), "{name}");
    }
    let status = std::fs::read_to_string("/proc/self/status").expect("status");
    let kb = |key: &str| -> f64 {
        status
            .lines()
            .find_map(|l| l.strip_prefix(key))
            .and_then(|l| l.trim().trim_end_matches("kB").trim().parse::<f64>().ok())
            .unwrap_or_else(|| panic!("{key} in /proc/self/status"))
            * 1024.0
    };
    // Other tests run in this process at the same time: memory within a
    // factor of two of what status shows a moment later.
    let (rss, vm) = (
        v("process_resident_memory_bytes"),
        v("process_virtual_memory_bytes"),
    );
    let (rss_now, vm_now) = (kb("VmRSS:"), kb("VmSize:"));
    assert!(
        rss > 1e6 && rss > rss_now / 2.0 && rss < rss_now * 2.0,
        "{rss} vs {rss_now}"
    );
    assert!(
        vm >= rss && vm > vm_now / 2.0 && vm < vm_now * 2.0,
        "{vm} vs {vm_now}"
    );
    let (soft, _) = rlimit::getrlimit(rlimit::Resource::NOFILE).expect("getrlimit");
    let max = v("process_max_fds");
    if soft == rlimit::INFINITY {
        assert!(max.is_infinite());
    } else {
        assert_eq!(max, soft as f64);
    }
    let fds = v("process_open_fds");
    assert!(fds >= 3.0 && fds <= max, "{fds} open of {max}");
    // ps: cumulative CPU time (whole seconds) and elapsed time since start.
    let ps = std::process::Command::new("ps")
        .args([
            "-o",
            "times=,etimes=",
            "-p",
            &std::process::id().to_string(),
        ])
        .output()
        .expect("run ps");
    let out = String::from_utf8_lossy(&ps.stdout);
    let nums: Vec<f64> = out
        .split_ascii_whitespace()
        .map(|x| x.parse().expect("ps number"))
        .collect();
    let (cpu_ps, elapsed_ps) = (nums[0], nums[1]);
    let cpu = v("process_cpu_seconds_total");
    assert!(
        cpu >= 0.0 && cpu <= cpu_ps + 2.0 && cpu >= cpu_ps - 10.0,
        "{cpu} vs ps {cpu_ps}"
    );
    let now = unix_now_ns() as f64 * 1e-9;
    let start = v("process_start_time_seconds");
    assert!(
        (start - (now - elapsed_ps)).abs() < 3.0,
        "{start} vs now - {elapsed_ps}"
    );
    // Counters never decrease.
    let again = get(&st, "/metrics").await;
    let cpu2 = sample(&again.body, "process_cpu_seconds_total").expect("cpu");
    assert!(cpu2 >= cpu);
    // The parsers on proc(5)'s layouts, including a command name holding
    // `) (` and spaces.
    let stat = "4242 (a) (b c) S 1 2 3 4 5 6 7 8 9 10 150 25 0 0 20 0 3 0 9000 123456789 2048 18446744073709551615";
    assert_eq!(
        process::parse_stat(stat).expect("stat"),
        process::Stat {
            utime_ticks: 150,
            stime_ticks: 25,
            start_ticks: 9000,
            vsize_bytes: 123_456_789,
            rss_pages: 2048,
        }
    );
    assert!(process::parse_stat("4242 (a) S 1 2").is_err());
    assert!(process::parse_stat("no paren").is_err());
    let limits = "Limit                     Soft Limit           Hard Limit           Units\n\
                  Max open files            1024                 524288               files\n";
    assert_eq!(process::parse_max_files(limits).expect("limits"), 1024.0);
    let unlimited = "Max open files            unlimited            unlimited            files\n";
    assert!(process::parse_max_files(unlimited)
        .expect("limits")
        .is_infinite());
    assert!(process::parse_max_files("Max cpu time unlimited").is_err());
    assert_eq!(
        process::parse_btime("cpu 1 2\nbtime 1700000000\n").expect("btime"),
        1_700_000_000
    );
    assert!(process::parse_btime("cpu 1 2\n").is_err());
}

#[test]
fn golden_exposition() {
    let app = golden_state();
    let m = metrics::Metrics::with_clock(app, golden_clock);
    let text = String::from_utf8(m.render_fresh().expect("render")).expect("utf-8");
    let [version, commit, target] = metrics::BUILD_LABELS;
    let text = text
        .replace(&format!("version=\"{version}\""), "version=\"VERSION\"")
        .replace(&format!("commit=\"{commit}\""), "commit=\"COMMIT\"")
        .replace(&format!("target=\"{target}\""), "target=\"TARGET\"");
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
