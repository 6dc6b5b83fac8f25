//! The measurements the self-test shares with the reference tests: the
//! published window figures, test signals, a channel built from config
//! text as a user's would be, the DSP stages one by one (`run_stages`) and
//! the daemon's pipeline (`ChannelSetup::run_pipeline`), and a bitwise
//! CRC. `cargo test` and `bandwatch selftest` measure the same things the
//! same way.

use super::*;
use crate::config::fixture::{quoted, Channel, Fixture, Source};

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
pub(super) const HAMMING_SCALLOP_SRC: &str = "scipy 1.17 for 0.54/0.46 (Harris 1978: 1.78)";
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
    /// The config text of a one-channel `sim` setup with these settings
    /// (written by the tests' config fixture, `config::fixture`).
    pub fn config_text(&self) -> String {
        let mut ch = Channel::new("ref", "sim", 0)
            .unit("g")
            .block(self.block)
            .set("nfft", self.nfft.to_string())
            .window(self.window)
            .overlap(self.noverlap as f64 / self.block as f64)
            .set("detrend", quoted(self.detrend))
            .set(
                "averaging",
                format!("{{ mode = \"linear\", count = {} }}", self.averages),
            );
        for b in &self.bands {
            ch = ch.band_with(
                b.name,
                b.lo_hz,
                b.hi_hz,
                &[("unit", quoted(b.unit)), ("measure", quoted(b.measure))],
            );
        }
        Fixture::new()
            .source(Source::new("sim", "sim"))
            .channel(ch)
            .toml()
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

impl ChannelSetup<'_> {
    /// Runs `x` (channel units, from stream index 0) through the daemon's
    /// own pipeline (`pipeline::Builder`: ring, worker DSP with its fused
    /// FFT and averaging, band plans; no alarms) on this thread, and
    /// returns each band's value from the last published result.
    ///
    /// # Errors
    /// The config is refused, or nothing was published.
    pub fn run_pipeline(&self, x: &[f32]) -> Result<Vec<f64>, SetupError> {
        let config = config::parse_str(&self.config_text())
            .map_err(|e| SetupError::Config(format!("{e:?}")))?;
        let mut p = Builder::new(&config)
            .ring(RingSize::Headroom(x.len()))
            .alarms(AlarmMode::Off)
            .assemble()
            .map_err(|e| SetupError::Config(e.to_string()))?
            .inline();
        for mut input in p.take_inputs() {
            input.writer.write(0, 1, x);
        }
        p.drain();
        let ch = p
            .state
            .channels
            .first()
            .ok_or_else(|| SetupError::Config("no channel".into()))?;
        let snap = ch.latest().ok_or(SetupError::NotReady(self.averages))?;
        Ok(snap.bands.iter().map(|b| b.value).collect())
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
