//! Band-limited time signals for an operator: the part of a block that lies
//! in one band, by a frequency-domain filter.
//!
//! The block is taken as it is (rectangular, no window: a window would
//! change the signal's amplitude over time), transformed, every line outside
//! [lo, hi] is set to zero, and the inverse transform gives the filtered
//! block. It is an ideal ("brick-wall") filter on a circular block: a tone on
//! a line inside the band passes unchanged and one on a line outside is
//! removed completely, while a tone between lines leaks, as in the spectrum,
//! and the block's two ends wrap into each other. Made for looking at, not
//! for further processing. Allocates: called per HTTP request, never on a
//! DSP thread.

use realfft::num_complex::Complex;
use realfft::RealFftPlanner;

/// Returns the part of `block` (sampled at `fs`) between `lo_hz` and
/// `hi_hz`, lines inclusive.
pub fn band_pass(block: &[f32], fs: f64, lo_hz: f64, hi_hz: f64) -> Vec<f32> {
    band_pass_ranges(block, fs, &[(lo_hz, hi_hz)])
}

/// As [`band_pass`], keeping the lines inside any of `ranges` (Hz).
pub fn band_pass_ranges(block: &[f32], fs: f64, ranges: &[(f64, f64)]) -> Vec<f32> {
    let n = block.len();
    if n < 2 {
        return block.to_vec();
    }
    let mut planner = RealFftPlanner::<f32>::new();
    let fwd = planner.plan_fft_forward(n);
    let inv = planner.plan_fft_inverse(n);
    let mut input = block.to_vec();
    let mut spec = fwd.make_output_vec();
    if fwd.process(&mut input, &mut spec).is_err() {
        return vec![f32::NAN; n];
    }
    let df = fs / n as f64;
    let zero = Complex::new(0.0, 0.0);
    for (k, x) in spec.iter_mut().enumerate() {
        let f = k as f64 * df;
        if !ranges.iter().any(|&(lo, hi)| f >= lo && f <= hi) {
            *x = zero;
        }
    }
    // realfft's inverse wants the DC and Nyquist lines purely real.
    spec[0].im = 0.0;
    if n.is_multiple_of(2) {
        if let Some(last) = spec.last_mut() {
            last.im = 0.0;
        }
    }
    let mut out = inv.make_output_vec();
    if inv.process(&mut spec, &mut out).is_err() {
        return vec![f32::NAN; n];
    }
    let scale = 1.0 / n as f32;
    for v in &mut out {
        *v *= scale;
    }
    out
}
