//! `bandwatch replay`: runs a recorded stream through the same pipeline as
//! the daemon — the same framing, checks, scaling, rings and DSP — as fast as
//! the CPU allows, and writes one JSON line per published spectrum. Given
//! the same bytes, live processing and replay compute the same numbers.
//!
//! Two inputs:
//! - a recording (`record`'s file, or any stream a source speaks) with the
//!   config of the source that received it ([`replay`]);
//! - an alarm capture, by its `.json` or `.bwf1` path ([`replay_capture`]):
//!   the capture's metadata names the channel, rate, unit and the channel
//!   settings at the trip (README, "Captures"), so no config is needed; the
//!   replay recomputes the spectrum and band values stored with the capture
//!   and compares them ([`TripCheck`]).
//!
//! A replay that accepted no frame fails with [`ReplayError::NothingAccepted`],
//! which counts the rejections by reason.

use std::io::{Read, Write};
use std::path::{Path, PathBuf};
use std::sync::atomic::Ordering;
use std::sync::Arc;

use crate::alarm::capture::{
    read_meta, CaptureError, CaptureMeta, CaptureSettings, SettingsError, SpectrumAtTrip,
};
use crate::config::{
    AveragingMode, ChannelSpec, Config, Framing, MachineSpec, SecondConnection, SourceKind,
    SourceSpec, SpeedSource, StreamSpec,
};
use crate::counters::SourceCounters;
use crate::frame::bwf1::{Header, StreamDecoder};
use crate::pipeline::worker::ChannelDsp;
use crate::pipeline::{AlarmMode, Builder, Inline, RingSize, RunError};
use crate::source::framed::{FrameSink, StreamFraming};

#[derive(Debug, thiserror::Error)]
pub enum ReplayError {
    #[error("no source named {0:?} in the config")]
    UnknownSource(String),
    #[error("the config has no network or serial source to replay into")]
    NoSource,
    #[error("source {0:?} has no channels in the config")]
    NoChannels(String),
    #[error("cannot read {path}: {source}")]
    Read {
        path: String,
        #[source]
        source: std::io::Error,
    },
    #[error("cannot write the output: {0}")]
    Write(#[source] std::io::Error),
    #[error("decoder: {0}")]
    Decoder(String),
    #[error("cannot assemble the pipeline: {0}")]
    Pipeline(#[from] RunError),
    /// No frame (or line batch) of the file passed the source's checks.
    #[error("{0}")]
    NothingAccepted(Rejections),
    #[error(
        "{path} is not an alarm capture: give its .json, or its .bwf1 with the .json beside it"
    )]
    NotACapture { path: String },
    #[error("{0}")]
    Capture(#[from] CaptureError),
    /// A capture written before its metadata held the channel settings.
    #[error("capture {path} (version {version}) does not hold {missing}; give --config with channel {channel:?} to supply them")]
    CaptureIncomplete {
        path: String,
        version: u32,
        channel: String,
        /// The metadata fields that are missing, comma separated.
        missing: String,
    },
    #[error("capture {path}: {source}")]
    CaptureSettings {
        path: String,
        #[source]
        source: SettingsError,
    },
    #[error("the config has no channel {0:?} (the capture's channel)")]
    UnknownChannel(String),
}

/// What a replay rejected, by reason, when it accepted nothing.
#[derive(Debug, Clone, PartialEq)]
pub struct Rejections {
    /// Bytes read from the file.
    pub bytes: u64,
    /// Channels per instant the source expects.
    pub channels: usize,
    /// (reason, count, the first such rejection's detail).
    pub reasons: Vec<(String, u64, Option<String>)>,
    /// Bytes the decoder threw away (junk, partial frames).
    pub bytes_skipped: u64,
}

impl std::fmt::Display for Rejections {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        write!(f, "0 frames accepted from {} bytes:", self.bytes)?;
        if self.reasons.is_empty() {
            write!(
                f,
                " no frame found ({} bytes skipped by the decoder)",
                self.bytes_skipped
            )?;
        }
        for (i, (reason, n, detail)) in self.reasons.iter().enumerate() {
            let sep = if i == 0 { "" } else { "," };
            write!(f, "{sep} {n} rejected {reason}")?;
            if let Some(d) = detail {
                write!(f, " ({d})")?;
            }
        }
        write!(f, " [source expects {} channel(s)]", self.channels)
    }
}

