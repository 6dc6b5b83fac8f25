//! Captures: the history ring, the builder, BWF1 waveform files read back by
//! the project's own BWF1 decoder (CRC-32 checked), atomic writes, start-up
//! cleaning, retention and id validation. The crash test kills a real child
//! process (SIGKILL) while it writes captures and journal events.

#![allow(clippy::unwrap_used)] // tests may unwrap: a panic is a failed test

mod alarm_common;

use std::fs;
use std::path::Path;
use std::process::{Command, Stdio};
use std::time::{Duration, Instant};

use alarm_common::{names, TempDir};
use bandwatch::alarm::capture::{
    capture_id, list, read_meta, read_waveform, validate_id, BandAtTrip, CaptureBuilder,
    CaptureError, CaptureStore, EndReason, HistoryRing, Retention, SpectrumAtTrip, TripInfo,
};
use bandwatch::alarm::journal::{alarm_memories, Event, EventLimits, Journal, JournalLimits};
use bandwatch::alarm::state::{AlarmMemory, AlarmState, Cause, Severity, Transition};
use bandwatch::frame::bwf1::StreamDecoder;
use bandwatch::frame::Samples;

const FS: f64 = 25_600.0;
const T0: u64 = 1_767_225_600_000_000_000;

fn trip(id_ns: u64) -> TripInfo {
    TripInfo {
        unix_ns: id_ns,
        time: bandwatch::alarm::journal::rfc3339(id_ns),
        channel: "pump-de".into(),
        band: "bpfo".into(),
        unit: "g".into(),
        from: "normal".into(),
        to: "alert".into(),
        value: Some(0.8),
        limits: EventLimits {
            alert: Some(0.5),
            danger: Some(1.0),
        },
        at_sample: 0,
    }
}

/// Decodes a BWF1 file: (first_sample, timestamp_ns, samples) per frame.
fn decode(bytes: &[u8]) -> Vec<(u64, u64, Vec<f32>)> {
    let mut d = StreamDecoder::new();
    d.push(bytes);
    let mut out = Vec::new();
    let mut s = Samples::default();
    while let Some(h) = d.next_frame_into(&mut s).expect("a good frame") {
        assert_eq!(h.channels, 1);
        assert_eq!(h.sample_rate_hz, FS);
        let Samples::F32(v) = &s else {
            panic!("f32 expected, got {s:?}")
        };
        out.push((h.first_sample, h.timestamp_ns, v.clone()));
    }
    assert_eq!(d.stats().rejected_total(), 0);
    assert_eq!(d.buffered(), 0, "no trailing bytes");
    out
}

#[test]
fn history_ring_keeps_the_newest_samples_across_wraps() {
    let mut r = HistoryRing::new(1000, FS);
    let all: Vec<f32> = (0..3777).map(|i| i as f32).collect();
    let mut at = 0usize;
    for c in [1usize, 999, 7, 1000, 1500, 270] {
        r.push(at as u64, T0, &all[at..at + c]);
        at += c;
        let mut out = Vec::new();
        r.copy_newest_into(600, &mut out);
        let n = 600.min(at).min(1000);
        assert_eq!(out, all[at - n..at].to_vec(), "after {at}");
        assert_eq!(r.next_sample(), at as u64);
        assert_eq!(r.len(), at.min(1000));
    }
    // A jump in the stream index starts over.
    r.push(at as u64 + 10, T0, &[1.0, 2.0]);
    assert_eq!(r.len(), 2);
    assert_eq!(r.oldest_sample(), at as u64 + 10);
}

