//! The history file over time (README "History", docs/history.md):
//! a simulated year written through the store's own statements with a
//! clock the test controls, retention run at the end of each simulated
//! day; and the writer thread riding out a file it cannot open.
//!
//! What is checked against something outside the code under test: the
//! thinned hourly rows against aggregates the test computes itself from
//! the raw values it generated; the file's size against the bound read
//! back from SQLite's own page counts and the file system.

#![allow(clippy::unwrap_used)] // tests may unwrap: a panic is a failed test

mod alarm_common;

use std::collections::BTreeMap;
use std::sync::atomic::Ordering;
use std::sync::Arc;
use std::time::{Duration, Instant};

use alarm_common::TempDir;
use bandwatch::config::{parse_str, ChannelSpec, HistorySpec};
use bandwatch::dsp::bands::BandValue;
use bandwatch::history::store::{self, SeriesIds};
use bandwatch::history::{
    schema, Aggregate, DropReason, History, IntervalRecord, SpectrumRecord, StoreReason,
};
use rusqlite::params;

const DAY: u64 = 86_400;
/// 2026-01-01T00:00:00Z.
const T0: u64 = 1_767_225_600;

fn config(file: &std::path::Path, extra: &str) -> bandwatch::config::Config {
    let text = format!(
        r#"
[server]
listen = "127.0.0.1:0"

[history]
file = "{}"
{extra}

[[source]]
name = "daq"
kind = "udp"
listen = "127.0.0.1:0"
channels = 1
sample_rate_hz = 25600

[[channel]]
name = "pump-de"
source = "daq"
index = 0
unit = "g"
block = 1024

  [[channel.band]]
  name = "1x"
  lo_hz = 20
  hi_hz = 30

  [[channel.band]]
  name = "bpfo"
  lo_hz = 80
  hi_hz = 100
"#,
        file.display()
    );
    parse_str(&text).unwrap_or_else(|e| panic!("{e:?}"))
}

/// A small deterministic generator (64-bit LCG, Knuth's MMIX constants).
struct Lcg(u64);
impl Lcg {
    fn next(&mut self) -> f64 {
        self.0 = self
            .0
            .wrapping_mul(6_364_136_223_846_793_005)
            .wrapping_add(1_442_695_040_888_963_407);
        (self.0 >> 11) as f64 / (1u64 << 53) as f64
    }
}

/// The raw values of series `k` in the interval starting at `t`: ten
/// results, the level drifting over the year.
fn raw_values(k: usize, t: u64, rng: &mut Lcg) -> Vec<f64> {
    let base = 1.0 + 0.1 * k as f64 + ((t - T0) as f64 / (50.0 * DAY as f64)).sin();
    (0..10).map(|_| base + 0.2 * rng.next()).collect()
}

fn spectrum(spec: &Arc<ChannelSpec>, t: u64, reason: StoreReason, rng: &mut Lcg) -> SpectrumRecord {
    SpectrumRecord {
        spec: spec.clone(),
        enbw_bins: 1.5,
        reason,
        event: (reason == StoreReason::Alarm).then(|| "bpfo normal->alert".to_string()),
        t_ns: t * 1_000_000_000,
        published_ns: t * 1_000_000_000,
        averages: 4,
        first_sample: 0,
        oldest_first_sample: 0,
        speed_hz: Some(24.75),
        power: (0..spec.bins()).map(|_| rng.next() as f32 * 1e-3).collect(),
        envelope: Vec::new(),
        bands: vec![BandValue::default(); spec.bands.len()],
        lost: None,
    }
}

