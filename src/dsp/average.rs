//! Averaging of successive power spectra, line by line.
//!
//! - `linear`: the mean of `count` blocks; a result every `count` blocks,
//!   then a fresh start (Welch's method when the blocks overlap).
//! - `exponential`: P̄ₙ = (1−α)P̄ₙ₋₁ + αPₙ with α = 1/min(n, count), so the
//!   first results are plain means and the steady state weighs the newest
//!   block by 1/count (≈ 2·count − 1 equivalent averages); a result every block.
//! - `peak-hold`: the largest value per line over `count` blocks.
//! - `none`: every block as it is.

use crate::config::AveragingMode;
use crate::dsp::simd::vectorized;
use crate::dsp::spectrum::Lines;

/// A power spectrum to average, stored or still as FFT lines.
trait Spectrum {
    /// Sets every `acc[k]` to `op(acc[k], P[k])`.
    fn fold(&self, acc: &mut [f32], op: impl Fn(f32, f32) -> f32 + Copy);
}

struct Stored<'a>(&'a [f32]);

impl Spectrum for Stored<'_> {
    #[inline]
    fn fold(&self, acc: &mut [f32], op: impl Fn(f32, f32) -> f32 + Copy) {
        let p = self.0;
        vectorized(
            #[inline(always)]
            move || {
                for (a, &v) in acc.iter_mut().zip(p) {
                    *a = op(*a, v);
                }
            },
        );
    }
}

struct Power<'a>(&'a Lines<'a>, f32);

impl Spectrum for Power<'_> {
    #[inline]
    fn fold(&self, acc: &mut [f32], op: impl Fn(f32, f32) -> f32 + Copy) {
        self.0.fold_power(self.1, acc, op);
    }
}

pub struct Averager {
    mode: AveragingMode,
    count: u32,
    acc: Vec<f32>,
    n: u32,
    result: Vec<f32>,
    result_averages: u32,
}

impl Averager {
    pub fn new(mode: AveragingMode, count: u32, bins: usize) -> Averager {
        Averager {
            mode,
            count: count.max(1),
            acc: vec![0.0; bins],
            n: 0,
            result: vec![0.0; bins],
            result_averages: 0,
        }
    }

    /// Forgets everything accumulated so far.
    pub fn reset(&mut self) {
        self.n = 0;
        self.acc.fill(0.0);
    }

    /// Adds one power spectrum; returns true when a new result is ready.
    pub fn push(&mut self, p: &[f32]) -> bool {
        self.push_with(Stored(p))
    }

    /// Adds the power spectrum of the FFT lines `x` (see
    /// [`fold_power`]) without storing it first: the power of each line
    /// goes straight into the running average.
    pub fn push_lines(&mut self, x: &Lines<'_>, norm: f32) -> bool {
        self.push_with(Power(x, norm))
    }

    /// The averaging itself, for a spectrum however it is given.
    #[inline]
    fn push_with(&mut self, p: impl Spectrum) -> bool {
        match self.mode {
            AveragingMode::None => {
                p.fold(&mut self.result, |_, v| v);
                self.result_averages = 1;
                true
            }
            AveragingMode::Linear => {
                p.fold(&mut self.acc, |a, v| a + v);
                self.n += 1;
                if self.n < self.count {
                    return false;
                }
                let inv = 1.0 / self.n as f32;
                let (result, acc) = (&mut self.result, &mut self.acc);
                vectorized(
                    #[inline(always)]
                    move || {
                        for (r, a) in result.iter_mut().zip(acc.iter_mut()) {
                            *r = *a * inv;
                            *a = 0.0;
                        }
                    },
                );
                self.result_averages = self.n;
                self.n = 0;
                true
            }
            AveragingMode::Exponential => {
                self.n = (self.n + 1).min(self.count);
                let alpha = 1.0 / self.n as f32;
                if self.n == 1 {
                    p.fold(&mut self.acc, |_, v| v);
                } else {
                    p.fold(&mut self.acc, move |a, v| a + alpha * (v - a));
                }
                self.result.copy_from_slice(&self.acc);
                self.result_averages = self.n;
                true
            }
            AveragingMode::PeakHold => {
                if self.n == 0 {
                    p.fold(&mut self.acc, |_, v| v);
                } else {
                    p.fold(&mut self.acc, |a, v| a.max(v));
                }
                self.n += 1;
                if self.n < self.count {
                    return false;
                }
                self.result.copy_from_slice(&self.acc);
                self.result_averages = self.n;
                self.n = 0;
                true
            }
        }
    }

    /// Whether the next block pushed starts a new average (nothing is
    /// accumulated): after a reset, after a linear or peak-hold result, and
    /// always without averaging. Exponential averaging starts afresh only
    /// after a reset, since every block since then stays in it.
    pub fn is_fresh(&self) -> bool {
        self.n == 0
    }

    /// Blocks still to push before the next result (at least 1).
    pub fn blocks_to_result(&self) -> u32 {
        match self.mode {
            AveragingMode::None | AveragingMode::Exponential => 1,
            AveragingMode::Linear | AveragingMode::PeakHold => {
                self.count.saturating_sub(self.n).max(1)
            }
        }
    }

    /// The latest result.
    pub fn result(&self) -> &[f32] {
        &self.result
    }

    /// How many blocks went into the latest result.
    pub fn result_averages(&self) -> u32 {
        self.result_averages
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn linear_is_the_mean_of_count_blocks() {
        let mut a = Averager::new(AveragingMode::Linear, 3, 2);
        assert!(!a.push(&[1.0, 3.0]));
        assert!(!a.push(&[2.0, 3.0]));
        assert!(a.push(&[3.0, 3.0]));
        assert_eq!(a.result(), &[2.0, 3.0]);
        assert_eq!(a.result_averages(), 3);
        assert!(!a.push(&[9.0, 9.0]));
    }

    #[test]
    fn exponential_starts_as_a_mean_then_weighs_by_one_over_count() {
        let mut a = Averager::new(AveragingMode::Exponential, 2, 1);
        a.push(&[4.0]);
        a.push(&[2.0]);
        assert_eq!(a.result(), &[3.0]);
        a.push(&[1.0]);
        assert_eq!(a.result(), &[2.0]);
    }

    #[test]
    fn peak_hold_keeps_the_maximum() {
        let mut a = Averager::new(AveragingMode::PeakHold, 2, 2);
        a.push(&[1.0, 5.0]);
        assert!(a.push(&[3.0, 2.0]));
        assert_eq!(a.result(), &[3.0, 5.0]);
    }
}
