//! The `welch` mode that `bench/compare_scipy.py` drives (`--only welch
//! --signal FILE`): the whole signal of every channel written into its
//! ring at once and run through the channel DSP (the pipeline's, from
//! `pipeline::Builder`), timed, and the averaged spectra and band values
//! reported as JSON for the comparison with scipy.signal.welch.

use std::time::Instant;

use serde::Serialize;

use crate::config::BandEdges;
use crate::counters::GapReason;
use crate::pipeline::{AlarmMode, Builder, RingSize};

use super::dsp::take_writers;
use super::input::{config_text, parse_config, UNUSED_SOURCE};
use super::{io_err, BenchArgs, BenchError, Summary, FS, G_PER_COUNT, OVERLAP};

#[derive(Debug, Clone, Serialize)]
pub(crate) struct WelchBand {
    pub(crate) name: String,
    pub(crate) lo_hz: f64,
    pub(crate) hi_hz: f64,
    pub(crate) unit: String,
    pub(crate) measure: String,
    /// One value per channel.
    pub(crate) values: Vec<f64>,
}

#[derive(Debug, Clone, Serialize)]
pub(crate) struct WelchReport {
    pub(crate) n: usize,
    pub(crate) hop: usize,
    pub(crate) sample_rate_hz: f64,
    pub(crate) channels: usize,
    pub(crate) samples: usize,
    pub(crate) averages: u32,
    /// Seconds per repeat to push the whole signal through ring → DSP.
    pub(crate) seconds: Vec<f64>,
    pub(crate) median_seconds: f64,
    /// Averaged power spectrum per channel (units² per line).
    pub(crate) spectra: Vec<Vec<f32>>,
    pub(crate) bands: Vec<WelchBand>,
}

pub(crate) fn welch(args: &BenchArgs) -> Result<WelchReport, BenchError> {
    let path = args
        .signal
        .as_ref()
        .ok_or_else(|| BenchError::Usage("welch needs --signal FILE".into()))?;
    let c = args.signal_channels.max(1);
    let bytes = std::fs::read(path).map_err(io_err(format!("read {}", path.display())))?;
    let all: Vec<f32> = bytes
        .chunks_exact(4)
        .map(|b| f32::from_le_bytes([b[0], b[1], b[2], b[3]]))
        .collect();
    let len = all.len() / c;
    let n = args.n;
    let hop = (n as f64 * (1.0 - OVERLAP)).round() as usize;
    if len < n || n == 0 {
        return Err(BenchError::Usage(format!(
            "--signal has {len} samples per channel, fewer than --n {n}"
        )));
    }
    let averages = (1 + (len - n) / hop) as u32;
    let config = parse_config(&config_text(c, n, FS, UNUSED_SOURCE, averages, G_PER_COUNT))?;
    if config.channels[0].hop != hop {
        return Err(BenchError::Config(format!(
            "hop {} is not {hop}",
            config.channels[0].hop
        )));
    }
    let mut seconds = Vec::new();
    let mut last = None;
    for _ in 0..args.repeats.max(1) {
        // Rings that hold the whole signal beside two blocks; every block
        // computed in one turn; no alarms (spectra and bands only).
        let mut pipeline = Builder::new(&config)
            .ring(RingSize::Headroom(len))
            .alarms(AlarmMode::Off)
            .gather(false)
            .blocks_per_turn(usize::MAX)
            .assemble()
            .map_err(|e| BenchError::Config(e.to_string()))?
            .inline();
        let mut writers = take_writers(&mut pipeline);
        // Untimed warm-up, as scipy's arrays are warm in its process: the
        // rings' pages touched once (as a running daemon's are) and the
        // DSP run once on zeros; then a restart, which clears the averages.
        let zeros = vec![0f32; len];
        for w in writers.iter_mut() {
            w.write(0, 1, &zeros);
            w.mark_discontinuity(GapReason::Restart);
        }
        pipeline.drain();
        let t = Instant::now();
        for (i, w) in writers.iter_mut().enumerate() {
            w.write(len as u64, 2, &all[i * len..(i + 1) * len]);
        }
        pipeline.drain();
        seconds.push(t.elapsed().as_secs_f64());
        last = Some(pipeline.state.channels.clone());
    }
    let shared = last.unwrap_or_default();
    let mut spectra = Vec::new();
    let mut bands: Vec<WelchBand> = config.channels[0]
        .bands
        .iter()
        .map(|b| {
            let (lo_hz, hi_hz) = match b.edges {
                BandEdges::Hz { lo, hi } => (lo, hi),
                // The comparison config has fixed-Hz bands only.
                BandEdges::Orders { .. } => (f64::NAN, f64::NAN),
            };
            WelchBand {
                name: b.name.clone(),
                lo_hz,
                hi_hz,
                unit: b.unit.to_string(),
                measure: b.measure.as_str().into(),
                values: Vec::new(),
            }
        })
        .collect();
    for ch in &shared {
        let snap = ch
            .latest()
            .ok_or_else(|| BenchError::Lost(format!("{} published nothing", ch.spec.name)))?;
        if snap.averages != averages {
            return Err(BenchError::Lost(format!(
                "{} averaged {} blocks, not {averages}",
                ch.spec.name, snap.averages
            )));
        }
        spectra.push(snap.power.clone());
        for (b, v) in bands.iter_mut().zip(&snap.bands) {
            b.values.push(v.value);
        }
    }
    Ok(WelchReport {
        n,
        hop,
        sample_rate_hz: FS,
        channels: c,
        samples: len,
        averages,
        median_seconds: Summary::of(&seconds).median,
        seconds,
        spectra,
        bands,
    })
}
