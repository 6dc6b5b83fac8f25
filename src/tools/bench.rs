//! `bandwatch bench`: measures, in one run and side by side, what each stage
//! of the pipeline costs, so that the ratios between them mean something on
//! a noisy shared machine.
//!
//! Phases (`--only` picks some):
//! - `fft`: raw realfft throughput for the configured N, f32 and f64: the
//!   limit. Its "input samples/s" is FFTs/s × hop, the input rate that the
//!   FFTs alone could keep up with at the configured 75 % overlap.
//! - `dsp`: the DSP stage alone (ring → `ChannelDsp`: window, FFT, power,
//!   averaging, bands, snapshot publish) over 1, 64, 1024 … channels.
//! - `path`: the whole path from BWF1 frames in memory: decode (i16, i24,
//!   f32), scale, ring, DSP, bands, publish.
//! - `memory`: resident bytes per channel and the total for the largest
//!   channel count, measured in a child process so that nothing else this
//!   process allocated is counted.
//! - `ingest`: BWF1 over real loopback TCP and UDP into the running
//!   pipeline: the highest aggregate sample rate held with zero drops.
//! - `http`: `/metrics` render time and body size, and `/metrics` and
//!   spectrum latency at fixed request rates while the DSP runs flat out,
//!   paced to real time, or not at all, and what that load costs the DSP.
//! - `welch`: not a phase of the default run; the mode
//!   `bench/compare_scipy.py` drives (`--signal FILE`).
//!
//! Every compute phase runs on one thread, so its rates are per core. The
//! phases of one repeat run one after another, and ratios are taken within
//! a repeat, then summarised (median, min–max) over the repeats.

use std::io::Write as _;
use std::path::PathBuf;
use std::sync::atomic::{AtomicBool, AtomicU64, Ordering};
use std::sync::Arc;
use std::time::{Duration, Instant};

use realfft::num_traits::FromPrimitive;
use realfft::{FftNum, RealFftPlanner};
use serde::Serialize;

use crate::config::{parse_str, ChannelSpec, Config, StreamSpec};
use crate::counters::SourceCounters;
use crate::frame::bwf1::{encode_into, Header, CRC_BYTES, DEFAULT_MAX_FRAME_BYTES};
use crate::frame::{SampleFormat, SampleSlice};
use crate::pipeline::state::{AppState, ChannelShared};
use crate::pipeline::worker::ChannelDsp;
use crate::ring::{channel_ring, RingWriter};
use crate::source::framed::{FrameSink, StreamFraming};
use crate::source::{ChannelInput, SourceOutputs};

/// Sample rate of every bench channel (the demo's; README "What the demo shows").
const FS: f64 = 25_600.0;
/// Overlap of every bench channel (the demo's).
const OVERLAP: f64 = 0.75;
/// Converter step in g per count: ±5 V over 24 bits, 100 mV/g (the demo's).
const G_PER_COUNT: f64 = 5.0 / 8_388_608.0 / 0.1;
/// Instants per BWF1 frame in the `path` phase (`send`'s default).
const FRAME_SAMPLES: usize = 256;
/// Bytes handed to the stream decoder at a time: a socket read's worth.
const READ_BYTES: usize = 64 * 1024;
/// Channels of the `ingest` phase (and the `http` phase's default).
const LOAD_CHANNELS: usize = 64;

#[derive(Debug, Clone, clap::Args)]
pub struct BenchArgs {
    /// Block and FFT length N.
    #[arg(long, default_value_t = 8192)]
    pub n: usize,
    /// Channel counts of the dsp and path phases; the largest is also the
    /// memory phase's total.
    #[arg(long, value_delimiter = ',', default_value = "1,64,1024")]
    pub channels: Vec<usize>,
    /// Repeats of every measurement (ingest: at most 3).
    #[arg(long, default_value_t = 5)]
    pub repeats: usize,
    /// Seconds of each ingest step and of each http measurement.
    #[arg(long, default_value_t = 2.0)]
    pub seconds: f64,
    /// Seconds of timed work per compute measurement (fft, dsp, path).
    #[arg(long, default_value_t = 0.5)]
    pub work_seconds: f64,
    /// Phases to run, comma separated: fft, dsp, path, memory, ingest, http
    /// (default: all), or welch (with --signal).
    #[arg(long, value_delimiter = ',')]
    pub only: Vec<String>,
    /// Also write the results as JSON here.
    #[arg(long)]
    pub json: Option<PathBuf>,
    /// welch: raw little-endian f32 samples, channel after channel.
    #[arg(long)]
    pub signal: Option<PathBuf>,
    /// welch: channels in --signal.
    #[arg(long, default_value_t = 1)]
    pub signal_channels: usize,
    /// http: channel counts (each also gets the render and body-size rows).
    #[arg(long, value_delimiter = ',', default_value = "64")]
    pub http_channels: Vec<usize>,
    /// http: DSP load during the requests, `flat` (flat out), `paced`
    /// (real time: 25.6 kHz per channel) and/or `idle` (no DSP work).
    #[arg(long, value_delimiter = ',', default_value = "flat,paced")]
    pub http_load: Vec<String>,
    /// http: request rates, requests/s (alternating /metrics and spectrum).
    #[arg(long, value_delimiter = ',', default_value = "200")]
    pub http_rates: Vec<f64>,
    /// Internal: measure memory for this many channels and print one JSON line.
    #[arg(long, hide = true)]
    pub memory_child: Option<usize>,
}

#[derive(Debug, thiserror::Error)]
pub enum BenchError {
    #[error("bad option: {0}")]
    Usage(String),
    #[error("{what}: {source}")]
    Io {
        what: String,
        #[source]
        source: std::io::Error,
    },
    #[error("bench config does not validate: {0}")]
    Config(String),
    #[error("{0}")]
    Lost(String),
}

fn io_err(what: impl Into<String>) -> impl FnOnce(std::io::Error) -> BenchError {
    let what = what.into();
    move |source| BenchError::Io { what, source }
}

/// Median, min and max of a set of measurements.
#[derive(Debug, Clone, Serialize)]
pub struct Summary {
    pub median: f64,
    pub min: f64,
    pub max: f64,
    pub values: Vec<f64>,
}

impl Summary {
    pub fn of(values: &[f64]) -> Summary {
        let mut v: Vec<f64> = values.iter().copied().filter(|x| x.is_finite()).collect();
        v.sort_by(f64::total_cmp);
        if v.is_empty() {
            return Summary {
                median: f64::NAN,
                min: f64::NAN,
                max: f64::NAN,
                values: values.to_vec(),
            };
        }
        let m = v.len() / 2;
        let median = if v.len() % 2 == 1 {
            v[m]
        } else {
            0.5 * (v[m - 1] + v[m])
        };
        Summary {
            median,
            min: v[0],
            max: v[v.len() - 1],
            values: values.to_vec(),
        }
    }
}

/// One line of the table.
#[derive(Debug, Clone, Serialize)]
pub struct Row {
    pub phase: String,
    pub case: String,
    pub unit: String,
    pub value: Summary,
    /// Ratio to the f32 FFT limit measured beside it (alternating slices)
    /// within each repeat.
    pub ratio: Option<Summary>,
    pub target: Option<String>,
}

#[derive(Debug, Clone, Serialize)]
pub struct Machine {
    pub nproc: usize,
    pub cpu: String,
    pub os: String,
}

#[derive(Debug, Clone, Serialize)]
pub struct Report {
    pub machine: Machine,
    pub n: usize,
    pub hop: usize,
    pub sample_rate_hz: f64,
    pub repeats: usize,
    pub rows: Vec<Row>,
    pub notes: Vec<String>,
}

fn machine() -> Machine {
    let cpu = std::fs::read_to_string("/proc/cpuinfo")
        .ok()
        .and_then(|t| {
            t.lines()
                .find(|l| l.starts_with("model name"))
                .and_then(|l| l.split(':').nth(1))
                .map(|s| s.trim().to_string())
        })
        .unwrap_or_else(|| "unknown".into());
    Machine {
        nproc: std::thread::available_parallelism().map_or(1, |n| n.get()),
        cpu,
        os: std::env::consts::OS.into(),
    }
}

/// Resident set size of this process, bytes (from /proc/self/status).
pub fn rss_bytes() -> u64 {
    std::fs::read_to_string("/proc/self/status")
        .ok()
        .and_then(|t| {
            t.lines().find(|l| l.starts_with("VmRSS:")).and_then(|l| {
                l.split_whitespace()
                    .nth(1)
                    .and_then(|v| v.parse::<u64>().ok())
            })
        })
        .map_or(0, |kb| kb * 1024)
}

// ---------------------------------------------------------------------------
// Channels and signals
// ---------------------------------------------------------------------------

