//! Band measures from a power spectrum.
//!
//! A band takes the lines whose centre frequency lies in [lo_hz, hi_hz]
//! (edges inclusive). Each line's power is first weighted by the squared
//! unit factor of `units::line_factor` (unit conversion, and integration to
//! velocity or displacement with the channel's low cut-off), then:
//!
//! - `rms`: √(Σ P[k]·W[k] / B), B the window's noise bandwidth in lines of
//!   this spectrum (ENBW·nfft/block). Dividing by B undoes the spreading of
//!   power over neighbouring lines that the window causes, so white noise
//!   and a tone both read their true RMS (common practice; the scipy
//!   'spectrum' scaling sums to signal power × ENBW).
//! - `peak`: √(2·max P[k]·W[k]), the peak amplitude of the largest line.
//!
//! Both report the frequency of the largest weighted line.

use crate::config::{BandSpec, ChannelSpec, Measure};
use crate::units::line_factor;

#[derive(Debug, Clone)]
pub struct BandPlan {
    pub measure: Measure,
    /// First line of the band.
    pub first: usize,
    /// Power weight per line, starting at `first`.
    weights: Vec<f32>,
    df_hz: f64,
    inv_noise_bw: f64,
}

/// The value of one band in one spectrum, in the band's unit.
#[derive(Debug, Clone, Copy, Default, PartialEq)]
pub struct BandValue {
    pub value: f64,
    /// Frequency of the largest (weighted) line in the band.
    pub peak_hz: f64,
}

impl BandPlan {
    /// Plans a band of `channel`; `noise_bw_lines` is
    /// `SpectrumEngine::noise_bandwidth_lines`.
    pub fn new(channel: &ChannelSpec, band: &BandSpec, noise_bw_lines: f64) -> BandPlan {
        let df = channel.df_hz();
        let last_bin = channel.bins() - 1;
        let first = ((band.lo_hz / df).ceil() as usize).min(last_bin);
        let last = ((band.hi_hz / df).floor() as usize)
            .min(last_bin)
            .max(first);
        let weights = (first..=last)
            .map(|k| {
                let f = line_factor(
                    channel.unit,
                    band.unit,
                    k as f64 * df,
                    channel.integration_low_cut_hz,
                );
                (f * f) as f32
            })
            .collect();
        BandPlan {
            measure: band.measure,
            first,
            weights,
            df_hz: df,
            inv_noise_bw: 1.0 / noise_bw_lines,
        }
    }

    /// Number of lines in the band.
    pub fn lines(&self) -> usize {
        self.weights.len()
    }

    pub fn evaluate(&self, power: &[f32]) -> BandValue {
        let lines = &power[self.first..self.first + self.weights.len()];
        let mut sum = [0f64; 4];
        let mut best = (0usize, f32::NEG_INFINITY);
        for (i, (&p, &w)) in lines.iter().zip(&self.weights).enumerate() {
            let v = p * w;
            sum[i & 3] += v as f64;
            if v > best.1 {
                best = (i, v);
            }
        }
        let peak_hz = (self.first + best.0) as f64 * self.df_hz;
        let value = match self.measure {
            Measure::Rms => (sum.iter().sum::<f64>() * self.inv_noise_bw)
                .max(0.0)
                .sqrt(),
            Measure::Peak => (2.0 * best.1.max(0.0) as f64).sqrt(),
        };
        BandValue { value, peak_hz }
    }
}
