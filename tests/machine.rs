//! Machine-aware analysis: bearing defect frequencies, order bands that
//! follow speed, envelope analysis, tach and peak-tracked speed, band
//! filtering.

use std::f64::consts::PI;
use std::sync::Arc;

use bandwatch::config::bearing::{BearingGeometry, Defect};
use bandwatch::config::{parse_str_in, BandEdges, Detrend};
use bandwatch::dsp::bands::{BandPlan, BandStatus};
use bandwatch::dsp::envelope::EnvelopeEngine;
use bandwatch::dsp::filter::band_pass;
use bandwatch::dsp::spectrum::SpectrumEngine;
use bandwatch::dsp::speed::{track_peak, TachDetector};
use bandwatch::dsp::window::WindowKind;
use bandwatch::pipeline::state::{ChannelShared, MachineShared};
use bandwatch::pipeline::worker::ChannelDsp;
use bandwatch::ring::channel_ring;

const FS: f64 = 25_600.0;

// ---------------------------------------------------------------------------
// Bearing defect frequencies
// ---------------------------------------------------------------------------

#[test]
fn bearing_frequencies_match_the_worked_examples() {
    // Formulas: Randall & Antoni, "Rolling element bearing diagnostics — a
    // tutorial", MSSP 25 (2011), eqs. for FTF/BPFO/BPFI/BSF.
    // Geometry of the bearing in the widely used Case Western Reserve
    // University bearing data set: n = 9, d = 0.3126 in, D = 1.537 in,
    // φ = 0. Values computed with a reference library (REFERENCES.md [lib]):
    // FTF 0.39831, BPFO 3.58478, BPFI 5.41522, BSF 2.35672 (orders).
    // The data set's published ratios, from memory [mem]: 0.3983, 3.5848,
    // 5.4152, and 4.7135 for 2×BSF.
    let g = BearingGeometry {
        elements: 9,
        element_diameter: 0.3126,
        pitch_diameter: 1.537,
        contact_angle_deg: 0.0,
    };
    let o = g.orders();
    assert!((o.ftf - 0.39831).abs() < 5e-6, "FTF {}", o.ftf);
    assert!((o.bpfo - 3.58478).abs() < 5e-6, "BPFO {}", o.bpfo);
    assert!((o.bpfi - 5.41522).abs() < 5e-6, "BPFI {}", o.bpfi);
    assert!((o.bsf - 2.35672).abs() < 5e-6, "BSF {}", o.bsf);
    assert!((2.0 * o.bsf - 4.7135).abs() < 1e-4, "2xBSF {}", 2.0 * o.bsf);
    // Invariants of the formulas: BPFO + BPFI = n, BPFO = n·FTF.
    assert!((o.bpfo + o.bpfi - 9.0).abs() < 1e-12);
    assert!((o.bpfo - 9.0 * o.ftf).abs() < 1e-12);

    // With a contact angle: n = 16, d = 10, D = 60, φ = 15° [lib]:
    // FTF 0.41951, BPFO 6.71210, BPFI 9.28790, BSF 2.92225.
    let g = BearingGeometry {
        elements: 16,
        element_diameter: 10.0,
        pitch_diameter: 60.0,
        contact_angle_deg: 15.0,
    };
    let o = g.orders();
    assert!((o.ftf - 0.41951).abs() < 5e-6);
    assert!((o.bpfo - 6.71210).abs() < 5e-6);
    assert!((o.bpfi - 9.28790).abs() < 5e-6);
    assert!((o.bsf - 2.92225).abs() < 5e-6);
    assert_eq!(Defect::Bpfo.as_str(), "bpfo");
}

// ---------------------------------------------------------------------------
// Order bands
// ---------------------------------------------------------------------------

fn demo() -> bandwatch::config::Config {
    let text = std::fs::read_to_string("config/demo.toml").expect("demo config");
    match parse_str_in(&text, std::path::Path::new("config"), None) {
        Ok(c) => c,
        Err(e) => panic!("{e:?}"),
    }
}

#[test]
fn demo_bearing_band_sits_on_bpfo_and_its_harmonics() {
    let c = demo();
    let pump = c
        .channels
        .iter()
        .find(|c| c.name == "pump-de")
        .expect("pump-de");
    let bpfo = pump
        .bands
        .iter()
        .find(|b| b.name == "bpfo")
        .expect("bpfo band");
    // BPFO 3.6× (README "What the demo shows"); width 0.4 orders, harmonics
    // 1..3 (config/demo.toml, band `bpfo` of `pump-de`).
    match &bpfo.edges {
        BandEdges::Orders { windows } => {
            let want = [(3.4, 3.8), (7.0, 7.4), (10.6, 11.0)];
            assert_eq!(windows.len(), 3);
            for (w, e) in windows.iter().zip(want) {
                assert!(
                    (w.0 - e.0).abs() < 1e-9 && (w.1 - e.1).abs() < 1e-9,
                    "{w:?}"
                );
            }
        }
        other => panic!("{other:?}"),
    }
}