/// Config text for `channels` channels of one source, with the demo's
/// motor-de bands (velocity bands integrate, one band stays in g).
fn config_text(channels: usize, n: usize, fs: f64, source: &str, averages: u32) -> String {
    // The journal of the running pipeline (ingest phase) goes to a scratch
    // directory; the rigs driven by hand write nothing.
    let storage = std::env::temp_dir()
        .join(format!("bandwatch-bench-{}", std::process::id()))
        .display()
        .to_string();
    let mut t = format!(
        "[server]\nlisten = \"127.0.0.1:0\"\n[dsp]\nworkers = 2\n[alarms]\nstorage_dir = {storage:?}\n\n[[source]]\nname = \"bench\"\n{source}\nchannels = {channels}\nsample_rate_hz = {fs:?}\n"
    );
    // Bands scale with the sample rate so that, at any rate, they hold the
    // same lines (the ingest phase raises the rate instead of the channels).
    let k = fs / FS;
    let band = |name: &str, lo: f64, hi: f64, unit: &str, measure: &str, alarm: &str| {
        format!(
            "[[channel.band]]\nname = \"{name}\"\nlo_hz = {:?}\nhi_hz = {:?}\nunit = \"{unit}\"\nmeasure = \"{measure}\"\n{alarm}",
            lo * k,
            hi * k
        )
    };
    // Alarms as the demo sets them: a zone preset on the overall velocity,
    // fixed limits on the high-frequency acceleration (set well above the
    // test signal, so they are evaluated on every spectrum and never trip).
    let zone = "alarm = { zone = { group = 2, support = \"rigid\" }, hysteresis = 0.1, on_delay_s = 3.0 }\n";
    let limits =
        "alarm = { alert = { limit = 5.0 }, danger = { limit = 10.0 }, on_delay_s = 2.0 }\n";
    let bands = [
        band("overall-velocity", 10.0, 1000.0, "mm/s", "rms", zone),
        band("1x", 21.0, 28.5, "mm/s", "rms", ""),
        band("2x", 45.0, 54.0, "mm/s", "rms", ""),
        band("acceleration-hf", 1000.0, 10000.0, "g", "rms", limits),
        band("1x-peak", 21.0, 28.5, "g", "peak", ""),
    ]
    .concat();
    // The demo's sensor checks (flatline, clipping) and overall alarm.
    let checks = "health = { flatline = { std_below = 0.0001, for_s = 2.0 }, clipping = { full_scale = 50.0 } }\n\
                  overall_alarm = { rms = { alert = { limit = 5.0 }, danger = { limit = 10.0 }, on_delay_s = 2.0 } }\n";
    for c in 0..channels {
        t.push_str(&format!(
            "\n[[channel]]\nname = \"ch{c:04}\"\nsource = \"bench\"\nindex = {c}\nunit = \"g\"\n\
             scale = {G_PER_COUNT:?}\nblock = {n}\nwindow = \"hann\"\noverlap = {OVERLAP:?}\n\
             averaging = {{ mode = \"linear\", count = {averages} }}\nintegration_low_cut_hz = 5.0\n{checks}{bands}"
        ));
    }
    t
}

fn bench_config(channels: usize, n: usize, fs: f64, source: &str) -> Result<Config, BenchError> {
    parse_str(&config_text(channels, n, fs, source, 4))
        .map_err(|e| BenchError::Config(format!("{e:?}")))
}

const UNUSED_SOURCE: &str = "kind = \"tcp-listen\"\nlisten = \"127.0.0.1:0\"";

/// A pump-like test signal in g: 1×, vane pass, a resonance burst train and
/// noise from a fixed-seed generator. Only its magnitude matters here (no
/// denormals, no overflow of i16/i24 counts).
fn test_signal(len: usize, fs: f64) -> Vec<f32> {
    let mut s: u64 = 0x2545_F491_4F6C_DD1D;
    let tau = 2.0 * std::f64::consts::PI;
    (0..len)
        .map(|i| {
            s ^= s << 13;
            s ^= s >> 7;
            s ^= s << 17;
            let noise = ((s >> 11) as f64 / (1u64 << 53) as f64 - 0.5) * 0.05;
            let t = i as f64 / fs;
            let v = 0.30 * (tau * 24.75 * t).sin()
                + 0.05 * (tau * 173.25 * t).sin()
                + 0.02 * (tau * 3200.0 * t).sin() * (tau * 89.1 * t).sin().max(0.0)
                + noise;
            v as f32
        })
        .collect()
}

/// Where channel `c`'s samples start in the shared test signal, so that
/// channels differ.
fn signal_offset(c: usize, pos: u64, len: usize, chunk: usize) -> usize {
    ((pos as usize).wrapping_add(c.wrapping_mul(7919))) % (len - chunk)
}

fn ring_capacity(config: &Config, spec: &ChannelSpec) -> usize {
    let capacity = (config.ring_seconds * spec.sample_rate_hz).ceil() as usize;
    capacity.max(2 * spec.block)
}

/// A channel's DSP with its alarms (sensor checks, band and overall
/// limits), as the daemon runs it; no journal or captures (no disk I/O).
fn dsp_with_alarms(ch: &Arc<ChannelShared>, reader: crate::ring::RingReader) -> ChannelDsp {
    let mut dsp = ChannelDsp::new(ch.clone(), reader);
    dsp.set_gather(true);
    attach_alarms(&mut dsp);
    dsp
}

/// Gives a channel's DSP its alarms, once (the inbox can be taken once).
fn attach_alarms(dsp: &mut ChannelDsp) {
    let shared = dsp.shared().clone();
    let (_commands, inbox) = std::sync::mpsc::channel();
    dsp.set_alarms(crate::alarm::engine::ChannelAlarms::new(
        &shared.spec,
        crate::alarm::engine::AlarmContext::in_memory(inbox),
    ));
}

/// Polls every channel until none has work left.
fn drain(dsps: &mut [ChannelDsp]) {
    loop {
        let mut worked = false;
        for d in dsps.iter_mut() {
            worked |= d.poll();
        }
        if !worked {
            return;
        }
    }
}

fn lost(shared: &[Arc<ChannelShared>]) -> u64 {
    shared.iter().map(|c| c.counters.dropped_total()).sum()
}

// ---------------------------------------------------------------------------
// fft
// ---------------------------------------------------------------------------

/// A forward real FFT of length n in type `T`, timed in slices. The input
/// is restored from a pristine copy before each transform (realfft uses its
/// input as scratch).
struct FftBench<T: FftNum> {
    fft: Arc<dyn realfft::RealToComplex<T>>,
    pristine: Vec<T>,
    input: Vec<T>,
    output: Vec<realfft::num_complex::Complex<T>>,
    scratch: Vec<realfft::num_complex::Complex<T>>,
}