#[test]
fn capture_round_trips_through_bwf1_and_json() {
    let dir = TempDir::new("capture-rt");
    let (store, clean) = CaptureStore::open(
        dir.path(),
        Retention {
            max_count: 10,
            max_bytes: 1 << 30,
        },
    )
    .unwrap();
    assert_eq!((clean.temp_files, clean.orphans), (0, 0));
    let pre = 2 * FS as usize; // 2 s before
    let post = 3 * FS as usize; // 3 s after
    let wave = |i: u64| ((i as f64) * 0.001).sin() as f32;
    let mut ring = HistoryRing::new(pre, FS);
    let t_first = T0 + 1_000_000_000;
    let mut n = 1000u64; // the stream did not start at 0
    while n < 1000 + 4 * FS as u64 {
        let chunk: Vec<f32> = (n..n + 512).map(wave).collect();
        let ts = t_first + ((n - 1000) as f64 * 1e9 / FS) as u64;
        ring.push(n, ts, &chunk);
        n += 512;
    }
    let mut info = trip(T0 + 5_000_000_000);
    info.at_sample = ring.next_sample();
    let id = capture_id(info.unix_ns, "pump-de", "bpfo", "alert");
    let spectrum = SpectrumAtTrip {
        scaling: "power".into(),
        unit: "g".into(),
        f0_hz: 0.0,
        df_hz: 3.125,
        window: "hann".into(),
        nfft: 8,
        averages: 4,
        first_sample: 0,
        oldest_first_sample: None,
        end_sample: None,
        values: vec![0.0, 1.0, 0.5, 0.25, 0.0],
    };
    let mut b = CaptureBuilder::start(
        id.clone(),
        info.clone(),
        &ring,
        pre,
        post,
        Some(spectrum.clone()),
        vec![BandAtTrip {
            band: "bpfo".into(),
            value: 0.8,
            unit: "g".into(),
        }],
    );
    let trip_at = ring.next_sample();
    let mut done = false;
    while !done {
        let chunk: Vec<f32> = (n..n + 700).map(wave).collect();
        done = b.push(n, t_first + ((n - 1000) as f64 * 1e9 / FS) as u64, &chunk);
        n += 700;
    }
    let cap = b.finish(EndReason::Shutdown);
    assert_eq!(cap.end, EndReason::Complete);
    let (meta, pruned) = store.write(&cap).unwrap();
    assert_eq!(pruned, 0);
    assert!(meta.complete);
    assert_eq!(meta.waveform.samples as usize, pre + post);
    assert_eq!(meta.waveform.pre_samples as usize, pre);
    assert_eq!(meta.waveform.first_sample, trip_at - pre as u64);

    // Read back: files under final names only, metadata parses, frames
    // decode with valid CRCs, are contiguous and hold the exact samples.
    assert_eq!(
        names(dir.path()),
        vec![format!("{id}.bwf1"), format!("{id}.json")]
    );
    let m = read_meta(dir.path(), &id).unwrap();
    assert_eq!(m, meta);
    assert_eq!(m.spectrum.as_ref(), Some(&spectrum));
    let frames = decode(&read_waveform(dir.path(), &id).unwrap());
    assert_eq!(frames.len() as u32, m.waveform.frames);
    let mut expect_first = m.waveform.first_sample;
    let mut got = Vec::new();
    for (first, ts, v) in &frames {
        assert_eq!(*first, expect_first);
        let want_ts = t_first as f64 + (first - 1000) as f64 * 1e9 / FS;
        assert!(
            (*ts as f64 - want_ts).abs() < 2.0,
            "timestamp {ts} vs {want_ts}"
        );
        expect_first += v.len() as u64;
        got.extend_from_slice(v);
    }
    let want: Vec<f32> = (m.waveform.first_sample..m.waveform.first_sample + (pre + post) as u64)
        .map(wave)
        .collect();
    assert_eq!(got, want);

    let l = list(dir.path()).unwrap();
    assert_eq!(l.len(), 1);
    assert_eq!(l[0].id, id);
    assert_eq!(
        l[0].bytes,
        fs::metadata(dir.path().join(format!("{id}.bwf1")))
            .unwrap()
            .len()
            + fs::metadata(dir.path().join(format!("{id}.json")))
                .unwrap()
                .len()
    );
}

