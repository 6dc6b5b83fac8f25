//! `bandwatch selftest`: published and common-practice check values,
//! measured at run time through the code paths the daemon uses, so a site
//! can show that *this* build on *this* machine computes correctly.
//!
//! Every number is measured, not looked up: windows through
//! [`Window`] and [`SpectrumEngine`], band values through a channel parsed
//! from config text by [`config::parse_str`], averaged by the [`Averager`]
//! and read by [`BandPlan`] (which weighs lines with
//! [`units::line_factor`]), and the frame check through the BWF1 encoder.
//! Each [`Check`] names the source of its expected value.
//!
//! The module also holds the pieces the reference tests share with it (the
//! published window figures, the fixed-seed generator, the channel builder,
//! the measurement functions), so that the selftest and `cargo test` check
//! the same things the same way.

use std::f64::consts::PI;
use std::fmt::Write as _;

use serde::Serialize;

use crate::config::{self, AveragingMode, ChannelSpec, Detrend};
use crate::dsp::average::Averager;
use crate::dsp::bands::BandPlan;
use crate::dsp::spectrum::SpectrumEngine;
use crate::dsp::stats;
use crate::dsp::window::{Window, WindowKind};
use crate::frame::bwf1::{self, Header, RejectReason};
use crate::frame::{SampleFormat, SampleSlice};
use crate::pipeline::{AlarmMode, Builder, RingSize};
use crate::units::{self, Unit};

mod measure;

pub use measure::*;

/// The version that ran the checks, printed with the table.
pub const VERSION: &str = env!("CARGO_PKG_VERSION");

/// Sample rate of every channel built by [`ChannelSetup`]: that of the
/// built-in source, which `parse_str` gives a `sim` channel.
pub const FS: f64 = config::SIM_SAMPLE_RATE_HZ;

/// One check: what was measured against what a named source says.
#[derive(Debug, Clone, Serialize)]
pub struct Check {
    /// What is checked, e.g. "hann: coherent gain".
    pub name: String,
    /// Where the expected value comes from ("Harris 1978, Table 1",
    /// "common practice", "CRC catalogue" …).
    pub source: &'static str,
    /// The expected value, as text with its unit.
    pub expected: String,
    /// The value this build measured, same format.
    pub measured: String,
    /// How far `measured` may be from `expected`.
    pub tolerance: String,
    /// Whether `measured` is within `tolerance` of `expected`.
    pub pass: bool,
}

/// A problem setting up a measurement (never expected: the inputs are the
/// module's own constants). Reported as a failed check, never a panic.
#[derive(Debug, thiserror::Error)]
pub enum SetupError {
    #[error("test channel config rejected: {0}")]
    Config(String),
    #[error("test channel hop is {got}, expected {expected}")]
    Hop { expected: usize, got: usize },
    #[error("record of {given} samples is shorter than the {needed} the averages need")]
    ShortRecord { needed: usize, given: usize },
    #[error("the averager published no result after {0} blocks")]
    NotReady(u32),
    #[error("{0}")]
    Measurement(String),
}

// ---------------------------------------------------------------------------
// The checks
// ---------------------------------------------------------------------------

/// Runs every check, in the order the table prints them. Deterministic
/// (fixed seeds, no I/O) and fast: well under a second in a release build.
pub fn run() -> Vec<Check> {
    let mut out = Vec::new();
    for f in &WINDOW_FIGURES {
        window_checks(f, &mut out);
    }
    integration_checks(&mut out);
    unit_checks(&mut out);
    out.push(alias_check());
    out.extend(crc_checks());
    out
}

fn failed(name: String, source: &'static str, expected: String, e: SetupError) -> Check {
    Check {
        name,
        source,
        expected,
        measured: format!("error: {e}"),
        tolerance: "-".into(),
        pass: false,
    }
}

/// |measured − expected| ≤ tol, shown with `digits` decimals and `unit`.
fn abs_check(
    name: String,
    source: &'static str,
    expected: f64,
    measured: f64,
    tol: f64,
    digits: usize,
    unit: &str,
) -> Check {
    let sep = if unit.is_empty() { "" } else { " " };
    Check {
        name,
        source,
        expected: format!("{expected:.digits$}{sep}{unit}"),
        measured: format!("{measured:.digits$}{sep}{unit}"),
        tolerance: format!("±{}{sep}{unit}", show_tolerance(tol)),
        pass: (measured - expected).abs() <= tol,
    }
}

