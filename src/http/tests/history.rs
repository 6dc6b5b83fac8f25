//! `/api/v1/history/…` and the time to limit over stored history, on a
//! real SQLite file in a temp directory, written with the store's own
//! functions (`history::store`), through the router (`oneshot`).
//!
//! Expected values come from the inputs and documented conversions (the
//! scaling table of `http::scaling`; dB as 10·log10 of a power ratio,
//! IEC 60027-3 level definitions, from memory), or from the live spectrum
//! endpoint given the same lines.

use crate::alarm::token::Token;
use crate::history::store::{self, SeriesIds};
use crate::history::{
    schema, Aggregate, HistoryShared, IntervalRecord, SpectrumRecord, StoreReason,
};

use super::*;

const TOKEN: &str = "p2-history-token-0123";

struct Temp(std::path::PathBuf);
impl Drop for Temp {
    fn drop(&mut self) {
        let _ = std::fs::remove_dir_all(&self.0);
    }
}

fn temp(name: &str) -> Temp {
    let dir = std::env::temp_dir().join(format!("bw-http-hist-{name}-{}", std::process::id()));
    let _ = std::fs::remove_dir_all(&dir);
    std::fs::create_dir_all(&dir).expect("temp dir");
    Temp(dir)
}

fn history_spec(file: std::path::PathBuf) -> crate::config::HistorySpec {
    crate::config::HistorySpec {
        file,
        interval_s: 60,
        keep_days: 365,
        thin_after_days: 30,
        spectrum_every_s: 600,
        spectra_keep_days: 90,
        max_bytes: 64 << 20,
        queue: 1024,
        projection_window_s: 86_400,
    }
}

/// The shared test state (`config()`), channel "a" published, with a
/// token and `[history]` on `dir/h.sqlite`.
fn state_with_history(dir: &Temp) -> Arc<AppState> {
    let cfg = parse_str(&config()).expect("config");
    let mut st = AppState::new(&cfg);
    st.token = Some(Token::new(TOKEN, "test").expect("token"));
    st.history = Some(Arc::new(HistoryShared::new(history_spec(
        dir.0.join("h.sqlite"),
    ))));
    let st = Arc::new(st);
    publish(&st, 0, snapshot(unix_now_ns()));
    st
}

fn file(st: &AppState) -> std::path::PathBuf {
    st.history.as_ref().expect("history").spec.file.clone()
}

fn record(st: &AppState, t_s: u64, power: Vec<f32>) -> SpectrumRecord {
    let ch = &st.channels[0];
    SpectrumRecord {
        spec: ch.spec.clone(),
        enbw_bins: ch.window_enbw_bins,
        reason: StoreReason::Interval,
        event: None,
        t_ns: t_s * 1_000_000_000,
        published_ns: t_s * 1_000_000_000,
        averages: 4,
        first_sample: 4096,
        oldest_first_sample: 3712,
        speed_hz: None,
        power,
        envelope: Vec::new(),
        bands: snapshot(0).bands,
        lost: None,
    }
}

fn interval(
    conn: &mut rusqlite::Connection,
    spec: &Arc<crate::config::ChannelSpec>,
    t_s: u64,
    v: &[f64],
) {
    let mut band = Aggregate::default();
    for &x in v {
        band.add(x, Some(0));
    }
    let mut series = vec![Aggregate::default(); 5];
    series.push(band);
    series.push(Aggregate::default());
    let tx = conn.transaction().expect("tx");
    store::insert_interval(
        &tx,
        &mut SeriesIds::default(),
        &IntervalRecord {
            spec: spec.clone(),
            t_s,
            span_s: 60,
            series,
            lost: None,
        },
    )
    .expect("insert");
    tx.commit().expect("commit");
}

