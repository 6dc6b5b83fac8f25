//! Absurd but finite samples (issue: "absurd finite values are published
//! as fine"): the overall levels are measured over the whole f32 range, and
//! a band whose power overflows f32 says so (`out_of_range`) instead of
//! passing as a value. Through the pipeline as the daemon assembles it.

mod common;

use bandwatch::config::fixture::{quoted, Channel, Fixture, Source};
use bandwatch::dsp::bands::BandStatus;
use bandwatch::pipeline::{AlarmMode, Builder, RingSize};

const FS: f64 = 25_600.0;

fn run(samples: &[f32]) -> std::sync::Arc<bandwatch::pipeline::state::ChannelSnapshot> {
    let config = common::config(
        &Fixture::new()
            .source(
                Source::new("daq", "tcp-listen")
                    .set("listen", quoted("127.0.0.1:0"))
                    .stream(1, FS as u32),
            )
            .channel(
                Channel::new("c", "daq", 0)
                    .block(1024)
                    .no_averaging()
                    .band("tone", 50.0, 150.0),
            ),
    );
    let mut p = Builder::new(&config)
        .ring(RingSize::Headroom(samples.len()))
        .alarms(AlarmMode::Off)
        .gather(false)
        .assemble()
        .expect("assemble")
        .inline();
    let mut w = p.take_inputs().remove(0).writer;
    assert_eq!(w.write(0, 0, samples), samples.len());
    p.drain();
    p.state.channels[0]
        .snapshot
        .load_full()
        .expect("a spectrum")
}

#[test]
fn a_square_wave_near_f32_max_reads_its_true_rms() {
    // ±3e38: RMS = peak = 3e38, crest factor 1 (common practice: a square
    // wave's crest factor is 1). Reported before: RMS 0, crest factor 0.
    let x: Vec<f32> = (0..1024)
        .map(|i| if i % 2 == 0 { 3e38 } else { -3e38 })
        .collect();
    let s = run(&x);
    assert!((s.overall.rms / 3e38 - 1.0).abs() < 1e-6, "{:?}", s.overall);
    assert!(
        (s.overall.crest_factor - 1.0).abs() < 1e-6,
        "{:?}",
        s.overall
    );
}

#[test]
fn a_band_whose_power_overflows_is_out_of_range_not_ok() {
    // A 1e20 g tone at 100 Hz: its power, 5e39 g², is past f32::MAX.
    // Reported before: value null with status "ok".
    let x: Vec<f32> = (0..1024)
        .map(|i| (1e20 * (2.0 * std::f64::consts::PI * 100.0 * i as f64 / FS).sin()) as f32)
        .collect();
    let s = run(&x);
    assert_eq!(
        s.bands[0].status,
        BandStatus::OutOfRange,
        "{:?}",
        s.bands[0]
    );
    assert!(!s.bands[0].is_ok());
    // The time-domain RMS is still measured: 1e20/√2.
    let want = 1e20 / 2f64.sqrt();
    assert!((s.overall.rms / want - 1.0).abs() < 1e-3, "{:?}", s.overall);
    // Control: the same tone at 1 g is an ordinary, valid band value.
    let y: Vec<f32> = x.iter().map(|v| v / 1e20).collect();
    let s = run(&y);
    assert_eq!(s.bands[0].status, BandStatus::Ok);
    assert!((s.bands[0].value - 2f64.sqrt().recip()).abs() < 1e-3);
}

/// The channel's health as the API shows it (`board_body`, the `health`
/// object of `/api/v1/channels/{name}`) after `samples`, on a channel with
/// the 50–150 Hz band or with no band at all.
fn health_after(samples: &[f32], with_band: bool) -> serde_json::Value {
    let mut ch = Channel::new("c", "daq", 0).block(1024).no_averaging();
    if with_band {
        ch = ch.band("tone", 50.0, 150.0);
    }
    let config = common::config(
        &Fixture::new()
            .source(
                Source::new("daq", "tcp-listen")
                    .set("listen", quoted("127.0.0.1:0"))
                    .stream(1, FS as u32),
            )
            .channel(ch),
    );
    let mut p = Builder::new(&config)
        .ring(RingSize::Headroom(samples.len()))
        .alarms(AlarmMode::InMemory)
        .gather(false)
        .assemble()
        .expect("assemble")
        .inline();
    let mut w = p.take_inputs().remove(0).writer;
    assert_eq!(w.write(0, 0, samples), samples.len());
    p.drain();
    let (health, _) = bandwatch::http::alarms::board_body(&p.state.channels[0]);
    serde_json::to_value(health).expect("health serialises")
}

fn reasons(h: &serde_json::Value) -> Vec<String> {
    h["reasons"]
        .as_array()
        .expect("reasons")
        .iter()
        .map(|r| r.as_str().expect("reason").to_string())
        .collect()
}

#[test]
fn an_absurd_valued_channel_is_not_ok_with_reason_out_of_range() {
    let tone = |amp: f64| -> Vec<f32> {
        (0..4096)
            .map(|i| (amp * (2.0 * std::f64::consts::PI * 100.0 * i as f64 / FS).sin()) as f32)
            .collect()
    };
    // A 1e20 g tone: the band's power passes f32::MAX (out_of_range band)
    // and the excursions' squares pass it too (the overall f64 pass).
    for with_band in [true, false] {
        let h = health_after(&tone(1e20), with_band);
        assert_eq!(h["ok"], false, "band {with_band}: {h}");
        assert!(
            reasons(&h).iter().any(|r| r == "out_of_range"),
            "band {with_band}: {h}"
        );
        // Control: the same tone at 1 g is never out of range.
        let h = health_after(&tone(1.0), with_band);
        assert!(
            !reasons(&h).iter().any(|r| r == "out_of_range"),
            "band {with_band}: {h}"
        );
    }
    // ±3e38 (the square wave above): measured by the f64 pass only.
    let x: Vec<f32> = (0..4096)
        .map(|i| if i % 2 == 0 { 3e38 } else { -3e38 })
        .collect();
    let h = health_after(&x, false);
    assert_eq!(h["ok"], false, "{h}");
    assert!(reasons(&h).iter().any(|r| r == "out_of_range"), "{h}");
}
