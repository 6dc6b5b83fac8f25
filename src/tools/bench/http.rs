//! The `http` phase: `/metrics` render time and body size, and `/metrics`
//! and spectrum latency at fixed request rates (served by the real router
//! on loopback) while the DSP runs flat out, paced to real time, or not at
//! all, and what that load costs the DSP. The channels are one pipeline
//! from `pipeline::Builder` (alarms in memory), its DSPs split over two
//! threads.

use std::sync::atomic::{AtomicBool, AtomicU64, Ordering};
use std::sync::Arc;
use std::time::{Duration, Instant};

use serde::Serialize;

use crate::config::Config;
use crate::pipeline;
use crate::pipeline::state::AppState;

use super::dsp::{inline_pipeline, take_writers, DspRig};
use super::input::{parse_config, UNUSED_SOURCE};
use super::{fmt_rate, io_err, BenchArgs, BenchError, Row, Summary, FS, G_PER_COUNT, OVERLAP};

/// Seconds a rate round may run past `--seconds` before the requests still
/// waiting are counted as unsent.
const HTTP_GRACE_S: f64 = 2.0;

/// Most channels `--http-channels` takes (4 × the 1024 of one source).
pub(crate) const MAX_HTTP_CHANNELS: usize = 8192;

/// How the two DSP threads run while the http phase measures.
#[derive(Debug, Clone, Copy, PartialEq, Eq, clap::ValueEnum)]
pub enum DspLoad {
    /// As fast as they can: both cores saturated (harsher than a plant).
    Flat,
    /// At the channels' real-time rate (each channel gets 25 600 samples per
    /// second of wall time), sleeping when ahead: the load of the target.
    Paced,
    /// No DSP work during the round: what serving alone costs and reaches.
    Idle,
}

impl DspLoad {
    fn as_str(self) -> &'static str {
        match self {
            DspLoad::Flat => "flat",
            DspLoad::Paced => "paced",
            DspLoad::Idle => "idle",
        }
    }
}

#[derive(Debug, Clone, Serialize)]
pub(crate) struct HttpProbe {
    pub(crate) requests: u64,
    pub(crate) errors: u64,
    pub(crate) non_200: u64,
    pub(crate) metrics_ms: Vec<f64>,
    pub(crate) spectrum_ms: Vec<f64>,
    /// Body length of the last /metrics response.
    pub(crate) metrics_bytes: usize,
    /// Requests never sent: still waiting at the end of the grace time.
    pub(crate) unsent: u64,
}

/// Reads one HTTP/1.1 response with a Content-Length; returns the status
/// and the body length.
pub(crate) async fn read_response(
    sock: &mut tokio::net::TcpStream,
    buf: &mut Vec<u8>,
) -> std::io::Result<(u16, usize)> {
    use tokio::io::AsyncReadExt;
    buf.clear();
    let mut tmp = vec![0u8; 256 * 1024];
    let head_end = loop {
        if let Some(p) = buf.windows(4).position(|w| w == b"\r\n\r\n") {
            break p + 4;
        }
        let n = sock.read(&mut tmp).await?;
        if n == 0 {
            return Err(std::io::ErrorKind::UnexpectedEof.into());
        }
        buf.extend_from_slice(&tmp[..n]);
    };
    let head = String::from_utf8_lossy(&buf[..head_end]).to_ascii_lowercase();
    let status = head
        .split_whitespace()
        .nth(1)
        .and_then(|s| s.parse().ok())
        .unwrap_or(0);
    let len: usize = head
        .lines()
        .find_map(|l| l.strip_prefix("content-length:"))
        .and_then(|v| v.trim().parse().ok())
        .ok_or_else(|| std::io::Error::other("response without content-length"))?;
    buf.reserve((head_end + len).saturating_sub(buf.len()));
    while buf.len() < head_end + len {
        let n = sock.read(&mut tmp).await?;
        if n == 0 {
            return Err(std::io::ErrorKind::UnexpectedEof.into());
        }
        buf.extend_from_slice(&tmp[..n]);
    }
    Ok((status, len))
}

