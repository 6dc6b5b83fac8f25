//! The event journal: every alarm transition, ack, health change and
//! baseline event, one JSON object per line, appended to
//! `<storage_dir>/journal/journal.jsonl`.
//!
//! **Durability.** Each event is written with one `write` call and then
//! `fsync`ed (`File::sync_data`) before [`Journal::append`] returns: alarm
//! events are rare (a few per hour on a healthy plant), so the cost of one
//! fsync each is small, and an event that was reported is on disk. A power
//! cut during the write can leave a torn last line; replay ignores it and
//! counts it, and [`Journal::open`] ends it with a newline so the next event
//! starts on a line of its own.
//!
//! **Rotation.** Before an event would push `journal.jsonl` past
//! `max_bytes`, the files shift: `journal.jsonl` → `journal.1.jsonl` →
//! `journal.2.jsonl` …, and the oldest beyond `max_files` files in all is
//! deleted; the directory is fsynced after the renames. The new file starts
//! with one `state` event per latched alarm, so that the latches survive
//! however many rotations follow.
//!
//! **Replay.** [`replay`] reads the files oldest first and returns every
//! event it can parse; a line it cannot parse is skipped and counted, a
//! file it cannot read is skipped and counted. It never fails because of the
//! journal's content. [`alarm_memories`] turns the events into the latch and
//! ack of every alarm, to [`restore`](super::state::AlarmMachine::restore).

use std::collections::BTreeMap;
use std::fs::{self, File, OpenOptions};
use std::io::{self, Write};
use std::path::{Path, PathBuf};

use serde::{Deserialize, Serialize};

use super::fsutil::fsync_dir;
use super::health::HealthChange;
use super::state::{AlarmMemory, Severity, Transition};
pub use crate::config::alarms::JournalLimits;

/// File name of the active journal.
pub const ACTIVE: &str = "journal.jsonl";

/// What an event records.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize, utoipa::ToSchema)]
#[serde(rename_all = "kebab-case")]
pub enum EventKind {
    /// The shown state of an alarm changed.
    Transition,
    /// An operator acknowledged an alarm.
    Ack,
    /// A channel became not OK, or OK again.
    Health,
    /// A baseline finished learning, or an operator asked to re-learn.
    Baseline,
    /// A latch carried over into a new journal file at rotation.
    State,
    /// What became of a capture an earlier event named, when it is not on
    /// disk: `cause` "lost" (never written; `detail` says why) or "pruned"
    /// (removed by retention).
    Capture,
}

/// Limits in force at the event, in the band's unit.
#[derive(Debug, Clone, Copy, PartialEq, Default, Serialize, Deserialize, utoipa::ToSchema)]
pub struct EventLimits {
    pub alert: Option<f64>,
    pub danger: Option<f64>,
}

/// One line of the journal.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, utoipa::ToSchema)]
pub struct Event {
    /// Increases by one per event over the life of the storage directory.
    pub seq: u64,
    /// RFC 3339, UTC, of `unix_ns`.
    pub time: String,
    /// When it happened, ns since the Unix epoch.
    pub unix_ns: u64,
    pub channel: String,
    /// The band or overall measure; absent for channel health.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub band: Option<String>,
    pub kind: EventKind,
    /// State (or health "ok"/"not-ok") before the event.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub from: Option<String>,
    /// State after the event.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub to: Option<String>,
    /// Why: trip, clear, inhibit, release, ack; or the ack outcome.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub cause: Option<String>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub value: Option<f64>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub limits: Option<EventLimits>,
    /// Capture started by this event (rising edges only).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub capture: Option<String>,
    /// The alarm's latch after the event (transition, ack, state).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub latched: Option<Severity>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub acknowledged: Option<bool>,
    /// Health reasons (health events).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub reasons: Option<Vec<String>>,
    /// Free text: who acknowledged, baseline figures, and the like.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub detail: Option<String>,
}

impl Event {
    fn blank(kind: EventKind, channel: &str, band: Option<&str>, unix_ns: u64) -> Event {
        Event {
            seq: 0,
            time: String::new(),
            unix_ns,
            channel: channel.to_string(),
            band: band.map(str::to_string),
            kind,
            from: None,
            to: None,
            cause: None,
            value: None,
            limits: None,
            capture: None,
            latched: None,
            acknowledged: None,
            reasons: None,
            detail: None,
        }
    }

