//! Export (`?format=csv|svg`, README "Export"): the SVG parses as XML
//! (roxmltree, an XML 1.0 parser independent of our writer), carries the
//! texts a work order needs, escapes names, keeps its trace inside the
//! plot area, and its min/max decimation keeps a one-line spike among
//! 65 537 lines (checked against extremes computed here from the data);
//! CSV values equal the JSON's as f32; downloads name a safe file.

use axum::http::HeaderMap;

use super::*;
use crate::http::export::{COLUMNS, PLOT_BOTTOM, PLOT_LEFT, PLOT_RIGHT, PLOT_TOP};

struct Full {
    status: StatusCode,
    headers: HeaderMap,
    body: String,
}

impl Full {
    fn header(&self, name: header::HeaderName) -> &str {
        self.headers
            .get(&name)
            .and_then(|v| v.to_str().ok())
            .unwrap_or("")
    }
}

async fn fetch(st: &Arc<AppState>, uri: &str) -> Full {
    let req = Request::builder()
        .uri(uri)
        .body(Body::empty())
        .expect("request");
    let resp = router(st.clone()).oneshot(req).await.expect("infallible");
    let status = resp.status();
    let headers = resp.headers().clone();
    let bytes = resp.into_body().collect().await.expect("body").to_bytes();
    Full {
        status,
        headers,
        body: String::from_utf8(bytes.to_vec()).expect("utf-8"),
    }
}

/// The SVG answer's document, after the status, type and download name
/// are checked.
fn svg_doc(r: &Full, filename: &str) -> String {
    assert_eq!(r.status, StatusCode::OK, "{}", r.body);
    assert_eq!(r.header(header::CONTENT_TYPE), "image/svg+xml");
    assert_eq!(
        r.header(header::CONTENT_DISPOSITION),
        format!("attachment; filename=\"{filename}\"")
    );
    r.body.clone()
}

/// Every text of the document (title and `<text>` elements), joined by
/// newlines, as a reader of the image sees them (entities resolved).
fn texts(doc: &roxmltree::Document) -> String {
    doc.descendants()
        .filter(|n| n.has_tag_name("text") || n.has_tag_name("title"))
        .map(|n| n.text().unwrap_or(""))
        .collect::<Vec<_>>()
        .join("\n")
}

fn attr(n: &roxmltree::Node, a: &str) -> f64 {
    n.attribute(a)
        .unwrap_or_else(|| panic!("no {a}"))
        .parse()
        .unwrap_or_else(|e| panic!("{a}: {e}"))
}

/// The trace's points.
fn trace(doc: &roxmltree::Document) -> Vec<(f64, f64)> {
    let pl = doc
        .descendants()
        .find(|n| n.attribute("id") == Some("trace"))
        .expect("a trace");
    pl.attribute("points")
        .expect("points")
        .split_whitespace()
        .map(|p| {
            let (x, y) = p.split_once(',').expect("x,y");
            (x.parse().expect("x"), y.parse().expect("y"))
        })
        .collect()
}

/// The plot area's data ranges (x min, x max, y min, y max).
fn area(doc: &roxmltree::Document) -> (f64, f64, f64, f64) {
    let a = doc
        .descendants()
        .find(|n| n.attribute("id") == Some("plot-area"))
        .expect("plot area");
    assert_eq!(attr(&a, "x"), PLOT_LEFT);
    assert_eq!(attr(&a, "y"), PLOT_TOP);
    (
        attr(&a, "data-x-min"),
        attr(&a, "data-x-max"),
        attr(&a, "data-y-min"),
        attr(&a, "data-y-max"),
    )
}

fn assert_inside(points: &[(f64, f64)]) {
    assert!(!points.is_empty());
    for &(x, y) in points {
        assert!(
            (PLOT_LEFT..=PLOT_RIGHT).contains(&x) && (PLOT_TOP..=PLOT_BOTTOM).contains(&y),
            "point {x},{y} outside the plot area"
        );
    }
}

