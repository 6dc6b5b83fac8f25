//! A discontinuity of every reason in the middle of an average: the next
//! spectrum the channel publishes is that of the samples after the gap
//! alone, for linear, exponential and peak-hold averaging.
//!
//! Reference: `tests/reference/fixtures/gap_resets.json`, made by
//! `tests/reference/make_fixtures.py` with the pinned scipy
//! (`scipy.signal.welch`, average 'mean', of the first four post-gap
//! blocks; the per-line maximum of the same blocks' spectra from
//! `scipy.signal.spectrogram`; the exponential average of six post-gap
//! blocks computed by numpy from the spectrogram's blocks with the rule of
//! the README, "Averaging"). The channel is assembled by
//! `pipeline::Builder` as the daemon's is and fed through its real ring,
//! where the ring itself makes the overflow and non-finite gaps.

#[path = "reference/support.rs"]
mod support;

mod common;

use bandwatch::config::fixture::{quoted, Channel, Fixture, Source};
use bandwatch::config::Config;
use bandwatch::counters::GapReason;
use bandwatch::pipeline::{AlarmMode, Builder, Inline, RingSize};
use bandwatch::ring::RingWriter;
use serde_json::Value;

const FS: f64 = 25_600.0;
const CHUNK: usize = 512;
/// Tolerance of the scipy comparison, as in `tests/reference_scipy.rs`
/// (f32 against f64): |ours − scipy| ≤ RTOL·|scipy| + FLOOR·peak.
const RTOL: f64 = 2e-5;
const FLOOR: f64 = 1e-9;

struct Doc {
    x: Vec<f32>,
    gap_at: usize,
    block: usize,
    hop: usize,
    count: usize,
    doc: Value,
}

fn doc() -> Doc {
    let path = concat!(
        env!("CARGO_MANIFEST_DIR"),
        "/tests/reference/fixtures/gap_resets.json"
    );
    let text = std::fs::read_to_string(path).expect("fixture");
    let doc: Value = serde_json::from_str(&text).expect("fixture json");
    assert_eq!(doc["fs_hz"].as_f64(), Some(FS));
    assert_eq!(doc["window"], "hann");
    let x = support::f32_from_hex(doc["samples_f32_hex"].as_str().expect("samples"));
    let n = |k: &str| doc[k].as_u64().expect(k) as usize;
    Doc {
        gap_at: n("gap_at"),
        block: n("block"),
        hop: n("hop"),
        count: n("count"),
        x,
        doc,
    }
}

fn config(d: &Doc, mode: &str) -> Config {
    common::config(
        &Fixture::new()
            .source(
                Source::new("daq", "tcp-listen")
                    .set("listen", quoted("127.0.0.1:0"))
                    .stream(1, FS as u32),
            )
            .channel(
                Channel::new("c", "daq", 0)
                    .block(d.block)
                    .overlap(1.0 - d.hop as f64 / d.block as f64)
                    .window("hann")
                    .set(
                        "averaging",
                        format!("{{ mode = {}, count = {} }}", quoted(mode), d.count),
                    ),
            ),
    )
}

fn ts(index: usize) -> u64 {
    (index as f64 * 1e9 / FS) as u64
}

/// A channel's pipeline with a ring of two blocks (so that the overflow
/// case can fill it), driven inline; gathering off, so the DSP empties
/// the ring on every drain.
struct Rig {
    pipeline: Inline,
    writer: RingWriter,
}

impl Rig {
    fn new(config: &Config) -> Rig {
        let mut pipeline = Builder::new(config)
            .ring(RingSize::Headroom(0))
            .alarms(AlarmMode::InMemory)
            .gather(false)
            .assemble()
            .expect("assemble")
            .inline();
        let writer = pipeline.take_inputs().remove(0).writer;
        Rig { pipeline, writer }
    }

    /// Writes `x[from..to]` with stream indices `from..` in chunks,
    /// draining after each; panics if the ring refused a sample.
    fn feed(&mut self, x: &[f32], from: usize, to: usize) {
        let mut a = from;
        while a < to {
            let b = (a + CHUNK).min(to);
            let n = self.writer.write(a as u64, ts(a), &x[a..b]);
            assert_eq!(n, b - a, "ring refused samples at {a}");
            self.pipeline.drain();
            a = b;
        }
    }

    fn counters(&self) -> &bandwatch::counters::ChannelCounters {
        &self.pipeline.state.channels[0].counters
    }

    fn latest(&self) -> std::sync::Arc<bandwatch::pipeline::state::ChannelSnapshot> {
        self.pipeline.state.channels[0]
            .snapshot
            .load_full()
            .expect("a published spectrum")
    }
}

