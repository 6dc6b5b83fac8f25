//! Storage that fails under the alarm I/O thread (issue 13: "a capture or
//! journal write that fails is retried and counted, never silently gone").
//! Real failures, provoked on the file system and the process: the capture
//! directory removed under the running thread (ENOENT), and the open-file
//! limit lowered below the next free descriptor (EMFILE), for a moment
//! (the retry succeeds) and for good (the record is given up, counted, and
//! the capture reported lost with the reason).
//!
//! One test function: the open-file limit is the process's, so no other
//! test may run beside it (this file is its own test binary).

#![allow(clippy::unwrap_used)] // tests may unwrap: a panic is a failed test

mod alarm_common;

use std::fs::File;
use std::os::fd::AsRawFd;
use std::path::Path;
use std::sync::atomic::Ordering;
use std::time::Duration;

use alarm_common::TempDir;
use bandwatch::alarm::capture::{
    self, capture_id, CaptureBuilder, CaptureStore, EndReason, HistoryRing, Retention, TripInfo,
};
use bandwatch::alarm::io::{AlarmIo, CaptureFate, IoShared, Message, RETRIES};
use bandwatch::alarm::journal::{replay, Event, EventKind, EventLimits, Journal, JournalLimits};

const T0: u64 = 1_767_225_600_000_000_000;
const EVENTS: usize = 0;
const CAPTURES: usize = 1;

fn trip(unix_ns: u64) -> TripInfo {
    TripInfo {
        unix_ns,
        time: String::new(),
        channel: "pump-de".into(),
        band: "bpfo".into(),
        unit: "g".into(),
        from: "normal".into(),
        to: "alert".into(),
        value: Some(1.0),
        limits: EventLimits::default(),
        at_sample: 1000,
    }
}

/// The event naming capture `k`'s id, and the capture.
fn trip_records(k: u64) -> (Event, capture::Capture) {
    let t = T0 + k * 1_000_000_000;
    let id = capture_id(t, "pump-de", "bpfo", "alert");
    let mut e = Event::baseline("pump-de", "bpfo", format!("trip {k}"), t);
    e.capture = Some(id.clone());
    let mut ring = HistoryRing::new(1000, 25_600.0);
    ring.push(0, t, &[0.5; 1000]);
    let c = CaptureBuilder::start(id, trip(t), &ring, 1000, 0, None, vec![])
        .finish(EndReason::Complete);
    (e, c)
}

fn start(dir: &Path, limits: JournalLimits) -> (AlarmIo, bandwatch::alarm::io::Outbox) {
    let (journal, replayed) = Journal::open(&dir.join("journal"), limits).unwrap();
    let ret = Retention {
        max_count: 100,
        max_bytes: 1 << 30,
    };
    let (store, _) = CaptureStore::open(&dir.join("captures"), ret).unwrap();
    AlarmIo::start(journal, store, dir.join("baselines"), &replayed.events, 64).unwrap()
}

/// Lowers the soft open-file limit to the lowest free descriptor, so that
/// the next `open` anywhere in the process fails with EMFILE. Returns the
/// limits to restore.
fn no_more_files() -> (u64, u64) {
    let (soft, hard) = rlimit::getrlimit(rlimit::Resource::NOFILE).unwrap();
    let probe = File::open("/dev/null").unwrap();
    let lowest_free = probe.as_raw_fd() as u64;
    drop(probe);
    rlimit::setrlimit(rlimit::Resource::NOFILE, lowest_free, hard).unwrap();
    // The failure is real: check it.
    let e = File::open("/dev/null").expect_err("the limit must refuse an open");
    assert_eq!(e.raw_os_error(), Some(24), "EMFILE expected, got {e}");
    (soft, hard)
}

fn restore((soft, hard): (u64, u64)) {
    rlimit::setrlimit(rlimit::Resource::NOFILE, soft, hard).unwrap();
}

fn counts(s: &IoShared, kind: usize) -> (u64, u64, u64) {
    (
        s.write_failures(kind),
        s.write_retries(kind),
        s.records_lost(kind),
    )
}

