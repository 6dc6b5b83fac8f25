//! Export of a spectrum or waveform for a work order: CSV and an SVG image
//! (`?format=csv|svg` on the spectrum, waveform and capture endpoints;
//! README "Export").
//!
//! The SVG is written here by hand rather than with a plotting crate.
//! plotters (svg backend only, without its `ttf` feature) would work: it then
//! estimates text extents with a crude fixed ratio and needs no font file or
//! fontconfig. We still write our own because the parts that matter are ours
//! either way: the min/max-per-pixel-column decimation (a plotting crate
//! draws the points it is given, so 65 537 lines would be decimated by us
//! first anyway), the escaping of names that come from the config, and
//! attributes the tests read back (the plot area and its data ranges). What
//! remains — a few rectangles, lines, one polyline and `<text>` elements —
//! is about 300 lines and no dependency tree.
//!
//! Text is SVG `<text>` (the viewer's sans-serif font), every string
//! escaped. Look: neutral grey surfaces, one dark trace, bands as light
//! shaded spans with their names.

use std::fmt::Write as _;

use axum::http::header;
use axum::response::{IntoResponse, Response};

use crate::http::error::ApiError;

/// What a data endpoint answers with (`?format=`).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Format {
    Json,
    Csv,
    Svg,
}

impl Format {
    /// `format=json` (default), `csv` or `svg`; anything else is a 400
    /// naming the parameter and the values it takes.
    pub fn parse(v: Option<&str>) -> Result<Format, ApiError> {
        match v {
            None | Some("json") => Ok(Format::Json),
            Some("csv") => Ok(Format::Csv),
            Some("svg") => Ok(Format::Svg),
            Some(other) => Err(ApiError::BadQuery(format!(
                "format={other:?} is not known (known: json, csv, svg)"
            ))),
        }
    }
}

/// Amplitude axis of a spectrum image (`?amp=`): linear, or dB re 1 unit.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Amp {
    Linear,
    Log,
}

impl Amp {
    /// `amp=linear` (default) or `amp=log`; only with `format=svg`.
    pub fn parse(v: Option<&str>, format: Format) -> Result<Amp, ApiError> {
        let amp = match v {
            None | Some("linear") => Amp::Linear,
            Some("log") => Amp::Log,
            Some(other) => {
                return Err(ApiError::BadQuery(format!(
                    "amp={other:?} is not known (known: linear, log)"
                )))
            }
        };
        if v.is_some() && format != Format::Svg {
            return Err(ApiError::BadQuery(
                "amp= sets the image's amplitude axis: it applies only to format=svg".into(),
            ));
        }
        Ok(amp)
    }
}

/// A shaded frequency span with its name (a band).
#[derive(Debug, Clone, PartialEq)]
pub struct Span {
    pub lo: f64,
    pub hi: f64,
    pub label: String,
}

/// Everything written on one image.
#[derive(Debug, Clone)]
pub struct Plot<'a> {
    pub title: String,
    /// Lines under the title (channel, time, resolution, window, …).
    pub info: Vec<String>,
    pub x_label: String,
    pub y_label: String,
    /// x of `values[0]` and the step between values.
    pub x0: f64,
    pub dx: f64,
    pub values: &'a [f32],
    /// `Some(10)` or `Some(20)`: draw `k·log10(v)` (dB re 1 unit: 10 for
    /// powers and densities, 20 for amplitudes); `None`: linear.
    pub db_factor: Option<f64>,
    pub spans: Vec<Span>,
    /// Lines under the plot (the band table).
    pub notes: Vec<String>,
}

/// Image width and the plot area inside it, px.
pub const WIDTH: f64 = 1000.0;
pub const PLOT_LEFT: f64 = 90.0;
pub const PLOT_RIGHT: f64 = 970.0;
pub const PLOT_TOP: f64 = 110.0;
pub const PLOT_BOTTOM: f64 = 470.0;
/// Pixel columns of the plot area: the decimation grid.
pub const COLUMNS: usize = (PLOT_RIGHT - PLOT_LEFT) as usize;
/// Range drawn below the highest value on a dB axis.
const DB_SPAN: f64 = 140.0;
const LINE_H: f64 = 16.0;

