//! The event journal: durable appends, replay after a torn write, rotation
//! bounded by size and count, and latches that survive both.

#![allow(clippy::unwrap_used)] // tests may unwrap: a panic is a failed test

mod alarm_common;

use std::fs::{self, OpenOptions};
use std::io::Write;

use alarm_common::{names, TempDir};
use bandwatch::alarm::health::{HealthChange, Reason, Reasons};
use bandwatch::alarm::journal::{
    alarm_memories, replay, Event, EventKind, EventLimits, Journal, JournalLimits, ACTIVE,
};
use bandwatch::alarm::state::{AlarmMemory, AlarmState, Cause, Severity, Transition};

const T0: u64 = 1_767_225_600_000_000_000; // 2026-01-01T00:00:00Z

fn trip(band: &str, to: AlarmState, latched: Severity, i: u64) -> Event {
    let t = Transition {
        at: i as f64,
        from: AlarmState::Normal,
        to,
        cause: Cause::Trip,
        value: Some(5.0 + i as f64),
    };
    Event::transition(
        "pump-de",
        band,
        &t,
        AlarmMemory {
            latched,
            acknowledged: false,
        },
        EventLimits {
            alert: Some(4.5),
            danger: Some(7.1),
        },
        None,
        T0 + i * 1_000_000_000,
    )
}

fn limits() -> JournalLimits {
    JournalLimits {
        max_bytes: 4096,
        max_files: 3,
    }
}

#[test]
fn appends_are_replayed_in_order_and_seq_continues() {
    let dir = TempDir::new("journal-order");
    let (mut j, r) = Journal::open(dir.path(), limits()).unwrap();
    assert!(r.events.is_empty());
    for i in 0..5 {
        let e = j
            .append(trip("bpfo", AlarmState::Alert, Severity::Normal, i))
            .unwrap();
        assert_eq!(e.seq, i + 1);
    }
    drop(j);
    let (mut j, r) = Journal::open(dir.path(), limits()).unwrap();
    assert_eq!(r.events.len(), 5);
    assert_eq!(r.bad_lines, 0);
    assert!(!r.torn_tail);
    assert_eq!(
        r.events.iter().map(|e| e.seq).collect::<Vec<_>>(),
        vec![1, 2, 3, 4, 5]
    );
    assert_eq!(r.events[2].value, Some(7.0));
    assert_eq!(r.events[0].time, "2026-01-01T00:00:00Z");
    assert_eq!(r.events[0].kind, EventKind::Transition);
    assert_eq!(
        j.append(trip("bpfo", AlarmState::Alert, Severity::Normal, 9))
            .unwrap()
            .seq,
        6
    );
}

#[test]
fn every_line_is_one_json_object_with_the_documented_fields() {
    let dir = TempDir::new("journal-fields");
    let (mut j, _) = Journal::open(dir.path(), limits()).unwrap();
    j.append(trip("bpfo", AlarmState::Danger, Severity::Danger, 1))
        .unwrap();
    let mut reasons = Reasons::default();
    reasons.insert(Reason::Flatline);
    j.append(Event::health(
        "pump-de",
        &HealthChange {
            at: 2.0,
            ok: false,
            reasons,
        },
        T0,
    ))
    .unwrap();
    let text = fs::read_to_string(dir.path().join(ACTIVE)).unwrap();
    let lines: Vec<&str> = text.lines().collect();
    assert_eq!(lines.len(), 2);
    let v: serde_json::Value = serde_json::from_str(lines[0]).unwrap();
    for key in [
        "seq", "time", "unix_ns", "channel", "band", "kind", "from", "to", "value", "limits",
        "latched",
    ] {
        assert!(v.get(key).is_some(), "missing {key} in {v}");
    }
    assert_eq!(v["kind"], "transition");
    assert_eq!(v["to"], "danger");
    assert_eq!(v["latched"], "danger");
    let h: serde_json::Value = serde_json::from_str(lines[1]).unwrap();
    assert_eq!(h["kind"], "health");
    assert_eq!(h["reasons"][0], "flatline");
    assert!(h.get("band").is_none());
}