/// |measured/expected − 1| ≤ rel.
fn rel_check(
    name: String,
    source: &'static str,
    expected: f64,
    measured: f64,
    rel: f64,
    digits: usize,
    unit: &str,
) -> Check {
    let sep = if unit.is_empty() { "" } else { " " };
    Check {
        name,
        source,
        expected: format!("{expected:.digits$}{sep}{unit}"),
        measured: format!("{measured:.digits$}{sep}{unit}"),
        tolerance: if rel < 1e-6 {
            format!("±{} relative", show_tolerance(rel))
        } else {
            format!("±{} %", show_tolerance(rel * 100.0))
        },
        pass: (measured / expected - 1.0).abs() <= rel,
    }
}

/// A tolerance as short text: plain below 3 significant digits, else
/// exponent form (6e-4, 1e-12).
fn show_tolerance(t: f64) -> String {
    if t >= 1e-3 {
        format!("{t}")
    } else {
        format!("{t:e}")
    }
}

fn window_checks(f: &WindowFigures, out: &mut Vec<Check>) {
    let w = f.kind.as_str();
    let n = 4096;
    let win = Window::new(f.kind, n);
    out.push(abs_check(
        format!("{w}: coherent gain, N = 4096"),
        f.source,
        f.cg,
        win.coherent_gain(),
        cg_tolerance(f.kind),
        4,
        "",
    ));
    out.push(abs_check(
        format!("{w}: ENBW, N = 4096"),
        f.source,
        f.enbw,
        win.enbw_bins(),
        ENBW_TOLERANCE,
        4,
        "bins",
    ));
    let loss = -db(tone_reading(f.kind, n, 0.5));
    out.push(abs_check(
        format!("{w}: scallop loss, tone half a line off"),
        if f.kind == WindowKind::Hamming {
            HAMMING_SCALLOP_SRC
        } else {
            f.source
        },
        f.scallop_db,
        loss,
        scallop_tolerance_db(f.kind),
        4,
        "dB",
    ));
    let name = format!("{w}: highest sidelobe");
    out.push(match highest_sidelobe_db(f.kind, n, 32) {
        Ok((side, _)) => abs_check(
            name,
            f.source,
            f.sidelobe_db,
            side,
            SIDELOBE_TOLERANCE_DB,
            2,
            "dB",
        ),
        Err(e) => failed(name, f.source, format!("{} dB", f.sidelobe_db), e),
    });
    out.push(tone_on_line_check(f.kind));
    let name = format!("{w}: Parseval, white noise, all lines");
    out.push(match parseval_error(w, 512, 0x5eed_0003) {
        Ok(e) => Check {
            name,
            source: "common practice (Parseval)",
            expected: "0 % (band = time RMS)".into(),
            measured: format!("{:+.3} %", 100.0 * e),
            tolerance: "±1 %".into(),
            pass: e.abs() <= 0.01,
        },
        Err(e) => failed(name, "common practice (Parseval)", "band = time".into(), e),
    });
}

/// A tone of amplitude 3 on line 120 of a 2048-line Hann/… spectrum reads
/// 3 as `peak` and 3/√2 as `rms` within 0.1 % (amplitude correction).
fn tone_on_line_check(kind: WindowKind) -> Check {
    let w = kind.as_str();
    let name = format!("{w}: tone on a line, peak / RMS");
    let a = 3.0;
    let expected = format!("{a:.4} / {:.4} g", a / 2f64.sqrt());
    let band = |name, measure| BandSetup {
        name,
        lo_hz: 1000.0,
        hi_hz: 2000.0,
        unit: "g",
        measure,
    };
    let setup = ChannelSetup {
        window: w,
        block: 2048,
        nfft: 2048,
        noverlap: 0,
        detrend: "mean",
        averages: 1,
        bands: vec![band("pk", "peak"), band("rms", "rms")],
    };
    // Through the daemon's pipeline, not the stages one by one.
    let result = setup
        .spec()
        .and_then(|spec| setup.run_pipeline(&tone(2048, FS, 120.0 * spec.df_hz(), a, 1.1)));
    match result {
        Ok(bands) => {
            let (pk, rms) = (bands[0], bands[1]);
            Check {
                name,
                source: "common practice",
                expected,
                measured: format!("{pk:.4} / {rms:.4} g"),
                tolerance: "±0.1 %".into(),
                pass: (pk / a - 1.0).abs() <= 1e-3 && (rms * 2f64.sqrt() / a - 1.0).abs() <= 1e-3,
            }
        }
        Err(e) => failed(name, "common practice", expected, e),
    }
}