#[tokio::test]
async fn spectrum_svg_carries_what_a_work_order_needs() {
    let st = ready_state();
    let r = fetch(&st, "/api/v1/channels/a/spectrum?format=svg").await;
    // TS_NS is 2023-11-14T22:13:20.123456789Z (see `TS_NS`).
    let body = svg_doc(&r, "a-spectrum-20231114T221320Z.svg");
    let doc = roxmltree::Document::parse(&body).expect("the SVG is well-formed XML");
    assert_eq!(doc.root_element().tag_name().name(), "svg");
    assert_eq!(
        doc.root_element().tag_name().namespace(),
        Some("http://www.w3.org/2000/svg")
    );
    let t = texts(&doc);
    for needle in [
        "a spectrum",
        "Channel a",
        "2023-11-14T22:13:20.123456789Z",
        "rms g (acceleration)",
        // fs/block = 25 600/256 = 100 Hz; df = fs/nfft = 100 Hz.
        "Resolution 100 Hz",
        "df 100 Hz",
        "window hann",
        "4 averages (linear)",
        "sample rate 25600 Hz",
        "block 256",
        "Frequency (Hz)",
        "rms (g)",
        &format!("bandwatch {}", env!("CARGO_PKG_VERSION")),
        // The band table: v reads 12.5 (the snapshot), unit mm/s.
        "Band v (50 to 150 Hz, raw spectrum, rms): 12.5 mm/s",
        "Band pk (250 to 350 Hz, raw spectrum, peak): 0.5 g",
    ] {
        assert!(
            t.contains(needle),
            "{needle:?} not in the image's texts:\n{t}"
        );
    }
    // The bands as shaded spans: two rects, at 50–150 and 250–350 Hz.
    let (x_min, x_max, _, _) = area(&doc);
    assert_eq!((x_min, x_max), (0.0, 12_800.0));
    let px = |f: f64| PLOT_LEFT + f / 12_800.0 * (PLOT_RIGHT - PLOT_LEFT);
    let bands: Vec<(f64, f64)> = doc
        .descendants()
        .filter(|n| n.attribute("class") == Some("band"))
        .map(|n| (attr(&n, "x"), attr(&n, "width")))
        .collect();
    assert_eq!(bands.len(), 2, "{bands:?}");
    assert!((bands[0].0 - px(50.0)).abs() < 0.01);
    assert!((bands[0].0 + bands[0].1 - px(150.0)).abs() < 0.01);
    assert!((bands[1].0 - px(250.0)).abs() < 0.01);
    // 129 lines: one point each, all inside; the highest point is line 1
    // (1 g RMS at 100 Hz, the largest value).
    let pts = trace(&doc);
    assert_eq!(pts.len(), 129);
    assert_inside(&pts);
    let top = pts
        .iter()
        .min_by(|a, b| a.1.total_cmp(&b.1))
        .expect("points");
    assert!((top.0 - px(100.0)).abs() < 0.01, "{top:?}");
}

#[tokio::test]
async fn log_amplitude_is_db_re_1_unit() {
    let st = ready_state();
    let r = fetch(
        &st,
        "/api/v1/channels/a/spectrum?format=svg&amp=log&scaling=power&fmin=100&fmax=300",
    )
    .await;
    let body = svg_doc(&r, "a-spectrum-20231114T221320Z.svg");
    let doc = roxmltree::Document::parse(&body).expect("XML");
    let t = texts(&doc);
    assert!(t.contains("power (dB re 1 g^2)"), "{t}");
    let (_, _, y_min, y_max) = area(&doc);
    // Lines 1..3: P = 1, 0.02, 0.5 g²: 10·log10 gives 0, −16.99, −3.01 dB.
    // The axis runs from the top rounded up to 10 dB (0) down to the
    // lowest value rounded down to 10 dB (−20).
    assert_eq!((y_min, y_max), (-20.0, 0.0));
    let pts = trace(&doc);
    assert_eq!(pts.len(), 3);
    assert_inside(&pts);
    let h = PLOT_BOTTOM - PLOT_TOP;
    let y = |db: f64| PLOT_BOTTOM - (db - y_min) / (y_max - y_min) * h;
    for (p, db) in pts
        .iter()
        .zip([0.0, 10.0 * 0.02f64.log10(), 10.0 * 0.5f64.log10()])
    {
        assert!((p.1 - y(db)).abs() < 0.01, "{p:?} vs {db} dB");
    }
    // amp= is for images only.
    let r = get(&st, "/api/v1/channels/a/spectrum?format=csv&amp=log").await;
    assert_json_error(&r, StatusCode::BAD_REQUEST, "amp=");
    let r = get(&st, "/api/v1/channels/a/spectrum?format=svg&amp=db").await;
    assert_json_error(&r, StatusCode::BAD_REQUEST, "known: linear, log");
}