/// `s` with `& < > " '` escaped, for text and attribute values.
pub fn escape(s: &str) -> String {
    let mut out = String::with_capacity(s.len());
    for c in s.chars() {
        match c {
            '&' => out.push_str("&amp;"),
            '<' => out.push_str("&lt;"),
            '>' => out.push_str("&gt;"),
            '"' => out.push_str("&quot;"),
            '\'' => out.push_str("&apos;"),
            // Control characters are not allowed in XML 1.0 text.
            c if (c as u32) < 0x20 && c != '\t' && c != '\n' => out.push(' '),
            c => out.push(c),
        }
    }
    out
}

/// The pixel column of value `i` of `n` (x evenly spaced, first and last at
/// the plot's edges): `floor(i / (n - 1) · COLUMNS)`, the last in the last
/// column.
pub fn column_of(i: usize, n: usize) -> usize {
    if n <= 1 {
        return 0;
    }
    ((i as f64 / (n - 1) as f64 * COLUMNS as f64) as usize).min(COLUMNS - 1)
}

/// Min and max of the finite values of each pixel column (index into the
/// values), `None` for a column without any. Every value belongs to one
/// column, so an extreme is never skipped.
pub fn decimate(values: &[f64]) -> Vec<Option<(usize, usize)>> {
    let mut cols: Vec<Option<(usize, usize)>> = vec![None; COLUMNS];
    for (i, &v) in values.iter().enumerate() {
        if !v.is_finite() {
            continue;
        }
        let c = &mut cols[column_of(i, values.len())];
        *c = Some(match *c {
            None => (i, i),
            Some((lo, hi)) => (
                if v < values[lo] { i } else { lo },
                if v > values[hi] { i } else { hi },
            ),
        });
    }
    cols
}

/// A step of 1, 2 or 5 × 10^k giving about `target` intervals over `span`.
fn nice_step(span: f64, target: f64) -> f64 {
    if !(span.is_finite() && span > 0.0) {
        return 1.0;
    }
    let raw = span / target;
    let mag = 10f64.powf(raw.log10().floor());
    let f = raw / mag;
    let m = if f < 1.5 {
        1.0
    } else if f < 3.5 {
        2.0
    } else if f < 7.5 {
        5.0
    } else {
        10.0
    };
    m * mag
}

/// Ticks at multiples of `step` within [lo, hi].
fn ticks(lo: f64, hi: f64, step: f64) -> Vec<f64> {
    let mut out = Vec::new();
    let mut k = (lo / step - 1e-9).ceil();
    while k * step <= hi + step * 1e-9 && out.len() < 50 {
        out.push(k * step);
        k += 1.0;
    }
    out
}

/// A tick label with as many decimals as the step needs.
fn tick_label(v: f64, step: f64) -> String {
    let decimals = (-step.log10().floor()).max(0.0) as usize;
    let v = if v.abs() < step * 1e-6 { 0.0 } else { v };
    if step.abs() >= 1e6 || step.abs() < 1e-4 {
        format!("{v:e}")
    } else {
        format!("{v:.decimals$}")
    }
}

/// The values as drawn: linear, or `k·log10(v)` with values ≤ 0 at −∞
/// (drawn at the bottom of the axis).
fn drawn_values(p: &Plot<'_>) -> Vec<f64> {
    p.values
        .iter()
        .map(|&v| {
            let v = f64::from(v);
            match p.db_factor {
                None => v,
                Some(k) if v > 0.0 => k * v.log10(),
                Some(_) if v.is_finite() => f64::NEG_INFINITY,
                Some(_) => f64::NAN,
            }
        })
        .collect()
}

/// The y range and tick step: linear from min(0, data) to max(0, data);
/// dB from the highest value (rounded up to 10 dB) down `DB_SPAN` or to the
/// lowest finite value.
fn y_range(v: &[f64], db: bool) -> (f64, f64, f64) {
    let finite = v.iter().copied().filter(|x| x.is_finite());
    let (mut lo, mut hi) = finite.fold((f64::INFINITY, f64::NEG_INFINITY), |(a, b), x| {
        (a.min(x), b.max(x))
    });
    if lo > hi {
        (lo, hi) = (0.0, 1.0);
    }
    if db {
        let top = (hi / 10.0).ceil() * 10.0;
        let bottom = ((lo / 10.0).floor() * 10.0).max(top - DB_SPAN);
        let (bottom, top) = if top - bottom < 10.0 {
            (top - 10.0, top)
        } else {
            (bottom, top)
        };
        return (bottom, top, nice_step(top - bottom, 7.0));
    }
    lo = lo.min(0.0);
    hi = hi.max(0.0);
    if hi - lo <= 0.0 {
        hi = lo + 1.0;
    }
    let step = nice_step(hi - lo, 6.0);
    ((lo / step).floor() * step, (hi / step).ceil() * step, step)
}