    /// A transition of an alarm; `memory` is the machine's memory after it.
    pub fn transition(
        channel: &str,
        band: &str,
        t: &Transition,
        memory: AlarmMemory,
        limits: EventLimits,
        capture: Option<String>,
        unix_ns: u64,
    ) -> Event {
        let mut e = Event::blank(EventKind::Transition, channel, Some(band), unix_ns);
        e.from = Some(t.from.as_str().to_string());
        e.to = Some(t.to.as_str().to_string());
        e.cause = Some(t.cause.as_str().to_string());
        e.value = t.value;
        e.limits = Some(limits);
        e.capture = capture;
        e.latched = Some(memory.latched);
        e.acknowledged = Some(memory.acknowledged);
        e
    }

    /// An acknowledge; `outcome` as `AckOutcome::as_str`, `memory` after it.
    pub fn ack(
        channel: &str,
        band: &str,
        outcome: &str,
        transition: Option<&Transition>,
        memory: AlarmMemory,
        unix_ns: u64,
    ) -> Event {
        let mut e = Event::blank(EventKind::Ack, channel, Some(band), unix_ns);
        if let Some(t) = transition {
            e.from = Some(t.from.as_str().to_string());
            e.to = Some(t.to.as_str().to_string());
        }
        e.cause = Some(outcome.to_string());
        e.latched = Some(memory.latched);
        e.acknowledged = Some(memory.acknowledged);
        e
    }

    /// A channel's health flipped.
    pub fn health(channel: &str, change: &HealthChange, unix_ns: u64) -> Event {
        let mut e = Event::blank(EventKind::Health, channel, None, unix_ns);
        let (from, to) = if change.ok {
            ("not-ok", "ok")
        } else {
            ("ok", "not-ok")
        };
        e.from = Some(from.to_string());
        e.to = Some(to.to_string());
        e.reasons = Some(
            change
                .reasons
                .names()
                .into_iter()
                .map(str::to_string)
                .collect(),
        );
        e
    }

    /// A capture that is not on disk: `cause` "lost" (with the reason in
    /// `detail`) or "pruned" (retention removed it).
    pub fn capture_record(
        channel: &str,
        band: &str,
        id: &str,
        cause: &str,
        detail: Option<String>,
        unix_ns: u64,
    ) -> Event {
        let mut e = Event::blank(EventKind::Capture, channel, Some(band), unix_ns);
        e.capture = Some(id.to_string());
        e.cause = Some(cause.to_string());
        e.detail = detail;
        e
    }

    /// A baseline event (learned, re-learn requested) with free text.
    pub fn baseline(channel: &str, band: &str, detail: String, unix_ns: u64) -> Event {
        let mut e = Event::blank(EventKind::Baseline, channel, Some(band), unix_ns);
        e.detail = Some(detail);
        e
    }
}

/// RFC 3339 (UTC, nanoseconds) of a Unix time in ns.
pub fn rfc3339(unix_ns: u64) -> String {
    let t = time::OffsetDateTime::from_unix_timestamp_nanos(i128::from(unix_ns))
        .unwrap_or(time::OffsetDateTime::UNIX_EPOCH);
    t.format(&time::format_description::well_known::Rfc3339)
        .unwrap_or_default()
}

#[derive(Debug, thiserror::Error)]
pub enum JournalError {
    #[error("journal {path}: {source}")]
    Io {
        path: PathBuf,
        #[source]
        source: io::Error,
    },
    #[error("journal event cannot be encoded: {0}")]
    Encode(String),
}

/// What [`replay`] found.
#[derive(Debug, Clone, Default)]
pub struct Replay {
    /// Every parsed event, oldest first.
    pub events: Vec<Event>,
    /// Lines that were not a valid event (torn, corrupt), skipped.
    pub bad_lines: u64,
    /// The active file ended without a newline (a write torn by a crash).
    pub torn_tail: bool,
    /// Journal files read.
    pub files: u32,
    /// Journal files that could not be read, skipped.
    pub unreadable_files: u32,
}

fn rotated_name(k: u32) -> String {
    format!("journal.{k}.jsonl")
}

/// Journal files in `dir`, oldest first.
fn journal_files(dir: &Path) -> Vec<PathBuf> {
    let mut rotated: Vec<(u32, PathBuf)> = Vec::new();
    let Ok(entries) = fs::read_dir(dir) else {
        return Vec::new();
    };
    for e in entries.flatten() {
        let name = e.file_name();
        let Some(name) = name.to_str() else { continue };
        if let Some(k) = name
            .strip_prefix("journal.")
            .and_then(|r| r.strip_suffix(".jsonl"))
            .and_then(|k| k.parse::<u32>().ok())
        {
            rotated.push((k, e.path()));
        }
    }
    rotated.sort_by_key(|r| std::cmp::Reverse(r.0));
    let mut files: Vec<PathBuf> = rotated.into_iter().map(|(_, p)| p).collect();
    let active = dir.join(ACTIVE);
    if active.exists() {
        files.push(active);
    }
    files
}