fn tone(n: usize, f: f64, a: f64) -> Vec<f32> {
    (0..n)
        .map(|i| (a * (2.0 * PI * f * i as f64 / FS).sin()) as f32)
        .collect()
}

#[test]
fn order_band_follows_speed_and_goes_out_of_range_past_nyquist() {
    let c = demo();
    let motor = c
        .channels
        .iter()
        .find(|c| c.name == "motor-de")
        .expect("motor");
    let one_x = motor.bands.iter().find(|b| b.name == "1x").expect("1x");
    let mut e = SpectrumEngine::new(motor.window, motor.block, motor.nfft, motor.detrend);
    let plan = BandPlan::new(motor, one_x, e.noise_bandwidth_lines());
    let mut p = vec![0.0; e.bins()];
    // 1 g tone at 40.625 Hz (line 13): read in the 1x band when the shaft
    // turns at 40.625 Hz, not when it turns at 24.75 Hz.
    e.compute(&tone(motor.block, 40.625, 1.0), &mut p);
    let at_speed = plan.evaluate_at(&p, Some(40.625));
    let v = 1000.0 * 9.80665 / (2.0 * PI * 40.625) / 2f64.sqrt(); // mm/s RMS
    assert!(
        (at_speed.value / v - 1.0).abs() < 0.01,
        "{} vs {v}",
        at_speed.value
    );
    assert!(plan.evaluate_at(&p, Some(24.75)).value < 0.01 * v);
    assert_eq!(plan.evaluate_at(&p, None).status, BandStatus::NoSpeed);
    // 1.15 × 12 kHz is above Nyquist (12.8 kHz): out of range, no value.
    let far = plan.evaluate_at(&p, Some(12_000.0));
    assert_eq!(far.status, BandStatus::AboveNyquist);
    assert!(far.value.is_nan());
}

// ---------------------------------------------------------------------------
// Envelope
// ---------------------------------------------------------------------------

#[test]
fn am_carrier_gives_the_closed_form_envelope_line() {
    // REFERENCES.md [lib]: 3 kHz carrier, 107 Hz modulation, depth 0.5,
    // band 2–4 kHz: envelope-spectrum line at 107.0 Hz, amplitude 0.4997
    // (carrier amplitude 1). Common practice: the envelope of
    // A(1 + m cos 2πfm t)·cos 2πfc t is A(1 + m cos 2πfm t), a line of peak
    // amplitude A·m at fm.
    let n = 8192;
    let (fc, fm, m) = (3000.0, 107.0, 0.5);
    let x: Vec<f32> = (0..n)
        .map(|i| {
            let t = i as f64 / FS;
            ((1.0 + m * (2.0 * PI * fm * t).cos()) * (2.0 * PI * fc * t).cos()) as f32
        })
        .collect();
    let mut env = EnvelopeEngine::new(n, FS, 2000.0, 4000.0);
    let mut e = vec![0.0; n];
    env.envelope(&x, &mut e);
    let mut s = SpectrumEngine::new(WindowKind::Hann, n, n, Detrend::Mean);
    let mut p = vec![0.0; s.bins()];
    s.compute(&e, &mut p);
    // Band RMS around 107 Hz (107 is off-line: the band holds the lobe),
    // as peak amplitude.
    let df = FS / n as f64;
    let (lo, hi) = (
        ((107.0 - 10.0) / df).ceil() as usize,
        ((107.0 + 10.0) / df).floor() as usize,
    );
    let power: f64 = p[lo..=hi].iter().map(|&v| v as f64).sum::<f64>() / s.noise_bandwidth_lines();
    let peak = (2.0 * power).sqrt();
    assert!((peak - 0.4997).abs() < 0.005, "envelope line {peak}");
    let k = track_peak(&p, lo, hi).expect("peak");
    assert!((k * df - 107.0).abs() < 0.1 * df, "line at {} Hz", k * df);
}

