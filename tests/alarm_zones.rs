//! Vibration severity zone boundaries, broadband velocity RMS in mm/s.
//!
//! Source: ISO 10816-3:2009, Annex A, Table A.1 (classification of
//! vibration severity zones for machines in groups 1 and 2), which
//! ISO 20816-3:2022 is believed to keep. **[mem] Every value below is
//! quoted from memory and has not been checked against the standard's
//! text**; the table number is from memory too. The test pins the values
//! the code presents as guidance, so that a change to them is deliberate.

#![allow(clippy::unwrap_used)] // tests may unwrap: a panic is a failed test

use bandwatch::config::alarms::RawAlarm;
use bandwatch::config::zones::{boundaries, MachineGroup, Support, Zone, ZonePreset, GUIDANCE};
use bandwatch::units::Unit;

#[test]
fn table_a1_from_memory() {
    // (group, support, A/B, B/C, C/D) [mem]
    let table = [
        (MachineGroup::Group1, Support::Rigid, 2.3, 4.5, 7.1),
        (MachineGroup::Group1, Support::Flexible, 3.5, 7.1, 11.0),
        (MachineGroup::Group2, Support::Rigid, 1.4, 2.8, 4.5),
        (MachineGroup::Group2, Support::Flexible, 2.3, 4.5, 7.1),
    ];
    for (g, s, ab, bc, cd) in table {
        let b = boundaries(g, s);
        assert_eq!(
            (b.ab, b.bc, b.cd),
            (ab, bc, cd),
            "group {} {}",
            g.number(),
            s.as_str()
        );
        assert_eq!(b.zone(ab - 0.01), Zone::A);
        assert_eq!(b.zone(ab), Zone::B);
        assert_eq!(b.zone(bc), Zone::C);
        assert_eq!(b.zone(cd), Zone::D);
    }
}

#[test]
fn preset_is_alert_bc_danger_cd_and_says_it_is_guidance() {
    let p = ZonePreset {
        group: MachineGroup::Group1,
        support: Support::Rigid,
    };
    let l = p.limits(1e-3);
    assert_eq!((l.alert, l.danger), (4.5, 7.1));
    assert!(l.guidance.contains("[mem]"));
    assert!(GUIDANCE.contains("guidance"));
    assert!(GUIDANCE.contains("machine maker"));
    let json = serde_json::to_value(l).unwrap();
    assert_eq!(json["guidance"], GUIDANCE);
    // in/s: 1 in = 25.4 mm exactly [pub, international yard and pound 1959].
    let ips = p.limits(0.0254);
    assert!((ips.alert - 4.5 / 25.4).abs() < 1e-12);
}

#[test]
fn zone_config_resolves_and_refuses_non_velocity_bands() {
    let raw: RawAlarm =
        toml::from_str("latching = true\nzone = { group = 2, support = \"flexible\" }\n").unwrap();
    let spec = raw
        .build("channel \"pump-de\" band \"overall\".alarm")
        .unwrap();
    let m = spec.levels(None, Unit::parse("mm/s").unwrap().to_si);
    assert_eq!(m.alert.unwrap().limit, Some(4.5));
    assert_eq!(m.danger.unwrap().limit, Some(7.1));
    assert!(m.latching);
    assert!(spec
        .check_band("x", Unit::parse("mm/s").unwrap(), true)
        .is_empty());
    let issues = spec.check_band("x", Unit::parse("g").unwrap(), true);
    assert_eq!(issues.len(), 1);
    assert_eq!(issues[0].path, "x.zone");
    assert_eq!(
        spec.check_band("x", Unit::parse("in/s").unwrap(), false)
            .len(),
        1
    );

    let bad: RawAlarm = toml::from_str("zone = { group = 3, support = \"rigid\" }\n").unwrap();
    let issues = bad.validate("a");
    assert!(
        issues.iter().any(|i| i.path == "a.zone.group"),
        "{issues:?}"
    );
    let bad: RawAlarm =
        toml::from_str("zone = { group = 1, support = \"rigid\" }\nalert = { limit = 3 }\n")
            .unwrap();
    assert!(bad.validate("a").iter().any(|i| i.path == "a.alert.limit"));
}