/// Reads every journal file in `dir` (missing directory: nothing).
pub fn replay(dir: &Path) -> Replay {
    let mut r = Replay::default();
    let files = journal_files(dir);
    let last = files.len().saturating_sub(1);
    for (i, path) in files.iter().enumerate() {
        let bytes = match fs::read(path) {
            Ok(b) => b,
            Err(error) => {
                tracing::warn!(path = %path.display(), %error, "journal file unreadable, skipped");
                r.unreadable_files += 1;
                continue;
            }
        };
        r.files += 1;
        if i == last && !bytes.is_empty() && !bytes.ends_with(b"\n") {
            r.torn_tail = true;
        }
        for line in bytes.split(|&b| b == b'\n') {
            if line.iter().all(u8::is_ascii_whitespace) {
                continue;
            }
            match serde_json::from_slice::<Event>(line) {
                Ok(e) => r.events.push(e),
                Err(_) => r.bad_lines += 1,
            }
        }
    }
    if r.bad_lines > 0 {
        tracing::warn!(
            dir = %dir.display(),
            bad_lines = r.bad_lines,
            torn_tail = r.torn_tail,
            "journal lines skipped on replay"
        );
    }
    r
}

/// The latch and ack of every alarm, from the journal (last event wins).
pub fn alarm_memories(events: &[Event]) -> BTreeMap<(String, String), AlarmMemory> {
    let mut m = BTreeMap::new();
    for e in events {
        let (Some(band), Some(latched)) = (&e.band, e.latched) else {
            continue;
        };
        m.insert(
            (e.channel.clone(), band.clone()),
            AlarmMemory {
                latched,
                acknowledged: e.acknowledged.unwrap_or(false),
            },
        );
    }
    m
}

/// The open journal. Owned by one I/O thread; see the module docs.
#[derive(Debug)]
pub struct Journal {
    dir: PathBuf,
    limits: JournalLimits,
    file: File,
    size: u64,
    next_seq: u64,
    memories: BTreeMap<(String, String), AlarmMemory>,
    appended: u64,
    rotations: u64,
}

impl Journal {
    /// Creates `dir` if needed, replays what is there, ends a torn last line
    /// and opens the active file for appending.
    ///
    /// # Errors
    /// [`JournalError::Io`] if the directory or the active file cannot be
    /// created or opened. The content of the journal never causes an error.
    pub fn open(dir: &Path, limits: JournalLimits) -> Result<(Journal, Replay), JournalError> {
        let io_err = |path: &Path| {
            let path = path.to_path_buf();
            move |source| JournalError::Io { path, source }
        };
        fs::create_dir_all(dir).map_err(io_err(dir))?;
        let replay = replay(dir);
        let path = dir.join(ACTIVE);
        let mut file = OpenOptions::new()
            .create(true)
            .append(true)
            .open(&path)
            .map_err(io_err(&path))?;
        if replay.torn_tail {
            file.write_all(b"\n").map_err(io_err(&path))?;
            file.sync_data().map_err(io_err(&path))?;
        }
        fsync_dir(dir).map_err(io_err(dir))?;
        let size = file.metadata().map_err(io_err(&path))?.len();
        let next_seq = replay
            .events
            .iter()
            .map(|e| e.seq)
            .max()
            .map_or(1, |s| s + 1);
        let memories = alarm_memories(&replay.events);
        Ok((
            Journal {
                dir: dir.to_path_buf(),
                limits,
                file,
                size,
                next_seq,
                memories,
                appended: 0,
                rotations: 0,
            },
            replay,
        ))
    }

    /// Appends one event: assigns `seq` and `time`, writes the line, fsyncs.
    /// Returns the event as written.
    ///
    /// # Errors
    /// [`JournalError::Io`] if the write, the fsync or a rotation failed.
    pub fn append(&mut self, mut event: Event) -> Result<Event, JournalError> {
        event.seq = self.next_seq;
        event.time = rfc3339(event.unix_ns);
        let line = encode_line(&event)?;
        if self.size > 0 && self.size + line.len() as u64 > self.limits.max_bytes {
            self.rotate(event.unix_ns)?;
            // seq moved on if the rotation wrote state events.
            event.seq = self.next_seq;
        }
        let line = encode_line(&event)?;
        self.write_line(&line)?;
        self.next_seq += 1;
        self.appended += 1;
        if let (Some(band), Some(latched)) = (&event.band, event.latched) {
            self.memories.insert(
                (event.channel.clone(), band.clone()),
                AlarmMemory {
                    latched,
                    acknowledged: event.acknowledged.unwrap_or(false),
                },
            );
        }
        Ok(event)
    }

