//! A frame missing in the middle of a stream resets the block assembler:
//! no spectrum comes from a block that spans the gap. The tone's phase jumps
//! at the gap, so a stitched block would smear it across the spectrum.

mod common;

use bandwatch::config::fixture::{quoted, Channel, Fixture, Source};
use bandwatch::frame::bwf1::{encode_into, Header};
use bandwatch::frame::{SampleFormat, SampleSlice};
use bandwatch::tools::replay::{replay, ReplayLine};

const FS: f64 = 25_600.0;
const S: usize = 256;

fn config() -> bandwatch::config::Config {
    common::config(
        &Fixture::new()
            .source(
                Source::new("daq", "tcp-listen")
                    .set("listen", quoted("127.0.0.1:0"))
                    .stream(1, 25_600),
            )
            .channel(
                Channel::new("c", "daq", 0)
                    .block(1024)
                    .overlap(0.0)
                    .window("hann")
                    .no_averaging()
                    .band("tone", 50.0, 150.0)
                    .band("far", 2000.0, 5000.0),
            ),
    )
}

/// 21 frames of a 100 Hz tone (line 4 of 1024 at 25.6 kHz). Frame 10 is
/// left out when `gap`; from frame 11 on the tone's phase is 2 rad ahead.
/// With `gap = false` the same samples come with contiguous indices, so
/// the reader cannot know the phase jumped: the control case.
fn stream(gap: bool) -> Vec<u8> {
    let mut out = Vec::new();
    let mut next_index = 0u64;
    for f in 0..21u64 {
        if f == 10 {
            if gap {
                next_index += S as u64;
            }
            continue;
        }
        let phase = if f > 10 { 2.0 } else { 0.0 };
        let first = f * S as u64;
        let v: Vec<f32> = (0..S as u64)
            .map(|i| {
                let t = (first + i) as f64 / FS;
                (2.0 * std::f64::consts::PI * 100.0 * t + phase).sin() as f32
            })
            .collect();
        let h = Header::new(SampleFormat::F32, 1, S as u32, next_index, 0, FS);
        encode_into(&h, SampleSlice::F32(&v), &mut out).expect("frame");
        next_index += S as u64;
    }
    out
}

fn run(gap: bool) -> Vec<ReplayLine> {
    let file =
        std::env::temp_dir().join(format!("bandwatch-gap-{}-{gap}.bwf1", std::process::id()));
    std::fs::write(&file, stream(gap)).expect("write");
    let mut out = Vec::new();
    let r = replay(&config(), &file, None, &mut out);
    let _ = std::fs::remove_file(&file);
    r.expect("replay");
    String::from_utf8(out)
        .expect("utf8")
        .lines()
        .map(|l| serde_json::from_str(l).expect("json"))
        .collect()
}

#[test]
fn no_spectrum_spans_a_missing_frame() {
    let lines = run(true);
    // Before the gap: 2560 samples -> blocks at 0 and 1024 (512 left over,
    // dropped at the gap). After it (from 2816): blocks at 2816 and 3840.
    let starts: Vec<u64> = lines.iter().map(|l| l.first_sample).collect();
    assert_eq!(starts, vec![0, 1024, 2816, 3840]);
    for l in &lines {
        let tone = l.bands[0].1.expect("tone band value");
        let far = l.bands[1].1.expect("far band value");
        assert!(
            (tone - std::f64::consts::FRAC_1_SQRT_2).abs() < 1e-3,
            "tone {tone}"
        );
        assert!(
            far < 1e-4 * tone,
            "block at {}: far band {far} vs tone {tone}",
            l.first_sample
        );
    }
}

#[test]
fn control_a_block_stitched_across_the_jump_is_smeared() {
    // Without the gap in the indices, one block holds the phase jump and
    // its far band is orders of magnitude above the clean blocks' — so the
    // check above can fail.
    let lines = run(false);
    let worst = lines
        .iter()
        .map(|l| l.bands[1].1.unwrap_or(0.0) / l.bands[0].1.unwrap_or(f64::INFINITY))
        .fold(0.0, f64::max);
    assert!(worst > 1e-3, "stitched block far/tone ratio {worst}");
}

/// The case reported against the averaging (issue: "an averaged spectrum
/// spans a sequence gap"): Hann, block 1024, overlap 0.5, linear average
/// of 4, i24 BWF1 frames of 512 at 8192 Hz; 3584 samples, then the stream
/// jumps 1000 samples ahead and sends 2560 more. The two blocks accumulated
/// before the jump are dropped with it: the first result after the gap is
/// of the four blocks from 4584 on, and says so.
#[test]
fn an_average_in_progress_is_dropped_at_a_sequence_gap() {
    let fs = 8192.0;
    let config = common::config(
        &Fixture::new()
            .source(
                Source::new("daq", "tcp-listen")
                    .set("listen", quoted("127.0.0.1:0"))
                    .stream(1, 8192),
            )
            .channel(
                Channel::new("c", "daq", 0)
                    .block(1024)
                    .overlap(0.5)
                    .window("hann")
                    .set("averaging", "{ mode = \"linear\", count = 4 }")
                    .band("tone", 50.0, 150.0),
            ),
    );
    let mut bytes = Vec::new();
    let mut frame = |first: u64| {
        let v: Vec<i32> = (first..first + 512)
            .map(|i| ((2.0 * std::f64::consts::PI * 100.0 * i as f64 / fs).sin() * 1e6) as i32)
            .collect();
        let h = Header::new(SampleFormat::I24, 1, 512, first, first * 122_070, fs);
        encode_into(&h, SampleSlice::I32(&v), &mut bytes).expect("frame");
    };
    for f in 0..7 {
        frame(f * 512);
    }
    for f in 0..5 {
        frame(4584 + f * 512);
    }
    let file = std::env::temp_dir().join(format!("bandwatch-gap-avg-{}.bwf1", std::process::id()));
    std::fs::write(&file, &bytes).expect("write");
    let mut out = Vec::new();
    let r = replay(&config, &file, None, &mut out);
    let _ = std::fs::remove_file(&file);
    r.expect("replay");
    let lines: Vec<ReplayLine> = String::from_utf8(out)
        .expect("utf8")
        .lines()
        .map(|l| serde_json::from_str(l).expect("json"))
        .collect();
    let got: Vec<(u64, u64, u32)> = lines
        .iter()
        .map(|l| (l.oldest_first_sample, l.first_sample, l.averages))
        .collect();
    // Before: blocks 0, 512, 1024, 1536 make one result; 2048 and 2560 are
    // accumulated when the gap comes and are dropped. After: 4584 … 6120.
    assert_eq!(got, vec![(0, 1536, 4), (4584, 6120, 4)]);
}