/// Writes the image.
pub fn svg(p: &Plot<'_>) -> String {
    let n = p.values.len();
    let x_lo = p.x0;
    let x_hi = if n > 1 {
        p.x0 + (n - 1) as f64 * p.dx
    } else {
        p.x0 + p.dx.max(1.0)
    };
    let v = drawn_values(p);
    let (y_lo, y_hi, y_step) = y_range(&v, p.db_factor.is_some());
    let w = PLOT_RIGHT - PLOT_LEFT;
    let h = PLOT_BOTTOM - PLOT_TOP;
    let px = |x: f64| PLOT_LEFT + (x - x_lo) / (x_hi - x_lo) * w;
    let py = |y: f64| {
        let y = if y == f64::NEG_INFINITY {
            y_lo
        } else {
            y.clamp(y_lo, y_hi)
        };
        PLOT_BOTTOM - (y - y_lo) / (y_hi - y_lo) * h
    };
    let notes_top = PLOT_BOTTOM + 64.0;
    let height = notes_top + LINE_H * (p.notes.len() as f64 + 1.0) + 14.0;

    let mut s = String::with_capacity(64 * 1024);
    let _ = writeln!(s, r#"<?xml version="1.0" encoding="UTF-8"?>"#);
    let _ = writeln!(
        s,
        r##"<svg xmlns="http://www.w3.org/2000/svg" width="{WIDTH}" height="{height}" viewBox="0 0 {WIDTH} {height}" font-family="sans-serif" font-size="12" fill="#222222">"##
    );
    let _ = writeln!(s, "<title>{}</title>", escape(&p.title));
    let _ = writeln!(
        s,
        r##"<rect x="0" y="0" width="{WIDTH}" height="{height}" fill="#ececec"/>"##
    );
    let _ = writeln!(
        s,
        r#"<text class="title" x="{PLOT_LEFT}" y="26" font-size="17" font-weight="bold">{}</text>"#,
        escape(&p.title)
    );
    for (i, line) in p.info.iter().enumerate() {
        let _ = writeln!(
            s,
            r#"<text class="info" x="{PLOT_LEFT}" y="{}">{}</text>"#,
            46.0 + i as f64 * LINE_H,
            escape(line)
        );
    }
    // The plot area, with the data ranges it shows (read back by tests).
    let _ = writeln!(
        s,
        r##"<rect id="plot-area" x="{PLOT_LEFT}" y="{PLOT_TOP}" width="{w}" height="{h}" fill="#f8f8f8" stroke="#777777" data-x-min="{x_lo}" data-x-max="{x_hi}" data-y-min="{y_lo}" data-y-max="{y_hi}"/>"##
    );
    // Bands: shaded spans, clipped to the plot, each name once (a band of
    // several windows is several spans), the labels clipped too.
    let _ = writeln!(
        s,
        r#"<clipPath id="plot-clip"><rect x="{PLOT_LEFT}" y="{PLOT_TOP}" width="{w}" height="{h}"/></clipPath><g clip-path="url(#plot-clip)">"#
    );
    let mut labelled: Vec<&str> = Vec::new();
    let mut marks = Vec::new();
    for sp in &p.spans {
        let (a, b) = (sp.lo.max(x_lo), sp.hi.min(x_hi));
        // Outside the range drawn (a point span, such as a trip mark, is
        // kept when it lies inside).
        if !(a.is_finite() && b.is_finite()) || b < a || (b == a && sp.hi > sp.lo) {
            continue;
        }
        let (xa, xb) = (px(a), px(b));
        if sp.hi <= sp.lo {
            // A point (the trip in a capture): a dashed line over the trace.
            marks.push(xa);
        }
        let _ = writeln!(
            s,
            r##"<rect class="band" x="{xa:.2}" y="{PLOT_TOP}" width="{:.2}" height="{h}" fill="#8c8c8c" fill-opacity="0.22"/>"##,
            (xb - xa).max(1.0)
        );
        if labelled.contains(&sp.label.as_str()) {
            continue;
        }
        let _ = writeln!(
            s,
            r##"<text class="band-label" x="{:.2}" y="{}" font-size="10" fill="#444444">{}</text>"##,
            xa + 2.0,
            PLOT_TOP + 12.0 + (labelled.len() % 3) as f64 * 11.0,
            escape(&sp.label)
        );
        labelled.push(&sp.label);
    }
    s.push_str("</g>\n");
    // Grid and ticks.
    let x_step = nice_step(x_hi - x_lo, 10.0);
    for t in ticks(x_lo, x_hi, x_step) {
        let x = px(t);
        let _ = writeln!(
            s,
            r##"<line class="grid" x1="{x:.2}" y1="{PLOT_TOP}" x2="{x:.2}" y2="{PLOT_BOTTOM}" stroke="#d2d2d2" stroke-width="0.6"/><line x1="{x:.2}" y1="{PLOT_BOTTOM}" x2="{x:.2}" y2="{}" stroke="#555555"/><text class="tick" x="{x:.2}" y="{}" text-anchor="middle">{}</text>"##,
            PLOT_BOTTOM + 5.0,
            PLOT_BOTTOM + 18.0,
            escape(&tick_label(t, x_step))
        );
    }
    for t in ticks(y_lo, y_hi, y_step) {
        let y = py(t);
        let _ = writeln!(
            s,
            r##"<line class="grid" x1="{PLOT_LEFT}" y1="{y:.2}" x2="{PLOT_RIGHT}" y2="{y:.2}" stroke="#d2d2d2" stroke-width="0.6"/><line x1="{}" y1="{y:.2}" x2="{PLOT_LEFT}" y2="{y:.2}" stroke="#555555"/><text class="tick" x="{}" y="{:.2}" text-anchor="end">{}</text>"##,
            PLOT_LEFT - 5.0,
            PLOT_LEFT - 8.0,
            y + 4.0,
            escape(&tick_label(t, y_step))
        );
    }
    // Axis labels.
    let _ = writeln!(
        s,
        r#"<text class="x-label" x="{}" y="{}" text-anchor="middle">{}</text>"#,
        (PLOT_LEFT + PLOT_RIGHT) / 2.0,
        PLOT_BOTTOM + 38.0,
        escape(&p.x_label)
    );
    let _ = writeln!(
        s,
        r#"<text class="y-label" x="0" y="0" transform="translate(18 {}) rotate(-90)" text-anchor="middle">{}</text>"#,
        (PLOT_TOP + PLOT_BOTTOM) / 2.0,
        escape(&p.y_label)
    );
    // The trace: every value when they are fewer than the columns, else
    // the min and max of each column at the column's centre.
    let mut pts = String::with_capacity(24 * COLUMNS * 2);
    if n <= COLUMNS {
        for (i, &y) in v.iter().enumerate() {
            if y.is_nan() {
                continue;
            }
            let _ = write!(pts, "{:.2},{:.2} ", px(p.x0 + i as f64 * p.dx), py(y));
        }
    } else {
        for (c, mm) in decimate(&v).into_iter().enumerate() {
            let Some((lo, hi)) = mm else { continue };
            let x = PLOT_LEFT + c as f64 + 0.5;
            let _ = write!(pts, "{x:.2},{:.2} {x:.2},{:.2} ", py(v[lo]), py(v[hi]));
        }
    }
    let _ = writeln!(
        s,
        r##"<polyline id="trace" fill="none" stroke="#1a1a1a" stroke-width="1" stroke-linejoin="round" points="{}"/>"##,
        pts.trim_end()
    );
    for x in marks {
        let _ = writeln!(
            s,
            r##"<line class="mark" x1="{x:.2}" y1="{PLOT_TOP}" x2="{x:.2}" y2="{PLOT_BOTTOM}" stroke="#555555" stroke-width="1.5" stroke-dasharray="5 4"/>"##
        );
    }
    for (i, line) in p.notes.iter().enumerate() {
        let _ = writeln!(
            s,
            r#"<text class="note" x="{PLOT_LEFT}" y="{}">{}</text>"#,
            notes_top + i as f64 * LINE_H,
            escape(line)
        );
    }
    let _ = writeln!(
        s,
        r##"<text class="generator" x="{}" y="{}" text-anchor="end" font-size="10" fill="#555555">bandwatch {}</text>"##,
        WIDTH - 10.0,
        height - 8.0,
        env!("CARGO_PKG_VERSION")
    );
    s.push_str("</svg>\n");
    s
}

/// `YYYYMMDDTHHMMSSZ` of a time in ns since the epoch; `None` for 0.
fn compact_time(ns: u64) -> Option<String> {
    if ns == 0 {
        return None;
    }
    let t = time::OffsetDateTime::from_unix_timestamp_nanos(i128::from(ns)).ok()?;
    Some(format!(
        "{:04}{:02}{:02}T{:02}{:02}{:02}Z",
        t.year(),
        u8::from(t.month()),
        t.day(),
        t.hour(),
        t.minute(),
        t.second()
    ))
}

/// A download file name made of `[A-Za-z0-9._-]` only:
/// `pump-de-spectrum-20261204T201200Z.svg` (parts joined by `-`, other
/// characters replaced by `_`; the time left out when unknown).
pub fn filename(parts: &[&str], time_ns: u64, ext: &str) -> String {
    let clean = |s: &str| -> String {
        s.chars()
            .map(|c| {
                if c.is_ascii_alphanumeric() || c == '-' || c == '_' || c == '.' {
                    c
                } else {
                    '_'
                }
            })
            .take(64)
            .collect()
    };
    let mut name: Vec<String> = parts.iter().map(|p| clean(p)).collect();
    name.extend(compact_time(time_ns));
    format!("{}.{ext}", name.join("-"))
}

/// An answer to be saved: the body with its content type and
/// `Content-Disposition: attachment; filename="…"` (`filename` is made by
/// [`filename`], so it needs no quoting).
pub fn attachment(content_type: &'static str, filename: &str, body: impl IntoResponse) -> Response {
    (
        [
            (header::CONTENT_TYPE, content_type.to_string()),
            (
                header::CONTENT_DISPOSITION,
                format!("attachment; filename=\"{filename}\""),
            ),
        ],
        body,
    )
        .into_response()
}

pub const CSV: &str = "text/csv; charset=utf-8";
pub const SVG: &str = "image/svg+xml";

/// A CSV of values: the header, then `x(i),value` per line; the value in
/// its f32 shortest round-trip form (so it parses back to the very f32 the
/// JSON carries).
pub fn csv(header: &str, x: impl Fn(usize) -> f64, values: &[f32]) -> String {
    let mut out = String::with_capacity(24 * values.len() + header.len() + 2);
    out.push_str(header);
    out.push('\n');
    for (i, v) in values.iter().enumerate() {
        let _ = writeln!(out, "{},{}", x(i), v);
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn escapes_markup_and_quotes() {
        assert_eq!(escape(r#"a<b>&"c"'"#), "a&lt;b&gt;&amp;&quot;c&quot;&apos;");
    }

    #[test]
    fn file_names_are_safe() {
        // 2026-12-04T20:12:00Z = 1 796 415 120 s since the epoch
        // (`date -u -d 2026-12-04T20:12:00Z +%s`).
        let ns = 1_796_415_120_000_000_000;
        assert_eq!(
            filename(&["pump-de", "spectrum"], ns, "svg"),
            "pump-de-spectrum-20261204T201200Z.svg"
        );
        assert_eq!(
            filename(&["a\"b/c<d>", "waveform"], 0, "csv"),
            "a_b_c_d_-waveform.csv"
        );
    }

    #[test]
    fn nice_steps_are_1_2_5() {
        assert_eq!(nice_step(100.0, 10.0), 10.0);
        assert_eq!(nice_step(12_800.0, 10.0), 1000.0);
        assert_eq!(nice_step(0.3, 6.0), 0.05);
        assert_eq!(ticks(0.0, 1.0, 0.5), vec![0.0, 0.5, 1.0]);
    }

    #[test]
    fn every_value_lands_in_a_column() {
        let n = 65_537;
        let mut last = 0;
        for i in 0..n {
            let c = column_of(i, n);
            assert!(c >= last && c < COLUMNS);
            last = c;
        }
        assert_eq!(column_of(0, n), 0);
        assert_eq!(column_of(n - 1, n), COLUMNS - 1);
    }
}
