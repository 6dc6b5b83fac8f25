//! A channel's `health` table: serde's `RawHealth` (unknown keys rejected),
//! its check into `HealthSpec`, and the typed sensor checks (flatline,
//! clipping, bias, stale, gaps) the alarm stage's health monitor runs on.
//! Each problem is a `ConfigIssue` under the path the caller passes (e.g.
//! `channel "pump-de".health`). Also reachable as `config::alarms::*`.

use serde::Deserialize;

use super::alarms::MAX_DELAY_S;
use super::issue::{ConfigIssue, Issues};

/// A channel's `health` table. Stale and gap checks are on by default
/// (5 s; more than 10 gaps in 60 s); the others need the sensor's figures.
#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawHealth {
    /// Seconds without any fault before the channel is OK again. Must be at
    /// least `flatline.for_s`, so that a sensor dead at start-up is found
    /// before its alarms are enabled.
    #[serde(default = "default_recover_s")]
    pub recover_s: f64,
    pub flatline: Option<RawFlatline>,
    pub clipping: Option<RawClipping>,
    pub bias: Option<RawBias>,
    pub stale: Option<RawStale>,
    pub gaps: Option<RawGaps>,
}

fn default_recover_s() -> f64 {
    5.0
}

#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawFlatline {
    /// Standard deviation (channel unit) below which the signal is flat;
    /// about one converter step is common practice.
    pub std_below: f64,
    #[serde(default = "default_flat_for_s")]
    pub for_s: f64,
}

fn default_flat_for_s() -> f64 {
    1.0
}

#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawClipping {
    /// Converter full scale in the channel's unit.
    pub full_scale: f64,
    #[serde(default = "default_clip_fraction")]
    pub fraction: f64,
    /// Clipped samples within 0.1 s that make a fault.
    #[serde(default = "default_clip_samples")]
    pub samples: usize,
}

fn default_clip_fraction() -> f64 {
    0.99
}
fn default_clip_samples() -> usize {
    3
}

#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawBias {
    /// Lowest acceptable mean, channel unit.
    pub lo: f64,
    /// Highest acceptable mean, channel unit.
    pub hi: f64,
}

#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawStale {
    pub after_s: f64,
}

#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawGaps {
    pub max: u32,
    pub window_s: f64,
}

impl RawHealth {
    /// Every problem of the table.
    pub fn validate(&self, path: &str) -> Vec<ConfigIssue> {
        self.build(path).err().unwrap_or_default()
    }