impl<T: FftNum + FromPrimitive> FftBench<T> {
    fn new(n: usize) -> FftBench<T> {
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
    fn rate(&mut self, min: Duration) -> f64 {
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
fn side_by_side(
    fft: &mut FftBench<f32>,
    hop: usize,
    min: Duration,
    mut work: impl FnMut() -> (u64, Duration),
) -> (f64, f64) {
    let slice = min / SLICES;
    let (mut wn, mut wt) = (0u64, Duration::ZERO);
    let (mut fnum, mut ft) = (0u64, Duration::ZERO);
    for _ in 0..SLICES {
        let (a, b) = fft.slice(slice);
        fnum += a;
        ft += b;
        let target = wt + slice;
        while wt < target {
            let (a, b) = work();
            wn += a;
            wt += b;
        }
    }
    (
        wn as f64 / wt.as_secs_f64(),
        fnum as f64 * hop as f64 / ft.as_secs_f64(),
    )
}

// ---------------------------------------------------------------------------
// dsp
// ---------------------------------------------------------------------------

/// Rings and channel DSPs driven by hand, as a worker drives them.
pub struct DspRig {
    shared: Vec<Arc<ChannelShared>>,
    dsps: Vec<ChannelDsp>,
    writers: Vec<RingWriter>,
    signal: Arc<Vec<f32>>,
    next: u64,
    /// Samples per channel per round.
    chunk: usize,
    /// Untimed rounds still to run before the first measurement: enough
    /// for every ring to wrap once, so that its pages are touched (as a
    /// daemon's are after its first seconds) and not counted as work.
    warm_up: usize,
}

impl DspRig {
    /// Channels of `shared`, with their alarms (as the daemon runs them)
    /// or without (the spectrum step alone: window, FFT, power, average,
    /// bands, overall levels, publish).
    fn new(
        config: &Config,
        shared: Vec<Arc<ChannelShared>>,
        signal: Arc<Vec<f32>>,
        alarms: bool,
    ) -> DspRig {
        let mut dsps = Vec::new();
        let mut writers = Vec::new();
        for ch in &shared {
            let cap = ring_capacity(config, &ch.spec);
            let (w, r) = channel_ring(cap, ch.spec.sample_rate_hz, ch.counters.clone());
            dsps.push(if alarms {
                dsp_with_alarms(ch, r)
            } else {
                let mut d = ChannelDsp::new(ch.clone(), r);
                d.set_gather(true);
                d
            });
            writers.push(w);
        }
        let spec = &shared[0].spec;
        DspRig {
            // One hop per channel per round: every channel computes one
            // block per round, as a worker fed in real time does.
            chunk: spec.hop.min(ring_capacity(config, spec)),
            warm_up: ring_capacity(config, spec).div_ceil(spec.hop.max(1)) + 2,
            shared,
            dsps,
            writers,
            signal,
            next: 0,
        }
    }

    fn for_channels(config: &Config, signal: Arc<Vec<f32>>, alarms: bool) -> DspRig {
        let shared = config
            .channels
            .iter()
            .map(|c| Arc::new(ChannelShared::new(c.clone())))
            .collect();
        DspRig::new(config, shared, signal, alarms)
    }

    fn write_round(&mut self) {
        let len = self.signal.len();
        let ts = 1_000_000_000 + (self.next as f64 * 1e9 / FS) as u64;
        for (c, w) in self.writers.iter_mut().enumerate() {
            let at = signal_offset(c, self.next, len, self.chunk);
            w.write(self.next, ts, &self.signal[at..at + self.chunk]);
        }
        self.next += self.chunk as u64;
    }

    /// One round: write a chunk into every ring (not timed), then drain the
    /// DSPs (timed). Returns samples processed and the timed part.
    fn round(&mut self) -> (u64, Duration) {
        self.write_round();
        let t = Instant::now();
        drain(&mut self.dsps);
        ((self.chunk * self.dsps.len()) as u64, t.elapsed())
    }

    /// Input samples per second over at least `min` of timed work, after
    /// warm-up rounds, side by side with the FFT: (rate, FFT rate).
    fn rate(&mut self, fft: &mut FftBench<f32>, min: Duration) -> Result<(f64, f64), BenchError> {
        for _ in 0..std::mem::take(&mut self.warm_up).max(4) {
            self.round();
        }
        let hop = self.shared[0].spec.hop;
        let r = side_by_side(fft, hop, min, || self.round());
        let dropped = lost(&self.shared);
        if dropped > 0 {
            return Err(BenchError::Lost(format!(
                "dsp rig dropped {dropped} samples"
            )));
        }
        Ok(r)
    }

    /// Writes and drains rounds without timing until `stop`, counting
    /// samples into `done`.
    fn run_until(&mut self, stop: &AtomicBool, done: &AtomicU64) {
        while !stop.load(Ordering::Relaxed) {
            self.write_round();
            drain(&mut self.dsps);
            done.fetch_add((self.chunk * self.dsps.len()) as u64, Ordering::Relaxed);
        }
    }
}

// ---------------------------------------------------------------------------
// path
// ---------------------------------------------------------------------------

/// BWF1 bytes in memory → stream decoder → sink (checks, scaling) → rings →
/// DSP, one thread.
struct PathRig {
    shared: Vec<Arc<ChannelShared>>,
    source: Arc<SourceCounters>,
    dsps: Vec<ChannelDsp>,
    sink: FrameSink,
    framing: StreamFraming,
    /// One round of frames; patched with new sequence numbers each round.
    bytes: Vec<u8>,
    frame_bytes: usize,
    next: u64,
    instants: usize,
    channels: usize,
    /// As [`DspRig`]'s: rounds that wrap every ring once, untimed.
    warm_up: usize,
}

/// Encodes `instants` instants of `channels` channels as BWF1 frames of
/// `frame_samples` instants, in `format` (counts for integer formats, g
/// for f32), starting at stream index 0.
fn encode_frames(
    format: SampleFormat,
    channels: usize,
    instants: usize,
    frame_samples: usize,
    signal: &[f32],
    fs: f64,
) -> (Vec<u8>, usize) {
    let mut out = Vec::new();
    let mut frame_bytes = 0;
    let len = signal.len();
    let mut counts: Vec<i32> = Vec::new();
    let mut f32s: Vec<f32> = Vec::new();
    let mut i16s: Vec<i16> = Vec::new();
    for f in 0..instants / frame_samples {
        counts.clear();
        f32s.clear();
        i16s.clear();
        for i in 0..frame_samples {
            let t = (f * frame_samples + i) as u64;
            for c in 0..channels {
                let g = signal[(signal_offset(c, 0, len, 1) + t as usize) % len];
                match format {
                    SampleFormat::F32 | SampleFormat::F64 => f32s.push(g),
                    SampleFormat::I16 => {
                        i16s.push((((g as f64 / G_PER_COUNT).round() as i32) >> 8) as i16)
                    }
                    SampleFormat::I24 | SampleFormat::I32 => {
                        counts.push((g as f64 / G_PER_COUNT).round() as i32)
                    }
                }
            }
        }
        let h = Header::new(
            format,
            channels as u16,
            frame_samples as u32,
            (f * frame_samples) as u64,
            1,
            fs,
        );
        let slice = match format {
            SampleFormat::F32 | SampleFormat::F64 => SampleSlice::F32(&f32s),
            SampleFormat::I16 => SampleSlice::I16(&i16s),
            SampleFormat::I24 | SampleFormat::I32 => SampleSlice::I32(&counts),
        };
        let before = out.len();
        let r = encode_into(&h, slice, &mut out);
        debug_assert!(r.is_ok(), "bench frames are valid: {r:?}");
        frame_bytes = out.len() - before;
    }
    (out, frame_bytes)
}

/// Rewrites `first_sample` (and the timestamp) of one encoded frame and
/// its CRC.
fn patch_frame(frame: &mut [u8], first_sample: u64, fs: f64) {
    frame[12..20].copy_from_slice(&first_sample.to_le_bytes());
    let ts = 1_000_000_000 + (first_sample as f64 * 1e9 / fs) as u64;
    frame[20..28].copy_from_slice(&ts.to_le_bytes());
    let end = frame.len() - CRC_BYTES;
    let crc = crc32fast::hash(&frame[..end]);
    frame[end..].copy_from_slice(&crc.to_le_bytes());
}

impl PathRig {
    fn new(config: &Config, format: SampleFormat, signal: &[f32]) -> PathRig {
        let channels = config.channels.len();
        let shared: Vec<Arc<ChannelShared>> = config
            .channels
            .iter()
            .map(|c| Arc::new(ChannelShared::new(c.clone())))
            .collect();
        let mut outputs = SourceOutputs::new(channels);
        let mut dsps = Vec::new();
        // Float frames carry g; integer frames counts (i16: the top 16 bits).
        let scale = match format {
            SampleFormat::F32 | SampleFormat::F64 => 1.0,
            SampleFormat::I16 => G_PER_COUNT * 256.0,
            SampleFormat::I24 | SampleFormat::I32 => G_PER_COUNT,
        };
        for ch in &shared {
            let cap = ring_capacity(config, &ch.spec);
            let (w, r) = channel_ring(cap, ch.spec.sample_rate_hz, ch.counters.clone());
            dsps.push(dsp_with_alarms(ch, r));
            outputs.attach(
                ch.spec.index,
                ChannelInput {
                    writer: w,
                    scale,
                    offset: 0.0,
                    waker: std::thread::current(),
                },
            );
        }
        let spec = &config.channels[0];
        // About one hop per round, as in the dsp phase.
        let instants = spec.hop.div_ceil(FRAME_SAMPLES) * FRAME_SAMPLES;
        let (bytes, frame_bytes) =
            encode_frames(format, channels, instants, FRAME_SAMPLES, signal, FS);
        let source = Arc::new(SourceCounters::new("bench", "tcp-listen"));
        let stream = StreamSpec {
            framing: crate::config::Framing::Bwf1,
            max_frame_bytes: DEFAULT_MAX_FRAME_BYTES,
        };
        let framing = match StreamFraming::new(&stream, channels) {
            Ok(f) => f,
            Err(_) => unreachable_framing(),
        };
        PathRig {
            sink: FrameSink::new(outputs, source.clone(), FS),
            source,
            shared,
            dsps,
            framing,
            bytes,
            frame_bytes,
            next: 0,
            warm_up: ring_capacity(config, spec).div_ceil(instants.max(1)) + 2,
            instants,
            channels,
        }
    }

    fn round(&mut self) -> (u64, Duration) {
        for (i, frame) in self.bytes.chunks_exact_mut(self.frame_bytes).enumerate() {
            patch_frame(frame, self.next + (i * FRAME_SAMPLES) as u64, FS);
        }
        self.next += self.instants as u64;
        let t = Instant::now();
        for chunk in self.bytes.chunks(READ_BYTES) {
            self.framing.feed(chunk, &mut self.sink);
        }
        drain(&mut self.dsps);
        ((self.instants * self.channels) as u64, t.elapsed())
    }

    fn rate(&mut self, fft: &mut FftBench<f32>, min: Duration) -> Result<(f64, f64), BenchError> {
        for _ in 0..std::mem::take(&mut self.warm_up).max(4) {
            self.round();
        }
        let hop = self.shared[0].spec.hop;
        let r = side_by_side(fft, hop, min, || self.round());
        let dropped = lost(&self.shared);
        let rejected: u64 = self.source.rejected().iter().map(|(_, n)| n).sum();
        let late = SourceCounters::get(&self.source.frames_late);
        let missing = SourceCounters::get(&self.source.samples_missing);
        if dropped + rejected + late + missing > 0 {
            return Err(BenchError::Lost(format!(
                "path rig lost data: dropped {dropped}, rejected {rejected}, late {late}, missing {missing}"
            )));
        }
        Ok(r)
    }
}

/// The channel count always fits BWF1 framing (validated config).
fn unreachable_framing() -> StreamFraming {
    StreamFraming::Bwf1 {
        decoder: crate::frame::bwf1::StreamDecoder::new(),
    }
}

// ---------------------------------------------------------------------------
// memory
// ---------------------------------------------------------------------------

#[derive(Debug, Clone, Serialize, serde::Deserialize)]
pub struct MemoryProbe {
    pub channels: usize,
    pub rss_before: u64,
    pub rss_after: u64,
}

/// Builds `channels` channels with the default ring size, pushes enough
/// samples through that every ring has wrapped and two snapshots exist,
/// and reports resident memory before and after.
pub fn memory_probe(n: usize, channels: usize) -> Result<MemoryProbe, BenchError> {
    let config = bench_config(channels.max(1), n, FS, UNUSED_SOURCE)?;
    let signal = Arc::new(test_signal(4 * FS as usize, FS));
    let rss_before = rss_bytes();
    let mut rig = DspRig::for_channels(&config, signal, true);
    let cap = ring_capacity(&config, &config.channels[0]);
    let rounds = cap.div_ceil(rig.chunk) + 3;
    for _ in 0..rounds {
        rig.round();
    }
    let rss_after = rss_bytes();
    std::hint::black_box(&rig);
    Ok(MemoryProbe {
        channels,
        rss_before,
        rss_after,
    })
}

fn memory_in_child(n: usize, channels: usize) -> Result<MemoryProbe, BenchError> {
    let exe = std::env::current_exe().map_err(io_err("current executable"))?;
    let out = std::process::Command::new(exe)
        .args([
            "bench",
            "--n",
            &n.to_string(),
            "--memory-child",
            &channels.to_string(),
        ])
        .output()
        .map_err(io_err("memory child"))?;
    let text = String::from_utf8_lossy(&out.stdout);
    serde_json::from_str(text.trim()).map_err(|e| {
        BenchError::Lost(format!(
            "memory child printed {text:?} ({e}); stderr {}",
            String::from_utf8_lossy(&out.stderr)
        ))
    })
}

// ---------------------------------------------------------------------------
// ingest
// ---------------------------------------------------------------------------

#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum Transport {
    Tcp,
    Udp,
}

/// Instants per frame in the ingest phase: 64 channels × 256 × 2 bytes
/// fits one datagram.
const INGEST_FRAME_SAMPLES: usize = 256;

/// What one ingest step saw.
#[derive(Debug, Clone, Serialize)]
pub struct IngestStep {
    pub transport: String,
    pub sample_rate_hz: f64,
    pub aggregate_samples_per_s: f64,
    pub sent_instants: u64,
    pub processed: u64,
    pub dropped: u64,
    pub missing: u64,
    pub rejected: u64,
    pub sender_behind: bool,
    /// Samples in the rings, not yet processed, when sending stopped, in
    /// seconds of input: the DSP's lag behind real time (the samples waiting
    /// for the rest of their averaged result included).
    pub lag_seconds: f64,
    pub held: bool,
}

/// Largest DSP lag (seconds of input waiting in the rings when sending
/// stops) for a rate to count as held in real time. Without this, a step
/// shorter than the ring (2 s) would pass at any rate by filling the ring.
const MAX_LAG_S: f64 = 0.1;

async fn ingest_step(
    transport: Transport,
    fs: f64,
    n: usize,
    seconds: f64,
    pool: &[u8],
    frame_bytes: usize,
) -> Result<IngestStep, BenchError> {
    let channels = LOAD_CHANNELS;
    let (source, tcp) = match transport {
        Transport::Tcp => {
            let l = tokio::net::TcpListener::bind("127.0.0.1:0")
                .await
                .map_err(io_err("bind loopback TCP"))?;
            let a = l.local_addr().map_err(io_err("local address"))?;
            (
                format!("kind = \"tcp-connect\"\naddress = \"{a}\"\nreconnect_min_ms = 10"),
                Some(l),
            )
        }
        Transport::Udp => {
            let s =
                std::net::UdpSocket::bind("127.0.0.1:0").map_err(io_err("bind loopback UDP"))?;
            let a = s.local_addr().map_err(io_err("local address"))?;
            drop(s);
            (format!("kind = \"udp\"\nlisten = \"{a}\""), None)
        }
    };
    let config = bench_config(channels, n, fs, &source)?;
    // Workers leave up to one averaged result's samples in the rings until
    // its last sample is in (`ChannelDsp::set_gather`): that wait is not lag.
    let gathered_s = config.channels.first().map_or(0.0, |c| {
        (c.block + c.average_count.saturating_sub(1) as usize * c.hop) as f64 / fs
    });
    let pipeline =
        crate::pipeline::Pipeline::start(&config).map_err(|e| BenchError::Lost(e.to_string()))?;
    let state = pipeline.state.clone();
    let udp_target = match transport {
        Transport::Udp => Some(
            config
                .sources
                .first()
                .and_then(|s| match &s.kind {
                    crate::config::SourceKind::Udp { listen, .. } => Some(*listen),
                    _ => None,
                })
                .ok_or_else(|| BenchError::Config("udp source".into()))?,
        ),
        Transport::Tcp => None,
    };
    let mut frames: Vec<Vec<u8>> = pool.chunks_exact(frame_bytes).map(<[u8]>::to_vec).collect();
    let s = INGEST_FRAME_SAMPLES as u64;
    let total = (seconds * fs) as u64 / s * s;
    let mut sent = 0u64;
    let mut behind = false;
    let mut lag_seconds = f64::NAN;
    let result: Result<(), BenchError> = async {
        enum Link {
            Tcp(tokio::net::TcpStream),
            Udp(tokio::net::UdpSocket),
        }
        let mut link = match (tcp, udp_target) {
            (Some(l), _) => {
                let (sock, _) = tokio::time::timeout(Duration::from_secs(5), l.accept())
                    .await
                    .map_err(|_| BenchError::Lost("the pipeline did not connect in 5 s".into()))?
                    .map_err(io_err("accept"))?;
                let _ = sock.set_nodelay(true);
                Link::Tcp(sock)
            }
            (None, Some(a)) => {
                // Let the source bind its socket first.
                tokio::time::sleep(Duration::from_millis(200)).await;
                let u = tokio::net::UdpSocket::bind("127.0.0.1:0")
                    .await
                    .map_err(io_err("bind UDP sender"))?;
                u.connect(a).await.map_err(io_err("connect UDP"))?;
                Link::Udp(u)
            }
            _ => return Err(BenchError::Usage("transport".into())),
        };
        let start = tokio::time::Instant::now();
        let mut tick = tokio::time::interval(Duration::from_millis(2));
        let mut k = 0usize;
        while sent < total {
            tick.tick().await;
            let due = ((start.elapsed().as_secs_f64() * fs) as u64).min(total);
            if due > sent + fs as u64 {
                behind = true;
            }
            while sent + s <= due {
                let nf = frames.len();
                let f = &mut frames[k % nf];
                k += 1;
                patch_frame(f, sent, fs);
                match &mut link {
                    Link::Tcp(t) => {
                        use tokio::io::AsyncWriteExt;
                        t.write_all(f).await.map_err(io_err("TCP send"))?;
                    }
                    Link::Udp(u) => {
                        u.send(f).await.map_err(io_err("UDP send"))?;
                    }
                }
                sent += s;
            }
        }
        // How far the DSP is behind now; then let it drain what is in flight.
        let backlog: u64 = state
            .channels
            .iter()
            .map(|c| {
                c.counters
                    .samples_in
                    .load(Ordering::Relaxed)
                    .saturating_sub(c.counters.samples_processed.load(Ordering::Relaxed))
            })
            .sum();
        lag_seconds = backlog as f64 / (channels as f64 * fs);
        let want = sent * channels as u64;
        let deadline = tokio::time::Instant::now() + Duration::from_secs(5);
        loop {
            let processed: u64 = state
                .channels
                .iter()
                .map(|c| c.counters.samples_processed.load(Ordering::Relaxed))
                .sum();
            let dropped: u64 = state
                .channels
                .iter()
                .map(|c| c.counters.dropped_total())
                .sum();
            let missing = SourceCounters::get(&state.sources[0].samples_missing);
            if processed + dropped + missing * channels as u64 >= want
                || tokio::time::Instant::now() > deadline
            {
                break;
            }
            tokio::time::sleep(Duration::from_millis(20)).await;
        }
        Ok(())
    }
    .await;
    let processed: u64 = state
        .channels
        .iter()
        .map(|c| c.counters.samples_processed.load(Ordering::Relaxed))
        .sum();
    let dropped: u64 = state
        .channels
        .iter()
        .map(|c| c.counters.dropped_total())
        .sum();
    let missing = SourceCounters::get(&state.sources[0].samples_missing);
    let rejected: u64 = state.sources[0]
        .rejected()
        .iter()
        .map(|(_, n)| n)
        .sum::<u64>()
        + SourceCounters::get(&state.sources[0].frames_late);
    pipeline.stop().await;
    result?;
    let want = sent * channels as u64;
    let held = !behind
        && dropped == 0
        && missing == 0
        && rejected == 0
        && processed == want
        && sent > 0
        && lag_seconds <= MAX_LAG_S + gathered_s;
    Ok(IngestStep {
        transport: match transport {
            Transport::Tcp => "tcp".into(),
            Transport::Udp => "udp".into(),
        },
        sample_rate_hz: fs,
        aggregate_samples_per_s: fs * channels as f64,
        sent_instants: sent,
        processed,
        dropped,
        missing,
        rejected,
        sender_behind: behind,
        lag_seconds,
        held,
    })
}

/// Doubles the per-channel rate from 25 600 Hz until a step loses data,
/// then bisects twice. Returns the highest aggregate rate held and the
/// steps.
async fn ingest_ladder(
    transport: Transport,
    n: usize,
    seconds: f64,
    signal: &[f32],
) -> Result<(f64, Vec<IngestStep>), BenchError> {
    let (pool, frame_bytes) = encode_frames(
        SampleFormat::I16,
        LOAD_CHANNELS,
        16 * INGEST_FRAME_SAMPLES,
        INGEST_FRAME_SAMPLES,
        signal,
        FS,
    );
    let mut steps = Vec::new();
    let mut ok = 0.0;
    let mut bad = f64::INFINITY;
    let mut fs = FS;
    // Stop doubling at 2^7 × 25 600 Hz per channel (210 M samples/s for 64).
    for _ in 0..8 {
        let mut pool = pool.clone();
        set_rate(&mut pool, frame_bytes, fs);
        let st = ingest_step(transport, fs, n, seconds, &pool, frame_bytes).await?;
        let held = st.held;
        steps.push(st);
        if held {
            ok = fs;
            fs *= 2.0;
        } else {
            bad = fs;
            break;
        }
    }
    if bad.is_finite() && ok > 0.0 {
        for _ in 0..2 {
            let mid = ((ok + bad) / 2.0 / FS).round() * FS;
            if mid <= ok || mid >= bad {
                break;
            }
            let mut pool = pool.clone();
            set_rate(&mut pool, frame_bytes, mid);
            let st = ingest_step(transport, mid, n, seconds, &pool, frame_bytes).await?;
            if st.held {
                ok = mid;
            } else {
                bad = mid;
            }
            steps.push(st);
        }
    }
    Ok((ok * LOAD_CHANNELS as f64, steps))
}

fn set_rate(pool: &mut [u8], frame_bytes: usize, fs: f64) {
    for f in pool.chunks_exact_mut(frame_bytes) {
        f[28..36].copy_from_slice(&fs.to_le_bytes());
    }
}

// ---------------------------------------------------------------------------
// http
// ---------------------------------------------------------------------------

/// Seconds a rate round may run past `--seconds` before the requests still
/// waiting are counted as unsent.
const HTTP_GRACE_S: f64 = 2.0;

/// Most channels `--http-channels` takes (4 × the 1024 of one source).
const MAX_HTTP_CHANNELS: usize = 8192;

/// How the two DSP threads run while the http phase measures.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum DspLoad {
    /// As fast as they can: both cores saturated (harsher than a plant).
    Flat,
    /// At the channels' real-time rate (each channel gets 25 600 samples per
    /// second of wall time), sleeping when ahead: the load of the target.
    Paced,
    /// No DSP work during the round: what serving alone costs and reaches.
    Idle,
}

impl DspLoad {
    fn parse(s: &str) -> Option<DspLoad> {
        match s {
            "flat" => Some(DspLoad::Flat),
            "paced" => Some(DspLoad::Paced),
            "idle" => Some(DspLoad::Idle),
            _ => None,
        }
    }
    fn as_str(self) -> &'static str {
        match self {
            DspLoad::Flat => "flat",
            DspLoad::Paced => "paced",
            DspLoad::Idle => "idle",
        }
    }
}

