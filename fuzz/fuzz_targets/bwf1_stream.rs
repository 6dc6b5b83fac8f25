#![no_main]
// Must never panic: see the invariants in src/lib.rs.
use libfuzzer_sys::fuzz_target;

fuzz_target!(|data: &[u8]| bandwatch_fuzz::bwf1_stream(data));
