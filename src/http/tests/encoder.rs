//! The direct text encoder against the prometheus crate, escaping,
//! values, and the render cache.

use super::*;

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
    rich_state_trimmed(Default::default())
}

/// [`rich_state`] with `[metrics]` set to `exposition`.
fn rich_state_trimmed(exposition: crate::config::exposition::ExpositionSpec) -> Arc<AppState> {
    use crate::alarm::engine::{AlarmBoard, AlarmView, HealthView};
    use crate::alarm::state::AlarmState;
    let cfg = parse_str(RICH).expect("rich config is valid");
    let mut app = AppState::new(&cfg);
    app.exposition = exposition;
    app.started_unix_ns = TS_NS - 3_600_000_000_000;
    let history = crate::history::HistoryShared::new(crate::config::HistorySpec {
        file: "/nonexistent/history.sqlite".into(),
        interval_s: 60,
        keep_days: 365,
        thin_after_days: 30,
        spectrum_every_s: 600,
        spectra_keep_days: 90,
        max_bytes: 1 << 30,
        queue: 8192,
        projection_window_s: 86_400,
    });
    history.counters.dropped[0].store(7, Ordering::Relaxed);
    history.counters.spectra_stored[1].store(3, Ordering::Relaxed);
    history
        .counters
        .file_bytes
        .store(1 << 40, Ordering::Relaxed);
    app.history = Some(Arc::new(history));
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
        r#"bandwatch_machine_speed_hertz{machine="m1",method="fixed"} 25"#,
        r#"bandwatch_channel_mean_meters_per_second_squared{channel="B-upper"} -0"#,
        r#"bandwatch_channel_samples_received_total{channel="a"} 1152921504606847000"#,
        r#"bandwatch_history_records_dropped_total{reason="queue_full"} 7"#,
        r#"bandwatch_history_records_dropped_total{reason="write_error"} 0"#,
        r#"bandwatch_history_spectra_stored_total{reason="alarm"} 3"#,
        r#"bandwatch_history_file_bytes 1099511627776"#,
        "bandwatch_history_queue_records 0",
    ] {
        assert!(ours.contains(series), "{series} missing:\n{ours}");
    }
}

/// The family a line of the text format belongs to: the sample's name, or
/// the name a `# HELP`/`# TYPE` line describes.
fn family_of(line: &str) -> &str {
    match line.strip_prefix("# ") {
        Some(rest) => rest.split(' ').nth(1).unwrap_or(""),
        None => line.split(['{', ' ']).next().unwrap_or(""),
    }
}

