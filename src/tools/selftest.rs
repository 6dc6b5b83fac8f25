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
use crate::units::{self, Unit};

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
// Published window figures
// ---------------------------------------------------------------------------

/// One window's figures: coherent gain Σw/N, ENBW N·Σw²/(Σw)² (bins),
/// scallop loss half a line off (dB), highest sidelobe (dB), overlap
/// correlation at 50 % and 75 %.
#[derive(Debug, Clone, Copy)]
pub struct WindowFigures {
    pub kind: WindowKind,
    pub cg: f64,
    pub enbw: f64,
    pub scallop_db: f64,
    pub sidelobe_db: f64,
    pub overlap: (f64, f64),
    /// Where the figures come from.
    pub source: &'static str,
}

const HARRIS: &str = "Harris 1978, Table 1";
/// Harris lists 1.78 dB; scipy gives 1.75 dB for 0.54/0.46.
const HAMMING_SCALLOP_SRC: &str = "scipy 1.17 for 0.54/0.46 (Harris 1978: 1.78)";
const FLAT_TOP_SRC: &str = "D'Antona & Ferrero 2006 window; scipy 1.17";

/// F. J. Harris, "On the use of windows for harmonic analysis with the
/// discrete Fourier transform", Proc. IEEE 66(1), 1978, Table 1, for the
/// first four. For Hamming (0.54/0.46) the table's scallop loss is 1.78 dB;
/// these exact coefficients give 1.75 dB, which is what is checked. The
/// flat top is the 5-term window scipy.signal.windows.flattop uses (from
/// D'Antona & Ferrero, *Digital Signal Processing for Measurement Systems*,
/// Springer 2006), with its figures recomputed with scipy 1.17.
pub const WINDOW_FIGURES: [WindowFigures; 5] = [
    WindowFigures {
        kind: WindowKind::Rectangular,
        cg: 1.000,
        enbw: 1.000,
        scallop_db: 3.92,
        sidelobe_db: -13.3,
        overlap: (0.500, 0.750),
        source: HARRIS,
    },
    WindowFigures {
        kind: WindowKind::Hann,
        cg: 0.500,
        enbw: 1.500,
        scallop_db: 1.42,
        sidelobe_db: -31.5,
        overlap: (0.167, 0.659),
        source: HARRIS,
    },
    WindowFigures {
        kind: WindowKind::Hamming,
        cg: 0.540,
        enbw: 1.363,
        scallop_db: 1.75,
        sidelobe_db: -42.7,
        overlap: (0.234, 0.707),
        source: HARRIS,
    },
    WindowFigures {
        kind: WindowKind::BlackmanHarris,
        cg: 0.359,
        enbw: 2.004,
        scallop_db: 0.83,
        sidelobe_db: -92.0,
        overlap: (0.038, 0.460),
        source: HARRIS,
    },
    WindowFigures {
        kind: WindowKind::FlatTop,
        cg: 0.2156,
        enbw: 3.770,
        scallop_db: 0.0098,
        sidelobe_db: -93.0,
        overlap: (-0.015, 0.046),
        source: FLAT_TOP_SRC,
    },
];

/// Allowed |CG − table|: half a unit of the table's last digit plus 1e-4
/// for rounding at the boundary.
pub fn cg_tolerance(kind: WindowKind) -> f64 {
    if kind == WindowKind::FlatTop {
        1.5e-4
    } else {
        6e-4
    }
}

/// Allowed |ENBW − table| in bins.
pub const ENBW_TOLERANCE: f64 = 6e-4;

/// Allowed |scallop loss − table| in dB: the table's rounding and the f32
/// reading (tighter for the flat top, whose figure has more digits).
pub fn scallop_tolerance_db(kind: WindowKind) -> f64 {
    if kind == WindowKind::FlatTop {
        0.002
    } else {
        0.01
    }
}

/// Allowed |sidelobe − table| in dB: the table's rounding plus the
/// 1/32-bin sampling of [`highest_sidelobe_db`].
pub const SIDELOBE_TOLERANCE_DB: f64 = 0.3;

// ---------------------------------------------------------------------------
// Signals
// ---------------------------------------------------------------------------

pub use crate::noise::SplitMix64;

/// `a·cos(2πf·i/fs + phase)` for i in 0..n, computed in f64.
pub fn tone(n: usize, fs: f64, f: f64, a: f64, phase: f64) -> Vec<f32> {
    (0..n)
        .map(|i| (a * (2.0 * PI * f * i as f64 / fs + phase).cos()) as f32)
        .collect()
}

// ---------------------------------------------------------------------------
// A channel as a user's config makes it, and the worker's stages over it
// ---------------------------------------------------------------------------