#[derive(Debug, Clone, Serialize)]
pub struct HttpProbe {
    pub requests: u64,
    pub errors: u64,
    pub non_200: u64,
    pub metrics_ms: Vec<f64>,
    pub spectrum_ms: Vec<f64>,
    /// Body length of the last /metrics response.
    pub metrics_bytes: usize,
    /// Requests never sent: still waiting at the end of the grace time.
    pub unsent: u64,
}

/// Reads one HTTP/1.1 response with a Content-Length; returns the status
/// and the body length.
async fn read_response(
    sock: &mut tokio::net::TcpStream,
    buf: &mut Vec<u8>,
) -> std::io::Result<(u16, usize)> {
    use tokio::io::AsyncReadExt;
    buf.clear();
    let mut tmp = vec![0u8; 256 * 1024];
    let head_end = loop {
        if let Some(p) = buf.windows(4).position(|w| w == b"\r\n\r\n") {
            break p + 4;
        }
        let n = sock.read(&mut tmp).await?;
        if n == 0 {
            return Err(std::io::ErrorKind::UnexpectedEof.into());
        }
        buf.extend_from_slice(&tmp[..n]);
    };
    let head = String::from_utf8_lossy(&buf[..head_end]).to_ascii_lowercase();
    let status = head
        .split_whitespace()
        .nth(1)
        .and_then(|s| s.parse().ok())
        .unwrap_or(0);
    let len: usize = head
        .lines()
        .find_map(|l| l.strip_prefix("content-length:"))
        .and_then(|v| v.trim().parse().ok())
        .ok_or_else(|| std::io::Error::other("response without content-length"))?;
    buf.reserve((head_end + len).saturating_sub(buf.len()));
    while buf.len() < head_end + len {
        let n = sock.read(&mut tmp).await?;
        if n == 0 {
            return Err(std::io::ErrorKind::UnexpectedEof.into());
        }
        buf.extend_from_slice(&tmp[..n]);
    }
    Ok((status, len))
}

