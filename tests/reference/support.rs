//! Helpers shared by the reference tests (`tests/reference_*.rs`), included
//! with `#[path]` so that they are not a test crate of their own.
//!
//! The channel builder, the worker's stages, the fixed-seed generator and
//! the tone live in `bandwatch::tools::selftest`, which `bandwatch selftest` runs
//! on a user's machine; the tests use the same code, and this file adds
//! what only tests need (a panicking `run`, the fixture decoder). Build a
//! channel with `Chan { .. }.spec().expect(..)`: it goes through
//! `config::parse_str` and checks that the hop is `block − noverlap`.
#![allow(dead_code)]

use bandwatch::config::ChannelSpec;
#[allow(unused_imports)] // each test file uses a different part
pub use bandwatch::tools::selftest::{
    tone, BandSetup as Band, ChannelSetup as Chan, Run, SplitMix64, FS,
};

/// Runs bandwatch's DSP stages over `x` as the worker does (see
/// `bandwatch::tools::selftest::run_stages`): one `SpectrumEngine::compute` per
/// block, `Averager` (linear, count blocks), then each `BandPlan` on the
/// averaged spectrum. Uses exactly `spec.average_count` blocks starting at
/// sample 0; panics if `x` is too short or the averager publishes nothing.
pub fn run(spec: &ChannelSpec, x: &[f32]) -> Run {
    let r = bandwatch::tools::selftest::run_stages(spec, x).unwrap_or_else(|e| panic!("{e}"));
    assert_eq!(r.averages, spec.average_count, "blocks in the average");
    r
}

/// Decodes float32 samples written as big-endian bit patterns in hex
/// (8 characters a sample), the fixtures' exact encoding.
pub fn f32_from_hex(hex: &str) -> Vec<f32> {
    assert_eq!(hex.len() % 8, 0, "hex length");
    (0..hex.len() / 8)
        .map(|i| {
            let bits = u32::from_str_radix(&hex[8 * i..8 * i + 8], 16).expect("hex digit");
            f32::from_bits(bits)
        })
        .collect()
}

/// A fixture of tests/reference/fixtures, parsed.
pub fn fixture(name: &str) -> serde_json::Value {
    let path: std::path::PathBuf = [
        env!("CARGO_MANIFEST_DIR"),
        "tests",
        "reference",
        "fixtures",
        name,
    ]
    .iter()
    .collect();
    let text = std::fs::read_to_string(&path).unwrap_or_else(|e| panic!("{path:?}: {e}"));
    serde_json::from_str(&text).unwrap_or_else(|e| panic!("{path:?}: {e}"))
}

/// A JSON array of numbers.
pub fn f64s(v: &serde_json::Value) -> Vec<f64> {
    v.as_array()
        .expect("array")
        .iter()
        .map(|x| x.as_f64().expect("number"))
        .collect()
}
