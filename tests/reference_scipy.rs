//! bandwatch against scipy.signal.welch and numpy.fft, bin by bin.
//!
//! Source of every expected value: the fixtures in tests/reference/fixtures,
//! written by tests/reference/make_fixtures.py with numpy and scipy from
//! PyPI (versions pinned in tests/reference/requirements.txt and recorded
//! in each file). `bash tests/external/fixtures_regenerate.sh` checks that
//! the committed fixtures are what those versions produce.
//!
//! How bandwatch is run: the same float32 samples scipy saw, cut into the
//! same segments (welch's step nperseg − noverlap is bandwatch's hop, the
//! number of segments K is the linear averaging count), one
//! `SpectrumEngine::compute` per segment, `Averager` linear over K, and
//! `BandPlan` on the average. welch 'spectrum' is bandwatch's P; welch
//! 'density' is P / (ENBW·fs/block). welch detrends by default ('constant'
//! = remove the segment mean, bandwatch's `detrend = "mean"`); the cases
//! with detrend False use `detrend = "none"`. Both keep DC and Nyquist
//! single (not doubled).
//!
//! Tolerance, per line: |ours − scipy| ≤ RTOL·|scipy| + FLOOR·peak, peak the
//! largest line of that spectrum, RTOL = 2e-5, FLOOR = 1e-9 (−90 dB).
//! bandwatch computes in f32 (window, FFT, |X|², averaging), scipy in f64.
//! A strong line carries the f32 rounding of a 1024/2048-point FFT and of
//! the sums: measured at most 2.0e-6 relative (the chirp, whose power is
//! spread thin; 5e-7 or less for tones and white noise). A weak line is
//! dominated by the FFT round-off spread over all lines, which is set by
//! the strongest lines, not by the weak line itself: measured at most
//! 2.4e-9 of the peak on lines more than 30 dB down, which RTOL covers
//! there. The worst case uses about a third of this tolerance, leaving room
//! for a different SIMD path of the FFT. Band powers: the same RTOL, with
//! the floor relative to the power of the whole spectrum times the band's
//! largest line weight (integration to velocity weighs low lines up).
//! Each test prints the worst errors it saw (`--nocapture`).

#[path = "reference/support.rs"]
mod support;

use std::path::PathBuf;

use bandwatch::dsp::window::{Window, WindowKind};
use bandwatch::units::line_factor;
use realfft::num_complex::Complex;
use realfft::RealFftPlanner;
use serde_json::Value;
use support::{f32_from_hex, f64s, fixture, run, Band, Chan, FS};

const RTOL: f64 = 2e-5;
const FLOOR: f64 = 1e-9;

const SIGNALS: [&str; 9] = [
    "tone_on_line",
    "tone_off_line",
    "multitone_noise",
    "white_noise",
    "red_noise",
    "dc_offset",
    "nyquist_tone",
    "chirp",
    "impacts",
];

fn usizes(v: &Value) -> Vec<usize> {
    v.as_array()
        .expect("array")
        .iter()
        .map(|x| x.as_u64().expect("index") as usize)
        .collect()
}

/// Largest error seen, as (relative on strong lines, absolute / peak).
#[derive(Default, Debug, Clone, Copy)]
struct Worst {
    rel: f64,
    floor: f64,
    /// Largest err / allowed: how much of the tolerance was used.
    used: f64,
}

impl Worst {
    fn merge(&mut self, o: Worst) {
        self.rel = self.rel.max(o.rel);
        self.floor = self.floor.max(o.floor);
        self.used = self.used.max(o.used);
    }
}

/// Compares `ours` to `reference` line by line with the module tolerance;
/// `lines` are the line numbers of `reference` (`None`: all, in order).
fn compare(
    what: &str,
    ours: &[f64],
    reference: &[f64],
    lines: Option<&[usize]>,
    peak: f64,
) -> Worst {
    let mut worst = Worst::default();
    let mut failures = Vec::new();
    for (i, &r) in reference.iter().enumerate() {
        let k = lines.map_or(i, |l| l[i]);
        let o = ours[k];
        let err = (o - r).abs();
        if r > 1e-3 * peak {
            worst.rel = worst.rel.max(err / r);
        } else {
            worst.floor = worst.floor.max(err / peak);
        }
        worst.used = worst.used.max(err / (RTOL * r.abs() + FLOOR * peak));
        if err > RTOL * r.abs() + FLOOR * peak {
            failures.push(format!("line {k}: bandwatch {o:e}, scipy {r:e}"));
        }
    }
    assert!(
        failures.is_empty(),
        "{what}: {} of {} lines out of tolerance, first: {:?}",
        failures.len(),
        reference.len(),
        &failures[..failures.len().min(5)]
    );
    worst
}