/// Retention over a simulated year and a half: the file stays within its
/// bound after every pass; the reference and the alarm spectra stay
/// however old; retention deletes oldest first; aggregates older than
/// keep_days go, those older than thin_after_days are hourly and equal
/// the test's own aggregation of the raw values.
#[test]
fn a_simulated_year_stays_within_its_bound() {
    let dir = TempDir::new("history-year");
    let file = dir.path().join("h.sqlite");
    let cfg = config(
        &file,
        "interval_s = 300\nkeep_days = 365\nthin_after_days = 30\nspectra_keep_days = 365\nmax_mb = 16",
    );
    let hs: HistorySpec = cfg.history.clone().unwrap();
    let spec = Arc::new(cfg.channels[0].clone());
    let mut conn = schema::open_write(&file).unwrap();
    let mut ids = SeriesIds::default();
    let mut rng = Lcg(7);
    let series = 5 + spec.bands.len();
    let mut kept_ids = Vec::new();
    let mut deletable = Vec::new();
    let days = 550u64;
    for d in 0..days {
        let tx = conn.transaction().unwrap();
        for i in 0..(DAY / 300) {
            let t = T0 + d * DAY + i * 300;
            let mut aggs = vec![Aggregate::default(); series];
            for (k, a) in aggs.iter_mut().enumerate() {
                for v in raw_values(k, t, &mut rng) {
                    a.add(v, Some(0));
                }
            }
            let rec = IntervalRecord {
                spec: spec.clone(),
                t_s: t,
                span_s: 300,
                series: aggs,
                lost: None,
            };
            store::insert_interval(&tx, &mut ids, &rec).unwrap();
        }
        for q in 0..(DAY / 900) {
            let t = T0 + d * DAY + q * 900;
            let reason = if d == 2 && q < 3 {
                StoreReason::Alarm
            } else {
                StoreReason::Interval
            };
            let id = store::insert_spectrum(&tx, &spectrum(&spec, t, reason, &mut rng)).unwrap();
            if reason == StoreReason::Alarm {
                kept_ids.push(id);
            } else {
                deletable.push((t, id));
            }
        }
        tx.commit().unwrap();
        if d == 1 {
            let id = deletable.pop().unwrap().1;
            assert!(store::mark_reference(&mut conn, id).unwrap().is_some());
            kept_ids.push(id);
        }
        let now = T0 + (d + 1) * DAY;
        let r = store::retain(&mut conn, &hs, now).unwrap();
        assert!(
            r.used_bytes <= hs.max_bytes,
            "day {d}: {} bytes in use over the bound {}",
            r.used_bytes,
            hs.max_bytes
        );
        assert!(!r.over_bound, "day {d}");
    }
    conn.execute_batch("PRAGMA wal_checkpoint(TRUNCATE);")
        .unwrap();
    let on_disk = std::fs::metadata(&file).unwrap().len();
    assert!(on_disk <= hs.max_bytes, "{on_disk} bytes on disk");

    // References and alarm spectra survive; the other spectra left are
    // the newest ones, without a gap (oldest first).
    for id in &kept_ids {
        let n: i64 = conn
            .query_row("SELECT count(*) FROM spectra WHERE id = ?1", [id], |r| {
                r.get(0)
            })
            .unwrap();
        assert_eq!(n, 1, "kept spectrum {id} was deleted");
    }
    let left: Vec<i64> = conn
        .prepare("SELECT id FROM spectra WHERE reference = 0 AND reason = 'interval' ORDER BY t_ns")
        .unwrap()
        .query_map([], |r| r.get(0))
        .unwrap()
        .map(Result::unwrap)
        .collect();
    assert!(!left.is_empty() && left.len() < deletable.len());
    let newest: Vec<i64> = deletable[deletable.len() - left.len()..]
        .iter()
        .map(|x| x.1)
        .collect();
    assert_eq!(left, newest, "retention did not delete oldest first");

    // keep_days: nothing older than 365 days before the last pass.
    let now = T0 + days * DAY;
    let oldest: i64 = conn
        .query_row("SELECT min(t) FROM points", [], |r| r.get(0))
        .unwrap();
    assert!(
        oldest as u64 >= now - 365 * DAY,
        "a point {oldest} older than a year"
    );
    // thin_after_days: hourly rows before the bound, 5-minute rows after.
    let bound = (now - 30 * DAY) as i64;
    let (short_old, long_new): (i64, i64) = conn
        .query_row(
            "SELECT (SELECT count(*) FROM points WHERE t < ?1 - 3600 AND span <> 3600),
                    (SELECT count(*) FROM points WHERE t >= ?1 + 3600 AND span = 3600)",
            [bound],
            |r| Ok((r.get(0)?, r.get(1)?)),
        )
        .unwrap();
    assert_eq!((short_old, long_new), (0, 0));
}