/// Issues `rate` requests per second for `seconds`, alternating /metrics
/// and a spectrum, over one keep-alive connection. Latency runs from the
/// time a request was due (so a stalled server is not hidden) to the end
/// of its response.
async fn http_load(
    addr: std::net::SocketAddr,
    rate: f64,
    seconds: f64,
    channel: &str,
) -> Result<HttpProbe, BenchError> {
    use tokio::io::AsyncWriteExt;
    let mut sock = tokio::net::TcpStream::connect(addr)
        .await
        .map_err(io_err("connect HTTP"))?;
    let _ = sock.set_nodelay(true);
    let period = Duration::from_secs_f64(1.0 / rate);
    let total = (rate * seconds) as u64;
    let start = tokio::time::Instant::now();
    let mut probe = HttpProbe {
        requests: 0,
        errors: 0,
        non_200: 0,
        metrics_ms: Vec::new(),
        spectrum_ms: Vec::new(),
        metrics_bytes: 0,
        unsent: 0,
    };
    let mut buf = Vec::new();
    let spectrum =
        format!("GET /api/v1/channels/{channel}/spectrum HTTP/1.1\r\nhost: bench\r\n\r\n");
    let metrics = "GET /metrics HTTP/1.1\r\nhost: bench\r\n\r\n".to_string();
    // A server slower than the rate must not stretch the round without
    // bound: past the grace time, the requests not yet sent count with the
    // time they have waited so far (a lower bound of their latency).
    let deadline = start + Duration::from_secs_f64(seconds + HTTP_GRACE_S);
    for i in 0..total {
        let due = start + period.mul_f64(i as f64);
        if tokio::time::Instant::now() > deadline {
            for j in i..total {
                let due = start + period.mul_f64(j as f64);
                let ms = due.elapsed().as_secs_f64() * 1e3;
                probe.unsent += 1;
                if j % 2 == 0 {
                    probe.metrics_ms.push(ms);
                } else {
                    probe.spectrum_ms.push(ms);
                }
            }
            break;
        }
        tokio::time::sleep_until(due).await;
        let req = if i % 2 == 0 { &metrics } else { &spectrum };
        let r = async {
            sock.write_all(req.as_bytes()).await?;
            read_response(&mut sock, &mut buf).await
        };
        let r = tokio::time::timeout(Duration::from_secs(5), r).await;
        probe.requests += 1;
        let ms = due.elapsed().as_secs_f64() * 1e3;
        match r {
            Ok(Ok((status, len))) => {
                if status != 200 {
                    probe.non_200 += 1;
                }
                if i % 2 == 0 {
                    probe.metrics_ms.push(ms);
                    probe.metrics_bytes = len;
                } else {
                    probe.spectrum_ms.push(ms);
                }
            }
            _ => {
                probe.errors += 1;
                sock = tokio::net::TcpStream::connect(addr)
                    .await
                    .map_err(io_err("reconnect HTTP"))?;
            }
        }
    }
    Ok(probe)
}

/// What back-to-back /metrics requests on one connection achieved.
#[derive(Debug, Clone, Copy)]
struct ClosedLoop {
    responses_per_s: f64,
    bytes_per_s: f64,
}

/// Sends GET /metrics back to back (the next as soon as the previous
/// response is read) for `seconds`: the most this server and connection
/// deliver, to compare with the bytes/s a request rate needs.
async fn http_closed_loop(
    addr: std::net::SocketAddr,
    seconds: f64,
) -> Result<ClosedLoop, BenchError> {
    use tokio::io::AsyncWriteExt;
    let mut sock = tokio::net::TcpStream::connect(addr)
        .await
        .map_err(io_err("connect HTTP"))?;
    let _ = sock.set_nodelay(true);
    let req = b"GET /metrics HTTP/1.1\r\nhost: bench\r\n\r\n";
    let mut buf = Vec::new();
    let (mut n, mut bytes) = (0u64, 0u64);
    let t0 = Instant::now();
    let end = Duration::from_secs_f64(seconds);
    while t0.elapsed() < end {
        sock.write_all(req).await.map_err(io_err("send HTTP"))?;
        let (_, len) =
            tokio::time::timeout(Duration::from_secs(5), read_response(&mut sock, &mut buf))
                .await
                .map_err(|_| BenchError::Lost("closed-loop /metrics timed out".into()))?
                .map_err(io_err("read HTTP"))?;
        n += 1;
        bytes += len as u64;
    }
    let s = t0.elapsed().as_secs_f64();
    Ok(ClosedLoop {
        responses_per_s: n as f64 / s,
        bytes_per_s: bytes as f64 / s,
    })
}

fn percentile(v: &[f64], p: f64) -> f64 {
    if v.is_empty() {
        return f64::NAN;
    }
    let mut s = v.to_vec();
    s.sort_by(f64::total_cmp);
    let i = ((p / 100.0) * (s.len() - 1) as f64).round() as usize;
    s[i.min(s.len() - 1)]
}

/// Alarm limits of the http phase's bands (band unit), alert and danger:
/// chosen only so that every band carries an alarm; the values are not
/// checked against anything.
const HTTP_BAND_ALARMS: [(&str, f64, f64, &str, &str, f64, f64); 5] = [
    ("overall-velocity", 10.0, 1000.0, "mm/s", "rms", 4.5, 11.2),
    ("1x", 21.0, 28.5, "mm/s", "rms", 4.5, 11.2),
    ("2x", 45.0, 54.0, "mm/s", "rms", 2.8, 7.1),
    ("acceleration-hf", 1000.0, 10000.0, "g", "rms", 1.0, 3.0),
    ("1x-peak", 21.0, 28.5, "g", "peak", 1.0, 3.0),
];