/// 1 g RMS tones on a g channel, read by a velocity or displacement band
/// (integration in the frequency domain). One 4 s Hann block: 0.25 Hz
/// lines, so even the 10 Hz tone sits on line 40. Near DC the window's main
/// lobe spreads a tone over lines whose 1/f weights differ, which reads high
/// by about 0.5/m² for a tone on line m (see the README, Accuracy).
fn integration_checks(out: &mut Vec<Check>) {
    let f159 = 1000.0 / (2.0 * PI);
    let cases = [
        (
            "1 g RMS at 159.155 Hz -> velocity",
            f159,
            "mm/s",
            9.80665,
            5,
        ),
        (
            "1 g RMS at 159.155 Hz -> displacement",
            f159,
            "um",
            9.80665,
            5,
        ),
        ("1 g RMS at 100 Hz -> velocity", 100.0, "mm/s", 15.608, 3),
        ("1 g RMS at 10 Hz -> velocity", 10.0, "mm/s", 156.08, 2),
    ];
    let block = 102_400;
    for (name, f, unit, want, digits) in cases {
        let setup = ChannelSetup {
            window: "hann",
            block,
            nfft: block,
            noverlap: 0,
            detrend: "mean",
            averages: 1,
            bands: vec![BandSetup {
                name: "b",
                lo_hz: (f - 8.0).max(3.0),
                hi_hz: f + 8.0,
                unit,
                measure: "rms",
            }],
        };
        let shown = if unit == "um" { "µm" } else { unit };
        let result = setup
            .spec()
            .and_then(|spec| run_stages(&spec, &tone(block, FS, f, 2f64.sqrt(), 0.2)));
        out.push(match result {
            Ok(r) => rel_check(
                name.into(),
                "common practice",
                want,
                r.bands[0],
                1e-3,
                digits,
                shown,
            ),
            Err(e) => failed(name.into(), "common practice", format!("{want} {shown}"), e),
        });
    }
}

fn unit_checks(out: &mut Vec<Check>) {
    let pair = |a: &str, b: &str| Unit::parse(a).zip(Unit::parse(b));
    match pair("g", "m/s^2") {
        Some((g, si)) => out.push(rel_check(
            "g in m/s² (unit conversion)".into(),
            "CGPM 1901 (exact)",
            units::STANDARD_GRAVITY,
            units::line_factor(g, si, 100.0, 0.0),
            1e-12,
            5,
            "m/s²",
        )),
        None => out.push(failed(
            "g in m/s²".into(),
            "CGPM 1901 (exact)",
            "9.80665 m/s²".into(),
            SetupError::Measurement("unit g or m/s^2 unknown".into()),
        )),
    }
    match pair("in/s", "mm/s") {
        Some((ips, mms)) => out.push(rel_check(
            "1 in in mm (in/s -> mm/s)".into(),
            "yard and pound agreement 1959 (exact)",
            25.4,
            units::line_factor(ips, mms, 100.0, 0.0),
            1e-12,
            4,
            "mm",
        )),
        None => out.push(failed(
            "1 in in mm".into(),
            "yard and pound agreement 1959 (exact)",
            "25.4 mm".into(),
            SetupError::Measurement("unit in/s or mm/s unknown".into()),
        )),
    }
    // A sine of 100 whole cycles: peak = √2·RMS, peak-to-peak = 2√2·RMS.
    let o = stats::overall(&tone(25_600, FS, 100.0, 1.0, 0.3));
    let (crest, pp) = (o.crest_factor, o.peak_to_peak / o.rms);
    out.push(Check {
        name: "sine: peak/RMS, peak-to-peak/RMS".into(),
        source: "common practice",
        expected: format!("{:.4} / {:.4}", 2f64.sqrt(), 2.0 * 2f64.sqrt()),
        measured: format!("{crest:.4} / {pp:.4}"),
        tolerance: "±0.1 %".into(),
        pass: (crest / 2f64.sqrt() - 1.0).abs() <= 1e-3
            && (pp / (2.0 * 2f64.sqrt()) - 1.0).abs() <= 1e-3,
    });
}

