//! The pipeline without HTTP: ring -> worker -> snapshot, and the whole
//! sim-driven pipeline on the demo scenario.

use std::sync::Arc;
use std::time::{Duration, Instant};

mod common;

use bandwatch::config::fixture::{quoted, Channel, Fixture, Source};
use bandwatch::config::parse_str_in;
use bandwatch::counters::GapReason;
use bandwatch::pipeline::state::ChannelShared;
use bandwatch::pipeline::worker::ChannelDsp;
use bandwatch::ring::channel_ring;

fn one_channel(block: usize, overlap: f64) -> bandwatch::config::ChannelSpec {
    let c = common::config(
        &Fixture::new().source(Source::new("s", "sim")).channel(
            Channel::new("c", "s", 0)
                .block(block)
                .overlap(overlap)
                .window("hann")
                .set("detrend", quoted("none"))
                .no_averaging(),
        ),
    );
    c.channels[0].clone()
}

fn tone(first: u64, n: usize, fs: f64, f: f64, phase: f64) -> Vec<f32> {
    (0..n)
        .map(|i| {
            let t = (first + i as u64) as f64 / fs;
            (2.0 * std::f64::consts::PI * f * t + phase).sin() as f32
        })
        .collect()
}

#[test]
fn no_block_spans_a_gap() {
    // Tone on line 4 of a 1024-point block at 25 600 Hz (100 Hz); its phase
    // jumps at a sequence gap. A block stitched across the jump would smear
    // the line; blocks on either side keep it clean.
    let spec = one_channel(1024, 0.0);
    let fs = spec.sample_rate_hz;
    let shared = Arc::new(ChannelShared::new(spec));
    let (mut w, r) = channel_ring(1 << 16, fs, shared.counters.clone());
    let mut dsp = ChannelDsp::new(shared.clone(), r);

    w.write(0, 1, &tone(0, 1536, fs, 100.0, 0.0));
    // 1000 samples lost, and the tone comes back with another phase.
    w.write(2536, 1, &tone(2536, 1024, fs, 100.0, 2.0));
    while dsp.poll() {}

    let c = &shared.counters;
    assert_eq!(
        c.blocks.load(std::sync::atomic::Ordering::Relaxed),
        2,
        "the 512 samples before the gap make no block"
    );
    assert_eq!(c.discontinuities(GapReason::SequenceGap), 1);
    let snap = shared.latest().expect("a snapshot");
    assert_eq!(
        snap.first_sample, 2536,
        "the second block starts after the gap"
    );
    let p = &snap.power;
    let peak = p[4];
    // Hann: a line-centred tone has nothing beyond its neighbours; a block
    // spanning the jump would put power tens of lines away.
    let far: f32 = p[20..].iter().sum();
    assert!(far < 1e-6 * peak, "leakage {far} vs peak {peak}");
    assert!((peak.sqrt() - std::f32::consts::FRAC_1_SQRT_2).abs() < 1e-3);
}

#[test]
fn overlap_framing_counts_blocks() {
    // Common practice: with hop H = block·(1 − overlap), n samples give
    // 1 + floor((n − block) / H) blocks.
    let spec = one_channel(1000, 0.75);
    assert_eq!(spec.hop, 250);
    let fs = spec.sample_rate_hz;
    let shared = Arc::new(ChannelShared::new(spec));
    let (mut w, r) = channel_ring(1 << 16, fs, shared.counters.clone());
    let mut dsp = ChannelDsp::new(shared.clone(), r);
    w.write(0, 0, &tone(0, 3000, fs, 250.0, 0.0));
    while dsp.poll() {}
    assert_eq!(
        shared
            .counters
            .blocks
            .load(std::sync::atomic::Ordering::Relaxed),
        9
    );
}

fn peak_hz(shared: &ChannelShared, lo: f64, hi: f64) -> f64 {
    let snap = shared.latest().expect("snapshot");
    let df = shared.spec.df_hz();
    let (a, b) = ((lo / df).ceil() as usize, (hi / df).floor() as usize);
    let k = (a..=b)
        .max_by(|&i, &j| snap.power[i].total_cmp(&snap.power[j]))
        .unwrap_or(a);
    k as f64 * df
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn demo_scenario_shows_its_lines() {
    let text = std::fs::read_to_string("config/demo.toml")
        .expect("demo config")
        .replace("seed = 2", "seed = 2\nspeed = 4.0");
    let config = match parse_str_in(&text, std::path::Path::new("config"), None) {
        Ok(c) => c,
        Err(e) => panic!("{e:?}"),
    };
    let pipeline = bandwatch::Pipeline::start(&config).expect("pipeline");
    let state = pipeline.state.clone();
    let deadline = Instant::now() + Duration::from_secs(30);
    while state.channels.iter().any(|c| c.latest().is_none()) {
        assert!(Instant::now() < deadline, "no spectra within 30 s");
        tokio::time::sleep(Duration::from_millis(50)).await;
    }
    let motor = state.channel("motor-de").expect("motor-de");
    let pump = state.channel("pump-de").expect("pump-de");
    // README "What the demo shows": 1x = 24.75 Hz, vane pass = 173.25 Hz; lines are
    // 3.125 Hz apart, so "within one line".
    let df = motor.spec.df_hz();
    assert!(
        (peak_hz(motor, 5.0, 1000.0) - 24.75).abs() <= df,
        "motor-de peak"
    );
    assert!(
        (peak_hz(pump, 100.0, 1000.0) - 173.25).abs() <= df,
        "pump-de vane pass"
    );
    // The overall velocity band reads near the simulated tones' combined
    // RMS (motor-de: 2.2 and 0.6 mm/s plus a little noise).
    let snap = motor.latest().expect("snapshot");
    let v = snap.bands[0].value;
    let expected = (2.2f64 * 2.2 + 0.6 * 0.6).sqrt();
    assert!(
        (v - expected).abs() < 0.05 * expected,
        "overall velocity {v} mm/s vs {expected}"
    );
    assert_eq!(motor.counters.dropped_total(), 0);
    pipeline.stop().await;
}

#[test]
fn dropped_workers_stop_and_release_their_channels() {
    // Workers own their channels' DSP on their threads; dropping the
    // workers (as a pipeline that fails to start, or is dropped, does) must
    // stop and join those threads, which drops each channel's DSP and so
    // its reference to the channel's shared state.
    let config = common::config(
        &Fixture::new()
            .source(Source::new("s", "sim"))
            .channel(Channel::new("a", "s", 0).block(1024))
            .channel(Channel::new("b", "s", 1).block(1024))
            .channel(Channel::new("c", "s", 2).block(1024)),
    );
    let mut p = bandwatch::pipeline::Builder::new(&config)
        .alarms(bandwatch::pipeline::AlarmMode::InMemory)
        .assemble()
        .expect("assemble")
        .inline();
    let shared: Vec<Arc<ChannelShared>> = p.state.channels.clone();
    let dsps: Vec<ChannelDsp> = p.channels.drain(..).collect();
    // Held by: the state, our copy, and each channel's DSP.
    assert!(shared.iter().all(|s| Arc::strong_count(s) == 3));
    let (workers, wakers) =
        bandwatch::pipeline::worker::Workers::start(2, dsps).expect("start workers");
    assert_eq!(wakers.len(), 3);
    drop(workers);
    // Control: the count falls only because the threads ended and dropped
    // their DSPs (join is part of drop, so this is not a race).
    for s in &shared {
        assert_eq!(
            Arc::strong_count(s),
            2,
            "channel {} still held",
            s.spec.name
        );
    }
}