/// A band to put on a [`ChannelSetup`].
#[derive(Debug, Clone)]
pub struct BandSetup<'a> {
    pub name: &'a str,
    pub lo_hz: f64,
    pub hi_hz: f64,
    /// "g", "mm/s", …; the channel is in g.
    pub unit: &'a str,
    /// "rms" or "peak".
    pub measure: &'a str,
}

/// A channel's settings, written out as bandwatch config text.
#[derive(Debug, Clone)]
pub struct ChannelSetup<'a> {
    /// bandwatch window name ("hann", "flat-top", …).
    pub window: &'a str,
    pub block: usize,
    pub nfft: usize,
    /// Samples shared by consecutive blocks.
    pub noverlap: usize,
    /// "mean" or "none".
    pub detrend: &'a str,
    /// Linear averaging count.
    pub averages: u32,
    pub bands: Vec<BandSetup<'a>>,
}

impl ChannelSetup<'_> {
    /// The config text of a one-channel `sim` setup with these settings.
    pub fn config_text(&self) -> String {
        let mut text = format!(
            "[server]\nlisten = \"127.0.0.1:0\"\n\n[[source]]\nname = \"sim\"\nkind = \"sim\"\n\n\
             [[channel]]\nname = \"ref\"\nsource = \"sim\"\nindex = 0\nunit = \"g\"\n\
             block = {}\nnfft = {}\nwindow = \"{}\"\noverlap = {:?}\ndetrend = \"{}\"\n\
             averaging = {{ mode = \"linear\", count = {} }}\n",
            self.block,
            self.nfft,
            self.window,
            self.noverlap as f64 / self.block as f64,
            self.detrend,
            self.averages,
        );
        for b in &self.bands {
            let _ = write!(
                text,
                "\n[[channel.band]]\nname = \"{}\"\nlo_hz = {:?}\nhi_hz = {:?}\nunit = \"{}\"\nmeasure = \"{}\"\n",
                b.name, b.lo_hz, b.hi_hz, b.unit, b.measure
            );
        }
        text
    }

    /// Builds the channel the way the daemon does: config text through
    /// [`config::parse_str`], so the hop, line spacing and band lines are
    /// the ones a user's config gets.
    ///
    /// # Errors
    /// The config is refused, or its hop is not `block − noverlap`.
    pub fn spec(&self) -> Result<ChannelSpec, SetupError> {
        let text = self.config_text();
        let config = config::parse_str(&text).map_err(|e| SetupError::Config(format!("{e:?}")))?;
        let spec = config
            .channels
            .into_iter()
            .next()
            .ok_or_else(|| SetupError::Config("no channel".into()))?;
        let expected = self.block.saturating_sub(self.noverlap);
        if spec.hop != expected {
            return Err(SetupError::Hop {
                expected,
                got: spec.hop,
            });
        }
        Ok(spec)
    }
}

/// What bandwatch computes for a record: the linear average of the spectra
/// of consecutive blocks `hop` apart (Welch's method), and the band values
/// of that average.
pub struct Run {
    pub engine: SpectrumEngine,
    pub averaged: Vec<f32>,
    pub averages: u32,
    /// Each band's value, in the band's unit.
    pub bands: Vec<f64>,
    /// Each band's largest weighted line, Hz.
    pub peak_hz: Vec<f64>,
}

/// Runs the worker's DSP stages over `x`: one `SpectrumEngine::compute` per
/// block, `Averager` (linear, `spec.average_count` blocks), then each
/// `BandPlan` on the averaged spectrum. Uses exactly `average_count` blocks
/// starting at sample 0.
///
/// # Errors
/// `x` is too short for the blocks, or the averager publishes nothing.
pub fn run_stages(spec: &ChannelSpec, x: &[f32]) -> Result<Run, SetupError> {
    let count = spec.average_count as usize;
    let needed = spec.block + count.saturating_sub(1) * spec.hop;
    if x.len() < needed {
        return Err(SetupError::ShortRecord {
            needed,
            given: x.len(),
        });
    }
    let mut engine = SpectrumEngine::new(spec.window, spec.block, spec.nfft, spec.detrend);
    let mut averager = Averager::new(AveragingMode::Linear, spec.average_count, engine.bins());
    let mut p = vec![0f32; engine.bins()];
    let mut ready = false;
    for i in 0..count {
        let start = i * spec.hop;
        engine.compute(&x[start..start + spec.block], &mut p);
        ready = averager.push(&p);
    }
    if !ready {
        return Err(SetupError::NotReady(spec.average_count));
    }
    let averaged = averager.result().to_vec();
    let nbw = engine.noise_bandwidth_lines();
    let (bands, peak_hz) = spec
        .bands
        .iter()
        .map(|b| {
            let v = BandPlan::new(spec, b, nbw).evaluate(&averaged);
            (v.value, v.peak_hz)
        })
        .unzip();
    Ok(Run {
        averages: averager.result_averages(),
        engine,
        averaged,
        bands,
        peak_hz,
    })
}