/// One line of replay output.
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct ReplayLine {
    pub channel: String,
    pub seq: u64,
    /// Stream index of the newest block's first sample.
    pub first_sample: u64,
    /// Stream index of the oldest averaged block's first sample.
    #[serde(default)]
    pub oldest_first_sample: u64,
    pub averages: u32,
    /// Band values in each band's unit, in config order; null when the band
    /// has no value (e.g. an order band while the speed is unknown).
    pub bands: Vec<(String, Option<f64>)>,
    /// Running speed the order bands used, Hz (null: unknown or no machine).
    #[serde(default)]
    pub speed_hz: Option<f64>,
    pub rms: f64,
    pub peak: f64,
    pub crest_factor: f64,
}

fn stream_of(kind: &SourceKind) -> Option<StreamSpec> {
    match kind {
        SourceKind::TcpConnect { stream, .. }
        | SourceKind::TcpListen { stream, .. }
        | SourceKind::Serial { stream, .. } => Some(stream.clone()),
        SourceKind::Udp {
            max_datagram_bytes, ..
        } => Some(StreamSpec {
            framing: crate::config::Framing::Bwf1,
            max_frame_bytes: *max_datagram_bytes,
        }),
        SourceKind::Sim { .. } => None,
    }
}

/// The pipeline of one source, driven on this thread, and what it wrote.
struct Run<'a> {
    pipeline: Inline,
    sink: FrameSink,
    state: Arc<SourceCounters>,
    seqs: Vec<u64>,
    out: &'a mut dyn Write,
    /// The result to keep: (channel index, first_sample of its newest block).
    watch: Option<(usize, u64)>,
    kept: Option<Kept>,
}

/// A published result, as [`Run::watch`] asked.
struct Kept {
    averages: u32,
    power: Vec<f32>,
    envelope_power: Vec<f32>,
    bands: Vec<(String, Option<f64>)>,
}

impl<'a> Run<'a> {
    fn new(
        config: &Config,
        source: &SourceSpec,
        out: &'a mut dyn Write,
    ) -> Result<Run<'a>, ReplayError> {
        // Replay drains the rings after every read, so they never overflow:
        // sized for the largest read plus two blocks.
        let ring = RingSize::Headroom(1 << 17);
        let mut pipeline = Builder::new(config)
            .only_source(&source.name)
            .history(false)
            .ring(ring)
            .alarms(AlarmMode::Off)
            .gather(false)
            .blocks_per_turn(1)
            .assemble()?
            .inline();
        if pipeline.channels.is_empty() {
            return Err(ReplayError::NoChannels(source.name.clone()));
        }
        let outputs = pipeline.source_outputs(&source.name)?;
        let state = pipeline
            .state
            .source(&source.name)
            .ok_or_else(|| ReplayError::UnknownSource(source.name.clone()))?
            .clone();
        let mut sink = FrameSink::new(outputs, state.clone(), source.sample_rate_hz)
            .with_sequence(&source.sequence);
        sink.restart();
        let seqs = vec![0u64; pipeline.channels.len()];
        Ok(Run {
            pipeline,
            sink,
            state,
            seqs,
            out,
            watch: None,
            kept: None,
        })
    }

    /// Runs the DSP over what the rings hold and writes each result, until
    /// no channel has work left (a channel waiting for its machine's speed,
    /// measured by another channel, goes on once that one was polled).
    fn drain(&mut self) -> Result<(), ReplayError> {
        loop {
            let mut worked = false;
            for (i, (dsp, seq)) in self
                .pipeline
                .channels
                .iter_mut()
                .zip(self.seqs.iter_mut())
                .enumerate()
            {
                while dsp.poll() {
                    worked = true;
                    let watch = self.watch.filter(|(c, _)| *c == i).map(|(_, s)| s);
                    if let Some(k) = emit(dsp, seq, &mut *self.out, watch)? {
                        self.kept = Some(k);
                    }
                }
            }
            if !worked {
                return Ok(());
            }
        }
    }

    /// End of input: no more speed measurements will come, so a channel
    /// waiting for its machine's speed goes on (README "Orders").
    fn end_of_input(&mut self) -> Result<(), ReplayError> {
        for m in &self.pipeline.state.machines {
            m.close();
        }
        self.drain()
    }

    /// Ends the replay: fails if no frame was accepted.
    fn finish(self, channels: usize) -> Result<(Arc<SourceCounters>, Option<Kept>), ReplayError> {
        self.out.flush().map_err(ReplayError::Write)?;
        let st = &self.state;
        if SourceCounters::get(&st.frames) == 0 {
            let details = self.sink.first_rejections();
            let reasons = st
                .rejected()
                .into_iter()
                .map(|(r, n)| {
                    let d = details
                        .iter()
                        .find(|(x, _)| *x == r)
                        .map(|(_, d)| d.clone());
                    (r.to_string(), n, d)
                })
                .collect();
            return Err(ReplayError::NothingAccepted(Rejections {
                bytes: SourceCounters::get(&st.bytes),
                channels,
                reasons,
                bytes_skipped: SourceCounters::get(&st.bytes_skipped),
            }));
        }
        Ok((self.state, self.kept))
    }
}

