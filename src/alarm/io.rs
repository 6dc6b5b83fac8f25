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
//!
//! **Failed writes** (README "Storage failures"): a write that fails with
//! an error that can pass (too many open files, disk full, I/O error, the
//! directory removed, …: [`transient`]) is retried after a backoff that
//! doubles from [`RETRY_FIRST`] up to [`RETRY_MAX`], at most [`RETRIES`]
//! times; before each retry the journal is reopened and a capture's
//! directory made again. Every failed attempt, every retry and every record
//! finally given up is counted per kind ([`IoShared::write_failures`] …).
//! A capture given up (or dropped from a full queue) is recorded as lost,
//! with the reason, in memory at once and in the journal (an event of kind
//! `capture`, cause `lost`) as soon as the journal takes it.
//!
//! **What became of a capture** ([`CaptureFate`]): an event names the
//! capture its trip started before the capture is written (the post-trigger
//! window is still being collected). [`IoShared::capture_fate`] says, for
//! such an id: stored, pending (being collected or queued), lost (with the
//! reason) or pruned (retention removed it; journaled as cause `pruned`).
//! At start, [`AlarmIo::start`] accounts for every journaled capture id
//! that is not on disk and has no record yet: the daemon stopped before it
//! was written ([`reconcile_captures`]).

use std::collections::{BTreeMap, BTreeSet, VecDeque};
use std::io;
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::mpsc::{self, Receiver, SyncSender, TrySendError};
use std::sync::{Arc, Mutex};
use std::thread::{self, JoinHandle};
use std::time::Duration;

use super::baseline::{self, Baseline, BaselineError};
use super::capture::{self as capture_files, Capture, CaptureError, CaptureStore, OpenReport};
use super::journal::{Event, EventKind, Journal, JournalError};
use crate::clock::unix_now_ns;

/// Retries of a failed write before the record is given up.
pub const RETRIES: u32 = 6;
/// Wait before the first retry; doubled before each next one.
pub const RETRY_FIRST: Duration = Duration::from_millis(50);
/// Longest wait between two attempts (so at most about 2.6 s in all).
pub const RETRY_MAX: Duration = Duration::from_secs(1);

/// Most capture ids [`IoShared`] remembers per state (pending, lost,
/// pruned); the oldest (ids sort by time) are forgotten first.
pub const LEDGER_MAX: usize = 4096;

/// Record kinds, indexed as [`Message`]'s (`events`, `captures`,
/// `baselines`).
pub const KINDS: [&str; 3] = ["events", "captures", "baselines"];

/// Whether a failed write may succeed if tried again: the resource
/// shortages and faults that pass (EMFILE, ENFILE, ENOSPC, EDQUOT, EIO,
/// ENOMEM, EBUSY, EAGAIN, EINTR) and a file or directory that has gone
/// (ENOENT: made again before the retry). A permission, a read-only file
/// system or a bad name will not pass by waiting: not retried.
pub fn transient(e: &io::Error) -> bool {
    use io::ErrorKind as K;
    if matches!(
        e.kind(),
        K::NotFound
            | K::StorageFull
            | K::QuotaExceeded
            | K::OutOfMemory
            | K::ResourceBusy
            | K::Interrupted
            | K::WouldBlock
            | K::TimedOut
    ) {
        return true;
    }
    // No stable ErrorKind for these (Linux numbers, common to the other
    // Unixes we run on): EIO 5, ENFILE 23, EMFILE 24.
    matches!(e.raw_os_error(), Some(5 | 23 | 24))
}

fn journal_io(e: &JournalError) -> Option<&io::Error> {
    match e {
        JournalError::Io { source, .. } => Some(source),
        JournalError::Encode(_) => None,
    }
}

fn capture_io(e: &CaptureError) -> Option<&io::Error> {
    match e {
        CaptureError::Io { source, .. } => Some(source),
        _ => None,
    }
}

fn baseline_io(e: &BaselineError) -> Option<&io::Error> {
    match e {
        BaselineError::Io { source, .. } => Some(source),
        BaselineError::Invalid { .. } => None,
    }
}

