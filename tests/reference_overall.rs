//! What "overall" means in bandwatch, and that its two readings agree.
//!
//! bandwatch reports two kinds of overall level:
//! - the channel's `overall` (`dsp::stats::overall`, published as
//!   `bandwatch_channel_rms_*`) is **time-domain**: the RMS of the newest
//!   block about its mean, with no other filtering;
//! - an "overall velocity" (or any broadband band such as 10–1000 Hz) is a
//!   **spectral sum**: band RMS = √(Σ P[k]·W[k] / B) over the band's lines,
//!   B the window's noise bandwidth in lines (see `dsp::bands`).
//!
//! Parseval's theorem (common practice) says the two are the same quantity
//! when they cover the same frequencies. These tests show it on bandwatch's
//! own code paths, for every window:
//! 1. the time-domain RMS (mean removed) of a multi-tone + noise record
//!    equals the band RMS over every line above DC of the Welch average of
//!    the same record (`detrend = "mean"`, so DC is excluded on both sides);
//! 2. the band RMS of 10–1000 Hz equals the time-domain RMS of the same
//!    signal filtered to 10–1000 Hz. The filtered reference is made by
//!    construction, not by a digital filter: the signal is a sum of known
//!    components, and the reference is the sum of only those inside the band
//!    (an ideal filter, with no skirt to argue about). Components are kept
//!    well away from the band edges, so that the test is about the scaling,
//!    not about how a window splits a component sitting on an edge;
//! 3. for one rectangular block the identity is exact (to f32 rounding).
//!
//! Tolerances are stated at each test. For tapered windows and a record of
//! many overlapped blocks the two readings are two estimates from the same
//! samples that weigh them differently (the window weighs the middle of each
//! block more), so they differ by a small random amount, not a bias; with a
//! missing noise-bandwidth correction a Hann reading would be 22 % high
//! (√1.5), a flat top 94 % (√3.77), far outside them.
//!
//! Resolution matters near DC: here the lowest tone (24.75 Hz) sits on line
//! 15.8 (1.5625 Hz lines). With 6.25 Hz lines it sat on line 3.96, inside
//! the main lobe's reach of DC, where the tone's lobe overlaps that of its
//! mirror image at −f and spills onto the DC line; the all-lines reading
//! was then measured +1.31 % (flat top), +0.26 % (Blackman-Harris), +0.08 %
//! (Hann). Keep the lowest component of interest many lines above DC.

#[path = "reference/support.rs"]
mod support;

use bandwatch::dsp::stats;
use bandwatch::dsp::window::WindowKind;
use support::{run, Band, Chan, SplitMix64, FS};

/// One sinusoid of the test signal.
struct Component {
    f_hz: f64,
    amplitude: f64,
    phase: f64,
}

/// The test signal: pump-like tones of the demo scenario's P2 train (1×
/// 24.75 Hz, 2×, vane pass 173.25 Hz, a 3.2 kHz resonance) plus 80
/// random-phase sinusoids at random frequencies spread over the spectrum
/// (band-limited "noise" whose in-band part is known exactly).
fn components(seed: u64) -> Vec<Component> {
    let mut g = SplitMix64(seed);
    let mut c = vec![
        Component {
            f_hz: 24.75,
            amplitude: 0.5,
            phase: 0.3,
        },
        Component {
            f_hz: 49.5,
            amplitude: 0.15,
            phase: 1.9,
        },
        Component {
            f_hz: 173.25,
            amplitude: 0.3,
            phase: 4.0,
        },
        Component {
            f_hz: 3200.0,
            amplitude: 0.2,
            phase: 0.7,
        },
    ];
    // 40 in band (30–950 Hz) and 40 stronger ones out of band (1.5–12 kHz).
    for (lo, hi, a) in [(30.0, 950.0, 0.03), (1500.0, 12_000.0, 0.06)] {
        for _ in 0..40 {
            c.push(Component {
                f_hz: lo + (hi - lo) * g.uniform(),
                amplitude: a * (0.5 + g.uniform()),
                phase: 2.0 * std::f64::consts::PI * g.uniform(),
            });
        }
    }
    c
}

/// `offset` plus the sum of the components that `keep` accepts, n samples.
fn synthesize(c: &[Component], n: usize, offset: f64, keep: impl Fn(f64) -> bool) -> Vec<f32> {
    let kept: Vec<&Component> = c.iter().filter(|c| keep(c.f_hz)).collect();
    (0..n)
        .map(|i| {
            let t = i as f64 / FS;
            let s: f64 = kept
                .iter()
                .map(|c| c.amplitude * (2.0 * std::f64::consts::PI * c.f_hz * t + c.phase).cos())
                .sum();
            (offset + s) as f32
        })
        .collect()
}

const BLOCK: usize = 16_384;
const HOP: usize = BLOCK / 2;
const AVERAGES: u32 = 16;
/// Samples of the record: exactly the blocks of one average.
const RECORD: usize = BLOCK + (AVERAGES as usize - 1) * HOP;

