//! `bandwatch selftest`: the checks pass on this build, each names its
//! source, and the installed binary prints the table and exits 0.
//!
//! The expected values inside the checks come from the sources each check
//! names (Harris 1978 Table 1, D'Antona & Ferrero 2006 with scipy 1.17, the
//! CRC catalogue, common practice); see `src/selftest.rs`.

use std::collections::BTreeSet;
use std::process::Command;

use bandwatch::dsp::window::WindowKind;
use bandwatch::tools::selftest::{self, Check};

fn find<'a>(checks: &'a [Check], name: &str) -> &'a Check {
    checks
        .iter()
        .find(|c| c.name == name)
        .unwrap_or_else(|| panic!("no check named {name:?}"))
}

#[test]
fn every_check_passes_and_names_its_source() {
    let checks = selftest::run();
    for c in &checks {
        eprintln!(
            "{} {:55} {:30} {:30} {}",
            if c.pass { "pass" } else { "FAIL" },
            c.name,
            c.expected,
            c.measured,
            c.source
        );
    }
    let failed: Vec<_> = checks.iter().filter(|c| !c.pass).collect();
    assert!(failed.is_empty(), "failed checks: {failed:#?}");
    assert!(selftest::all_pass(&checks));
    for c in &checks {
        assert!(!c.source.trim().is_empty(), "{} has no source", c.name);
        assert!(!c.expected.is_empty() && !c.measured.is_empty(), "{c:?}");
        assert!(!c.tolerance.is_empty(), "{c:?}");
    }
    let names: BTreeSet<_> = checks.iter().map(|c| c.name.as_str()).collect();
    assert_eq!(names.len(), checks.len(), "check names are unique");

    // The table prints each check's name and source.
    let table = selftest::render_table(&checks);
    for c in &checks {
        assert!(table.contains(&c.name), "table lacks {}", c.name);
        assert!(table.contains(c.source), "table lacks source {}", c.source);
    }
    assert!(table.contains(selftest::VERSION));
    assert!(table.contains(&format!("{n} of {n} checks passed: PASS", n = checks.len())));
}

#[test]
fn the_brief_s_checks_are_all_there() {
    // Per window: the figures of merit, a tone on a line, Parseval.
    let checks = selftest::run();
    for kind in WindowKind::ALL {
        let w = kind.as_str();
        for what in [
            "coherent gain, N = 4096",
            "ENBW, N = 4096",
            "scallop loss, tone half a line off",
            "highest sidelobe",
            "tone on a line, peak / RMS",
            "Parseval, white noise, all lines",
        ] {
            find(&checks, &format!("{w}: {what}"));
        }
    }
    let harris = find(&checks, "hann: coherent gain, N = 4096");
    assert_eq!(harris.source, "Harris 1978, Table 1");
    let crc = find(&checks, "CRC-32/IEEE of \"123456789\"");
    assert_eq!(crc.source, "CRC catalogue");
    assert_eq!(crc.measured, "0xCBF43926");
    for name in [
        "1 g RMS at 159.155 Hz -> velocity",
        "1 g RMS at 159.155 Hz -> displacement",
        "1 g RMS at 100 Hz -> velocity",
        "1 g RMS at 10 Hz -> velocity",
        "g in m/s² (unit conversion)",
        "1 in in mm (in/s -> mm/s)",
        "tone at fs − 3000 Hz folds to 3000 Hz",
        "BWF1 encoder trailer = CRC-32/IEEE; bit flip refused",
    ] {
        assert!(!find(&checks, name).source.is_empty(), "{name}");
    }
    assert_eq!(
        find(&checks, "1 g RMS at 100 Hz -> velocity").source,
        "common practice"
    );
}

#[test]
fn json_report_carries_version_and_every_check() {
    let checks = selftest::run();
    let v: serde_json::Value =
        serde_json::from_str(&selftest::render_json(&checks)).expect("valid JSON");
    assert_eq!(v["version"], selftest::VERSION);
    assert_eq!(v["pass"], true);
    assert_eq!(v["total"], checks.len());
    let list = v["checks"].as_array().expect("checks array");
    assert_eq!(list.len(), checks.len());
    for (j, c) in list.iter().zip(&checks) {
        assert_eq!(j["name"], c.name.as_str());
        assert_eq!(j["source"], c.source);
        assert_eq!(j["pass"], true);
    }
}

#[test]
fn the_built_binary_prints_the_table_and_exits_0() {
    let out = Command::new(env!("CARGO_BIN_EXE_bandwatch"))
        .arg("selftest")
        .output()
        .expect("run bandwatch selftest");
    let stdout = String::from_utf8_lossy(&out.stdout);
    assert_eq!(
        out.status.code(),
        Some(0),
        "stdout:\n{stdout}\nstderr:\n{}",
        String::from_utf8_lossy(&out.stderr)
    );
    assert!(
        stdout.starts_with(&format!("bandwatch {} selftest", selftest::VERSION)),
        "{stdout}"
    );
    assert!(stdout.contains("Harris 1978, Table 1"), "{stdout}");
    assert!(stdout.contains("CRC catalogue"), "{stdout}");
    assert!(stdout.contains("common practice"), "{stdout}");
    assert!(!stdout.contains("FAIL  "), "{stdout}");
    let rows = stdout.lines().filter(|l| l.starts_with("pass  ")).count();
    assert_eq!(rows, selftest::run().len(), "{stdout}");
    assert!(
        stdout.trim_end().ends_with("checks passed: PASS"),
        "{stdout}"
    );
}

#[test]
fn the_built_binary_prints_json_with_the_version() {
    let out = Command::new(env!("CARGO_BIN_EXE_bandwatch"))
        .args(["selftest", "--json"])
        .output()
        .expect("run bandwatch selftest --json");
    assert_eq!(out.status.code(), Some(0));
    let v: serde_json::Value = serde_json::from_slice(&out.stdout).expect("valid JSON on stdout");
    assert_eq!(v["version"], env!("CARGO_PKG_VERSION"));
    assert_eq!(v["pass"], true);
    assert!(v["checks"].as_array().is_some_and(|a| !a.is_empty()));
}
