//! Time-domain statistics of a block: mean, RMS, peak, peak-to-peak, crest
//! factor. Sums run in f64 over several independent accumulators so the
//! compiler can keep them in parallel lanes (see `simd`).

use crate::dsp::simd::{moments, vectorized};

/// Independent accumulators of the reductions below: enough to fill the
/// vector lanes of AVX2 (4 × f64) twice over and hide the add latency.
const LANES: usize = 8;

/// Sum of `x` in f64, over independent accumulators.
pub fn sum(x: &[f32]) -> f64 {
    vectorized(
        #[inline(always)]
        || {
            let mut acc = [0f64; LANES];
            let (chunks, rest) = x.as_chunks::<LANES>();
            for c in chunks {
                for (a, &v) in acc.iter_mut().zip(c) {
                    *a += v as f64;
                }
            }
            let tail: f64 = rest.iter().map(|&v| v as f64).sum();
            acc.iter().sum::<f64>() + tail
        },
    )
}

/// Mean of `x` (0 for an empty slice).
pub fn mean(x: &[f32]) -> f64 {
    if x.is_empty() {
        return 0.0;
    }
    sum(x) / x.len() as f64
}

/// Overall levels of one block, in the channel's units.
#[derive(Debug, Clone, Copy, Default, PartialEq)]
pub struct Overall {
    /// Mean (DC) of the block.
    pub mean: f64,
    /// RMS about the mean (the AC RMS a vibration meter shows).
    pub rms: f64,
    /// Largest excursion from the mean.
    pub peak: f64,
    /// max − min.
    pub peak_to_peak: f64,
    /// peak / rms (0 when rms is 0).
    pub crest_factor: f64,
}

pub fn overall(x: &[f32]) -> Overall {
    overall_about(x, mean(x))
}

/// [`overall`] of a block whose mean `m` is already known (one pass).
pub fn overall_about(x: &[f32], m: f64) -> Overall {
    if x.is_empty() {
        return Overall::default();
    }
    // Moments about the mean rounded to f32, then the exact correction
    // for that rounding: Σ(x−m)² = Σd² − n·d̄², d = x − m₃₂.
    let mo = moments(x, m as f32);
    let n = x.len() as f64;
    let rms = if mo.sum.is_finite() && mo.sum2.is_finite() {
        let d_mean = mo.sum / n;
        (mo.sum2 / n - d_mean * d_mean).max(0.0).sqrt()
    } else {
        // The f32 lanes overflowed (|x − m| beyond ~1.8e19 squares past
        // f32::MAX): the same sum in f64, which holds the square of any
        // f32. Rare by nature, so the slower pass costs nothing in steady
        // state.
        let s2: f64 = x.iter().map(|&v| (f64::from(v) - m).powi(2)).sum();
        (s2 / n).sqrt()
    };
    let (min, max) = (f64::from(mo.min), f64::from(mo.max));
    let peak = (max - m).abs().max((min - m).abs());
    Overall {
        mean: m,
        rms,
        peak,
        peak_to_peak: max - min,
        crest_factor: if rms > 0.0 { peak / rms } else { 0.0 },
    }
}

/// Largest excursion from the mean that the f32 path measures: its square
/// is `f32::MAX` (≈ 1.8e19). Past it the power spectrum, kept in f32,
/// overflows and the overall RMS needs the f64 pass of [`overall_about`].
pub const F32_SQUARE_LIMIT: f64 = 1.844_674_3e19;

/// Whether overall levels come from samples beyond what the f32 path
/// measures (an excursion whose square passes `f32::MAX`: the f64 fallback
/// of [`overall_about`]), or are not finite: an absurd input, whose health
/// reason is `out_of_range` (README, "Channel health").
pub fn out_of_range(o: &Overall) -> bool {
    let fields = [o.mean, o.rms, o.peak, o.peak_to_peak, o.crest_factor];
    fields.iter().any(|v| !v.is_finite()) || o.peak >= F32_SQUARE_LIMIT
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn sine_has_crest_factor_root_two() {
        // Common practice: for a sine, peak = √2·RMS, peak-to-peak = 2√2·RMS.
        let n = 1000;
        let x: Vec<f32> = (0..n)
            .map(|i| 1.0 + 3.0 * (2.0 * std::f32::consts::PI * 10.0 * i as f32 / n as f32).sin())
            .collect();
        let o = overall(&x);
        assert!((o.mean - 1.0).abs() < 1e-5);
        assert!((o.rms - 3.0 / 2f64.sqrt()).abs() < 1e-4);
        assert!((o.crest_factor - 2f64.sqrt()).abs() < 1e-3);
        assert!((o.peak_to_peak - 6.0).abs() < 1e-3);
    }

    #[test]
    fn the_whole_f32_range_is_measured() {
        // A square wave of ±3e38 (near f32::MAX): RMS = peak = 3e38, crest
        // factor 1 (common practice: a square wave's crest factor is 1).
        // The f32 lanes overflow on d²; the result must not.
        let x: Vec<f32> = (0..1024)
            .map(|i| if i % 2 == 0 { 3e38 } else { -3e38 })
            .collect();
        let o = overall(&x);
        assert!((o.rms / 3e38 - 1.0).abs() < 1e-6, "rms {}", o.rms);
        assert!((o.peak / 3e38 - 1.0).abs() < 1e-6, "peak {}", o.peak);
        assert!(
            (o.crest_factor - 1.0).abs() < 1e-6,
            "crest {}",
            o.crest_factor
        );
        // A 1e20 tone (its square, 1e40, is past f32::MAX).
        let y: Vec<f32> = (0..1000)
            .map(|i| (1e20 * (2.0 * std::f64::consts::PI * 10.0 * i as f64 / 1000.0).sin()) as f32)
            .collect();
        let o = overall(&y);
        assert!(
            (o.rms / (1e20 / 2f64.sqrt()) - 1.0).abs() < 1e-5,
            "rms {}",
            o.rms
        );
    }

    #[test]
    fn constant_block_has_zero_rms_and_no_crest() {
        let o = overall(&[2.5; 7]);
        assert_eq!(o.rms, 0.0);
        assert_eq!(o.crest_factor, 0.0);
    }
}