/// Issues `rate` requests per second for `seconds`, alternating /metrics
/// and a spectrum, over one keep-alive connection. Latency runs from the
/// time a request was due (so a stalled server is not hidden) to the end
/// of its response.
async fn http_load(
    addr: std::net::SocketAddr,
    rate: f64,
    seconds: f64,
    channel: &str,
) -> Result<HttpProbe, BenchError> {
    use tokio::io::AsyncWriteExt;
    let mut sock = tokio::net::TcpStream::connect(addr)
        .await
        .map_err(io_err("connect HTTP"))?;
    let _ = sock.set_nodelay(true);
    let period = Duration::from_secs_f64(1.0 / rate);
    let total = (rate * seconds) as u64;
    let start = tokio::time::Instant::now();
    let mut probe = HttpProbe {
        requests: 0,
        errors: 0,
        non_200: 0,
        metrics_ms: Vec::new(),
        spectrum_ms: Vec::new(),
        metrics_bytes: 0,
        unsent: 0,
    };
    let mut buf = Vec::new();
    let spectrum =
        format!("GET /api/v1/channels/{channel}/spectrum HTTP/1.1\r\nhost: bench\r\n\r\n");
    let metrics = "GET /metrics HTTP/1.1\r\nhost: bench\r\n\r\n".to_string();
    // A server slower than the rate must not stretch the round without
    // bound: past the grace time, the requests not yet sent count with the
    // time they have waited so far (a lower bound of their latency).
    let deadline = start + Duration::from_secs_f64(seconds + HTTP_GRACE_S);
    for i in 0..total {
        let due = start + period.mul_f64(i as f64);
        if tokio::time::Instant::now() > deadline {
            for j in i..total {
                let due = start + period.mul_f64(j as f64);
                let ms = due.elapsed().as_secs_f64() * 1e3;
                probe.unsent += 1;
                if j % 2 == 0 {
                    probe.metrics_ms.push(ms);
                } else {
                    probe.spectrum_ms.push(ms);
                }
            }
            break;
        }
        tokio::time::sleep_until(due).await;
        let req = if i % 2 == 0 { &metrics } else { &spectrum };
        let r = async {
            sock.write_all(req.as_bytes()).await?;
            read_response(&mut sock, &mut buf).await
        };
        let r = tokio::time::timeout(Duration::from_secs(5), r).await;
        probe.requests += 1;
        let ms = due.elapsed().as_secs_f64() * 1e3;
        match r {
            Ok(Ok((status, len))) => {
                if status != 200 {
                    probe.non_200 += 1;
                }
                if i % 2 == 0 {
                    probe.metrics_ms.push(ms);
                    probe.metrics_bytes = len;
                } else {
                    probe.spectrum_ms.push(ms);
                }
            }
            _ => {
                probe.errors += 1;
                sock = tokio::net::TcpStream::connect(addr)
                    .await
                    .map_err(io_err("reconnect HTTP"))?;
            }
        }
    }
    Ok(probe)
}

/// What back-to-back /metrics requests on one connection achieved.
#[derive(Debug, Clone, Copy)]
struct ClosedLoop {
    responses_per_s: f64,
    bytes_per_s: f64,
}

/// Sends GET /metrics back to back (the next as soon as the previous
/// response is read) for `seconds`: the most this server and connection
/// deliver, to compare with the bytes/s a request rate needs.
async fn http_closed_loop(
    addr: std::net::SocketAddr,
    seconds: f64,
) -> Result<ClosedLoop, BenchError> {
    use tokio::io::AsyncWriteExt;
    let mut sock = tokio::net::TcpStream::connect(addr)
        .await
        .map_err(io_err("connect HTTP"))?;
    let _ = sock.set_nodelay(true);
    let req = b"GET /metrics HTTP/1.1\r\nhost: bench\r\n\r\n";
    let mut buf = Vec::new();
    let (mut n, mut bytes) = (0u64, 0u64);
    let t0 = Instant::now();
    let end = Duration::from_secs_f64(seconds);
    while t0.elapsed() < end {
        sock.write_all(req).await.map_err(io_err("send HTTP"))?;
        let (_, len) =
            tokio::time::timeout(Duration::from_secs(5), read_response(&mut sock, &mut buf))
                .await
                .map_err(|_| BenchError::Lost("closed-loop /metrics timed out".into()))?
                .map_err(io_err("read HTTP"))?;
        n += 1;
        bytes += len as u64;
    }
    let s = t0.elapsed().as_secs_f64();
    Ok(ClosedLoop {
        responses_per_s: n as f64 / s,
        bytes_per_s: bytes as f64 / s,
    })
}

