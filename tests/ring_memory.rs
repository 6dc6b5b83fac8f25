//! Ring sizes (issue 13: "`ring_seconds = 600` with a 10 MHz source aborts
//! the process on allocation (exit 134) instead of being refused by
//! validation"). A ring whose memory passes the bounds of README "Config
//! reference" (`dsp.ring_seconds`) is refused by validation, by `bandwatch
//! check` and by `bandwatch run` with an error naming the field and the
//! bytes; an allocation that fails anyway is an error, not an abort.

use std::process::Command;
use std::sync::Arc;

use bandwatch::config::fixture::{quoted, Channel, Fixture, Source};
use bandwatch::config::{parse_str, ParseError, MAX_RING_BYTES_PER_CHANNEL};

/// A 10 MHz, 1-channel stream source with `ring_seconds` (and `channels`
/// channels at `rate`).
fn config_text(ring_seconds: f64, channels: usize, rate: u32) -> String {
    Fixture::new()
        .raw(&format!(
            "[dsp]\nworkers = 1\nring_seconds = {ring_seconds}"
        ))
        .source(
            Source::new("daq", "tcp-listen")
                .set("listen", quoted("127.0.0.1:0"))
                .stream(channels, rate),
        )
        .channels("c", "daq", channels, |c: Channel| c.block(1024))
        .toml()
}

fn issues(text: &str) -> Vec<String> {
    match parse_str(text) {
        Ok(_) => Vec::new(),
        Err(ParseError::Invalid(v)) => v.iter().map(|i| i.to_string()).collect(),
        Err(ParseError::Toml(m)) => vec![m],
    }
}

#[test]
fn a_ring_past_the_per_channel_bound_is_refused_with_its_bytes() {
    // 600 s × 10 MHz × 4 bytes = 24 000 000 000 bytes.
    let got = issues(&config_text(600.0, 1, 10_000_000));
    assert!(
        got.iter().any(|m| m.starts_with("dsp.ring_seconds")
            && m.contains("24000000000 bytes")
            && m.contains(&MAX_RING_BYTES_PER_CHANNEL.to_string())),
        "{got:#?}"
    );
}

#[test]
fn rings_past_the_total_bound_are_refused_though_each_fits() {
    // 64 channels × 600 s × 100 kHz × 4 bytes = 15 360 000 000 bytes in
    // all; each ring is 240 000 000 bytes, under the per-channel bound.
    let got = issues(&config_text(600.0, 64, 100_000));
    assert_eq!(got.len(), 1, "{got:#?}");
    assert!(
        got[0].starts_with("dsp.ring_seconds") && got[0].contains("15360000000 bytes in all"),
        "{got:#?}"
    );
}

#[test]
fn rings_within_the_bounds_are_accepted() {
    // 2 s × 10 MHz × 4 = 80 MB; 64 × 2 s × 100 kHz × 4 = 51 MB.
    assert!(issues(&config_text(2.0, 1, 10_000_000)).is_empty());
    assert!(issues(&config_text(2.0, 64, 100_000)).is_empty());
}

#[test]
fn check_and_run_refuse_it_with_an_exit_code_not_an_abort() {
    let dir = std::env::temp_dir().join(format!("bandwatch-ring-{}", std::process::id()));
    std::fs::create_dir_all(&dir).expect("temp dir");
    let path = dir.join("huge.toml");
    std::fs::write(&path, config_text(600.0, 1, 10_000_000)).expect("config");
    let bin = env!("CARGO_BIN_EXE_bandwatch");
    for args in [
        vec!["check", "--config", path.to_str().expect("path")],
        vec![
            "run",
            "--config",
            path.to_str().expect("path"),
            "--listen",
            "127.0.0.1:0",
        ],
    ] {
        let out = Command::new(bin).args(&args).output().expect("bandwatch");
        let err = String::from_utf8_lossy(&out.stderr);
        let all = format!("{err}{}", String::from_utf8_lossy(&out.stdout));
        // Exit 134 is SIGABRT (the allocation failure this replaces); a
        // refused config exits with a code of its own.
        assert!(
            out.status.code().is_some() && out.status.code() != Some(134),
            "{args:?}: {:?}\n{all}",
            out.status
        );
        assert!(!out.status.success(), "{args:?} accepted it:\n{all}");
        assert!(
            all.contains("dsp.ring_seconds") && all.contains("24000000000 bytes"),
            "{args:?}: {all}"
        );
    }
    let _ = std::fs::remove_dir_all(&dir);
}

#[test]
fn a_ring_that_cannot_be_allocated_is_an_error() {
    // 2^42 samples = 16 TiB: more than any allocator here hands out.
    let counters = Arc::new(bandwatch::counters::ChannelCounters::default());
    match bandwatch::ring::try_channel_ring(1 << 42, 1000.0, counters) {
        Ok(_) => panic!("a 16 TiB ring was allocated"),
        Err(e) => {
            assert_eq!(e.bytes, 1 << 44);
            assert!(e.to_string().contains("17592186044416 bytes"), "{e}");
        }
    }
}
