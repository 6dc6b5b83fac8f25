//! Running speed: from a tachometer pulse train, or from the largest line
//! of a spectrum in a search range with sub-line interpolation.

use std::collections::VecDeque;

/// Edge detector and speed estimator for a once-per-rev (or N-per-rev)
/// pulse train. Rising edges are found with a Schmitt trigger (arm below
/// `threshold − hysteresis`, fire at or above `threshold + hysteresis`);
/// the edge time is interpolated linearly between the two samples that
/// straddle `threshold` (sub-sample timing). Speed is the number of
/// revolutions over the span of the last `average_revs` revolutions.
#[derive(Debug, Clone)]
pub struct TachDetector {
    fs: f64,
    pulses_per_rev: u32,
    threshold: f64,
    hysteresis: f64,
    keep: usize,
    armed: bool,
    prev: Option<(u64, f64)>,
    edges: VecDeque<f64>,
}

impl TachDetector {
    pub fn new(
        fs: f64,
        pulses_per_rev: u32,
        threshold: f64,
        hysteresis: f64,
        average_revs: u32,
    ) -> TachDetector {
        let keep = (average_revs.max(1) * pulses_per_rev.max(1)) as usize + 1;
        TachDetector {
            fs,
            pulses_per_rev: pulses_per_rev.max(1),
            threshold,
            hysteresis: hysteresis.abs(),
            keep,
            armed: false,
            prev: None,
            edges: VecDeque::with_capacity(keep + 1),
        }
    }

    /// A break in the stream: edges before it cannot be paired with edges
    /// after it.
    pub fn reset(&mut self) {
        self.armed = false;
        self.prev = None;
        self.edges.clear();
    }

    /// Feeds consecutive samples whose first has stream index `first`.
    /// Returns how many edges were found.
    pub fn push(&mut self, first: u64, samples: &[f32]) -> usize {
        self.push_each(first, samples, |_, _| {})
    }

    /// As [`TachDetector::push`], calling `on_edge(index, speed)` at each
    /// edge found: `index` is the stream index of the sample that fired it
    /// (the edge is known once that sample is read), `speed` the speed in
    /// Hz with that edge counted (None until two edges are known).
    pub fn push_each(
        &mut self,
        first: u64,
        samples: &[f32],
        mut on_edge: impl FnMut(u64, Option<f64>),
    ) -> usize {
        let mut found = 0;
        let lo = self.threshold - self.hysteresis;
        let hi = self.threshold + self.hysteresis;
        for (i, &x) in samples.iter().enumerate() {
            let idx = first + i as u64;
            let x = x as f64;
            if x <= lo {
                self.armed = true;
            } else if self.armed && x >= hi {
                self.armed = false;
                // Find where the signal crossed the threshold: between the
                // previous sample and this one when they straddle it.
                let t = match self.prev {
                    Some((pi, px)) if pi + 1 == idx && px < self.threshold && x > px => {
                        pi as f64 + (self.threshold - px) / (x - px)
                    }
                    _ => idx as f64,
                };
                if self.edges.len() == self.keep {
                    self.edges.pop_front();
                }
                self.edges.push_back(t / self.fs);
                found += 1;
                on_edge(idx, self.speed_hz());
            }
            self.prev = Some((idx, x));
        }
        found
    }

    /// Shaft speed in Hz, once two edges are known.
    pub fn speed_hz(&self) -> Option<f64> {
        let (first, last) = (self.edges.front()?, self.edges.back()?);
        let pulses = self.edges.len() - 1;
        if pulses == 0 || last <= first {
            return None;
        }
        Some(pulses as f64 / self.pulses_per_rev as f64 / (last - first))
    }

    /// Time of the last edge, seconds of stream time.
    pub fn last_edge_s(&self) -> Option<f64> {
        self.edges.back().copied()
    }
}

/// Refines the position of a spectral peak at line `k` by fitting a
/// parabola through the logarithm of the three lines k−1, k, k+1 (for a
/// Gaussian-like main lobe, as Hann's is near its top, this is the
/// "Gaussian interpolation" of Gasior & Gonzalez, CERN AB-Note-2004-021;
/// on dB magnitudes it is the quadratic interpolation of J. O. Smith,
/// Spectral Audio Signal Processing). `power` is a power spectrum. Returns
/// the fractional line index.
pub fn interpolate_peak(power: &[f32], k: usize) -> f64 {
    if k == 0 || k + 1 >= power.len() {
        return k as f64;
    }
    let l = |i: usize| (power[i] as f64).max(1e-300).ln();
    let (a, b, c) = (l(k - 1), l(k), l(k + 1));
    let den = a - 2.0 * b + c;
    if den >= 0.0 || !den.is_finite() {
        return k as f64;
    }
    let delta = 0.5 * (a - c) / den;
    k as f64 + delta.clamp(-0.5, 0.5)
}

/// The largest line between `lo` and `hi` (inclusive), interpolated.
pub fn track_peak(power: &[f32], lo: usize, hi: usize) -> Option<f64> {
    let hi = hi.min(power.len().checked_sub(1)?);
    if lo > hi {
        return None;
    }
    let (k, _) = power[lo..=hi]
        .iter()
        .enumerate()
        .max_by(|a, b| a.1.total_cmp(b.1))?;
    Some(interpolate_peak(power, lo + k))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn pulse_train_gives_its_rate() {
        // 1 pulse per rev at 24.75 rev/s, fs 25 600: 10 % duty, 0..4 V.
        let fs = 25_600.0;
        let f = 24.75;
        let x: Vec<f32> = (0..51_200)
            .map(|i| {
                let ph = (i as f64 * f / fs).fract();
                if ph < 0.1 {
                    4.0
                } else {
                    0.0
                }
            })
            .collect();
        let mut t = TachDetector::new(fs, 1, 2.0, 0.5, 8);
        t.push(0, &x);
        let s = t.speed_hz().expect("speed");
        assert!((s / f - 1.0).abs() < 1e-3, "{s}");
    }
}
