//! The `page` phase (`bench --only page`): what an open operator page
//! costs the daemon. The http phase's 64-channel rig (`http::http_setup`:
//! one pipeline from `pipeline::Builder`, five bands with alarms on every
//! channel) runs its DSP paced to real time on two threads, the real
//! router serves on 127.0.0.1, and `--page-clients` page clients poll it
//! every 1.5 s (the page's period) over keep-alive connections, in three
//! ways:
//!
//! - `list+detail`: the overview the old way, `GET /api/v1/channels` then
//!   `GET /api/v1/channels/{name}` for every channel;
//! - `overview`: the overview in one request, `GET /api/v1/overview`;
//! - `channel`: a channel view, the channel's detail and its spectrum.
//!
//! Each repeat measures, back to back, a round with no client (the paced
//! DSP and an idle server) and one round per way with the clients. The
//! figure is the process's CPU time (utime + stime of `/proc/self/stat`)
//! per second of wall time, less the CPU time of the clients' own thread
//! (`/proc/thread-self/stat`, read on that thread), i.e. what the daemon's
//! side spends; the cost of one page is (with − without) / clients. Bytes
//! per update are the response bodies of one update of one page.

use std::sync::atomic::{AtomicBool, AtomicU64, Ordering};
use std::sync::Arc;
use std::time::Duration;

use super::http::{dsp_thread, http_setup, read_response, DspLoad, HttpSetup};
use super::plant::{clock_ticks, stat_cpu_ticks};
use super::{io_err, BenchArgs, BenchError, Row, Summary};

/// The page's polling period, s (README "The operator page").
const PAGE_PERIOD_S: f64 = 1.5;

/// Channels of the rig (the brief's plant page: 64 channels).
const PAGE_CHANNELS: usize = 64;

/// What an update of one page asks for.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum Way {
    ListDetail,
    Overview,
    Channel,
}

impl Way {
    const ALL: [Way; 3] = [Way::ListDetail, Way::Overview, Way::Channel];

    fn as_str(self) -> &'static str {
        match self {
            Way::ListDetail => "list+detail",
            Way::Overview => "overview",
            Way::Channel => "channel",
        }
    }

    /// The request paths of one update of client `client`.
    fn paths(self, channels: &[String], client: usize) -> Vec<String> {
        match self {
            Way::ListDetail => std::iter::once("/api/v1/channels".to_string())
                .chain(channels.iter().map(|c| format!("/api/v1/channels/{c}")))
                .collect(),
            Way::Overview => vec!["/api/v1/overview".into()],
            Way::Channel => {
                let c = &channels[client % channels.len()];
                vec![
                    format!("/api/v1/channels/{c}"),
                    format!("/api/v1/channels/{c}/spectrum"),
                ]
            }
        }
    }
}

/// What the clients of one round did.
#[derive(Debug, Default, Clone, Copy)]
struct Clients {
    updates: u64,
    requests: u64,
    body_bytes: u64,
    non_200: u64,
    errors: u64,
    /// CPU time of the clients' thread, s.
    cpu_s: f64,
}

fn cpu_ticks(path: &str) -> Option<u64> {
    std::fs::read_to_string(path)
        .ok()
        .and_then(|t| stat_cpu_ticks(&t))
}

/// One page client: an update every `PAGE_PERIOD_S` from `offset` until
/// `seconds` have passed, over one keep-alive connection.
async fn page_client(
    addr: std::net::SocketAddr,
    paths: Vec<String>,
    offset: Duration,
    seconds: f64,
) -> Clients {
    use tokio::io::AsyncWriteExt;
    let mut c = Clients::default();
    let start = tokio::time::Instant::now() + offset;
    let end = tokio::time::Instant::now() + Duration::from_secs_f64(seconds);
    let Ok(mut sock) = tokio::net::TcpStream::connect(addr).await else {
        c.errors += 1;
        return c;
    };
    let _ = sock.set_nodelay(true);
    let requests: Vec<String> = paths
        .iter()
        .map(|p| format!("GET {p} HTTP/1.1\r\nhost: bench\r\n\r\n"))
        .collect();
    let mut buf = Vec::new();
    for k in 0u32.. {
        let due = start + Duration::from_secs_f64(PAGE_PERIOD_S) * k;
        if due >= end {
            break;
        }
        tokio::time::sleep_until(due).await;
        for req in &requests {
            let r = async {
                sock.write_all(req.as_bytes()).await?;
                read_response(&mut sock, &mut buf).await
            };
            c.requests += 1;
            match tokio::time::timeout(Duration::from_secs(5), r).await {
                Ok(Ok((status, len))) => {
                    c.body_bytes += len as u64;
                    if status != 200 {
                        c.non_200 += 1;
                    }
                }
                _ => {
                    c.errors += 1;
                    return c;
                }
            }
        }
        c.updates += 1;
    }
    c
}

