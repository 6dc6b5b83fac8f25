//! The `plant` phase (`bench --only plant`): the load a plant PC must hold,
//! run live with real processes. The REAL daemon (`bandwatch run --config`,
//! this executable) runs as a child on a generated config: `--plant-channels`
//! channels split over UDP sources of `--plant-per-source` channels (one
//! DAQ box each), every channel with the bench's bands, sensor checks, band
//! alarms and an overall RMS alarm (`input::channel_text`). A SEPARATE
//! sender process (this executable's hidden `bench --plant-send-to` mode)
//! plays every source live, paced to real time, as BWF1 datagrams of i16
//! counts. This process scrapes `/metrics` every `--plant-scrape-every`
//! seconds as Prometheus would and reads the two children's CPU time and
//! resident memory from `/proc`.
//!
//! Figures: daemon and sender CPU (utime + stime over the measured window,
//! in cores), every drop the daemon counts by reason, samples sent against
//! samples received, spectrum age (the daemon's own
//! `bandwatch_channel_spectrum_age_seconds`, every channel at every scrape
//! in the window), DSP lag (received − processed per channel, in seconds of
//! input), RSS at start, after the warm-up and at the end.
//!
//! History writing and an open page do not exist in this build. The hook
//! for them: `--plant-poll PATH@SECONDS` adds periodic GETs beside the
//! scrape (what a page would poll, once there is one), and a history
//! table would go into [`plant_config_text`] once the daemon has one.

use std::collections::BTreeMap;
use std::io::Read as _;
use std::net::{SocketAddr, UdpSocket};
use std::path::{Path, PathBuf};
use std::process::{Child, Command, Stdio};
use std::time::{Duration, Instant};

use serde::{Deserialize, Serialize};

use crate::clock::unix_now_ns;
use crate::frame::bwf1::{self, CRC_BYTES, HEADER_BYTES, MAX_CHANNELS};
use crate::frame::SampleFormat;
use crate::pipeline::RingSize;

use super::http::{percentile, read_response};
use super::input::{channel_text, parse_config, test_signal};
use super::memory::vm_rss_bytes;
use super::path::{encode_frames, format_scale};
use super::{io_err, BenchArgs, BenchError, Row, Summary};

/// Largest UDP payload over IPv4: 65 535 − 8 (UDP header) − 20 (IP header).
pub(crate) const UDP_MAX_PAYLOAD: usize = 65_507;

/// Most instants per datagram the automatic choice takes: 40 ms at
/// 25.6 kHz, so a source's data never waits long in the box.
const MAX_AUTO_FRAME_SAMPLES: usize = 1024;

/// Frames encoded once per source shape and cycled (restamped) by the
/// sender.
const POOL_FRAMES: usize = 32;

/// Default gain on the bench's test signal for the plant run: 1× at
/// 0.03 g, about 1.3 mm/s RMS in the overall-velocity band, inside the
/// zone preset's lowest zone, so that every alarm is evaluated on every
/// result and none trips: the plant's steady state. At gain 1 (13.4 mm/s)
/// every channel's zone alarm trips to danger at once and stores a capture.
pub(crate) const DEFAULT_SIGNAL_GAIN: f64 = 0.1;

/// Checks `--plant-signal-gain` (the test signal peaks near 0.4 g; i16
/// counts hold ±50 g).
fn check_gain(gain: f64) -> Result<(), BenchError> {
    if gain.is_finite() && gain > 0.0 && gain <= 100.0 {
        Ok(())
    } else {
        Err(BenchError::Usage(
            "--plant-signal-gain must be above 0 and at most 100".into(),
        ))
    }
}

/// Averages per result (the bench's linear average of 4).
const AVERAGES: u32 = 4;

/// The channels' sample format on the wire: i16 counts, as a 16-bit DAQ
/// box sends them (2 bytes a sample: half of f32's bytes on the loopback
/// and in the kernel's socket buffers).
const WIRE_FORMAT: SampleFormat = SampleFormat::I16;

/// Bytes of one BWF1 datagram of `channels` i16 channels × `frame_samples`.
pub(crate) fn datagram_bytes(channels: usize, frame_samples: usize) -> usize {
    HEADER_BYTES + CRC_BYTES + channels * frame_samples * WIRE_FORMAT.width()
}

/// The largest power of two up to [`MAX_AUTO_FRAME_SAMPLES`] whose datagram
/// fits in one UDP payload (64 channels: 256 instants, 32 808 bytes; 512
/// would be 65 576 bytes, over the limit).
pub(crate) fn auto_frame_samples(channels: usize) -> usize {
    let mut s = MAX_AUTO_FRAME_SAMPLES;
    while s > 1 && datagram_bytes(channels, s) > UDP_MAX_PAYLOAD {
        s /= 2;
    }
    s
}

/// The shape of a plant run.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub(crate) struct PlantPlan {
    pub(crate) channels: usize,
    pub(crate) per_source: usize,
    pub(crate) sample_rate_hz: f64,
    pub(crate) n: usize,
    pub(crate) frame_samples: usize,
}

impl PlantPlan {
    /// Checks the options; picks the frame size when not given.
    pub(crate) fn new(
        channels: usize,
        per_source: usize,
        sample_rate_hz: f64,
        n: usize,
        frame_samples: Option<usize>,
    ) -> Result<PlantPlan, BenchError> {
        if channels == 0 {
            return Err(BenchError::Usage(
                "--plant-channels must be at least 1".into(),
            ));
        }
        if per_source == 0 || per_source > usize::from(MAX_CHANNELS) {
            return Err(BenchError::Usage(format!(
                "--plant-per-source must be 1 to {MAX_CHANNELS} (channels in one BWF1 frame)"
            )));
        }
        if !(sample_rate_hz.is_finite() && sample_rate_hz >= 1000.0) {
            return Err(BenchError::Usage(
                "--plant-rate-hz must be at least 1000".into(),
            ));
        }
        let frame_samples = frame_samples.unwrap_or_else(|| auto_frame_samples(per_source));
        let bytes = datagram_bytes(per_source, frame_samples);
        if frame_samples == 0 || bytes > UDP_MAX_PAYLOAD {
            return Err(BenchError::Usage(format!(
                "--plant-frame-samples {frame_samples}: a datagram of {per_source} i16 channels would be {bytes} bytes (1 to {UDP_MAX_PAYLOAD})"
            )));
        }
        Ok(PlantPlan {
            channels,
            per_source,
            sample_rate_hz,
            n,
            frame_samples,
        })
    }

    pub(crate) fn sources(&self) -> usize {
        self.channels.div_ceil(self.per_source)
    }

    /// Channels of source `s` (the last may have fewer).
    pub(crate) fn source_channels(&self, s: usize) -> usize {
        (self.channels - s * self.per_source).min(self.per_source)
    }
}

