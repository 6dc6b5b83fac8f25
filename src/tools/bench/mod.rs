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
//! - `plant`: not a phase of the default run (`--only plant`): the real
//!   daemon as a child process, fed live over UDP by a separate sender
//!   process at plant scale (4096 channels × 25.6 kHz by default), scraped
//!   like Prometheus; its CPU, losses, spectrum age, DSP lag and RSS.
//! - `page`: not a phase of the default run (`--only page`): the daemon's
//!   CPU per open operator page at 64 channels (the overview by list +
//!   details, by `/api/v1/overview`, and a channel view), with 0 and
//!   `--page-clients` pages side by side, and the bytes of one update.
//! - `history`: not a phase of the default run (`--only history`): the
//!   DSP throughput the history's taps take at `--history-channels` (1024)
//!   channels of 10 bands, at the defaults and at a stress setting, beside
//!   the same rig without history; and the file's size per channel per
//!   day (a simulated day written through the store).
//! - `welch`: not a phase of the default run; the mode
//!   `bench/compare_scipy.py` drives (`--signal FILE`).
//!
//! Every compute phase runs on one thread, so its rates are per core. The
//! phases of one repeat run one after another, and ratios are taken within
//! a repeat, then summarised (median, min–max) over the repeats.
//!
//! Every rig is assembled by `pipeline::Builder`, as the daemon's pipeline
//! is, and driven by hand on one thread. One file per phase:
//! [`fft`] (and the side-by-side timing), [`dsp`], [`path`], [`memory`],
//! [`ingest`], [`http`], [`plant`], [`welch`]; [`input`] holds the config text and
//! test signal they share.

mod dsp;
mod exposition;
mod fft;
mod history;
mod http;
pub use http::DspLoad;
mod ingest;
mod input;
mod memory;
mod page;
mod path;
mod plant;
mod welch;

use std::io::Write as _;
use std::net::SocketAddr;
use std::path::PathBuf;
use std::sync::Arc;

use serde::Serialize;

use input::{bench_config, test_signal, UNUSED_SOURCE};

/// Sample rate of every bench channel (the demo's, README).
const FS: f64 = 25_600.0;
/// Overlap of every bench channel (the demo's).
const OVERLAP: f64 = 0.75;
/// Converter step in g per count: ±5 V over 24 bits, 100 mV/g (the demo's).
const G_PER_COUNT: f64 = 5.0 / 8_388_608.0 / 0.1;

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
    /// (default: all), plant and page (only when named), or welch (with
    /// --signal).
    #[arg(long, value_enum, value_delimiter = ',')]
    pub only: Vec<Phase>,
    /// Also write the results as JSON here.
    #[arg(long)]
    pub json: Option<PathBuf>,
    /// welch: raw little-endian f32 samples, channel after channel.
    #[arg(long)]
    pub signal: Option<PathBuf>,
    /// welch: channels in --signal.
    #[arg(long, default_value_t = 1)]
    pub signal_channels: usize,
    /// history: channels of the DSP rigs (10 bands each).
    #[arg(long, default_value_t = 1024)]
    pub history_channels: usize,
    /// exposition: channel counts of the /metrics size and render rows.
    #[arg(long, value_delimiter = ',', default_value = "64,1024,4096")]
    pub exposition_channels: Vec<usize>,
    /// http: channel counts (each also gets the render and body-size rows).
    #[arg(long, value_delimiter = ',', default_value = "64")]
    pub http_channels: Vec<usize>,
    /// http: DSP load during the requests, `flat` (flat out), `paced`
    /// (real time: 25.6 kHz per channel) and/or `idle` (no DSP work).
    #[arg(long, value_enum, value_delimiter = ',', default_value = "flat,paced")]
    pub http_load: Vec<http::DspLoad>,
    /// http: request rates, requests/s (alternating /metrics and spectrum).
    #[arg(long, value_delimiter = ',', default_value = "200")]
    pub http_rates: Vec<f64>,
    /// plant: channels of the plant-scale run.
    #[arg(long, default_value_t = 4096)]
    pub plant_channels: usize,
    /// plant: sample rate of every channel, Hz.
    #[arg(long, default_value_t = 25_600.0)]
    pub plant_rate_hz: f64,
    /// plant: seconds measured after the warm-up.
    #[arg(long, default_value_t = 120.0)]
    pub plant_seconds: f64,
    /// plant: seconds of live sending before the measured window.
    #[arg(long, default_value_t = 15.0)]
    pub plant_warmup_seconds: f64,
    /// plant: channels per UDP source (one DAQ box, one BWF1 stream; at most 1024).
    #[arg(long, default_value_t = 64)]
    pub plant_per_source: usize,
    /// plant: instants per datagram (default: the largest power of two up
    /// to 1024 whose i16 datagram fits in 65 507 bytes; 256 for 64 channels).
    #[arg(long)]
    pub plant_frame_samples: Option<usize>,
    /// plant: seconds between /metrics scrapes (Prometheus's usual 15 s).
    #[arg(long, default_value_t = 15.0)]
    pub plant_scrape_every: f64,
    /// plant: gain on the test signal (default 0.1: about 1.3 mm/s, no
    /// alarm trips; 1.0: every channel trips to danger at once).
    #[arg(long, default_value_t = plant::DEFAULT_SIGNAL_GAIN)]
    pub plant_signal_gain: f64,
    /// plant: a further periodic GET beside the scrape, PATH@SECONDS
    /// (repeatable), e.g. what an open page polls.
    #[arg(long)]
    pub plant_poll: Vec<String>,
    /// page: page clients polling every 1.5 s.
    #[arg(long, default_value_t = 8)]
    pub page_clients: usize,
    /// page: seconds of each round (no client, then each way with clients).
    #[arg(long, default_value_t = 12.0)]
    pub page_seconds: f64,
    /// Internal: be the plant phase's sender process, sending to these UDP
    /// sources, and print one JSON line.
    #[arg(long, hide = true, value_delimiter = ',')]
    pub plant_send_to: Vec<SocketAddr>,
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

