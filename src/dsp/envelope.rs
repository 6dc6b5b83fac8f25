//! Envelope (demodulation) analysis, in the frequency domain.
//!
//! Per block: real FFT of the block (no window, mean removed), keep only the
//! lines in the band-pass [lo, hi] around the resonance, and build the
//! one-sided spectrum of the analytic signal (positive lines ×2, DC and
//! Nyquist ×1, negative frequencies zero, as `scipy.signal.hilbert` does,
//! after Oppenheim & Schafer); an inverse complex FFT gives the analytic
//! signal z, and |z| is the envelope, in the channel's unit (e.g. "g
//! envelope"). The envelope's mean is removed by the spectrum stage that
//! follows (`detrend = mean`), which then windows it and computes its power
//! spectrum like any block.
//!
//! The band-pass acts on a rectangular block, so it is circular: a burst
//! near one end of a block leaks a little into the other end. With blocks
//! many impact periods long this is negligible for the envelope spectrum.

use std::sync::Arc;

use realfft::num_complex::Complex;
use realfft::{RealFftPlanner, RealToComplex};
use rustfft::{Fft, FftPlanner};

pub struct EnvelopeEngine {
    fwd: Arc<dyn RealToComplex<f32>>,
    inv: Arc<dyn Fft<f32>>,
    n: usize,
    lo_line: usize,
    hi_line: usize,
    input: Vec<f32>,
    half: Vec<Complex<f32>>,
    full: Vec<Complex<f32>>,
    scratch_r: Vec<Complex<f32>>,
    scratch_c: Vec<Complex<f32>>,
}

impl EnvelopeEngine {
    /// An engine for blocks of `n` samples at `fs`, band-pass `lo_hz..=hi_hz`.
    pub fn new(n: usize, fs: f64, lo_hz: f64, hi_hz: f64) -> EnvelopeEngine {
        let fwd = RealFftPlanner::<f32>::new().plan_fft_forward(n);
        let inv = FftPlanner::<f32>::new().plan_fft_inverse(n);
        let df = fs / n as f64;
        let nyq = n / 2;
        let lo_line = ((lo_hz / df).ceil() as usize).clamp(1, nyq);
        let hi_line = ((hi_hz / df).floor() as usize).clamp(lo_line, nyq);
        EnvelopeEngine {
            input: fwd.make_input_vec(),
            half: fwd.make_output_vec(),
            scratch_r: fwd.make_scratch_vec(),
            scratch_c: vec![Complex::new(0.0, 0.0); inv.get_inplace_scratch_len()],
            full: vec![Complex::new(0.0, 0.0); n],
            fwd,
            inv,
            n,
            lo_line,
            hi_line,
        }
    }

    /// Writes the envelope of `block` (length n) into `out` (length n).
    ///
    /// # Panics
    /// On wrong slice lengths (a programming error).
    pub fn envelope(&mut self, block: &[f32], out: &mut [f32]) {
        assert_eq!(block.len(), self.n);
        assert_eq!(out.len(), self.n);
        let mean = crate::dsp::stats::mean(block) as f32;
        for (d, &x) in self.input.iter_mut().zip(block) {
            *d = x - mean;
        }
        if self
            .fwd
            .process_with_scratch(&mut self.input, &mut self.half, &mut self.scratch_r)
            .is_err()
        {
            out.fill(f32::NAN);
            return;
        }
        let zero = Complex::new(0.0, 0.0);
        self.full.fill(zero);
        let nyq = self.n / 2;
        for k in self.lo_line..=self.hi_line {
            let gain = if k == 0 || (k == nyq && self.n.is_multiple_of(2)) {
                1.0
            } else {
                2.0
            };
            self.full[k] = self.half[k] * gain;
        }
        self.inv
            .process_with_scratch(&mut self.full, &mut self.scratch_c);
        let scale = 1.0 / self.n as f32;
        for (o, z) in out.iter_mut().zip(&self.full) {
            *o = z.norm() * scale;
        }
    }

    /// The band-pass as lines actually kept: (first, last).
    pub fn lines(&self) -> (usize, usize) {
        (self.lo_line, self.hi_line)
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::f64::consts::PI;

    #[test]
    fn am_carrier_envelope_follows_the_modulation() {
        // Common practice: the envelope of A(1 + m cos 2πfm t)·cos 2πfc t
        // is A(1 + m cos 2πfm t).
        let (n, fs) = (8192, 25_600.0);
        let (fc, fm, m, a) = (3125.0, 100.0, 0.5, 1.0);
        let x: Vec<f32> = (0..n)
            .map(|i| {
                let t = i as f64 / fs;
                (a * (1.0 + m * (2.0 * PI * fm * t).cos()) * (2.0 * PI * fc * t).cos()) as f32
            })
            .collect();
        let mut e = EnvelopeEngine::new(n, fs, 2000.0, 4500.0);
        let mut env = vec![0.0; n];
        e.envelope(&x, &mut env);
        for (i, &v) in env.iter().enumerate().step_by(97) {
            let t = i as f64 / fs;
            let want = a * (1.0 + m * (2.0 * PI * fm * t).cos());
            assert!((v as f64 - want).abs() < 1e-3, "t={t}: {v} vs {want}");
        }
    }
}
