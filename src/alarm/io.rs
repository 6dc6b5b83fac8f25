//! The alarm I/O thread: the only place that writes the journal, the
//! captures and the baselines.
//!
//! DSP workers (and HTTP handlers, after an ack) hand it [`Message`]s
//! through an [`Outbox`], which never blocks: the queue is bounded and a
//! message that does not fit is dropped, counted per kind and logged (it
//! would take a storm of thousands of alarm events to fill it). The thread
//! works through the queue in order, so a transition is journaled before
//! the capture it started is written. [`AlarmIo::stop`] queues a stop mark
//! behind everything sent so far and waits until all of it is written;
//! what is sent after that is refused and counted.
//!
//! It is a plain `std::thread` because `fsync` blocks: it must run neither
//! on a DSP thread nor on the tokio runtime's workers.

use std::collections::VecDeque;
use std::path::PathBuf;
use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::mpsc::{self, Receiver, SyncSender, TrySendError};
use std::sync::{Arc, Mutex};
use std::thread::{self, JoinHandle};

use super::baseline::{self, Baseline};
use super::capture::{Capture, CaptureStore};
use super::journal::{Event, Journal};

/// Default queue capacity, messages.
pub const QUEUE: usize = 1024;

/// Events kept in memory for the API (newest last).
pub const RECENT_EVENTS: usize = 1000;

/// Work for the I/O thread.
#[derive(Debug)]
pub enum Message {
    /// Append to the journal.
    Event(Box<Event>),
    /// Write a finished capture.
    Capture(Box<Capture>),
    /// Save a learned baseline.
    Baseline(Box<Baseline>),
    /// Remove a baseline (an operator asked to re-learn).
    ForgetBaseline { channel: String, band: String },
}

impl Message {
    fn kind(&self) -> usize {
        match self {
            Message::Event(_) => 0,
            Message::Capture(_) => 1,
            Message::Baseline(_) | Message::ForgetBaseline { .. } => 2,
        }
    }
}

/// Counters and recent events, shared with the API and metrics.
#[derive(Debug, Default)]
pub struct IoShared {
    pub events_written: AtomicU64,
    pub captures_written: AtomicU64,
    /// Old captures removed by retention.
    pub captures_pruned: AtomicU64,
    pub baselines_written: AtomicU64,
    /// Writes that failed (logged with the path and error).
    pub write_errors: AtomicU64,
    /// Messages dropped because the queue was full: events, captures,
    /// baselines.
    dropped: [AtomicU64; 3],
    /// The newest journaled events, for `/api/v1/events`.
    recent: Mutex<VecDeque<Event>>,
}

impl IoShared {
    pub fn dropped_events(&self) -> u64 {
        self.dropped[0].load(Ordering::Relaxed)
    }
    pub fn dropped_captures(&self) -> u64 {
        self.dropped[1].load(Ordering::Relaxed)
    }
    pub fn dropped_baselines(&self) -> u64 {
        self.dropped[2].load(Ordering::Relaxed)
    }

    /// The newest events, oldest first.
    pub fn recent_events(&self) -> Vec<Event> {
        self.recent
            .lock()
            .map(|r| r.iter().cloned().collect())
            .unwrap_or_default()
    }

    fn remember(&self, e: Event) {
        if let Ok(mut r) = self.recent.lock() {
            if r.len() == RECENT_EVENTS {
                r.pop_front();
            }
            r.push_back(e);
        }
    }
}

/// What travels on the queue: work, or the stop mark.
#[derive(Debug)]
enum Envelope {
    Work(Message),
    Stop,
}

/// The sending side; cheap to clone, one per worker and one for HTTP.
#[derive(Debug, Clone)]
pub struct Outbox {
    tx: SyncSender<Envelope>,
    shared: Arc<IoShared>,
}

