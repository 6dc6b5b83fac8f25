//! The alarm tables of the config: TOML snippets, unknown keys rejected,
//! every problem reported with its field path.

#![allow(clippy::unwrap_used)] // tests may unwrap: a panic is a failed test

use bandwatch::alarm::state::Direction;
use bandwatch::alarm::token::TokenSource;
use bandwatch::config::alarms::{LimitSource, RawAlarm, RawAlarms, RawHealth};
use bandwatch::config::ConfigIssue;

fn alarm(text: &str) -> RawAlarm {
    toml::from_str(text).unwrap_or_else(|e| panic!("{text}: {e}"))
}

fn paths(issues: &[ConfigIssue]) -> Vec<&str> {
    issues.iter().map(|i| i.path.as_str()).collect()
}

#[test]
fn a_full_band_alarm() {
    let a = alarm(
        r#"
        latching = true
        hysteresis = 0.2
        on_delay_s = 2.0
        off_delay_s = 5.0
        alert = { limit = 4.5 }
        danger = { limit = 7.1, on_delay_s = 1.0, hysteresis = 0.5 }
        "#,
    );
    let s = a.build("p").unwrap();
    assert!(s.latching);
    let al = s.alert.unwrap();
    assert_eq!(al.source, LimitSource::Fixed(4.5));
    assert_eq!(
        (al.hysteresis, al.on_delay_s, al.off_delay_s),
        (0.2, 2.0, 5.0)
    );
    assert_eq!(al.direction, Direction::High);
    let d = s.danger.unwrap();
    assert_eq!((d.hysteresis, d.on_delay_s, d.off_delay_s), (0.5, 1.0, 5.0));
    let m = s.levels(None, 1.0);
    assert_eq!(m.danger.unwrap().limit, Some(7.1));
}

#[test]
fn low_alarms_and_mixed_directions() {
    let s = alarm("direction = \"low\"\nalert = { limit = 2.0 }\ndanger = { limit = 1.0 }\n")
        .build("p")
        .unwrap();
    assert_eq!(s.alert.unwrap().direction, Direction::Low);
    let issues = alarm("direction = \"low\"\nalert = { limit = 1.0 }\ndanger = { limit = 2.0 }\n")
        .validate("p");
    assert_eq!(paths(&issues), vec!["p.danger"]);
    // A high alert with a low danger is not ordered: accepted.
    assert!(
        alarm("alert = { limit = 5.0 }\ndanger = { limit = 1.0, direction = \"low\" }\n")
            .validate("p")
            .is_empty()
    );
}

#[test]
fn every_problem_with_its_path() {
    let issues = alarm(
        r#"
        hysteresis = -1
        on_delay_s = 1e9
        alert = { limit = 5.0, factor = 2.0 }
        danger = { sigma = 3 }
        "#,
    )
    .validate("channel \"pump-de\" band \"bpfo\".alarm");
    let p = paths(&issues);
    for want in [
        "channel \"pump-de\" band \"bpfo\".alarm.hysteresis",
        "channel \"pump-de\" band \"bpfo\".alarm.on_delay_s",
        "channel \"pump-de\" band \"bpfo\".alarm.alert",
        "channel \"pump-de\" band \"bpfo\".alarm.danger",
    ] {
        assert!(p.contains(&want), "{want} not in {p:?}");
    }
    assert!(
        issues.iter().any(|i| i.message.contains("need a baseline")),
        "{issues:?}"
    );
    assert_eq!(paths(&alarm("latching = true\n").validate("a")), vec!["a"]);
    assert_eq!(
        paths(&alarm("alert = { limit = 5.0 }\ndanger = { limit = 4.0 }\n").validate("a")),
        vec!["a.danger"]
    );
}

#[test]
fn unknown_keys_are_errors() {
    assert!(toml::from_str::<RawAlarm>("alert = { limit = 1, delay = 2 }").is_err());
    assert!(toml::from_str::<RawAlarm>("latched = true").is_err());
    assert!(toml::from_str::<RawHealth>("flatline = { std_below = 1, for = 2 }").is_err());
    assert!(toml::from_str::<RawAlarms>("storage_dir = \"/x\"\njournal_bytes = 1").is_err());
}

#[test]
fn health_table() {
    let h: RawHealth = toml::from_str(
        r#"
        recover_s = 5
        flatline = { std_below = 0.0005, for_s = 2 }
        clipping = { full_scale = 50.0 }
        bias = { lo = 2.0, hi = 20.0 }
        "#,
    )
    .unwrap();
    let s = h.build("channel \"pump-de\".health").unwrap();
    let c = s.clipping.unwrap();
    assert_eq!((c.fraction, c.samples), (0.99, 3));
    assert_eq!(s.stale.unwrap().after_s, 5.0, "stale is on by default");
    assert_eq!(s.gaps.unwrap().max, 10);

    let h: RawHealth = toml::from_str(
        "recover_s = 1\nflatline = { std_below = 0, for_s = 2 }\nbias = { lo = 5, hi = 1 }\nclipping = { full_scale = 1, fraction = 1.5 }\n",
    )
    .unwrap();
    let issues = h.validate("h");
    let p = paths(&issues);
    for want in [
        "h.recover_s",
        "h.flatline.std_below",
        "h.bias",
        "h.clipping.fraction",
    ] {
        assert!(p.contains(&want), "{want} not in {p:?}");
    }
}

#[test]
fn alarms_table() {
    let a: RawAlarms =
        toml::from_str("storage_dir = \"/var/lib/bandwatch\"\ntoken_env = \"BW_TOKEN\"\n").unwrap();
    let s = a.build("alarms").unwrap();
    assert_eq!(s.token, Some(TokenSource::Env("BW_TOKEN".into())));
    assert_eq!(
        s.journal_dir(),
        std::path::Path::new("/var/lib/bandwatch/journal")
    );
    assert_eq!(
        s.captures_dir(),
        std::path::Path::new("/var/lib/bandwatch/captures")
    );
    assert_eq!((s.capture_pre_s, s.capture_post_s), (5.0, 5.0));
    assert_eq!(s.journal.max_files, 8);

    let a: RawAlarms = toml::from_str(
        "storage_dir = \"\"\ntoken_env = \"X\"\ntoken_file = \"/t\"\njournal_max_files = 1\ncapture_pre_s = 100\n",
    )
    .unwrap();
    let issues = a.validate("alarms");
    let p = paths(&issues);
    for want in [
        "alarms.storage_dir",
        "alarms.token_file",
        "alarms.journal_max_files",
        "alarms.capture_pre_s",
    ] {
        assert!(p.contains(&want), "{want} not in {p:?}");
    }
}