#[test]
fn gap_or_shutdown_ends_a_capture_early_and_says_so() {
    let mut ring = HistoryRing::new(100, FS);
    ring.push(0, T0, &[1.0; 100]);
    let mut b = CaptureBuilder::start("g".into(), trip(T0), &ring, 100, 1000, None, vec![]);
    assert!(!b.push(100, T0, &[2.0; 10]));
    // Samples that skip ahead: a gap.
    assert!(b.push(200, T0, &[3.0; 10]));
    let c = b.finish(EndReason::Shutdown);
    assert_eq!(c.end, EndReason::Gap);
    assert_eq!(c.samples.len(), 110);

    let mut b = CaptureBuilder::start("s".into(), trip(T0), &ring, 100, 1000, None, vec![]);
    b.push(100, T0, &[2.0; 10]);
    let c = b.finish(EndReason::Shutdown);
    assert_eq!(c.end, EndReason::Shutdown);
    let dir = TempDir::new("capture-short");
    let (store, _) = CaptureStore::open(
        dir.path(),
        Retention {
            max_count: 10,
            max_bytes: 1 << 30,
        },
    )
    .unwrap();
    let (meta, _) = store.write(&c).unwrap();
    assert!(!meta.complete);
    assert_eq!(meta.end_reason, "shutdown");
}

#[test]
fn start_up_removes_what_a_crash_left() {
    let dir = TempDir::new("capture-crash");
    let ret = Retention {
        max_count: 10,
        max_bytes: 1 << 30,
    };
    let (store, _) = CaptureStore::open(dir.path(), ret).unwrap();
    let mut ring = HistoryRing::new(10, FS);
    ring.push(0, T0, &[0.5; 10]);
    let good = CaptureBuilder::start("c1".into(), trip(T0), &ring, 10, 0, None, vec![])
        .finish(EndReason::Shutdown);
    store.write(&good).unwrap();
    // What a crash can leave: writes in progress, and a waveform renamed
    // before its metadata.
    fs::write(dir.path().join("c2.bwf1.tmp"), b"BWF1 half").unwrap();
    fs::write(dir.path().join("c2.json.tmp"), b"{\"version\":").unwrap();
    fs::write(dir.path().join("c3.bwf1"), b"BWF1 whole but alone").unwrap();
    assert_eq!(
        list(dir.path()).unwrap().len(),
        1,
        "incomplete ones are never listed"
    );
    drop(store);
    let (_, clean) = CaptureStore::open(dir.path(), ret).unwrap();
    assert_eq!((clean.temp_files, clean.orphans), (2, 1));
    assert_eq!(names(dir.path()), vec!["c1.bwf1", "c1.json"]);
    assert_eq!(list(dir.path()).unwrap()[0].id, "c1");
}

#[test]
fn retention_keeps_the_newest_by_count_and_bytes() {
    let dir = TempDir::new("capture-retention");
    let mut ring = HistoryRing::new(25_600, FS);
    ring.push(0, T0, &vec![0.25; 25_600]);
    let write = |store: &CaptureStore, k: u64| {
        let id = capture_id(T0 + k, "pump-de", "bpfo", "alert");
        let c = CaptureBuilder::start(id.clone(), trip(T0 + k), &ring, 25_600, 0, None, vec![])
            .finish(EndReason::Shutdown);
        store.write(&c).unwrap();
        id
    };
    let (store, _) = CaptureStore::open(
        dir.path(),
        Retention {
            max_count: 3,
            max_bytes: 1 << 30,
        },
    )
    .unwrap();
    let ids: Vec<String> = (0..5).map(|k| write(&store, k)).collect();
    let kept: Vec<String> = list(dir.path())
        .unwrap()
        .into_iter()
        .map(|c| c.id)
        .collect();
    assert_eq!(kept, ids[2..].to_vec());

    // One capture is ~100 kB: a 150 kB budget keeps one, never zero.
    let (store, _) = CaptureStore::open(
        dir.path(),
        Retention {
            max_count: 100,
            max_bytes: 150_000,
        },
    )
    .unwrap();
    let newest = write(&store, 9);
    let kept: Vec<String> = list(dir.path())
        .unwrap()
        .into_iter()
        .map(|c| c.id)
        .collect();
    assert_eq!(kept, vec![newest]);
    let (store, _) = CaptureStore::open(
        dir.path(),
        Retention {
            max_count: 100,
            max_bytes: 1000,
        },
    )
    .unwrap();
    let newest = write(&store, 10);
    assert_eq!(list(dir.path()).unwrap().len(), 1);
    assert_eq!(list(dir.path()).unwrap()[0].id, newest);
}

