//! Helpers shared by the reference tests (`tests/reference_*.rs`), included
//! with `#[path]` so that they are not a test crate of their own.
#![allow(dead_code)]

use bandwatch::config::{parse_str, AveragingMode, ChannelSpec};
use bandwatch::dsp::average::Averager;
use bandwatch::dsp::bands::BandPlan;
use bandwatch::dsp::spectrum::SpectrumEngine;

/// Sample rate of the built-in source, which `parse_str` assigns to every
/// channel of a `sim` source (DESIGN.md: 25 600 Hz).
pub const FS: f64 = 25_600.0;

/// A band to put on a test channel.
pub struct Band<'a> {
    pub name: &'a str,
    pub lo_hz: f64,
    pub hi_hz: f64,
    /// "g", "mm/s", …; the channel is in g.
    pub unit: &'a str,
    /// "rms" or "peak".
    pub measure: &'a str,
}

/// Settings of a test channel, written out as bandwatch config text.
pub struct Chan<'a> {
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
    pub bands: Vec<Band<'a>>,
}

impl Chan<'_> {
    /// Builds the channel the way the daemon does: TOML text through
    /// `config::parse_str`, so the hop, line spacing and band lines are the
    /// ones a user's config would get.
    pub fn spec(&self) -> ChannelSpec {
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
            text.push_str(&format!(
                "\n[[channel.band]]\nname = \"{}\"\nlo_hz = {:?}\nhi_hz = {:?}\nunit = \"{}\"\nmeasure = \"{}\"\n",
                b.name, b.lo_hz, b.hi_hz, b.unit, b.measure
            ));
        }
        let config = parse_str(&text).unwrap_or_else(|e| panic!("config {text}: {e:?}"));
        let spec = config.channels.into_iter().next().expect("one channel");
        assert_eq!(
            spec.hop,
            self.block - self.noverlap,
            "hop of the test channel"
        );
        spec
    }
}

/// What bandwatch computes for a record: the linear average of the
/// spectra of consecutive blocks `hop` apart (Welch's method), and the
/// band values of that average.
pub struct Run {
    pub engine: SpectrumEngine,
    pub averaged: Vec<f32>,
    pub averages: u32,
    pub bands: Vec<f64>,
}

/// Runs bandwatch's DSP stages over `x` as the worker does: one
/// `SpectrumEngine::compute` per block, `Averager` (linear, count blocks),
/// then each `BandPlan` on the averaged spectrum. Uses exactly
/// `spec.average_count` blocks starting at sample 0.
pub fn run(spec: &ChannelSpec, x: &[f32]) -> Run {
    let mut engine = SpectrumEngine::new(spec.window, spec.block, spec.nfft, spec.detrend);
    let mut averager = Averager::new(AveragingMode::Linear, spec.average_count, engine.bins());
    let mut p = vec![0f32; engine.bins()];
    let mut ready = false;
    for i in 0..spec.average_count as usize {
        let start = i * spec.hop;
        engine.compute(&x[start..start + spec.block], &mut p);
        ready = averager.push(&p);
    }
    assert!(ready, "averager must publish after count blocks");
    let averaged = averager.result().to_vec();
    let nbw = engine.noise_bandwidth_lines();
    let bands = spec
        .bands
        .iter()
        .map(|b| BandPlan::new(spec, b, nbw).evaluate(&averaged).value)
        .collect();
    Run {
        averages: averager.result_averages(),
        engine,
        averaged,
        bands,
    }
}

/// Decodes float32 samples written as big-endian bit patterns in hex
/// (8 characters a sample), the fixtures' exact encoding.
pub fn f32_from_hex(hex: &str) -> Vec<f32> {
    assert_eq!(hex.len() % 8, 0, "hex length");
    (0..hex.len() / 8)
        .map(|i| {
            let bits = u32::from_str_radix(&hex[8 * i..8 * i + 8], 16).expect("hex digit");
            f32::from_bits(bits)
        })
        .collect()
}

/// SplitMix64 (Steele, Lea & Flood, "Fast splittable pseudorandom number
/// generators", OOPSLA 2014), with Box–Muller for Gaussian samples: a
/// small fixed-seed generator so the statistical tests need no extra crate.
pub struct SplitMix64(pub u64);

impl SplitMix64 {
    pub fn next_u64(&mut self) -> u64 {
        self.0 = self.0.wrapping_add(0x9E37_79B9_7F4A_7C15);
        let mut z = self.0;
        z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
        z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
        z ^ (z >> 31)
    }

    /// Uniform in (0, 1]: never 0, so ln() is finite.
    pub fn uniform(&mut self) -> f64 {
        ((self.next_u64() >> 11) as f64 + 1.0) / (1u64 << 53) as f64
    }

    /// Standard normal by Box–Muller (one of the pair is used).
    pub fn normal(&mut self) -> f64 {
        let (u1, u2) = (self.uniform(), self.uniform());
        (-2.0 * u1.ln()).sqrt() * (2.0 * std::f64::consts::PI * u2).cos()
    }

    /// `n` samples of Gaussian white noise with standard deviation `sigma`.
    pub fn white(&mut self, n: usize, sigma: f64) -> Vec<f32> {
        (0..n).map(|_| (sigma * self.normal()) as f32).collect()
    }
}

/// `a·cos(2πf·i/fs + phase)` for i in 0..n, computed in f64.
pub fn tone(n: usize, fs: f64, f: f64, a: f64, phase: f64) -> Vec<f32> {
    (0..n)
        .map(|i| (a * (2.0 * std::f64::consts::PI * f * i as f64 / fs + phase).cos()) as f32)
        .collect()
}