#[tokio::test]
async fn a_bad_format_names_the_parameter_and_the_values() {
    let st = ready_state();
    for uri in [
        "/api/v1/channels/a/spectrum?format=png",
        "/api/v1/channels/a/waveform?format=png",
    ] {
        let r = get(&st, uri).await;
        assert_json_error(&r, StatusCode::BAD_REQUEST, "format=\"png\"");
        assert_json_error(&r, StatusCode::BAD_REQUEST, "known: json, csv, svg");
    }
}

/// A channel and a band whose names hold `<&>"'`: escaped in the image,
/// read back as written; the file name keeps only safe characters.
#[tokio::test]
async fn names_with_markup_are_escaped() {
    let cfg = Fixture::new()
        .source(Source::new("sim", "sim"))
        .channel(
            Channel::new("p<&>\"'1", "sim", 0)
                .set("scale", "1.0")
                .block(256)
                .band("b<&>", 50.0, 150.0),
        )
        .toml();
    let st = Arc::new(AppState::new(&parse_str(&cfg).expect("valid")));
    publish(&st, 0, {
        let mut s = snapshot(unix_now_ns());
        s.bands.truncate(1);
        s
    });
    let uri = "/api/v1/channels/p%3C%26%3E%22%271/spectrum?format=svg";
    let r = fetch(&st, uri).await;
    let body = svg_doc(&r, "p_____1-spectrum-20231114T221320Z.svg");
    assert!(body.contains("p&lt;&amp;&gt;&quot;&apos;1 spectrum"));
    assert!(body.contains(">b&lt;&amp;&gt;</text>"));
    assert!(!body.contains("p<&>"));
    let doc = roxmltree::Document::parse(&body).expect("XML");
    let t = texts(&doc);
    assert!(t.contains("p<&>\"'1 spectrum"), "{t}");
    assert!(t.contains("Band b<&> (50 to 150 Hz"), "{t}");
    // The band waveform's name too.
    let r = fetch(
        &st,
        "/api/v1/channels/p%3C%26%3E%22%271/waveform?format=svg&band=b%3C%26%3E",
    )
    .await;
    let body = svg_doc(&r, "p_____1-band-b___-waveform-20231114T221320Z.svg");
    let doc = roxmltree::Document::parse(&body).expect("XML");
    assert!(texts(&doc).contains("p<&>\"'1 band b<&> waveform"));
}

/// 65 537 lines (block = nfft = 131 072) of a low floor with one line 100
/// times higher: the drawn extremes of every pixel column equal the
/// extremes of that column's lines, computed here from the JSON values.
#[tokio::test]
async fn min_max_decimation_keeps_a_one_line_spike() {
    const N: usize = 65_537;
    const SPIKE: usize = 40_001;
    let cfg = Fixture::new()
        .source(Source::new("sim", "sim"))
        .channel(
            Channel::new("wide", "sim", 0)
                .set("scale", "1.0")
                .block(131_072),
        )
        .toml();
    let st = Arc::new(AppState::new(&parse_str(&cfg).expect("valid")));
    let mut power: Vec<f32> = (0..N)
        .map(|i| 0.01 + 0.001 * ((i * 7919) % 13) as f32)
        .collect();
    power[SPIKE] = 1.0;
    publish(&st, 0, {
        let mut s = snapshot(unix_now_ns());
        s.power = power;
        s.bands.clear();
        s
    });
    let json = get(&st, "/api/v1/channels/wide/spectrum?scaling=power")
        .await
        .json();
    let values: Vec<f64> = json["values"]
        .as_array()
        .expect("values")
        .iter()
        .map(f)
        .collect();
    assert_eq!(values.len(), N);
    let r = fetch(
        &st,
        "/api/v1/channels/wide/spectrum?scaling=power&format=svg",
    )
    .await;
    let body = svg_doc(&r, "wide-spectrum-20231114T221320Z.svg");
    let doc = roxmltree::Document::parse(&body).expect("XML");
    let (_, _, y_min, y_max) = area(&doc);
    let pts = trace(&doc);
    assert_inside(&pts);
    // Columns are 1 px wide over PLOT_LEFT..PLOT_RIGHT; line i falls in
    // column floor(i / (N − 1) · COLUMNS) (the last line in the last).
    let col_of = |i: usize| ((i * COLUMNS) / (N - 1)).min(COLUMNS - 1);
    let mut want = vec![(f64::INFINITY, f64::NEG_INFINITY); COLUMNS];
    for (i, &v) in values.iter().enumerate() {
        let c = &mut want[col_of(i)];
        *c = (c.0.min(v), c.1.max(v));
    }
    let h = PLOT_BOTTOM - PLOT_TOP;
    let y = |v: f64| PLOT_BOTTOM - (v - y_min) / (y_max - y_min) * h;
    let mut got = vec![(f64::NEG_INFINITY, f64::INFINITY); COLUMNS];
    for &(x, py) in &pts {
        let c = (x - PLOT_LEFT).floor() as usize;
        // Screen y grows downwards: the lowest value is the largest y.
        got[c] = (got[c].0.max(py), got[c].1.min(py));
    }
    for c in 0..COLUMNS {
        let (lo, hi) = want[c];
        assert!(
            (got[c].0 - y(lo)).abs() < 0.006 && (got[c].1 - y(hi)).abs() < 0.006,
            "column {c}: drawn {:?}, data {lo}..{hi}",
            got[c]
        );
    }
    // The spike is the highest point, in its column.
    let top = pts
        .iter()
        .min_by(|a, b| a.1.total_cmp(&b.1))
        .expect("points");
    assert_eq!((top.0 - PLOT_LEFT).floor() as usize, col_of(SPIKE));
    assert!((top.1 - y(1.0)).abs() < 0.006);
    // Control: drawing every 74th line (about one per column) would have
    // lost it, so the check above can fail.
    assert!((0..N).step_by(N / COLUMNS).all(|i| values[i] < 0.5));
}