/// What became of the capture an event names.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum CaptureFate {
    /// Its files are in the capture directory.
    Stored,
    /// Being collected (post-trigger window) or waiting to be written.
    Pending,
    /// Never written; why.
    Lost(String),
    /// Written, then removed by retention.
    Pruned,
}

impl CaptureFate {
    /// "stored", "pending", "lost" or "pruned".
    pub fn as_str(&self) -> &'static str {
        match self {
            CaptureFate::Stored => "stored",
            CaptureFate::Pending => "pending",
            CaptureFate::Lost(_) => "lost",
            CaptureFate::Pruned => "pruned",
        }
    }

    /// Why a lost capture was lost.
    pub fn reason(&self) -> Option<&str> {
        match self {
            CaptureFate::Lost(r) => Some(r),
            _ => None,
        }
    }
}

/// Capture ids by what became of them (see [`CaptureFate`]).
#[derive(Debug, Clone, Default)]
pub struct Ledger {
    pending: BTreeSet<String>,
    lost: BTreeMap<String, String>,
    pruned: BTreeSet<String>,
}

impl Ledger {
    fn set_pending(&mut self, id: &str) {
        self.pending.insert(id.to_string());
        while self.pending.len() > LEDGER_MAX {
            self.pending.pop_first();
        }
    }
    fn set_lost(&mut self, id: &str, reason: &str) {
        self.pending.remove(id);
        self.lost.insert(id.to_string(), reason.to_string());
        while self.lost.len() > LEDGER_MAX {
            self.lost.pop_first();
        }
    }
    fn set_pruned(&mut self, id: &str) {
        self.pending.remove(id);
        self.pruned.insert(id.to_string());
        while self.pruned.len() > LEDGER_MAX {
            self.pruned.pop_first();
        }
    }
    fn written(&mut self, id: &str) {
        self.pending.remove(id);
    }
    /// Capture ids recorded as lost, with the reasons.
    pub fn lost(&self) -> &BTreeMap<String, String> {
        &self.lost
    }
    /// Whether a record (lost or pruned) exists for `id`.
    fn accounted(&self, id: &str) -> bool {
        self.lost.contains_key(id) || self.pruned.contains(id)
    }
}

/// Why a capture that a previous run's event names is not on disk, when
/// nothing recorded its fate.
fn stopped_reason(unfinished: bool, records_kept: bool) -> String {
    if unfinished {
        "the daemon stopped while the capture was being written; \
         its unfinished files were removed at start"
            .to_string()
    } else if records_kept {
        "the daemon stopped before the capture was written (killed or crashed \
         during its post-trigger window, or before the alarm I/O thread wrote it)"
            .to_string()
    } else {
        // A journal without any capture record may come from a version
        // that did not journal retention's removals.
        "the daemon stopped before the capture was written (killed or crashed \
         during its post-trigger window, or before the alarm I/O thread wrote it), \
         or retention removed it before removals were journaled"
            .to_string()
    }
}

/// Start-up accounting: the capture records already in `events` (kind
/// `capture`), the captures `report` says opening the store removed, and
/// every capture id an event names that is neither on disk in `dir` nor
/// recorded: lost, because the daemon stopped first. Returns the ledger and
/// the new `capture` events to journal (in order).
pub fn reconcile_captures(
    dir: &Path,
    events: &[Event],
    report: &OpenReport,
) -> (Ledger, Vec<Event>) {
    let mut ledger = Ledger::default();
    let mut new = Vec::new();
    let records_kept = events.iter().any(|e| e.kind == EventKind::Capture);
    for e in events.iter().filter(|e| e.kind == EventKind::Capture) {
        let Some(id) = &e.capture else { continue };
        match e.cause.as_deref() {
            Some("lost") => ledger.set_lost(id, e.detail.as_deref().unwrap_or("lost")),
            Some("pruned") => ledger.set_pruned(id),
            _ => {}
        }
    }
    let now = unix_now_ns();
    for c in &report.pruned {
        if !ledger.accounted(&c.id) {
            ledger.set_pruned(&c.id);
            new.push(Event::capture_record(
                &c.channel, &c.band, &c.id, "pruned", None, now,
            ));
        }
    }
    for e in events.iter().filter(|e| e.kind != EventKind::Capture) {
        let Some(id) = &e.capture else { continue };
        if ledger.accounted(id) || capture_files::exists(dir, id) {
            continue;
        }
        let reason = stopped_reason(report.unfinished.contains(id), records_kept);
        ledger.set_lost(id, &reason);
        new.push(Event::capture_record(
            &e.channel,
            e.band.as_deref().unwrap_or(""),
            id,
            "lost",
            Some(reason),
            now,
        ));
    }
    (ledger, new)
}