#[test]
fn ids_from_urls_cannot_escape_the_directory() {
    for bad in [
        "",
        "../etc/passwd",
        "a/b",
        "a\\b",
        ".json",
        "a.b",
        "%2e%2e",
        "x\0",
        &"x".repeat(201),
    ] {
        assert!(
            matches!(validate_id(bad), Err(CaptureError::BadId(_))),
            "{bad:?}"
        );
    }
    for good in ["c1", "00001767225600000000000-pump-de-bpfo-alert", "A_b-9"] {
        assert!(validate_id(good).is_ok());
    }
    let dir = TempDir::new("capture-ids");
    assert!(matches!(
        read_meta(dir.path(), "../x"),
        Err(CaptureError::BadId(_))
    ));
    assert!(matches!(
        read_meta(dir.path(), "nope"),
        Err(CaptureError::NotFound(_))
    ));
    let id = capture_id(T0, "pump de/../x", "b.p", "alert");
    assert!(validate_id(&id).is_ok(), "{id}");
}

// ---------------------------------------------------------------------------
// Crash: SIGKILL a process that is writing
// ---------------------------------------------------------------------------

const CHILD_ENV: &str = "BANDWATCH_CRASH_CHILD_DIR";

/// The child: journal a latched danger, then write captures and events in
/// a loop until killed.
#[test]
fn crash_child() {
    let Ok(dir) = std::env::var(CHILD_ENV) else {
        return; // only does something when started by the parent below
    };
    let dir = Path::new(&dir);
    let (mut j, _) = Journal::open(
        &dir.join("journal"),
        JournalLimits {
            max_bytes: 16384,
            max_files: 3,
        },
    )
    .unwrap();
    let t = Transition {
        at: 0.0,
        from: AlarmState::Normal,
        to: AlarmState::Danger,
        cause: Cause::Trip,
        value: Some(1.2),
    };
    let mem = AlarmMemory {
        latched: Severity::Danger,
        acknowledged: false,
    };
    j.append(Event::transition(
        "pump-de",
        "bpfo",
        &t,
        mem,
        EventLimits::default(),
        None,
        T0,
    ))
    .unwrap();
    fs::write(dir.join("latched"), b"").unwrap();
    let (store, _) = CaptureStore::open(
        &dir.join("captures"),
        Retention {
            max_count: 5,
            max_bytes: 1 << 30,
        },
    )
    .unwrap();
    let mut ring = HistoryRing::new(256_000, FS);
    ring.push(0, T0, &vec![0.1; 256_000]);
    for k in 0u64.. {
        let id = capture_id(T0 + k, "pump-de", "bpfo", "danger");
        let c = CaptureBuilder::start(id, trip(T0 + k), &ring, 256_000, 0, None, vec![])
            .finish(EndReason::Shutdown);
        store.write(&c).unwrap();
        let t = Transition {
            at: k as f64,
            from: AlarmState::Normal,
            to: AlarmState::Alert,
            cause: Cause::Trip,
            value: Some(0.6),
        };
        j.append(Event::transition(
            "pump-nde",
            "1x",
            &t,
            AlarmMemory::default(),
            EventLimits::default(),
            None,
            T0 + k,
        ))
        .unwrap();
    }
}