/// The test's own aggregate of an hour of raw values.
#[derive(Clone)]
struct Hour {
    n: u32,
    min: f64,
    max: f64,
    sum: f64,
    last: f64,
}

impl Default for Hour {
    fn default() -> Hour {
        Hour {
            n: 0,
            min: f64::INFINITY,
            max: f64::NEG_INFINITY,
            sum: 0.0,
            last: f64::NAN,
        }
    }
}

/// One row of `points` as read back.
struct Row {
    t: i64,
    span: i64,
    n: u32,
    min: f64,
    mean: f64,
    max: f64,
    last: f64,
    state: i64,
    n_bad: i64,
}

/// The thinning itself, on a short run: an hour of 5-minute rows becomes
/// one row equal to the test's own aggregation of the raw values.
#[test]
fn thinned_hours_equal_the_raw_aggregates() {
    let dir = TempDir::new("history-thin");
    let file = dir.path().join("h.sqlite");
    let cfg = config(
        &file,
        "interval_s = 300\nkeep_days = 60\nthin_after_days = 30",
    );
    let hs = cfg.history.clone().unwrap();
    let spec = Arc::new(cfg.channels[0].clone());
    let mut conn = schema::open_write(&file).unwrap();
    let mut ids = SeriesIds::default();
    let mut rng = Lcg(11);
    let series = 5 + spec.bands.len();
    let mut expected: Vec<BTreeMap<u64, Hour>> = vec![BTreeMap::new(); series];
    let tx = conn.transaction().unwrap();
    for i in 0..(2 * DAY / 300) {
        let t = T0 + i * 300;
        let mut aggs = vec![Aggregate::default(); series];
        for (k, a) in aggs.iter_mut().enumerate() {
            let mut vals = raw_values(k, t, &mut rng);
            // A result without a value now and then (an order band
            // without speed): counted in n_bad, not in the statistics.
            if i % 7 == 3 {
                vals.truncate(9);
                a.add(f64::NAN, Some(1));
            }
            for v in &vals {
                a.add(*v, Some(0));
            }
            let e = expected[k].entry(t - t % 3600).or_default();
            e.n += vals.len() as u32;
            e.min = vals.iter().copied().fold(e.min, f64::min);
            e.max = vals.iter().copied().fold(e.max, f64::max);
            e.sum += vals.iter().sum::<f64>();
            e.last = *vals.last().unwrap();
        }
        let rec = IntervalRecord {
            spec: spec.clone(),
            t_s: t,
            span_s: 300,
            series: aggs,
            lost: None,
        };
        store::insert_interval(&tx, &mut ids, &rec).unwrap();
    }
    tx.commit().unwrap();
    // Thin everything: "now" is 32 days after the data's end.
    let r = store::retain(&mut conn, &hs, T0 + 2 * DAY + 32 * DAY).unwrap();
    assert_eq!(r.points_thinned, 2 * DAY / 300 * series as u64);
    let mut stmt = conn
        .prepare(
            "SELECT p.t, p.span, p.n, p.min, p.mean, p.max, p.last, p.state, p.n_bad
             FROM points p JOIN series s ON s.id = p.series
             WHERE s.channel = 'pump-de' AND s.name = ?1 ORDER BY p.t",
        )
        .unwrap();
    for (k, name) in [
        "overall-rms",
        "overall-peak",
        "overall-peak-to-peak",
        "overall-crest-factor",
        "overall-mean",
        "1x",
        "bpfo",
    ]
    .iter()
    .enumerate()
    {
        let rows: Vec<Row> = stmt
            .query_map(params![name], |r| {
                Ok(Row {
                    t: r.get(0)?,
                    span: r.get(1)?,
                    n: r.get(2)?,
                    min: r.get(3)?,
                    mean: r.get(4)?,
                    max: r.get(5)?,
                    last: r.get(6)?,
                    state: r.get(7)?,
                    n_bad: r.get(8)?,
                })
            })
            .unwrap()
            .map(Result::unwrap)
            .collect();
        assert_eq!(rows.len(), 48, "{name}: one row an hour");
        for Row {
            t,
            span,
            n,
            min,
            mean,
            max,
            last,
            state,
            n_bad,
        } in rows
        {
            let e = &expected[k][&(t as u64)];
            assert_eq!(span, 3600);
            assert_eq!(n, e.n, "{name} {t}");
            assert_eq!(min, e.min, "{name} {t}: min");
            assert_eq!(max, e.max, "{name} {t}: max");
            assert_eq!(last, e.last, "{name} {t}: last");
            let m = e.sum / f64::from(e.n);
            assert!(
                (mean - m).abs() <= 1e-12 * m.abs(),
                "{name} {t}: mean {mean} vs {m}"
            );
            // An hour holding a result with an alarm at alert is alert.
            let had_bad = (0..12).any(|j| ((t as u64 - T0) / 300 + j) % 7 == 3);
            assert_eq!(state, i64::from(had_bad), "{name} {t}: state");
            assert_eq!(n_bad > 0, had_bad);
        }
    }
}