pub(crate) fn percentile(v: &[f64], p: f64) -> f64 {
    if v.is_empty() {
        return f64::NAN;
    }
    let mut s = v.to_vec();
    s.sort_by(f64::total_cmp);
    let i = ((p / 100.0) * (s.len() - 1) as f64).round() as usize;
    s[i.min(s.len() - 1)]
}

/// Alarm limits of the http phase's bands (band unit), alert and danger:
/// chosen only so that every band carries an alarm; the values are not
/// checked against anything.
const HTTP_BAND_ALARMS: [(&str, f64, f64, &str, &str, f64, f64); 5] = [
    ("overall-velocity", 10.0, 1000.0, "mm/s", "rms", 4.5, 11.2),
    ("1x", 21.0, 28.5, "mm/s", "rms", 4.5, 11.2),
    ("2x", 45.0, 54.0, "mm/s", "rms", 2.8, 7.1),
    ("acceleration-hf", 1000.0, 10000.0, "g", "rms", 1.0, 3.0),
    ("1x-peak", 21.0, 28.5, "g", "peak", 1.0, 3.0),
];

/// Config of the http phase: `channels` channels (in sources of at most
/// 1024, the BWF1 limit), each with the bench's five bands, and an alert
/// and danger limit on every band, so that /metrics carries the band and
/// alarm series a configured plant's would. The alarm storage is never
/// opened (no journal is started).
pub(crate) fn http_config_of(channels: usize, n: usize) -> Result<Config, BenchError> {
    let storage = std::env::temp_dir().join("bandwatch-bench-unused");
    let mut t = format!(
        "[server]\nlisten = \"127.0.0.1:0\"\n[dsp]\nworkers = 2\n[alarms]\nstorage_dir = {:?}\n",
        storage.display().to_string()
    );
    let sources = channels.div_ceil(1024);
    for s in 0..sources {
        let k = (channels - s * 1024).min(1024);
        t.push_str(&format!(
            "\n[[source]]\nname = \"bench{s}\"\n{UNUSED_SOURCE}\nchannels = {k}\nsample_rate_hz = {FS:?}\n"
        ));
    }
    let mut bands = String::new();
    for (name, lo, hi, unit, measure, alert, danger) in HTTP_BAND_ALARMS {
        bands.push_str(&format!(
            "[[channel.band]]\nname = \"{name}\"\nlo_hz = {lo:?}\nhi_hz = {hi:?}\nunit = \"{unit}\"\nmeasure = \"{measure}\"\n\
             [channel.band.alarm]\nalert = {{ limit = {alert:?} }}\ndanger = {{ limit = {danger:?} }}\n"
        ));
    }
    for c in 0..channels {
        t.push_str(&format!(
            "\n[[channel]]\nname = \"ch{c:04}\"\nsource = \"bench{}\"\nindex = {}\nunit = \"g\"\n\
             scale = {G_PER_COUNT:?}\nblock = {n}\nwindow = \"hann\"\noverlap = {OVERLAP:?}\n\
             averaging = {{ mode = \"linear\", count = 4 }}\nintegration_low_cut_hz = 5.0\n{bands}",
            c / 1024,
            c % 1024
        ));
    }
    parse_config(&t)
}

/// The channels of the http phase, their DSP split over two rigs (one per
/// thread), alarms armed, every channel published at least once.
pub(crate) struct HttpSetup {
    pub(crate) state: Arc<AppState>,
    pub(crate) rigs: Vec<DspRig>,
}

pub(crate) fn http_setup(
    channels: usize,
    n: usize,
    signal: &Arc<Vec<f32>>,
) -> Result<HttpSetup, BenchError> {
    let config = http_config_of(channels, n)?;
    let mut pipeline = inline_pipeline(&config, true)?;
    let state = pipeline.state.clone();
    let mut writers = take_writers(&mut pipeline);
    let mut dsps = std::mem::take(&mut pipeline.channels);
    let half = dsps.len().div_ceil(2);
    let second = (dsps.split_off(half), writers.split_off(half));
    let mut rigs = Vec::new();
    for (dsps, writers) in [(dsps, writers), second] {
        if !dsps.is_empty() {
            rigs.push(DspRig::from_parts(&config, dsps, writers, signal.clone())?);
        }
    }
    // Enough rounds for every channel to publish (a block, then the
    // averages) so that /metrics has every series and spectra answer 200.
    for rig in &mut rigs {
        for _ in 0..64 {
            if rig.shared().all(|c| c.latest().is_some()) {
                break;
            }
            rig.write_round();
            pipeline::drain(&mut rig.dsps);
        }
    }
    Ok(HttpSetup { state, rigs })
}

