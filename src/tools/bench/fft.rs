//! The `fft` phase, the limit every compute phase is measured against: raw
//! realfft forward transforms of length N, and [`side_by_side`], which
//! times a rig's work in slices alternating with the f32 FFT so that both
//! see the same machine load. [`compute_phases`] runs the fft, dsp and
//! path phases, interleaved per repeat.

use std::sync::Arc;
use std::time::{Duration, Instant};

use realfft::num_traits::FromPrimitive;
use realfft::{FftNum, RealFftPlanner};

use crate::frame::SampleFormat;

use super::dsp::DspRig;
use super::input::{bench_config, test_signal, UNUSED_SOURCE};
use super::path::PathRig;
use super::{wants, BenchArgs, BenchError, Row, Summary, FS};

/// A forward real FFT of length n in type `T`, timed in slices. The input
/// is restored from a pristine copy before each transform (realfft uses its
/// input as scratch).
pub(crate) struct FftBench<T: FftNum> {
    fft: Arc<dyn realfft::RealToComplex<T>>,
    pristine: Vec<T>,
    input: Vec<T>,
    output: Vec<realfft::num_complex::Complex<T>>,
    scratch: Vec<realfft::num_complex::Complex<T>>,
}

impl<T: FftNum + FromPrimitive> FftBench<T> {
    pub(crate) fn new(n: usize) -> FftBench<T> {
        let fft = RealFftPlanner::<T>::new().plan_fft_forward(n);
        let pristine = test_signal(n, FS)
            .iter()
            .map(|&x| T::from_f32(x).unwrap_or_else(T::zero))
            .collect();
        FftBench {
            input: fft.make_input_vec(),
            output: fft.make_output_vec(),
            scratch: fft.make_scratch_vec(),
            fft,
            pristine,
        }
    }

    /// Runs transforms for at least `min`; returns (transforms, time).
    fn slice(&mut self, min: Duration) -> (u64, Duration) {
        let mut count = 0u64;
        let start = Instant::now();
        loop {
            for _ in 0..8 {
                self.input.copy_from_slice(&self.pristine);
                let _ = self.fft.process_with_scratch(
                    &mut self.input,
                    &mut self.output,
                    &mut self.scratch,
                );
            }
            count += 8;
            let el = start.elapsed();
            if el >= min {
                std::hint::black_box(&self.output);
                return (count, el);
            }
        }
    }

    /// Transforms per second over at least `min`.
    pub(crate) fn rate(&mut self, min: Duration) -> f64 {
        self.slice(Duration::from_millis(5));
        let (n, t) = self.slice(min);
        n as f64 / t.as_secs_f64()
    }
}

/// Slices a side-by-side measurement is cut into.
const SLICES: u32 = 8;

/// Measures `work` (returning samples and timed duration per call) against
/// the f32 FFT in alternating slices of about `min / SLICES` each, so that
/// both see the same machine load. Returns (work rate, FFT input-sample
/// rate = FFTs/s × hop) over the whole measurement.
///
/// # Errors
/// The first error of `work` (its untimed setup failed).
pub(crate) fn side_by_side(
    fft: &mut FftBench<f32>,
    hop: usize,
    min: Duration,
    mut work: impl FnMut() -> Result<(u64, Duration), BenchError>,
) -> Result<(f64, f64), BenchError> {
    let slice = min / SLICES;
    let (mut wn, mut wt) = (0u64, Duration::ZERO);
    let (mut fnum, mut ft) = (0u64, Duration::ZERO);
    for _ in 0..SLICES {
        let (a, b) = fft.slice(slice);
        fnum += a;
        ft += b;
        let target = wt + slice;
        while wt < target {
            let (a, b) = work()?;
            wn += a;
            wt += b;
        }
    }
    Ok((
        wn as f64 / wt.as_secs_f64(),
        fnum as f64 * hop as f64 / ft.as_secs_f64(),
    ))
}