fn bands_of(doc: &Value) -> Vec<Band<'_>> {
    doc["bands"]
        .as_array()
        .expect("bands")
        .iter()
        .map(|b| Band {
            name: b["name"].as_str().expect("name"),
            lo_hz: b["lo_hz"].as_f64().expect("lo"),
            hi_hz: b["hi_hz"].as_f64().expect("hi"),
            unit: b["unit"].as_str().expect("unit"),
            measure: "rms",
        })
        .collect()
}

/// Checks one welch fixture file against bandwatch; returns the worst
/// spectrum and band errors seen.
fn check_signal(name: &str) -> (Worst, Worst) {
    let doc = fixture(&format!("welch_{name}.json"));
    assert_eq!(doc["fs_hz"].as_f64(), Some(FS), "{name}: sample rate");
    assert_eq!(doc["channel_unit"], "g");
    assert_eq!(
        doc["low_cut_hz"].as_f64(),
        Some(2.0),
        "bandwatch's default low cut"
    );
    let x = f32_from_hex(doc["samples_f32_hex"].as_str().expect("samples"));
    assert_eq!(x.len() as u64, doc["n_samples"].as_u64().expect("n"));
    let mut worst = (Worst::default(), Worst::default());
    let cases = doc["cases"].as_array().expect("cases");
    assert!(!cases.is_empty());
    for case in cases {
        let window = case["window"].as_str().expect("window");
        let block = case["nperseg"].as_u64().expect("nperseg") as usize;
        let noverlap = case["noverlap"].as_u64().expect("noverlap") as usize;
        let nfft = case["nfft"].as_u64().expect("nfft") as usize;
        let detrend = match &case["detrend"] {
            Value::String(s) if s == "constant" => "mean",
            Value::Bool(false) => "none",
            other => panic!("detrend {other}"),
        };
        let segments = case["segments"].as_u64().expect("segments") as usize;
        let what = format!(
            "{name} {window} block {block} overlap {noverlap} nfft {nfft} detrend {detrend}"
        );
        // welch's segment count for this record length and step.
        assert_eq!(
            segments,
            (x.len() - noverlap) / (block - noverlap),
            "{what}: K"
        );
        let spec = Chan {
            window,
            block,
            nfft,
            noverlap,
            detrend,
            averages: segments as u32,
            bands: bands_of(&doc),
        }
        .spec()
        .expect("test channel config");
        assert_eq!(spec.bins(), nfft / 2 + 1);
        assert_eq!(
            spec.df_hz(),
            case["df_hz"].as_f64().expect("df"),
            "{what}: df"
        );
        let r = run(&spec, &x);
        assert_eq!(r.averages as usize, segments);
        let enbw = r.engine.window().enbw_bins();
        assert!(
            (enbw / case["enbw_bins"].as_f64().expect("enbw") - 1.0).abs() < 1e-6,
            "{what}: ENBW {enbw}"
        );

        // 'spectrum' scaling: bandwatch's P itself, every line.
        let ours: Vec<f64> = r.averaged.iter().map(|&p| p as f64).collect();
        let spectrum = f64s(&case["spectrum"]);
        assert_eq!(spectrum.len(), ours.len(), "{what}: lines");
        let peak = spectrum.iter().cloned().fold(0.0, f64::max);
        let w = compare(&format!("{what} 'spectrum'"), &ours, &spectrum, None, peak);
        worst.0.merge(w);

        // 'density' scaling: P / (ENBW·fs/block) in units²/Hz.
        let to_density = 1.0 / (enbw * FS / block as f64);
        let ours_d: Vec<f64> = ours.iter().map(|p| p * to_density).collect();
        let density = f64s(&case["density"]);
        let lines = case.get("density_bins").map(usizes);
        let peak_d = peak * to_density;
        let w = compare(
            &format!("{what} 'density'"),
            &ours_d,
            &density,
            lines.as_deref(),
            peak_d,
        );
        worst.0.merge(w);

        // Band RMS² against Σ density·df over the band's lines.
        let total: f64 = case["band_power"]["all"].as_f64().expect("all");
        for (band, &value) in spec.bands.iter().zip(&r.bands) {
            let want = case["band_power"][band.name.as_str()]
                .as_f64()
                .unwrap_or_else(|| panic!("{what}: band {}", band.name));
            // The floor scales with the largest line weight of the band
            // (1 for g; (1000·g/2πf)² at the band's lowest line for mm/s).
            let lo_hz = match band.edges {
                bandwatch::config::BandEdges::Hz { lo, .. } => lo,
                _ => panic!("{what}: fixture bands are in Hz"),
            };
            let lowest = (lo_hz / spec.df_hz()).ceil().max(1.0) * spec.df_hz();
            let wmax = line_factor(spec.unit, band.unit, lowest, spec.integration_low_cut_hz);
            let scale = total * wmax * wmax;
            let got = value * value;
            let err = (got - want).abs();
            worst.1.used = worst.1.used.max(err / (RTOL * want + FLOOR * scale));
            assert!(
                err <= RTOL * want + FLOOR * scale,
                "{what} band {}: bandwatch RMS² {got:e}, scipy {want:e}",
                band.name
            );
            if want > 1e-3 * scale {
                worst.1.rel = worst.1.rel.max(err / want);
            } else {
                worst.1.floor = worst.1.floor.max(err / scale);
            }
        }
    }
    worst
}

