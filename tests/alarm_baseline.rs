//! Baselines: Welford's mean and σ checked against NIST StRD certified
//! values, learning time, limits, and the atomic JSON persistence.

#![allow(clippy::unwrap_used)] // tests may unwrap: a panic is a failed test

mod alarm_common;

use alarm_common::{names, TempDir};
use bandwatch::alarm::baseline::{
    load, path_for, remove, save, Baseline, BaselineError, Learner, LimitRule, MIN_VALUES,
};
use bandwatch::alarm::state::{Direction, Input};
use bandwatch::config::alarms::RawAlarm;

/// Two-pass mean and sample σ, shifted by the first value (a plain sum of
/// values near 1e7 would itself lose the digits NumAcc4 tests): a
/// different algorithm from the learner's.
fn two_pass(x: &[f64]) -> (f64, f64) {
    let n = x.len() as f64;
    let m = x[0] + x.iter().map(|v| v - x[0]).sum::<f64>() / n;
    let ss = x.iter().map(|v| (v - m).powi(2)).sum::<f64>();
    (m, (ss / (n - 1.0)).sqrt())
}

fn learn(x: &[f64]) -> bandwatch::alarm::baseline::Learned {
    let mut l = Learner::new(1e9);
    for (i, v) in x.iter().enumerate() {
        l.push(i as f64, Input::Value(*v));
    }
    l.current()
}

#[test]
fn nist_strd_numacc1() {
    // NIST Statistical Reference Datasets, univariate summary statistics,
    // "NumAcc1": 10000001, 10000003, 10000002; certified mean 10000002,
    // standard deviation 1 [pub; data and values quoted from memory, mem].
    let x = [10000001.0, 10000003.0, 10000002.0];
    let r = learn(&x);
    assert_eq!(r.mean, 10000002.0);
    assert!((r.std - 1.0).abs() < 1e-12, "{}", r.std);
    assert_eq!(r.count, 3);
}

#[test]
fn nist_strd_numacc3_and_4() {
    // "NumAcc3": 1000000.2 then 500 pairs of 1000000.1, 1000000.3 (1001
    // values), certified mean 1000000.2, sd 0.1; "NumAcc4" the same around
    // 10000000.2 [pub; structure and values quoted from memory, mem]. The
    // values follow from the structure: deviations ±0.1, 1000 of them, over
    // n − 1 = 1000.
    for base in [1000000.0, 10000000.0] {
        let mut x = vec![base + 0.2];
        for _ in 0..500 {
            x.push(base + 0.1);
            x.push(base + 0.3);
        }
        let r = learn(&x);
        assert!((r.mean - (base + 0.2)).abs() < 1e-8, "{}", r.mean);
        assert!((r.std - 0.1).abs() < 1e-8, "{base}: {}", r.std);
        let (m2, s2) = two_pass(&x);
        assert!((r.mean - m2).abs() < 1e-8);
        assert!((r.std - s2).abs() < 1e-8);
    }
}

#[test]
fn learning_counts_only_healthy_time() {
    let mut l = Learner::new(60.0);
    let mut t = 0.0;
    let mut done = None;
    for i in 0..200 {
        t += 1.0;
        // Every fourth evaluation is a gap or an inhibit: no time counted
        // across it.
        let input = match i % 8 {
            3 => Input::NoData,
            7 => Input::Inhibited,
            _ => Input::Value(2.0 + (i % 3) as f64),
        };
        if let Some(r) = l.push(t, input) {
            done = Some((t, r));
            break;
        }
    }
    let (t_done, r) = done.expect("learning ends");
    // Values come in runs of three, one second apart, the runs separated
    // by a gap or an inhibit: two seconds learned per four of wall time.
    assert!(r.learned_s >= 60.0 && r.learned_s < 61.0, "{}", r.learned_s);
    assert!((118.0..=122.0).contains(&t_done), "{t_done}");
    assert_eq!(r.count, 90, "30 runs of three values, 2 s each");
    assert!(l.is_done());
    assert_eq!(l.push(t_done + 1.0, Input::Value(100.0)), None);
    l.restart();
    assert!(!l.is_done());
    assert_eq!(l.current().count, 0);
}

