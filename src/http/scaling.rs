//! Pure conversions from a snapshot's power spectrum to what a client asked
//! for: a scaling, a unit and a frequency range. No I/O; tested on literals.
//!
//! The snapshot holds the amplitude-corrected one-sided power P per line in
//! units² (see `dsp::spectrum`): a tone centred on a line reads P = A²/2.
//! From it (common practice for sine amplitudes):
//!
//! | scaling        | value            | unit        |
//! |----------------|------------------|-------------|
//! | `rms`          | √P               | u           |
//! | `peak`         | √(2P)            | u           |
//! | `peak-to-peak` | 2·√(2P)          | u           |
//! | `power`        | P                | u^2         |
//! | `psd`          | P / B            | u^2/Hz      |
//!
//! with B the window's noise bandwidth in Hz (ENBW·fs/block), as
//! scipy.signal.welch relates its 'spectrum' and 'density' scalings.
//!
//! A unit other than the channel's is reached line by line with
//! `units::line_factor` (unit conversion, integration below the channel's
//! low cut-off zeroed): amplitudes are multiplied by the factor, powers and
//! densities by its square.

use std::ops::RangeInclusive;

use crate::units::{line_factor, Unit};

/// How each spectral line is expressed.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Scaling {
    Rms,
    Peak,
    PeakToPeak,
    Power,
    Psd,
}

impl Scaling {
    pub const ALL: [Scaling; 5] = [
        Scaling::Rms,
        Scaling::Peak,
        Scaling::PeakToPeak,
        Scaling::Power,
        Scaling::Psd,
    ];

    pub fn parse(s: &str) -> Option<Scaling> {
        Scaling::ALL.into_iter().find(|x| x.as_str() == s)
    }

    pub fn as_str(self) -> &'static str {
        match self {
            Scaling::Rms => "rms",
            Scaling::Peak => "peak",
            Scaling::PeakToPeak => "peak-to-peak",
            Scaling::Power => "power",
            Scaling::Psd => "psd",
        }
    }

    /// Every accepted value, for error messages.
    pub fn known() -> String {
        Scaling::ALL.map(Scaling::as_str).join(", ")
    }

    /// The unit string of values in this scaling, for a spectrum in `unit`:
    /// `g`, `g^2`, `g^2/Hz`; compound symbols are bracketed: `(mm/s)^2/Hz`.
    pub fn unit_label(self, unit: Unit) -> String {
        let sym = unit.symbol;
        let squared = if sym.contains(['/', '^']) {
            format!("({sym})^2")
        } else {
            format!("{sym}^2")
        };
        match self {
            Scaling::Rms | Scaling::Peak | Scaling::PeakToPeak => sym.to_string(),
            Scaling::Power => squared,
            Scaling::Psd => squared + "/Hz",
        }
    }

    /// The value of one line of power `p` (already in the target unit²).
    fn apply(self, p: f64, inv_noise_bw_hz: f64) -> f64 {
        let p = p.max(0.0);
        match self {
            Scaling::Rms => p.sqrt(),
            Scaling::Peak => (2.0 * p).sqrt(),
            Scaling::PeakToPeak => 2.0 * (2.0 * p).sqrt(),
            Scaling::Power => p,
            Scaling::Psd => p * inv_noise_bw_hz,
        }
    }
}

/// Why a frequency range was refused.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum RangeError {
    #[error("{name}={value} is not a finite frequency in Hz")]
    NotFinite { name: &'static str, value: f64 },
    #[error("{name}={value} Hz is outside 0 to Nyquist {nyquist_hz} Hz")]
    OutOfRange {
        name: &'static str,
        value: f64,
        nyquist_hz: f64,
    },
    #[error("fmin={fmin} Hz is above fmax={fmax} Hz")]
    Inverted { fmin: f64, fmax: f64 },
    #[error("{fmin}–{fmax} Hz holds no spectral line (lines are {df_hz} Hz apart)")]
    Empty { fmin: f64, fmax: f64, df_hz: f64 },
}