#[test]
fn repeated_impacts_give_lines_at_the_rate_and_harmonics() {
    // Impacts at 89.1 Hz ringing a 3.2 kHz resonance (1.2 ms decay): the
    // envelope spectrum shows the impact rate and its harmonics (common
    // practice of envelope analysis).
    let n = 32_768;
    let rate = 89.1;
    let x: Vec<f32> = (0..n)
        .map(|i| {
            let t = i as f64 / FS;
            let dt = t - (t * rate).floor() / rate;
            ((-dt / 0.0012).exp() * (2.0 * PI * 3200.0 * dt).sin()) as f32
        })
        .collect();
    let mut env = EnvelopeEngine::new(n, FS, 2000.0, 5000.0);
    let mut e = vec![0.0; n];
    env.envelope(&x, &mut e);
    let mut s = SpectrumEngine::new(WindowKind::Hann, n, n, Detrend::Mean);
    let mut p = vec![0.0; s.bins()];
    s.compute(&e, &mut p);
    let df = FS / n as f64;
    let floor = p[(40.0 / df) as usize..(80.0 / df) as usize]
        .iter()
        .copied()
        .fold(0.0, f32::max);
    for h in 1..=3 {
        let f = rate * h as f64;
        let (lo, hi) = (((f - 5.0) / df) as usize, ((f + 5.0) / df) as usize);
        let k = track_peak(&p, lo, hi).expect("peak");
        assert!((k * df - f).abs() < df, "harmonic {h} at {} Hz", k * df);
        assert!(
            p[k.round() as usize] > 100.0 * floor,
            "harmonic {h} stands out"
        );
    }
}

// ---------------------------------------------------------------------------
// Round trip and band filtering
// ---------------------------------------------------------------------------

#[test]
fn inverse_fft_round_trip() {
    // Common practice: the inverse transform of the forward transform is
    // the block. f64 within 1e-9 relative; f32 (the DSP's type) within 1e-5
    // of the block's peak (f32 has ~7 digits; the FFT adds log2(N) roundings).
    use realfft::RealFftPlanner;
    let n = 4096;
    let x: Vec<f64> = (0..n)
        .map(|i| ((i * 7919) % 1000) as f64 / 500.0 - 1.0)
        .collect();
    let mut planner = RealFftPlanner::<f64>::new();
    let (f, i) = (planner.plan_fft_forward(n), planner.plan_fft_inverse(n));
    let mut input = x.clone();
    let mut spec = f.make_output_vec();
    f.process(&mut input, &mut spec).expect("forward");
    let mut back = i.make_output_vec();
    i.process(&mut spec, &mut back).expect("inverse");
    for (a, b) in x.iter().zip(&back) {
        assert!((a - b / n as f64).abs() <= 1e-9 * a.abs().max(1.0));
    }
    let x32: Vec<f32> = x.iter().map(|&v| v as f32).collect();
    let all = band_pass(&x32, FS, 0.0, FS / 2.0);
    for (a, b) in x32.iter().zip(&all) {
        assert!((a - b).abs() <= 1e-5, "{a} vs {b}");
    }
}

#[test]
fn band_filter_passes_inside_and_removes_outside() {
    // Inside: a tone on a line in the band passes within 0.5 %. Outside:
    // a tone on a line outside is removed (ideal filter on a circular
    // block; measured attenuation below is > 100 dB, f32 round-off).
    let n = 8192;
    let df = FS / n as f64;
    let inside = tone(n, 64.0 * df, 1.0);
    let outside = tone(n, 400.0 * df, 1.0);
    let mix: Vec<f32> = inside.iter().zip(&outside).map(|(a, b)| a + b).collect();
    let y = band_pass(&mix, FS, 50.0 * df, 100.0 * df);
    let rms =
        |v: &[f32]| (v.iter().map(|&x| (x as f64).powi(2)).sum::<f64>() / v.len() as f64).sqrt();
    let pass = rms(&y) / rms(&inside);
    assert!((pass - 1.0).abs() < 0.005, "pass {pass}");
    let resid: Vec<f32> = y.iter().zip(&inside).map(|(a, b)| a - b).collect();
    let atten_db = 20.0 * (rms(&resid) / rms(&outside)).log10();
    assert!(
        atten_db < -100.0,
        "outside tone attenuated only {atten_db} dB"
    );
}

// ---------------------------------------------------------------------------
// Speed
// ---------------------------------------------------------------------------

fn pulses(f_of_t: impl Fn(f64) -> f64, n: usize) -> Vec<f32> {
    // Integrate the speed to a shaft angle; 4 V for 10 % of each turn.
    let mut angle = 0.0;
    (0..n)
        .map(|i| {
            angle += f_of_t(i as f64 / FS) / FS;
            if angle.fract() < 0.1 {
                4.0
            } else {
                0.0
            }
        })
        .collect()
}

