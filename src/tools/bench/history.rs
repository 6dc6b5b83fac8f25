//! The `history` phase (`bench --only history`, only when named: it writes
//! files): what the history costs (README "History", docs/history.md).
//!
//! - `dsp`: the DSP stage at `--history-channels` channels (default 1024)
//!   with 10 bands each, driven by hand on this thread as in the dsp phase,
//!   three rigs built by `pipeline::Builder` from the same config but for
//!   `[history]`: none; the defaults (a 60 s interval, a spectrum every
//!   600 s); and a stress setting (1 s, a spectrum every 10 s). The rigs
//!   run in alternating slices, so the ratios hold on a loaded machine;
//!   the writer threads run beside them on the other cores, as in the
//!   daemon. `lost` is the DSP throughput the history takes
//!   (1 − with/without), the target under 2 %. The records the
//!   writers wrote and dropped in the run are reported: a rig that dropped
//!   has measured nothing.
//! - `size`: a simulated day of the defaults for 16 channels of 10 bands
//!   (1440 intervals, 144 spectra of the rig's own published spectrum per
//!   channel), written through the store's statements, then the file's
//!   pages in use per channel per day, split into aggregates and spectra.
//! - `query`: into the same file, a year of one channel's 15 series as
//!   retention leaves them at the defaults (hourly rows for days 31..365,
//!   one a minute for the last 30); then the latency (p50, p99) of the
//!   two reads the history endpoints do most: a year's trend of one series
//!   merged to 1000 points, and a day's waterfall (144 stored spectra,
//!   512 columns), each on a fresh read-only connection as a request has.

use std::sync::Arc;
use std::time::{Duration, Instant};

use super::dsp::DspRig;
use super::input::{config_text, UNUSED_SOURCE};
use super::{io_err, BenchArgs, BenchError, Row, Summary, FS, G_PER_COUNT};
use crate::history::store::{self, SeriesIds};
use crate::history::{query, schema, Aggregate, IntervalRecord, SpectrumRecord, StoreReason};

/// Five bands more than the bench's own five: 10 per channel.
const EXTRA_BANDS: &str =
    "[[channel.band]]\nname = \"3x\"\nlo_hz = 70.0\nhi_hz = 80.0\nunit = \"mm/s\"\n\
[[channel.band]]\nname = \"vane-pass\"\nlo_hz = 165.0\nhi_hz = 180.0\nunit = \"mm/s\"\n\
[[channel.band]]\nname = \"low\"\nlo_hz = 2.0\nhi_hz = 10.0\nunit = \"mm/s\"\n\
[[channel.band]]\nname = \"mid\"\nlo_hz = 1000.0\nhi_hz = 3000.0\nunit = \"g\"\n\
[[channel.band]]\nname = \"high\"\nlo_hz = 3000.0\nhi_hz = 10000.0\nunit = \"g\"\n";

/// The bench config with 10 bands per channel and `history` (a TOML table
/// or nothing) in a fresh file under `dir`.
fn config(
    channels: usize,
    n: usize,
    history: Option<&str>,
    dir: &std::path::Path,
) -> Result<crate::config::Config, BenchError> {
    let text = config_text(channels, n, FS, UNUSED_SOURCE, 4, G_PER_COUNT);
    let mut parts = text.split("\n[[channel]]");
    let mut out = parts.next().unwrap_or_default().to_string();
    for p in parts {
        out.push_str("\n[[channel]]");
        out.push_str(p);
        out.push('\n');
        out.push_str(EXTRA_BANDS);
    }
    if let Some(h) = history {
        let file = dir.join(format!("history-{}.sqlite", h.len()));
        let _ = std::fs::remove_file(&file);
        out = out.replacen(
            "\n[[source]]",
            &format!(
                "\n[history]\nfile = {:?}\n{h}\n\n[[source]]",
                file.display().to_string()
            ),
            1,
        );
    }
    super::input::parse_config(&out)
}

pub(crate) fn history_phase(
    args: &BenchArgs,
    signal: &Arc<Vec<f32>>,
    rows: &mut Vec<Row>,
    notes: &mut Vec<String>,
) -> Result<(), BenchError> {
    let dir = std::env::temp_dir().join(format!("bandwatch-bench-history-{}", std::process::id()));
    std::fs::create_dir_all(&dir).map_err(io_err(format!("create {}", dir.display())))?;
    let result = phase(args, signal, rows, notes, &dir);
    let _ = std::fs::remove_dir_all(&dir);
    result
}