/// Replays `file` into source `source` (default: the first non-sim one) and
/// writes JSON lines to `out`. Returns the source's counters.
///
/// # Errors
/// [`ReplayError::NothingAccepted`] when no frame passed the source's
/// checks (the rejections by reason inside); the others as named.
pub fn replay(
    config: &Config,
    file: &Path,
    source: Option<&str>,
    out: &mut dyn Write,
) -> Result<Arc<SourceCounters>, ReplayError> {
    let spec = match source {
        Some(name) => config
            .sources
            .iter()
            .find(|s| s.name == name)
            .ok_or_else(|| ReplayError::UnknownSource(name.to_string()))?,
        None => config
            .sources
            .iter()
            .find(|s| stream_of(&s.kind).is_some())
            .ok_or(ReplayError::NoSource)?,
    };
    let stream = stream_of(&spec.kind).ok_or(ReplayError::NoSource)?;
    let mut run = Run::new(config, spec, out)?;
    let mut framing = StreamFraming::new(&stream, spec.channels).map_err(ReplayError::Decoder)?;
    let read_err = |source| ReplayError::Read {
        path: file.display().to_string(),
        source,
    };
    let mut f = std::fs::File::open(file).map_err(read_err)?;
    let mut buf = vec![0u8; 65_536];
    loop {
        let n = f.read(&mut buf).map_err(read_err)?;
        if n == 0 {
            framing.reset(&mut run.sink);
            break;
        }
        run.state.bytes.fetch_add(n as u64, Ordering::Relaxed);
        framing.feed(&buf[..n], &mut run.sink);
        run.drain()?;
    }
    run.end_of_input()?;
    Ok(run.finish(spec.channels)?.0)
}

/// Relative difference allowed between a replayed and a stored value
/// (spectrum line or band) for [`TripCheck::reproduced`]: 1e-6, about 8
/// ulp of f32 (ε = 1.19e-7). Replay runs the same code on the same f32
/// samples in the same order, and the metadata stores every number in its
/// shortest exact form, so on the machine that took the capture the
/// difference is 0 (what the tests see); the margin is for another
/// machine, where the FFT may pick other kernels (rounding in the last
/// bits).
pub const REPRODUCE_REL: f64 = 1e-6;