#[test]
fn tach_reads_a_known_rate_within_a_tenth_of_a_percent() {
    for rpm in [600.0, 1485.0, 3000.0] {
        let f = rpm / 60.0;
        let mut t = TachDetector::new(FS, 1, 2.0, 0.5, 8);
        t.push(0, &pulses(|_| f, 60_000));
        let got = t.speed_hz().expect("speed") * 60.0;
        assert!((got / rpm - 1.0).abs() < 1e-3, "{rpm} rpm read as {got}");
    }
    // Two pulses per rev.
    let mut t = TachDetector::new(FS, 2, 2.0, 0.5, 8);
    t.push(0, &pulses(|_| 2.0 * 24.75, 60_000));
    assert!((t.speed_hz().expect("speed") / 24.75 - 1.0).abs() < 1e-3);
}

#[test]
fn tach_follows_a_speed_ramp() {
    // 20 → 30 rev/s over 4 s; the reading lags by about half the 4-rev
    // averaging span, so compare with the speed at that lag.
    let ramp = |t: f64| 20.0 + 2.5 * t;
    let x = pulses(ramp, (4.0 * FS) as usize);
    let mut t = TachDetector::new(FS, 1, 2.0, 0.5, 4);
    for (i, chunk) in x.chunks(2560).enumerate() {
        t.push((i * 2560) as u64, chunk);
        if i >= 4 {
            let now = ((i + 1) * 2560) as f64 / FS;
            let got = t.speed_hz().expect("speed");
            let span = 4.0 / got;
            let want = ramp(t.last_edge_s().expect("edge") - span / 2.0);
            assert!((got / want - 1.0).abs() < 0.01, "t={now}: {got} vs {want}");
        }
    }
}

#[test]
fn pulses_stopping_make_speed_stale_and_order_bands_out_of_service() {
    let text = std::fs::read_to_string("config/demo.toml")
        .expect("demo")
        .replace("stale_s = 2.0 }", "stale_s = 0.2 }");
    let cfg = match parse_str_in(&text, std::path::Path::new("config"), None) {
        Ok(c) => c,
        Err(e) => panic!("{e:?}"),
    };
    let machines: Vec<Arc<MachineShared>> = cfg
        .machines
        .iter()
        .map(|m| Arc::new(MachineShared::new(m.clone())))
        .collect();
    let tach_machine = machines
        .iter()
        .find(|m| m.spec.name == "p2-tach")
        .expect("p2-tach")
        .clone();
    let mut spec = cfg
        .channels
        .iter()
        .find(|c| c.name == "tach")
        .expect("tach")
        .clone();
    spec.machine = Some("p2-tach".into());
    let shared = Arc::new(ChannelShared::new(spec.clone()));
    let (mut w, r) = channel_ring(1 << 18, FS, shared.counters.clone());
    let mut dsp = ChannelDsp::with_machines(shared.clone(), r, &machines);
    w.write(0, 1, &pulses(|_| 24.75, 20_000));
    while dsp.poll() {}
    let s = tach_machine.speed_hz().expect("speed while pulses come");
    assert!((s / 24.75 - 1.0).abs() < 1e-3);
    // No more pulses: a flat line. After stale_s the speed is unknown.
    std::thread::sleep(std::time::Duration::from_millis(300));
    w.write(20_000, 1, &vec![0.0; 20_000]);
    while dsp.poll() {}
    assert_eq!(tach_machine.speed_hz(), None);
    // An order band on this machine now has no value.
    let one_x = cfg.channels[0]
        .bands
        .iter()
        .find(|b| b.name == "1x")
        .expect("1x");
    let e = SpectrumEngine::new(spec.window, spec.block, spec.nfft, spec.detrend);
    let plan = BandPlan::new(&cfg.channels[0], one_x, e.noise_bandwidth_lines());
    let v = plan.evaluate_at(&vec![1.0; spec.bins()], tach_machine.speed_hz());
    assert_eq!(v.status, BandStatus::NoSpeed);
}

#[test]
fn peak_tracking_recovers_an_off_line_tone_within_a_tenth_of_a_line() {
    // Estimator: parabola through the log power of the three top lines
    // (Gaussian interpolation, Gasior & Gonzalez, CERN AB-Note-2004-021),
    // Hann window. Swept across a line.
    let n = 8192;
    let df = FS / n as f64;
    let mut e = SpectrumEngine::new(WindowKind::Hann, n, n, Detrend::Mean);
    let mut p = vec![0.0; e.bins()];
    let mut worst: f64 = 0.0;
    for step in 0..=10 {
        let f = (8.0 + step as f64 / 10.0) * df;
        e.compute(&tone(n, f, 1.0), &mut p);
        let k = track_peak(&p, 4, 12).expect("peak");
        worst = worst.max((k - f / df).abs());
    }
    assert!(worst < 0.1, "worst error {worst} lines");
}
