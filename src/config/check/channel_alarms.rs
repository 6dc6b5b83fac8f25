//! Checks of a channel's `health` table and of its alarms — each band's
//! `alarm` and the `overall_alarm` tables — into the channel's
//! `HealthSpec` and `ChannelAlarm`s. The tables' own rules are in
//! `config::alarms` and `config::health`; this file adds what depends on the
//! channel (band unit and measure, name clashes).

use crate::config::alarms::{AlarmSpec, RawAlarm};
use crate::config::health::{HealthSpec, RawHealth};
use crate::config::issue::Issues;
use crate::config::kinds::Measure;
use crate::config::raw::RawChannel;
use crate::config::spec::{AlarmTarget, BandSpec, ChannelAlarm};
use crate::units::Unit;

/// `health`: the defaults when the table is absent or has a problem.
pub(super) fn check_health(issues: &mut Issues, path: &str, raw: Option<&RawHealth>) -> HealthSpec {
    let Some(h) = raw else {
        return HealthSpec::default();
    };
    match h.build(&format!("{path}.health")) {
        Ok(h) => h,
        Err(v) => {
            issues.extend(v);
            HealthSpec::default()
        }
    }
}

/// The alarms of one channel: band alarms in band order, then the overall
/// ones. `bands` are the channel's bands that passed their checks; when one
/// failed, no alarm is returned (targets may not line up, and the config is
/// rejected anyway).
pub(super) fn check_channel_alarms(
    issues: &mut Issues,
    path: &str,
    c: &RawChannel,
    unit: Option<Unit>,
    bands: &[BandSpec],
) -> Vec<ChannelAlarm> {
    let mut alarms = Vec::new();
    for (j, b) in c.bands.iter().enumerate() {
        if let Some(raw) = &b.alarm {
            let bu = bands.iter().find(|x| x.name == b.name).map(|x| x.unit);
            let apath = format!("{path} band {:?}.alarm", b.name);
            if let Some(spec) = check_alarm(issues, &apath, bu, raw, b.measure == Measure::Rms) {
                alarms.push(ChannelAlarm {
                    name: b.name.clone(),
                    target: AlarmTarget::Band(j),
                    unit: bu,
                    spec,
                });
            }
        }
    }
    if let Some(o) = &c.overall_alarm {
        for (key, name, target, raw, u) in [
            ("rms", "overall-rms", AlarmTarget::OverallRms, &o.rms, unit),
            (
                "peak",
                "overall-peak",
                AlarmTarget::OverallPeak,
                &o.peak,
                unit,
            ),
            (
                "crest_factor",
                "overall-crest-factor",
                AlarmTarget::CrestFactor,
                &o.crest_factor,
                None,
            ),
        ] {
            let Some(raw) = raw else { continue };
            let apath = format!("{path}.overall_alarm.{key}");
            if c.bands.iter().any(|b| b.name == name) {
                issues.add(
                    apath.clone(),
                    format!("a band is already named {name:?}; rename it"),
                );
            }
            if let Some(spec) = check_alarm(issues, &apath, u, raw, key == "rms") {
                alarms.push(ChannelAlarm {
                    name: name.to_string(),
                    target,
                    unit: u,
                    spec,
                });
            }
        }
    }
    if bands.len() != c.bands.len() {
        alarms.clear();
    }
    alarms
}

/// One alarm table on a value in `unit` (`None`: dimensionless).
fn check_alarm(
    issues: &mut Issues,
    apath: &str,
    unit: Option<Unit>,
    raw: &RawAlarm,
    is_rms: bool,
) -> Option<AlarmSpec> {
    match raw.build(apath) {
        Ok(spec) => {
            if let Some(u) = unit {
                issues.extend(spec.check_band(apath, u, is_rms));
            } else if spec.zone.is_some() {
                issues.add(
                    format!("{apath}.zone"),
                    "zone presets are for velocity RMS bands",
                );
            }
            Some(spec)
        }
        Err(v) => {
            issues.extend(v);
            None
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn channel(extra: &str) -> RawChannel {
        let text = format!("name = \"a\"\nsource = \"sim\"\nindex = 0\nunit = \"g\"\n{extra}");
        toml::from_str(&text).unwrap_or_else(|e| panic!("{text}: {e}"))
    }

    #[test]
    fn overall_alarm_name_clash_and_crest_factor_zone() {
        let c = channel(
            "overall_alarm.crest_factor = { zone = { group = 2, support = \"rigid\" } }\n\
             [[band]]\nname = \"overall-crest-factor\"\nlo_hz = 10\nhi_hz = 100\n",
        );
        let mut issues = Issues::default();
        check_channel_alarms(&mut issues, "c", &c, Unit::parse("g"), &[]);
        assert_eq!(
            issues.pairs(),
            vec![
                (
                    "c.overall_alarm.crest_factor",
                    "a band is already named \"overall-crest-factor\"; rename it"
                ),
                (
                    "c.overall_alarm.crest_factor.zone",
                    "zone presets are for velocity RMS bands"
                ),
            ]
        );
    }

    #[test]
    fn good_overall_alarm_has_no_issue() {
        let c = channel("overall_alarm.rms = { alert = { limit = 2.0 } }\n");
        let mut issues = Issues::default();
        let alarms = check_channel_alarms(&mut issues, "c", &c, Unit::parse("g"), &[]);
        assert!(issues.is_empty(), "{issues:?}");
        assert_eq!(alarms.len(), 1);
        assert_eq!(alarms[0].name, "overall-rms");
        assert_eq!(alarms[0].target, AlarmTarget::OverallRms);
    }

    #[test]
    fn health_problems_are_under_the_channel() {
        let mut issues = Issues::default();
        let bad: RawHealth =
            toml::from_str("bias = { lo = 5, hi = 1 }").unwrap_or_else(|e| panic!("{e}"));
        assert_eq!(
            check_health(&mut issues, "c", Some(&bad)),
            HealthSpec::default()
        );
        assert_eq!(
            issues.pairs(),
            vec![("c.health.bias", "lo 5 must be below hi 1 (both finite)")]
        );
        let mut issues = Issues::default();
        let good: RawHealth =
            toml::from_str("bias = { lo = 1, hi = 5 }").unwrap_or_else(|e| panic!("{e}"));
        assert!(check_health(&mut issues, "c", Some(&good)).bias.is_some());
        assert!(issues.is_empty(), "{issues:?}");
    }
}