#[test]
fn sigkill_while_writing_leaves_latch_journal_and_no_half_capture() {
    let exe = std::env::current_exe().unwrap();
    for round in 0..6u64 {
        let dir = TempDir::new("capture-sigkill");
        let mut child = Command::new(&exe)
            .args(["--exact", "crash_child", "--nocapture", "--test-threads=1"])
            .env(CHILD_ENV, dir.path())
            .stdout(Stdio::null())
            .stderr(Stdio::null())
            .spawn()
            .unwrap();
        let deadline = Instant::now() + Duration::from_secs(30);
        let cap_dir = dir.path().join("captures");
        while !dir.path().join("latched").exists()
            || !names(&cap_dir).iter().any(|n| n.ends_with(".json"))
        {
            assert!(Instant::now() < deadline, "child never started");
            std::thread::sleep(Duration::from_millis(5));
        }
        // Let it get into its write loop, at a different point each round.
        std::thread::sleep(Duration::from_millis(100 + 37 * round));
        child.kill().unwrap(); // SIGKILL on Unix
        child.wait().unwrap();

        let before = names(&cap_dir);
        let (_, clean) = CaptureStore::open(
            &cap_dir,
            Retention {
                max_count: 5,
                max_bytes: 1 << 30,
            },
        )
        .unwrap();
        let after = names(&cap_dir);
        let temps = before.iter().filter(|n| n.ends_with(".tmp")).count();
        assert_eq!(temps, clean.temp_files as usize);
        // Only pairs remain: every waveform has its metadata and back.
        assert!(after.iter().all(|n| !n.ends_with(".tmp")), "{after:?}");
        for n in &after {
            let (stem, other) = match n.strip_suffix(".bwf1") {
                Some(s) => (s, "json"),
                None => (n.strip_suffix(".json").unwrap(), "bwf1"),
            };
            assert!(
                after.contains(&format!("{stem}.{other}")),
                "{n} alone in {after:?}"
            );
        }
        let listed = list(&cap_dir).unwrap();
        eprintln!(
            "round {round}: cleaned {clean:?}, {} complete captures",
            listed.len()
        );
        assert!(
            !listed.is_empty(),
            "round {round}: no capture finished before the kill"
        );
        for c in &listed {
            let m = read_meta(&cap_dir, &c.id).unwrap();
            let frames = decode(&read_waveform(&cap_dir, &c.id).unwrap());
            let n: usize = frames.iter().map(|f| f.2.len()).sum();
            assert_eq!(n as u64, m.waveform.samples);
        }
        let (_, r) = Journal::open(
            &dir.path().join("journal"),
            JournalLimits {
                max_bytes: 16384,
                max_files: 3,
            },
        )
        .unwrap();
        assert!(r.bad_lines <= 1, "only a torn last line may be bad");
        let m = alarm_memories(&r.events);
        assert_eq!(
            m.get(&("pump-de".to_string(), "bpfo".to_string())),
            Some(&AlarmMemory {
                latched: Severity::Danger,
                acknowledged: false
            }),
            "round {round}"
        );
    }
}

#[test]
fn history_covers_the_blocks_of_the_trip_average() {
    use bandwatch::alarm::capture::{history_blocks, span_samples};
    use bandwatch::config::AveragingMode;
    assert_eq!(history_blocks(AveragingMode::None, 4), 1);
    assert_eq!(history_blocks(AveragingMode::Linear, 4), 4);
    assert_eq!(history_blocks(AveragingMode::PeakHold, 7), 7);
    assert_eq!(history_blocks(AveragingMode::Exponential, 1), 1);
    // Exponential: the smallest K with (1 - 1/count)^K < 2^-24, the f32
    // resolution (IEEE 754 binary32: 24-bit significand).
    for count in [2u32, 4, 10, 100] {
        let k = history_blocks(AveragingMode::Exponential, count);
        let w = |k: usize| (1.0 - 1.0 / f64::from(count)).powi(k as i32);
        assert!(w(k) < 2f64.powi(-24), "count {count}: K {k}");
        assert!(
            w(k - 1) >= 2f64.powi(-24),
            "count {count}: K {k} is not the smallest"
        );
    }
    assert_eq!(history_blocks(AveragingMode::Exponential, 4), 58);
    // Block 8192, hop 2048 (overlap 0.75), linear 4: 8192 + 3·2048.
    assert_eq!(span_samples(8192, 2048, 4), 14_336);
    assert_eq!(span_samples(8192, 2048, 1), 8192);
}
