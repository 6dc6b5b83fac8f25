//! The alarm I/O thread: everything queued before stop is on disk after it,
//! in order; a full queue drops and counts instead of blocking.

#![allow(clippy::unwrap_used)] // tests may unwrap: a panic is a failed test

mod alarm_common;

use std::sync::atomic::Ordering;

use alarm_common::TempDir;
use bandwatch::alarm::baseline::{self, Baseline};
use bandwatch::alarm::capture::{
    capture_id, list, CaptureBuilder, CaptureStore, EndReason, HistoryRing, Retention, TripInfo,
};
use bandwatch::alarm::io::{AlarmIo, Message};
use bandwatch::alarm::journal::{replay, Event, EventLimits, Journal, JournalLimits};
use bandwatch::alarm::state::{AlarmMemory, AlarmState, Cause, Severity, Transition};

const T0: u64 = 1_767_225_600_000_000_000;

fn event(i: u64) -> Event {
    let t = Transition {
        at: i as f64,
        from: AlarmState::Normal,
        to: AlarmState::Alert,
        cause: Cause::Trip,
        value: Some(i as f64),
    };
    Event::transition(
        "pump-de",
        "bpfo",
        &t,
        AlarmMemory {
            latched: Severity::Alert,
            acknowledged: false,
        },
        EventLimits::default(),
        None,
        T0 + i,
    )
}

#[test]
fn everything_queued_is_written_by_stop() {
    let dir = TempDir::new("io");
    let (journal, replayed) =
        Journal::open(&dir.path().join("journal"), JournalLimits::default()).unwrap();
    let ret = Retention {
        max_count: 10,
        max_bytes: 1 << 30,
    };
    let (store, _) = CaptureStore::open(&dir.path().join("captures"), ret).unwrap();
    let (io, outbox) = AlarmIo::start(
        journal,
        store,
        dir.path().join("baselines"),
        &replayed.events,
        64,
    )
    .unwrap();
    let mut ring = HistoryRing::new(1000, 25_600.0);
    ring.push(0, T0, &[0.5; 1000]);
    for i in 0..20 {
        assert!(outbox.send(Message::Event(Box::new(event(i)))));
    }
    let id = capture_id(T0, "pump-de", "bpfo", "alert");
    let trip = TripInfo {
        unix_ns: T0,
        time: String::new(),
        channel: "pump-de".into(),
        band: "bpfo".into(),
        unit: "g".into(),
        from: "normal".into(),
        to: "alert".into(),
        value: Some(1.0),
        limits: EventLimits::default(),
        at_sample: 1000,
    };
    let c = CaptureBuilder::start(id.clone(), trip, &ring, 1000, 0, None, vec![])
        .finish(EndReason::Shutdown);
    assert!(outbox.send(Message::Capture(Box::new(c))));
    let b = Baseline {
        version: 1,
        channel: "pump-de".into(),
        band: "bpfo".into(),
        unit: "g".into(),
        mean: 0.1,
        std: 0.01,
        count: 100,
        learned_s: 100.0,
        finished_unix_ns: T0,
    };
    assert!(outbox.send(Message::Baseline(Box::new(b.clone()))));
    let shared = io.shared().clone();
    // The outbox may outlive the thread: stop drains what was queued.
    io.stop();
    assert!(!outbox.send(Message::Event(Box::new(event(99)))));
    assert_eq!(shared.dropped_events(), 1);

    assert_eq!(shared.events_written.load(Ordering::Relaxed), 20);
    drop(outbox);
    assert_eq!(shared.captures_written.load(Ordering::Relaxed), 1);
    assert_eq!(shared.write_errors.load(Ordering::Relaxed), 0);
    assert_eq!(shared.recent_events().len(), 20);
    let r = replay(&dir.path().join("journal"));
    let seqs: Vec<u64> = r.events.iter().map(|e| e.seq).collect();
    assert_eq!(seqs, (1..=20).collect::<Vec<_>>());
    assert_eq!(list(&dir.path().join("captures")).unwrap()[0].id, id);
    assert_eq!(
        baseline::load(&dir.path().join("baselines"), "pump-de", "bpfo").unwrap(),
        Some(b)
    );
}

#[test]
fn a_full_queue_drops_and_counts_without_blocking() {
    let dir = TempDir::new("io-full");
    let (journal, _) =
        Journal::open(&dir.path().join("journal"), JournalLimits::default()).unwrap();
    let (store, _) = CaptureStore::open(
        &dir.path().join("captures"),
        Retention {
            max_count: 10,
            max_bytes: 1 << 30,
        },
    )
    .unwrap();
    let (io, outbox) = AlarmIo::start(journal, store, dir.path().join("b"), &[], 1).unwrap();
    // 200 sends into a queue of one, each write fsynced: some must be
    // refused; none may block.
    let sent = (0..200)
        .filter(|i| outbox.send(Message::Event(Box::new(event(*i)))))
        .count() as u64;
    let shared = outbox.shared().clone();
    io.stop();
    let dropped = shared.dropped_events();
    assert!(dropped > 0);
    assert_eq!(sent + dropped, 200);
    assert_eq!(shared.events_written.load(Ordering::Relaxed), sent);
    assert_eq!(
        replay(&dir.path().join("journal")).events.len() as u64,
        sent
    );
}

