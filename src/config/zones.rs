//! Vibration severity zones for broadband velocity RMS, as guidance presets.
//!
//! **[mem] These boundary values are from memory**, believed to be those of
//! ISO 10816-3:2009, Annex A (Table A.1, "classification of vibration
//! severity zones"), which ISO 20816-3:2022 is believed to keep. They have
//! not been checked against the standard's text. They are guidance only:
//! the standard itself, the machine maker's limits, local codes and
//! qualified people prevail.
//!
//! The zones apply to machines above 15 kW running at 120 to 15 000 r/min,
//! measured on bearing housings or pedestals, as velocity RMS over 10–1000 Hz
//! (above 600 r/min) or 2–1000 Hz (120–600 r/min) [mem]. Zone meaning:
//! A — newly commissioned; B — acceptable for long-term operation;
//! C — acceptable for a limited period only; D — severe enough to cause
//! damage.
//!
//! A preset sets **alert = B/C** and **danger = C/D**, both high: alert when
//! the machine leaves the long-term region, danger where damage becomes
//! likely. A common refinement is alert at about baseline + 25 % of B/C and
//! not above 1.25 × B/C [mem]; a learned baseline can do that instead.

use serde::{Deserialize, Serialize};

/// The sentence emitted in JSON beside every zone-derived limit.
pub const GUIDANCE: &str = "guidance only: vibration severity zone boundaries of ISO 20816-3 \
(believed equal to ISO 10816-3:2009 Annex A), quoted from memory [mem] and not checked against \
the standard's text; the machine maker's limits, local codes and qualified people prevail";

/// Machine group of ISO 10816-3 / 20816-3 [mem].
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
pub enum MachineGroup {
    /// Group 1: large machines, rated power 300 kW to 50 MW.
    #[serde(rename = "1")]
    Group1,
    /// Group 2: medium machines, 15 kW to 300 kW.
    #[serde(rename = "2")]
    Group2,
}

impl MachineGroup {
    /// From the config's integer 1 or 2.
    pub fn from_number(n: u8) -> Option<MachineGroup> {
        match n {
            1 => Some(MachineGroup::Group1),
            2 => Some(MachineGroup::Group2),
            _ => None,
        }
    }

    pub fn number(self) -> u8 {
        match self {
            MachineGroup::Group1 => 1,
            MachineGroup::Group2 => 2,
        }
    }
}

/// Support flexibility: rigid when the lowest natural frequency of machine
/// and support is at least 25 % above the main excitation (running speed),
/// flexible otherwise [mem].
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum Support {
    Rigid,
    Flexible,
}

impl Support {
    pub fn as_str(self) -> &'static str {
        match self {
            Support::Rigid => "rigid",
            Support::Flexible => "flexible",
        }
    }
}

/// Zone boundaries in mm/s RMS.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct Boundaries {
    pub ab: f64,
    pub bc: f64,
    pub cd: f64,
}

/// A zone, A (best) to D.
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord, Serialize)]
pub enum Zone {
    A,
    B,
    C,
    D,
}

/// The table [mem]: ISO 10816-3:2009 Annex A, believed kept in ISO
/// 20816-3:2022. Velocity RMS, mm/s.
pub fn boundaries(group: MachineGroup, support: Support) -> Boundaries {
    let (ab, bc, cd) = match (group, support) {
        (MachineGroup::Group1, Support::Rigid) => (2.3, 4.5, 7.1),
        (MachineGroup::Group1, Support::Flexible) => (3.5, 7.1, 11.0),
        (MachineGroup::Group2, Support::Rigid) => (1.4, 2.8, 4.5),
        (MachineGroup::Group2, Support::Flexible) => (2.3, 4.5, 7.1),
    };
    Boundaries { ab, bc, cd }
}

impl Boundaries {
    /// The zone a velocity RMS (mm/s) falls in; a value on a boundary
    /// belongs to the worse zone.
    pub fn zone(&self, v_mm_s: f64) -> Zone {
        if v_mm_s >= self.cd {
            Zone::D
        } else if v_mm_s >= self.bc {
            Zone::C
        } else if v_mm_s >= self.ab {
            Zone::B
        } else {
            Zone::A
        }
    }
}

/// A zone preset chosen in the config.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
pub struct ZonePreset {
    pub group: MachineGroup,
    pub support: Support,
}

/// Alert and danger limits of a preset, in the band's unit.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct PresetLimits {
    pub alert: f64,
    pub danger: f64,
    pub boundaries_mm_s: Boundaries,
    pub guidance: &'static str,
}

impl ZonePreset {
    pub fn boundaries(&self) -> Boundaries {
        boundaries(self.group, self.support)
    }

    /// alert = B/C, danger = C/D, converted to a velocity unit whose factor
    /// to m/s is `unit_to_si` (mm/s: 1e-3, in/s: 0.0254).
    pub fn limits(&self, unit_to_si: f64) -> PresetLimits {
        let b = self.boundaries();
        let k = 1e-3 / unit_to_si;
        PresetLimits {
            alert: b.bc * k,
            danger: b.cd * k,
            boundaries_mm_s: b,
            guidance: GUIDANCE,
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn preset_in_inches() {
        let p = ZonePreset {
            group: MachineGroup::Group2,
            support: Support::Rigid,
        };
        let l = p.limits(0.0254);
        // 2.8 mm/s = 0.110236 in/s (1 in = 25.4 mm exactly).
        assert!((l.alert - 2.8 / 25.4).abs() < 1e-12);
        assert!((p.limits(1e-3).danger - 4.5).abs() < 1e-12);
    }

    #[test]
    fn boundary_goes_to_worse_zone() {
        let b = boundaries(MachineGroup::Group1, Support::Rigid);
        assert_eq!(b.zone(4.5), Zone::C);
        assert_eq!(b.zone(4.49), Zone::B);
        assert_eq!(b.zone(0.0), Zone::A);
        assert_eq!(b.zone(100.0), Zone::D);
    }
}
