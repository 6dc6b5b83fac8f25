//! A capture replays: a trip in the demo (the built-in `p2-pump` scenario,
//! sped up, with a low BPFO alert limit so that it trips within seconds)
//! stores a capture; `bandwatch replay` of that capture alone (the real
//! binary, and the library entry point) recomputes the spectrum and band
//! values stored with it. A replay that accepts no frame fails and says
//! why; a capture written before the settings were stored gives a typed
//! error naming what is missing, and replays with the config supplied.

#![allow(clippy::unwrap_used)] // tests may unwrap: a panic is a failed test

mod alarm_common;

use std::path::{Path, PathBuf};
use std::process::Command;
use std::time::{Duration, Instant};

use alarm_common::TempDir;
use bandwatch::alarm::capture::{self, CaptureMeta};
use bandwatch::config::{parse_str, AveragingMode, Config};
use bandwatch::tools::replay::{replay_capture, ReplayError, ReplayLine, REPRODUCE_REL};

/// The stated bound, relative per value: 1e-6, about 8 ulp of f32
/// (ε = 2⁻²³ ≈ 1.19e-7; f32 machine epsilon, IEEE 754 binary32). Replay
/// runs the same code on the same f32 samples, so on this machine the
/// difference should be 0; see `tools::replay::REPRODUCE_REL`.
const BOUND: f64 = 1e-6;

fn config(text: &str) -> Config {
    match parse_str(text) {
        Ok(c) => c,
        Err(e) => panic!("{e:?}"),
    }
}

/// Runs the sped-up demo until pump-de's BPFO alarm has stored a complete
/// capture; returns the capture directory and its id.
async fn demo_capture(dir: &Path) -> (PathBuf, String) {
    let cfg = config(&alarm_common::demo_text(dir, 10.0));
    let p = bandwatch::Pipeline::start(&cfg).unwrap();
    let caps = dir.join("data/captures");
    let deadline = Instant::now() + Duration::from_secs(120);
    let id = loop {
        let l = capture::list(&caps).unwrap();
        if let Some(c) = l
            .iter()
            .find(|c| c.channel == "pump-de" && c.band == "bpfo")
        {
            break c.id.clone();
        }
        assert!(Instant::now() < deadline, "no BPFO capture: {l:?}");
        tokio::time::sleep(Duration::from_millis(50)).await;
    };
    p.stop().await;
    (caps, id)
}

fn max_rel(got: &[f64], want: &[f64]) -> f64 {
    assert_eq!(got.len(), want.len());
    got.iter()
        .zip(want)
        .map(|(g, w)| if g == w { 0.0 } else { ((g - w) / w).abs() })
        .fold(0.0, f64::max)
}