macro_rules! welch_tests {
    ($($test:ident => $signal:literal),* $(,)?) => {$(
        #[test]
        fn $test() {
            let (s, b) = check_signal($signal);
            eprintln!(
                "{}: spectra: worst rel {:.1e} (lines > 1e-3 peak), worst abs {:.1e} of peak (weaker lines), {:.0}% of tolerance; bands: worst rel {:.1e}, {:.0}% of tolerance",
                $signal, s.rel, s.floor, 100.0 * s.used, b.rel, 100.0 * b.used
            );
        }
    )*};
}

welch_tests! {
    welch_tone_on_line => "tone_on_line",
    welch_tone_off_line => "tone_off_line",
    welch_multitone_noise => "multitone_noise",
    welch_white_noise => "white_noise",
    welch_red_noise => "red_noise",
    welch_dc_offset => "dc_offset",
    welch_nyquist_tone => "nyquist_tone",
    welch_chirp => "chirp",
    welch_impacts => "impacts",
}

#[test]
fn every_signal_file_is_checked() {
    // A fixture added to the generator but not here would go unchecked.
    let dir: PathBuf = [env!("CARGO_MANIFEST_DIR"), "tests", "reference", "fixtures"]
        .iter()
        .collect();
    let mut on_disk: Vec<String> = std::fs::read_dir(&dir)
        .expect("fixtures dir")
        .map(|e| e.expect("entry").file_name().to_string_lossy().into_owned())
        .filter_map(|f| {
            f.strip_prefix("welch_")
                .and_then(|s| s.strip_suffix(".json"))
                .map(str::to_owned)
        })
        .collect();
    on_disk.sort();
    let mut known: Vec<String> = SIGNALS.iter().map(|s| s.to_string()).collect();
    known.sort();
    assert_eq!(on_disk, known);
}

#[test]
fn welch_dc_and_nyquist_are_single_not_doubled() {
    // scipy convention (REFERENCES.md, spectral scaling): with detrend off,
    // DC 2.0 gives spectrum[0] = 4.0 for every window; the alternating
    // 0.7·(−1)^n is a Nyquist line of 0.49 (A², not doubled).
    let dc = fixture("welch_dc_offset.json");
    let nyq = fixture("welch_nyquist_tone.json");
    for (doc, line, want) in [(&dc, 0usize, 4.0), (&nyq, 512, 0.49)] {
        let x = f32_from_hex(doc["samples_f32_hex"].as_str().expect("samples"));
        for case in doc["cases"].as_array().expect("cases") {
            if case["detrend"] != Value::Bool(false) {
                continue;
            }
            let window = case["window"].as_str().expect("window");
            let scipy = f64s(&case["spectrum"])[line];
            assert!((scipy - want).abs() < 1e-6, "fixture {window}: {scipy}");
            let spec = Chan {
                window,
                block: 1024,
                nfft: 1024,
                noverlap: 512,
                detrend: "none",
                averages: 7,
                bands: vec![],
            }
            .spec()
            .expect("test channel config");
            let ours = run(&spec, &x).averaged[line] as f64;
            assert!(
                (ours - want).abs() < 1e-4 * want,
                "{window} line {line}: {ours}"
            );
        }
    }
}

