//! Checks of the `[[machine]]` tables: names, the running-speed source
//! (fixed, tachometer channel or spectrum peak) and the bearing geometry,
//! into `MachineSpec`s.

use std::collections::HashSet;

use crate::config::bearing::BearingGeometry;
use crate::config::issue::Issues;
use crate::config::raw::{RawBearing, RawChannel, RawMachine, RawSpeed};
use crate::config::spec::{MachineSpec, SpeedSource};

/// Every `[[machine]]`; `channels` are the file's channels a speed may read.
pub(super) fn check_machines(
    issues: &mut Issues,
    raw: &[RawMachine],
    channels: &[RawChannel],
) -> Vec<MachineSpec> {
    let mut out = Vec::new();
    let mut names = HashSet::new();
    for m in raw {
        let path = format!("machine {:?}", m.name);
        if m.name.is_empty() {
            issues.add("machine.name", "must not be empty");
        }
        if !names.insert(m.name.clone()) {
            issues.add(format!("{path}.name"), "duplicate machine name");
        }
        let speed = check_speed(issues, &path, &m.speed, channels);
        let bearings = m
            .bearings
            .iter()
            .map(|b| check_bearing(issues, &path, b))
            .collect();
        out.push(MachineSpec {
            name: m.name.clone(),
            speed,
            bearings,
        });
    }
    out
}

/// A machine's `speed` table.
fn check_speed(
    issues: &mut Issues,
    path: &str,
    speed: &RawSpeed,
    channels: &[RawChannel],
) -> SpeedSource {
    let channel = |name: &str| channels.iter().any(|c| c.name == name);
    match speed {
        RawSpeed::Fixed { rpm } => {
            if !(rpm.is_finite() && *rpm > 0.0) {
                issues.add(
                    format!("{path}.speed.rpm"),
                    format!("{rpm} must be above 0"),
                );
            }
            SpeedSource::Fixed { hz: rpm / 60.0 }
        }
        RawSpeed::Tach {
            channel: ch,
            pulses_per_rev,
            threshold,
            hysteresis,
            average_revs,
            stale_s,
        } => {
            if !channel(ch) {
                issues.add(
                    format!("{path}.speed.channel"),
                    format!("unknown channel {ch:?}"),
                );
            }
            if *pulses_per_rev == 0 {
                issues.add(format!("{path}.speed.pulses_per_rev"), "must be at least 1");
            }
            if !threshold.is_finite() || !hysteresis.is_finite() || *hysteresis < 0.0 {
                issues.add(
                    format!("{path}.speed.threshold"),
                    "threshold and hysteresis must be finite, hysteresis >= 0",
                );
            }
            if *average_revs == 0 {
                issues.add(format!("{path}.speed.average_revs"), "must be at least 1");
            }
            if !(stale_s.is_finite() && *stale_s > 0.0) {
                issues.add(format!("{path}.speed.stale_s"), "must be above 0");
            }
            SpeedSource::Tach {
                channel: ch.clone(),
                pulses_per_rev: *pulses_per_rev,
                threshold: *threshold,
                hysteresis: *hysteresis,
                average_revs: *average_revs,
                stale_s: *stale_s,
            }
        }
        RawSpeed::Peak {
            channel: ch,
            min_hz,
            max_hz,
            stale_s,
        } => {
            if !channel(ch) {
                issues.add(
                    format!("{path}.speed.channel"),
                    format!("unknown channel {ch:?}"),
                );
            }
            if !(min_hz.is_finite() && max_hz.is_finite() && *min_hz > 0.0 && min_hz < max_hz) {
                issues.add(
                    format!("{path}.speed.min_hz"),
                    format!("{min_hz}–{max_hz} Hz: need 0 < min_hz < max_hz"),
                );
            }
            if !(stale_s.is_finite() && *stale_s > 0.0) {
                issues.add(format!("{path}.speed.stale_s"), "must be above 0");
            }
            SpeedSource::Peak {
                channel: ch.clone(),
                min_hz: *min_hz,
                max_hz: *max_hz,
                stale_s: *stale_s,
            }
        }
    }
}

/// One `[[machine.bearing]]`: element count, diameters, contact angle.
fn check_bearing(issues: &mut Issues, path: &str, b: &RawBearing) -> (String, BearingGeometry) {
    let bp = format!("{path} bearing {:?}", b.name);
    if b.elements < 3 {
        issues.add(
            format!("{bp}.elements"),
            format!("{} is fewer than 3", b.elements),
        );
    }
    let (d, dp) = (b.element_diameter_mm, b.pitch_diameter_mm);
    if !(d.is_finite() && dp.is_finite() && d > 0.0 && d < dp) {
        issues.add(
            format!("{bp}.element_diameter_mm"),
            format!("{d} mm must be above 0 and below pitch_diameter_mm {dp} mm"),
        );
    }
    if !(b.contact_angle_deg.is_finite() && (0.0..90.0).contains(&b.contact_angle_deg)) {
        issues.add(
            format!("{bp}.contact_angle_deg"),
            "must be in 0 to 90 degrees",
        );
    }
    (
        b.name.clone(),
        BearingGeometry {
            elements: b.elements,
            element_diameter: d,
            pitch_diameter: dp,
            contact_angle_deg: b.contact_angle_deg,
        },
    )
}

#[cfg(test)]
mod tests {
    use super::*;

    fn machine(text: &str) -> RawMachine {
        toml::from_str(text).unwrap_or_else(|e| panic!("{text}: {e}"))
    }

    #[test]
    fn tach_speed_needs_a_known_channel_and_bearing_a_sane_geometry() {
        let m = machine(
            "name = \"p2\"\nspeed = { kind = \"tach\", channel = \"tach\", threshold = 2.5, pulses_per_rev = 0 }\n\
             [[bearing]]\nname = \"de\"\nelements = 2\nelement_diameter_mm = 60\npitch_diameter_mm = 12\n",
        );
        let mut issues = Issues::default();
        check_machines(&mut issues, &[m], &[]);
        assert_eq!(
            issues.pairs(),
            vec![
                ("machine \"p2\".speed.channel", "unknown channel \"tach\""),
                ("machine \"p2\".speed.pulses_per_rev", "must be at least 1"),
                (
                    "machine \"p2\" bearing \"de\".elements",
                    "2 is fewer than 3"
                ),
                (
                    "machine \"p2\" bearing \"de\".element_diameter_mm",
                    "60 mm must be above 0 and below pitch_diameter_mm 12 mm"
                ),
            ]
        );
    }

    #[test]
    fn good_fixed_speed_machine_has_no_issue() {
        let m = machine(
            "name = \"p2\"\nspeed = { kind = \"fixed\", rpm = 1500 }\n\
             [[bearing]]\nname = \"de\"\nelements = 9\nelement_diameter_mm = 12\npitch_diameter_mm = 60\n",
        );
        let mut issues = Issues::default();
        let specs = check_machines(&mut issues, &[m], &[]);
        assert!(issues.is_empty(), "{issues:?}");
        assert_eq!(specs[0].speed, SpeedSource::Fixed { hz: 25.0 });
        assert_eq!(specs[0].bearings[0].1.elements, 9);
    }
}