/// Renders /metrics the way the handler does, without any cache: the
/// encoder's cost alone. Returns (median ms over the renders, bytes, lines).
pub(crate) fn render_probe(
    state: &Arc<AppState>,
    min: Duration,
) -> Result<(f64, usize, usize), BenchError> {
    let m = crate::http::metrics::Metrics::new(state.clone());
    let mut times = Vec::new();
    let mut body = Vec::new();
    let t0 = Instant::now();
    while times.len() < 5 || t0.elapsed() < min {
        let t = Instant::now();
        body = m
            .render_fresh()
            .map_err(|e| BenchError::Lost(format!("render /metrics: {e}")))?;
        times.push(t.elapsed().as_secs_f64() * 1e3);
    }
    let lines = body.iter().filter(|&&b| b == b'\n').count();
    Ok((percentile(&times, 50.0), body.len(), lines))
}

/// What the DSP threads did during one round.
#[derive(Debug, Clone, Copy)]
struct DspRound {
    /// Samples processed per second of wall time, both threads.
    rate: f64,
    /// Busy (writing and computing) time over wall time, summed over the
    /// threads: cores used.
    cores: f64,
    /// Paced: how far the slowest thread ended behind real time, s.
    behind_s: f64,
}

/// HTTP requests of one round.
#[derive(Debug, Clone, Copy)]
enum Drive {
    Idle,
    Rate(f64),
    Closed,
}

enum Probe {
    None,
    Rate(HttpProbe),
    Closed(ClosedLoop),
}

/// One DSP thread: flat out, or one round (a hop into every ring, then
/// drain) every hop/fs seconds of wall time. Returns its rig, busy time
/// and how far behind it ended.
pub(crate) fn dsp_thread(
    mut rig: DspRig,
    load: DspLoad,
    stop: &AtomicBool,
    done: &AtomicU64,
) -> (DspRig, Duration, f64) {
    let period = Duration::from_secs_f64(rig.chunk as f64 / FS);
    let per_round = (rig.chunk * rig.dsps.len()) as u64;
    let t0 = Instant::now();
    let mut busy = Duration::ZERO;
    if load == DspLoad::Flat {
        rig.run_until(stop, done);
        return (rig, t0.elapsed(), 0.0);
    }
    if load == DspLoad::Idle {
        while !stop.load(Ordering::Relaxed) {
            std::thread::sleep(Duration::from_millis(5));
        }
        return (rig, Duration::ZERO, 0.0);
    }
    let mut k: u32 = 0;
    while !stop.load(Ordering::Relaxed) {
        let due = t0 + period * k;
        let now = Instant::now();
        if due > now {
            std::thread::sleep((due - now).min(Duration::from_millis(5)));
            continue;
        }
        let b = Instant::now();
        rig.write_round();
        pipeline::drain(&mut rig.dsps);
        busy += b.elapsed();
        done.fetch_add(per_round, Ordering::Relaxed);
        k += 1;
    }
    let behind = (t0.elapsed().as_secs_f64() - (period * k).as_secs_f64()).max(0.0);
    (rig, busy, behind)
}