/// Config of the http phase: `channels` channels (in sources of at most
/// 1024, the BWF1 limit), each with the bench's five bands, and an alert
/// and danger limit on every band, so that /metrics carries the band and
/// alarm series a configured plant's would. The alarm storage is never
/// opened (no journal is started).
fn http_config(channels: usize, n: usize) -> Result<Config, BenchError> {
    let storage = std::env::temp_dir().join("bandwatch-bench-unused");
    let mut t = format!(
        "[server]\nlisten = \"127.0.0.1:0\"\n[dsp]\nworkers = 2\n[alarms]\nstorage_dir = {:?}\n",
        storage.display().to_string()
    );
    let sources = channels.div_ceil(1024);
    for s in 0..sources {
        let k = (channels - s * 1024).min(1024);
        t.push_str(&format!(
            "\n[[source]]\nname = \"bench{s}\"\n{UNUSED_SOURCE}\nchannels = {k}\nsample_rate_hz = {FS:?}\n"
        ));
    }
    let mut bands = String::new();
    for (name, lo, hi, unit, measure, alert, danger) in HTTP_BAND_ALARMS {
        bands.push_str(&format!(
            "[[channel.band]]\nname = \"{name}\"\nlo_hz = {lo:?}\nhi_hz = {hi:?}\nunit = \"{unit}\"\nmeasure = \"{measure}\"\n\
             [channel.band.alarm]\nalert = {{ limit = {alert:?} }}\ndanger = {{ limit = {danger:?} }}\n"
        ));
    }
    for c in 0..channels {
        t.push_str(&format!(
            "\n[[channel]]\nname = \"ch{c:04}\"\nsource = \"bench{}\"\nindex = {}\nunit = \"g\"\n\
             scale = {G_PER_COUNT:?}\nblock = {n}\nwindow = \"hann\"\noverlap = {OVERLAP:?}\n\
             averaging = {{ mode = \"linear\", count = 4 }}\nintegration_low_cut_hz = 5.0\n{bands}",
            c / 1024,
            c % 1024
        ));
    }
    parse_str(&t).map_err(|e| BenchError::Config(format!("{e:?}")))
}

/// The channels of the http phase, their DSP split over two rigs (one per
/// thread), alarms armed, every channel published at least once.
struct HttpSetup {
    state: Arc<AppState>,
    rigs: Vec<DspRig>,
}

fn http_setup(channels: usize, n: usize, signal: &Arc<Vec<f32>>) -> Result<HttpSetup, BenchError> {
    let config = http_config(channels, n)?;
    let state = Arc::new(AppState::new(&config));
    let half = state.channels.len().div_ceil(2);
    let sets = [
        state.channels[..half].to_vec(),
        state.channels[half..].to_vec(),
    ];
    let mut rigs: Vec<DspRig> = sets
        .into_iter()
        .filter(|s| !s.is_empty())
        // Alarms are given below, from the http config's own bands.
        .map(|s| DspRig::new(&config, s, signal.clone(), false))
        .collect();
    for rig in &mut rigs {
        for d in &mut rig.dsps {
            attach_alarms(d);
        }
    }
    // Enough rounds for every channel to publish (a block, then the
    // averages) so that /metrics has every series and spectra answer 200.
    for rig in &mut rigs {
        for _ in 0..64 {
            if rig.shared.iter().all(|c| c.latest().is_some()) {
                break;
            }
            rig.write_round();
            drain(&mut rig.dsps);
        }
    }
    Ok(HttpSetup { state, rigs })
}

/// Renders /metrics the way the handler does, without any cache: the
/// encoder's cost alone. Returns (median ms over the renders, bytes, lines).
fn render_probe(state: &Arc<AppState>, min: Duration) -> Result<(f64, usize, usize), BenchError> {
    let m = crate::http::metrics::Metrics::new(state.clone());
    let mut times = Vec::new();
    let mut body = Vec::new();
    let t0 = Instant::now();
    while times.len() < 5 || t0.elapsed() < min {
        let t = Instant::now();
        body = m
            .render_fresh()
            .map_err(|e| BenchError::Lost(format!("render /metrics: {e}")))?;
        times.push(t.elapsed().as_secs_f64() * 1e3);
    }
    let lines = body.iter().filter(|&&b| b == b'\n').count();
    Ok((percentile(&times, 50.0), body.len(), lines))
}

/// What the DSP threads did during one round.
#[derive(Debug, Clone, Copy)]
struct DspRound {
    /// Samples processed per second of wall time, both threads.
    rate: f64,
    /// Busy (writing and computing) time over wall time, summed over the
    /// threads: cores used.
    cores: f64,
    /// Paced: how far the slowest thread ended behind real time, s.
    behind_s: f64,
}

/// HTTP requests of one round.
#[derive(Debug, Clone, Copy)]
enum Drive {
    Idle,
    Rate(f64),
    Closed,
}

enum Probe {
    None,
    Rate(HttpProbe),
    Closed(ClosedLoop),
}

/// One DSP thread: flat out, or one round (a hop into every ring, then
/// drain) every hop/fs seconds of wall time. Returns its rig, busy time
/// and how far behind it ended.
fn dsp_thread(
    mut rig: DspRig,
    load: DspLoad,
    stop: &AtomicBool,
    done: &AtomicU64,
) -> (DspRig, Duration, f64) {
    let period = Duration::from_secs_f64(rig.chunk as f64 / FS);
    let per_round = (rig.chunk * rig.dsps.len()) as u64;
    let t0 = Instant::now();
    let mut busy = Duration::ZERO;
    if load == DspLoad::Flat {
        rig.run_until(stop, done);
        return (rig, t0.elapsed(), 0.0);
    }
    if load == DspLoad::Idle {
        while !stop.load(Ordering::Relaxed) {
            std::thread::sleep(Duration::from_millis(5));
        }
        return (rig, Duration::ZERO, 0.0);
    }
    let mut k: u32 = 0;
    while !stop.load(Ordering::Relaxed) {
        let due = t0 + period * k;
        let now = Instant::now();
        if due > now {
            std::thread::sleep((due - now).min(Duration::from_millis(5)));
            continue;
        }
        let b = Instant::now();
        rig.write_round();
        drain(&mut rig.dsps);
        busy += b.elapsed();
        done.fetch_add(per_round, Ordering::Relaxed);
        k += 1;
    }
    let behind = (t0.elapsed().as_secs_f64() - (period * k).as_secs_f64()).max(0.0);
    (rig, busy, behind)
}

/// Runs the DSP threads of `setup` for `seconds` as `load` says, with the
/// HTTP requests `drive` says (served by the real router on loopback).
fn http_round(
    rt: &tokio::runtime::Runtime,
    setup: &mut HttpSetup,
    load: DspLoad,
    seconds: f64,
    drive: Drive,
) -> Result<(DspRound, Probe), BenchError> {
    let stop = Arc::new(AtomicBool::new(false));
    let done = Arc::new(AtomicU64::new(0));
    let threads: Vec<_> = std::mem::take(&mut setup.rigs)
        .into_iter()
        .map(|rig| {
            let (stop, done) = (stop.clone(), done.clone());
            std::thread::spawn(move || dsp_thread(rig, load, &stop, &done))
        })
        .collect();
    let t0 = Instant::now();
    let probe = match drive {
        Drive::Idle => {
            std::thread::sleep(Duration::from_secs_f64(seconds));
            Ok(Probe::None)
        }
        Drive::Rate(_) | Drive::Closed => {
            let st = setup.state.clone();
            rt.block_on(async move {
                let listener = tokio::net::TcpListener::bind("127.0.0.1:0")
                    .await
                    .map_err(io_err("bind HTTP"))?;
                let addr = listener.local_addr().map_err(io_err("local address"))?;
                let (tx, rx) = tokio::sync::oneshot::channel::<()>();
                let server = tokio::spawn(async move {
                    let _ = axum::serve(listener, crate::http::router(st))
                        .with_graceful_shutdown(async {
                            let _ = rx.await;
                        })
                        .await;
                });
                let probe = match drive {
                    Drive::Rate(rate) => http_load(addr, rate, seconds, "ch0000")
                        .await
                        .map(Probe::Rate),
                    _ => http_closed_loop(addr, seconds).await.map(Probe::Closed),
                };
                let _ = tx.send(());
                let _ = server.await;
                probe
            })
        }
    };
    let elapsed = t0.elapsed().as_secs_f64();
    let work = done.load(Ordering::Relaxed);
    stop.store(true, Ordering::Relaxed);
    let mut busy = 0.0;
    let mut behind: f64 = 0.0;
    for t in threads {
        match t.join() {
            Ok((rig, b, late)) => {
                setup.rigs.push(rig);
                busy += b.as_secs_f64();
                behind = behind.max(late);
            }
            Err(_) => return Err(BenchError::Lost("a DSP thread panicked".into())),
        }
    }
    let dropped = lost(&setup.state.channels);
    if dropped > 0 {
        return Err(BenchError::Lost(format!(
            "http rig dropped {dropped} samples"
        )));
    }
    Ok((
        DspRound {
            rate: work as f64 / elapsed,
            cores: busy / elapsed,
            behind_s: behind,
        },
        probe?,
    ))
}

