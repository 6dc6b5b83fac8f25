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
    /// Real input (realfft, odd lengths).
    input: Vec<f32>,
    /// Packed input (split form): sample 2m in .re, 2m + 1 in .im.
    packed: Vec<Complex<f32>>,
    output: Vec<Complex<f32>>,
    scratch: Vec<Complex<f32>>,
}

/// Complex forward plans of length n (for the split form's N/2), made once
/// per process.
fn half_plan(n: usize) -> Arc<dyn rustfft::Fft<f32>> {
    static PLANNER: OnceLock<Mutex<rustfft::FftPlanner<f32>>> = OnceLock::new();
    let planner = PLANNER.get_or_init(|| Mutex::new(rustfft::FftPlanner::new()));
    match planner.lock() {
        Ok(mut p) => p.plan_fft_forward(n),
        Err(_) => rustfft::FftPlanner::<f32>::new().plan_fft_forward(n),
    }
}

/// How the real FFT is done.
enum RealFft {
    /// Even N ≥ 4: the N real samples packed as N/2 complex ones, a complex
    /// FFT of N/2 (rustfft), and the split step that turns its output Z
    /// into the lines X[k] done here, fused with the power and the
    /// averaging (see [`Lines::fold_power`]). This is the textbook
    /// real-input FFT (as realfft does it), with the split step vectorised
    /// and X never stored.
    Split {
        fft: Arc<dyn rustfft::Fft<f32>>,
        /// ½·e^(−2πik/N) for k = 1 ..= the last line pair.
        twiddles: Arc<[Complex<f32>]>,
    },
    /// Odd N: realfft.
    Real(Arc<dyn RealToComplex<f32>>),
}

/// The split twiddles of an even length `n`, made once per length.
fn split_twiddles(n: usize) -> Arc<[Complex<f32>]> {
    type Cache = Mutex<HashMap<usize, Arc<[Complex<f32>]>>>;
    static TWIDDLES: OnceLock<Cache> = OnceLock::new();
    let make = || -> Arc<[Complex<f32>]> {
        let pairs = n.div_ceil(4) - 1;
        (1..=pairs)
            .map(|k| {
                let a = -2.0 * std::f64::consts::PI * k as f64 / n as f64;
                Complex::new((0.5 * a.cos()) as f32, (0.5 * a.sin()) as f32)
            })
            .collect()
    };
    let cache = TWIDDLES.get_or_init(|| Mutex::new(HashMap::new()));
    match cache.lock() {
        Ok(mut c) => c.entry(n).or_insert_with(make).clone(),
        Err(_) => make(),
    }
}

/// One spectrum's lines as [`SpectrumEngine::transform`] hands them over.
pub enum Lines<'a> {
    /// X[0 ..= nfft/2] itself, and nfft.
    Full(&'a [Complex<f32>], usize),
    /// Z, the N/2-point FFT of the packed block, and the split twiddles:
    /// each X[k] is formed, with X[N/2 − k], where it is used.
    Split {
        z: &'a [Complex<f32>],
        twiddles: &'a [Complex<f32>],
    },
}

impl Lines<'_> {
    /// Number of lines (nfft/2 + 1).
    pub fn len(&self) -> usize {
        match self {
            Lines::Full(x, _) => x.len(),
            Lines::Split { z, .. } => z.len() + 1,
        }
    }

    pub fn is_empty(&self) -> bool {
        self.len() == 0
    }

    /// Folds the one-sided power of the lines into `acc`, line by line:
    /// `acc[k] = op(acc[k], P[k])`, P[k] = c_k·|X[k]|²·norm with c_k = 1 at
    /// DC and Nyquist, 2 between (see [`fold_power`]).
    ///
    /// # Panics
    /// If `acc` is not [`len`](Self::len) long (a programming error).
    #[inline]
    pub fn fold_power(&self, norm: f32, acc: &mut [f32], op: impl Fn(f32, f32) -> f32 + Copy) {
        match *self {
            Lines::Full(x, nfft) => fold_power(x, nfft, norm, acc, op),
            Lines::Split { z, twiddles } => fold_split_power(z, twiddles, norm, acc, op),
        }
    }
}