fn row(case: String, unit: &str, v: &[f64]) -> Row {
    Row {
        phase: "history".into(),
        case,
        unit: unit.into(),
        value: Summary::of(v),
        ratio: None,
        target: None,
    }
}

fn phase(
    args: &BenchArgs,
    signal: &Arc<Vec<f32>>,
    rows: &mut Vec<Row>,
    notes: &mut Vec<String>,
    dir: &std::path::Path,
) -> Result<(), BenchError> {
    let channels = args.history_channels;
    let repeats = args.repeats.max(1);
    let slice = Duration::from_secs_f64(args.work_seconds.max(0.05));
    let settings = [
        ("none", None),
        ("defaults 60 s / 600 s", Some("")),
        (
            "stress 1 s / 10 s",
            Some("interval_s = 1\nspectrum_every_s = 10"),
        ),
    ];
    eprintln!("bench: history setting up 3 × {channels} channels of 10 bands");
    let mut rigs = Vec::new();
    for (name, h) in &settings {
        let cfg = config(channels, args.n, *h, dir)?;
        let mut rig = DspRig::build(&cfg, signal.clone(), true)?;
        for _ in 0..8 {
            rig.round();
        }
        rigs.push((*name, rig));
    }
    let mut rates: Vec<Vec<f64>> = vec![Vec::new(); settings.len()];
    for _ in 0..repeats {
        let mut done = vec![(0u64, Duration::ZERO); settings.len()];
        // Alternating slices, ten per rig per repeat.
        for _ in 0..10 {
            for (k, (_, rig)) in rigs.iter_mut().enumerate() {
                let start = Instant::now();
                while start.elapsed() < slice / 10 {
                    let (n, t) = rig.round();
                    done[k].0 += n;
                    done[k].1 += t;
                }
            }
        }
        for (k, (n, t)) in done.iter().enumerate() {
            rates[k].push(*n as f64 / t.as_secs_f64().max(1e-9));
        }
    }
    for (k, (name, _)) in settings.iter().enumerate() {
        rows.push(row(
            format!("dsp {channels} ch × 10 bands, history {name}"),
            "samples/s",
            &rates[k],
        ));
        if k > 0 {
            let lost: Vec<f64> = rates[k]
                .iter()
                .zip(&rates[0])
                .map(|(w, o)| 100.0 * (1.0 - w / o))
                .collect();
            let mut r = row(format!("dsp throughput lost to history {name}"), "%", &lost);
            r.target = Some("< 2".into());
            rows.push(r);
        }
    }
    // What the writers did; a dropped record would make the run void.
    for (name, rig) in &rigs {
        let Some(h) = rig.history() else {
            continue;
        };
        let c = &h.counters;
        let dropped: u64 = crate::history::DropReason::ALL
            .iter()
            .map(|r| c.dropped(*r))
            .sum();
        notes.push(format!(
            "history {name}: {} aggregate rows and {} spectra written during the run, {dropped} records dropped",
            c.points_written.load(std::sync::atomic::Ordering::Relaxed),
            crate::history::StoreReason::ALL
                .iter()
                .map(|r| c.stored(*r))
                .sum::<u64>()
        ));
        if dropped > 0 {
            return Err(BenchError::Lost(format!(
                "history {name}: {dropped} records dropped"
            )));
        }
    }
    // The spectrum a channel really publishes, for the size rows.
    let power = rigs[0]
        .1
        .shared()
        .next()
        .and_then(|s| s.snapshot.load_full())
        .map(|s| s.power.clone())
        .unwrap_or_default();
    drop(rigs);
    size_rows(args, &power, rows, notes, dir)
}