/// CSV values parse to the very f32 the JSON carries (Rust prints an f32
/// as the shortest decimal that reads back to it: `core::fmt` for floats),
/// and each download names a safe file.
#[tokio::test]
async fn csv_equals_json_and_is_a_download() {
    let st = ready_state();
    for (q, file) in [
        (
            "spectrum?scaling=peak&fmin=100&fmax=400",
            "a-spectrum-20231114T221320Z.csv",
        ),
        (
            "spectrum?scaling=psd&unit=mm/s",
            "a-spectrum-20231114T221320Z.csv",
        ),
        ("waveform?", "a-waveform-20231114T221320Z.csv"),
        ("waveform?band=v", "a-band-v-waveform-20231114T221320Z.csv"),
    ] {
        let base = format!("/api/v1/channels/a/{q}");
        let json = get(&st, &base).await.json();
        let r = fetch(&st, &format!("{base}&format=csv")).await;
        assert_eq!(r.status, StatusCode::OK, "{}", r.body);
        assert_eq!(r.header(header::CONTENT_TYPE), "text/csv; charset=utf-8");
        assert_eq!(
            r.header(header::CONTENT_DISPOSITION),
            format!("attachment; filename=\"{file}\"")
        );
        let want: Vec<f32> = json["values"]
            .as_array()
            .expect("values")
            .iter()
            .map(|v| f(v) as f32)
            .collect();
        let got: Vec<f32> = r
            .body
            .lines()
            .skip(1)
            .map(|l| {
                let (_, v) = l.split_once(',').expect("two columns");
                v.parse::<f32>().expect("a number")
            })
            .collect();
        assert_eq!(got.len(), want.len(), "{q}");
        for (g, w) in got.iter().zip(&want) {
            assert_eq!(g.to_bits(), w.to_bits(), "{q}: {g} vs {w}");
        }
    }
}

#[tokio::test]
async fn waveform_svg_names_what_it_shows() {
    let st = ready_state();
    let r = fetch(&st, "/api/v1/channels/a/waveform?format=svg").await;
    let body = svg_doc(&r, "a-waveform-20231114T221320Z.svg");
    let doc = roxmltree::Document::parse(&body).expect("XML");
    let t = texts(&doc);
    for needle in [
        "a waveform",
        "Channel a",
        "2023-11-14T22:13:20.123456789Z",
        "unit g (acceleration)",
        "Sample rate 25600 Hz",
        "block 256 samples",
        "acceleration (g)",
    ] {
        assert!(t.contains(needle), "{needle:?} not in:\n{t}");
    }
    // The snapshot's 4 samples 0, 0.5, −0.25, 1: the axis spans them.
    let pts = trace(&doc);
    assert_eq!(pts.len(), 4);
    assert_inside(&pts);
    let r = fetch(&st, "/api/v1/channels/a/waveform?format=svg&band=v").await;
    let body = svg_doc(&r, "a-band-v-waveform-20231114T221320Z.svg");
    let t = texts(&roxmltree::Document::parse(&body).expect("XML"));
    assert!(t.contains("a band v waveform"), "{t}");
    assert!(t.contains("Pass band: 50 to 150 Hz"), "{t}");
}