/// Name of source `s` in the generated config.
fn source_name(s: usize) -> String {
    format!("daq{s:03}")
}

/// The daemon's config: HTTP on `http`, one `udp` source per address of
/// `udp` (defaults otherwise: 65 507-byte datagrams, the sequence rules'
/// windows), two DSP workers, the journal and captures in `storage`, and
/// every channel with bands, sensor checks, band alarms and an overall RMS
/// alarm, scaled for i16 counts. (History writing, once the daemon has it,
/// is configured here.)
pub(crate) fn plant_config_text(
    plan: &PlantPlan,
    http: SocketAddr,
    udp: &[SocketAddr],
    storage: &Path,
) -> String {
    let mut t = format!(
        "[server]\nlisten = \"{http}\"\n[dsp]\nworkers = 2\n[alarms]\nstorage_dir = {:?}\n",
        storage.display().to_string()
    );
    for (s, addr) in udp.iter().enumerate().take(plan.sources()) {
        t.push_str(&format!(
            "\n[[source]]\nname = \"{}\"\nkind = \"udp\"\nlisten = \"{addr}\"\nchannels = {}\nsample_rate_hz = {:?}\n",
            source_name(s),
            plan.source_channels(s),
            plan.sample_rate_hz
        ));
    }
    for c in 0..plan.channels {
        t.push('\n');
        t.push_str(&channel_text(
            c,
            &source_name(c / plan.per_source),
            c % plan.per_source,
            plan.n,
            plan.sample_rate_hz,
            AVERAGES,
            format_scale(WIRE_FORMAT),
        ));
    }
    t
}

/// utime + stime of a `/proc/PID/stat` line, in clock ticks (fields 14 and
/// 15, proc(5)). The command name (field 2) is in parentheses and may hold
/// spaces and parentheses itself, so fields are counted after the last ')'.
pub(crate) fn stat_cpu_ticks(stat: &str) -> Option<u64> {
    let rest = &stat[stat.rfind(')')? + 1..];
    let f: Vec<&str> = rest.split_whitespace().collect();
    // rest starts at field 3 (state): utime is field 14, index 11.
    let utime: u64 = f.get(11)?.parse().ok()?;
    let stime: u64 = f.get(12)?.parse().ok()?;
    Some(utime + stime)
}

/// Clock ticks per second of `/proc/PID/stat` (`getconf CLK_TCK`), and
/// whether it was read (else 100, Linux's USER_HZ on common platforms).
pub(crate) fn clock_ticks() -> (f64, bool) {
    Command::new("getconf")
        .arg("CLK_TCK")
        .output()
        .ok()
        .and_then(|o| {
            String::from_utf8_lossy(&o.stdout)
                .trim()
                .parse::<f64>()
                .ok()
        })
        .filter(|t| *t > 0.0)
        .map_or((100.0, false), |t| (t, true))
}

fn cpu_seconds(pid: u32, ticks: f64) -> Option<f64> {
    std::fs::read_to_string(format!("/proc/{pid}/stat"))
        .ok()
        .and_then(|t| stat_cpu_ticks(&t))
        .map(|t| t as f64 / ticks)
}

fn rss_of(pid: u32) -> Option<u64> {
    std::fs::read_to_string(format!("/proc/{pid}/status"))
        .ok()
        .and_then(|t| vm_rss_bytes(&t))
}

/// One sample of the Prometheus text exposition: name, labels, value.
#[derive(Debug, Clone, PartialEq)]
pub(crate) struct PromSample<'a> {
    pub(crate) name: &'a str,
    pub(crate) labels: Vec<(&'a str, String)>,
    pub(crate) value: f64,
}

/// Parses one line of the text exposition format (`name{l="v",…} value
/// [timestamp]`); comments and blank lines give None. Label values are
/// unescaped (`\\`, `\"`, `\n`). Hand-written: the crate's `prometheus`
/// dependency encodes but does not parse, and the bench reads a handful of
/// families.
pub(crate) fn parse_prom_line(line: &str) -> Option<PromSample<'_>> {
    let line = line.trim();
    if line.is_empty() || line.starts_with('#') {
        return None;
    }
    let name_end = line.find(['{', ' '])?;
    let name = &line[..name_end];
    let mut labels = Vec::new();
    let mut rest = &line[name_end..];
    if let Some(r) = rest.strip_prefix('{') {
        let mut r = r;
        loop {
            r = r.trim_start_matches([',', ' ']);
            if let Some(after) = r.strip_prefix('}') {
                rest = after;
                break;
            }
            let eq = r.find('=')?;
            let key = r[..eq].trim();
            let v = r[eq + 1..].strip_prefix('"')?;
            let mut value = String::new();
            let mut chars = v.char_indices();
            let end = loop {
                let (i, ch) = chars.next()?;
                match ch {
                    '"' => break i,
                    '\\' => match chars.next()?.1 {
                        'n' => value.push('\n'),
                        other => value.push(other),
                    },
                    other => value.push(other),
                }
            };
            labels.push((key, value));
            r = &v[end + 1..];
        }
    }
    let value = match rest.split_whitespace().next()? {
        "+Inf" => f64::INFINITY,
        "-Inf" => f64::NEG_INFINITY,
        v => v.parse().ok()?,
    };
    Some(PromSample {
        name,
        labels,
        value,
    })
}

fn label<'a>(s: &'a PromSample<'_>, key: &str) -> Option<&'a str> {
    s.labels
        .iter()
        .find(|(k, _)| *k == key)
        .map(|(_, v)| v.as_str())
}

/// What one `/metrics` body says about load and losses.
#[derive(Debug, Clone, Default, Serialize, Deserialize, PartialEq)]
pub(crate) struct Digest {
    /// Spectrum age of every channel that has a spectrum, s.
    pub(crate) ages: Vec<f64>,
    /// Received − processed of every channel, seconds of input.
    pub(crate) lags: Vec<f64>,
    pub(crate) received: u64,
    pub(crate) processed: u64,
    /// Channel drops summed over channels, by reason.
    pub(crate) dropped: BTreeMap<String, u64>,
    /// Source counters summed over sources.
    pub(crate) missing_instants: u64,
    pub(crate) late_frames: u64,
    pub(crate) crc_errors: u64,
    pub(crate) skipped_bytes: u64,
    pub(crate) rejected: BTreeMap<String, u64>,
    pub(crate) restarts: BTreeMap<String, u64>,
    /// Journal events, captures and baselines the alarm I/O queue dropped,
    /// by kind.
    pub(crate) alarm_records_dropped: BTreeMap<String, u64>,
}

impl Digest {
    /// Samples that never reached the DSP, every reason.
    pub(crate) fn dropped_samples(&self) -> u64 {
        self.dropped.values().sum()
    }