/// Lines whose frequency k·df lies in [fmin, fmax] (edges inclusive, with a
/// relative slack of 1e-9 line so an edge typed as a line frequency keeps
/// that line). `None` means the whole spectrum edge.
pub fn line_range(
    fmin: Option<f64>,
    fmax: Option<f64>,
    df_hz: f64,
    bins: usize,
) -> Result<RangeInclusive<usize>, RangeError> {
    let nyquist_hz = df_hz * bins.saturating_sub(1) as f64;
    let check = |name: &'static str, v: f64| {
        if !v.is_finite() {
            Err(RangeError::NotFinite { name, value: v })
        } else if !(0.0..=nyquist_hz * (1.0 + 1e-12)).contains(&v) {
            Err(RangeError::OutOfRange {
                name,
                value: v,
                nyquist_hz,
            })
        } else {
            Ok(v)
        }
    };
    let lo = fmin.map(|v| check("fmin", v)).transpose()?.unwrap_or(0.0);
    let hi = fmax
        .map(|v| check("fmax", v))
        .transpose()?
        .unwrap_or(nyquist_hz);
    if lo > hi {
        return Err(RangeError::Inverted { fmin: lo, fmax: hi });
    }
    let last_bin = bins.saturating_sub(1);
    let first = (lo / df_hz - 1e-9).ceil().max(0.0) as usize;
    let last = ((hi / df_hz + 1e-9).floor().max(0.0) as usize).min(last_bin);
    if bins == 0 || first > last {
        return Err(RangeError::Empty {
            fmin: lo,
            fmax: hi,
            df_hz,
        });
    }
    Ok(first..=last)
}

/// What a spectrum request resolves to.
#[derive(Debug, Clone, Copy)]
pub struct Conversion {
    pub scaling: Scaling,
    /// The channel's unit (that of `power`).
    pub from: Unit,
    /// The unit asked for.
    pub to: Unit,
    /// Lines below this are zeroed when integrating.
    pub low_cut_hz: f64,
    /// Line spacing fs/nfft.
    pub df_hz: f64,
    /// Noise bandwidth of the window in Hz (for `psd`).
    pub noise_bw_hz: f64,
}