/// A simulated day of the defaults for 16 channels: bytes per channel per
/// day, aggregates and spectra.
fn size_rows(
    args: &BenchArgs,
    power: &[f32],
    rows: &mut Vec<Row>,
    notes: &mut Vec<String>,
    dir: &std::path::Path,
) -> Result<(), BenchError> {
    const CH: usize = 16;
    let cfg = config(CH, args.n, Some(""), dir)?;
    let Some(hs) = cfg.history.clone() else {
        return Err(BenchError::Config("no [history]".into()));
    };
    let file = dir.join("size.sqlite");
    let _ = std::fs::remove_file(&file);
    let sql = |e: rusqlite::Error| BenchError::Lost(format!("history size: {e}"));
    let mut conn = schema::open_write(&file).map_err(|e| BenchError::Lost(e.to_string()))?;
    let specs: Vec<_> = cfg.channels.iter().map(|c| Arc::new(c.clone())).collect();
    let mut ids = SeriesIds::default();
    let t0 = 1_767_225_600u64;
    let interval = u64::from(hs.interval_s);
    let every = u64::from(hs.spectrum_every_s);
    let started = Instant::now();
    let mut rng = 0x9E37_79B9_7F4A_7C15u64;
    for block in 0..(86_400 / 3600) {
        let tx = conn.transaction().map_err(sql)?;
        for t in (block * 3600..(block + 1) * 3600).step_by(interval as usize) {
            for spec in &specs {
                let mut series = vec![Aggregate::default(); 5 + spec.bands.len()];
                for (k, a) in series.iter_mut().enumerate() {
                    // Values that move as a band's do: 3 significant
                    // digits of noise on a level.
                    for _ in 0..48 {
                        rng ^= rng << 13;
                        rng ^= rng >> 7;
                        rng ^= rng << 17;
                        let v =
                            (1 + k) as f64 * (1.0 + (rng >> 40) as f64 / (1u64 << 24) as f64 * 0.1);
                        a.add(v, Some(0));
                    }
                }
                let rec = IntervalRecord {
                    spec: spec.clone(),
                    t_s: t0 + t,
                    span_s: hs.interval_s,
                    series,
                    lost: None,
                };
                store::insert_interval(&tx, &mut ids, &rec).map_err(sql)?;
                if t % every == 0 {
                    let rec = SpectrumRecord {
                        spec: spec.clone(),
                        enbw_bins: 1.5,
                        reason: StoreReason::Interval,
                        event: None,
                        t_ns: (t0 + t) * 1_000_000_000,
                        published_ns: (t0 + t) * 1_000_000_000,
                        averages: 4,
                        first_sample: 0,
                        oldest_first_sample: 0,
                        speed_hz: None,
                        power: power.to_vec(),
                        envelope: Vec::new(),
                        bands: Vec::new(),
                        lost: None,
                    };
                    store::insert_spectrum(&tx, &rec).map_err(sql)?;
                }
            }
        }
        tx.commit().map_err(sql)?;
    }
    let took = started.elapsed();
    let used = store::used_bytes(&conn).map_err(sql)? as f64;
    let blobs: i64 = conn
        .query_row("SELECT coalesce(sum(bytes), 0) FROM spectra", [], |r| {
            r.get(0)
        })
        .map_err(sql)?;
    let points: i64 = conn
        .query_row("SELECT count(*) FROM points", [], |r| r.get(0))
        .map_err(sql)?;
    let per_ch = used / CH as f64;
    rows.push(row(
        "file per channel per day (defaults, 10 bands)".into(),
        "bytes",
        &[per_ch],
    ));
    rows.push(row(
        "  of which spectrum blobs".into(),
        "bytes",
        &[blobs as f64 / CH as f64],
    ));
    rows.push(row(
        "  aggregate rows per channel per day".into(),
        "rows",
        &[points as f64 / CH as f64],
    ));
    rows.push(row(
        "write a simulated day (16 ch)".into(),
        "s",
        &[took.as_secs_f64()],
    ));
    notes.push(format!(
        "history size: one simulated day at the defaults for {CH} channels of 10 bands (+5 overall series), one transaction an hour; spectra of {} lines from the rig's own published spectrum ({} bytes raw each)",
        power.len(),
        4 * power.len()
    ));
    drop(conn);
    query_rows(&cfg, &file, t0, rows, notes)
}

/// The `q`-quantile (0..=1) of `v` by the nearest rank.
fn quantile(v: &[f64], q: f64) -> f64 {
    let mut s: Vec<f64> = v.to_vec();
    s.sort_by(f64::total_cmp);
    if s.is_empty() {
        return f64::NAN;
    }
    let rank = ((q * s.len() as f64).ceil() as usize).clamp(1, s.len());
    s[rank - 1]
}