    /// The validated spec.
    ///
    /// # Errors
    /// Every problem found, each with its field path.
    pub fn build(&self, path: &str) -> Result<HealthSpec, Vec<ConfigIssue>> {
        let mut out = Issues::default();
        let d = HealthSpec::default();
        out.check_range(
            format!("{path}.recover_s"),
            self.recover_s,
            0.0,
            MAX_DELAY_S,
        );
        let flatline = self.flatline.as_ref().map(|f| {
            if !(f.std_below.is_finite() && f.std_below > 0.0) {
                out.add(format!("{path}.flatline.std_below"),
                    format!("{} must be > 0", f.std_below),
                );
            }
            out.check_range(format!("{path}.flatline.for_s"), f.for_s, 0.1, MAX_DELAY_S);
            if f.for_s.is_finite() && self.recover_s < f.for_s {
                out.add(format!("{path}.recover_s"),
                    format!(
                        "{} is below flatline.for_s {}: a sensor dead at start-up would be trusted before it can be found flat",
                        self.recover_s, f.for_s
                    ),
                );
            }
            FlatlineSpec {
                std_below: f.std_below,
                for_s: f.for_s,
            }
        });
        let clipping = self.clipping.as_ref().map(|c| {
            if !(c.full_scale.is_finite() && c.full_scale > 0.0) {
                out.add(
                    format!("{path}.clipping.full_scale"),
                    format!("{} must be > 0", c.full_scale),
                );
            }
            if !(c.fraction.is_finite() && c.fraction > 0.0 && c.fraction <= 1.0) {
                out.add(
                    format!("{path}.clipping.fraction"),
                    format!("{} is out of range (0, 1]", c.fraction),
                );
            }
            if !(1..=1_000_000).contains(&c.samples) {
                out.add(
                    format!("{path}.clipping.samples"),
                    format!("{} is out of range 1 to 1000000", c.samples),
                );
            }
            ClippingSpec {
                full_scale: c.full_scale,
                fraction: c.fraction,
                samples: c.samples,
            }
        });
        let bias = self.bias.as_ref().map(|b| {
            if !(b.lo.is_finite() && b.hi.is_finite() && b.lo < b.hi) {
                out.add(
                    format!("{path}.bias"),
                    format!("lo {} must be below hi {} (both finite)", b.lo, b.hi),
                );
            }
            BiasSpec { lo: b.lo, hi: b.hi }
        });
        let stale = match &self.stale {
            Some(s) => {
                out.check_range(format!("{path}.stale.after_s"), s.after_s, 0.1, MAX_DELAY_S);
                Some(StaleSpec { after_s: s.after_s })
            }
            None => d.stale,
        };
        let gaps = match &self.gaps {
            Some(g) => {
                if g.max > 10_000 {
                    out.add(
                        format!("{path}.gaps.max"),
                        format!("{} is out of range 0 to 10000", g.max),
                    );
                }
                out.check_range(format!("{path}.gaps.window_s"), g.window_s, 0.1, 86400.0);
                Some(GapSpec {
                    max: g.max,
                    window_s: g.window_s,
                })
            }
            None => d.gaps,
        };
        if !out.is_empty() {
            return Err(out.into_vec());
        }
        Ok(HealthSpec {
            flatline,
            clipping,
            bias,
            stale,
            gaps,
            recover_s: self.recover_s,
        })
    }
}

// ---------------------------------------------------------------------------
// Channel health checks (validated)
// ---------------------------------------------------------------------------

#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize)]
pub struct FlatlineSpec {
    /// Standard deviation (channel unit) under which a window is flat.
    pub std_below: f64,
    /// Seconds of flat windows before the channel is not OK.
    pub for_s: f64,
}

#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize)]
pub struct ClippingSpec {
    /// Converter full scale in the channel's unit (the largest magnitude the
    /// converter can report).
    pub full_scale: f64,
    /// Fraction of full scale at which a sample counts as clipped, (0, 1].
    pub fraction: f64,
    /// Clipped samples in one window that make it a fault, >= 1.
    pub samples: usize,
}

#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize)]
pub struct BiasSpec {
    /// Lowest acceptable window mean, channel unit.
    pub lo: f64,
    /// Highest acceptable window mean, channel unit.
    pub hi: f64,
}

#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize)]
pub struct StaleSpec {
    pub after_s: f64,
}

#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize)]
pub struct GapSpec {
    /// More than this many discontinuities within the window is a fault.
    pub max: u32,
    pub window_s: f64,
}

/// The validated health checks of one channel.
#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize)]
pub struct HealthSpec {
    pub flatline: Option<FlatlineSpec>,
    pub clipping: Option<ClippingSpec>,
    pub bias: Option<BiasSpec>,
    pub stale: Option<StaleSpec>,
    pub gaps: Option<GapSpec>,
    /// Seconds without any fault before the channel is OK again.
    pub recover_s: f64,
}

impl Default for HealthSpec {
    /// What a channel without a `health` table gets: stale after 5 s, more
    /// than 10 gaps a minute, 5 s to recover. Flatline, clipping and bias
    /// need the sensor's figures and are off unless configured.
    fn default() -> HealthSpec {
        HealthSpec {
            flatline: None,
            clipping: None,
            bias: None,
            stale: Some(StaleSpec { after_s: 5.0 }),
            gaps: Some(GapSpec {
                max: 10,
                window_s: 60.0,
            }),
            recover_s: 5.0,
        }
    }
}