/// Feeds the record up to a break of `reason` whose first sample after is
/// `d.gap_at`, with samples before it left in the average being
/// accumulated (so a channel that does not reset would mix them in).
fn break_at(rig: &mut Rig, d: &Doc, reason: GapReason) {
    let g = d.gap_at;
    match reason {
        GapReason::SequenceGap => {
            // 3584 samples (six blocks), then the stream jumps to g.
            rig.feed(&d.x, 0, 3584);
        }
        GapReason::Restart => {
            rig.feed(&d.x, 0, 3584);
            rig.writer.mark_discontinuity(GapReason::Restart);
        }
        GapReason::NonFinite => {
            // Contiguous indices up to g; the sample at g − 1 is NaN.
            let mut y = d.x[..g].to_vec();
            y[g - 1] = f32::NAN;
            rig.feed(&y, 0, g - 1);
            let n = rig.writer.write((g - 1) as u64, ts(g - 1), &y[g - 1..g]);
            assert_eq!(n, 0);
            assert_eq!(rig.counters().dropped(GapReason::NonFinite), 1);
        }
        GapReason::RingOverflow => {
            // Two blocks' ring: 2048 samples fit while the DSP is away,
            // the next 488 do not.
            rig.feed(&d.x, 0, 2048);
            let cap = rig.writer.vacant();
            assert_eq!(cap, 2 * d.block, "ring capacity");
            assert_eq!(rig.writer.write(2048, ts(2048), &d.x[2048..4096]), 2048);
            assert_eq!(rig.writer.write(4096, ts(4096), &d.x[4096..g]), 0);
            assert_eq!(
                rig.counters().dropped(GapReason::RingOverflow),
                (g - 4096) as u64
            );
            rig.pipeline.drain();
        }
    }
    // Something is accumulated on the old side of the break.
    assert!(
        rig.counters()
            .blocks
            .load(std::sync::atomic::Ordering::Relaxed)
            >= 5
    );
}

fn compare(what: &str, ours: &[f32], reference: &Value) {
    let r: Vec<f64> = reference
        .as_array()
        .expect("spectrum")
        .iter()
        .map(|v| v.as_f64().expect("number"))
        .collect();
    assert_eq!(ours.len(), r.len(), "{what}: lines");
    let peak = r.iter().cloned().fold(0.0, f64::max);
    let bad: Vec<String> = ours
        .iter()
        .zip(&r)
        .enumerate()
        .filter(|(_, (&o, &w))| (o as f64 - w).abs() > RTOL * w.abs() + FLOOR * peak)
        .map(|(k, (o, w))| format!("line {k}: bandwatch {o:e}, scipy {w:e}"))
        .take(5)
        .collect();
    assert!(bad.is_empty(), "{what}: {bad:?}");
}

fn check(reason: GapReason, mode: &str) {
    let d = doc();
    let g = d.gap_at;
    let span = d.block + (d.count - 1) * d.hop;
    let mut rig = Rig::new(&config(&d, mode));
    break_at(&mut rig, &d, reason);
    let before = rig.latest().seq;
    rig.feed(&d.x, g, g + span);
    assert!(
        rig.counters().discontinuities(reason) >= 1,
        "{mode}: no {} gap was marked",
        reason.as_str()
    );
    let s = rig.latest();
    let what = format!("{} / {mode}", reason.as_str());
    assert!(s.seq > before, "{what}: nothing published after the gap");
    assert_eq!(s.averages as usize, d.count, "{what}: averages");
    assert_eq!(s.oldest_first_sample, g as u64, "{what}: oldest block");
    assert_eq!(
        s.first_sample,
        (g + span - d.block) as u64,
        "{what}: newest"
    );
    let reference = match mode {
        "peak-hold" => &d.doc["peak_hold"],
        // Exponential weighs block n by 1/n while n ≤ count: the mean.
        _ => &d.doc["linear"],
    };
    compare(&what, &s.power, reference);
    if mode == "exponential" {
        // Two more blocks: now weighted 1/count each.
        rig.feed(&d.x, g + span, g + span + 2 * d.hop);
        let s = rig.latest();
        assert_eq!(s.oldest_first_sample, g as u64, "{what}: oldest block");
        compare(
            &format!("{what}, 6 blocks"),
            &s.power,
            &d.doc["exponential_6"],
        );
    }
}

macro_rules! gap_tests {
    ($($name:ident => $reason:expr, $mode:literal;)*) => {$(
        #[test]
        fn $name() {
            check($reason, $mode);
        }
    )*};
}

gap_tests! {
    sequence_gap_linear => GapReason::SequenceGap, "linear";
    sequence_gap_exponential => GapReason::SequenceGap, "exponential";
    sequence_gap_peak_hold => GapReason::SequenceGap, "peak-hold";
    restart_linear => GapReason::Restart, "linear";
    restart_exponential => GapReason::Restart, "exponential";
    restart_peak_hold => GapReason::Restart, "peak-hold";
    non_finite_linear => GapReason::NonFinite, "linear";
    non_finite_exponential => GapReason::NonFinite, "exponential";
    non_finite_peak_hold => GapReason::NonFinite, "peak-hold";
    ring_overflow_linear => GapReason::RingOverflow, "linear";
    ring_overflow_exponential => GapReason::RingOverflow, "exponential";
    ring_overflow_peak_hold => GapReason::RingOverflow, "peak-hold";
}

/// Control: the same record with no break gives a spectrum that the
/// comparison rejects (it mixes in blocks from before `gap_at`), so the
/// checks above can fail.
#[test]
fn control_an_unbroken_stream_does_not_match_the_post_gap_reference() {
    let d = doc();
    let mut rig = Rig::new(&config(&d, "exponential"));
    let span = d.block + (d.count - 1) * d.hop;
    rig.feed(&d.x, 0, d.gap_at + span);
    let s = rig.latest();
    let r = std::panic::catch_unwind(|| compare("control", &s.power, &d.doc["linear"]));
    assert!(r.is_err(), "a spectrum spanning older blocks matched");
}