/// Runs the DSP threads of `setup` for `seconds` as `load` says, with the
/// HTTP requests `drive` says (served by the real router on loopback).
fn http_round(
    rt: &tokio::runtime::Runtime,
    setup: &mut HttpSetup,
    load: DspLoad,
    seconds: f64,
    drive: Drive,
) -> Result<(DspRound, Probe), BenchError> {
    let stop = Arc::new(AtomicBool::new(false));
    let done = Arc::new(AtomicU64::new(0));
    let threads: Vec<_> = std::mem::take(&mut setup.rigs)
        .into_iter()
        .map(|rig| {
            let (stop, done) = (stop.clone(), done.clone());
            std::thread::spawn(move || dsp_thread(rig, load, &stop, &done))
        })
        .collect();
    let t0 = Instant::now();
    let probe = match drive {
        Drive::Idle => {
            std::thread::sleep(Duration::from_secs_f64(seconds));
            Ok(Probe::None)
        }
        Drive::Rate(_) | Drive::Closed => {
            let st = setup.state.clone();
            rt.block_on(async move {
                let listener = tokio::net::TcpListener::bind("127.0.0.1:0")
                    .await
                    .map_err(io_err("bind HTTP"))?;
                let addr = listener.local_addr().map_err(io_err("local address"))?;
                let (tx, rx) = tokio::sync::oneshot::channel::<()>();
                let server = tokio::spawn(async move {
                    let _ = axum::serve(listener, crate::http::router(st))
                        .with_graceful_shutdown(async {
                            let _ = rx.await;
                        })
                        .await;
                });
                let probe = match drive {
                    Drive::Rate(rate) => http_load(addr, rate, seconds, "ch0000")
                        .await
                        .map(Probe::Rate),
                    _ => http_closed_loop(addr, seconds).await.map(Probe::Closed),
                };
                let _ = tx.send(());
                let _ = server.await;
                probe
            })
        }
    };
    let elapsed = t0.elapsed().as_secs_f64();
    let work = done.load(Ordering::Relaxed);
    stop.store(true, Ordering::Relaxed);
    let mut busy = 0.0;
    let mut behind: f64 = 0.0;
    for t in threads {
        match t.join() {
            Ok((rig, b, late)) => {
                setup.rigs.push(rig);
                busy += b.as_secs_f64();
                behind = behind.max(late);
            }
            Err(_) => return Err(BenchError::Lost("a DSP thread panicked".into())),
        }
    }
    let dropped: u64 = setup
        .state
        .channels
        .iter()
        .map(|c| c.counters.dropped_total())
        .sum();
    if dropped > 0 {
        return Err(BenchError::Lost(format!(
            "http rig dropped {dropped} samples"
        )));
    }
    Ok((
        DspRound {
            rate: work as f64 / elapsed,
            cores: busy / elapsed,
            behind_s: behind,
        },
        probe?,
    ))
}

