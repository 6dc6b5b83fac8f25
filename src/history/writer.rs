//! The history's writer thread: takes records from the bounded queue in
//! batches (one transaction each), writes the holes the taps report, runs
//! retention every few minutes, and rides out a file it cannot write.
//!
//! A failed open or transaction (full or read-only disk, a removed
//! directory) starts an *outage*: it is logged once, the batch's records
//! are counted as dropped (`write_error`), each channel's lost time span is
//! remembered, and the file is tried again every [`RETRY`] with the next
//! batch. The first batch that commits again carries one hole per channel
//! for the outage, and the recovery is logged once.

use std::collections::HashMap;
use std::sync::atomic::Ordering;
use std::sync::mpsc::{Receiver, RecvTimeoutError};
use std::sync::Arc;
use std::time::{Duration, Instant};

use rusqlite::Connection;

use super::store::{self, SeriesIds};
use super::{schema, DropReason, HistoryShared, Record};

/// Records written in one transaction at most.
const BATCH: usize = 4096;
/// How often retention runs.
pub const MAINTAIN_EVERY: Duration = Duration::from_secs(300);
/// How soon a file that failed is tried again.
pub const RETRY: Duration = Duration::from_secs(5);

/// Where the writer reads the time for retention (Unix seconds): the
/// system clock in the daemon; a test's own clock to simulate months.
pub trait WallClock: Send + 'static {
    fn now_s(&self) -> u64;
}

/// The system's clock.
pub struct SystemClock;

impl WallClock for SystemClock {
    fn now_s(&self) -> u64 {
        crate::clock::unix_now_ns() / 1_000_000_000
    }
}

/// Starts the thread.
///
/// # Errors
/// The thread could not be spawned.
pub fn spawn<C: WallClock>(
    shared: Arc<HistoryShared>,
    rx: Receiver<Record>,
    clock: C,
) -> std::io::Result<std::thread::JoinHandle<()>> {
    std::thread::Builder::new()
        .name("history".into())
        .spawn(move || Writer::new(shared, clock).run(&rx))
}

/// What an outage has cost so far.
struct Outage {
    error: String,
    /// Per channel: first and past-last second lost, records lost.
    lost: HashMap<String, (u64, u64, u64)>,
    /// The queue-full holes the lost records carried, written on recovery.
    carried: HashMap<String, (u64, u64, u64)>,
}

/// Widens a per-channel span by `from..to` and `n` records.
fn widen(map: &mut HashMap<String, (u64, u64, u64)>, channel: &str, from: u64, to: u64, n: u64) {
    let e = map.entry(channel.to_string()).or_insert((from, to, 0));
    e.0 = e.0.min(from);
    e.1 = e.1.max(to);
    e.2 += n;
}

struct Writer<C> {
    shared: Arc<HistoryShared>,
    clock: C,
    conn: Option<Connection>,
    ids: SeriesIds,
    outage: Option<Outage>,
    retry_at: Instant,
    maintain_at: Instant,
    over_bound_logged: bool,
}

impl<C: WallClock> Writer<C> {
    fn new(shared: Arc<HistoryShared>, clock: C) -> Writer<C> {
        let now = Instant::now();
        Writer {
            shared,
            clock,
            conn: None,
            ids: SeriesIds::default(),
            outage: None,
            retry_at: now,
            maintain_at: now,
            over_bound_logged: false,
        }
    }

    fn run(mut self, rx: &Receiver<Record>) {
        self.connect();
        loop {
            let stopping = self.shared.stopping.load(Ordering::Relaxed);
            let first = match rx.recv_timeout(Duration::from_secs(1)) {
                Ok(r) => Some(r),
                Err(RecvTimeoutError::Timeout) if stopping => break,
                Err(RecvTimeoutError::Timeout) => None,
                Err(RecvTimeoutError::Disconnected) => break,
            };
            let mut batch = Vec::new();
            if let Some(r) = first {
                batch.push(r);
                while batch.len() < BATCH {
                    match rx.try_recv() {
                        Ok(r) => batch.push(r),
                        Err(_) => break,
                    }
                }
            }
            self.shared
                .counters
                .queued
                .fetch_sub(batch.len() as u64, Ordering::Relaxed);
            if !batch.is_empty() {
                self.write(&batch);
            }
            if stopping && batch.len() < BATCH {
                break; // what was queued when the handle went is written
            }
            if Instant::now() >= self.maintain_at {
                self.maintain();
            }
        }
        // Records queued between the last batch and now are written too;
        // any sent after the queue is gone are counted by their tap.
        let rest: Vec<Record> = rx.try_iter().collect();
        self.shared
            .counters
            .queued
            .fetch_sub(rest.len() as u64, Ordering::Relaxed);
        if !rest.is_empty() {
            self.write(&rest);
        }
        tracing::debug!("history writer stopped");
    }