    /// Source counters that must stay 0 in a clean run (different units:
    /// instants, frames, restarts; only compared with 0).
    pub(crate) fn source_faults(&self) -> u64 {
        self.missing_instants
            + self.late_frames
            + self.crc_errors
            + self.rejected.values().sum::<u64>()
            + self.restarts.values().sum::<u64>()
    }
}

/// Reads the families the plant phase reports from a `/metrics` body;
/// `fs` turns sample counts into seconds.
pub(crate) fn digest(body: &str, fs: f64) -> Digest {
    let mut d = Digest::default();
    let mut per: BTreeMap<String, (u64, u64)> = BTreeMap::new();
    let as_u = |v: f64| {
        if v.is_finite() && v > 0.0 {
            v as u64
        } else {
            0
        }
    };
    for s in body.lines().filter_map(parse_prom_line) {
        let ch = || label(&s, "channel").unwrap_or("").to_string();
        let reason = || label(&s, "reason").unwrap_or("").to_string();
        match s.name {
            "bandwatch_channel_spectrum_age_seconds" => d.ages.push(s.value),
            "bandwatch_channel_samples_received_total" => {
                per.entry(ch()).or_default().0 = as_u(s.value)
            }
            "bandwatch_channel_samples_processed_total" => {
                per.entry(ch()).or_default().1 = as_u(s.value)
            }
            "bandwatch_channel_samples_dropped_total" => {
                *d.dropped.entry(reason()).or_default() += as_u(s.value)
            }
            "bandwatch_source_missing_samples_total" => d.missing_instants += as_u(s.value),
            "bandwatch_source_late_frames_total" => d.late_frames += as_u(s.value),
            "bandwatch_source_crc_errors_total" => d.crc_errors += as_u(s.value),
            "bandwatch_source_skipped_bytes_total" => d.skipped_bytes += as_u(s.value),
            "bandwatch_source_rejected_total" => {
                *d.rejected.entry(reason()).or_default() += as_u(s.value)
            }
            "bandwatch_source_restarts_total" => {
                *d.restarts.entry(reason()).or_default() += as_u(s.value)
            }
            "bandwatch_alarm_records_dropped_total" => {
                let kind = label(&s, "kind").unwrap_or("").to_string();
                *d.alarm_records_dropped.entry(kind).or_default() += as_u(s.value)
            }
            _ => {}
        }
    }
    for (received, processed) in per.values() {
        d.received += received;
        d.processed += processed;
        d.lags.push(received.saturating_sub(*processed) as f64 / fs);
    }
    d
}

/// `PATH@SECONDS` of `--plant-poll`.
pub(crate) fn parse_poll(s: &str) -> Result<(String, f64), BenchError> {
    let bad = || BenchError::Usage(format!("--plant-poll {s:?}: expected /PATH@SECONDS"));
    let (path, every) = s.rsplit_once('@').ok_or_else(bad)?;
    let every: f64 = every.parse().map_err(|_| bad())?;
    if path.starts_with('/') && every.is_finite() && every >= 0.1 {
        Ok((path.to_string(), every))
    } else {
        Err(bad())
    }
}

/// One GET on a fresh connection: status, body, milliseconds.
async fn get(addr: SocketAddr, path: &str) -> Result<(u16, Vec<u8>, f64), BenchError> {
    use tokio::io::AsyncWriteExt;
    let t = Instant::now();
    let r = async {
        let mut sock = tokio::net::TcpStream::connect(addr).await?;
        let _ = sock.set_nodelay(true);
        sock.write_all(format!("GET {path} HTTP/1.1\r\nhost: bench\r\n\r\n").as_bytes())
            .await?;
        let mut buf = Vec::new();
        let (status, len) = read_response(&mut sock, &mut buf).await?;
        let body = buf.split_off(buf.len().saturating_sub(len));
        Ok::<_, std::io::Error>((status, body))
    };
    let (status, body) = tokio::time::timeout(Duration::from_secs(60), r)
        .await
        .map_err(|_| BenchError::Lost(format!("GET {path}: no answer in 60 s")))?
        .map_err(io_err(format!("GET {path}")))?;
    Ok((status, body, t.elapsed().as_secs_f64() * 1e3))
}

/// Picks a free port of each kind by binding port 0 and letting it go (the
/// daemon binds it a moment later, as the ingest phase does).
fn free_ports(udp: usize) -> Result<(SocketAddr, Vec<SocketAddr>), BenchError> {
    let http = std::net::TcpListener::bind("127.0.0.1:0")
        .and_then(|l| l.local_addr())
        .map_err(io_err("pick an HTTP port"))?;
    // Hold every UDP socket until all are picked, so no two are the same.
    let socks = (0..udp)
        .map(|_| UdpSocket::bind("127.0.0.1:0"))
        .collect::<Result<Vec<_>, _>>()
        .map_err(io_err("pick UDP ports"))?;
    let addrs = socks
        .iter()
        .map(UdpSocket::local_addr)
        .collect::<Result<Vec<_>, _>>()
        .map_err(io_err("UDP port"))?;
    Ok((http, addrs))
}

/// What the sender process did; printed as one JSON line.
#[derive(Debug, Clone, Default, Serialize, Deserialize, PartialEq)]
pub(crate) struct SenderReport {
    pub(crate) sources: usize,
    pub(crate) datagrams: u64,
    pub(crate) bytes: u64,
    pub(crate) send_errors: u64,
    /// Samples sent (instants × channels), all sources.
    pub(crate) samples: u64,
    /// Largest lateness of a datagram against its real-time due time, s.
    pub(crate) behind_max_s: f64,
    /// Datagrams sent more than 50 ms after they were due.
    pub(crate) late_datagrams: u64,
    pub(crate) seconds: f64,
}