/// Sampled at fs, a tone at fs − 3000 Hz is indistinguishable from one at
/// 3000 Hz: it reads there, with its full amplitude.
fn alias_check() -> Check {
    let name = "tone at fs − 3000 Hz folds to 3000 Hz".to_string();
    let source = "common practice (aliasing)";
    let expected = "3000.0 Hz, 1.0000 g pk".to_string();
    let setup = ChannelSetup {
        window: "hann",
        block: 1024,
        nfft: 1024,
        noverlap: 0,
        detrend: "mean",
        averages: 1,
        bands: vec![BandSetup {
            name: "alias",
            lo_hz: 2000.0,
            hi_hz: 4000.0,
            unit: "g",
            measure: "peak",
        }],
    };
    match setup
        .spec()
        .and_then(|spec| run_stages(&spec, &tone(1024, FS, FS - 3000.0, 1.0, 0.0)))
    {
        Ok(r) => Check {
            name,
            source,
            expected,
            measured: format!("{:.1} Hz, {:.4} g pk", r.peak_hz[0], r.bands[0]),
            tolerance: "same line; ±0.1 %".into(),
            pass: r.peak_hz[0] == 3000.0 && (r.bands[0] - 1.0).abs() <= 1e-3,
        },
        Err(e) => failed(name, source, expected, e),
    }
}

fn crc_checks() -> Vec<Check> {
    const CHECK: u32 = 0xCBF4_3926;
    let fast = crc32fast::hash(b"123456789");
    let bitwise = crc32_bitwise(b"123456789");
    let catalogue = Check {
        name: "CRC-32/IEEE of \"123456789\"".into(),
        source: "CRC catalogue",
        expected: format!("0x{CHECK:08X}"),
        measured: if fast == bitwise {
            format!("0x{fast:08X}")
        } else {
            format!("0x{fast:08X} (bitwise 0x{bitwise:08X})")
        },
        tolerance: "exact".into(),
        pass: fast == CHECK && bitwise == CHECK,
    };
    vec![catalogue, bwf1_crc_check()]
}

/// A BWF1 frame from the encoder ends with the CRC-32/IEEE of every byte
/// before it (the bitwise reference, itself checked against the catalogue
/// value), the decoder accepts it, and one flipped sample bit is refused.
fn bwf1_crc_check() -> Check {
    let name = "BWF1 encoder trailer = CRC-32/IEEE; bit flip refused".to_string();
    let source = "README wire format BWF1; CRC catalogue";
    let samples: Vec<f32> = (0..16).map(|i| i as f32 * 0.25 - 1.0).collect();
    let header = Header::new(SampleFormat::F32, 2, 8, 1000, 0, FS);
    let frame = match bwf1::encode(&header, SampleSlice::F32(&samples)) {
        Ok(f) => f,
        Err(e) => {
            return failed(
                name,
                source,
                "trailer = CRC".into(),
                SetupError::Measurement(format!("encode: {e}")),
            )
        }
    };
    let body = frame.len() - bwf1::CRC_BYTES;
    let mut trailer = [0u8; 4];
    trailer.copy_from_slice(&frame[body..]);
    let trailer = u32::from_le_bytes(trailer);
    let want = crc32_bitwise(&frame[..body]);
    let accepted = bwf1::decode_datagram(&frame).is_ok();
    let mut bad = frame.clone();
    bad[bwf1::HEADER_BYTES + 3] ^= 0x01;
    let refused = matches!(
        bwf1::decode_datagram(&bad),
        Err(e) if e.reason() == RejectReason::CrcMismatch
    );
    Check {
        name,
        source,
        expected: format!("0x{want:08X}, accepted, refused"),
        measured: format!(
            "0x{trailer:08X}, {}, {}",
            if accepted { "accepted" } else { "REJECTED" },
            if refused { "refused" } else { "NOT REFUSED" }
        ),
        tolerance: "exact".into(),
        pass: trailer == want && accepted && refused,
    }
}