#[test]
fn needs_a_minimum_of_values() {
    let mut l = Learner::new(1.0);
    for i in 0..MIN_VALUES - 1 {
        assert!(l.push(i as f64 * 10.0, Input::Value(1.0)).is_none());
    }
    assert!(l.push(1000.0, Input::Value(1.0)).is_some());
}

fn baseline(mean: f64, std: f64) -> Baseline {
    Baseline {
        version: 1,
        channel: "pump-de".into(),
        band: "overall velocity".into(),
        unit: "mm/s".into(),
        mean,
        std,
        count: 3600,
        learned_s: 3600.0,
        finished_unix_ns: 1_767_225_600_000_000_000,
    }
}

#[test]
fn limits_from_factor_and_sigma() {
    let b = baseline(2.0, 0.25);
    assert_eq!(b.limit(LimitRule::Factor(2.5), Direction::High), 5.0);
    assert_eq!(b.limit(LimitRule::Sigma(3.0), Direction::High), 2.75);
    assert_eq!(b.limit(LimitRule::Sigma(3.0), Direction::Low), 1.25);
    assert_eq!(b.limit(LimitRule::Factor(0.5), Direction::Low), 1.0);
}

#[test]
fn alarm_spec_takes_its_limits_from_the_baseline() {
    let raw: RawAlarm = toml::from_str(
        "baseline = { learn_s = 3600 }\nalert = { sigma = 3 }\ndanger = { factor = 4 }\n",
    )
    .unwrap();
    let spec = raw.build("alarm").unwrap();
    assert!(spec.uses_baseline());
    let learning = spec.levels(None, 1e-3);
    assert_eq!(learning.alert.unwrap().limit, None, "off while learning");
    let b = baseline(2.0, 0.25);
    let m = spec.levels(Some(&b), 1e-3);
    assert_eq!(m.alert.unwrap().limit, Some(2.75));
    assert_eq!(m.danger.unwrap().limit, Some(8.0));
}

#[test]
fn persisted_atomically_and_survives_a_restart() {
    let dir = TempDir::new("baseline");
    let b = baseline(2.0, 0.25);
    assert!(load(dir.path(), "pump-de", "overall velocity")
        .unwrap()
        .is_none());
    save(dir.path(), &b).unwrap();
    // Only the final file: the temp file was renamed over it.
    assert_eq!(
        names(dir.path()),
        vec!["pump-de.overall%20velocity.baseline.json"]
    );
    assert_eq!(
        path_for(dir.path(), "pump-de", "overall velocity"),
        dir.path().join("pump-de.overall%20velocity.baseline.json")
    );
    assert_eq!(
        load(dir.path(), "pump-de", "overall velocity").unwrap(),
        Some(b.clone())
    );
    // Overwrite: still one file, new content.
    let b2 = baseline(3.0, 0.5);
    save(dir.path(), &b2).unwrap();
    assert_eq!(names(dir.path()).len(), 1);
    assert_eq!(
        load(dir.path(), "pump-de", "overall velocity").unwrap(),
        Some(b2)
    );
    remove(dir.path(), "pump-de", "overall velocity").unwrap();
    assert!(load(dir.path(), "pump-de", "overall velocity")
        .unwrap()
        .is_none());
}

#[test]
fn a_damaged_file_is_an_error_naming_it_not_a_panic() {
    let dir = TempDir::new("baseline-bad");
    let p = path_for(dir.path(), "c", "b");
    std::fs::write(&p, b"{\"version\": 1, \"chan").unwrap();
    match load(dir.path(), "c", "b") {
        Err(BaselineError::Invalid { path, .. }) => assert_eq!(path, p),
        other => panic!("{other:?}"),
    }
    // A file of another band under this name is refused too.
    let mut b = baseline(1.0, 0.1);
    b.channel = "c".into();
    b.band = "other".into();
    std::fs::write(&p, serde_json::to_vec(&b).unwrap()).unwrap();
    assert!(matches!(
        load(dir.path(), "c", "b"),
        Err(BaselineError::Invalid { .. })
    ));
}