    /// Opens the file unless open; an outage when it cannot.
    fn connect(&mut self) -> bool {
        if self.conn.is_some() {
            return true;
        }
        if Instant::now() < self.retry_at {
            return false;
        }
        match schema::open_write(&self.shared.spec.file) {
            Ok(c) => {
                self.conn = Some(c);
                self.ids.clear();
                true
            }
            Err(e) => {
                self.fail(e.to_string());
                false
            }
        }
    }

    fn fail(&mut self, error: String) {
        self.retry_at = Instant::now() + RETRY;
        self.shared
            .counters
            .write_errors
            .fetch_add(1, Ordering::Relaxed);
        if self.outage.is_none() {
            tracing::error!(
                file = %self.shared.spec.file.display(),
                error = %error,
                "history cannot be written: its records are dropped and counted \
                 (bandwatch_history_records_dropped_total{{reason=\"write_error\"}}) \
                 until the file can be written again; DSP and alarms go on"
            );
            self.outage = Some(Outage {
                error,
                lost: HashMap::new(),
                carried: HashMap::new(),
            });
        }
    }

    fn lose(&mut self, batch: &[Record]) {
        self.shared
            .counters
            .add_dropped(DropReason::WriteError, batch.len() as u64);
        if let Some(o) = &mut self.outage {
            for r in batch {
                let t = r.time_s();
                widen(&mut o.lost, r.channel(), t, t + 1, 1);
                if let Some(l) = r.lost() {
                    widen(&mut o.carried, r.channel(), l.from_s, l.to_s, l.records);
                }
            }
        }
    }

    fn write(&mut self, batch: &[Record]) {
        if !self.connect() {
            self.lose(batch);
            return;
        }
        let result = self.transaction(batch);
        match result {
            Ok((points, spectra)) => {
                let c = &self.shared.counters;
                c.points_written.fetch_add(points, Ordering::Relaxed);
                for (i, n) in spectra.iter().enumerate() {
                    c.spectra_stored[i].fetch_add(*n, Ordering::Relaxed);
                }
                if let Some(o) = self.outage.take() {
                    let lost: u64 = o.lost.values().map(|l| l.2).sum();
                    tracing::warn!(
                        file = %self.shared.spec.file.display(),
                        records_lost = lost,
                        error_was = %o.error,
                        "history writes resumed; the lost time is recorded as holes"
                    );
                }
            }
            Err(e) => {
                // The transaction rolled back: ids it made are gone too.
                self.ids.clear();
                self.conn = None;
                self.fail(e.to_string());
                self.lose(batch);
            }
        }
    }

    /// One transaction: the outage's holes (if one just ended), each
    /// record's own hole, the records.
    fn transaction(&mut self, batch: &[Record]) -> rusqlite::Result<(u64, [u64; 3])> {
        let Some(conn) = self.conn.as_mut() else {
            return Err(rusqlite::Error::InvalidQuery);
        };
        let tx = conn.transaction()?;
        if let Some(o) = &self.outage {
            for (reason, map) in [
                (DropReason::WriteError, &o.lost),
                (DropReason::QueueFull, &o.carried),
            ] {
                for (ch, (from, to, n)) in map {
                    store::insert_hole(&tx, Some(ch), *from, *to, reason.as_str(), *n)?;
                }
            }
        }
        let mut points = 0;
        let mut spectra = [0u64; 3];
        for r in batch {
            if let Some(l) = r.lost() {
                store::insert_hole(
                    &tx,
                    Some(r.channel()),
                    l.from_s,
                    l.to_s,
                    DropReason::QueueFull.as_str(),
                    l.records,
                )?;
            }
            match r {
                Record::Interval(i) => points += store::insert_interval(&tx, &mut self.ids, i)?,
                Record::Spectrum(s) => {
                    store::insert_spectrum(&tx, s)?;
                    spectra[s.reason as usize] += 1;
                }
            }
        }
        tx.commit()?;
        Ok((points, spectra))
    }

    fn maintain(&mut self) {
        self.maintain_at = Instant::now() + MAINTAIN_EVERY;
        let now = self.clock.now_s();
        let Some(conn) = self.conn.as_mut() else {
            return;
        };
        match store::retain(conn, &self.shared.spec, now) {
            Ok(r) => {
                let c = &self.shared.counters;
                c.spectra_deleted
                    .fetch_add(r.spectra_deleted, Ordering::Relaxed);
                c.file_bytes.store(r.used_bytes, Ordering::Relaxed);
                if r.over_bound && !self.over_bound_logged {
                    tracing::warn!(
                        file = %self.shared.spec.file.display(),
                        used_bytes = r.used_bytes,
                        max_bytes = self.shared.spec.max_bytes,
                        "history is over max_mb with only aggregates, references and alarm \
                         spectra left: raise max_mb or lower keep_days"
                    );
                }
                self.over_bound_logged = r.over_bound;
            }
            Err(e) => {
                tracing::warn!(error = %e, "history retention failed; tried again later");
                self.shared
                    .counters
                    .write_errors
                    .fetch_add(1, Ordering::Relaxed);
            }
        }
    }
}