    fn write_line(&mut self, line: &[u8]) -> Result<(), JournalError> {
        let path = self.dir.join(ACTIVE);
        let err = |source| JournalError::Io {
            path: path.clone(),
            source,
        };
        self.file.write_all(line).map_err(err)?;
        self.file.sync_data().map_err(err)?;
        self.size += line.len() as u64;
        Ok(())
    }

    /// Gets the journal writable again after a failed [`Journal::append`],
    /// before a retry: cuts whatever part of a line the failed write left
    /// (so the retry cannot leave a torn line before its own), creates the
    /// directory again if it has gone, and reopens the active file. A
    /// rotation the failure interrupted is finished: an active file that
    /// starts empty gets the latches carried over, as at rotation.
    ///
    /// # Errors
    /// [`JournalError::Io`] if the directory or file cannot be made.
    pub fn recover(&mut self, unix_ns: u64) -> Result<(), JournalError> {
        let _ = self.file.set_len(self.size);
        let dir = self.dir.clone();
        let active = dir.join(ACTIVE);
        let err = |p: PathBuf| move |source| JournalError::Io { path: p, source };
        fs::create_dir_all(&dir).map_err(err(dir.clone()))?;
        self.file = OpenOptions::new()
            .create(true)
            .append(true)
            .open(&active)
            .map_err(err(active.clone()))?;
        fsync_dir(&dir).map_err(err(dir.clone()))?;
        self.size = self.file.metadata().map_err(err(active))?.len();
        if self.size == 0 {
            self.carry_latches(unix_ns)?;
        }
        Ok(())
    }

    fn rotate(&mut self, unix_ns: u64) -> Result<(), JournalError> {
        let dir = self.dir.clone();
        let err = |p: PathBuf| move |source| JournalError::Io { path: p, source };
        let n = self.limits.max_files.max(2);
        let oldest = dir.join(rotated_name(n - 1));
        match fs::remove_file(&oldest) {
            Ok(()) => {}
            Err(e) if e.kind() == io::ErrorKind::NotFound => {}
            Err(e) => return Err(err(oldest)(e)),
        }
        for k in (1..n - 1).rev() {
            let from = dir.join(rotated_name(k));
            if from.exists() {
                fs::rename(&from, dir.join(rotated_name(k + 1))).map_err(err(from))?;
            }
        }
        let active = dir.join(ACTIVE);
        fs::rename(&active, dir.join(rotated_name(1))).map_err(err(active.clone()))?;
        self.rotations += 1;
        self.file = OpenOptions::new()
            .create(true)
            .append(true)
            .open(&active)
            .map_err(err(active.clone()))?;
        fsync_dir(&dir).map_err(err(dir.clone()))?;
        self.size = 0;
        self.carry_latches(unix_ns)
    }

    /// Writes one `state` event per latched alarm at the start of a new
    /// active file.
    fn carry_latches(&mut self, unix_ns: u64) -> Result<(), JournalError> {
        // Carry the latches over, so that they outlive the old files.
        let carried: Vec<((String, String), AlarmMemory)> = self
            .memories
            .iter()
            .filter(|(_, m)| m.latched > Severity::Normal)
            .map(|(k, m)| (k.clone(), *m))
            .collect();
        for ((channel, band), m) in carried {
            let mut e = Event::blank(EventKind::State, &channel, Some(&band), unix_ns);
            e.seq = self.next_seq;
            e.time = rfc3339(unix_ns);
            e.latched = Some(m.latched);
            e.acknowledged = Some(m.acknowledged);
            let line = encode_line(&e)?;
            self.write_line(&line)?;
            self.next_seq += 1;
        }
        Ok(())
    }

    /// Events appended since open.
    pub fn appended(&self) -> u64 {
        self.appended
    }

    pub fn rotations(&self) -> u64 {
        self.rotations
    }

    /// Sequence number the next event gets.
    pub fn next_seq(&self) -> u64 {
        self.next_seq
    }

    pub fn dir(&self) -> &Path {
        &self.dir
    }
}

fn encode_line(e: &Event) -> Result<Vec<u8>, JournalError> {
    let mut line = serde_json::to_vec(e).map_err(|err| JournalError::Encode(err.to_string()))?;
    line.push(b'\n');
    Ok(line)
}