/// The trip's spectrum and bands recomputed by a capture replay, against
/// the values stored with the capture.
#[derive(Debug, Clone, PartialEq)]
pub struct TripCheck {
    /// Stream index of the newest block of the trip's average.
    pub first_sample: u64,
    pub averages: u32,
    /// The recomputed averaged power spectrum (the stored one's lines).
    pub spectrum: Vec<f32>,
    /// The recomputed envelope spectrum (empty without envelope analysis).
    pub envelope_spectrum: Vec<f32>,
    /// Band values recomputed, in the settings' band order.
    pub bands: Vec<(String, Option<f64>)>,
    /// Largest |replayed − stored| / |stored| over the spectrum's lines
    /// (0 where both are 0, infinite where only the stored one is).
    pub spectrum_max_rel: f64,
    /// The same over the stored band values.
    pub bands_max_rel: f64,
    /// Stored band values with no recomputed value.
    pub bands_missing: Vec<String>,
    /// Why an exact reproduction cannot be expected, if it cannot.
    pub caveat: Option<String>,
}

impl TripCheck {
    /// Within [`REPRODUCE_REL`], every stored band recomputed.
    pub fn reproduced(&self) -> bool {
        self.spectrum_max_rel <= REPRODUCE_REL
            && self.bands_max_rel <= REPRODUCE_REL
            && self.bands_missing.is_empty()
    }
}

impl std::fmt::Display for TripCheck {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        write!(
            f,
            "trip spectrum (newest block at sample {}, {} averages): {} lines, max relative difference {:e}; {} band values, max relative difference {:e}",
            self.first_sample,
            self.averages,
            self.spectrum.len(),
            self.spectrum_max_rel,
            self.bands.len(),
            self.bands_max_rel
        )?;
        if !self.bands_missing.is_empty() {
            write!(f, "; no value for {}", self.bands_missing.join(", "))?;
        }
        if self.reproduced() {
            write!(f, " — reproduced (bound {REPRODUCE_REL:e})")?;
        } else {
            write!(f, " — NOT reproduced within {REPRODUCE_REL:e}")?;
        }
        if let Some(c) = &self.caveat {
            write!(f, " ({c})")?;
        }
        Ok(())
    }
}

/// What a capture replay did.
pub struct CaptureReplay {
    pub counters: Arc<SourceCounters>,
    pub meta: CaptureMeta,
    /// Stream index of the first sample fed (see [`replay_capture`]).
    pub from_sample: u64,
    /// The recomputed trip values; None when the capture stores no
    /// spectrum, or the replay did not publish the trip's result (with
    /// `problem` saying why).
    pub check: Option<TripCheck>,
    pub problem: Option<String>,
}

/// The `.json` and `.bwf1` of the capture `path` names (either one).
fn capture_paths(path: &Path) -> Result<(PathBuf, String), ReplayError> {
    let not = || ReplayError::NotACapture {
        path: path.display().to_string(),
    };
    let ext = path.extension().and_then(|e| e.to_str()).ok_or_else(not)?;
    if ext != "json" && ext != "bwf1" {
        return Err(not());
    }
    let id = path
        .file_stem()
        .and_then(|s| s.to_str())
        .ok_or_else(not)?
        .to_string();
    let dir = match path.parent() {
        Some(d) if !d.as_os_str().is_empty() => d.to_path_buf(),
        _ => PathBuf::from("."),
    };
    if !dir.join(format!("{id}.json")).is_file() {
        return Err(not());
    }
    Ok((dir, id))
}

/// Whether `path` names an alarm capture (a `.json` or a `.bwf1` with its
/// `.json` beside it).
pub fn is_capture(path: &Path) -> bool {
    capture_paths(path).is_ok()
}