/// A year of the first channel's series before `t0` (module docs), then
/// the query latencies.
fn query_rows(
    cfg: &crate::config::Config,
    file: &std::path::Path,
    t0: u64,
    rows: &mut Vec<Row>,
    notes: &mut Vec<String>,
) -> Result<(), BenchError> {
    const DAY: u64 = 86_400;
    const RUNS: usize = 200;
    let sql = |e: rusqlite::Error| BenchError::Lost(format!("history query: {e}"));
    let open = |e: schema::OpenError| BenchError::Lost(format!("history query: {e}"));
    let qerr = |e: query::QueryError| BenchError::Lost(format!("history query: {e}"));
    let Some(spec) = cfg.channels.first().map(|c| Arc::new(c.clone())) else {
        return Err(BenchError::Config("no channel".into()));
    };
    let mut conn = schema::open_write(file).map_err(open)?;
    let before = store::used_bytes(&conn).map_err(sql)?;
    let mut ids = SeriesIds::default();
    let year_start = t0 - 365 * DAY;
    let thin_from = t0 - 30 * DAY;
    let mut written = 0usize;
    let mut t = year_start;
    while t < t0 {
        let tx = conn.transaction().map_err(sql)?;
        let end = (t + DAY).min(t0);
        while t < end {
            let span: u32 = if t < thin_from { 3600 } else { 60 };
            let series = (0..5 + spec.bands.len())
                .map(|k| {
                    let mut a = Aggregate::default();
                    // A slow rise with a daily swing, as a band's level.
                    let v = (1 + k) as f64
                        * (1.0 + (t - year_start) as f64 / (365.0 * DAY as f64))
                        * (1.0
                            + 0.05 * ((t % DAY) as f64 / DAY as f64 * std::f64::consts::TAU).sin());
                    a.add(v, Some(0));
                    a
                })
                .collect();
            let rec = IntervalRecord {
                spec: spec.clone(),
                t_s: t,
                span_s: span,
                series,
                lost: None,
            };
            store::insert_interval(&tx, &mut ids, &rec).map_err(sql)?;
            written += 5 + spec.bands.len();
            t += u64::from(span);
        }
        tx.commit().map_err(sql)?;
    }
    // The year's pages against what `check` estimates for one channel.
    let year_bytes = store::used_bytes(&conn)
        .map_err(sql)?
        .saturating_sub(before);
    drop(conn);
    if let Some(h) = &cfg.history {
        let est = crate::history::sizing::estimate(h, std::slice::from_ref(&*spec));
        rows.push(row(
            "a year of one channel's aggregates, file".into(),
            "bytes",
            &[year_bytes as f64],
        ));
        let mut r = row(
            "  bytes per row (check's estimate uses history::sizing::ROW_BYTES)".into(),
            "bytes",
            &[year_bytes as f64 / est.rows.max(1) as f64],
        );
        r.target = Some(format!("<= {}", crate::history::sizing::ROW_BYTES));
        rows.push(r);
    }
    let name = spec.name.clone();
    let (to_s, from_s) = ((t0 + DAY) as i64, (t0 + DAY - 365 * DAY) as i64);
    let mut trend_ms = Vec::with_capacity(RUNS);
    let mut trend_rows = 0;
    for _ in 0..RUNS {
        let start = Instant::now();
        let conn = schema::open_read(file).map_err(open)?;
        let got =
            query::series_points(&conn, &name, "overall-rms", from_s, to_s, 1000).map_err(qerr)?;
        trend_ms.push(start.elapsed().as_secs_f64() * 1e3);
        trend_rows = got.stored;
    }
    let ask = query::WaterfallAsk {
        from_ns: (t0 as i64) * 1_000_000_000,
        to_ns: ((t0 + DAY) as i64) * 1_000_000_000,
        fmin_hz: None,
        fmax_hz: None,
        columns: 512,
        envelope: false,
        max_spectra: 200,
    };
    let mut fall_ms = Vec::with_capacity(RUNS / 4);
    let mut fall_rows = 0;
    for _ in 0..RUNS / 4 {
        let start = Instant::now();
        let conn = schema::open_read(file).map_err(open)?;
        let got = query::waterfall(&conn, &name, &ask).map_err(qerr)?;
        fall_ms.push(start.elapsed().as_secs_f64() * 1e3);
        fall_rows = got.map_or(0, |w| w.rows.len());
    }
    for (what, v) in [
        (
            format!("query a year's trend ({trend_rows} rows -> 1000 points)"),
            &trend_ms,
        ),
        (
            format!("query a day's waterfall ({fall_rows} spectra x 512 columns)"),
            &fall_ms,
        ),
    ] {
        rows.push(row(format!("{what} p50"), "ms", &[quantile(v, 0.5)]));
        rows.push(row(format!("{what} p99"), "ms", &[quantile(v, 0.99)]));
    }
    notes.push(format!(
        "history query: {written} aggregate rows of a year written for one channel beside the simulated day; {RUNS} trend and {} waterfall reads, each opening its own read-only connection",
        RUNS / 4
    ));
    Ok(())
}