#[test]
fn torn_last_line_is_skipped_counted_and_never_merges() {
    let dir = TempDir::new("journal-torn");
    let (mut j, _) = Journal::open(dir.path(), limits()).unwrap();
    for i in 0..3 {
        j.append(trip("bpfo", AlarmState::Alert, Severity::Alert, i))
            .unwrap();
    }
    drop(j);
    // A power cut in the middle of the fourth write.
    let full =
        serde_json::to_string(&trip("bpfo", AlarmState::Danger, Severity::Danger, 3)).unwrap();
    let mut f = OpenOptions::new()
        .append(true)
        .open(dir.path().join(ACTIVE))
        .unwrap();
    f.write_all(&full.as_bytes()[..full.len() / 2]).unwrap();
    drop(f);

    let r = replay(dir.path());
    assert_eq!(r.events.len(), 3);
    assert_eq!(r.bad_lines, 1);
    assert!(r.torn_tail);

    // Start-up goes on; the next event lands on a line of its own.
    let (mut j, r) = Journal::open(dir.path(), limits()).unwrap();
    assert_eq!(r.events.len(), 3);
    let e = j
        .append(trip("bpfo", AlarmState::Danger, Severity::Danger, 4))
        .unwrap();
    assert_eq!(e.seq, 4);
    drop(j);
    let r = replay(dir.path());
    assert_eq!(r.events.len(), 4);
    assert_eq!(r.bad_lines, 1, "the torn fragment stays, counted");
    assert!(!r.torn_tail);
    assert_eq!(r.events[3].to.as_deref(), Some("danger"));
}

#[test]
fn garbage_lines_anywhere_are_skipped() {
    let dir = TempDir::new("journal-garbage");
    let (mut j, _) = Journal::open(dir.path(), limits()).unwrap();
    j.append(trip("a", AlarmState::Alert, Severity::Normal, 0))
        .unwrap();
    drop(j);
    let mut f = OpenOptions::new()
        .append(true)
        .open(dir.path().join(ACTIVE))
        .unwrap();
    f.write_all(b"\xff\xfe not json\n{\"seq\": \"x\"}\n\n")
        .unwrap();
    drop(f);
    let (mut j, r) = Journal::open(dir.path(), limits()).unwrap();
    assert_eq!(r.bad_lines, 2);
    j.append(trip("a", AlarmState::Alert, Severity::Normal, 1))
        .unwrap();
    assert_eq!(replay(dir.path()).events.len(), 2);
}

#[test]
fn rotation_bounds_size_and_count() {
    let dir = TempDir::new("journal-rotate");
    let (mut j, _) = Journal::open(dir.path(), limits()).unwrap();
    let line_len = serde_json::to_string(&trip("bpfo", AlarmState::Alert, Severity::Normal, 0))
        .unwrap()
        .len();
    let n = 3 * 4096 / line_len as u64 + 40;
    for i in 0..n {
        j.append(trip("bpfo", AlarmState::Alert, Severity::Normal, i))
            .unwrap();
    }
    assert!(j.rotations() >= 3);
    drop(j);
    assert_eq!(
        names(dir.path()),
        vec!["journal.1.jsonl", "journal.2.jsonl", "journal.jsonl"]
    );
    for name in names(dir.path()) {
        let len = fs::metadata(dir.path().join(&name)).unwrap().len();
        assert!(len <= 4096, "{name} is {len} bytes");
    }
    let r = replay(dir.path());
    assert_eq!(r.bad_lines, 0);
    // Oldest first, contiguous, ending with the newest.
    let seqs: Vec<u64> = r.events.iter().map(|e| e.seq).collect();
    assert!(seqs.windows(2).all(|w| w[1] == w[0] + 1), "{seqs:?}");
    assert_eq!(*seqs.last().unwrap(), n);
    assert!(seqs[0] > 1, "the oldest file was deleted");
}

#[test]
fn latches_survive_rotation_and_restart() {
    let dir = TempDir::new("journal-latch");
    let (mut j, _) = Journal::open(dir.path(), limits()).unwrap();
    j.append(trip("bpfo", AlarmState::Danger, Severity::Danger, 0))
        .unwrap();
    j.append(trip("1x", AlarmState::Alert, Severity::Alert, 1))
        .unwrap();
    // An ack that released "1x".
    j.append(Event::ack(
        "pump-de",
        "1x",
        "cleared",
        None,
        AlarmMemory::default(),
        T0 + 2,
    ))
    .unwrap();
    // Enough chatter on another band to rotate the first events away.
    for i in 0..400 {
        j.append(trip("vane", AlarmState::Alert, Severity::Normal, 10 + i))
            .unwrap();
    }
    assert!(j.rotations() > 3);
    drop(j);
    let (_, r) = Journal::open(dir.path(), limits()).unwrap();
    assert!(
        !r.events.iter().any(|e| e.seq == 1),
        "first event rotated out"
    );
    let m = alarm_memories(&r.events);
    assert_eq!(
        m.get(&("pump-de".to_string(), "bpfo".to_string())),
        Some(&AlarmMemory {
            latched: Severity::Danger,
            acknowledged: false
        })
    );
    assert_eq!(
        m.get(&("pump-de".to_string(), "1x".to_string()))
            .map(|m| m.latched)
            .unwrap_or_default(),
        Severity::Normal
    );
    assert!(r.events.iter().any(|e| e.kind == EventKind::State));
}