/// The sender process (`bench --plant-send-to ADDR,…`): every source's
/// frames, paced to real time, source `i` offset by i/sources of a frame
/// (boxes that do not send in step). Frames come from a pool encoded
/// once per source shape and are restamped (index, time, CRC) per send.
pub(crate) fn sender(args: &BenchArgs) -> Result<SenderReport, BenchError> {
    let plan = PlantPlan::new(
        args.plant_channels,
        args.plant_per_source,
        args.plant_rate_hz,
        args.n,
        args.plant_frame_samples,
    )?;
    check_gain(args.plant_signal_gain)?;
    let fs = plan.sample_rate_hz;
    let sources = plan.sources();
    if args.plant_send_to.len() != sources {
        return Err(BenchError::Usage(format!(
            "--plant-send-to has {} addresses for {sources} sources",
            args.plant_send_to.len()
        )));
    }
    let s = plan.frame_samples;
    let gain = args.plant_signal_gain as f32;
    let signal: Vec<f32> = test_signal((4.0 * fs) as usize, fs)
        .into_iter()
        .map(|v| v * gain)
        .collect();
    // Pools by channel count (the last source may be smaller).
    let mut pools: BTreeMap<usize, (Vec<u8>, usize)> = BTreeMap::new();
    for i in 0..sources {
        let c = plan.source_channels(i);
        pools
            .entry(c)
            .or_insert_with(|| encode_frames(WIRE_FORMAT, c, POOL_FRAMES * s, s, &signal, fs));
    }
    let socks = args
        .plant_send_to
        .iter()
        .map(|t| {
            let u = UdpSocket::bind(if t.is_ipv4() {
                "127.0.0.1:0"
            } else {
                "[::1]:0"
            })?;
            u.connect(t)?;
            Ok(u)
        })
        .collect::<Result<Vec<_>, std::io::Error>>()
        .map_err(io_err("sender sockets"))?;
    let total_frames = (args.plant_seconds * fs) as u64 / s as u64;
    let start_ns = unix_now_ns();
    let mut next = vec![0u64; sources];
    let mut rep = SenderReport {
        sources,
        ..SenderReport::default()
    };
    let mut scratch = Vec::new();
    let t0 = Instant::now();
    let frame_s = s as f64 / fs;
    loop {
        let now = t0.elapsed().as_secs_f64();
        let mut earliest = f64::INFINITY;
        let mut done = true;
        for (i, sock) in socks.iter().enumerate() {
            let (pool, fb) = &pools[&plan.source_channels(i)];
            let nf = pool.len() / fb;
            while next[i] < total_frames {
                let due = (next[i] as f64 + i as f64 / sources as f64) * frame_s;
                if due > now {
                    earliest = earliest.min(due);
                    break;
                }
                let late = now - due;
                rep.behind_max_s = rep.behind_max_s.max(late);
                if late > 0.05 {
                    rep.late_datagrams += 1;
                }
                let k = (next[i] as usize + 7 * i) % nf;
                scratch.clear();
                scratch.extend_from_slice(&pool[k * fb..(k + 1) * fb]);
                let first = next[i] * s as u64;
                let ts = start_ns + (first as f64 * 1e9 / fs) as u64;
                bwf1::restamp(&mut scratch, first, ts, fs)
                    .map_err(|e| BenchError::Lost(format!("restamp a plant frame: {e}")))?;
                match sock.send(&scratch) {
                    Ok(n) => {
                        rep.datagrams += 1;
                        rep.bytes += n as u64;
                    }
                    Err(_) => rep.send_errors += 1,
                }
                rep.samples += (s * plan.source_channels(i)) as u64;
                next[i] += 1;
            }
            done &= next[i] >= total_frames;
        }
        if done {
            break;
        }
        let wait = (earliest - t0.elapsed().as_secs_f64()).clamp(0.0002, 0.005);
        std::thread::sleep(Duration::from_secs_f64(wait));
    }
    rep.seconds = t0.elapsed().as_secs_f64();
    Ok(rep)
}

/// One scrape as seen from the scraper.
#[derive(Debug, Clone, Serialize)]
pub(crate) struct ScrapeRecord {
    /// Seconds since the sender started.
    pub(crate) at_s: f64,
    pub(crate) status: u16,
    pub(crate) ms: f64,
    pub(crate) bytes: usize,
    pub(crate) in_window: bool,
    /// Largest spectrum age and DSP lag of any channel in this scrape, s.
    pub(crate) age_max_s: f64,
    pub(crate) lag_max_s: f64,
}

/// Periodic GETs of `--plant-poll`.
#[derive(Debug, Clone, Serialize)]
pub(crate) struct PollRecord {
    pub(crate) path: String,
    pub(crate) every_s: f64,
    pub(crate) ms: Vec<f64>,
    pub(crate) non_200: u64,
}

/// The plant run's figures (`--json`: the `plant` object).
#[derive(Debug, Clone, Serialize)]
pub(crate) struct PlantReport {
    pub(crate) plan: PlantPlan,
    pub(crate) sources: usize,
    pub(crate) wire_format: &'static str,
    pub(crate) datagram_bytes: usize,
    pub(crate) aggregate_samples_per_s: f64,
    pub(crate) warmup_s: f64,
    /// Length of the measured window, s (CPU, RSS end, age, lag).
    pub(crate) window_s: f64,
    pub(crate) scrape_every_s: f64,
    pub(crate) clock_ticks_per_s: f64,
    pub(crate) clock_ticks_read: bool,
    /// Daemon CPU over the window, cores.
    pub(crate) daemon_cores: f64,
    /// Sender CPU over the window, cores (its sends' loopback delivery in
    /// the kernel included).
    pub(crate) sender_cores: f64,
    /// Daemon CPU through the run: [seconds since the sender started,
    /// cores since the previous entry] (about one a second; longer when a
    /// scrape held the loop).
    pub(crate) daemon_cores_timeline: Vec<[f64; 2]>,
    pub(crate) rss_start: u64,
    pub(crate) rss_warm: u64,
    pub(crate) rss_end: u64,
    pub(crate) rss_max: u64,
    pub(crate) spectrum_age_p50_s: f64,
    pub(crate) spectrum_age_p99_s: f64,
    pub(crate) spectrum_age_max_s: f64,
    /// Channels without a spectrum at the last window scrape.
    pub(crate) channels_without_spectrum: usize,
    pub(crate) signal_gain: f64,
    pub(crate) dsp_lag_p99_s: f64,
    pub(crate) dsp_lag_max_s: f64,
    /// Most samples a gathering channel holds back for its next result,
    /// in seconds: lag up to this is waiting, not falling behind.
    pub(crate) gather_s: f64,
    pub(crate) scrapes: Vec<ScrapeRecord>,
    pub(crate) polls: Vec<PollRecord>,
    pub(crate) sender: SenderReport,
    /// The daemon's counters after the sender stopped and it drained.
    pub(crate) end: Digest,
    /// Samples sent − received − dropped (every reason): the balance,
    /// 0 when every lost sample is counted.
    pub(crate) unaccounted_samples: i64,
    pub(crate) daemon_log_warnings: usize,
    pub(crate) daemon_log_first: Vec<String>,
    pub(crate) held: bool,
    pub(crate) verdict: Vec<String>,
    pub(crate) not_in_this_build: Vec<String>,
}

/// Children of the run: killed (by their own id) if the run ends early.
struct Children {
    daemon: Option<Child>,
    sender: Option<Child>,
}

impl Drop for Children {
    fn drop(&mut self) {
        for c in [self.sender.as_mut(), self.daemon.as_mut()]
            .into_iter()
            .flatten()
        {
            if matches!(c.try_wait(), Ok(None)) {
                let _ = c.kill();
            }
            let _ = c.wait();
        }
    }
}