// ---------------------------------------------------------------------------
// Measurements shared with the reference tests
// ---------------------------------------------------------------------------

/// 20·log10(x).
pub fn db(x: f64) -> f64 {
    20.0 * x.log10()
}

/// Amplitude bandwatch reads for a unit tone `offset` lines above line N/4
/// of a block-N spectrum: √(2·max P) over the lines near the tone (the band
/// `peak` measure), no detrend. The tone sits mid-band because a real tone
/// also has an image at −f whose sidelobes add to the reading: with a
/// rectangular window at line 100 of 4096 that moves the half-line reading
/// by about 0.015 dB; at N/4 the image is N/2 lines away (< 0.002 dB).
///
/// `n` must be at least 32 (a programming constant, never input).
pub fn tone_reading(kind: WindowKind, n: usize, offset: f64) -> f64 {
    let mut e = SpectrumEngine::new(kind, n, n, Detrend::None);
    let mut p = vec![0f32; e.bins()];
    let line = n / 4;
    let f = (line as f64 + offset) * FS / n as f64;
    e.compute(&tone(n, FS, f, 1.0, 0.4), &mut p);
    let max = p[line - 5..=line + 6].iter().cloned().fold(0.0, f32::max) as f64;
    (2.0 * max).sqrt()
}

/// The highest sidelobe of a block-`n` window in dB below its main lobe,
/// measured on the window's own spectrum zero-padded `pad` times (lines
/// 1/pad of a bin apart): a constant input, no detrend, so P[k] is the
/// window's transform. The main lobe ends at the first local minimum after
/// the response has fallen below −6 dB (the flat top's response rises
/// slightly before it falls). Returns the sidelobe level and the main-lobe
/// half-width in bins.
///
/// # Errors
/// No main-lobe edge found (cannot happen for these windows).
pub fn highest_sidelobe_db(
    kind: WindowKind,
    n: usize,
    pad: usize,
) -> Result<(f64, f64), SetupError> {
    let mut e = SpectrumEngine::new(kind, n, n * pad, Detrend::None);
    let mut p = vec![0f32; e.bins()];
    e.compute(&vec![1.0; n], &mut p);
    let dc = p[0] as f64;
    // Undo the one-sided doubling to compare with DC (not doubled).
    let level: Vec<f64> = p
        .iter()
        .enumerate()
        .map(|(k, &v)| v as f64 / if k == 0 { 1.0 } else { 2.0 } / dc)
        .collect();
    let edge = (1..level.len() - 1)
        .find(|&k| level[k] < 0.25 && level[k + 1] >= level[k])
        .ok_or_else(|| SetupError::Measurement("no main-lobe edge".into()))?;
    let side = level[edge..].iter().cloned().fold(0.0, f64::max);
    Ok((10.0 * side.log10(), edge as f64 / pad as f64))
}

/// Band RMS over all lines of a white-noise record (σ = 1, `seed`) against
/// the time-domain RMS of the same samples: block 1024, 64 averages,
/// `noverlap` samples shared. Returns band / time − 1.
///
/// # Errors
/// As [`ChannelSetup::spec`] and [`run_stages`].
pub fn parseval_error(window: &str, noverlap: usize, seed: u64) -> Result<f64, SetupError> {
    let block = 1024;
    let hop = block - noverlap;
    let blocks = 64;
    let n = block + (blocks - 1) * hop;
    let x = SplitMix64(seed).white(n, 1.0);
    let spec = ChannelSetup {
        window,
        block,
        nfft: block,
        noverlap,
        detrend: "mean",
        averages: blocks as u32,
        bands: vec![BandSetup {
            name: "all",
            lo_hz: 0.0,
            hi_hz: FS / 2.0,
            unit: "g",
            measure: "rms",
        }],
    }
    .spec()?;
    let band = run_stages(&spec, &x)?.bands[0];
    let time = stats::overall(&x).rms;
    Ok(band / time - 1.0)
}

/// CRC-32/IEEE computed bit by bit (reflected, polynomial 0xEDB88320, init
/// and final xor 0xFFFFFFFF): an independent reference for the table-driven
/// crc32fast the BWF1 encoder uses.
pub fn crc32_bitwise(data: &[u8]) -> u32 {
    let mut crc = !0u32;
    for &b in data {
        crc ^= u32::from(b);
        for _ in 0..8 {
            crc = if crc & 1 != 0 {
                (crc >> 1) ^ 0xEDB8_8320
            } else {
                crc >> 1
            };
        }
    }
    !crc
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
    let result = setup
        .spec()
        .and_then(|spec| run_stages(&spec, &tone(2048, FS, 120.0 * spec.df_hz(), a, 1.1)));
    match result {
        Ok(r) => {
            let (pk, rms) = (r.bands[0], r.bands[1]);
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