/// The http phase: per channel count, the render cost and body size, then
/// per DSP load and request rate, latencies, the DSP cost of serving, and
/// what back-to-back /metrics achieves.
fn http_phase(
    rt: &tokio::runtime::Runtime,
    args: &BenchArgs,
    signal: &Arc<Vec<f32>>,
    rows: &mut Vec<Row>,
    notes: &mut Vec<String>,
) -> Result<(), BenchError> {
    let repeats = args.repeats.max(1);
    let mut loads = Vec::new();
    for l in &args.http_load {
        loads.push(DspLoad::parse(l).ok_or_else(|| {
            BenchError::Usage(format!("--http-load {l:?}: expected flat, paced or idle"))
        })?);
    }
    if loads.is_empty() {
        loads = vec![DspLoad::Flat, DspLoad::Paced];
    }
    let rates: Vec<f64> = if args.http_rates.is_empty() {
        vec![200.0]
    } else {
        args.http_rates.clone()
    };
    if rates
        .iter()
        .any(|r| !(r.is_finite() && *r > 0.0 && *r <= 10_000.0))
    {
        return Err(BenchError::Usage(
            "--http-rates must be above 0 and at most 10000".into(),
        ));
    }
    let ms_row = |case: String, v: &[f64], target: Option<&str>| Row {
        phase: "http".into(),
        case,
        unit: "ms".into(),
        value: Summary::of(v),
        ratio: None,
        target: target.map(Into::into),
    };
    let row = |case: String, unit: &str, v: &[f64]| Row {
        phase: "http".into(),
        case,
        unit: unit.into(),
        value: Summary::of(v),
        ratio: None,
        target: None,
    };
    for &channels in &args.http_channels {
        eprintln!("bench: http setting up {channels} channels");
        let mut setup = http_setup(channels, args.n, signal)?;
        let (mut render, mut bytes, mut lines) = (Vec::new(), Vec::new(), Vec::new());
        for _ in 0..repeats {
            let (ms, b, l) =
                render_probe(&setup.state, Duration::from_secs_f64(args.work_seconds))?;
            render.push(ms);
            bytes.push(b as f64);
            lines.push(l as f64);
        }
        let body = Summary::of(&bytes).median;
        rows.push(ms_row(format!("render {channels} ch"), &render, None));
        rows.push(row(format!("body {channels} ch bytes"), "bytes", &bytes));
        rows.push(row(format!("body {channels} ch lines"), "lines", &lines));
        for &load in &loads {
            let l = load.as_str();
            let mut base_cores = Vec::new();
            let mut closed_rps = Vec::new();
            let mut closed_bps = Vec::new();
            let mut closed_loss = Vec::new();
            struct AtRate {
                p50m: Vec<f64>,
                p99m: Vec<f64>,
                p50s: Vec<f64>,
                p99s: Vec<f64>,
                loss: Vec<f64>,
                cores: Vec<f64>,
                behind: Vec<f64>,
                non200: u64,
                errors: u64,
                unsent: u64,
            }
            let mut at: Vec<AtRate> = rates
                .iter()
                .map(|_| AtRate {
                    p50m: Vec::new(),
                    p99m: Vec::new(),
                    p50s: Vec::new(),
                    p99s: Vec::new(),
                    loss: Vec::new(),
                    cores: Vec::new(),
                    behind: Vec::new(),
                    non200: 0,
                    errors: 0,
                    unsent: 0,
                })
                .collect();
            for r in 0..repeats {
                eprintln!("bench: http {channels} ch {l} repeat {}/{repeats}", r + 1);
                let (base, _) = http_round(rt, &mut setup, load, args.seconds, Drive::Idle)?;
                base_cores.push(base.cores);
                for (k, &rate) in rates.iter().enumerate() {
                    let (d, probe) =
                        http_round(rt, &mut setup, load, args.seconds, Drive::Rate(rate))?;
                    let a = &mut at[k];
                    a.loss.push(1.0 - d.rate / base.rate);
                    a.cores.push(d.cores);
                    a.behind.push(d.behind_s);
                    if let Probe::Rate(p) = probe {
                        a.p50m.push(percentile(&p.metrics_ms, 50.0));
                        a.p99m.push(percentile(&p.metrics_ms, 99.0));
                        a.p50s.push(percentile(&p.spectrum_ms, 50.0));
                        a.p99s.push(percentile(&p.spectrum_ms, 99.0));
                        a.non200 += p.non_200;
                        a.errors += p.errors;
                        a.unsent += p.unsent;
                    }
                }
                let (d, probe) = http_round(rt, &mut setup, load, args.seconds, Drive::Closed)?;
                closed_loss.push(1.0 - d.rate / base.rate);
                if let Probe::Closed(c) = probe {
                    closed_rps.push(c.responses_per_s);
                    closed_bps.push(c.bytes_per_s);
                }
            }
            let tag = format!("{channels}ch {l}");
            if load == DspLoad::Paced {
                rows.push(row(format!("{tag} DSP no HTTP"), "cores busy", &base_cores));
            }
            for (k, &rate) in rates.iter().enumerate() {
                let a = &at[k];
                let t = format!("{tag} {rate}/s");
                rows.push(ms_row(format!("{t} /metrics p50"), &a.p50m, None));
                rows.push(ms_row(
                    format!("{t} /metrics p99"),
                    &a.p99m,
                    Some("< 10 ms"),
                ));
                rows.push(ms_row(format!("{t} spectrum p50"), &a.p50s, None));
                rows.push(ms_row(format!("{t} spectrum p99"), &a.p99s, None));
                match load {
                    DspLoad::Flat => {
                        rows.push(row(format!("{t} DSP rate lost"), "fraction", &a.loss))
                    }
                    DspLoad::Paced => {
                        rows.push(row(format!("{t} DSP"), "cores busy", &a.cores));
                        rows.push(row(format!("{t} DSP behind"), "s at end", &a.behind));
                    }
                    DspLoad::Idle => {}
                }
                notes.push(format!(
                    "http {t}: /metrics at {} req/s needs {} bytes/s; {} non-200 responses, {} errors, {} unsent (waited past the {HTTP_GRACE_S} s grace; counted with their wait so far)",
                    rate / 2.0,
                    fmt_rate(body * rate / 2.0),
                    a.non200,
                    a.errors,
                    a.unsent
                ));
            }
            rows.push(row(
                format!("{tag} back-to-back n"),
                "/metrics/s",
                &closed_rps,
            ));
            rows.push(row(format!("{tag} back-to-back B"), "bytes/s", &closed_bps));
            if load == DspLoad::Flat {
                rows.push(row(
                    format!("{tag} back-to-back DSP lost"),
                    "fraction",
                    &closed_loss,
                ));
            }
        }
    }
    notes.push(
        "http: requests alternate /metrics and /api/v1/channels/ch0000/spectrum on one keep-alive connection (rate = both together), latency from when each was due; channels have 5 bands, each with an alert and danger alarm; 2 DSP threads: flat = flat out, paced = each channel at 25.6 kHz of wall time, idle = no DSP work; render = one uncached /metrics render with the DSP idle; back-to-back = /metrics requested as soon as the last response is read".into(),
    );
    Ok(())
}

// ---------------------------------------------------------------------------
// welch (driven by bench/compare_scipy.py)
// ---------------------------------------------------------------------------

#[derive(Debug, Clone, Serialize)]
pub struct WelchBand {
    pub name: String,
    pub lo_hz: f64,
    pub hi_hz: f64,
    pub unit: String,
    pub measure: String,
    /// One value per channel.
    pub values: Vec<f64>,
}

#[derive(Debug, Clone, Serialize)]
pub struct WelchReport {
    pub n: usize,
    pub hop: usize,
    pub sample_rate_hz: f64,
    pub channels: usize,
    pub samples: usize,
    pub averages: u32,
    /// Seconds per repeat to push the whole signal through ring → DSP.
    pub seconds: Vec<f64>,
    pub median_seconds: f64,
    /// Averaged power spectrum per channel (units² per line).
    pub spectra: Vec<Vec<f32>>,
    pub bands: Vec<WelchBand>,
}