/// The channel to replay a capture with: from the capture's settings, or
/// (for a capture without them) the channel of the same name in `config`.
fn capture_channel(
    meta: &CaptureMeta,
    path: &str,
    config: Option<&Config>,
    source: &str,
) -> Result<(ChannelSpec, Option<f64>), ReplayError> {
    let name = &meta.trip.channel;
    let w = &meta.waveform;
    let spec_of = |s: &CaptureSettings| {
        s.channel_spec(name, source, &w.unit, w.sample_rate_hz)
            .map_err(|e| ReplayError::CaptureSettings {
                path: path.to_string(),
                source: e,
            })
    };
    if let Some(s) = &meta.settings {
        return Ok((spec_of(s)?, s.speed_hz));
    }
    let Some(config) = config else {
        return Err(ReplayError::CaptureIncomplete {
            path: path.to_string(),
            version: meta.version,
            channel: name.clone(),
            missing: "settings (block, nfft, hop, window, detrend, averaging, bands, speed_hz)"
                .to_string(),
        });
    };
    let c = config
        .channels
        .iter()
        .find(|c| &c.name == name)
        .ok_or_else(|| ReplayError::UnknownChannel(name.clone()))?;
    // The config's settings, re-expressed as a capture's (so that they
    // are checked the same way), with the samples already in units.
    let s = CaptureSettings::of(c);
    let spec = spec_of(&s)?;
    // The speed: only a fixed machine speed is known without the capture.
    let speed = c.machine.as_ref().and_then(|m| {
        config
            .machines
            .iter()
            .find(|x| &x.name == m)
            .and_then(|x| match x.speed {
                SpeedSource::Fixed { hz } => Some(hz),
                _ => None,
            })
    });
    if speed.is_none() && s.has_order_bands() {
        return Err(ReplayError::CaptureIncomplete {
            path: path.to_string(),
            version: meta.version,
            channel: name.clone(),
            missing: "settings.speed_hz (the running speed at the trip; the config's machine has no fixed speed)"
                .to_string(),
        });
    }
    Ok((spec, speed))
}

/// A config of one BWF1 source with the capture's one channel and, for
/// its order bands, a machine at the speed used at the trip.
fn capture_config(spec: ChannelSpec, speed_hz: Option<f64>) -> Config {
    let machines = match (&spec.machine, speed_hz) {
        (Some(m), Some(hz)) => vec![MachineSpec {
            name: m.clone(),
            speed: SpeedSource::Fixed { hz },
            bearings: Vec::new(),
        }],
        _ => Vec::new(),
    };
    let source = SourceSpec {
        name: spec.source.clone(),
        sample_rate_hz: spec.sample_rate_hz,
        channels: 1,
        // The capture is one unbroken run: the default rules never fire.
        sequence: Default::default(),
        // Never bound: replay feeds the source's frame checks directly.
        kind: SourceKind::TcpListen {
            listen: std::net::SocketAddr::from(([127, 0, 0, 1], 0)),
            stream: StreamSpec {
                framing: Framing::Bwf1,
                max_frame_bytes: 16 << 20,
            },
            on_second_connection: SecondConnection::Refuse,
            replace_after_silent: std::time::Duration::from_secs(10),
            idle_timeout: std::time::Duration::from_secs(60),
        },
    };
    Config {
        alarms: None,
        listen: std::net::SocketAddr::from(([127, 0, 0, 1], 0)),
        http: crate::config::HttpLimits::default(),
        web: None,
        trend_seconds: crate::pipeline::trend::DEFAULT_TREND_SECONDS,
        exposition: Default::default(),
        history: None,
        workers: 1,
        ring_seconds: 2.0,
        sources: vec![source],
        machines,
        channels: vec![spec],
    }
}

