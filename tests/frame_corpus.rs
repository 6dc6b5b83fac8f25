//! Replays the committed fuzz corpus (fuzz/corpus/<target>/) through the
//! same harness the fuzz targets run, so stable `cargo test` checks that no
//! seed panics or breaks a memory bound. The fuzz crate itself needs a
//! nightly toolchain and cargo-fuzz; this does not.
#![allow(clippy::unwrap_used)] // tests may unwrap: a panic is a failed test

#[path = "../fuzz/src/lib.rs"]
mod harness;

use std::panic::{catch_unwind, AssertUnwindSafe};
use std::path::Path;

fn replay(target: &str, run: fn(&[u8])) {
    let dir = Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("fuzz/corpus")
        .join(target);
    let mut files: Vec<_> = std::fs::read_dir(&dir)
        .unwrap_or_else(|e| panic!("{}: {e}", dir.display()))
        .map(|e| e.unwrap().path())
        .filter(|p| p.is_file())
        .collect();
    files.sort();
    assert!(
        files.len() >= 3,
        "{target}: seed corpus too small ({})",
        files.len()
    );
    let mut failed = Vec::new();
    for f in &files {
        let data = std::fs::read(f).unwrap();
        // Every prefix too: truncation at each byte is a case of its own.
        let cut_points = (0..=data.len()).step_by(1 + data.len() / 64);
        for cut in cut_points.chain([data.len()]) {
            if catch_unwind(AssertUnwindSafe(|| run(&data[..cut]))).is_err() {
                failed.push(format!("{} (first {cut} bytes)", f.display()));
                break;
            }
        }
    }
    assert!(
        failed.is_empty(),
        "{target}: harness panicked on {failed:#?}"
    );
}

#[test]
fn corpus_bwf1_stream() {
    replay("bwf1_stream", harness::bwf1_stream);
}

#[test]
fn corpus_bwf1_datagram() {
    replay("bwf1_datagram", harness::bwf1_datagram);
}

#[test]
fn corpus_lines() {
    replay("lines", harness::lines);
}

#[test]
fn corpus_raw() {
    replay("raw", harness::raw);
}