#[test]
fn windows_match_scipy_get_window() {
    let doc = fixture("windows.json");
    let n = doc["n"].as_u64().expect("n") as usize;
    let windows = doc["windows"].as_object().expect("windows");
    assert_eq!(windows.len(), WindowKind::ALL.len(), "one entry per window");
    for k in WindowKind::ALL {
        let want = &windows[k.as_str()];
        let w = Window::new(k, n);
        let cg = want["coherent_gain"].as_f64().expect("cg");
        let enbw = want["enbw_bins"].as_f64().expect("enbw");
        // f32 coefficients: the sums agree far better than one f32 ulp.
        assert!(
            (w.coherent_gain() / cg - 1.0).abs() < 1e-6,
            "{k:?} CG {}",
            w.coherent_gain()
        );
        assert!(
            (w.enbw_bins() / enbw - 1.0).abs() < 1e-6,
            "{k:?} ENBW {}",
            w.enbw_bins()
        );
        for (i, v) in usizes(&want["sample_index"])
            .into_iter()
            .zip(f64s(&want["samples"]))
        {
            let ours = w.coeffs[i] as f64;
            assert!((ours - v).abs() < 1e-7, "{k:?} w[{i}] = {ours}, scipy {v}");
        }
    }
}

#[test]
fn realfft_matches_numpy_rfft_and_irfft() {
    let doc = fixture("fft_roundtrip.json");
    let n = doc["n"].as_u64().expect("n") as usize;
    let x = f32_from_hex(doc["samples_f32_hex"].as_str().expect("samples"));
    assert_eq!(x.len(), n);
    let re = f64s(&doc["rfft_re"]);
    let im = f64s(&doc["rfft_im"]);
    let back = f64s(&doc["irfft"]);
    let mut planner = RealFftPlanner::<f32>::new();
    let fwd = planner.plan_fft_forward(n);
    let inv = planner.plan_fft_inverse(n);
    let mut input = x.clone();
    let mut spec = fwd.make_output_vec();
    fwd.process(&mut input, &mut spec).expect("forward");
    let scale = re
        .iter()
        .zip(&im)
        .map(|(a, b)| a.hypot(*b))
        .fold(0.0, f64::max);
    for (k, c) in spec.iter().enumerate() {
        let err = (c.re as f64 - re[k]).hypot(c.im as f64 - im[k]);
        assert!(
            err < 1e-6 * scale,
            "rfft[{k}] = {c}, numpy {} {}",
            re[k],
            im[k]
        );
    }
    // Inverse of numpy's spectrum: realfft does not normalise, numpy's
    // irfft divides by n.
    let mut from_numpy: Vec<Complex<f32>> = re
        .iter()
        .zip(&im)
        .map(|(&a, &b)| Complex::new(a as f32, b as f32))
        .collect();
    let mut out = inv.make_output_vec();
    inv.process(&mut from_numpy, &mut out).expect("inverse");
    for (i, (&o, &b)) in out.iter().zip(&back).enumerate() {
        let o = o as f64 / n as f64;
        assert!((o - b).abs() < 1e-5, "irfft[{i}] = {o}, numpy {b}");
        // numpy's own round trip, to the fixture's 10 digits.
        assert!((b - x[i] as f64).abs() < 1e-9, "numpy round trip {i}");
    }
    // The same spectrum through bandwatch: rectangular window, no detrend,
    // P[k] = c_k·|X[k]|²/n², c_k = 1 at DC and Nyquist, 2 elsewhere.
    let mut e = bandwatch::dsp::spectrum::SpectrumEngine::new(
        WindowKind::Rectangular,
        n,
        n,
        bandwatch::config::Detrend::None,
    );
    let mut p = vec![0f32; e.bins()];
    e.compute(&x, &mut p);
    let pmax = scale * scale / (n * n) as f64;
    for k in 0..p.len() {
        let c = if k == 0 || k == n / 2 { 1.0 } else { 2.0 };
        let want = c * (re[k] * re[k] + im[k] * im[k]) / (n * n) as f64;
        let err = (p[k] as f64 - want).abs();
        assert!(
            err <= RTOL * want + FLOOR * pmax * 10.0,
            "P[{k}] = {}, numpy {want}",
            p[k]
        );
    }
}
