//! Time-domain statistics of a block: mean, RMS, peak, peak-to-peak, crest
//! factor. Sums run in f64 over several independent accumulators so the
//! compiler can keep them in parallel lanes.

/// Mean of `x` (0 for an empty slice).
pub fn mean(x: &[f32]) -> f64 {
    if x.is_empty() {
        return 0.0;
    }
    let mut acc = [0f64; 4];
    let chunks = x.chunks_exact(4);
    let rest = chunks.remainder();
    for c in chunks {
        for (a, &v) in acc.iter_mut().zip(c) {
            *a += v as f64;
        }
    }
    let tail: f64 = rest.iter().map(|&v| v as f64).sum();
    (acc.iter().sum::<f64>() + tail) / x.len() as f64
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
    if x.is_empty() {
        return Overall::default();
    }
    let m = mean(x);
    let mut sq = [0f64; 4];
    let mut lo = [f32::INFINITY; 4];
    let mut hi = [f32::NEG_INFINITY; 4];
    let chunks = x.chunks_exact(4);
    let rest = chunks.remainder();
    for c in chunks {
        for i in 0..4 {
            let v = c[i];
            let d = v as f64 - m;
            sq[i] += d * d;
            lo[i] = lo[i].min(v);
            hi[i] = hi[i].max(v);
        }
    }
    for &v in rest {
        let d = v as f64 - m;
        sq[0] += d * d;
        lo[0] = lo[0].min(v);
        hi[0] = hi[0].max(v);
    }
    let min = lo.iter().fold(f32::INFINITY, |a, &b| a.min(b)) as f64;
    let max = hi.iter().fold(f32::NEG_INFINITY, |a, &b| a.max(b)) as f64;
    let rms = (sq.iter().sum::<f64>() / x.len() as f64).sqrt();
    let peak = (max - m).abs().max((min - m).abs());
    Overall {
        mean: m,
        rms,
        peak,
        peak_to_peak: max - min,
        crest_factor: if rms > 0.0 { peak / rms } else { 0.0 },
    }
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
    fn constant_block_has_zero_rms_and_no_crest() {
        let o = overall(&[2.5; 7]);
        assert_eq!(o.rms, 0.0);
        assert_eq!(o.crest_factor, 0.0);
    }
}