/// The fft, dsp and path phases, interleaved per repeat: each rig's rate
/// is measured side by side with the f32 FFT, so that its ratio to the
/// limit holds on a loaded machine.
pub(crate) fn compute_phases(
    args: &BenchArgs,
    signal: &Arc<Vec<f32>>,
    hop: usize,
    rows: &mut Vec<Row>,
) -> Result<(), BenchError> {
    let repeats = args.repeats.max(1);
    let n = args.n;
    let min = Duration::from_secs_f64(args.work_seconds.max(0.01));
    let formats = [SampleFormat::I16, SampleFormat::I24, SampleFormat::F32];
    let mut f32_rate = Vec::new();
    let mut f64_rate = Vec::new();
    // Per row: (rate, the FFT rate measured beside it) per repeat.
    let mut dsp: Vec<Vec<(f64, f64)>> = vec![Vec::new(); args.channels.len()];
    let mut dsp_alarms: Vec<Vec<(f64, f64)>> = vec![Vec::new(); args.channels.len()];
    let mut path: Vec<Vec<Vec<(f64, f64)>>> =
        vec![vec![Vec::new(); formats.len()]; args.channels.len()];
    let mut dsp_rigs = Vec::new();
    let mut path_rigs = Vec::new();
    for &c in &args.channels {
        let config = bench_config(c, n, FS, UNUSED_SOURCE)?;
        if wants(args, "dsp") {
            dsp_rigs.push((
                DspRig::build(&config, signal.clone(), false)?,
                DspRig::build(&config, signal.clone(), true)?,
            ));
        }
        if wants(args, "path") {
            path_rigs.push(
                formats
                    .iter()
                    .map(|&f| PathRig::new(c, n, f, signal))
                    .collect::<Result<Vec<_>, _>>()?,
            );
        }
    }
    let mut fft32 = FftBench::<f32>::new(n);
    let mut fft64 = FftBench::<f64>::new(n);
    for r in 0..repeats {
        eprintln!("bench: compute repeat {}/{repeats}", r + 1);
        if wants(args, "fft") {
            f32_rate.push(fft32.rate(min) * hop as f64);
            f64_rate.push(fft64.rate(min) * hop as f64);
        }
        for (i, (plain, alarmed)) in dsp_rigs.iter_mut().enumerate() {
            dsp[i].push(plain.rate(&mut fft32, min)?);
            dsp_alarms[i].push(alarmed.rate(&mut fft32, min)?);
        }
        for (i, rigs) in path_rigs.iter_mut().enumerate() {
            for (j, rig) in rigs.iter_mut().enumerate() {
                path[i][j].push(rig.rate(&mut fft32, min)?);
            }
        }
    }
    let f64_ratio: Vec<f64> = f64_rate.iter().zip(&f32_rate).map(|(a, b)| a / b).collect();
    let rates = |v: &[(f64, f64)]| v.iter().map(|x| x.0).collect::<Vec<f64>>();
    let ratio = |v: &[(f64, f64)]| {
        let r: Vec<f64> = v.iter().map(|(a, b)| a / b).collect();
        Some(Summary::of(&r))
    };
    if wants(args, "fft") {
        rows.push(Row {
            phase: "fft".into(),
            case: format!("realfft f32 N={n}"),
            unit: "samples/s/core".into(),
            value: Summary::of(&f32_rate),
            ratio: None,
            target: Some("the limit (FFT/s x hop)".into()),
        });
        rows.push(Row {
            phase: "fft".into(),
            case: format!("realfft f64 N={n}"),
            unit: "samples/s/core".into(),
            value: Summary::of(&f64_rate),
            ratio: Some(Summary::of(&f64_ratio)),
            target: None,
        });
    }
    if wants(args, "dsp") {
        for (i, &c) in args.channels.iter().enumerate() {
            rows.push(Row {
                phase: "dsp".into(),
                case: format!("{c} channels"),
                unit: "samples/s/core".into(),
                value: Summary::of(&rates(&dsp[i])),
                ratio: ratio(&dsp[i]),
                target: (c == 64).then(|| ">= 0.70 x fft".into()),
            });
        }
        for (i, &c) in args.channels.iter().enumerate() {
            rows.push(Row {
                phase: "dsp".into(),
                case: format!("{c} ch + alarms"),
                unit: "samples/s/core".into(),
                value: Summary::of(&rates(&dsp_alarms[i])),
                ratio: ratio(&dsp_alarms[i]),
                target: None,
            });
        }
    }
    if wants(args, "path") {
        for (i, &c) in args.channels.iter().enumerate() {
            for (j, f) in formats.iter().enumerate() {
                rows.push(Row {
                    phase: "path".into(),
                    case: format!("{c} ch {}", f.as_str()),
                    unit: "samples/s/core".into(),
                    value: Summary::of(&rates(&path[i][j])),
                    ratio: ratio(&path[i][j]),
                    target: Some(">= 0.55 x fft".into()),
                });
            }
        }
    }
    // What the 4096-channel target needs, from the measured DSP rate.
    if let Some(i) = args.channels.iter().position(|&c| c == 1024) {
        if !dsp_alarms.is_empty() && !dsp_alarms[i].is_empty() {
            let need = 4096.0 * FS;
            let cores: Vec<f64> = dsp_alarms[i].iter().map(|r| need / r.0).collect();
            rows.push(Row {
                phase: "dsp".into(),
                case: "4096 ch x 25.6 kHz + alarms".into(),
                unit: "cores needed".into(),
                value: Summary::of(&cores),
                ratio: None,
                target: Some("< 2 cores, with CPU to spare".into()),
            });
        }
    }
    drop(dsp_rigs);
    drop(path_rigs);
    Ok(())
}
