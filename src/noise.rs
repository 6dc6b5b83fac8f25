//! A small fixed-seed noise generator shared by the simulator and the
//! self-test, so every run of either sees the same noise.

use std::f64::consts::PI;

/// SplitMix64 (Steele, Lea & Flood, "Fast splittable pseudorandom number
/// generators", OOPSLA 2014), with Box–Muller for Gaussian samples: a small
/// fixed-seed generator, so every run sees the same noise.
#[derive(Debug, Clone)]
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
        (-2.0 * u1.ln()).sqrt() * (2.0 * PI * u2).cos()
    }

    /// `n` samples of Gaussian white noise with standard deviation `sigma`.
    pub fn white(&mut self, n: usize, sigma: f64) -> Vec<f32> {
        (0..n).map(|_| (sigma * self.normal()) as f32).collect()
    }
}
