//! One block to one single-sided power spectrum.
//!
//! Scaling: the output is the *amplitude-corrected* power per line in
//! units² (RMS²), one-sided:
//!
//! ```text
//! P[k] = c_k · |X[k]|² / (Σw)²,   c_k = 1 for DC and Nyquist, 2 otherwise
//! ```
//!
//! so a tone of amplitude A centred on a line reads P = A²/2 whatever the
//! window (√P is its RMS, √(2P) its peak). This is scipy.signal.welch's
//! `scaling="spectrum"`. The power of a broadband signal is spread over the
//! window's noise bandwidth, so band power is Σ P[k] / B, with
//! B = ENBW·nfft/block the noise bandwidth in lines of this spectrum, and
//! the density (per Hz) is P[k] / (ENBW·fs/block). See `bands`.
//!
//! The plan is made once; `compute` reuses its buffers and allocates nothing.
//! Plans and windows are shared by every engine of the same length and
//! window kind (read-only after they are made), so a thousand channels keep
//! one set of twiddle factors and coefficients in cache, not a thousand.
//! The FFT's input, output and scratch buffers live only during `compute`,
//! so they belong to the thread, not the channel: a worker's channels take
//! turns on one hot set instead of each dragging its own through the cache.

use std::cell::RefCell;
use std::collections::HashMap;
use std::sync::{Arc, Mutex, OnceLock};

use realfft::num_complex::Complex;
use realfft::{RealFftPlanner, RealToComplex};

use crate::config::Detrend;
use crate::dsp::window::{Window, WindowKind};

/// Forward plans by length, made once per process.
fn plan(nfft: usize) -> Arc<dyn RealToComplex<f32>> {
    static PLANNER: OnceLock<Mutex<RealFftPlanner<f32>>> = OnceLock::new();
    let planner = PLANNER.get_or_init(|| Mutex::new(RealFftPlanner::new()));
    match planner.lock() {
        Ok(mut p) => p.plan_fft_forward(nfft),
        // A panic elsewhere while planning: plan privately rather than fail.
        Err(_) => RealFftPlanner::<f32>::new().plan_fft_forward(nfft),
    }
}

/// Windows by kind and length, made once per process.
fn shared_window(kind: WindowKind, n: usize) -> Arc<Window> {
    type Cache = Mutex<HashMap<(WindowKind, usize), Arc<Window>>>;
    static WINDOWS: OnceLock<Cache> = OnceLock::new();
    let cache = WINDOWS.get_or_init(|| Mutex::new(HashMap::new()));
    match cache.lock() {
        Ok(mut c) => c
            .entry((kind, n))
            .or_insert_with(|| Arc::new(Window::new(kind, n)))
            .clone(),
        Err(_) => Arc::new(Window::new(kind, n)),
    }
}

/// The FFT's temporaries, one set per thread, sized for the last plan used
/// (resizing to a length already held does not allocate).
#[derive(Default)]
struct Temps {
    input: Vec<f32>,
    output: Vec<Complex<f32>>,
    scratch: Vec<Complex<f32>>,
}

thread_local! {
    static TEMPS: RefCell<Temps> = RefCell::new(Temps::default());
}

pub struct SpectrumEngine {
    fft: Arc<dyn RealToComplex<f32>>,
    window: Arc<Window>,
    block: usize,
    nfft: usize,
    detrend: Detrend,
    /// 1/(Σw)², the amplitude correction applied to |X|².
    norm: f32,
}

impl SpectrumEngine {
    /// # Panics
    /// If `nfft < block` or `block == 0`; the config validation rules both out.
    pub fn new(kind: WindowKind, block: usize, nfft: usize, detrend: Detrend) -> SpectrumEngine {
        assert!(block > 0 && nfft >= block, "block {block}, nfft {nfft}");
        let fft = plan(nfft);
        let window = shared_window(kind, block);
        let norm = (1.0 / (window.sum * window.sum)) as f32;
        SpectrumEngine {
            fft,
            window,
            block,
            nfft,
            detrend,
            norm,
        }
    }

    pub fn window(&self) -> &Window {
        &self.window
    }

    pub fn bins(&self) -> usize {
        self.nfft / 2 + 1
    }

    /// Noise bandwidth of the window in lines of this spectrum
    /// (ENBW·nfft/block): the divisor that turns Σ P[k] into band power.
    pub fn noise_bandwidth_lines(&self) -> f64 {
        self.window.enbw_bins() * self.nfft as f64 / self.block as f64
    }