/// `n` clients of `way` on a thread of their own (a current-thread
/// runtime), staggered over one period; their thread's CPU time included.
fn run_clients(
    addr: std::net::SocketAddr,
    way: Way,
    channels: &[String],
    n: usize,
    seconds: f64,
) -> Result<Clients, BenchError> {
    let jobs: Vec<(Vec<String>, Duration)> = (0..n)
        .map(|i| {
            (
                way.paths(channels, i),
                Duration::from_secs_f64(PAGE_PERIOD_S * i as f64 / n as f64),
            )
        })
        .collect();
    let (ticks, _) = clock_ticks();
    let t = std::thread::spawn(move || -> Result<Clients, BenchError> {
        let rt = tokio::runtime::Builder::new_current_thread()
            .enable_all()
            .build()
            .map_err(io_err("client runtime"))?;
        let cpu0 = cpu_ticks("/proc/thread-self/stat");
        let all = rt.block_on(async move {
            let tasks: Vec<_> = jobs
                .into_iter()
                .map(|(paths, offset)| tokio::spawn(page_client(addr, paths, offset, seconds)))
                .collect();
            let mut sum = Clients::default();
            for t in tasks {
                let c = t.await.unwrap_or(Clients {
                    errors: 1,
                    ..Clients::default()
                });
                sum.updates += c.updates;
                sum.requests += c.requests;
                sum.body_bytes += c.body_bytes;
                sum.non_200 += c.non_200;
                sum.errors += c.errors;
            }
            sum
        });
        let cpu1 = cpu_ticks("/proc/thread-self/stat");
        let cpu_s = match (cpu0, cpu1) {
            (Some(a), Some(b)) => b.saturating_sub(a) as f64 / ticks,
            _ => {
                return Err(BenchError::Lost(
                    "cannot read /proc/thread-self/stat".into(),
                ))
            }
        };
        Ok(Clients { cpu_s, ..all })
    });
    t.join()
        .map_err(|_| BenchError::Lost("the page clients' thread panicked".into()))?
}

/// One round: the paced DSP, the router on loopback, and `clients`
/// clients of `way` (none: the server idles). Returns the daemon side's
/// CPU seconds per wall second and what the clients did.
fn page_round(
    rt: &tokio::runtime::Runtime,
    setup: &mut HttpSetup,
    way: Way,
    clients: usize,
    seconds: f64,
) -> Result<(f64, Clients), BenchError> {
    let stop = Arc::new(AtomicBool::new(false));
    let done = Arc::new(AtomicU64::new(0));
    let threads: Vec<_> = std::mem::take(&mut setup.rigs)
        .into_iter()
        .map(|rig| {
            let (stop, done) = (stop.clone(), done.clone());
            std::thread::spawn(move || dsp_thread(rig, DspLoad::Paced, &stop, &done))
        })
        .collect();
    let st = setup.state.clone();
    let channels: Vec<String> = st.channels.iter().map(|c| c.spec.name.clone()).collect();
    let listener = rt
        .block_on(tokio::net::TcpListener::bind("127.0.0.1:0"))
        .map_err(io_err("bind HTTP"))?;
    let addr = listener.local_addr().map_err(io_err("local address"))?;
    let (tx, rx) = tokio::sync::oneshot::channel::<()>();
    let server = rt.spawn(async move {
        let _ = axum::serve(listener, crate::http::router(st))
            .with_graceful_shutdown(async {
                let _ = rx.await;
            })
            .await;
    });
    let (ticks, _) = clock_ticks();
    let t0 = std::time::Instant::now();
    let cpu0 = cpu_ticks("/proc/self/stat");
    let result = if clients == 0 {
        std::thread::sleep(Duration::from_secs_f64(seconds));
        Ok(Clients::default())
    } else {
        run_clients(addr, way, &channels, clients, seconds)
    };
    let cpu1 = cpu_ticks("/proc/self/stat");
    let wall = t0.elapsed().as_secs_f64();
    stop.store(true, Ordering::Relaxed);
    let _ = tx.send(());
    let _ = rt.block_on(server);
    for t in threads {
        match t.join() {
            Ok((rig, _, _)) => setup.rigs.push(rig),
            Err(_) => return Err(BenchError::Lost("a DSP thread panicked".into())),
        }
    }
    let c = result?;
    let (Some(a), Some(b)) = (cpu0, cpu1) else {
        return Err(BenchError::Lost("cannot read /proc/self/stat".into()));
    };
    let process_s = b.saturating_sub(a) as f64 / ticks;
    Ok(((process_s - c.cpu_s) / wall, c))
}

