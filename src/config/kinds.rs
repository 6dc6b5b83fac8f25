//! The closed sets of choices a config key can take, shared by the file
//! (`raw`) and the validated specs (`spec`): analysis window, detrend,
//! averaging mode, band measure, band spectrum, serial line settings and
//! what a second TCP connection does.

use serde::{Deserialize, Serialize};

#[derive(Debug, Clone, Copy, PartialEq, Eq, Deserialize, Default)]
#[serde(rename_all = "kebab-case")]
pub enum SecondConnection {
    /// Keep the active connection; close the newcomer.
    #[default]
    Refuse,
    /// Close the active connection; the newcomer takes over.
    Replace,
    /// The newcomer takes over if the active connection has sent nothing
    /// for `replace_after_silent_s` (a DAQ box that restarted, or lost
    /// power and left a half-open socket); otherwise it is refused.
    ReplaceSilent,
}

#[derive(Debug, Clone, Copy, PartialEq, Eq, Deserialize, Default)]
#[serde(rename_all = "kebab-case")]
pub enum Parity {
    #[default]
    None,
    Odd,
    Even,
}

#[derive(Debug, Clone, Copy, PartialEq, Eq, Deserialize, Default)]
#[serde(rename_all = "kebab-case")]
pub enum FlowControl {
    #[default]
    None,
    Software,
    Hardware,
}
/// Analysis window (formulas in `dsp::window`).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Deserialize, Serialize)]
#[serde(rename_all = "kebab-case")]
pub enum WindowKind {
    Rectangular,
    Hann,
    /// Hamming with a0 = 0.54, a1 = 0.46.
    Hamming,
    /// 4-term Blackman-Harris, −92 dB sidelobes (Harris 1978).
    BlackmanHarris,
    /// 5-term flat top as in scipy.signal.windows.flattop (D'Antona & Ferrero 2006).
    FlatTop,
}

impl WindowKind {
    pub const ALL: [WindowKind; 5] = [
        WindowKind::Rectangular,
        WindowKind::Hann,
        WindowKind::Hamming,
        WindowKind::BlackmanHarris,
        WindowKind::FlatTop,
    ];

    pub fn as_str(self) -> &'static str {
        match self {
            WindowKind::Rectangular => "rectangular",
            WindowKind::Hann => "hann",
            WindowKind::Hamming => "hamming",
            WindowKind::BlackmanHarris => "blackman-harris",
            WindowKind::FlatTop => "flat-top",
        }
    }
}

/// What is removed from each block before the window.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Deserialize, Serialize, Default)]
#[serde(rename_all = "kebab-case")]
pub enum Detrend {
    /// Nothing: the DC line shows the sensor's offset.
    None,
    /// The block's mean (as scipy.signal.welch does by default).
    #[default]
    Mean,
}

#[derive(Debug, Clone, Copy, PartialEq, Eq, Deserialize, Serialize)]
#[serde(rename_all = "kebab-case")]
pub enum AveragingMode {
    /// Every block is published as it is.
    None,
    /// Mean of `count` blocks, published once per `count` blocks.
    Linear,
    /// Running mean with weight 1/count on the newest block.
    Exponential,
    /// Largest value per line over `count` blocks.
    PeakHold,
}

impl AveragingMode {
    pub fn as_str(self) -> &'static str {
        match self {
            AveragingMode::None => "none",
            AveragingMode::Linear => "linear",
            AveragingMode::Exponential => "exponential",
            AveragingMode::PeakHold => "peak-hold",
        }
    }
}

#[derive(Debug, Clone, Copy, PartialEq, Eq, Deserialize, Serialize)]
#[serde(rename_all = "kebab-case")]
pub enum Measure {
    /// Root of the power in the band (energy), noise-bandwidth corrected.
    Rms,
    /// Largest single line in the band, as peak amplitude (√2 × line RMS).
    Peak,
}

impl Measure {
    pub fn as_str(self) -> &'static str {
        match self {
            Measure::Rms => "rms",
            Measure::Peak => "peak",
        }
    }
}

/// Which spectrum a band reads.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Deserialize, Serialize, Default)]
#[serde(rename_all = "kebab-case")]
pub enum SpectrumKind {
    #[default]
    Raw,
    Envelope,
}

impl SpectrumKind {
    pub fn as_str(self) -> &'static str {
        match self {
            SpectrumKind::Raw => "raw",
            SpectrumKind::Envelope => "envelope",
        }
    }
}
