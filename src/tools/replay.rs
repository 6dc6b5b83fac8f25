//! `bandwatch replay`: runs a recorded stream through the same pipeline as
//! the daemon — the same framing, checks, scaling, rings and DSP — as fast as
//! the CPU allows, and writes one JSON line per published spectrum. Given
//! the same bytes, live processing and replay compute the same numbers.

use std::io::{Read, Write};
use std::path::Path;
use std::sync::Arc;

use crate::config::{Config, SourceKind, StreamSpec};
use crate::counters::SourceCounters;
use crate::pipeline::worker::ChannelDsp;
use crate::pipeline::{AlarmMode, Builder, RingSize, RunError};
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

/// Replays `file` into source `source` (default: the first non-sim one) and
/// writes JSON lines to `out`. Returns the source's counters.
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
    // Replay drains the rings after every read, so they never overflow:
    // sized for the largest read plus two blocks.
    let ring = RingSize::Headroom(1 << 17);
    let mut pipeline = Builder::new(config)
        .only_source(&spec.name)
        .ring(ring)
        .alarms(AlarmMode::Off)
        .gather(false)
        .blocks_per_turn(1)
        .assemble()?
        .inline();
    if pipeline.channels.is_empty() {
        return Err(ReplayError::NoChannels(spec.name.clone()));
    }
    let outputs = pipeline.source_outputs(&spec.name)?;
    let state = pipeline
        .state
        .source(&spec.name)
        .ok_or_else(|| ReplayError::UnknownSource(spec.name.clone()))?
        .clone();
    let mut sink =
        FrameSink::new(outputs, state.clone(), spec.sample_rate_hz).with_sequence(&spec.sequence);
    let mut framing = StreamFraming::new(&stream, spec.channels).map_err(ReplayError::Decoder)?;
    let read_err = |source| ReplayError::Read {
        path: file.display().to_string(),
        source,
    };
    let mut f = std::fs::File::open(file).map_err(read_err)?;
    sink.restart();
    let mut seqs = vec![0u64; pipeline.channels.len()];
    let mut buf = vec![0u8; 65_536];
    loop {
        let n = f.read(&mut buf).map_err(read_err)?;
        if n == 0 {
            framing.reset(&mut sink);
            break;
        }
        state
            .bytes
            .fetch_add(n as u64, std::sync::atomic::Ordering::Relaxed);
        framing.feed(&buf[..n], &mut sink);
        poll_all(&mut pipeline.channels, &mut seqs, out)?;
    }
    // End of input: no more speed measurements will come, so a channel
    // waiting for its machine's speed goes on (README "Orders").
    for m in &pipeline.state.machines {
        m.close();
    }
    poll_all(&mut pipeline.channels, &mut seqs, out)?;
    out.flush().map_err(ReplayError::Write)?;
    Ok(state)
}

/// Polls every channel until none has work left, writing each published
/// result. A channel waiting for its machine's speed (measured by another
/// channel) goes on once that channel has been polled.
fn poll_all(
    channels: &mut [ChannelDsp],
    seqs: &mut [u64],
    out: &mut dyn Write,
) -> Result<(), ReplayError> {
    loop {
        let mut worked = false;
        for (dsp, seq) in channels.iter_mut().zip(seqs.iter_mut()) {
            while dsp.poll() {
                worked = true;
                emit(dsp, seq, out)?;
            }
        }
        if !worked {
            return Ok(());
        }
    }
}

fn emit(dsp: &ChannelDsp, seq: &mut u64, out: &mut dyn Write) -> Result<(), ReplayError> {
    let shared = dsp.shared();
    let Some(snap) = shared.latest() else {
        return Ok(());
    };
    if snap.seq == *seq {
        return Ok(());
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
    writeln!(out, "{text}").map_err(ReplayError::Write)
}