/// The split step and the power, fused: from Z (N/2 points) and the
/// twiddles t_k = ½·e^(−2πik/N), for each pair of lines k and N/2 − k
///
/// ```text
/// s = Z[k] + Z[N/2−k],  d = Z[k] − Z[N/2−k]
/// a = s.im·t.re + d.re·t.im,  b = s.im·t.im − d.re·t.re
/// X[k]     = ( s.re/2 + a,  d.im/2 + b)
/// X[N/2−k] = ( s.re/2 − a,  b − d.im/2)
/// ```
///
/// with X[0] = Z[0].re + Z[0].im, X[N/2] = Z[0].re − Z[0].im (both real)
/// and, when N/2 is even, X[N/4] = conj(Z[N/4]).
fn fold_split_power(
    z: &[Complex<f32>],
    twiddles: &[Complex<f32>],
    norm: f32,
    acc: &mut [f32],
    op: impl Fn(f32, f32) -> f32 + Copy,
) {
    let n2 = z.len();
    assert_eq!(acc.len(), n2 + 1);
    if n2 == 0 {
        return;
    }
    let m = twiddles.len();
    assert!(2 * m < n2, "{m} twiddles for {n2} points");
    let (z0re, z0im) = (z[0].re, z[0].im);
    let dc = z0re + z0im;
    let nyq = z0re - z0im;
    acc[0] = op(acc[0], (dc * dc) * norm);
    acc[n2] = op(acc[n2], (nyq * nyq) * norm);
    if n2.is_multiple_of(2) {
        let c = z[n2 / 2];
        acc[n2 / 2] = op(acc[n2 / 2], 2.0 * ((c.re * c.re + c.im * c.im) * norm));
    }
    // Lines 1..=m from the front, N/2−1 down to N/2−m from the back.
    let (front, back) = acc.split_at_mut(m + 1);
    let front = &mut front[1..];
    let back = &mut back[n2 - 2 * m - 1..n2 - m - 1];
    let (zf, zb) = (&z[1..=m], &z[n2 - m..n2]);
    vectorized(
        #[inline(always)]
        move || {
            for ((((t, &zk), &zn), ak), an) in twiddles
                .iter()
                .zip(zf)
                .zip(zb.iter().rev())
                .zip(front.iter_mut())
                .zip(back.iter_mut().rev())
            {
                let (sre, sim) = (zk.re + zn.re, zk.im + zn.im);
                let (dre, dim) = (zk.re - zn.re, zk.im - zn.im);
                let a = sim * t.re + dre * t.im;
                let b = sim * t.im - dre * t.re;
                let (hs, hd) = (0.5 * sre, 0.5 * dim);
                let (xr, xi) = (hs + a, hd + b);
                let (yr, yi) = (hs - a, b - hd);
                *ak = op(*ak, 2.0 * ((xr * xr + xi * xi) * norm));
                *an = op(*an, 2.0 * ((yr * yr + yi * yi) * norm));
            }
        },
    );
}

thread_local! {
    static TEMPS: RefCell<Temps> = RefCell::new(Temps::default());
}

