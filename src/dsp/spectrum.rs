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
use crate::dsp::simd::vectorized;
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
        assert_eq!(out.len(), self.bins());
        let norm = self.norm;
        let done = self.transform(block, None, |x| fold_power(x, norm, out, |_, p| p));
        if !done {
            out.fill(f32::NAN);
        }
    }

    /// 1/(Σw)²: [`fold_power`]'s `norm` for the lines of [`transform`](Self::transform).
    pub fn norm(&self) -> f32 {
        self.norm
    }

    /// Windows `block` into the FFT and hands its one-sided spectrum
    /// X[0..=nfft/2] to `lines`. With detrending on, `mean` is the block's
    /// mean when the caller already has it (the worker sums samples as they
    /// arrive); `None` computes it here. Returns false, without calling
    /// `lines`, only if the FFT refused its buffers (their lengths come from
    /// the plan itself, so this does not happen).
    ///
    /// # Panics
    /// If `block` has the wrong length (a programming error, not input).
    pub fn transform(
        &self,
        block: &[f32],
        mean: Option<f64>,
        lines: impl FnOnce(&[Complex<f32>]),
    ) -> bool {
        assert_eq!(block.len(), self.block);
        let mean = match self.detrend {
            Detrend::None => 0.0,
            Detrend::Mean => mean.unwrap_or_else(|| crate::dsp::stats::mean(block)) as f32,
        };
        TEMPS.with(|t| match t.try_borrow_mut() {
            Ok(mut t) => self.transform_with(block, mean, lines, &mut t),
            // Only re-entry could hold the borrow; use private buffers then.
            Err(_) => self.transform_with(block, mean, lines, &mut Temps::default()),
        })
    }

    fn transform_with(
        &self,
        block: &[f32],
        mean: f32,
        lines: impl FnOnce(&[Complex<f32>]),
        t: &mut Temps,
    ) -> bool {
        let Temps {
            input,
            output,
            scratch,
        } = t;
        input.resize(self.nfft, 0.0);
        output.resize(self.bins(), Complex::default());
        scratch.resize(self.fft.get_scratch_len(), Complex::default());
        // The window fused into the copy out of the block.
        let coeffs = &self.window.coeffs;
        vectorized(
            #[inline(always)]
            || {
                for ((dst, &x), &w) in input.iter_mut().zip(block).zip(coeffs) {
                    *dst = (x - mean) * w;
                }
            },
        );
        input[self.block..].fill(0.0);
        if self
            .fft
            .process_with_scratch(input, output, scratch)
            .is_err()
        {
            return false;
        }
        lines(output);
        true
    }
}

/// Folds the one-sided power of the lines `x` into `acc`, line by line:
/// `acc[k] = op(acc[k], P[k])` with P[k] = c_k·|X[k]|²·norm (c_k = 1 at DC
/// and Nyquist, 2 between). Power is computed where it is used, so no
/// power spectrum is stored between the FFT and the averager.
///
/// # Panics
/// If `acc` is not as long as `x` (a programming error).
#[inline]
pub fn fold_power(
    x: &[Complex<f32>],
    norm: f32,
    acc: &mut [f32],
    op: impl Fn(f32, f32) -> f32 + Copy,
) {
    assert_eq!(x.len(), acc.len());
    let n = x.len();
    if n == 0 {
        return;
    }
    let line = move |c: Complex<f32>| (c.re * c.re + c.im * c.im) * norm;
    acc[0] = op(acc[0], line(x[0]));
    if n == 1 {
        return;
    }
    // Between DC and Nyquist every line is doubled: one branch-free,
    // vectorisable pass (values, not references, inside the loop, so that
    // nothing is reloaded per line).
    let (mid, xs) = (&mut acc[1..n - 1], &x[1..n - 1]);
    vectorized(
        #[inline(always)]
        move || {
            for (a, &c) in mid.iter_mut().zip(xs) {
                *a = op(*a, 2.0 * line(c));
            }
        },
    );
    acc[n - 1] = op(acc[n - 1], line(x[n - 1]));
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