fn chan<'a>(window: &'a str, lo_hz: f64, hi_hz: f64) -> Chan<'a> {
    Chan {
        window,
        block: BLOCK,
        nfft: BLOCK,
        noverlap: BLOCK - HOP,
        detrend: "mean",
        averages: AVERAGES,
        bands: vec![Band {
            name: "overall",
            lo_hz,
            hi_hz,
            unit: "g",
            measure: "rms",
        }],
    }
}

#[test]
fn time_domain_overall_equals_band_rms_over_all_lines() {
    // Common practice (Parseval). Multi-tone + white noise (σ = 0.1 g) on
    // a 0.3 g offset, 5.4 s: 16 384-sample blocks (1.5625 Hz lines) at 50 %
    // overlap, 16 averages. Band: line 1 (6.25 Hz) to Nyquist; the mean is removed from
    // each block (detrend) and from the record (stats::overall), so DC is
    // out of both. Tolerance 0.5 % for every window (measured at most
    // 0.035 %, rectangular: see the printout).
    let c = components(0x0fe0_0001);
    let mut x = synthesize(&c, RECORD, 0.3, |_| true);
    for (v, n) in x.iter_mut().zip(SplitMix64(0x0fe0_0002).white(RECORD, 0.1)) {
        *v += n;
    }
    let time = stats::overall(&x).rms;
    let mut errors = Vec::new();
    for kind in WindowKind::ALL {
        let setup = chan(kind.as_str(), FS / BLOCK as f64, FS / 2.0);
        let spec = setup.spec().expect("test channel config");
        let band = run(&spec, &x).bands[0];
        let err = band / time - 1.0;
        eprintln!(
            "{:16} time RMS {time:.6} g, band RMS (lines 1..N/2) {band:.6} g, {:+.4} %",
            kind.as_str(),
            100.0 * err
        );
        errors.push((kind, err));
    }
    for (kind, err) in errors {
        assert!(err.abs() < 5e-3, "{kind:?}: band/time − 1 = {err}");
    }
}

#[test]
fn band_rms_10_to_1000_hz_equals_time_rms_of_the_signal_filtered_to_that_band() {
    // Common practice (Parseval over a band). The signal has components
    // below 10 Hz (a 0.3 g offset), inside 10–1000 Hz (24.75, 49.5, 173.25
    // Hz and 40 sinusoids in 30–950 Hz) and above it (3.2 kHz and 40
    // sinusoids in 1.5–12 kHz). The filtered reference is built from the
    // in-band components only (see the module note) and its time-domain
    // RMS computed by stats::overall. Tolerance 0.5 % for every window
    // (measured at most 0.17 %, flat top: see the printout); letting the
    // out-of-band part in would read 22 % high.
    let c = components(0x0fe0_0003);
    let x = synthesize(&c, RECORD, 0.3, |_| true);
    let in_band = synthesize(&c, RECORD, 0.0, |f| (10.0..=1000.0).contains(&f));
    let reference = stats::overall(&in_band).rms;
    let all = stats::overall(&x).rms;
    eprintln!("whole signal {all:.5} g, in band (reference) {reference:.5} g");
    assert!(all > reference * 1.2, "the out-of-band part must matter");
    let mut errors = Vec::new();
    for kind in WindowKind::ALL {
        let spec = chan(kind.as_str(), 10.0, 1000.0)
            .spec()
            .expect("test channel config");
        let band = run(&spec, &x).bands[0];
        let err = band / reference - 1.0;
        eprintln!(
            "{:16} 10–1000 Hz band RMS {band:.6} g vs filtered time RMS {reference:.6} g: {:+.4} %",
            kind.as_str(),
            100.0 * err
        );
        errors.push((kind, err));
    }
    for (kind, err) in errors {
        assert!(err.abs() < 5e-3, "{kind:?}: band/reference − 1 = {err}");
    }
}

#[test]
fn one_rectangular_block_is_parseval_exact() {
    // Parseval's theorem for the DFT (common practice): with a rectangular
    // window (Σw = N, B = 1) Σ_k P[k] = (1/N)·Σ x², exactly. One block of
    // the multi-tone + noise signal, mean removed on both sides; f32
    // rounding only: tolerance 1e-5 relative.
    let c = components(0x0fe0_0004);
    let mut x = synthesize(&c, BLOCK, 0.3, |_| true);
    for (v, n) in x.iter_mut().zip(SplitMix64(0x0fe0_0005).white(BLOCK, 0.1)) {
        *v += n;
    }
    let mut setup = chan("rectangular", 0.0, FS / 2.0);
    setup.averages = 1;
    setup.noverlap = 0;
    let spec = setup.spec().expect("test channel config");
    let band = run(&spec, &x).bands[0];
    let time = stats::overall(&x).rms;
    eprintln!("one rectangular block: band {band:.7} g, time {time:.7} g");
    assert!((band / time - 1.0).abs() < 1e-5, "{band} vs {time}");
}