/// The writer thread with a file it cannot open (its directory does not
/// exist yet): records are counted as lost (write_error), nothing stops;
/// once the directory exists the writer opens the file, writes on, and
/// records the outage as a hole for the channel.
#[test]
fn the_writer_rides_out_a_file_it_cannot_open() {
    let dir = TempDir::new("history-outage");
    let sub = dir.path().join("later");
    let file = sub.join("h.sqlite");
    let cfg = config(&file, "interval_s = 1\nspectrum_every_s = 0");
    let spec = Arc::new(cfg.channels[0].clone());
    let history = History::start(cfg.history.clone().unwrap()).unwrap();
    let shared = history.shared.clone();
    let mut tap = history.tap(spec.clone(), 1.5).unwrap();
    let overall = bandwatch::dsp::stats::Overall::default();
    let bands = vec![BandValue::default(); 2];
    let c = &shared.counters;
    // Ten intervals into a file that cannot be opened.
    for s in 0..10 {
        tap.push(T0 + s, &overall, &bands);
    }
    let deadline = Instant::now() + Duration::from_secs(10);
    while c.dropped(DropReason::WriteError) < 9 {
        assert!(Instant::now() < deadline, "no write_error drops counted");
        std::thread::sleep(Duration::from_millis(20));
    }
    assert!(c.write_errors.load(Ordering::Relaxed) >= 1);
    assert_eq!(c.points_written.load(Ordering::Relaxed), 0);
    // The directory appears; the writer retries within RETRY.
    std::fs::create_dir_all(&sub).unwrap();
    let deadline = Instant::now() + bandwatch::history::writer::RETRY + Duration::from_secs(10);
    let mut s = 10;
    while c.points_written.load(Ordering::Relaxed) == 0 {
        assert!(Instant::now() < deadline, "the writer did not resume");
        tap.push(T0 + s, &overall, &bands);
        s += 1;
        std::thread::sleep(Duration::from_millis(100));
    }
    drop(tap);
    drop(history);
    let lost = c.dropped(DropReason::WriteError);
    let conn = schema::open_read(&file).unwrap();
    let (from, to, n): (i64, i64, i64) = conn
        .query_row(
            "SELECT min(t_from), max(t_to), sum(lost) FROM holes
             WHERE channel = 'pump-de' AND reason = 'write_error'",
            [],
            |r| Ok((r.get(0)?, r.get(1)?, r.get(2)?)),
        )
        .unwrap();
    assert_eq!(n as u64, lost, "every lost record is in a hole");
    assert_eq!(from as u64, T0);
    assert!(to as u64 >= T0 + 9);
    // Every interval after the hole is there: none lost silently.
    let written: i64 = conn
        .query_row(
            "SELECT count(DISTINCT t) FROM points WHERE t >= ?1",
            [to],
            |r| r.get(0),
        )
        .unwrap();
    // Intervals T0 .. T0 + s - 1, the last one flushed when the tap went.
    assert_eq!(
        written as u64 + lost,
        s,
        "written {written} + lost {lost} != {s}"
    );
}