impl Conversion {
    /// Converts the lines `range` of `power`; lines missing from `power`
    /// are skipped (the range is clamped to its length).
    pub fn apply(&self, power: &[f32], range: RangeInclusive<usize>) -> Vec<f32> {
        let (first, last) = (*range.start(), *range.end());
        let Some(lines) = power.get(first..=last.min(power.len().saturating_sub(1))) else {
            return Vec::new();
        };
        let inv_nbw = 1.0 / self.noise_bw_hz;
        let same = self.from == self.to;
        lines
            .iter()
            .enumerate()
            .map(|(i, &p)| {
                let p = p as f64;
                let p = if same {
                    p
                } else {
                    let f = line_factor(
                        self.from,
                        self.to,
                        (first + i) as f64 * self.df_hz,
                        self.low_cut_hz,
                    );
                    p * f * f
                };
                self.scaling.apply(p, inv_nbw) as f32
            })
            .collect()
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn u(s: &str) -> Unit {
        Unit::parse(s).expect("known unit")
    }

    fn conv(scaling: Scaling, to: &str) -> Conversion {
        Conversion {
            scaling,
            from: u("g"),
            to: u(to),
            low_cut_hz: 5.0,
            df_hz: 1.0,
            noise_bw_hz: 1.5,
        }
    }

    #[test]
    fn sine_scalings_from_power() {
        // Common practice: a tone of amplitude A has power A²/2, RMS A/√2,
        // peak A, peak-to-peak 2A. P = 0.5 g² is the A = 1 g tone.
        let p = [0.5f32];
        let get = |s| conv(s, "g").apply(&p, 0..=0)[0] as f64;
        assert!((get(Scaling::Rms) - std::f64::consts::FRAC_1_SQRT_2).abs() < 1e-6);
        assert!((get(Scaling::Peak) - 1.0).abs() < 1e-6);
        assert!((get(Scaling::PeakToPeak) - 2.0).abs() < 1e-6);
        assert!((get(Scaling::Power) - 0.5).abs() < 1e-7);
        // Density = power / noise bandwidth (scipy 'density' vs 'spectrum':
        // ratio ENBW·Δf); with B = 1.5 Hz (Hann, 1 Hz lines) 0.3333 g²/Hz,
        // the Hann figure of REFERENCES.md [lib].
        assert!((get(Scaling::Psd) - 1.0 / 3.0).abs() < 1e-6);
    }

    #[test]
    fn acceleration_line_to_velocity() {
        // Common practice (REFERENCES.md): 1 g RMS at 159.155 Hz
        // (ω = 1000 rad/s) is 9.80665 mm/s RMS. Place that line at k = 1
        // with df = 159.1549 Hz; P = 1 g² is 1 g RMS.
        let df = 1000.0 / (2.0 * std::f64::consts::PI);
        let c = Conversion {
            df_hz: df,
            ..conv(Scaling::Rms, "mm/s")
        };
        let v = c.apply(&[0.0, 1.0], 0..=1);
        assert_eq!(v[0], 0.0, "DC is zero once integrated");
        assert!((v[1] as f64 - 9.80665).abs() < 1e-4, "{}", v[1]);
        // Power scales by the square of the factor.
        let c = Conversion {
            scaling: Scaling::Power,
            ..c
        };
        let p = c.apply(&[0.0, 1.0], 1..=1)[0] as f64;
        assert!((p - 9.80665f64.powi(2)).abs() < 1e-3, "{p}");
    }

    #[test]
    fn unit_labels() {
        assert_eq!(Scaling::Psd.unit_label(u("g")), "g^2/Hz");
        assert_eq!(Scaling::Power.unit_label(u("g")), "g^2");
        assert_eq!(Scaling::Power.unit_label(u("mm/s")), "(mm/s)^2");
        assert_eq!(Scaling::Peak.unit_label(u("mm/s")), "mm/s");
    }

    #[test]
    fn ranges_are_inclusive_and_checked() {
        // 11 lines, 0..=10 Hz.
        assert_eq!(line_range(None, None, 1.0, 11), Ok(0..=10));
        assert_eq!(line_range(Some(2.0), Some(4.0), 1.0, 11), Ok(2..=4));
        assert_eq!(line_range(Some(2.5), Some(4.5), 1.0, 11), Ok(3..=4));
        // 0.1·3 is not exactly 0.3 in binary: the slack keeps line 3.
        assert_eq!(line_range(Some(0.3), Some(0.3), 0.1, 11), Ok(3..=3));
        assert!(matches!(
            line_range(Some(5.0), Some(4.0), 1.0, 11),
            Err(RangeError::Inverted { .. })
        ));
        assert!(matches!(
            line_range(Some(f64::NAN), None, 1.0, 11),
            Err(RangeError::NotFinite { name: "fmin", .. })
        ));
        assert!(matches!(
            line_range(None, Some(10.5), 1.0, 11),
            Err(RangeError::OutOfRange { name: "fmax", .. })
        ));
        assert!(matches!(
            line_range(Some(-1.0), None, 1.0, 11),
            Err(RangeError::OutOfRange { name: "fmin", .. })
        ));
        assert!(matches!(
            line_range(Some(2.2), Some(2.8), 1.0, 11),
            Err(RangeError::Empty { .. })
        ));
    }

    #[test]
    fn scaling_names_round_trip() {
        for s in Scaling::ALL {
            assert_eq!(Scaling::parse(s.as_str()), Some(s));
        }
        assert_eq!(Scaling::parse("RMS"), None);
    }
}
