//! Band measures from a power spectrum.
//!
//! A band takes the lines whose centre frequency lies in [lo, hi] (edges
//! inclusive). Edges are fixed in Hz, or follow the machine's running speed
//! (orders, bearing defect frequencies): then they are recomputed for every
//! spectrum from the current speed. Each line's power is weighted by the
//! squared unit factor of `units::line_factor` (unit conversion, and
//! integration to velocity or displacement with the channel's low cut-off),
//! then:
//!
//! - `rms`: √(Σ P[k]·W[k] / B), B the window's noise bandwidth in lines of
//!   this spectrum (ENBW·nfft/block). Dividing by B undoes the spreading of
//!   power over neighbouring lines that the window causes, so white noise
//!   and a tone both read their true RMS — provided the band is wide enough
//!   to hold the tone's main lobe (3 lines for Hann, 5 for the flat top).
//! - `peak`: √(2·max P[k]·W[k]), the peak amplitude of the largest line.
//!
//! Both report the frequency of the largest weighted line. A band that
//! needs a speed when none is known, or whose edges pass Nyquist at the
//! current speed, has no value: it is reported as out of service, never
//! clipped to what fits.

use std::collections::HashMap;
use std::sync::{Arc, Mutex, OnceLock};

use crate::config::{BandEdges, BandSpec, ChannelSpec, Measure};
use crate::dsp::simd::weighted_sum_max;
use crate::units::{line_factor, Unit};

/// Why a band has no value.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
pub enum BandStatus {
    #[default]
    Ok,
    /// An order band while the running speed is unknown (stale tach).
    NoSpeed,
    /// The band's edges pass Nyquist at the current speed.
    AboveNyquist,
    /// At the current speed the band is narrower than one line.
    NoLine,
    /// The band's lines hold a value past the f32 range (an absurd input,
    /// e.g. a tone of 1e20 units, whose power overflows): no valid value.
    OutOfRange,
}

impl BandStatus {
    pub fn as_str(self) -> &'static str {
        match self {
            BandStatus::Ok => "ok",
            BandStatus::NoSpeed => "no_speed",
            BandStatus::AboveNyquist => "above_nyquist",
            BandStatus::NoLine => "no_line",
            BandStatus::OutOfRange => "out_of_range",
        }
    }
}

/// The value of one band in one spectrum, in the band's unit.
#[derive(Debug, Clone, Copy, Default, PartialEq)]
pub struct BandValue {
    /// NaN unless `status` is `Ok`.
    pub value: f64,
    /// Frequency of the largest (weighted) line in the band.
    pub peak_hz: f64,
    /// Edges used for this value, Hz (lowest and highest for several windows).
    pub lo_hz: f64,
    pub hi_hz: f64,
    pub status: BandStatus,
}

impl BandValue {
    pub fn is_ok(&self) -> bool {
        self.status == BandStatus::Ok
    }
}

/// Power weight per line of the whole spectrum for values in `unit`.
pub fn unit_weights(channel: &ChannelSpec, unit: Unit) -> Vec<f32> {
    let df = channel.df_hz();
    (0..channel.bins())
        .map(|k| {
            let f = line_factor(
                channel.unit,
                unit,
                k as f64 * df,
                channel.integration_low_cut_hz,
            );
            (f * f) as f32
        })
        .collect()
}

/// Weights shared by every band, of every channel, that converts the same
/// unit to the same unit on the same lines: one table in cache for a
/// thousand alike channels, not a thousand. Made once per process (the
/// configuration fixes them), read-only after.
pub fn shared_weights(channel: &ChannelSpec, unit: Unit) -> Arc<[f32]> {
    type Key = (&'static str, &'static str, u64, usize, u64);
    type Table = Mutex<HashMap<Key, Arc<[f32]>>>;
    static TABLES: OnceLock<Table> = OnceLock::new();
    let key = (
        channel.unit.symbol,
        unit.symbol,
        channel.df_hz().to_bits(),
        channel.bins(),
        channel.integration_low_cut_hz.to_bits(),
    );
    let tables = TABLES.get_or_init(|| Mutex::new(HashMap::new()));
    match tables.lock() {
        Ok(mut t) => t
            .entry(key)
            .or_insert_with(|| unit_weights(channel, unit).into())
            .clone(),
        Err(_) => unit_weights(channel, unit).into(),
    }
}

/// Σ p[k]·w[k], and the first index and value of the largest product
/// (`simd::weighted_sum_max`, then a search for the first line holding it:
/// the same product computed the same way gives the same bits).
fn weighted_sum_and_peak(p: &[f32], w: &[f32]) -> (f64, usize, f32) {
    let (sum, top) = weighted_sum_max(p, w);
    let k = p
        .iter()
        .zip(w)
        .position(|(&pv, &wv)| pv * wv == top)
        .unwrap_or(0);
    (sum, k, top)
}