/// Smallest queue capacity, messages.
pub const QUEUE: usize = 4096;

/// Queue slots per channel: room for a start-up burst in which every
/// channel's alarms and health report at once (a plant-scale run at 4096
/// channels lost 8 188 events at start with a fixed 4096; see
/// docs/performance.md, "Plant-scale run"). A record is a boxed event or a
/// capture the workers have already allocated, so a slot costs a pointer.
pub const QUEUE_PER_CHANNEL: usize = 8;

/// The queue capacity for a daemon of `channels` channels.
pub fn queue_capacity(channels: usize) -> usize {
    channels.saturating_mul(QUEUE_PER_CHANNEL).max(QUEUE)
}

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
    /// Records whose write failed for good, after any retries (logged with
    /// the path and error); the sum of [`IoShared::records_lost`].
    pub write_errors: AtomicU64,
    /// Messages dropped because the queue was full: events, captures,
    /// baselines.
    dropped: [AtomicU64; 3],
    /// Failed write attempts, by kind (as [`KINDS`]), retried or not.
    write_failures: [AtomicU64; 3],
    /// Retries after a failed attempt, by kind.
    write_retries: [AtomicU64; 3],
    /// Records given up after the retries (or at once for an error that
    /// does not pass), by kind.
    lost: [AtomicU64; 3],
    /// The newest journaled events, for `/api/v1/events`.
    recent: Mutex<VecDeque<Event>>,
    /// What became of the captures events name.
    ledger: Mutex<Ledger>,
    /// `capture` records not yet in the journal (it failed, or the capture
    /// was dropped before reaching the I/O thread); retried with the next
    /// message.
    unjournaled: Mutex<Vec<Event>>,
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

    /// Failed write attempts of kind `k` (index into [`KINDS`]).
    pub fn write_failures(&self, k: usize) -> u64 {
        self.write_failures[k].load(Ordering::Relaxed)
    }
    /// Retries of kind `k`.
    pub fn write_retries(&self, k: usize) -> u64 {
        self.write_retries[k].load(Ordering::Relaxed)
    }
    /// Records of kind `k` given up.
    pub fn records_lost(&self, k: usize) -> u64 {
        self.lost[k].load(Ordering::Relaxed)
    }

    /// What became of capture `id`, whose files are looked for in `dir`.
    pub fn capture_fate(&self, dir: &Path, id: &str) -> CaptureFate {
        if capture_files::exists(dir, id) {
            return CaptureFate::Stored;
        }
        let Ok(l) = self.ledger.lock() else {
            return CaptureFate::Lost("capture records unavailable".to_string());
        };
        if let Some(r) = l.lost.get(id) {
            CaptureFate::Lost(r.clone())
        } else if l.pending.contains(id) {
            CaptureFate::Pending
        } else if l.pruned.contains(id) {
            CaptureFate::Pruned
        } else {
            CaptureFate::Lost(
                "not on disk, and no record of it being lost or pruned: \
                 removed outside bandwatch"
                    .to_string(),
            )
        }
    }

    /// Capture ids recorded as lost, with the reasons.
    pub fn lost_captures(&self) -> BTreeMap<String, String> {
        self.ledger
            .lock()
            .map(|l| l.lost().clone())
            .unwrap_or_default()
    }

    fn ledger(&self, f: impl FnOnce(&mut Ledger)) {
        if let Ok(mut l) = self.ledger.lock() {
            f(&mut l);
        }
    }

    /// Records capture `cap` as lost for `reason`: at once in memory, and
    /// queued for the journal.
    fn capture_lost(&self, cap: &Capture, reason: &str) {
        self.ledger(|l| l.set_lost(&cap.id, reason));
        self.lost[1].fetch_add(1, Ordering::Relaxed);
        self.write_errors.fetch_add(1, Ordering::Relaxed);
        self.unjournaled(Event::capture_record(
            &cap.trip.channel,
            &cap.trip.band,
            &cap.id,
            "lost",
            Some(reason.to_string()),
            unix_now_ns(),
        ));
    }

    fn unjournaled(&self, e: Event) {
        if let Ok(mut u) = self.unjournaled.lock() {
            u.push(e);
        }
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
            Err(TrySendError::Full(e)) | Err(TrySendError::Disconnected(e)) => {
                if let Envelope::Work(Message::Capture(c)) = &e {
                    // Said as lost, not left as a dangling id: the reason
                    // reaches the journal with the next message written.
                    self.shared
                        .ledger(|l| l.set_lost(&c.id, "dropped: the alarm I/O queue was full"));
                    self.shared.unjournaled(Event::capture_record(
                        &c.trip.channel,
                        &c.trip.band,
                        &c.id,
                        "lost",
                        Some("dropped: the alarm I/O queue was full".to_string()),
                        unix_now_ns(),
                    ));
                }
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
    ///
    /// Before the thread starts, accounts for the captures `recent` names
    /// that are not on disk ([`reconcile_captures`]) and journals what it
    /// found (a journal that refuses is retried by the thread).
    pub fn start(
        mut journal: Journal,
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
        let (ledger, records) = reconcile_captures(store.dir(), recent, store.open_report());
        if !ledger.lost().is_empty() {
            tracing::warn!(
                lost = ledger.lost().len(),
                "journal events name captures that never reached the disk; reported as lost"
            );
        }
        shared.ledger(|l| *l = ledger);
        for e in records {
            match journal.append(e.clone()) {
                Ok(written) => {
                    shared.events_written.fetch_add(1, Ordering::Relaxed);
                    shared.remember(written);
                }
                Err(error) => {
                    tracing::error!(%error, "capture record not journaled yet; will retry");
                    shared.unjournaled(e);
                }
            }
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

/// Runs `op` (given the attempt number, from 0) until it succeeds, it fails
/// with an error that does not pass, or [`RETRIES`] retries have failed;
/// counts every failure and retry of record kind `kind`. Returns the last
/// error and the attempts made.
fn retrying<T, E: std::fmt::Display>(
    shared: &IoShared,
    kind: usize,
    io_source: impl Fn(&E) -> Option<&io::Error>,
    mut op: impl FnMut(u32) -> Result<T, E>,
) -> Result<T, (E, u32)> {
    let mut delay = RETRY_FIRST;
    let mut attempt = 0;
    loop {
        match op(attempt) {
            Ok(v) => return Ok(v),
            Err(e) => {
                shared.write_failures[kind].fetch_add(1, Ordering::Relaxed);
                attempt += 1;
                let passes = io_source(&e).is_some_and(transient);
                if !passes || attempt > RETRIES {
                    return Err((e, attempt));
                }
                tracing::warn!(
                    kind = KINDS[kind],
                    attempt,
                    error = %e,
                    retry_in_ms = delay.as_millis() as u64,
                    "storage write failed; retrying"
                );
                shared.write_retries[kind].fetch_add(1, Ordering::Relaxed);
                thread::sleep(delay);
                delay = (delay * 2).min(RETRY_MAX);
            }
        }
    }
}

/// The reason recorded for a record given up after `attempts`.
fn give_up_reason(error: &dyn std::fmt::Display, attempts: u32) -> String {
    if attempts > 1 {
        format!("write failed ({attempts} attempts): {error}")
    } else {
        format!("write failed (not retried): {error}")
    }
}

/// Appends `e` with retries, reopening the journal before each retry.
fn journal_event(
    journal: &mut Journal,
    shared: &IoShared,
    e: &Event,
) -> Result<Event, (JournalError, u32)> {
    retrying(shared, 0, journal_io, |attempt| {
        if attempt > 0 {
            journal.recover(e.unix_ns)?;
        }
        journal.append(e.clone())
    })
}

/// Journals the `capture` records waiting in `shared` (with retries, or
/// one attempt each); what the journal refuses waits for the next call.
fn flush_records(journal: &mut Journal, shared: &IoShared, with_retries: bool) {
    let waiting = shared
        .unjournaled
        .lock()
        .map(|mut u| std::mem::take(&mut *u))
        .unwrap_or_default();
    for (k, e) in waiting.iter().enumerate() {
        let r = if with_retries {
            journal_event(journal, shared, e).map_err(|(error, _)| error)
        } else {
            journal.append(e.clone())
        };
        match r {
            Ok(w) => {
                shared.events_written.fetch_add(1, Ordering::Relaxed);
                shared.remember(w);
            }
            Err(error) => {
                tracing::error!(%error, "capture record not journaled yet; will retry");
                if let Ok(mut u) = shared.unjournaled.lock() {
                    u.splice(0..0, waiting[k..].iter().cloned());
                }
                break;
            }
        }
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
        // Capture records the journal has not taken yet go first.
        flush_records(&mut journal, shared, false);
        match m {
            Message::Event(e) => match journal_event(&mut journal, shared, &e) {
                Ok(written) => {
                    shared.events_written.fetch_add(1, Ordering::Relaxed);
                    if let Some(id) = &written.capture {
                        if written.kind != EventKind::Capture {
                            shared.ledger(|l| l.set_pending(id));
                        }
                    }
                    shared.remember(written);
                }
                Err((error, attempts)) => {
                    shared.lost[0].fetch_add(1, Ordering::Relaxed);
                    shared.write_errors.fetch_add(1, Ordering::Relaxed);
                    if let Some(id) = &e.capture {
                        shared.ledger(|l| l.set_pending(id));
                    }
                    tracing::error!(%error, attempts, "alarm event not journaled");
                }
            },
            Message::Capture(c) => {
                let written = retrying(shared, 1, capture_io, |attempt| {
                    if attempt > 0 {
                        store.ensure_dir()?;
                    }
                    store.write_pruning(&c)
                });
                match written {
                    Ok((meta, pruned)) => {
                        shared.captures_written.fetch_add(1, Ordering::Relaxed);
                        shared
                            .captures_pruned
                            .fetch_add(pruned.len() as u64, Ordering::Relaxed);
                        shared.ledger(|l| l.written(&c.id));
                        tracing::info!(
                            id = %meta.id,
                            samples = meta.waveform.samples,
                            end = %meta.end_reason,
                            "capture written"
                        );
                        for p in pruned {
                            shared.ledger(|l| l.set_pruned(&p.id));
                            let r = Event::capture_record(
                                &p.channel,
                                &p.band,
                                &p.id,
                                "pruned",
                                None,
                                unix_now_ns(),
                            );
                            match journal_event(&mut journal, shared, &r) {
                                Ok(w) => {
                                    shared.events_written.fetch_add(1, Ordering::Relaxed);
                                    shared.remember(w);
                                }
                                Err((error, _)) => {
                                    tracing::error!(%error, "capture record not journaled yet; will retry");
                                    shared.unjournaled(r);
                                }
                            }
                        }
                    }
                    Err((error, attempts)) => {
                        let reason = give_up_reason(&error, attempts);
                        tracing::error!(id = %c.id, %error, attempts, "capture not written: recorded as lost");
                        shared.capture_lost(&c, &reason);
                        // Journal the loss now rather than with the next
                        // message (which may be far off).
                        flush_records(&mut journal, shared, true);
                    }
                }
            }
            Message::Baseline(b) => {
                match retrying(shared, 2, baseline_io, |_| {
                    baseline::save(&baselines_dir, &b)
                }) {
                    Ok(()) => {
                        shared.baselines_written.fetch_add(1, Ordering::Relaxed);
                    }
                    Err((error, attempts)) => {
                        shared.lost[2].fetch_add(1, Ordering::Relaxed);
                        shared.write_errors.fetch_add(1, Ordering::Relaxed);
                        tracing::error!(%error, attempts, "baseline not saved");
                    }
                }
            }
            Message::ForgetBaseline { channel, band } => {
                let removed = retrying(shared, 2, baseline_io, |_| {
                    baseline::remove(&baselines_dir, &channel, &band)
                });
                if let Err((error, attempts)) = removed {
                    shared.lost[2].fetch_add(1, Ordering::Relaxed);
                    shared.write_errors.fetch_add(1, Ordering::Relaxed);
                    tracing::error!(%error, attempts, "baseline not removed");
                }
            }
        }
    }
}