/// The page phase: per repeat, no client then each way with the clients.
pub(crate) fn page_phase(
    rt: &tokio::runtime::Runtime,
    args: &BenchArgs,
    signal: &Arc<Vec<f32>>,
    rows: &mut Vec<Row>,
    notes: &mut Vec<String>,
) -> Result<(), BenchError> {
    let n = args.page_clients;
    if !(1..=1000).contains(&n) {
        return Err(BenchError::Usage("--page-clients must be 1 to 1000".into()));
    }
    let seconds = args.page_seconds;
    if !(seconds.is_finite() && (PAGE_PERIOD_S..=3600.0).contains(&seconds)) {
        return Err(BenchError::Usage(format!(
            "--page-seconds must be {PAGE_PERIOD_S} to 3600"
        )));
    }
    eprintln!("bench: page setting up {PAGE_CHANNELS} channels");
    let mut setup = http_setup(PAGE_CHANNELS, args.n, signal)?;
    let repeats = args.repeats.max(1);
    let mut base = Vec::new();
    let mut with: Vec<Vec<f64>> = vec![Vec::new(); Way::ALL.len()];
    let mut per_page: Vec<Vec<f64>> = vec![Vec::new(); Way::ALL.len()];
    let mut bytes: Vec<Vec<f64>> = vec![Vec::new(); Way::ALL.len()];
    let mut reqs: Vec<Vec<f64>> = vec![Vec::new(); Way::ALL.len()];
    for r in 0..repeats {
        eprintln!("bench: page repeat {}/{repeats}: no client", r + 1);
        let (b, _) = page_round(rt, &mut setup, Way::Overview, 0, seconds)?;
        base.push(b);
        for (k, way) in Way::ALL.into_iter().enumerate() {
            eprintln!(
                "bench: page repeat {}/{repeats}: {n} x {}",
                r + 1,
                way.as_str()
            );
            let (cores, c) = page_round(rt, &mut setup, way, n, seconds)?;
            if c.errors > 0 || c.non_200 > 0 || c.updates == 0 {
                return Err(BenchError::Lost(format!(
                    "page {}: {} errors, {} non-200 answers, {} updates",
                    way.as_str(),
                    c.errors,
                    c.non_200,
                    c.updates
                )));
            }
            with[k].push(cores);
            per_page[k].push((cores - b) / n as f64);
            bytes[k].push(c.body_bytes as f64 / c.updates as f64);
            reqs[k].push(c.requests as f64 / c.updates as f64);
        }
    }
    let row = |case: String, unit: &str, v: &[f64]| Row {
        phase: "page".into(),
        case,
        unit: unit.into(),
        value: Summary::of(v),
        ratio: None,
        target: None,
    };
    rows.push(row(format!("{PAGE_CHANNELS}ch 0 pages"), "cores", &base));
    for (k, way) in Way::ALL.into_iter().enumerate() {
        let w = way.as_str();
        rows.push(row(format!("{w} {n} pages"), "cores", &with[k]));
        rows.push(row(format!("{w} per page"), "cores", &per_page[k]));
        rows.push(row(format!("{w} bytes/update"), "bytes", &bytes[k]));
        rows.push(row(format!("{w} requests/update"), "requests", &reqs[k]));
    }
    notes.push(format!(
        "page: {PAGE_CHANNELS} channels (5 bands with alarms each), DSP paced to real time on 2 threads, the real router on 127.0.0.1; {n} page clients, each an update every {PAGE_PERIOD_S} s on its own keep-alive connection (staggered), {seconds} s per round; cores = process CPU (utime+stime, /proc/self/stat) per wall second less the clients' thread's own (/proc/thread-self/stat); per page = (with pages - 0 pages) / {n}; bytes = response bodies of one update. list+detail = GET /api/v1/channels + GET /api/v1/channels/{{name}} x {PAGE_CHANNELS}; overview = GET /api/v1/overview; channel = detail + spectrum of one channel"
    ));
    Ok(())
}