#[derive(Debug, Clone)]
pub struct BandPlan {
    pub measure: Measure,
    edges: BandEdges,
    weights: Arc<[f32]>,
    df_hz: f64,
    nyquist_hz: f64,
    inv_noise_bw: f64,
}

impl BandPlan {
    /// Plans a band of `channel`; `noise_bw_lines` is
    /// `SpectrumEngine::noise_bandwidth_lines`.
    pub fn new(channel: &ChannelSpec, band: &BandSpec, noise_bw_lines: f64) -> BandPlan {
        let weights = shared_weights(channel, band.unit);
        Self::with_weights(channel, band, noise_bw_lines, weights)
    }

    /// As [`new`](Self::new), with the given weights (from [`shared_weights`]).
    pub fn with_weights(
        channel: &ChannelSpec,
        band: &BandSpec,
        noise_bw_lines: f64,
        weights: Arc<[f32]>,
    ) -> BandPlan {
        BandPlan {
            measure: band.measure,
            edges: band.edges.clone(),
            weights,
            df_hz: channel.df_hz(),
            nyquist_hz: channel.nyquist_hz(),
            inv_noise_bw: 1.0 / noise_bw_lines,
        }
    }

    /// Whether the band follows running speed.
    pub fn needs_speed(&self) -> bool {
        matches!(self.edges, BandEdges::Orders { .. })
    }

    /// Evaluates a fixed-Hz band (order bands report `NoSpeed`).
    pub fn evaluate(&self, power: &[f32]) -> BandValue {
        self.evaluate_at(power, None)
    }

    /// Evaluates the band at running speed `speed_hz`.
    pub fn evaluate_at(&self, power: &[f32], speed_hz: Option<f64>) -> BandValue {
        let df = self.df_hz;
        let last_line = power.len().min(self.weights.len()).saturating_sub(1);
        let mut ranges = [(0usize, 0usize); 64];
        let mut n = 0;
        let (lo_hz, hi_hz);
        match &self.edges {
            BandEdges::Hz { lo, hi } => {
                lo_hz = *lo;
                hi_hz = *hi;
                ranges[0] = (((lo / df).ceil() as usize), ((hi / df).floor() as usize));
                n = 1;
            }
            BandEdges::Orders { windows } => {
                let Some(speed) = speed_hz.filter(|s| s.is_finite() && *s > 0.0) else {
                    return BandValue {
                        value: f64::NAN,
                        status: BandStatus::NoSpeed,
                        ..BandValue::default()
                    };
                };
                lo_hz = windows.first().map_or(0.0, |w| w.0 * speed);
                hi_hz = windows.last().map_or(0.0, |w| w.1 * speed);
                if hi_hz > self.nyquist_hz {
                    return BandValue {
                        value: f64::NAN,
                        peak_hz: f64::NAN,
                        lo_hz,
                        hi_hz,
                        status: BandStatus::AboveNyquist,
                    };
                }
                for &(lo, hi) in windows.iter().take(ranges.len()) {
                    let a = (lo * speed / df).ceil() as usize;
                    let b = (hi * speed / df).floor() as usize;
                    if a <= b {
                        ranges[n] = (a, b);
                        n += 1;
                    }
                }
            }
        }
        let ranges = &mut ranges[..n];
        ranges.sort_unstable();
        let mut sum = 0f64;
        let mut best = (usize::MAX, f32::NEG_INFINITY);
        let mut next = 0usize; // first line not yet counted (windows may overlap)
        let mut any = false;
        for &(a, b) in ranges.iter() {
            let a = a.max(next);
            let b = b.min(last_line);
            if a > b {
                continue;
            }
            any = true;
            let (s, k, v) = weighted_sum_and_peak(&power[a..=b], &self.weights[a..=b]);
            sum += s;
            if v > best.1 {
                best = (a + k, v);
            }
            next = b + 1;
        }
        if !any {
            return BandValue {
                value: f64::NAN,
                peak_hz: f64::NAN,
                lo_hz,
                hi_hz,
                status: BandStatus::NoLine,
            };
        }
        let value = match self.measure {
            Measure::Rms => (sum * self.inv_noise_bw).max(0.0).sqrt(),
            Measure::Peak => (2.0 * best.1.max(0.0) as f64).sqrt(),
        };
        // An overflowed line (inf, or NaN from inf − inf in the FFT) must
        // not pass as a value: `max(0.0)` would turn NaN into 0.
        if !(sum.is_finite() && best.1.is_finite() && value.is_finite()) {
            return BandValue {
                value: f64::NAN,
                peak_hz: f64::NAN,
                lo_hz,
                hi_hz,
                status: BandStatus::OutOfRange,
            };
        }
        BandValue {
            value,
            peak_hz: best.0 as f64 * df,
            lo_hz,
            hi_hz,
            status: BandStatus::Ok,
        }
    }
}