fn welch(args: &BenchArgs) -> Result<WelchReport, BenchError> {
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
    let config = parse_str(&config_text(c, n, FS, UNUSED_SOURCE, averages))
        .map_err(|e| BenchError::Config(format!("{e:?}")))?;
    if config.channels[0].hop != hop {
        return Err(BenchError::Config(format!(
            "hop {} is not {hop}",
            config.channels[0].hop
        )));
    }
    let mut seconds = Vec::new();
    let mut last = None;
    for _ in 0..args.repeats.max(1) {
        let shared: Vec<Arc<ChannelShared>> = config
            .channels
            .iter()
            .map(|ch| Arc::new(ChannelShared::new(ch.clone())))
            .collect();
        let mut dsps = Vec::new();
        let mut writers = Vec::new();
        for ch in &shared {
            let (w, r) = channel_ring(len + 1, FS, ch.counters.clone());
            let mut d = ChannelDsp::new(ch.clone(), r);
            d.set_blocks_per_turn(usize::MAX);
            dsps.push(d);
            writers.push(w);
        }
        // Untimed warm-up, as scipy's arrays are warm in its process: the
        // rings' pages touched once (as a running daemon's are) and the
        // DSP run once on zeros; then a restart, which clears the averages.
        let zeros = vec![0f32; len];
        for w in writers.iter_mut() {
            w.write(0, 1, &zeros);
            w.mark_discontinuity(crate::counters::GapReason::Restart);
        }
        drain(&mut dsps);
        let t = Instant::now();
        for (i, w) in writers.iter_mut().enumerate() {
            w.write(len as u64, 2, &all[i * len..(i + 1) * len]);
        }
        drain(&mut dsps);
        seconds.push(t.elapsed().as_secs_f64());
        last = Some(shared);
    }
    let shared = last.unwrap_or_default();
    let mut spectra = Vec::new();
    let mut bands: Vec<WelchBand> = config.channels[0]
        .bands
        .iter()
        .map(|b| {
            let (lo_hz, hi_hz) = match b.edges {
                crate::config::BandEdges::Hz { lo, hi } => (lo, hi),
                // The comparison config has fixed-Hz bands only.
                crate::config::BandEdges::Orders { .. } => (f64::NAN, f64::NAN),
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

// ---------------------------------------------------------------------------
// The run
// ---------------------------------------------------------------------------

fn fmt_rate(x: f64) -> String {
    if !x.is_finite() {
        "-".into()
    } else if x.abs() >= 1e9 {
        format!("{:.2} G", x / 1e9)
    } else if x.abs() >= 1e6 {
        format!("{:.2} M", x / 1e6)
    } else if x.abs() >= 1e3 {
        format!("{:.1} k", x / 1e3)
    } else {
        format!("{x:.3}")
    }
}

/// The table as printed.
pub fn table(report: &Report) -> String {
    let mut s = format!(
        "bandwatch bench: N = {}, hop = {} ({}% overlap), fs = {} Hz, {} repeat(s); {} x {}\n",
        report.n,
        report.hop,
        OVERLAP * 100.0,
        report.sample_rate_hz,
        report.repeats,
        report.machine.nproc,
        report.machine.cpu
    );
    s.push_str(&format!(
        "{:<8} {:<22} {:>10} {:>21} {:<14} {:>6} {:>13}  {}\n",
        "phase", "case", "median", "min-max", "unit", "ratio", "min-max", "target"
    ));
    for r in &report.rows {
        let (rm, rr) = match &r.ratio {
            Some(x) => (
                format!("{:.3}", x.median),
                format!("{:.3}-{:.3}", x.min, x.max),
            ),
            None => (String::new(), String::new()),
        };
        s.push_str(&format!(
            "{:<8} {:<22} {:>10} {:>21} {:<14} {:>6} {:>13}  {}\n",
            r.phase,
            r.case,
            fmt_rate(r.value.median),
            format!("{} - {}", fmt_rate(r.value.min), fmt_rate(r.value.max)),
            r.unit,
            rm,
            rr,
            r.target.clone().unwrap_or_default()
        ));
    }
    for n in &report.notes {
        s.push_str(&format!("note: {n}\n"));
    }
    s
}

fn wants(args: &BenchArgs, phase: &str) -> bool {
    args.only.is_empty() || args.only.iter().any(|p| p == phase)
}

/// Runs the benchmark as the options say, prints the table (or, in the
/// welch and memory-child modes, JSON) and writes `--json`.
///
/// # Errors
/// Bad options, a socket or file that cannot be opened, or a rig that
/// lost data (which would make its numbers meaningless).
pub fn run(args: &BenchArgs) -> Result<(), BenchError> {
    if args.n < 16 || !args.n.is_multiple_of(4) {
        return Err(BenchError::Usage(format!(
            "--n {} must be at least 16 and a multiple of 4",
            args.n
        )));
    }
    if let Some(c) = args.memory_child {
        let p = memory_probe(args.n, c)?;
        println!("{}", serde_json::to_string(&p).unwrap_or_default());
        return Ok(());
    }
    if args.only.iter().any(|p| p == "welch") {
        let w = welch(args)?;
        let text = serde_json::to_string(&w).map_err(|e| BenchError::Lost(e.to_string()))?;
        match &args.json {
            Some(p) => std::fs::write(p, text).map_err(io_err(format!("write {}", p.display())))?,
            None => println!("{text}"),
        }
        return Ok(());
    }
    for p in &args.only {
        if !["fft", "dsp", "path", "memory", "ingest", "http"].contains(&p.as_str()) {
            return Err(BenchError::Usage(format!("unknown phase {p:?}")));
        }
    }
    if args.channels.iter().any(|&c| c == 0 || c > 1024) {
        return Err(BenchError::Usage("--channels must be 1 to 1024".into()));
    }
    if args
        .http_channels
        .iter()
        .any(|&c| c == 0 || c > MAX_HTTP_CHANNELS)
    {
        return Err(BenchError::Usage(format!(
            "--http-channels must be 1 to {MAX_HTTP_CHANNELS}"
        )));
    }
    let repeats = args.repeats.max(1);
    let n = args.n;
    let min = Duration::from_secs_f64(args.work_seconds.max(0.01));
    let signal = Arc::new(test_signal(4 * FS as usize, FS));
    let hop = bench_config(1, n, FS, UNUSED_SOURCE)?.channels[0].hop;
    let mut rows = Vec::new();
    let mut notes = Vec::new();

    // fft, dsp and path, interleaved per repeat.
    let compute = wants(args, "fft") || wants(args, "dsp") || wants(args, "path");
    if compute {
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
                    DspRig::for_channels(&config, signal.clone(), false),
                    DspRig::for_channels(&config, signal.clone(), true),
                ));
            }
            if wants(args, "path") {
                path_rigs.push(
                    formats
                        .iter()
                        .map(|&f| PathRig::new(&config, f, &signal))
                        .collect::<Vec<_>>(),
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
    }

    if wants(args, "memory") {
        let largest = args.channels.iter().copied().max().unwrap_or(1024);
        let mut per = Vec::new();
        let mut total = Vec::new();
        for r in 0..repeats.min(3) {
            eprintln!("bench: memory repeat {}/{}", r + 1, repeats.min(3));
            let p = memory_in_child(n, largest)?;
            per.push((p.rss_after.saturating_sub(p.rss_before)) as f64 / largest as f64);
            total.push(p.rss_after as f64);
        }
        rows.push(Row {
            phase: "memory".into(),
            case: format!("per channel, N={n}"),
            unit: "bytes RSS".into(),
            value: Summary::of(&per),
            ratio: None,
            target: Some("< 1 MiB".into()),
        });
        rows.push(Row {
            phase: "memory".into(),
            case: format!("process, {largest} ch"),
            unit: "bytes RSS".into(),
            value: Summary::of(&total),
            ratio: None,
            target: None,
        });
    }

    let need_rt = wants(args, "ingest") || wants(args, "http");
    let rt = if need_rt {
        Some(
            tokio::runtime::Builder::new_multi_thread()
                .worker_threads(2)
                .enable_all()
                .thread_name("bench-io")
                .build()
                .map_err(io_err("async runtime"))?,
        )
    } else {
        None
    };

    if let (true, Some(rt)) = (wants(args, "ingest"), &rt) {
        for transport in [Transport::Tcp, Transport::Udp] {
            let name = if transport == Transport::Tcp {
                "tcp"
            } else {
                "udp"
            };
            let mut best = Vec::new();
            for r in 0..repeats.min(3) {
                eprintln!("bench: ingest {name} repeat {}/{}", r + 1, repeats.min(3));
                let (rate, steps) =
                    rt.block_on(ingest_ladder(transport, n, args.seconds, &signal))?;
                for st in &steps {
                    eprintln!(
                        "bench:   {name} {} Hz x {LOAD_CHANNELS}: held {} (dropped {}, missing {}, rejected {}, sender behind {}, DSP lag {:.3} s)",
                        st.sample_rate_hz, st.held, st.dropped, st.missing, st.rejected, st.sender_behind, st.lag_seconds
                    );
                }
                best.push(rate);
            }
            rows.push(Row {
                phase: "ingest".into(),
                case: format!("{name} {LOAD_CHANNELS} ch, {} s", args.seconds),
                unit: "samples/s held".into(),
                value: Summary::of(&best),
                ratio: None,
                target: None,
            });
        }
        notes.push(format!(
            "ingest: {LOAD_CHANNELS} channels of i16 BWF1 ({INGEST_FRAME_SAMPLES} instants a frame), per-channel rate doubled from 25.6 kHz until a step loses a sample or ends with the DSP more than {MAX_LAG_S} s behind (beyond the samples held back for the next result), then bisected; sender, source and 2 DSP workers share the cores"
        ));
    }

    if let (true, Some(rt)) = (wants(args, "http"), &rt) {
        http_phase(rt, args, &signal, &mut rows, &mut notes)?;
    }

    let report = Report {
        machine: machine(),
        n,
        hop,
        sample_rate_hz: FS,
        repeats,
        rows,
        notes,
    };
    print!("{}", table(&report));
    let _ = std::io::stdout().flush();
    if let Some(p) = &args.json {
        let text =
            serde_json::to_string_pretty(&report).map_err(|e| BenchError::Lost(e.to_string()))?;
        std::fs::write(p, text).map_err(io_err(format!("write {}", p.display())))?;
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn summary_takes_median_and_range() {
        let s = Summary::of(&[3.0, 1.0, 2.0, 10.0]);
        assert_eq!(s.median, 2.5);
        assert_eq!((s.min, s.max), (1.0, 10.0));
        assert_eq!(Summary::of(&[5.0, 1.0, 3.0]).median, 3.0);
    }

    #[test]
    fn patched_frames_still_decode_in_sequence() {
        // The bench rewrites sequence numbers in place; the real decoder
        // must accept the result (CRC recomputed) and see no gap.
        let signal = test_signal(4096, FS);
        let (mut bytes, fb) = encode_frames(SampleFormat::I24, 3, 512, 256, &signal, FS);
        for (i, f) in bytes.chunks_exact_mut(fb).enumerate() {
            patch_frame(f, 1000 + 256 * i as u64, FS);
        }
        let mut d = crate::frame::bwf1::StreamDecoder::new();
        d.push(&bytes);
        let a = d.next_frame().expect("ok").expect("frame");
        let b = d.next_frame().expect("ok").expect("frame");
        assert_eq!(a.header.first_sample, 1000);
        assert_eq!(b.header.first_sample, 1256);
        assert_eq!(d.stats().rejected_total(), 0);
    }

    #[test]
    fn path_rig_loses_nothing_and_publishes() {
        let config = bench_config(2, 2048, FS, UNUSED_SOURCE).expect("config");
        let signal = test_signal(8192, FS);
        let mut rig = PathRig::new(&config, SampleFormat::I16, &signal);
        // 12 rounds of one hop: 1 + (12·512 − 2048)/512 = 9 blocks, so
        // two averages of 4 are published.
        for _ in 0..12 {
            rig.round();
        }
        assert_eq!(lost(&rig.shared), 0);
        assert!(rig.shared.iter().all(|c| c.latest().is_some()));
        let processed: u64 = rig
            .shared
            .iter()
            .map(|c| c.counters.samples_processed.load(Ordering::Relaxed))
            .sum();
        // With gather on, what the next result still lacks waits in the
        // rings: processed + waiting is everything sent.
        let waiting: u64 = rig.dsps.iter().map(|d| d.backlog() as u64).sum();
        assert_eq!(processed + waiting, 12 * (rig.instants * 2) as u64);
        assert!(waiting < (rig.instants * 2 * 4) as u64, "waiting {waiting}");
        let spectra: u64 = rig
            .shared
            .iter()
            .map(|c| c.counters.spectra.load(Ordering::Relaxed))
            .sum();
        assert_eq!(spectra, 2 * 2);
    }

    #[test]
    fn rss_is_read() {
        assert!(rss_bytes() > 0);
    }
}