    /// Computes the power spectrum of `block` (length `block`) into `out`
    /// (length nfft/2 + 1).
    ///
    /// # Panics
    /// If the slice lengths are wrong (a programming error, not input).
    pub fn compute(&mut self, block: &[f32], out: &mut [f32]) {
        assert_eq!(block.len(), self.block);
        assert_eq!(out.len(), self.bins());
        TEMPS.with(|t| match t.try_borrow_mut() {
            Ok(mut t) => self.compute_with(block, out, &mut t),
            // Only re-entry could hold the borrow; use private buffers then.
            Err(_) => self.compute_with(block, out, &mut Temps::default()),
        });
    }

    fn compute_with(&self, block: &[f32], out: &mut [f32], t: &mut Temps) {
        let Temps {
            input,
            output,
            scratch,
        } = t;
        input.resize(self.nfft, 0.0);
        output.resize(self.bins(), Complex::default());
        scratch.resize(self.fft.get_scratch_len(), Complex::default());
        let mean = match self.detrend {
            Detrend::None => 0.0,
            Detrend::Mean => crate::dsp::stats::mean(block) as f32,
        };
        for ((dst, &x), &w) in input.iter_mut().zip(block).zip(&self.window.coeffs) {
            *dst = (x - mean) * w;
        }
        input[self.block..].fill(0.0);
        // The lengths come from the plan itself, so this cannot fail.
        if self
            .fft
            .process_with_scratch(input, output, scratch)
            .is_err()
        {
            out.fill(f32::NAN);
            return;
        }
        // Every line doubled in one branch-free (vectorisable) pass, then
        // DC and Nyquist put back: the same products as doubling all but
        // those two.
        let norm = self.norm;
        for (o, x) in out.iter_mut().zip(output.iter()) {
            *o = 2.0 * ((x.re * x.re + x.im * x.im) * norm);
        }
        let last = out.len() - 1;
        for k in [0, last] {
            let x = output[k];
            out[k] = (x.re * x.re + x.im * x.im) * norm;
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::f64::consts::PI;

    fn tone(n: usize, fs: f64, f: f64, a: f64, phase: f64) -> Vec<f32> {
        (0..n)
            .map(|i| (a * (2.0 * PI * f * i as f64 / fs + phase).cos()) as f32)
            .collect()
    }

    #[test]
    fn tone_on_a_line_reads_its_amplitude_with_every_window() {
        // Common practice: a tone at an integer multiple of fs/N falls on one
        // line; with amplitude correction it reads A²/2 for every window
        // (REFERENCES.md, spectral scaling: 'spectrum' peak 0.5 for A = 1).
        let (n, fs) = (1024, 1024.0);
        for kind in WindowKind::ALL {
            let mut e = SpectrumEngine::new(kind, n, n, Detrend::None);
            let mut p = vec![0.0; e.bins()];
            e.compute(&tone(n, fs, 100.0, 2.0, 0.3), &mut p);
            let rms = (p[100] as f64).sqrt();
            let peak = (2.0 * p[100] as f64).sqrt();
            assert!((rms / 2f64.sqrt() - 1.0).abs() < 1e-3, "{kind:?} rms {rms}");
            assert!((peak / 2.0 - 1.0).abs() < 1e-3, "{kind:?} peak {peak}");
        }
    }

    #[test]
    fn off_line_tone_leaks_and_a_rectangular_window_leaks_most() {
        // Common practice: a tone between two lines spreads into its
        // neighbours; a tapered window keeps it nearer (lower sidelobes).
        let (n, fs) = (1024, 1024.0);
        let far = |kind| {
            let mut e = SpectrumEngine::new(kind, n, n, Detrend::None);
            let mut p = vec![0.0; e.bins()];
            e.compute(&tone(n, fs, 100.5, 1.0, 0.0), &mut p);
            assert!(
                p[99] > 1e-3 * p[100],
                "{kind:?}: neighbour line must hold leakage"
            );
            p[120] / p[100]
        };
        let rect = far(WindowKind::Rectangular);
        let hann = far(WindowKind::Hann);
        assert!(rect > 1e-4, "rectangular leakage 20 lines away: {rect}");
        assert!(hann < rect * 1e-2, "hann {hann} vs rectangular {rect}");
    }

    #[test]
    fn dc_and_nyquist_are_not_doubled() {
        let n = 64;
        let mut e = SpectrumEngine::new(WindowKind::Rectangular, n, n, Detrend::None);
        let mut p = vec![0.0; e.bins()];
        let x: Vec<f32> = (0..n)
            .map(|i| 2.0 + if i % 2 == 0 { 1.0 } else { -1.0 })
            .collect();
        e.compute(&x, &mut p);
        assert!((p[0] - 4.0).abs() < 1e-5, "DC {}", p[0]);
        assert!((p[32] - 1.0).abs() < 1e-5, "Nyquist {}", p[32]);
    }
}