#[test]
fn failed_writes_are_retried_counted_and_a_lost_capture_says_why() {
    // 1. The capture directory is removed under the running thread: the
    //    write fails (ENOENT), the directory is made again, the retry
    //    writes the capture.
    let dir = TempDir::new("storage-gone");
    let (io, outbox) = start(dir.path(), JournalLimits::default());
    let captures = dir.path().join("captures");
    std::fs::remove_dir_all(&captures).unwrap();
    let (e, c) = trip_records(1);
    let id1 = c.id.clone();
    assert!(outbox.send(Message::Event(Box::new(e))));
    assert!(outbox.send(Message::Capture(Box::new(c))));
    let shared = io.shared().clone();
    io.stop();
    assert!(capture::exists(&captures, &id1), "capture not written");
    assert_eq!(shared.captures_written.load(Ordering::Relaxed), 1);
    let (failed, retried, lost) = counts(&shared, CAPTURES);
    assert!(
        failed >= 1 && retried >= 1 && lost == 0,
        "{failed} {retried} {lost}"
    );
    assert_eq!(shared.capture_fate(&captures, &id1), CaptureFate::Stored);

    // 2. No file can be opened for 300 ms (EMFILE): retried until the
    //    limit is back, then written.
    let dir = TempDir::new("storage-emfile");
    let (io, outbox) = start(dir.path(), JournalLimits::default());
    let captures = dir.path().join("captures");
    let shared = io.shared().clone();
    let (e, c) = trip_records(2);
    let id2 = c.id.clone();
    assert!(outbox.send(Message::Event(Box::new(e))));
    let saved = no_more_files();
    assert!(outbox.send(Message::Capture(Box::new(c))));
    std::thread::sleep(Duration::from_millis(300));
    restore(saved);
    io.stop();
    assert!(capture::exists(&captures, &id2), "capture not written");
    let (failed, retried, lost) = counts(&shared, CAPTURES);
    assert!(
        failed >= 1 && retried >= 1 && lost == 0,
        "{failed} {retried} {lost}"
    );

    // 3. No file can be opened for longer than the retries last: the
    //    capture is given up, counted, and reported lost with the error;
    //    the loss is journaled (appending to the open journal needs no new
    //    descriptor).
    let dir = TempDir::new("storage-full");
    let (io, outbox) = start(dir.path(), JournalLimits::default());
    let captures = dir.path().join("captures");
    let shared = io.shared().clone();
    let (e, c) = trip_records(3);
    let id3 = c.id.clone();
    assert!(outbox.send(Message::Event(Box::new(e))));
    let saved = no_more_files();
    assert!(outbox.send(Message::Capture(Box::new(c))));
    io.stop(); // returns once the capture is given up
    restore(saved);
    assert!(!capture::exists(&captures, &id3));
    assert_eq!(
        counts(&shared, CAPTURES),
        (u64::from(RETRIES) + 1, u64::from(RETRIES), 1)
    );
    assert_eq!(shared.write_errors.load(Ordering::Relaxed), 1);
    match shared.capture_fate(&captures, &id3) {
        CaptureFate::Lost(r) => assert!(
            r.contains("Too many open files") && r.contains("7 attempts"),
            "{r}"
        ),
        other => panic!("capture {id3} is {other:?}, not lost"),
    }
    let r = replay(&dir.path().join("journal"));
    let record = r
        .events
        .iter()
        .find(|e| e.kind == EventKind::Capture && e.capture.as_deref() == Some(&id3))
        .expect("the loss is journaled");
    assert_eq!(record.cause.as_deref(), Some("lost"));
    assert!(record
        .detail
        .as_deref()
        .is_some_and(|d| d.contains("Too many open files")));
    // A restart finds the record and says the same.
    let (io, _outbox) = start(dir.path(), JournalLimits::default());
    assert!(matches!(
        io.shared().capture_fate(&captures, &id3),
        CaptureFate::Lost(r) if r.contains("Too many open files")
    ));
    io.stop();

    // 4. The journal rotates at every event (tiny max_bytes), and the new
    //    file cannot be opened for 300 ms: the append is retried after the
    //    journal is reopened; every event lands once, no line is torn.
    let dir = TempDir::new("journal-emfile");
    let limits = JournalLimits {
        max_bytes: 200,
        max_files: 50,
    };
    let (io, outbox) = start(dir.path(), limits);
    let shared = io.shared().clone();
    for k in 0..5 {
        let e = Event::baseline("pump-de", "bpfo", format!("event {k}"), T0 + k);
        assert!(outbox.send(Message::Event(Box::new(e))));
    }
    std::thread::sleep(Duration::from_millis(200));
    let saved = no_more_files();
    for k in 5..10 {
        let e = Event::baseline("pump-de", "bpfo", format!("event {k}"), T0 + k);
        assert!(outbox.send(Message::Event(Box::new(e))));
    }
    std::thread::sleep(Duration::from_millis(300));
    restore(saved);
    io.stop();
    let (failed, retried, lost) = counts(&shared, EVENTS);
    assert!(
        failed >= 1 && retried >= 1 && lost == 0,
        "{failed} {retried} {lost}"
    );
    let r = replay(&dir.path().join("journal"));
    assert_eq!((r.bad_lines, r.torn_tail), (0, false));
    let details: Vec<String> = r.events.iter().filter_map(|e| e.detail.clone()).collect();
    let want: Vec<String> = (0..10).map(|k| format!("event {k}")).collect();
    assert_eq!(details, want);
    let seqs: Vec<u64> = r.events.iter().map(|e| e.seq).collect();
    assert!(seqs.windows(2).all(|w| w[1] == w[0] + 1), "{seqs:?}");
}