fn alive(c: &mut Option<Child>, what: &str, log: &Path) -> Result<(), BenchError> {
    if let Some(ch) = c.as_mut() {
        if let Ok(Some(status)) = ch.try_wait() {
            return Err(BenchError::Lost(format!(
                "the {what} exited early ({status}); log tail: {}",
                log_tail(log, 8).join(" | ")
            )));
        }
    }
    Ok(())
}

fn log_tail(log: &Path, n: usize) -> Vec<String> {
    let t = std::fs::read_to_string(log).unwrap_or_default();
    let lines: Vec<&str> = t.lines().collect();
    lines[lines.len().saturating_sub(n)..]
        .iter()
        .map(|s| s.to_string())
        .collect()
}

/// Stops the daemon with SIGTERM (`kill -TERM PID`: graceful, as a service
/// manager would), SIGKILL after 20 s.
fn stop_daemon(child: &mut Child) {
    let _ = Command::new("kill")
        .args(["-TERM", &child.id().to_string()])
        .status();
    let t = Instant::now();
    while t.elapsed() < Duration::from_secs(20) {
        if matches!(child.try_wait(), Ok(Some(_))) {
            return;
        }
        std::thread::sleep(Duration::from_millis(100));
    }
    let _ = child.kill();
    let _ = child.wait();
}

/// Runs the plant phase and adds its rows and notes.
pub(crate) fn plant_phase(
    args: &BenchArgs,
    rows: &mut Vec<Row>,
    notes: &mut Vec<String>,
) -> Result<PlantReport, BenchError> {
    let plan = PlantPlan::new(
        args.plant_channels,
        args.plant_per_source,
        args.plant_rate_hz,
        args.n,
        args.plant_frame_samples,
    )?;
    let polls_spec = args
        .plant_poll
        .iter()
        .map(|p| parse_poll(p))
        .collect::<Result<Vec<_>, _>>()?;
    check_gain(args.plant_signal_gain)?;
    let every = args.plant_scrape_every;
    if !(every.is_finite() && every >= 1.0) {
        return Err(BenchError::Usage(
            "--plant-scrape-every must be at least 1 s".into(),
        ));
    }
    let warmup = args.plant_warmup_seconds.max(0.0);
    let seconds = args.plant_seconds;
    if !(seconds.is_finite() && seconds >= 2.0) {
        return Err(BenchError::Usage(
            "--plant-seconds must be at least 2".into(),
        ));
    }
    let fs = plan.sample_rate_hz;
    let sources = plan.sources();
    let scratch: PathBuf =
        std::env::temp_dir().join(format!("bandwatch-plant-{}", std::process::id()));
    std::fs::create_dir_all(&scratch).map_err(io_err(format!("create {}", scratch.display())))?;
    let result = run_plant(args, &plan, &polls_spec, warmup, seconds, &scratch);
    let _ = std::fs::remove_dir_all(&scratch);
    let report = result?;

    let row = |case: &str, unit: &str, v: f64, target: Option<&str>| Row {
        phase: "plant".into(),
        case: case.into(),
        unit: unit.into(),
        value: Summary::of(&[v]),
        ratio: None,
        target: target.map(Into::into),
    };
    let tag = format!("{}ch {} Hz", plan.channels, fs);
    rows.push(row(
        &format!("{tag} daemon CPU"),
        "cores",
        report.daemon_cores,
        Some("< 2 cores"),
    ));
    rows.push(row(
        &format!("{tag} sender CPU"),
        "cores",
        report.sender_cores,
        None,
    ));
    rows.push(row(
        &format!("{tag} dropped"),
        "samples",
        report.end.dropped_samples() as f64,
        Some("0"),
    ));
    rows.push(row(
        &format!("{tag} received"),
        "of sent",
        report.end.received as f64 / report.sender.samples.max(1) as f64,
        Some("1"),
    ));
    rows.push(row(
        &format!("{tag} unaccounted"),
        "samples",
        report.unaccounted_samples as f64,
        Some("0"),
    ));
    rows.push(row(
        &format!("{tag} spectrum age p99"),
        "s",
        report.spectrum_age_p99_s,
        None,
    ));
    rows.push(row(
        &format!("{tag} spectrum age max"),
        "s",
        report.spectrum_age_max_s,
        None,
    ));
    rows.push(row(
        &format!("{tag} DSP lag p99"),
        "s",
        report.dsp_lag_p99_s,
        None,
    ));
    rows.push(row(
        &format!("{tag} DSP lag max"),
        "s",
        report.dsp_lag_max_s,
        None,
    ));
    rows.push(row(
        &format!("{tag} RSS start"),
        "bytes",
        report.rss_start as f64,
        None,
    ));
    rows.push(row(
        &format!("{tag} RSS warm"),
        "bytes",
        report.rss_warm as f64,
        None,
    ));
    rows.push(row(
        &format!("{tag} RSS end"),
        "bytes",
        report.rss_end as f64,
        None,
    ));
    let scrape_ms: Vec<f64> = report.scrapes.iter().map(|s| s.ms).collect();
    rows.push(row(
        &format!("{tag} /metrics p50"),
        "ms",
        percentile(&scrape_ms, 50.0),
        None,
    ));
    rows.push(row(
        &format!("{tag} /metrics max"),
        "ms",
        percentile(&scrape_ms, 100.0),
        None,
    ));
    rows.push(row(
        &format!("{tag} /metrics body"),
        "bytes",
        report.scrapes.last().map_or(f64::NAN, |s| s.bytes as f64),
        None,
    ));
    rows.push(row(
        &format!("{tag} sender behind"),
        "s max",
        report.sender.behind_max_s,
        None,
    ));
    notes.push(format!(
        "plant: {} channels x {} Hz in {} UDP sources of {} ({} i16 instants a datagram, {} bytes); N = {}, 75 % overlap, linear average of {AVERAGES}; band and overall alarms on every channel; test signal x {}; /metrics every {every} s; warm-up {warmup} s, window {:.1} s; CPU from /proc utime+stime at {} ticks/s{}",
        plan.channels,
        fs,
        sources,
        plan.per_source,
        plan.frame_samples,
        report.datagram_bytes,
        plan.n,
        args.plant_signal_gain,
        report.window_s,
        report.clock_ticks_per_s,
        if report.clock_ticks_read { "" } else { " (assumed: getconf failed)" }
    ));
    notes.push(format!(
        "plant: sent {} samples, daemon received {}, processed {}; dropped by reason {:?}; missing instants {}, late frames {}, rejected {:?}, restarts {:?}, CRC errors {}, skipped bytes {}; alarm I/O records dropped {:?}; sender: {} datagrams, {} send errors, {} sent > 50 ms late",
        report.sender.samples,
        report.end.received,
        report.end.processed,
        report.end.dropped,
        report.end.missing_instants,
        report.end.late_frames,
        report.end.rejected,
        report.end.restarts,
        report.end.crc_errors,
        report.end.skipped_bytes,
        report.end.alarm_records_dropped,
        report.sender.datagrams,
        report.sender.send_errors,
        report.sender.late_datagrams
    ));
    for p in &report.polls {
        notes.push(format!(
            "plant: GET {} every {} s: {} requests, p50 {:.1} ms, p99 {:.1} ms, {} non-200",
            p.path,
            p.every_s,
            p.ms.len(),
            percentile(&p.ms, 50.0),
            percentile(&p.ms, 99.0),
            p.non_200
        ));
    }
    notes.push(format!(
        "plant: {} — {}",
        if report.held { "HELD" } else { "NOT HELD" },
        report.verdict.join("; ")
    ));
    for n in &report.not_in_this_build {
        notes.push(format!("plant: not run: {n}"));
    }
    Ok(report)
}

