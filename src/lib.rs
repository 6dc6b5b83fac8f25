//! bandwatch: a streaming daemon for live DAQ channels.
//!
//! Data flows one way:
//!
//! ```text
//! source (tokio task) -> ring (SPSC per channel) -> dsp worker (OS thread)
//!     -> snapshot (atomic swap) -> http (axum: JSON API, /metrics)
//! ```
//!
//! Module map:
//! - [`config`]: the TOML file, validation with field paths
//! - [`units`]: engineering units, SI conversion, integration factors
//! - [`frame`]: wire framings (BWF1, lines, raw): bytes to samples, pure code
//! - [`source`]: sample producers (the built-in `sim`), scaling to units
//! - [`ring`]: per-channel SPSC ring with discontinuity marks
//! - [`counters`]: per-channel counters shared by the stages
//! - [`dsp`]: windows, spectra, averaging, bands, overall levels, workers
//! - [`snapshot`]: what workers publish and HTTP reads
//! - [`http`]: router, JSON API, Prometheus exposition
//! - [`bench`]: `bandwatch bench`, side-by-side stage throughput, memory, latency

pub mod bench;
pub mod config;
pub mod counters;
pub mod dsp;
pub mod frame;
pub mod http;
pub mod ring;
pub mod snapshot;
pub mod source;
pub mod tools;
pub mod units;

use std::future::Future;
use std::sync::Arc;

use tokio::net::TcpListener;
use tokio::sync::watch;

use crate::config::Config;
use crate::dsp::worker::{ChannelDsp, Workers};
use crate::ring::channel_ring;
use crate::snapshot::AppState;
use crate::source::{ChannelInput, SourceOutputs};

#[derive(Debug, thiserror::Error)]
pub enum RunError {
    #[error("cannot start DSP worker threads: {0}")]
    Workers(#[source] std::io::Error),
    #[error("HTTP server failed: {0}")]
    Http(#[source] std::io::Error),
}

/// The running pipeline without its HTTP server: sources, rings, workers.
pub struct Pipeline {
    pub state: Arc<AppState>,
    workers: Option<Workers>,
    sources: Vec<tokio::task::JoinHandle<()>>,
    stop_tx: watch::Sender<bool>,
}

impl Pipeline {
    /// Builds rings for every channel, starts the DSP workers and the source
    /// tasks. Must be called inside a tokio runtime.
    pub fn start(config: &Config) -> Result<Pipeline, RunError> {
        let state = Arc::new(AppState::new(config));
        let mut outputs: Vec<SourceOutputs> = config
            .sources
            .iter()
            .map(|s| SourceOutputs::new(s.channels))
            .collect();
        let mut dsps = Vec::new();
        let mut writers = Vec::new();
        for ch in &state.channels {
            let spec = &ch.spec;
            let capacity = (config.ring_seconds * spec.sample_rate_hz).ceil() as usize;
            let capacity = capacity.max(2 * spec.block);
            let (w, r) = channel_ring(capacity, spec.sample_rate_hz, ch.counters.clone());
            dsps.push(ChannelDsp::new(ch.clone(), r));
            writers.push(w);
        }
        let (workers, wakers) = Workers::start(config.workers, dsps).map_err(RunError::Workers)?;
        for ((ch, writer), waker) in state.channels.iter().zip(writers).zip(wakers) {
            let spec = &ch.spec;
            if let Some(i) = config.sources.iter().position(|s| s.name == spec.source) {
                outputs[i].attach(
                    spec.index,
                    ChannelInput {
                        writer,
                        scale: spec.scale,
                        offset: spec.offset,
                        waker,
                    },
                );
            }
        }
        let (stop_tx, stop_rx) = watch::channel(false);
        let sources = source::spawn_all(config, outputs, &state.sources, stop_rx);
        Ok(Pipeline {
            state,
            workers: Some(workers),
            sources,
            stop_tx,
        })
    }

    /// Stops the sources, then the workers.
    pub async fn stop(mut self) {
        let _ = self.stop_tx.send(true);
        for t in self.sources.drain(..) {
            let _ = t.await;
        }
        if let Some(w) = self.workers.take() {
            let _ = tokio::task::spawn_blocking(move || w.stop()).await;
        }
    }
}

/// Runs the daemon on an already bound listener until `shutdown` resolves,
/// then drains HTTP, stops sources and workers.
pub async fn serve<F>(config: Config, listener: TcpListener, shutdown: F) -> Result<(), RunError>
where
    F: Future<Output = ()> + Send + 'static,
{
    let pipeline = Pipeline::start(&config)?;
    let app = http::router(pipeline.state.clone());
    let result = axum::serve(listener, app)
        .with_graceful_shutdown(shutdown)
        .await
        .map_err(RunError::Http);
    pipeline.stop().await;
    result
}