/// `[metrics]` trims exactly what it names: the trimmed exposition is the
/// full one less the excluded families' lines and the band series of bands
/// no alarm watches (B-upper's `x` and `w`), a family left with no sample
/// losing its HELP and TYPE too. Derived here from the full text by line
/// filtering, independently of the walk; the reference encoder agrees.
#[test]
fn trimmed_exposition_is_the_full_one_less_what_is_trimmed() {
    use crate::config::exposition::{BandExport, ExpositionSpec, FamilyPattern};
    let render = |app: Arc<AppState>| {
        let body = metrics::Metrics::with_clock(app, golden_clock)
            .render_fresh()
            .expect("render");
        String::from_utf8(body).expect("utf-8")
    };
    let full = render(rich_state());
    let spec = ExpositionSpec {
        exclude: vec![
            FamilyPattern {
                text: "bandwatch_band_peak_frequency_hertz".into(),
                prefix: false,
            },
            FamilyPattern {
                text: "bandwatch_alarm_limit_".into(),
                prefix: true,
            },
            FamilyPattern {
                text: "bandwatch_channel_discontinuities_total".into(),
                prefix: false,
            },
        ],
        bands: BandExport::Alarmed,
    };
    let trimmed = render(rich_state_trimmed(spec.clone()));

    let dropped = |line: &str| {
        let f = family_of(line);
        f == "bandwatch_band_peak_frequency_hertz"
            || f.starts_with("bandwatch_alarm_limit_")
            || f == "bandwatch_channel_discontinuities_total"
            || (f.starts_with("bandwatch_band_")
                && !line.starts_with('#')
                && line.contains(r#"channel="B-upper""#))
    };
    let kept: Vec<&str> = full.lines().filter(|l| !dropped(l)).collect();
    let with_samples: std::collections::BTreeSet<&str> = kept
        .iter()
        .filter(|l| !l.starts_with('#'))
        .map(|l| family_of(l))
        .collect();
    let expected: String = kept
        .iter()
        .filter(|l| !l.starts_with('#') || with_samples.contains(family_of(l)))
        .map(|l| format!("{l}\n"))
        .collect();
    assert_eq!(trimmed, expected);
    // The trim did something of each kind (a check that cannot pass on an
    // untrimmed or empty exposition).
    assert!(full.contains(r#"bandwatch_band_in_service{channel="B-upper",band="w"}"#));
    assert!(
        !trimmed.contains(r#"channel="B-upper",band="w""#),
        "{trimmed}"
    );
    assert!(trimmed.contains(r#"bandwatch_band_in_service{channel="z-last",band="vel"} 1"#));
    assert!(full.contains("bandwatch_alarm_limit_meters_per_second{"));
    assert!(!trimmed.contains("bandwatch_alarm_limit_meters_per_second"));
    // `bandwatch_alarm_limit` (dimensionless) is not under the prefix.
    assert!(trimmed.contains(r#"bandwatch_alarm_limit{channel="z-last""#));
    assert!(!trimmed.contains("bandwatch_channel_discontinuities_total"));
    assert!(trimmed.contains("bandwatch_channel_samples_dropped_total{"));
    assert!(
        full.len() - trimmed.len() > 1000,
        "{}",
        full.len() - trimmed.len()
    );

    // The reference encoder walks the same trimmed state.
    let theirs = String::from_utf8(metrics::proto::render(
        rich_state_trimmed(spec),
        golden_clock,
    ))
    .expect("utf-8");
    let inf = r#"bandwatch_channel_crest_factor{channel="B-upper"} "#;
    assert_eq!(
        trimmed,
        theirs.replace(&format!("{inf}inf\n"), &format!("{inf}+Inf\n"))
    );
}

/// An `[metrics] exclude` entry must match a family the config exports;
/// the daemon's own families cannot be excluded (the entry says so).
#[test]
fn exclusions_matching_nothing_are_config_errors() {
    let cfg = parse_str(&format!(
        "{RICH}\n[metrics]\nexclude = [\"bandwatch_band_peak_frequency_hertz\", \
         \"bandwatch_band_rms_*\", \"bandwatch_build_info\", \"bandwatch_band_rsm_*\", \
         \"bandwatch_source_rejected_total\"]\n"
    ))
    .expect("the entries' form is valid");
    let issues = metrics::check_exposition(&cfg);
    let paths: Vec<&str> = issues.iter().map(|i| i.path.as_str()).collect();
    assert_eq!(
        paths,
        ["metrics.exclude[2]", "metrics.exclude[3]"],
        "{issues:?}"
    );
    assert!(issues[0].message.contains("always exported"), "{issues:?}");
    assert!(
        issues[1].message.contains("bandwatch_band_rsm_*"),
        "{issues:?}"
    );
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
    let app = router_with(HttpState::fixed(
        st.clone(),
        m,
        Arc::new(gate::DspGate::per_core()),
    ));
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

/// `bandwatch_alarm_time_to_limit_seconds`: a band rising 0.002 mm/s a
/// second from 1 mm/s over the 600 s before the scrape is past its 2 mm/s
/// alert (0 s) and reaches its 4 mm/s danger about 900 s after the
/// newest point (exponential growth fitted: sooner than the straight
/// line, later than now); a flat band has no series. Both encoders agree.
#[test]
fn time_to_limit_is_exported_only_for_a_significant_trend() {
    use crate::alarm::engine::{AlarmBoard, AlarmView, HealthView};
    use crate::alarm::state::AlarmState;
    let cfg = parse_str(
        "[server]\nlisten = \"127.0.0.1:0\"\n[alarms]\nstorage_dir = \"/nonexistent-never-opened\"\n\
         [[source]]\nname = \"s\"\nkind = \"sim\"\n\
         [[channel]]\nname = \"c\"\nsource = \"s\"\nindex = 0\nunit = \"g\"\nblock = 4096\n\
         integration_low_cut_hz = 5.0\n\
         [[channel.band]]\nname = \"rising\"\nlo_hz = 10\nhi_hz = 1000\nunit = \"mm/s\"\n\
         [channel.band.alarm]\nalert = { limit = 2.0 }\ndanger = { limit = 4.0 }\n\
         [[channel.band]]\nname = \"flat\"\nlo_hz = 1000\nhi_hz = 2000\nunit = \"mm/s\"\n\
         [channel.band.alarm]\nalert = { limit = 2.0 }\ndanger = { limit = 4.0 }\n",
    )
    .expect("config");
    let app = AppState::new(&cfg);
    let ch = &app.channels[0];
    let view = AlarmView {
        state: AlarmState::Normal,
        latched: false,
        acknowledged: false,
        since_unix_ns: 0,
        value: None,
        alert_limit: Some(2.0),
        danger_limit: Some(4.0),
        transitions: [0; 4],
        learning: None,
    };
    ch.alarm_board.store(Some(Arc::new(AlarmBoard {
        health: HealthView {
            ok: true,
            reasons: Default::default(),
            since_unix_ns: 0,
        },
        alarms: vec![view, view],
    })));
    let now_s = golden_clock() / 1_000_000_000;
    let ripple = [0.0, 0.01, -0.01, 0.005, -0.005];
    for k in 0..600u64 {
        let band = |v: f64| BandValue {
            value: v,
            ..BandValue::default()
        };
        let rising = 1.0 + 0.002 * k as f64 + ripple[k as usize % 5];
        let flat = 1.0 + ripple[(k as usize * 3) % 5];
        ch.trend.push(
            now_s - 599 + k,
            &crate::dsp::stats::Overall::default(),
            &[band(rising), band(flat)],
        );
    }
    let app = Arc::new(app);
    let ours = metrics::Metrics::with_clock(app.clone(), golden_clock)
        .render_fresh()
        .expect("render");
    let ours = String::from_utf8(ours).expect("utf-8");
    let series = |band: &str, level: &str| -> Option<f64> {
        let key = format!(
            "bandwatch_alarm_time_to_limit_seconds{{channel=\"c\",band=\"{band}\",level=\"{level}\"}} "
        );
        ours.lines()
            .find_map(|l| l.strip_prefix(key.as_str()))
            .map(|v| v.parse().expect("number"))
    };
    assert_eq!(series("rising", "alert"), Some(0.0), "{ours}");
    let danger = series("rising", "danger").expect("danger series");
    // The straight line reaches 4 mm/s 900 s after the newest point; the
    // exponential fit of a straight rise curves up, so sooner.
    assert!(danger > 100.0 && danger < 900.0, "{danger}");
    assert_eq!(series("flat", "alert"), None, "{ours}");
    assert_eq!(series("flat", "danger"), None, "{ours}");
    let theirs = String::from_utf8(metrics::proto::render(app, golden_clock)).expect("utf-8");
    assert_eq!(ours, theirs);
}