fn run_plant(
    args: &BenchArgs,
    plan: &PlantPlan,
    polls_spec: &[(String, f64)],
    warmup: f64,
    seconds: f64,
    scratch: &Path,
) -> Result<PlantReport, BenchError> {
    let fs = plan.sample_rate_hz;
    let sources = plan.sources();
    let every = args.plant_scrape_every;
    let (http, udp) = free_ports(sources)?;
    let text = plant_config_text(plan, http, &udp, &scratch.join("alarms"));
    let config = parse_config(&text)?;
    // A gathering worker waits for a whole result, at most half the ring
    // (`ChannelDsp::set_gather`).
    let gather_s = config.channels.first().map_or(0.0, |c| {
        let result = c.block + c.average_count.saturating_sub(1) as usize * c.hop;
        let half_ring = RingSize::FromConfig.capacity(&config, c) / 2;
        result.min(half_ring) as f64 / fs
    });
    let config_path = scratch.join("plant.toml");
    std::fs::write(&config_path, &text).map_err(io_err("write the plant config"))?;
    let exe = std::env::current_exe().map_err(io_err("current executable"))?;
    let log_path = scratch.join("daemon.log");
    let log = std::fs::File::create(&log_path).map_err(io_err("daemon log"))?;
    let rt = tokio::runtime::Builder::new_current_thread()
        .enable_all()
        .build()
        .map_err(io_err("async runtime"))?;
    let (ticks, ticks_read) = clock_ticks();

    eprintln!(
        "bench: plant: starting the daemon ({} channels, {sources} UDP sources)",
        plan.channels
    );
    let mut kids = Children {
        daemon: Some(
            Command::new(&exe)
                .args(["--log-format", "json", "run", "--config"])
                .arg(&config_path)
                .env("RUST_LOG", "warn")
                .stdin(Stdio::null())
                .stdout(Stdio::null())
                .stderr(log)
                .spawn()
                .map_err(io_err("start the daemon"))?,
        ),
        sender: None,
    };
    let daemon_pid = kids.daemon.as_ref().map_or(0, Child::id);
    // Up when /healthz answers (the pipeline, its rings and sources exist).
    let t_up = Instant::now();
    loop {
        alive(&mut kids.daemon, "daemon", &log_path)?;
        if let Ok((200, _, _)) = rt.block_on(get(http, "/healthz")) {
            break;
        }
        if t_up.elapsed() > Duration::from_secs(120) {
            return Err(BenchError::Lost(
                "the daemon did not answer /healthz in 120 s".into(),
            ));
        }
        std::thread::sleep(Duration::from_millis(200));
    }
    // Let every source task bind its socket.
    std::thread::sleep(Duration::from_secs(1));
    let rss_start = rss_of(daemon_pid).unwrap_or(0);
    eprintln!(
        "bench: plant: daemon up in {:.1} s, RSS {:.0} MB; sending for {warmup} + {seconds} s",
        t_up.elapsed().as_secs_f64(),
        rss_start as f64 / 1e6
    );

    // The sender sends 3 s past the window, so the last scrape is under load.
    let total = warmup + seconds;
    let send_for = total + 3.0;
    let targets: Vec<String> = udp.iter().map(ToString::to_string).collect();
    let mut cmd = Command::new(&exe);
    cmd.args(["bench", "--n", &plan.n.to_string()])
        .args(["--plant-channels", &plan.channels.to_string()])
        .args(["--plant-per-source", &plan.per_source.to_string()])
        .args(["--plant-rate-hz", &format!("{fs:?}")])
        .args(["--plant-frame-samples", &plan.frame_samples.to_string()])
        .args([
            "--plant-signal-gain",
            &format!("{:?}", args.plant_signal_gain),
        ])
        .args(["--plant-seconds", &format!("{send_for:?}")])
        .args(["--plant-send-to", &targets.join(",")])
        .stdin(Stdio::null())
        .stdout(Stdio::piped())
        .stderr(Stdio::inherit());
    kids.sender = Some(cmd.spawn().map_err(io_err("start the sender"))?);
    let sender_pid = kids.sender.as_ref().map_or(0, Child::id);
    let t0 = Instant::now();

    let mut scrapes = Vec::new();
    let mut window_digests: Vec<Digest> = Vec::new();
    let mut polls: Vec<PollRecord> = polls_spec
        .iter()
        .map(|(p, e)| PollRecord {
            path: p.clone(),
            every_s: *e,
            ms: Vec::new(),
            non_200: 0,
        })
        .collect();
    let mut poll_next: Vec<f64> = polls_spec.iter().map(|(_, e)| *e).collect();
    let mut next_scrape = every;
    let mut next_tick = 1.0;
    let mut last_cpu = (0.0, cpu_seconds(daemon_pid, ticks).unwrap_or(0.0));
    let mut daemon_cores_timeline = Vec::new();
    let mut rss_max = rss_start;
    let mut warm: Option<(f64, f64, f64, u64)> = None; // t, daemon cpu, sender cpu, rss
    let scrape = |rt: &tokio::runtime::Runtime,
                  at: f64,
                  in_window: bool,
                  scrapes: &mut Vec<ScrapeRecord>|
     -> Result<Digest, BenchError> {
        let (status, body, ms) = rt.block_on(get(http, "/metrics"))?;
        let d = digest(&String::from_utf8_lossy(&body), fs);
        let age_max_s = percentile(&d.ages, 100.0);
        let lag_max_s = percentile(&d.lags, 100.0);
        scrapes.push(ScrapeRecord {
            at_s: at,
            status,
            ms,
            bytes: body.len(),
            in_window,
            age_max_s,
            lag_max_s,
        });
        eprintln!(
            "bench: plant: t = {at:.0} s: /metrics {status}, {:.1} MB in {ms:.0} ms; age max {age_max_s:.3} s, lag max {lag_max_s:.3} s, dropped {} samples",
            body.len() as f64 / 1e6,
            d.dropped_samples()
        );
        Ok(d)
    };
    let end: (f64, f64, f64, u64) = loop {
        let now = t0.elapsed().as_secs_f64();
        if now >= next_tick {
            alive(&mut kids.daemon, "daemon", &log_path)?;
            let cpu = cpu_seconds(daemon_pid, ticks).unwrap_or(last_cpu.1);
            let dt = now - last_cpu.0;
            if dt > 0.0 {
                daemon_cores_timeline.push([now, (cpu - last_cpu.1) / dt]);
            }
            last_cpu = (now, cpu);
            rss_max = rss_max.max(rss_of(daemon_pid).unwrap_or(0));
            next_tick = now.floor() + 1.0;
        }
        if warm.is_none() && now >= warmup {
            warm = Some((
                now,
                cpu_seconds(daemon_pid, ticks).unwrap_or(0.0),
                cpu_seconds(sender_pid, ticks).unwrap_or(0.0),
                rss_of(daemon_pid).unwrap_or(0),
            ));
        }
        if now >= total {
            let end = (
                now,
                cpu_seconds(daemon_pid, ticks).unwrap_or(0.0),
                cpu_seconds(sender_pid, ticks).unwrap_or(0.0),
                rss_of(daemon_pid).unwrap_or(0),
            );
            // The window ends with a scrape (unless one was just taken).
            if scrapes
                .last()
                .is_none_or(|s: &ScrapeRecord| now - s.at_s > 1.0)
            {
                window_digests.push(scrape(&rt, now, true, &mut scrapes)?);
            }
            break end;
        }
        if now >= next_scrape {
            let in_window = warm.is_some();
            let d = scrape(&rt, now, in_window, &mut scrapes)?;
            if in_window {
                window_digests.push(d);
            }
            next_scrape += every;
        }
        for (k, (path, e)) in polls_spec.iter().enumerate() {
            if now >= poll_next[k] {
                let (status, _, ms) = rt.block_on(get(http, path))?;
                polls[k].ms.push(ms);
                if status != 200 {
                    polls[k].non_200 += 1;
                }
                poll_next[k] += e;
            }
        }
        let next = [next_tick, next_scrape, total, warmup]
            .into_iter()
            .chain(poll_next.iter().copied())
            .filter(|t| *t > now)
            .fold(f64::INFINITY, f64::min);
        let wait = (next - t0.elapsed().as_secs_f64()).clamp(0.001, 0.5);
        std::thread::sleep(Duration::from_secs_f64(wait));
    };

    // The sender stops by itself 3 s later; read its report.
    let mut sender = kids
        .sender
        .take()
        .ok_or_else(|| BenchError::Lost("sender".into()))?;
    let t_wait = Instant::now();
    let status = loop {
        if let Ok(Some(st)) = sender.try_wait() {
            break st;
        }
        if t_wait.elapsed() > Duration::from_secs(60) {
            let _ = sender.kill();
            let _ = sender.wait();
            return Err(BenchError::Lost("the sender did not stop in 60 s".into()));
        }
        std::thread::sleep(Duration::from_millis(100));
    };
    let mut out = String::new();
    if let Some(mut so) = sender.stdout.take() {
        so.read_to_string(&mut out)
            .map_err(io_err("sender output"))?;
    }
    let sender_rep: SenderReport = serde_json::from_str(out.trim())
        .map_err(|e| BenchError::Lost(format!("sender ({status}) printed {out:?}: {e}")))?;
    // Let the daemon take what is still in its sockets, then count.
    std::thread::sleep(Duration::from_secs(2));
    let end_digest = scrape(&rt, t0.elapsed().as_secs_f64(), false, &mut scrapes)?;
    if let Some(d) = kids.daemon.as_mut() {
        stop_daemon(d);
    }
    kids.daemon = None;

    let (tw, dw, sw, rss_warm) = warm.unwrap_or((0.0, 0.0, 0.0, rss_start));
    let (te, de, se, rss_end) = end;
    let window_s = te - tw;
    let ages: Vec<f64> = window_digests
        .iter()
        .flat_map(|d| d.ages.iter().copied())
        .collect();
    let lags: Vec<f64> = window_digests
        .iter()
        .flat_map(|d| d.lags.iter().copied())
        .collect();
    let without = window_digests.last().map_or(plan.channels, |d| {
        plan.channels.saturating_sub(d.ages.len())
    });
    let dropped = end_digest.dropped_samples();
    let unaccounted = sender_rep.samples as i64 - end_digest.received as i64 - dropped as i64;
    let stale_s = (3.0 * (plan.n / 4 * AVERAGES as usize) as f64 / fs).max(2.0);
    let age_p99 = percentile(&ages, 99.0);
    let mut verdict = Vec::new();
    let faults = end_digest.source_faults();
    verdict.push(format!(
        "samples dropped {dropped} of {} sent ({:.1} % received); source faults {faults}",
        sender_rep.samples,
        100.0 * end_digest.received as f64 / (sender_rep.samples.max(1)) as f64
    ));
    verdict.push(format!("sent - received - dropped: {unaccounted}"));
    verdict.push(format!(
        "spectrum age p99 {age_p99:.3} s (stale after {stale_s:.2} s), {without} channel(s) without a spectrum"
    ));
    verdict.push(format!(
        "sender at most {:.3} s behind real time",
        sender_rep.behind_max_s
    ));
    let held = dropped == 0
        && faults == 0
        && end_digest.received == sender_rep.samples
        && sender_rep.send_errors == 0
        && without == 0
        && age_p99 < stale_s
        && sender_rep.behind_max_s < 0.5;
    let log_text = std::fs::read_to_string(&log_path).unwrap_or_default();
    let warn_lines: Vec<String> = log_text
        .lines()
        .filter(|l| l.contains("\"level\":\"WARN\"") || l.contains("\"level\":\"ERROR\""))
        .map(str::to_string)
        .collect();
    Ok(PlantReport {
        plan: *plan,
        sources,
        wire_format: WIRE_FORMAT.as_str(),
        datagram_bytes: datagram_bytes(plan.per_source, plan.frame_samples),
        aggregate_samples_per_s: plan.channels as f64 * fs,
        warmup_s: tw,
        window_s,
        scrape_every_s: every,
        clock_ticks_per_s: ticks,
        clock_ticks_read: ticks_read,
        daemon_cores: if window_s > 0.0 { (de - dw) / window_s } else { f64::NAN },
        sender_cores: if window_s > 0.0 { (se - sw) / window_s } else { f64::NAN },
        daemon_cores_timeline,
        rss_start,
        rss_warm,
        rss_end,
        rss_max,
        spectrum_age_p50_s: percentile(&ages, 50.0),
        spectrum_age_p99_s: age_p99,
        spectrum_age_max_s: percentile(&ages, 100.0),
        channels_without_spectrum: without,
        signal_gain: args.plant_signal_gain,
        dsp_lag_p99_s: percentile(&lags, 99.0),
        dsp_lag_max_s: percentile(&lags, 100.0),
        gather_s,
        scrapes,
        polls,
        sender: sender_rep,
        end: end_digest,
        unaccounted_samples: unaccounted,
        daemon_log_warnings: warn_lines.len(),
        daemon_log_first: warn_lines.into_iter().take(5).collect(),
        held,
        verdict,
        not_in_this_build: vec![
            "history writing (the daemon has no history store yet; its table goes into the generated config, plant_config_text)".into(),
            "one open page (none exists yet; --plant-poll PATH@SECONDS adds what it would poll)".into(),
        ],
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::config::{AlarmTarget, SourceKind};

    fn plan(channels: usize, per_source: usize) -> PlantPlan {
        PlantPlan::new(channels, per_source, 25_600.0, 8192, None).expect("plan")
    }

    #[test]
    fn frame_size_is_the_largest_that_fits_one_datagram() {
        // 64 i16 channels: 256 instants = 32 768 + 40 bytes; 512 would be
        // 65 576, over the IPv4 UDP payload limit of 65 507 (RFC 768 / RFC
        // 791 sizes: 65 535 − 8 − 20).
        assert_eq!(auto_frame_samples(64), 256);
        assert_eq!(datagram_bytes(64, 256), 32_808);
        assert!(datagram_bytes(64, 512) > UDP_MAX_PAYLOAD);
        assert_eq!(auto_frame_samples(16), 1024);
        assert_eq!(auto_frame_samples(1024), 16);
        assert!(PlantPlan::new(64, 64, 25_600.0, 8192, Some(512)).is_err());
        assert!(PlantPlan::new(64, 2000, 25_600.0, 8192, None).is_err());
    }

    #[test]
    fn config_splits_channels_over_udp_sources_with_alarms_on_every_channel() {
        let p = plan(150, 64);
        assert_eq!(p.sources(), 3);
        assert_eq!(
            (
                p.source_channels(0),
                p.source_channels(1),
                p.source_channels(2)
            ),
            (64, 64, 22)
        );
        let http: SocketAddr = "127.0.0.1:9000".parse().expect("addr");
        let udp: Vec<SocketAddr> = (0..3)
            .map(|i| format!("127.0.0.1:{}", 9100 + i).parse().expect("addr"))
            .collect();
        let text = plant_config_text(&p, http, &udp, Path::new("/tmp/x"));
        let c = parse_config(&text).expect("the generated config validates");
        assert_eq!(c.listen, http);
        assert_eq!(c.sources.len(), 3);
        for (s, spec) in c.sources.iter().enumerate() {
            assert_eq!(spec.channels, p.source_channels(s));
            match &spec.kind {
                SourceKind::Udp {
                    listen,
                    max_datagram_bytes,
                } => {
                    assert_eq!(*listen, udp[s]);
                    assert!(datagram_bytes(spec.channels, p.frame_samples) <= *max_datagram_bytes);
                }
                other => panic!("source {s} is {}", other.as_str()),
            }
        }
        assert_eq!(c.channels.len(), 150);
        let last = &c.channels[149];
        assert_eq!((last.source.as_str(), last.index), ("daq002", 21));
        for ch in &c.channels {
            assert_eq!(ch.block, 8192);
            assert_eq!(ch.hop, 2048, "75 % overlap");
            assert!(ch
                .alarms
                .iter()
                .any(|a| matches!(a.target, AlarmTarget::Band(_))));
            assert!(ch
                .alarms
                .iter()
                .any(|a| a.target == AlarmTarget::OverallRms));
        }
    }

    #[test]
    fn proc_stat_cpu_is_utime_plus_stime() {
        // proc(5): field 14 utime, 15 stime; the name may hold ") (".
        let line = "4242 (bandwatch (x) run) S 1 4242 4242 0 -1 4194560 6330 0 0 0 1234 567 0 0 20 0 9 0 100 0 0";
        assert_eq!(stat_cpu_ticks(line), Some(1234 + 567));
        assert_eq!(stat_cpu_ticks("4242 (x) S 1 2"), None);
    }

    #[test]
    fn exposition_lines_parse_and_digest() {
        let body = "# HELP x y\n\
            bandwatch_channel_spectrum_age_seconds{channel=\"ch0000\"} 0.25\n\
            bandwatch_channel_spectrum_age_seconds{channel=\"ch0001\"} 1.5\n\
            bandwatch_channel_samples_received_total{channel=\"ch0000\"} 51200\n\
            bandwatch_channel_samples_processed_total{channel=\"ch0000\"} 25600\n\
            bandwatch_channel_samples_received_total{channel=\"ch0001\"} 100\n\
            bandwatch_channel_samples_processed_total{channel=\"ch0001\"} 100\n\
            bandwatch_channel_samples_dropped_total{channel=\"ch0000\",reason=\"ring_overflow\"} 7\n\
            bandwatch_channel_samples_dropped_total{channel=\"ch0001\",reason=\"ring_overflow\"} 3\n\
            bandwatch_source_missing_samples_total{source=\"daq000\"} 256\n\
            bandwatch_source_rejected_total{source=\"daq000\",reason=\"bad_crc\"} 2\n\
            bandwatch_source_restarts_total{source=\"daq000\",reason=\"backward_jump\"} 1\n\
            bandwatch_alarm_records_dropped_total{kind=\"event\"} 4\n";
        let d = digest(body, 25_600.0);
        assert_eq!(d.ages, vec![0.25, 1.5]);
        assert_eq!((d.received, d.processed), (51_300, 25_700));
        assert_eq!(d.lags, vec![1.0, 0.0]);
        assert_eq!(d.dropped.get("ring_overflow"), Some(&10));
        assert_eq!(d.missing_instants, 256);
        assert_eq!(d.dropped_samples(), 10);
        assert_eq!(d.source_faults(), 256 + 2 + 1);
        assert_eq!(d.alarm_records_dropped.get("event"), Some(&4));
        let s = parse_prom_line(r#"m{a="x\"y\\z",b="q"} 1e3 17"#).expect("line");
        assert_eq!(s.name, "m");
        assert_eq!(
            s.labels,
            vec![("a", "x\"y\\z".to_string()), ("b", "q".into())]
        );
        assert_eq!(s.value, 1000.0);
        assert_eq!(parse_prom_line("up 1").map(|s| s.value), Some(1.0));
        assert!(parse_prom_line("# TYPE up gauge").is_none());
        assert!(parse_prom_line("broken{a=\"x} 1").is_none());
    }

    #[test]
    fn poll_specs() {
        assert_eq!(
            parse_poll("/api/v1/channels@1").expect("ok"),
            ("/api/v1/channels".to_string(), 1.0)
        );
        assert!(parse_poll("api@1").is_err());
        assert!(parse_poll("/x@0").is_err());
        assert!(parse_poll("/x").is_err());
    }
}