async fn post(st: &Arc<AppState>, uri: &str, token: Option<&str>) -> Reply {
    let mut req = Request::builder().method("POST").uri(uri);
    if let Some(t) = token {
        req = req.header(header::AUTHORIZATION, format!("Bearer {t}"));
    }
    let resp = router(st.clone())
        .oneshot(req.body(Body::empty()).expect("request"))
        .await
        .expect("infallible");
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

#[tokio::test]
async fn without_history_or_file_the_answers_say_which() {
    let st = ready_state();
    let r = get(&st, "/api/v1/history/channels/a/trend").await;
    assert_json_error(&r, StatusCode::NOT_FOUND, "[history]");
    let dir = temp("nofile");
    let st = state_with_history(&dir);
    for uri in [
        "/api/v1/history/channels/a/trend",
        "/api/v1/history/channels/a/spectra",
        "/api/v1/history/channels/a/waterfall",
        "/api/v1/history/channels/a/compare",
        "/api/v1/history/spectra/1",
    ] {
        let r = get(&st, uri).await;
        assert_json_error(&r, StatusCode::NOT_FOUND, "no history stored yet");
    }
}

#[tokio::test]
async fn times_are_checked_and_named() {
    let dir = temp("times");
    let st = state_with_history(&dir);
    let r = get(&st, "/api/v1/history/channels/a/trend?from=yesterday").await;
    assert_json_error(&r, StatusCode::BAD_REQUEST, "from=\"yesterday\"");
    let r = get(&st, "/api/v1/history/channels/a/spectra?to=-3w").await;
    assert_json_error(&r, StatusCode::BAD_REQUEST, "to=\"-3w\"");
    let r = get(
        &st,
        "/api/v1/history/channels/a/spectra?from=2026-12-02T00:00:00Z&to=2026-12-01T00:00:00Z",
    )
    .await;
    assert_json_error(&r, StatusCode::BAD_REQUEST, "is after to");
    let r = get(&st, "/api/v1/history/channels/a/waterfall?columns=0").await;
    assert_json_error(&r, StatusCode::BAD_REQUEST, "columns=\"0\"");
    // These endpoints draw no image: the error names what they offer.
    for f in ["xml", "svg"] {
        let r = get(&st, &format!("/api/v1/history/channels/a/trend?format={f}")).await;
        assert_json_error(&r, StatusCode::BAD_REQUEST, "(known: json, csv)");
    }
    // Far past and far future: the ends of what RFC 3339 writes, echoed
    // as times (the file exists, empty).
    drop(schema::open_write(&file(&st)).expect("create"));
    let r = get(
        &st,
        "/api/v1/history/channels/a/spectra?from=-99999999d&to=9999-12-31T23:59:59Z",
    )
    .await;
    assert_eq!(r.status, StatusCode::OK, "{}", r.body);
    let j = r.json();
    assert_eq!(j["from"], "1970-01-01T00:00:00Z", "{j}");
    assert_eq!(j["to"], "9999-12-31T23:59:59Z", "{j}");
    assert_eq!(j["spectra"].as_array().map(Vec::len), Some(0), "{j}");
    let now = 1_800_000_000;
    assert_eq!(
        crate::http::history::parse_time("from", "-7d", now).ok(),
        Some(now - 604_800)
    );
    assert_eq!(
        crate::http::history::parse_time("from", "-12h", now).ok(),
        Some(now - 43_200)
    );
    assert_eq!(
        crate::http::history::parse_time("from", "-30m", now).ok(),
        Some(now - 1800)
    );
    assert_eq!(
        crate::http::history::parse_time("from", "-90s", now).ok(),
        Some(now - 90)
    );
    // `date -u -d 2026-12-01T00:00:00Z +%s` = 1796083200.
    assert_eq!(
        crate::http::history::parse_time("from", "2026-12-01T00:00:00Z", now).ok(),
        Some(1_796_083_200)
    );
}

#[tokio::test]
async fn the_stored_trend_merges_rows_and_lists_holes() {
    let dir = temp("trend");
    let st = state_with_history(&dir);
    let spec = st.channels[0].spec.clone();
    let mut conn = schema::open_write(&file(&st)).expect("open");
    let now_s = unix_now_ns() / 1_000_000_000;
    let t0 = now_s - now_s % 60 - 3600;
    for k in 0..4u64 {
        interval(&mut conn, &spec, t0 + 60 * k, &[k as f64, 10.0 + k as f64]);
    }
    store::insert_hole(&conn, Some("a"), t0 + 240, t0 + 300, "queue_full", 2).expect("hole");
    drop(conn);
    let r = get(
        &st,
        "/api/v1/history/channels/a/trend?series=v&from=-2h&points=2",
    )
    .await;
    assert_eq!(r.status, StatusCode::OK, "{}", r.body);
    let j = r.json();
    assert_eq!(j["stored_rows"], 4);
    assert_eq!(j["unit"], "mm/s");
    assert_eq!(j["kind"], "band");
    // Rows 0,1 then 2,3: n 2 + 2; min of the minima; max of the maxima;
    // mean (sum / n) weighted by n; the newest row's last value.
    assert_eq!(j["t"], serde_json::json!([t0, t0 + 120]));
    assert_eq!(j["span_s"], serde_json::json!([120, 120]));
    assert_eq!(j["n"], serde_json::json!([4, 4]));
    assert_eq!(j["min"], serde_json::json!([0.0, 2.0]));
    assert_eq!(j["max"], serde_json::json!([11.0, 13.0]));
    assert_eq!(j["mean"], serde_json::json!([5.5, 7.5]));
    assert_eq!(j["last"], serde_json::json!([11.0, 13.0]));
    assert_eq!(j["holes"][0]["reason"], "queue_full");
    assert_eq!(j["holes"][0]["lost"], 2);
    let csv = get(
        &st,
        "/api/v1/history/channels/a/trend?series=v&from=-2h&format=csv",
    )
    .await;
    assert_eq!(csv.status, StatusCode::OK);
    assert!(
        csv.content_type.starts_with("text/csv"),
        "{}",
        csv.content_type
    );
    let lines: Vec<&str> = csv.body.lines().collect();
    assert_eq!(lines[0], "time,t,span_s,n,n_bad,min,mean,max,last,state");
    assert_eq!(lines.len(), 5);
    let r = get(&st, "/api/v1/history/channels/a/trend?series=nope").await;
    assert_json_error(&r, StatusCode::NOT_FOUND, "no stored series \"nope\"");
}

/// A stored spectrum's JSON is the live endpoint's JSON for the same
/// lines and settings, plus `stored`; stored on request with the token.
#[tokio::test]
async fn a_stored_spectrum_reads_as_the_live_one() {
    let dir = temp("spectrum");
    let st = state_with_history(&dir);
    let r = post(&st, "/api/v1/history/channels/a/spectra", None).await;
    assert_json_error(&r, StatusCode::UNAUTHORIZED, "bearer token");
    let r = post(&st, "/api/v1/history/channels/a/spectra", Some(TOKEN)).await;
    assert_eq!(r.status, StatusCode::CREATED, "{}", r.body);
    let id = r.json()["id"].as_i64().expect("id");
    let counters = &st.history.as_ref().expect("h").counters;
    assert_eq!(counters.stored(StoreReason::Request), 1);
    for q in [
        "",
        "?scaling=peak&fmin=100&fmax=300",
        "?scaling=psd&unit=mm/s",
        "?scaling=power",
    ] {
        let live = get(&st, &format!("/api/v1/channels/a/spectrum{q}")).await;
        let stored = get(&st, &format!("/api/v1/history/spectra/{id}{q}")).await;
        assert_eq!(stored.status, StatusCode::OK, "{q}: {}", stored.body);
        let mut s = stored.json();
        let info = s
            .as_object_mut()
            .expect("object")
            .remove("stored")
            .expect("stored");
        assert_eq!(s, live.json(), "{q}");
        assert_eq!(info["id"], id);
        assert_eq!(info["reason"], "request");
        assert_eq!(info["reference"], false);
    }
    // √P (scaling table): P[1] = 1 g² is 1 g RMS at 100 Hz.
    let j = get(
        &st,
        &format!("/api/v1/history/spectra/{id}?fmin=100&fmax=100"),
    )
    .await
    .json();
    assert_eq!(j["values"], serde_json::json!([1.0]));
    let csv = get(
        &st,
        &format!("/api/v1/history/spectra/{id}?format=csv&fmax=200"),
    )
    .await;
    assert_eq!(csv.body.lines().count(), 4, "{}", csv.body);
    let r = get(&st, "/api/v1/history/spectra/999").await;
    assert_json_error(&r, StatusCode::NOT_FOUND, "no stored spectrum 999");
    let r = get(&st, "/api/v1/history/spectra/x").await;
    assert_json_error(&r, StatusCode::BAD_REQUEST, "\"x\"");
    let r = get(
        &st,
        &format!("/api/v1/history/spectra/{id}?spectrum=envelope"),
    )
    .await;
    assert_json_error(&r, StatusCode::BAD_REQUEST, "no envelope");
    let r = get(&st, &format!("/api/v1/history/spectra/{id}?format=svg")).await;
    assert_json_error(&r, StatusCode::BAD_REQUEST, "svg");
}

#[tokio::test]
async fn list_waterfall_and_compare() {
    let dir = temp("waterfall");
    let st = state_with_history(&dir);
    let conn = schema::open_write(&file(&st)).expect("open");
    let now_s = unix_now_ns() / 1_000_000_000;
    let mut ids = Vec::new();
    let mut rows = Vec::new();
    for k in 0..3u64 {
        let p: Vec<f32> = (0..BINS)
            .map(|i| ((i * 7 + k as usize * 13) % 31) as f32 * 0.125 + 0.5)
            .collect();
        ids.push(
            store::insert_spectrum(&conn, &record(&st, now_s - 300 + 60 * k, p.clone()))
                .expect("insert"),
        );
        rows.push(p);
    }
    drop(conn);
    let j = get(&st, "/api/v1/history/channels/a/spectra?from=-1h&limit=2")
        .await
        .json();
    let listed: Vec<i64> = j["spectra"]
        .as_array()
        .expect("list")
        .iter()
        .map(|s| s["id"].as_i64().expect("id"))
        .collect();
    assert_eq!(listed, [ids[2], ids[1]]);
    assert_eq!(j["spectra"][0]["lines"], BINS);

    // Power, every line its own column: the stored values exactly.
    let w = get(
        &st,
        "/api/v1/history/channels/a/waterfall?from=-1h&scaling=power&columns=8192",
    )
    .await;
    assert_eq!(w.status, StatusCode::OK, "{}", w.body);
    let w = w.json();
    for (k, row) in w["values"].as_array().expect("rows").iter().enumerate() {
        let got: Vec<f32> = row
            .as_array()
            .expect("row")
            .iter()
            .map(|v| f(v) as f32)
            .collect();
        assert_eq!(got, rows[k], "row {k}");
    }
    // 4 columns over lines 1..=12 (100 to 1200 Hz): each the largest line.
    let w = get(
        &st,
        "/api/v1/history/channels/a/waterfall?from=-1h&scaling=power&columns=4&fmin=100&fmax=1200",
    )
    .await
    .json();
    assert_eq!(
        w["f_lo_hz"],
        serde_json::json!([100.0, 400.0, 700.0, 1000.0])
    );
    for (k, row) in w["values"].as_array().expect("rows").iter().enumerate() {
        for (c, v) in row.as_array().expect("row").iter().enumerate() {
            let want = rows[k][1 + 3 * c..1 + 3 * c + 3]
                .iter()
                .fold(f32::MIN, |a, &b| a.max(b));
            assert_eq!(f(v) as f32, want, "row {k} column {c}");
        }
    }
    let r = get(
        &st,
        "/api/v1/history/channels/a/waterfall?from=-1h&fmin=20000",
    )
    .await;
    assert_json_error(&r, StatusCode::BAD_REQUEST, "holds no spectral line");
    let csv = get(
        &st,
        "/api/v1/history/channels/a/waterfall?from=-1h&columns=4&format=csv",
    )
    .await;
    assert_eq!(csv.body.lines().count(), 4, "{}", csv.body);

    // Compare: no reference yet; then one marked.
    let r = get(&st, "/api/v1/history/channels/a/compare").await;
    assert_json_error(&r, StatusCode::NOT_FOUND, "no marked reference");
    let r = post(
        &st,
        &format!("/api/v1/history/spectra/{}/reference", ids[0]),
        Some(TOKEN),
    )
    .await;
    assert_eq!(r.status, StatusCode::OK, "{}", r.body);
    let r = post(&st, "/api/v1/history/spectra/999/reference", Some(TOKEN)).await;
    assert_json_error(&r, StatusCode::NOT_FOUND, "999");
    let c = get(
        &st,
        &format!("/api/v1/history/channels/a/compare?of={}", ids[1]),
    )
    .await;
    assert_eq!(c.status, StatusCode::OK, "{}", c.body);
    let c = c.json();
    assert_eq!(c["reference"]["id"], ids[0]);
    for (i, d) in c["db"].as_array().expect("db").iter().enumerate() {
        let want = 10.0 * (f64::from(rows[1][i]) / f64::from(rows[0][i])).log10();
        assert!(close(f(d), want, 1e-9), "line {i}: {d} vs {want}");
    }
    // The live snapshot (mostly zero lines) against the reference: null
    // where the live line is zero; P[1] = 1 against the stored line.
    let c = get(&st, "/api/v1/history/channels/a/compare").await.json();
    assert_eq!(c["of"]["id"], Value::Null);
    assert_eq!(c["db"][0], Value::Null);
    assert!(close(
        f(&c["db"][1]),
        -10.0 * f64::from(rows[0][1]).log10(),
        1e-9
    ));
    // Both band values equal: 0 dB.
    assert_eq!(c["bands"][0]["db"], 0.0);
    // Another analysis: refused naming both.
    let conn = schema::open_write(&file(&st)).expect("open");
    let odd = store::insert_spectrum(&conn, &record(&st, now_s - 10, vec![1.0; 65])).expect("odd");
    drop(conn);
    let r = get(&st, &format!("/api/v1/history/channels/a/compare?of={odd}")).await;
    assert_json_error(
        &r,
        StatusCode::CONFLICT,
        &format!("stored spectrum {odd} (65 lines"),
    );
}

/// A band rising exactly 0.01 mm/s per 60-s interval for 10 hours of
/// stored aggregates: the projection fits the stored maxima (Theil–Sen on
/// an exact line gives its slope, 0.01 / 60 per second); an alarm whose
/// series is not stored uses the in-memory trend.
#[tokio::test]
async fn time_to_limit_fits_the_stored_history() {
    let dir = temp("projection");
    let cfg = crate::config::parse_str(
        "[server]\nlisten = \"127.0.0.1:0\"\n[alarms]\nstorage_dir = \"/nonexistent\"\n\
         [[source]]\nname = \"s\"\nkind = \"sim\"\n\
         [[channel]]\nname = \"c\"\nsource = \"s\"\nindex = 0\nunit = \"g\"\nblock = 4096\n\
         integration_low_cut_hz = 5.0\n\
         [[channel.band]]\nname = \"v\"\nlo_hz = 10\nhi_hz = 1000\nunit = \"mm/s\"\n\
         [channel.band.alarm]\nalert = { limit = 20.0 }\n\
         [[channel.band]]\nname = \"w\"\nlo_hz = 10\nhi_hz = 1000\nunit = \"mm/s\"\n\
         [channel.band.alarm]\nalert = { limit = 20.0 }\n",
    )
    .expect("config");
    let mut app = AppState::new(&cfg);
    app.history = Some(Arc::new(HistoryShared::new(history_spec(
        dir.0.join("h.sqlite"),
    ))));
    let st = Arc::new(app);
    let spec = st.channels[0].spec.clone();
    let mut conn = schema::open_write(&file(&st)).expect("open");
    let now_s = unix_now_ns() / 1_000_000_000;
    let t0 = now_s - now_s % 60 - 600 * 60;
    {
        let tx = conn.transaction().expect("tx");
        let mut ids = SeriesIds::default();
        for k in 0..600u64 {
            let mut v = Aggregate::default();
            v.add(1.0 + 0.01 * k as f64, None);
            let mut series = vec![Aggregate::default(); 5];
            series.push(v);
            // Band w: no ok value stored (n = 0: no min or max).
            series.push(Aggregate::default());
            store::insert_interval(
                &tx,
                &mut ids,
                &IntervalRecord {
                    spec: spec.clone(),
                    t_s: t0 + 60 * k,
                    span_s: 60,
                    series,
                    lost: None,
                },
            )
            .expect("insert");
        }
        tx.commit().expect("commit");
    }
    drop(conn);
    let r = get(&st, "/api/v1/channels/c/projection?growth=linear").await;
    assert_eq!(r.status, StatusCode::OK, "{}", r.body);
    let j = r.json();
    let v = &j["alarms"][0];
    assert_eq!(v["source"], "history", "{v}");
    assert_eq!(v["window_s"], 86_400.0);
    // 600 rows thinned in runs of 2 (⌈600 / 513⌉).
    assert_eq!(v["points"], 300);
    assert!(
        close(f(&v["slope"]["per_second"]), 0.01 / 60.0, 1e-12),
        "{v}"
    );
    let w = &j["alarms"][1];
    assert_eq!(w["source"], "memory", "{w}");
    // A shorter window asked: at most projection_window_s.
    let j = get(
        &st,
        "/api/v1/channels/c/projection?growth=linear&seconds=3600",
    )
    .await
    .json();
    assert_eq!(j["alarms"][0]["window_s"], 3600.0);
    // The rows starting in the last hour: 59 or 60 (the clock's second).
    let n = j["alarms"][0]["points"].as_u64().expect("points");
    assert!((59..=60).contains(&n), "{n}");
    time_to_limit_gauge_fits_the_stored_history(&st).await;
}

/// `bandwatch_alarm_time_to_limit_seconds` over the same stored rows: the
/// scrape fits what the API fits by default (the stored history's
/// window, exponential growth), so the gauge equals the API's
/// `seconds_to_limit` but for the seconds between the two; band w (no
/// stored value, an empty in-memory trend) has none.
async fn time_to_limit_gauge_fits_the_stored_history(st: &Arc<AppState>) {
    use crate::alarm::engine::{AlarmBoard, AlarmView, HealthView};
    use crate::alarm::state::AlarmState;
    let view = AlarmView {
        state: AlarmState::Normal,
        latched: false,
        acknowledged: false,
        since_unix_ns: 0,
        value: None,
        alert_limit: Some(20.0),
        danger_limit: None,
        transitions: [0; 4],
        learning: None,
    };
    st.channels[0].alarm_board.store(Some(Arc::new(AlarmBoard {
        health: HealthView {
            ok: true,
            reasons: Default::default(),
            since_unix_ns: 0,
        },
        alarms: vec![view, view],
    })));
    let api = get(st, "/api/v1/channels/c/projection").await.json();
    let level = &api["alarms"][0]["levels"][0];
    assert_eq!(level["outcome"], "crossing", "{api}");
    let want = f(&level["seconds_to_limit"]);
    let text = metrics::Metrics::new(st.clone())
        .render_fresh()
        .expect("render");
    let text = String::from_utf8(text).expect("utf-8");
    let gauge = |band: &str| {
        let key = format!(
            "bandwatch_alarm_time_to_limit_seconds{{channel=\"c\",band=\"{band}\",level=\"alert\"}} "
        );
        text.lines()
            .find_map(|l| l.strip_prefix(key.as_str()))
            .map(|v| v.parse::<f64>().expect("number"))
    };
    let got = gauge("v").expect("a gauge for band v");
    // The straight line reaches 20 from 6.99 in 1301 intervals of 60 s;
    // the exponential fit (Theil–Sen on the logarithms) sooner.
    assert!(got > 0.0 && got < 1301.0 * 60.0, "{got}");
    assert!((got - want).abs() <= 5.0, "gauge {got}, API {want}");
    assert_eq!(gauge("w"), None, "{text}");
    let proto = String::from_utf8(metrics::proto::render(st.clone(), unix_now_ns)).expect("utf-8");
    assert!(proto.contains("band=\"v\",level=\"alert\"}"), "{proto}");
}