/// The http phase: per channel count, the render cost and body size, then
/// per DSP load and request rate, latencies, the DSP cost of serving, and
/// what back-to-back /metrics achieves.
pub(crate) fn http_phase(
    rt: &tokio::runtime::Runtime,
    args: &BenchArgs,
    signal: &Arc<Vec<f32>>,
    rows: &mut Vec<Row>,
    notes: &mut Vec<String>,
) -> Result<(), BenchError> {
    let repeats = args.repeats.max(1);
    let mut loads = args.http_load.clone();
    if loads.is_empty() {
        loads = vec![DspLoad::Flat, DspLoad::Paced];
    }
    let rates: Vec<f64> = if args.http_rates.is_empty() {
        vec![200.0]
    } else {
        args.http_rates.clone()
    };
    if rates
        .iter()
        .any(|r| !(r.is_finite() && *r > 0.0 && *r <= 10_000.0))
    {
        return Err(BenchError::Usage(
            "--http-rates must be above 0 and at most 10000".into(),
        ));
    }
    let ms_row = |case: String, v: &[f64], target: Option<&str>| Row {
        phase: "http".into(),
        case,
        unit: "ms".into(),
        value: Summary::of(v),
        ratio: None,
        target: target.map(Into::into),
    };
    let row = |case: String, unit: &str, v: &[f64]| Row {
        phase: "http".into(),
        case,
        unit: unit.into(),
        value: Summary::of(v),
        ratio: None,
        target: None,
    };
    for &channels in &args.http_channels {
        eprintln!("bench: http setting up {channels} channels");
        let mut setup = http_setup(channels, args.n, signal)?;
        let (mut render, mut bytes, mut lines) = (Vec::new(), Vec::new(), Vec::new());
        for _ in 0..repeats {
            let (ms, b, l) =
                render_probe(&setup.state, Duration::from_secs_f64(args.work_seconds))?;
            render.push(ms);
            bytes.push(b as f64);
            lines.push(l as f64);
        }
        let body = Summary::of(&bytes).median;
        rows.push(ms_row(format!("render {channels} ch"), &render, None));
        rows.push(row(format!("body {channels} ch bytes"), "bytes", &bytes));
        rows.push(row(format!("body {channels} ch lines"), "lines", &lines));
        for &load in &loads {
            let l = load.as_str();
            let mut base_cores = Vec::new();
            let mut closed_rps = Vec::new();
            let mut closed_bps = Vec::new();
            let mut closed_loss = Vec::new();
            struct AtRate {
                p50m: Vec<f64>,
                p99m: Vec<f64>,
                p50s: Vec<f64>,
                p99s: Vec<f64>,
                loss: Vec<f64>,
                cores: Vec<f64>,
                behind: Vec<f64>,
                non200: u64,
                errors: u64,
                unsent: u64,
            }
            let mut at: Vec<AtRate> = rates
                .iter()
                .map(|_| AtRate {
                    p50m: Vec::new(),
                    p99m: Vec::new(),
                    p50s: Vec::new(),
                    p99s: Vec::new(),
                    loss: Vec::new(),
                    cores: Vec::new(),
                    behind: Vec::new(),
                    non200: 0,
                    errors: 0,
                    unsent: 0,
                })
                .collect();
            for r in 0..repeats {
                eprintln!("bench: http {channels} ch {l} repeat {}/{repeats}", r + 1);
                let (base, _) = http_round(rt, &mut setup, load, args.seconds, Drive::Idle)?;
                base_cores.push(base.cores);
                for (k, &rate) in rates.iter().enumerate() {
                    let (d, probe) =
                        http_round(rt, &mut setup, load, args.seconds, Drive::Rate(rate))?;
                    let a = &mut at[k];
                    a.loss.push(1.0 - d.rate / base.rate);
                    a.cores.push(d.cores);
                    a.behind.push(d.behind_s);
                    if let Probe::Rate(p) = probe {
                        a.p50m.push(percentile(&p.metrics_ms, 50.0));
                        a.p99m.push(percentile(&p.metrics_ms, 99.0));
                        a.p50s.push(percentile(&p.spectrum_ms, 50.0));
                        a.p99s.push(percentile(&p.spectrum_ms, 99.0));
                        a.non200 += p.non_200;
                        a.errors += p.errors;
                        a.unsent += p.unsent;
                    }
                }
                let (d, probe) = http_round(rt, &mut setup, load, args.seconds, Drive::Closed)?;
                closed_loss.push(1.0 - d.rate / base.rate);
                if let Probe::Closed(c) = probe {
                    closed_rps.push(c.responses_per_s);
                    closed_bps.push(c.bytes_per_s);
                }
            }
            let tag = format!("{channels}ch {l}");
            if load == DspLoad::Paced {
                rows.push(row(format!("{tag} DSP no HTTP"), "cores busy", &base_cores));
            }
            for (k, &rate) in rates.iter().enumerate() {
                let a = &at[k];
                let t = format!("{tag} {rate}/s");
                rows.push(ms_row(format!("{t} /metrics p50"), &a.p50m, None));
                rows.push(ms_row(
                    format!("{t} /metrics p99"),
                    &a.p99m,
                    Some("< 10 ms"),
                ));
                rows.push(ms_row(format!("{t} spectrum p50"), &a.p50s, None));
                rows.push(ms_row(format!("{t} spectrum p99"), &a.p99s, None));
                match load {
                    DspLoad::Flat => {
                        rows.push(row(format!("{t} DSP rate lost"), "fraction", &a.loss))
                    }
                    DspLoad::Paced => {
                        rows.push(row(format!("{t} DSP"), "cores busy", &a.cores));
                        rows.push(row(format!("{t} DSP behind"), "s at end", &a.behind));
                    }
                    DspLoad::Idle => {}
                }
                notes.push(format!(
                    "http {t}: /metrics at {} req/s needs {} bytes/s; {} non-200 responses, {} errors, {} unsent (waited past the {HTTP_GRACE_S} s grace; counted with their wait so far)",
                    rate / 2.0,
                    fmt_rate(body * rate / 2.0),
                    a.non200,
                    a.errors,
                    a.unsent
                ));
            }
            rows.push(row(
                format!("{tag} back-to-back n"),
                "/metrics/s",
                &closed_rps,
            ));
            rows.push(row(format!("{tag} back-to-back B"), "bytes/s", &closed_bps));
            if load == DspLoad::Flat {
                rows.push(row(
                    format!("{tag} back-to-back DSP lost"),
                    "fraction",
                    &closed_loss,
                ));
            }
        }
    }
    notes.push(
        "http: requests alternate /metrics and /api/v1/channels/ch0000/spectrum on one keep-alive connection (rate = both together), latency from when each was due; channels have 5 bands, each with an alert and danger alarm; 2 DSP threads: flat = flat out, paced = each channel at 25.6 kHz of wall time, idle = no DSP work; render = one uncached /metrics render with the DSP idle; back-to-back = /metrics requested as soon as the last response is read".into(),
    );
    Ok(())
}