pub struct SpectrumEngine {
    fft: RealFft,
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
        let fft = if nfft >= 4 && nfft.is_multiple_of(2) {
            RealFft::Split {
                fft: half_plan(nfft / 2),
                twiddles: split_twiddles(nfft),
            }
        } else {
            RealFft::Real(plan(nfft))
        };
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
        let done = self.transform(block, None, |x| x.fold_power(norm, out, |_, p| p));
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
        lines: impl FnOnce(Lines<'_>),
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
        lines: impl FnOnce(Lines<'_>),
        t: &mut Temps,
    ) -> bool {
        let Temps {
            input,
            packed,
            output,
            scratch,
        } = t;
        match &self.fft {
            RealFft::Split { fft, twiddles } => {
                let n2 = self.nfft / 2;
                packed.resize(n2, Complex::default());
                output.resize(n2, Complex::default());
                scratch.resize(fft.get_outofplace_scratch_len(), Complex::default());
                // Complex<f32> is two f32 (re, im): the packed input is the
                // windowed block itself, sample 2m in .re and 2m + 1 in .im.
                let flat: &mut [f32] = pulp::bytemuck::cast_slice_mut(packed.as_mut_slice());
                self.window_into(block, mean, flat);
                fft.process_outofplace_with_scratch(packed, output, scratch);
                lines(Lines::Split {
                    z: output,
                    twiddles,
                });
                true
            }
            RealFft::Real(fft) => {
                input.resize(self.nfft, 0.0);
                output.resize(self.bins(), Complex::default());
                scratch.resize(fft.get_scratch_len(), Complex::default());
                self.window_into(block, mean, input);
                if fft.process_with_scratch(input, output, scratch).is_err() {
                    return false;
                }
                lines(Lines::Full(output, self.nfft));
                true
            }
        }
    }

    /// `dst[i] = (block[i] − mean)·w[i]`, then zeros (padding) to its end:
    /// the window fused into the copy out of the block.
    fn window_into(&self, block: &[f32], mean: f32, dst: &mut [f32]) {
        let coeffs = &self.window.coeffs;
        let (head, pad) = dst.split_at_mut(self.block.min(dst.len()));
        vectorized(
            #[inline(always)]
            || {
                for ((d, &x), &w) in head.iter_mut().zip(block).zip(coeffs) {
                    *d = (x - mean) * w;
                }
            },
        );
        pad.fill(0.0);
    }
}

/// Folds the one-sided power of the lines `x` (of an `nfft`-point real
/// FFT) into `acc`, line by line: `acc[k] = op(acc[k], P[k])` with
/// P[k] = c_k·|X[k]|²·norm, c_k = 1 at DC and (even `nfft` only) at
/// Nyquist, 2 for every other line: with an odd `nfft` the last line is
/// not Nyquist and has its mirror image, so it is doubled too. Power is
/// computed where it is used, so no power spectrum is stored between the
/// FFT and the averager.
///
/// # Panics
/// If `acc` is not as long as `x` (a programming error).
#[inline]
pub fn fold_power(
    x: &[Complex<f32>],
    nfft: usize,
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
    let last = if nfft.is_multiple_of(2) { 1.0 } else { 2.0 };
    acc[n - 1] = op(acc[n - 1], last * line(x[n - 1]));
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
    fn split_form_matches_realfft_line_by_line() {
        // realfft (crates.io) is the reference for the split step: the same
        // block through realfft's forward transform, power formed from its
        // X[k], must match line by line, for N = 4k and N = 4k + 2 and, with
        // zero padding, for a block shorter than N; an odd N uses realfft
        // itself.
        for (block, nfft) in [
            (1024, 1024),
            (1022, 1022),
            (1000, 1030),
            (6, 6),
            (4, 4),
            (255, 255),
        ] {
            let x: Vec<f32> = (0..block)
                .map(|i| ((i * 7919 + 13) % 1009) as f32 / 1009.0 - 0.4 + (i as f32 * 0.3).sin())
                .collect();
            let mut e = SpectrumEngine::new(WindowKind::Hann, block, nfft, Detrend::None);
            let mut p = vec![0.0; e.bins()];
            e.compute(&x, &mut p);
            let w = Window::new(WindowKind::Hann, block);
            let mut input: Vec<f32> = x.iter().zip(&w.coeffs).map(|(a, b)| a * b).collect();
            input.resize(nfft, 0.0);
            let r2c = RealFftPlanner::<f32>::new().plan_fft_forward(nfft);
            let mut out = r2c.make_output_vec();
            r2c.process(&mut input, &mut out).expect("realfft");
            let norm = (1.0 / (w.sum * w.sum)) as f32;
            let peak = p.iter().cloned().fold(0.0f32, f32::max);
            for (k, (&got, c)) in p.iter().zip(&out).enumerate() {
                let edge = k == 0 || (nfft % 2 == 0 && k == nfft / 2);
                let want = (c.re * c.re + c.im * c.im) * norm * if edge { 1.0 } else { 2.0 };
                assert!(
                    (got - want).abs() <= 1e-5 * want.abs() + 1e-6 * peak,
                    "N={nfft} line {k}: {got} vs realfft {want}"
                );
            }
        }
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