/// Where to start feeding a capture so that one published result is the
/// trip's: the oldest block of the trip's average (for linear and
/// peak-hold as many whole averages before it as the capture holds), and
/// why that cannot be exact, if it cannot.
fn replay_start(
    wave_first: u64,
    spectrum: Option<&SpectrumAtTrip>,
    spec: &ChannelSpec,
) -> (u64, Option<String>) {
    let Some(sp) = spectrum else {
        return (wave_first, None);
    };
    let hop = spec.hop as u64;
    let oldest = sp.oldest_first_sample.unwrap_or_else(|| {
        // Captures before version 2: contiguous blocks since the last result.
        sp.first_sample
            .saturating_sub(u64::from(sp.averages.max(1) - 1) * hop)
    });
    let group = match spec.averaging {
        AveragingMode::Linear | AveragingMode::PeakHold => u64::from(spec.average_count) * hop,
        // Exponential: the running mean must start where the live one did.
        AveragingMode::Exponential => 0,
        AveragingMode::None => hop,
    };
    if oldest >= wave_first {
        // Whole groups before the oldest block (none for exponential).
        let from = (oldest - wave_first)
            .checked_div(group)
            .map_or(oldest, |q| oldest - q * group);
        return (from, None);
    }
    // The capture does not hold the oldest block of the average.
    let from = wave_first + (hop - (wave_first - oldest) % hop) % hop;
    let caveat = if spec.averaging == AveragingMode::Exponential {
        let blocks = (sp.first_sample.saturating_sub(from) / hop.max(1) + 1) as i32;
        let w = (1.0 - 1.0 / f64::from(spec.average_count.max(1))).powi(blocks);
        format!(
            "exponential average from sample {oldest}, the capture starts at {wave_first}: replayed from {from}, {blocks} blocks; the blocks before weigh {w:.3e} in the live average"
        )
    } else {
        format!(
            "the trip's average starts at sample {oldest}, the capture at {wave_first}: it does not hold every sample of it"
        )
    };
    (from, Some(caveat))
}

fn max_rel<'a>(pairs: impl Iterator<Item = (f64, f64)> + 'a) -> f64 {
    pairs
        .map(|(got, want)| {
            if got == want {
                0.0
            } else if want == 0.0 {
                f64::INFINITY
            } else {
                ((got - want) / want).abs()
            }
        })
        .fold(0.0, f64::max)
}

