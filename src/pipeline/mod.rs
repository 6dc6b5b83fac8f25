//! The pipeline: the one place that builds rings, DSP workers and alarm
//! engines from a validated config, starts them, and stops them.
//!
//! Everything downstream of the sources is assembled here, so the daemon,
//! `replay`, `selftest` and the bench rigs all run the same pipeline.

pub mod state;
pub mod worker;

use std::sync::Arc;

use tokio::sync::watch;

use crate::alarm;
use crate::config::{self, Config};
use crate::ring::channel_ring;
use crate::source::{self, ChannelInput, SourceOutputs};
use state::AppState;
use worker::{ChannelDsp, Workers};

#[derive(Debug, thiserror::Error)]
pub enum RunError {
    #[error("cannot start DSP worker threads: {0}")]
    Workers(#[source] std::io::Error),
    #[error("alarm storage: {0}")]
    Alarms(String),
    #[error("HTTP server failed: {0}")]
    Http(#[source] std::io::Error),
}

/// The running pipeline without its HTTP server: sources, rings, workers.
pub struct Pipeline {
    pub state: Arc<AppState>,
    workers: Option<Workers>,
    alarm_io: Option<alarm::io::AlarmIo>,
    sources: Vec<tokio::task::JoinHandle<()>>,
    stop_tx: watch::Sender<bool>,
}

impl Pipeline {
    /// Builds rings for every channel, starts the DSP workers and the source
    /// tasks. Must be called inside a tokio runtime.
    pub fn start(config: &Config) -> Result<Pipeline, RunError> {
        let mut app = AppState::new(config);
        let alarms = match &config.alarms {
            None => None,
            Some(a) => Some(start_alarm_io(a)?),
        };
        if let Some(a) = &config.alarms {
            if let Some(src) = &a.token {
                match alarm::token::Token::load(src) {
                    Ok(t) => app.token = Some(t),
                    Err(e) => {
                        tracing::warn!(error = %e, "no operator token: acknowledge and re-learn will be refused")
                    }
                }
            } else {
                tracing::warn!("no token_file or token_env in [alarms]: acknowledge and re-learn will be refused");
            }
        }
        if let Some((io, ..)) = &alarms {
            app.alarm_io = Some(io.shared().clone());
        }
        let state = Arc::new(app);
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
            let mut dsp = ChannelDsp::with_machines(ch.clone(), r, &state.machines);
            dsp.set_gather(true);
            let inbox = ch.alarm_inbox.lock().ok().and_then(|mut g| g.take());
            if let Some(inbox) = inbox {
                let name = spec.name.clone();
                let (outbox, memories, captures, baselines_dir) = match (&alarms, &config.alarms) {
                    (Some((_, outbox, memories)), Some(a)) => (
                        Some(outbox.clone()),
                        Some(memories),
                        Some(alarm::engine::CaptureSetup {
                            pre_s: a.capture_pre_s,
                            post_s: a.capture_post_s,
                        }),
                        Some(a.baselines_dir()),
                    ),
                    _ => (None, None, None, None),
                };
                let memory = |band: &str| {
                    memories.and_then(|m| m.get(&(name.clone(), band.to_string())).copied())
                };
                let baseline = |band: &str| {
                    let dir = baselines_dir.as_ref()?;
                    match alarm::baseline::load(dir, &name, band) {
                        Ok(b) => b,
                        Err(e) => {
                            tracing::warn!(channel = %name, band, error = %e, "stored baseline unreadable; learning again");
                            None
                        }
                    }
                };
                dsp.set_alarms(alarm::engine::ChannelAlarms::new(
                    spec, &memory, &baseline, outbox, captures, inbox,
                ));
            }
            dsps.push(dsp);
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
        let sources = source::spawn_all(
            config,
            outputs,
            &state.sources,
            crate::shutdown::Shutdown::new(stop_rx),
        );
        Ok(Pipeline {
            state,
            workers: Some(workers),
            alarm_io: alarms.map(|(io, ..)| io),
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
        // Workers have handed over their last events and captures.
        if let Some(io) = self.alarm_io.take() {
            let _ = tokio::task::spawn_blocking(move || io.stop()).await;
        }
    }
}

type AlarmMemories = std::collections::BTreeMap<(String, String), alarm::state::AlarmMemory>;

/// Opens the journal (replaying it), the capture store, and starts the
/// alarm I/O thread.
fn start_alarm_io(
    a: &config::alarms::AlarmsSpec,
) -> Result<(alarm::io::AlarmIo, alarm::io::Outbox, AlarmMemories), RunError> {
    let (journal, replay) = alarm::journal::Journal::open(&a.journal_dir(), a.journal)
        .map_err(|e| RunError::Alarms(e.to_string()))?;
    if replay.bad_lines > 0 || replay.torn_tail || replay.unreadable_files > 0 {
        tracing::warn!(
            bad_lines = replay.bad_lines,
            torn_tail = replay.torn_tail,
            unreadable_files = replay.unreadable_files,
            "journal had damaged lines (skipped)"
        );
    }
    tracing::info!(events = replay.events.len(), files = replay.files, dir = %a.journal_dir().display(), "journal replayed");
    let (store, cleanup) = alarm::capture::CaptureStore::open(&a.captures_dir(), a.retention)
        .map_err(|e| RunError::Alarms(e.to_string()))?;
    if cleanup.temp_files > 0 || cleanup.orphans > 0 {
        tracing::warn!(
            temp_files = cleanup.temp_files,
            orphans = cleanup.orphans,
            "removed unfinished capture files left by a crash"
        );
    }
    let memories = alarm::journal::alarm_memories(&replay.events);
    let (io, outbox) =
        alarm::io::AlarmIo::start(journal, store, a.baselines_dir(), &replay.events, 4096)
            .map_err(|e| RunError::Alarms(e.to_string()))?;
    Ok((io, outbox, memories))
}