impl Outbox {
    /// Queues a message without blocking. Returns false (and counts it) if
    /// the queue is full or the I/O thread has stopped.
    pub fn send(&self, m: Message) -> bool {
        let kind = m.kind();
        match self.tx.try_send(Envelope::Work(m)) {
            Ok(()) => true,
            Err(TrySendError::Full(_)) | Err(TrySendError::Disconnected(_)) => {
                let n = self.shared.dropped[kind].fetch_add(1, Ordering::Relaxed) + 1;
                // Log the first and then every 100th, so a storm is visible
                // without flooding the log.
                if n == 1 || n.is_multiple_of(100) {
                    tracing::error!(kind, dropped = n, "alarm I/O queue full: record dropped");
                }
                false
            }
        }
    }

    pub fn shared(&self) -> &Arc<IoShared> {
        &self.shared
    }
}

/// The running I/O thread.
#[derive(Debug)]
pub struct AlarmIo {
    handle: JoinHandle<()>,
    shared: Arc<IoShared>,
    tx: SyncSender<Envelope>,
}

impl AlarmIo {
    /// Starts the thread with an open journal and capture store.
    /// `recent` seeds the in-memory event list (e.g. the replayed events).
    ///
    /// # Errors
    /// The thread cannot be spawned.
    pub fn start(
        journal: Journal,
        store: CaptureStore,
        baselines_dir: PathBuf,
        recent: &[Event],
        capacity: usize,
    ) -> std::io::Result<(AlarmIo, Outbox)> {
        let (tx, rx) = mpsc::sync_channel(capacity.max(1));
        let shared = Arc::new(IoShared::default());
        for e in recent.iter().rev().take(RECENT_EVENTS).rev() {
            shared.remember(e.clone());
        }
        let s = shared.clone();
        let handle = thread::Builder::new()
            .name("bandwatch-alarm-io".to_string())
            .spawn(move || io_loop(rx, journal, store, baselines_dir, &s))?;
        Ok((
            AlarmIo {
                handle,
                shared: shared.clone(),
                tx: tx.clone(),
            },
            Outbox { tx, shared },
        ))
    }

    pub fn shared(&self) -> &Arc<IoShared> {
        &self.shared
    }

    /// Waits until every message queued before this call is written, then
    /// ends the thread. Outboxes may still exist: later sends are refused
    /// and counted. Blocks while the queue is full (shutdown path only).
    pub fn stop(self) {
        let _ = self.tx.send(Envelope::Stop);
        let _ = self.handle.join();
    }
}

fn io_loop(
    rx: Receiver<Envelope>,
    mut journal: Journal,
    store: CaptureStore,
    baselines_dir: PathBuf,
    shared: &IoShared,
) {
    while let Ok(Envelope::Work(m)) = rx.recv() {
        match m {
            Message::Event(e) => match journal.append(*e) {
                Ok(written) => {
                    shared.events_written.fetch_add(1, Ordering::Relaxed);
                    shared.remember(written);
                }
                Err(error) => {
                    shared.write_errors.fetch_add(1, Ordering::Relaxed);
                    tracing::error!(%error, "alarm event not journaled");
                }
            },
            Message::Capture(c) => match store.write(&c) {
                Ok((meta, pruned)) => {
                    shared.captures_written.fetch_add(1, Ordering::Relaxed);
                    shared
                        .captures_pruned
                        .fetch_add(pruned as u64, Ordering::Relaxed);
                    tracing::info!(
                        id = %meta.id,
                        samples = meta.waveform.samples,
                        end = %meta.end_reason,
                        "capture written"
                    );
                }
                Err(error) => {
                    shared.write_errors.fetch_add(1, Ordering::Relaxed);
                    tracing::error!(id = %c.id, %error, "capture not written");
                }
            },
            Message::Baseline(b) => match baseline::save(&baselines_dir, &b) {
                Ok(()) => {
                    shared.baselines_written.fetch_add(1, Ordering::Relaxed);
                }
                Err(error) => {
                    shared.write_errors.fetch_add(1, Ordering::Relaxed);
                    tracing::error!(%error, "baseline not saved");
                }
            },
            Message::ForgetBaseline { channel, band } => {
                if let Err(error) = baseline::remove(&baselines_dir, &channel, &band) {
                    shared.write_errors.fetch_add(1, Ordering::Relaxed);
                    tracing::error!(%error, "baseline not removed");
                }
            }
        }
    }
}