// ---------------------------------------------------------------------------
// Output
// ---------------------------------------------------------------------------

/// True when every check passed (and there is at least one).
pub fn all_pass(checks: &[Check]) -> bool {
    !checks.is_empty() && checks.iter().all(|c| c.pass)
}

/// The checks as an aligned text table, with a heading naming the version
/// and a closing line with the count.
pub fn render_table(checks: &[Check]) -> String {
    let head = [
        "result",
        "check",
        "expected",
        "measured",
        "tolerance",
        "source",
    ];
    let rows: Vec<[&str; 6]> = checks
        .iter()
        .map(|c| {
            [
                if c.pass { "pass" } else { "FAIL" },
                c.name.as_str(),
                c.expected.as_str(),
                c.measured.as_str(),
                c.tolerance.as_str(),
                c.source,
            ]
        })
        .collect();
    let mut width = head.map(|h| h.chars().count());
    for r in &rows {
        for (w, cell) in width.iter_mut().zip(r) {
            *w = (*w).max(cell.chars().count());
        }
    }
    let line = |cells: &[&str; 6]| {
        let mut s = String::new();
        for (i, (cell, w)) in cells.iter().zip(width).enumerate() {
            if i + 1 == cells.len() {
                s.push_str(cell);
            } else {
                s.push_str(cell);
                s.push_str(&" ".repeat(w - cell.chars().count() + 2));
            }
        }
        s.push('\n');
        s
    };
    let passed = checks.iter().filter(|c| c.pass).count();
    let mut out = format!("bandwatch {VERSION} selftest\n\n");
    out.push_str(&line(&head));
    for r in &rows {
        out.push_str(&line(r));
    }
    let _ = writeln!(
        out,
        "\n{passed} of {} checks passed: {}",
        checks.len(),
        if all_pass(checks) { "PASS" } else { "FAIL" }
    );
    out
}

/// The checks as one JSON object: version, overall pass, counts, checks.
pub fn render_json(checks: &[Check]) -> String {
    #[derive(Serialize)]
    struct Report<'a> {
        version: &'a str,
        pass: bool,
        passed: usize,
        total: usize,
        checks: &'a [Check],
    }
    let report = Report {
        version: VERSION,
        pass: all_pass(checks),
        passed: checks.iter().filter(|c| c.pass).count(),
        total: checks.len(),
        checks,
    };
    serde_json::to_string_pretty(&report)
        .unwrap_or_else(|e| format!("{{\"error\": \"cannot encode the report: {e}\"}}"))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn bitwise_crc_matches_the_catalogue_check_value() {
        // CRC catalogue: CRC-32/IEEE ("ISO-HDLC") check = 0xCBF43926.
        assert_eq!(crc32_bitwise(b"123456789"), 0xCBF4_3926);
        assert_eq!(crc32_bitwise(b""), 0);
    }

    #[test]
    fn a_failed_check_fails_the_whole_run_and_shows_in_the_table() {
        let mut checks = vec![abs_check("a".into(), "x", 1.0, 1.0, 0.1, 1, "")];
        assert!(all_pass(&checks));
        checks.push(abs_check("b".into(), "y", 1.0, 1.2, 0.1, 1, "dB"));
        assert!(!all_pass(&checks));
        let t = render_table(&checks);
        assert!(
            t.lines()
                .any(|l| l.starts_with("FAIL") && l.contains(" b ") && l.contains("1.2 dB")),
            "{t}"
        );
        assert!(t.contains("1 of 2 checks passed: FAIL"), "{t}");
        assert!(!all_pass(&[]));
    }

    #[test]
    fn rel_check_bounds_both_ways() {
        assert!(rel_check("r".into(), "s", 100.0, 100.09, 1e-3, 2, "").pass);
        assert!(!rel_check("r".into(), "s", 100.0, 100.11, 1e-3, 2, "").pass);
        assert!(!rel_check("r".into(), "s", 100.0, 99.89, 1e-3, 2, "").pass);
    }
}