/// Issue 13: "a kill during a capture's post-trigger window leaves a
/// journal event pointing at a capture id that never reaches the disk".
/// A run that journaled trips and stopped before writing their captures
/// (what SIGKILL leaves: the event on disk, the capture never queued, or
/// its write cut off) is accounted for at the next start: each such
/// capture is lost with the reason, journaled once; a capture retention
/// removed is pruned, never lost.
#[test]
fn captures_that_never_reached_the_disk_are_reported_lost_at_start() {
    use bandwatch::alarm::capture::exists;
    use bandwatch::alarm::io::CaptureFate;
    use bandwatch::alarm::journal::EventKind;

    let dir = TempDir::new("io-lost");
    let ret = Retention {
        max_count: 1,
        max_bytes: 1 << 30,
    };
    let jdir = dir.path().join("journal");
    let cdir = dir.path().join("captures");
    let open = || {
        let (journal, replayed) = Journal::open(&jdir, JournalLimits::default()).unwrap();
        let (store, _) = CaptureStore::open(&cdir, ret).unwrap();
        AlarmIo::start(journal, store, dir.path().join("b"), &replayed.events, 64).unwrap()
    };
    let ids: Vec<String> = (0..4)
        .map(|k| capture_id(T0 + k, "pump-de", "bpfo", "alert"))
        .collect();
    let named = |k: usize| {
        let mut e = event(k as u64);
        e.capture = Some(ids[k].clone());
        e
    };
    let capture = |k: usize| {
        let mut ring = HistoryRing::new(1000, 25_600.0);
        ring.push(0, T0, &[0.5; 1000]);
        let mut trip = TripInfo {
            unix_ns: T0 + k as u64,
            time: String::new(),
            channel: "pump-de".into(),
            band: "bpfo".into(),
            unit: "g".into(),
            from: "normal".into(),
            to: "alert".into(),
            value: Some(1.0),
            limits: EventLimits::default(),
            at_sample: 1000,
        };
        trip.time = String::new();
        CaptureBuilder::start(ids[k].clone(), trip, &ring, 1000, 0, None, vec![])
            .finish(EndReason::Complete)
    };

    // Run 1: captures 0 and 1 written (retention keeps one: 0 is pruned);
    // 2 and 3 journaled but never written; 3 left a `.tmp` behind.
    let (io, outbox) = open();
    for k in 0..4 {
        assert!(outbox.send(Message::Event(Box::new(named(k)))));
    }
    assert!(outbox.send(Message::Capture(Box::new(capture(0)))));
    assert!(outbox.send(Message::Capture(Box::new(capture(1)))));
    let shared = io.shared().clone();
    io.stop();
    assert_eq!(shared.capture_fate(&cdir, &ids[0]), CaptureFate::Pruned);
    assert_eq!(shared.capture_fate(&cdir, &ids[1]), CaptureFate::Stored);
    // Still being collected, as far as this run knows.
    assert_eq!(shared.capture_fate(&cdir, &ids[2]), CaptureFate::Pending);
    std::fs::write(cdir.join(format!("{}.bwf1.tmp", ids[3])), b"torn").unwrap();

    // Run 2: the start accounts for them.
    let (io, _outbox) = open();
    let s = io.shared().clone();
    assert_eq!(s.capture_fate(&cdir, &ids[0]), CaptureFate::Pruned);
    assert_eq!(s.capture_fate(&cdir, &ids[1]), CaptureFate::Stored);
    match s.capture_fate(&cdir, &ids[2]) {
        CaptureFate::Lost(r) => assert!(r.contains("post-trigger window"), "{r}"),
        other => panic!("{other:?}"),
    }
    match s.capture_fate(&cdir, &ids[3]) {
        CaptureFate::Lost(r) => assert!(r.contains("while the capture was being written"), "{r}"),
        other => panic!("{other:?}"),
    }
    assert!(!exists(&cdir, &ids[3]));
    assert_eq!(s.lost_captures().len(), 2);
    io.stop();

    // Run 3: the records are read back, not written again.
    let (io, _outbox) = open();
    match io.shared().capture_fate(&cdir, &ids[2]) {
        CaptureFate::Lost(r) => assert!(r.contains("post-trigger window"), "{r}"),
        other => panic!("{other:?}"),
    }
    io.stop();
    let r = replay(&jdir);
    let records: Vec<(String, String)> = r
        .events
        .iter()
        .filter(|e| e.kind == EventKind::Capture)
        .map(|e| (e.capture.clone().unwrap(), e.cause.clone().unwrap()))
        .collect();
    assert_eq!(
        records,
        vec![
            (ids[0].clone(), "pruned".to_string()),
            (ids[2].clone(), "lost".to_string()),
            (ids[3].clone(), "lost".to_string()),
        ]
    );
}