/// Replays an alarm capture (`path`: its `.json`, or its `.bwf1` with the
/// `.json` beside it) through the pipeline with the channel settings
/// stored in it, writes JSON lines to `out` as [`replay`] does, and
/// compares the trip's spectrum and band values with the stored ones.
///
/// Feeding starts at the oldest block of the trip's average, or whole
/// averages before it (linear, peak-hold), so that the replayed averages
/// line up with the live ones; samples before that are not fed.
///
/// `config` supplies the channel settings for a capture written without
/// them (version 1): the channel of the capture's name, and for order
/// bands its machine's fixed speed.
///
/// # Errors
/// [`ReplayError::NotACapture`], [`ReplayError::Capture`] (unreadable
/// metadata), [`ReplayError::CaptureIncomplete`] (settings missing and no
/// config), [`ReplayError::CaptureSettings`], [`ReplayError::NothingAccepted`],
/// [`ReplayError::Read`], [`ReplayError::Write`].
pub fn replay_capture(
    path: &Path,
    config: Option<&Config>,
    out: &mut dyn Write,
) -> Result<CaptureReplay, ReplayError> {
    let (dir, id) = capture_paths(path)?;
    let meta = read_meta(&dir, &id)?;
    let json_path = dir.join(format!("{id}.json")).display().to_string();
    let (spec, speed) = capture_channel(&meta, &json_path, config, "capture")?;
    let wave_path = dir.join(&meta.waveform.file);
    let (from, caveat) = replay_start(meta.waveform.first_sample, meta.spectrum.as_ref(), &spec);
    let cfg = capture_config(spec, speed);
    let source = &cfg.sources[0];
    let mut run = Run::new(&cfg, source, out)?;
    run.watch = meta.spectrum.as_ref().map(|s| (0, s.first_sample));

    let bytes = std::fs::read(&wave_path).map_err(|source| ReplayError::Read {
        path: wave_path.display().to_string(),
        source,
    })?;
    run.state
        .bytes
        .fetch_add(bytes.len() as u64, Ordering::Relaxed);
    let mut decoder = StreamDecoder::new();
    decoder.push(&bytes);
    loop {
        match decoder.next_frame_body() {
            Ok(Some((h, body))) => {
                let n = u64::from(h.samples_per_channel);
                let end = h.first_sample + n;
                if end <= from {
                    continue;
                }
                if h.first_sample >= from {
                    run.sink.bwf1(&h, body);
                } else {
                    // The frame holding the start: from `from` on.
                    let skip = from - h.first_sample;
                    let width = h.format.width() * usize::from(h.channels);
                    let ts = if h.timestamp_ns == 0 {
                        0
                    } else {
                        h.timestamp_ns + (skip as f64 * 1e9 / h.sample_rate_hz) as u64
                    };
                    let cut = Header::new(
                        h.format,
                        h.channels,
                        (n - skip) as u32,
                        from,
                        ts,
                        h.sample_rate_hz,
                    );
                    run.sink.bwf1(&cut, &body[skip as usize * width..]);
                }
            }
            Ok(None) => break,
            Err(e) => run.sink.frame_error(&e),
        }
        run.drain()?;
    }
    if let Err(e) = decoder.finish() {
        run.sink.frame_error(&e);
    }
    run.state
        .bytes_skipped
        .fetch_add(decoder.stats().bytes_skipped, Ordering::Relaxed);
    run.end_of_input()?;
    let (counters, kept) = run.finish(1)?;
    let mut problem = None;
    let check = match (&meta.spectrum, kept) {
        (None, _) => None,
        (Some(sp), None) => {
            problem = Some(format!(
                "the replay published no result whose newest block starts at sample {}{}",
                sp.first_sample,
                caveat
                    .as_deref()
                    .map(|c| format!(" ({c})"))
                    .unwrap_or_default()
            ));
            None
        }
        (Some(sp), Some(k)) => {
            let spectrum_max_rel = if k.power.len() == sp.values.len() {
                max_rel(
                    k.power
                        .iter()
                        .zip(&sp.values)
                        .map(|(a, b)| (f64::from(*a), f64::from(*b))),
                )
            } else {
                f64::INFINITY
            };
            let mut bands_missing = Vec::new();
            let mut pairs = Vec::new();
            for b in &meta.bands {
                match k.bands.iter().find(|(n, _)| n == &b.band) {
                    Some((_, Some(v))) => pairs.push((*v, b.value)),
                    _ => bands_missing.push(b.band.clone()),
                }
            }
            Some(TripCheck {
                first_sample: sp.first_sample,
                averages: k.averages,
                spectrum: k.power,
                envelope_spectrum: k.envelope_power,
                bands: k.bands,
                spectrum_max_rel,
                bands_max_rel: max_rel(pairs.into_iter()),
                bands_missing,
                caveat,
            })
        }
    };
    Ok(CaptureReplay {
        counters,
        meta,
        from_sample: from,
        check,
        problem,
    })
}

/// Writes the newest result of `dsp` if it is new; returns it when its
/// newest block starts at `watch`.
fn emit(
    dsp: &ChannelDsp,
    seq: &mut u64,
    out: &mut dyn Write,
    watch: Option<u64>,
) -> Result<Option<Kept>, ReplayError> {
    let shared = dsp.shared();
    let Some(snap) = shared.latest() else {
        return Ok(None);
    };
    if snap.seq == *seq {
        return Ok(None);
    }
    *seq = snap.seq;
    let line = ReplayLine {
        channel: shared.spec.name.clone(),
        seq: snap.seq,
        first_sample: snap.first_sample,
        oldest_first_sample: snap.oldest_first_sample,
        averages: snap.averages,
        bands: shared
            .spec
            .bands
            .iter()
            .zip(&snap.bands)
            .map(|(b, v)| (b.name.clone(), v.is_ok().then_some(v.value)))
            .collect(),
        speed_hz: snap.speed_hz,
        rms: snap.overall.rms,
        peak: snap.overall.peak,
        crest_factor: snap.overall.crest_factor,
    };
    let text = serde_json::to_string(&line).map_err(|e| ReplayError::Write(e.into()))?;
    writeln!(out, "{text}").map_err(ReplayError::Write)?;
    Ok((watch == Some(snap.first_sample)).then(|| Kept {
        averages: snap.averages,
        power: snap.power.clone(),
        envelope_power: snap.envelope_power.clone(),
        bands: line.bands,
    }))
}