fn bandwatch() -> Command {
    Command::new(env!("CARGO_BIN_EXE_bandwatch"))
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_demo_trip_capture_replays_to_its_stored_spectrum_and_bands() {
    let dir = TempDir::new("capture-replay");
    let (caps, id) = demo_capture(dir.path()).await;
    let meta = capture::read_meta(&caps, &id).unwrap();

    // What the capture records.
    assert_eq!(meta.version, capture::META_VERSION);
    assert!(meta.complete, "{}", meta.end_reason);
    let s = meta.settings.as_ref().expect("settings stored");
    assert_eq!((s.block, s.nfft, s.hop), (8192, 8192, 2048));
    assert_eq!((s.averaging, s.average_count), (AveragingMode::Linear, 4));
    assert_eq!(s.envelope, Some([2000.0, 5000.0]));
    // 1485 rpm = 24.75 Hz, the fixed speed of machine p2 (config/demo.toml).
    assert_eq!(s.speed_hz, Some(24.75));
    let sp = meta.spectrum.as_ref().expect("spectrum at the trip");
    assert_eq!(sp.averages, 4);
    // Linear average of 4 blocks of 8192 with hop 2048: 14336 samples.
    assert_eq!(sp.oldest_first_sample, Some(sp.first_sample - 3 * 2048));
    assert_eq!(sp.end_sample, Some(sp.first_sample + 8192));
    assert_eq!(sp.end_sample, Some(meta.trip.at_sample));
    let w = &meta.waveform;
    assert!(
        w.first_sample <= sp.first_sample - 3 * 2048,
        "the capture holds every sample of the averaged blocks: from {} vs {}",
        w.first_sample,
        sp.first_sample - 3 * 2048
    );
    // Bands of every kind have a stored value: fixed Hz, orders,
    // bearing (three order windows, envelope spectrum).
    for b in ["overall-velocity", "1x", "vane-pass", "bpfo", "bpfi"] {
        assert!(meta.bands.iter().any(|x| x.band == b), "band {b} stored");
    }

    // The real binary, given only the capture's .json.
    let json = caps.join(format!("{id}.json"));
    let o = bandwatch().arg("replay").arg(&json).output().unwrap();
    let stderr = String::from_utf8_lossy(&o.stderr);
    assert!(o.status.success(), "replay failed: {stderr}");
    assert!(stderr.contains("reproduced (bound 1e-6)"), "{stderr}");
    let lines: Vec<ReplayLine> = String::from_utf8(o.stdout)
        .unwrap()
        .lines()
        .map(|l| serde_json::from_str(l).unwrap())
        .collect();
    let at = lines
        .iter()
        .find(|l| l.first_sample == sp.first_sample)
        .expect("a replayed result at the trip");
    assert_eq!(at.averages, 4);
    let (got, want): (Vec<f64>, Vec<f64>) = meta
        .bands
        .iter()
        .map(|b| {
            let v = at
                .bands
                .iter()
                .find(|(n, _)| n == &b.band)
                .and_then(|(_, v)| *v)
                .unwrap_or(f64::NAN);
            (v, b.value)
        })
        .unzip();
    let bands_bin = max_rel(&got, &want);
    assert!(bands_bin <= BOUND, "binary: bands differ by {bands_bin:e}");
    // The .bwf1 path names the same capture.
    let o2 = bandwatch()
        .arg("replay")
        .arg(caps.join(format!("{id}.bwf1")))
        .output()
        .unwrap();
    assert!(o2.status.success());
    assert_eq!(
        String::from_utf8_lossy(&o2.stdout),
        lines
            .iter()
            .map(|l| serde_json::to_string(l).unwrap() + "\n")
            .collect::<String>()
    );

    // The library entry point: the whole spectrum, compared here line by line.
    let mut out = Vec::new();
    let r = replay_capture(&json, None, &mut out).unwrap();
    let check = r.check.expect("trip result replayed");
    assert_eq!(check.averages, 4);
    let replayed: Vec<f64> = check.spectrum.iter().map(|v| f64::from(*v)).collect();
    let stored: Vec<f64> = sp.values.iter().map(|v| f64::from(*v)).collect();
    let spec_rel = max_rel(&replayed, &stored);
    assert!(spec_rel <= BOUND, "spectrum differs by {spec_rel:e}");
    assert!(check.bands_max_rel <= BOUND && check.spectrum_max_rel <= BOUND);
    assert!(check.reproduced(), "{check}");
    assert_eq!(REPRODUCE_REL, BOUND);
    eprintln!(
        "capture {id}: {} lines, max rel diff {spec_rel:e}; {} bands, max rel diff {bands_bin:e}; replay from sample {} (capture from {})",
        replayed.len(),
        meta.bands.len(),
        r.from_sample,
        w.first_sample
    );

    // The check is not vacuous: the same capture with the trip speed 1 %
    // off moves the order-band edges, and the band values with them.
    let other = TempDir::new("capture-replay-speed");
    let mut m2: CaptureMeta = meta.clone();
    if let Some(s) = &mut m2.settings {
        s.speed_hz = Some(24.75 * 1.01);
    }
    std::fs::write(
        other.path().join(format!("{id}.json")),
        serde_json::to_vec(&m2).unwrap(),
    )
    .unwrap();
    std::fs::copy(
        caps.join(format!("{id}.bwf1")),
        other.path().join(format!("{id}.bwf1")),
    )
    .unwrap();
    let r2 = replay_capture(
        &other.path().join(format!("{id}.json")),
        None,
        &mut Vec::new(),
    )
    .unwrap();
    let c2 = r2.check.unwrap();
    assert_eq!(
        c2.spectrum_max_rel, 0.0,
        "the spectrum does not use the speed"
    );
    assert!(c2.bands_max_rel > 1e-4, "{c2}");
    assert!(!c2.reproduced());

    // A capture written before the settings were stored (version 1).
    let old = TempDir::new("capture-replay-v1");
    let mut v: serde_json::Value =
        serde_json::from_slice(&std::fs::read(caps.join(format!("{id}.json"))).unwrap()).unwrap();
    v["version"] = 1.into();
    let o = v.as_object_mut().unwrap();
    o.remove("settings");
    let spv = o.get_mut("spectrum").unwrap().as_object_mut().unwrap();
    spv.remove("oldest_first_sample");
    spv.remove("end_sample");
    let old_json = old.path().join(format!("{id}.json"));
    std::fs::write(&old_json, serde_json::to_vec_pretty(&v).unwrap()).unwrap();
    std::fs::copy(
        caps.join(format!("{id}.bwf1")),
        old.path().join(format!("{id}.bwf1")),
    )
    .unwrap();
    match replay_capture(&old_json, None, &mut Vec::new()) {
        Err(ReplayError::CaptureIncomplete {
            version,
            channel,
            missing,
            ..
        }) => {
            assert_eq!(version, 1);
            assert_eq!(channel, "pump-de");
            assert!(missing.starts_with("settings"), "{missing}");
        }
        Err(e) => panic!("wrong error: {e}"),
        Ok(_) => panic!("an old capture replayed without its settings"),
    }
    let o = bandwatch().arg("replay").arg(&old_json).output().unwrap();
    assert!(!o.status.success());
    let stderr = String::from_utf8_lossy(&o.stderr);
    assert!(
        stderr.contains("does not hold settings") && stderr.contains("--config"),
        "{stderr}"
    );
    // With the config that produced it, the old capture replays too.
    let cfg = config(&alarm_common::demo_text(dir.path(), 10.0));
    let r3 = replay_capture(&old_json, Some(&cfg), &mut Vec::new()).unwrap();
    let c3 = r3.check.unwrap();
    assert!(c3.reproduced(), "{c3}");
}

#[test]
fn a_replay_that_accepts_no_frame_fails_and_counts_why() {
    let dir = TempDir::new("replay-nothing");
    // One-channel f32 BWF1 frames, as a capture's waveform, replayed into
    // the 4-channel source of config/examples/tcp-listen.toml.
    let mut bytes = Vec::new();
    for k in 0..5u64 {
        let samples = vec![0.25f32; 256];
        let h = bandwatch::frame::bwf1::Header::new(
            bandwatch::frame::SampleFormat::F32,
            1,
            256,
            k * 256,
            0,
            25_600.0,
        );
        bandwatch::frame::bwf1::encode_into(
            &h,
            bandwatch::frame::SampleSlice::F32(&samples),
            &mut bytes,
        )
        .unwrap();
    }
    let file = dir.path().join("one-channel.bwf1");
    std::fs::write(&file, &bytes).unwrap();
    let o = bandwatch()
        .args(["replay", "--config", "config/examples/tcp-listen.toml"])
        .arg(&file)
        .output()
        .unwrap();
    let stderr = String::from_utf8_lossy(&o.stderr);
    assert!(!o.status.success(), "{stderr}");
    assert!(
        stderr.contains("0 frames accepted")
            && stderr.contains("5 rejected channel_count_mismatch")
            && stderr.contains("has 1 channels, the config says 4"),
        "{stderr}"
    );
    assert!(o.stdout.is_empty());

    // The library says the same, typed.
    let text = std::fs::read_to_string("config/examples/tcp-listen.toml").unwrap();
    let cfg = config(&text);
    match bandwatch::tools::replay::replay(&cfg, &file, None, &mut Vec::new()) {
        Err(ReplayError::NothingAccepted(r)) => {
            assert_eq!(r.bytes, bytes.len() as u64);
            assert_eq!(r.channels, 4);
            assert_eq!(r.reasons.len(), 1);
            assert_eq!(
                (r.reasons[0].0.as_str(), r.reasons[0].1),
                ("channel_count_mismatch", 5)
            );
        }
        Err(e) => panic!("wrong error: {e}"),
        Ok(_) => panic!("replay accepted nothing and succeeded"),
    }

    // Bytes that hold no frame at all.
    let junk = dir.path().join("junk.bin");
    std::fs::write(&junk, vec![0x5au8; 1000]).unwrap();
    let o = bandwatch()
        .args(["replay", "--config", "config/examples/tcp-listen.toml"])
        .arg(&junk)
        .output()
        .unwrap();
    let stderr = String::from_utf8_lossy(&o.stderr);
    assert!(!o.status.success(), "{stderr}");
    assert!(
        stderr.contains("0 frames accepted from 1000 bytes: 1 rejected bad_magic"),
        "{stderr}"
    );
}