pub(crate) fn io_err(what: impl Into<String>) -> impl FnOnce(std::io::Error) -> BenchError {
    let what = what.into();
    move |source| BenchError::Io { what, source }
}

/// Median, min and max of a set of measurements.
#[derive(Debug, Clone, Serialize)]
pub(crate) struct Summary {
    pub(crate) median: f64,
    pub(crate) min: f64,
    pub(crate) max: f64,
    pub(crate) values: Vec<f64>,
}

impl Summary {
    pub(crate) fn of(values: &[f64]) -> Summary {
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
pub(crate) struct Row {
    pub(crate) phase: String,
    pub(crate) case: String,
    pub(crate) unit: String,
    pub(crate) value: Summary,
    /// Ratio to the f32 FFT limit measured beside it (alternating slices)
    /// within each repeat.
    pub(crate) ratio: Option<Summary>,
    pub(crate) target: Option<String>,
}

#[derive(Debug, Clone, Serialize)]
pub(crate) struct Machine {
    pub(crate) nproc: usize,
    pub(crate) cpu: String,
    pub(crate) os: String,
}

#[derive(Debug, Clone, Serialize)]
pub(crate) struct Report {
    pub(crate) machine: Machine,
    pub(crate) n: usize,
    pub(crate) hop: usize,
    pub(crate) sample_rate_hz: f64,
    pub(crate) repeats: usize,
    pub(crate) rows: Vec<Row>,
    pub(crate) notes: Vec<String>,
    /// The plant phase's figures, when it ran.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub(crate) plant: Option<plant::PlantReport>,
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

pub(crate) fn fmt_rate(x: f64) -> String {
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
pub(crate) fn table(report: &Report) -> String {
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

/// `bench --only`: a phase (or mode) of the benchmark.
#[derive(Debug, Clone, Copy, PartialEq, Eq, clap::ValueEnum)]
pub enum Phase {
    /// The FFT alone.
    Fft,
    /// A channel's DSP per block.
    Dsp,
    /// Ring to published snapshot.
    Path,
    /// Memory per channel.
    Memory,
    /// Sources over loopback sockets.
    Ingest,
    /// HTTP latency under DSP load.
    Http,
    /// /metrics size and render, full and trimmed.
    Exposition,
    /// The plant-scale run (only when named).
    Plant,
    /// CPU per open operator page (only when named).
    Page,
    /// History writes' cost, file size per channel and day (only when named).
    History,
    /// Welch spectra of --signal as JSON (for bench/compare_scipy.py).
    Welch,
}

impl Phase {
    pub fn as_str(self) -> &'static str {
        match self {
            Phase::Fft => "fft",
            Phase::Dsp => "dsp",
            Phase::Path => "path",
            Phase::Memory => "memory",
            Phase::Ingest => "ingest",
            Phase::Http => "http",
            Phase::Exposition => "exposition",
            Phase::Plant => "plant",
            Phase::Page => "page",
            Phase::History => "history",
            Phase::Welch => "welch",
        }
    }
}

pub(crate) fn wants(args: &BenchArgs, phase: &str) -> bool {
    args.only.is_empty() || args.only.iter().any(|p| p.as_str() == phase)
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
        let p = memory::memory_probe(args.n, c)?;
        println!("{}", serde_json::to_string(&p).unwrap_or_default());
        return Ok(());
    }
    if !args.plant_send_to.is_empty() {
        let r = plant::sender(args)?;
        println!("{}", serde_json::to_string(&r).unwrap_or_default());
        return Ok(());
    }
    if args.only.contains(&Phase::Welch) {
        let w = welch::welch(args)?;
        let text = serde_json::to_string(&w).map_err(|e| BenchError::Lost(e.to_string()))?;
        match &args.json {
            Some(p) => std::fs::write(p, text).map_err(io_err(format!("write {}", p.display())))?,
            None => println!("{text}"),
        }
        return Ok(());
    }
    if args.channels.iter().any(|&c| c == 0 || c > 1024) {
        return Err(BenchError::Usage("--channels must be 1 to 1024".into()));
    }
    for (flag, counts) in [
        ("--http-channels", &args.http_channels),
        ("--exposition-channels", &args.exposition_channels),
    ] {
        if counts
            .iter()
            .any(|&c| c == 0 || c > http::MAX_HTTP_CHANNELS)
        {
            return Err(BenchError::Usage(format!(
                "{flag} must be 1 to {}",
                http::MAX_HTTP_CHANNELS
            )));
        }
    }
    let repeats = args.repeats.max(1);
    let n = args.n;
    let signal = Arc::new(test_signal(4 * FS as usize, FS));
    let hop = bench_config(1, n, FS, UNUSED_SOURCE)?.channels[0].hop;
    let mut rows = Vec::new();
    let mut notes = Vec::new();

    if wants(args, "fft") || wants(args, "dsp") || wants(args, "path") {
        fft::compute_phases(args, &signal, hop, &mut rows)?;
    }
    if wants(args, "memory") {
        memory::memory_phase(args, &mut rows)?;
    }

    let page = args.only.contains(&Phase::Page);
    let need_rt = wants(args, "ingest") || wants(args, "http") || wants(args, "exposition") || page;
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
        ingest::ingest_phase(rt, args, &signal, &mut rows, &mut notes)?;
    }

    if let (true, Some(rt)) = (wants(args, "http"), &rt) {
        http::http_phase(rt, args, &signal, &mut rows, &mut notes)?;
    }

    if let (true, Some(rt)) = (wants(args, "exposition"), &rt) {
        exposition::exposition_phase(rt, args, &signal, &mut rows, &mut notes)?;
    }

    // Only when named: a minute or more of rounds.
    if let (true, Some(rt)) = (page, &rt) {
        page::page_phase(rt, args, &signal, &mut rows, &mut notes)?;
    }

    // Only when named: it writes history files.
    if args.only.contains(&Phase::History) {
        history::history_phase(args, &signal, &mut rows, &mut notes)?;
    }

    // Only when named: it runs the daemon at plant scale for minutes.
    let plant = if args.only.contains(&Phase::Plant) {
        Some(plant::plant_phase(args, &mut rows, &mut notes)?)
    } else {
        None
    };

    let report = Report {
        machine: machine(),
        n,
        hop,
        sample_rate_hz: FS,
        repeats,
        rows,
        notes,
        plant,
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
}