/// A channel driven by hand through the daemon's own pipeline: a tone
/// that trips its band's alert. The history gets a spectrum stored at the
/// transition (reason `alarm`, the event naming it), and aggregate rows
/// whose state says alert for the band and nothing (no alarm) for an
/// overall level without one.
#[test]
fn an_alarm_transition_stores_a_spectrum_and_states() {
    use bandwatch::pipeline::{AlarmMode, Builder, RingSize};
    let dir = TempDir::new("history-alarm");
    let file = dir.path().join("h.sqlite");
    let text = format!(
        r#"
[server]
listen = "127.0.0.1:0"
[alarms]
storage_dir = "/nonexistent-not-used"
[history]
file = "{}"
interval_s = 1
spectrum_every_s = 0
[[source]]
name = "s"
kind = "sim"
[[channel]]
name = "c"
source = "s"
index = 0
unit = "g"
block = 1024
overlap = 0.0
averaging = {{ mode = "none" }}
health = {{ recover_s = 0.2 }}
  [[channel.band]]
  name = "all"
  lo_hz = 10
  hi_hz = 12000
    [channel.band.alarm]
    alert = {{ limit = 0.5 }}
    danger = {{ limit = 1.0 }}
"#,
        file.display()
    );
    let cfg = parse_str(&text).unwrap_or_else(|e| panic!("{e:?}"));
    let mut p = Builder::new(&cfg)
        .ring(RingSize::Headroom(1 << 20))
        .alarms(AlarmMode::InMemory)
        .gather(false)
        .assemble()
        .unwrap()
        .inline();
    let mut w = p.take_inputs().pop().unwrap().writer;
    // 3 s of a 500 Hz tone of 1.2 g peak (0.85 g RMS: above alert, below
    // danger), in 0.1 s pieces, over about 2.5 s of wall clock so that
    // the results fall in more than one 1 s interval.
    let step = 2560usize;
    for k in 0..30u64 {
        let s = k * step as u64;
        let x: Vec<f32> = (0..step)
            .map(|i| {
                (1.2 * (2.0 * std::f64::consts::PI * 500.0 * (s + i as u64) as f64 / 25_600.0)
                    .sin()) as f32
            })
            .collect();
        w.write(s, 1_800_000_000_000_000_000 + s * 39_062, &x);
        p.drain();
        std::thread::sleep(Duration::from_millis(80));
    }
    drop(w);
    drop(p); // the taps hand over their intervals, the writer writes them
    let conn = schema::open_read(&file).unwrap();
    let events: Vec<(String, Option<String>, i64)> = conn
        .prepare("SELECT reason, event, lines FROM spectra WHERE channel = 'c'")
        .unwrap()
        .query_map([], |r| Ok((r.get(0)?, r.get(1)?, r.get(2)?)))
        .unwrap()
        .map(Result::unwrap)
        .collect();
    assert!(
        events.iter().any(|(reason, event, lines)| reason == "alarm"
            && event
                .as_deref()
                .is_some_and(|e| e.starts_with("all ") && e.ends_with("->alert"))
            && *lines == 513),
        "no spectrum stored at the trip: {events:?}"
    );
    assert!(events.iter().all(|(r, ..)| r == "alarm"), "{events:?}");
    let states: Vec<(String, Option<i64>)> = conn
        .prepare(
            "SELECT s.name, max(p.state) FROM points p JOIN series s ON s.id = p.series
             WHERE s.channel = 'c' GROUP BY s.name ORDER BY s.name",
        )
        .unwrap()
        .query_map([], |r| Ok((r.get(0)?, r.get(1)?)))
        .unwrap()
        .map(Result::unwrap)
        .collect();
    let of = |n: &str| states.iter().find(|(s, _)| s == n).map(|x| x.1);
    assert_eq!(of("all"), Some(Some(1)), "{states:?}");
    assert_eq!(of("overall-rms"), Some(None), "{states:?}");
}
